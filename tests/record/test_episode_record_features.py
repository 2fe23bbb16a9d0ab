"""A headless episode kept as a run record (the sweep keeps its failed episodes so) holds the
features of each frame and their errors from the taught view, so `vservo report` on a failed
episode draws the same sections as on a converged one."""
import re

import cv2
import numpy as np
import pytest

from vservo_node.control import frames
from vservo_node.episode import episode_params, run_scenario_episode
from vservo_node.record.bag import load_run
from vservo_node.record.episode_record import write_record
from vservo_node.record.report import write_report
from vservo_node.sim import SimCell, load_scenario

SCENARIO = "tray_offset"


def _record(tmp_path, name, overrides, sensing):
    sc = load_scenario(SCENARIO)
    result = run_scenario_episode(sc, overrides, seed=1, record=True, sensing=sensing)
    values = episode_params({**sc.controller, **overrides}, camera_rate_hz=sc.fps)
    return sc, result, write_record(tmp_path, name, sc, values, result)


def _project(sc, q, keys):
    """Pixels of the target features seen by the true camera at joints q, through OpenCV's
    camera model (cv2.projectPoints: pinhole plus the scenario's distortion; Bradski & Kaehler,
    Learning OpenCV, 2008, ch. 11), independent of the simulator's renderer and our detector."""
    cell = SimCell(sc, q0=q)
    T_camera_target = frames.invert(cell.arm_model.camera_pose(q)) @ sc.T_base_target
    points = sc.target.model_points(list(keys))
    rvec, _ = cv2.Rodrigues(T_camera_target[:3, :3])
    d = np.asarray(sc.camera.to_dict().get("d") or [], float)
    uv, _ = cv2.projectPoints(points, rvec, T_camera_target[:3, 3], sc.camera.K, d)
    return uv.reshape(-1, 2)


def _sections(page: str) -> tuple[list, list]:
    """(headings, figure captions) of a report page."""
    return (re.findall(r"<h2>([^<]*)</h2>", page), re.findall(r"<figcaption>([^<]*)<", page))


@pytest.fixture(scope="module")
def failed(tmp_path_factory):
    """tray_offset with control.max_run_s = 0.6 s: halts on run_timeout long before arrival."""
    return _record(tmp_path_factory.mktemp("failed"), "failed", {"control.max_run_s": 0.6},
                   "image")


def test_failed_episode_records_features_and_errors_of_every_frame(failed):
    sc, result, folder = failed
    assert not result.converged and result.reason == "run_timeout"
    run = load_run(folder)
    seen = [f for f in result.feature_trace if len(f[2])]
    assert run.features is not None and run.feature_error is not None
    assert len(run.features.t) == len(seen) >= 15           # 30 fps over ~0.65 s
    t0, keys, uv, uv_ref = seen[0]
    assert t0 == 0.0 and len(keys) == len(sc.target.keys())
    np.testing.assert_allclose(run.features.values[0], uv.ravel())
    np.testing.assert_allclose(run.feature_error.values[0], (uv - uv_ref).ravel())
    # The first frame is taken at rest at the start joints, the reference was taught at the
    # taught joints: detected pixels and error vectors agree with OpenCV's projection of the
    # target model (dot centroids: within 1 px under blur and noise, common practice, no
    # source).
    uv_start = _project(sc, sc.q_start, keys)
    uv_taught = _project(sc, sc.q_taught, keys)
    assert np.abs(uv - uv_start).max() < 1.0
    assert np.abs((uv - uv_ref) - (uv_start - uv_taught)).max() < 1.5
    # the error each frame is the one the servo judged: its RMS is the status rms_px of the
    # record at the frame's time
    rms = np.sqrt(np.nanmean(np.nansum(run.feature_error.values.reshape(
        len(run.feature_error.t), -1, 2) ** 2, axis=2), axis=1))
    compared = 0
    for t, value in zip(run.feature_error.t[1:], rms[1:]):
        k = np.searchsorted(run.status_t, t)   # the first output tick after the frame
        if k < len(run.status_t) and run.status["state"][k] == "servoing":
            assert run.status["rms_px"][k] == pytest.approx(value, rel=1e-9)
            compared += 1
    assert compared >= 10
    # the taught reference is kept with its image and the scenario's taught joints
    assert run.reference["joint_positions"] == dict(zip(sc.joint_names, sc.q_taught.tolist()))
    assert (run.reference_path.parent / run.reference["image"]).is_file()
    # the record's cycle times are the measured ones of the frames, not a placeholder
    cycle = run.status["cycle_ms"][np.isfinite(run.status["cycle_ms"])]
    assert len(cycle) == len(result.feature_trace) and np.all(cycle > 0)


def test_failed_episode_report_has_the_sections_of_a_converged_one(failed, tmp_path):
    _, _, folder = failed
    failed_page, m = write_report(folder)
    assert m["verdict"] == "halted" and m["reason"] == "run_timeout"
    _, ok_result, ok_folder = _record(tmp_path, "converged", {}, "image")
    assert ok_result.converged
    ok_page, ok = write_report(ok_folder)
    assert ok["verdict"] == "converged"
    failed_html, ok_html = failed_page.read_text(), ok_page.read_text()
    assert _sections(failed_html) == _sections(ok_html)
    assert "Not drawn" not in failed_html and "Not drawn" not in ok_html
    assert "detected features (green, numbered)" in failed_html
    # the image episode keeps its taught reference as the recorder does: the taught view shows
    assert "the taught view from the reference copied into the record" in failed_html
    assert "error of each feature" in failed_html
