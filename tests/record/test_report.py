"""Reports and comparisons of SYNTHETIC TEST DATA runs: pages hold decodable figures, a plain
`ros2 bag record`-style bag reports too, and comparison tables carry each run's metrics."""
from __future__ import annotations

import base64
import csv
import json
import re

import cv2
import numpy as np
import pytest

from vservo_node import cli
import synthetic as syn
from vservo_node.record.bag import load_run
from vservo_node.record.metrics import compute_metrics
from vservo_node.record.report import reference_points, write_report


def _figures(page: str) -> list[np.ndarray]:
    """Every inlined PNG of a page, decoded by OpenCV (so each is a real image)."""
    out = []
    for b64 in re.findall(r"data:image/png;base64,([A-Za-z0-9+/=]+)", page):
        img = cv2.imdecode(np.frombuffer(base64.b64decode(b64), np.uint8), cv2.IMREAD_COLOR)
        assert img is not None and img.shape[0] > 100 and img.shape[1] > 100
        out.append(img)
    return out


def test_report_of_our_bag_has_every_figure(recorded, tmp_path):
    page, metrics = write_report(recorded, tmp_path)
    text = page.read_text()
    assert len(_figures(text)) == 7
    assert "Not drawn" not in text
    assert json.loads((tmp_path / "metrics.json").read_text()) == json.loads(json.dumps(metrics))
    assert "/servo/status" in text


def test_report_of_a_plain_ros2_bag(plain, tmp_path, spec):
    """No params.yaml: the URDF comes from the robot_description topic, limits from the URDF
    alone (scale 1), tolerance and tool-speed limit unknown."""
    page, metrics = write_report(plain, tmp_path)
    assert len(_figures(page.read_text())) == 7
    assert metrics["tolerance_px"] is None and metrics["time_to_tolerance_s"] is None
    assert metrics["tool_speed_limit_m_s"] is None and metrics["peak_tool_speed_m_s"] > 0
    ours = compute_metrics(load_run(plain), tolerance_px=spec.tolerance_px)
    assert ours["time_to_tolerance_s"] == pytest.approx(spec.time_to_tolerance, abs=1 / 30)
    limits = syn.urdf_velocity_limits()
    assert metrics["peak_joint_speed_ratio"] == pytest.approx(max(
        spec.gain * abs(a) / limits[f"vs6_j{i + 1}"] for i, a in enumerate(spec.joint_offset)))
    assert metrics["converged"] is True


def test_reference_points_are_features_minus_error(recorded, spec):
    """e = s - s* (Chaumette & Hutchinson 2006, eq. 1), so s - e gives the taught points."""
    np.testing.assert_allclose(reference_points(load_run(recorded)), spec.goal_uv, atol=1e-9)


def test_compare_table_csv_and_page(recorded, halted, tmp_path, capsys):
    assert cli.main(["compare", str(recorded), str(halted), "--out", str(tmp_path)]) == 0
    printed = capsys.readouterr().out
    with open(tmp_path / "compare.csv", newline="") as f:
        rows = list(csv.DictReader(f))
    assert [r["run"] for r in rows] == [recorded.name, halted.name]
    for row, bag in zip(rows, (recorded, halted)):
        m = compute_metrics(load_run(bag))
        assert row["converged"] == str(m["converged"])
        assert row["n_halts"] == str(m["n_halts"])
        assert float(row["final_rms_px"]) == pytest.approx(m["final_rms_px"], rel=1e-3)
        assert row["run"] in printed
    assert rows[1]["halt_reasons"] == "image_stale"
    assert rows[0]["limit_activations"] == "joint_acceleration:3;joint_velocity:10"
    page = (tmp_path / "compare.html").read_text()
    assert len(_figures(page)) == 1 and halted.name in page
