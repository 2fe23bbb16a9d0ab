"""Reports of SYNTHETIC TEST DATA runs: the page opens with the verdict and the accuracy, holds
decodable figures with a unit on every axis, names the check that fired and what to check, lists
the parameters that differ from the defaults, and a split file reports only its own span."""
from __future__ import annotations

import base64
import html
import json
import re
import shutil

import cv2
import numpy as np
import pytest
import yaml

from vservo_node import params as schema
from vservo_node.record import halts
from vservo_node.record import report as rpt
from vservo_node.record.bag import load_run
from vservo_node.record.metrics import (arm_of_run, command_of_run, compute_metrics,
                                        motion_of_run)
from vservo_node.record.report import reference_points, write_report

N_FIGURES = 8   # frames, error, camera path, joints, Cartesian speeds, envelope, states, cycles


def _figures(page: str) -> list[np.ndarray]:
    """Every inlined PNG or JPEG of a page, decoded by OpenCV (so each is a real image)."""
    out = []
    for b64 in re.findall(r"data:image/(?:png|jpeg);base64,([A-Za-z0-9+/=]+)", page):
        img = cv2.imdecode(np.frombuffer(base64.b64decode(b64), np.uint8), cv2.IMREAD_COLOR)
        assert img is not None and img.shape[0] > 100 and img.shape[1] > 100
        out.append(img)
    return out


def test_report_of_our_bag_has_every_figure(recorded, tmp_path):
    page, metrics = write_report(recorded, tmp_path)
    text = page.read_text()
    assert len(_figures(text)) == N_FIGURES
    assert "Not drawn" not in text
    assert json.loads((tmp_path / "metrics.json").read_text()) == json.loads(json.dumps(metrics))
    assert "/servo/status" in text


def test_the_page_opens_with_the_verdict_and_the_accuracy(recorded, tmp_path):
    page, m = write_report(recorded, tmp_path)
    text = page.read_text()
    banner = text.index("class='verdict'")
    first_figure = text.index("<figure")
    assert banner < first_figure
    head = text[banner:first_figure]
    assert f"CONVERGED in {m['time_to_converge_s']:.2f} s" in head
    assert f"{m['final_rms_px']:.3f} px RMS" in head
    # the synthetic run records the simulator's truth topics: accuracy in mm and deg
    assert f"{m['final_pose_error_mm']:.3f} mm, {m['final_pose_error_deg']:.3f} deg" in head


def test_a_halted_run_says_why_and_what_to_check(halted, tmp_path):
    page, m = write_report(halted, tmp_path / "plain")
    head = page.read_text().split("<figure")[0]
    assert "HALTED: image_stale" in head
    assert html.escape(halts.describe("image_stale")) in head
    assert "ros2 topic hz" in head                      # from the guidance table
    # the node's detail (the check that fired, with its figures) wins over the generic text
    copy = tmp_path / "bag"
    shutil.copytree(halted, copy)
    result = json.loads((copy / "result.json").read_text())
    result["detail"] = "no image for 0.41 s (io.image_timeout_s 0.4 s)"
    (copy / "result.json").write_text(json.dumps(result))
    page, m = write_report(copy, tmp_path / "detail")
    assert m["detail"] == result["detail"]
    assert f"<b>Cause:</b> {result['detail']}" in page.read_text()


def test_report_of_a_plain_ros2_bag(plain, tmp_path, spec):
    """No params.yaml: the URDF comes from the robot_description topic, limits from the URDF
    alone (scale 1), tolerance and tool-speed limit unknown."""
    page, metrics = write_report(plain, tmp_path)
    assert len(_figures(page.read_text())) == N_FIGURES
    assert metrics["tolerance_px"] is None and metrics["time_to_tolerance_s"] is None
    assert metrics["tool_speed_limit_m_s"] is None and metrics["peak_tool_speed_m_s"] > 0
    ours = compute_metrics(load_run(plain), tolerance_px=spec.tolerance_px)
    assert ours["time_to_tolerance_s"] == pytest.approx(spec.time_to_tolerance, abs=1 / 30)
    import synthetic as syn
    limits = syn.urdf_velocity_limits()
    assert metrics["peak_joint_speed_ratio"] == pytest.approx(max(
        spec.gain * abs(a) / limits[f"vs6_j{i + 1}"] for i, a in enumerate(spec.joint_offset)))
    assert metrics["converged"] is True
    assert "No params.yaml in the record" in page.read_text()


def test_reference_points_are_features_minus_error(recorded, spec):
    """e = s - s* (Chaumette & Hutchinson 2006, eq. 1), so s - e gives the taught points."""
    np.testing.assert_allclose(reference_points(load_run(recorded)), spec.goal_uv, atol=1e-9)


def test_every_axis_of_every_figure_names_its_unit(recorded):
    """Time plots, image plots and histograms: each visible axis has a label with a unit in
    parentheses ('(-)' for ratios)."""
    run = load_run(recorded)
    run.params = {**run.params, "limits.joint_acceleration": [2.0],
                  "limits.max_translation_m": 0.3, "limits.max_rotation_deg": 180.0}
    motion = motion_of_run(run, arm_of_run(run))
    command = command_of_run(run, motion.joint_names)
    m = compute_metrics(run, None, motion, command)
    figures = [rpt.fig_frames(run, m), rpt.fig_error(run, m),
               rpt.fig_camera_path(run, motion, m), rpt.fig_joint_limits(run, motion, command, m),
               rpt.fig_cartesian_limits(run, motion, m), rpt.fig_envelope(run, motion, m),
               rpt.fig_timeline(run, m), rpt.fig_cycle_times(run)]
    checked = 0
    for fig in figures:
        fig.canvas.draw()
        for ax in fig.axes:
            if not ax.axison:
                continue
            for label, axis in ((ax.get_xlabel(), ax.xaxis), (ax.get_ylabel(), ax.yaxis)):
                if any(t.get_visible() and t.get_text() for t in axis.get_ticklabels()):
                    assert re.search(r"\(.+\)", label), (fig, label)
                    checked += 1
    assert checked >= 20
    assert len(fig_axes := figures[3].axes) == 3 and "acceleration" in fig_axes[1].get_title()


def test_parameters_used_and_their_differences_from_the_defaults(recorded, tmp_path):
    page, _ = write_report(recorded, tmp_path)
    text = page.read_text()
    used = yaml.safe_load((recorded / "params.yaml").read_text())
    defaults = schema.defaults()
    differ = [n for n, v in used.items() if n in defaults and v != defaults[n]]
    assert f"{len(differ)} of {len(used)} parameters differ from the defaults" in text
    section = text.split("<h2>Parameters used</h2>")[1].split("<details>")[0]
    for name in differ:
        assert f"<code>{name}</code>" in section


def test_a_split_file_reports_its_own_span(recorded):
    meta = yaml.safe_load((recorded / "metadata.yaml").read_text())["rosbag2_bagfile_information"]
    middle = recorded / meta["relative_file_paths"][1]
    page, m = write_report(middle)
    assert page.parent == recorded / f"report_{middle.stem}"
    assert m["verdict"] == "incomplete" and m["piece"]["index"] == 1
    assert m["time_to_converge_s"] is None
    text = page.read_text()
    assert f"PART OF A RUN: file 2 of {len(meta['relative_file_paths'])}" in text
    whole = compute_metrics(load_run(recorded))
    assert m["t_start_s"] > whole["t_start_s"] and m["n_cycles"] < whole["n_cycles"]
