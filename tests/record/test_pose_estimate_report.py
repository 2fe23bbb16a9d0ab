"""The node's pose-error estimate (status pose_error_mm / _deg, result estimated_pose_error_*)
in the report's verdict and in a time-series figure beside ground truth, and in `vservo
compare`'s repeatability table when the records hold no ground truth. SYNTHETIC TEST DATA
(synthetic.py): the estimate is the true camera error scaled by a known bias."""
from __future__ import annotations

import csv
import html
import re
import statistics

import numpy as np
import pytest

import synthetic as syn
from vservo_node import cli
from vservo_node.record.bag import RunRecorder, load_run
from vservo_node.record.metrics import (arm_of_run, compute_metrics, goal_path, headline,
                                        motion_of_run, pose_estimate_series)
from vservo_node.record.report import write_report

CAPTION = "The node's pose-error estimate of each frame"
TOLERANCE = {"control.tolerance_mm": 0.5, "control.tolerance_deg": 0.1}


def _record(root, name, spec, extra=None):
    with RunRecorder(root, name, params={**spec.params(), **(extra or {})}) as rec:
        syn.record_with(rec, spec)
    return rec.bag_dir


@pytest.fixture(scope="module")
def with_truth(tmp_path_factory):
    spec = syn.Spec(estimate_bias=0.05)
    return spec, _record(tmp_path_factory.mktemp("est"), "estimated", spec, TOLERANCE)


@pytest.fixture(scope="module")
def without_truth(tmp_path_factory):
    root = tmp_path_factory.mktemp("cell")
    bags = []
    for i, (bias, gain) in enumerate(((0.02, 1.2), (0.05, 1.5), (-0.04, 2.0))):
        bags.append(_record(root, f"cell{i}", syn.Spec(estimate_bias=bias, gain=gain,
                                                       truth=False)))
    return bags


def test_estimate_series_pairs_with_ground_truth_in_time(with_truth):
    spec, bag = with_truth
    run = load_run(bag)
    t, mm, deg = pose_estimate_series(run)
    assert len(t) == len(run.status_t)
    truth = goal_path(run, motion_of_run(run, arm_of_run(run)))
    assert truth[4].startswith("ground truth")
    # the estimate is (1 + bias) x the truth at the same instant on the record's clock
    big = truth[1] > 0.05
    np.testing.assert_allclose(np.interp(truth[0][big], t, mm) / truth[1][big], 1.05, rtol=2e-3)
    big = truth[2] > 0.01
    np.testing.assert_allclose(np.interp(truth[0][big], t, deg) / truth[2][big], 1.05,
                               rtol=2e-3)


def test_report_shows_estimate_beside_ground_truth(with_truth, tmp_path):
    spec, bag = with_truth
    page, m = write_report(bag, tmp_path)
    result = load_run(bag).result
    assert m["estimated_pose_error_mm"] == result["estimated_pose_error_mm"]
    assert m["tolerance_mm"] == 0.5 and m["tolerance_deg"] == 0.1
    text = page.read_text()
    banner = text[text.index("class='verdict'"):text.index("<figure")]
    assert (f"{m['final_pose_error_mm']:.3f} mm, {m['final_pose_error_deg']:.3f} deg"
            in banner)
    assert (f"{m['estimated_pose_error_mm']:.3f} mm, {m['estimated_pose_error_deg']:.3f} deg "
            "(tolerance 0.5 mm, 0.1 deg)" in banner)
    # its figure sits in the camera path section, as a PNG of its own
    alts = re.findall(r"<figure><img alt='([^']*)' src='data:image/png;base64,", text)
    assert sum(a.startswith(html.escape(CAPTION)) for a in alts) == 1
    assert text.index(html.escape(CAPTION)) > text.index("Camera path to the goal")
    assert "Not drawn" not in text


def test_without_ground_truth_the_estimate_stands_alone(without_truth, tmp_path):
    bag = without_truth[0]
    page, m = write_report(bag, tmp_path)
    assert m["final_pose_error_mm"] is None and m["estimated_pose_error_mm"] is not None
    rows = dict(headline(m))
    assert "pose error (ground truth)" not in rows
    assert rows["pose error (node's estimate)"].startswith(
        f"{m['estimated_pose_error_mm']:.3f} mm")
    text = page.read_text()
    assert html.escape(CAPTION) in text and "Not drawn" not in text


def test_a_record_without_estimates_has_no_estimate_figure(recorded, tmp_path):
    """An older node's record (no pose_error fields): nothing drawn, nothing missing."""
    page, m = write_report(recorded, tmp_path)
    text = page.read_text()
    assert m["estimated_pose_error_mm"] is None
    assert html.escape(CAPTION) not in text and "Not drawn" not in text


def test_compare_without_ground_truth_studies_the_estimate(without_truth, tmp_path, capsys):
    assert cli.main(["compare", *map(str, without_truth), "--out", str(tmp_path)]) == 0
    printed = capsys.readouterr().out
    metrics = [compute_metrics(load_run(b)) for b in without_truth]
    with open(tmp_path / "repeatability.csv", newline="") as f:
        study = {r["figure"]: r for r in csv.DictReader(f)}
    assert not any("ground truth" in name for name in study)
    for key, figure in (("estimated_pose_error_mm", "final position error (node's estimate)"),
                        ("estimated_pose_error_deg",
                         "final orientation error (node's estimate)")):
        values = [m[key] for m in metrics]
        row = study[figure]
        assert int(row["n"]) == 3
        assert float(row["mean"]) == pytest.approx(statistics.mean(values))   # Python's own
        assert float(row["sd"]) == pytest.approx(statistics.stdev(values))
        assert figure in printed
    with open(tmp_path / "series.csv", newline="") as f:
        series = [r for r in csv.DictReader(f) if r["source"] == "estimate"]
    for label, bag in zip(("#1", "#2", "#3"), without_truth):
        t, mm, _ = pose_estimate_series(load_run(bag))
        mine = [r for r in series if r["label"] == label]
        assert len(mine) == len(t)
        assert float(mine[-1]["position_error_mm"]) == pytest.approx(mm[-1])


def test_on_a_real_cell_the_goal_is_the_taught_joints(tmp_path):
    """No simulator truth, but the copied reference keeps the joints it was taught at (the
    synthetic run's goal is the arm's home): the measured error to the goal is forward
    kinematics of the recorded joint states (reordered by name, fingers dropped) against
    those joints, and the synthetic estimate is 1.05 x it at every instant."""
    import numpy as np

    from vservo_node.control.kinematics import load_robot
    from vservo_node.vision.reference import Reference, save_reference, with_joints

    robot = load_robot(syn.ROBOT)
    ref = Reference(name="st", target="tray_tags", kind="markers",
                    keys=[("tag", 3, c) for c in range(4)],
                    pixels=np.array([[1.0, 1.0], [9.0, 1.0], [9.0, 9.0], [1.0, 9.0]]),
                    image_size=(64, 48), image=np.zeros((48, 64, 3), np.uint8))
    path = save_reference(with_joints(ref, robot.arm.joint_names, robot.home),
                          tmp_path / "st.yaml")
    spec = syn.Spec(estimate_bias=0.05, truth=False)
    with RunRecorder(tmp_path / "runs", "cell", params=spec.params()) as rec:
        syn.record_with(rec, spec)
        rec.copy_reference(path)
    run = load_run(rec.bag_dir)
    t_goal, mm, deg, _, source = goal_path(run, motion_of_run(run, arm_of_run(run)))
    assert source.startswith("forward kinematics: camera against the joints the reference")
    t, mm_est, deg_est = pose_estimate_series(run)
    # the joints (100 Hz) interpolated to the status records' times (30 Hz)
    mm, deg = np.interp(t, t_goal, mm), np.interp(t, t_goal, deg)
    big = mm > 0.05
    np.testing.assert_allclose(mm_est[big] / mm[big], 1.05, rtol=2e-3)
    big = deg > 0.01
    np.testing.assert_allclose(deg_est[big] / deg[big], 1.05, rtol=2e-3)
