"""`vservo compare` as a repeatability study, on three SYNTHETIC TEST DATA runs that converge
with different gains and tolerances and one that halts: the statistics against Python's own
`statistics` module, the files it writes, and a table narrow enough for the page."""
from __future__ import annotations

import csv
import statistics

import pytest

import synthetic as syn
from vservo_node import cli
from vservo_node.record.bag import RunRecorder, load_run
from vservo_node.record.compare import stats
from vservo_node.record.metrics import compute_metrics


@pytest.fixture(scope="module")
def three(tmp_path_factory):
    root = tmp_path_factory.mktemp("three")
    bags = []
    for i, (gain, tol) in enumerate(((1.2, 0.4), (1.5, 0.5), (2.0, 0.6))):
        spec = syn.Spec(gain=gain, tolerance_px=tol)
        with RunRecorder(root, f"run{i}", params=spec.params()) as rec:
            syn.record_with(rec, spec)
        bags.append(rec.bag_dir)
    return bags


def test_stats_against_the_statistics_module():
    values = [0.12, 0.31, 0.08, None, 0.2, float("nan")]
    finite = [0.12, 0.31, 0.08, 0.2]
    s = stats(values)
    assert s["n"] == 4
    assert s["mean"] == pytest.approx(statistics.mean(finite))
    assert s["sd"] == pytest.approx(statistics.stdev(finite))     # sample SD, n - 1
    assert s["range"] == pytest.approx(0.31 - 0.08)
    assert stats([1.0])["sd"] is None and stats([None]) is None


def test_repeatability_table_files_and_page(three, halted, tmp_path, capsys):
    bags = [*three, halted]
    assert cli.main(["compare", *map(str, bags), "--out", str(tmp_path)]) == 0
    printed = capsys.readouterr().out
    metrics = [compute_metrics(load_run(b)) for b in bags]
    converged = [m for m in metrics if m["converged"]]
    assert len(converged) == 3
    with open(tmp_path / "repeatability.csv", newline="") as f:
        study = {r["figure"]: r for r in csv.DictReader(f)}
    times = [m["time_to_converge_s"] for m in converged]
    row = study["time to converge"]
    assert int(row["n"]) == 3                        # the halted run is left out
    assert float(row["mean"]) == pytest.approx(statistics.mean(times))
    assert float(row["sd"]) == pytest.approx(statistics.stdev(times))
    joint = study["final vs6_j1"]
    finals = [m["final_joints"]["vs6_j1"] for m in converged]
    assert float(joint["range"]) == pytest.approx(max(finals) - min(finals))
    assert "time to converge" in printed and "final vs6_j1" in printed
    with open(tmp_path / "runs.csv", newline="") as f:
        runs = list(csv.DictReader(f))
    assert [r["label"] for r in runs] == ["#1", "#2", "#3", "#4"]
    assert runs[3]["verdict"] == "halted" and runs[3]["halt_reasons"] == "image_stale"
    assert [r["control.tolerance_px"] for r in runs[:3]] == ["0.4", "0.5", "0.6"]
    with open(tmp_path / "series.csv", newline="") as f:
        series = list(csv.DictReader(f))
    for label, bag in zip(("#1", "#4"), (bags[0], bags[3])):
        run = load_run(bag)
        assert sum(r["label"] == label and r["source"] == "status" for r in series) == \
            len(run.status_t)
        assert sum(r["label"] == label and r["source"] == "camera" for r in series) == \
            len(run.camera_truth.t)
    page = (tmp_path / "compare.html").read_text()
    assert "control.tolerance_px" in page and halted.name in page
    # fits the page: no table wider than 11 columns, runs labelled #k instead of folder names
    for table in page.split("<table")[1:]:
        header = table.split("</tr>")[0]
        assert header.count("<th>") <= 11
