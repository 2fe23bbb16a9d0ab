"""Done-when of hand-eye calibration, end to end and headless (episode.py, no DDS).

On the simulated cell (tray_offset, rendered images, the node's perception) the controller is
told a hand-eye 20 deg / 30 mm off the true one: the run halts ``wrong_direction`` and the
check names the hand-eye as the likely cause. Samples are then collected from the cell (the
arm put at views proposed around the taught one, as the controller believes its camera, and
from a bag of the same poses), the hand-eye solved, the parameter snippet loaded through the
parameter schema, and the run repeated: it converges to the same ground-truth accuracy as with
the true hand-eye.

Outside checks: the simulator's ground truth (true hand-eye, true camera pose at the end
against the true taught pose); OpenCV's hand-eye solvers and the SciPy least-squares solve.
`.venv/bin/python tests/test_handeye_calibration.py` prints the figures.
"""
from __future__ import annotations

import dataclasses
import sys
from pathlib import Path

import numpy as np
import pytest
from scipy.spatial.transform import Rotation

sys.path.insert(0, str(Path(__file__).parent / "calib"))
import calib_bags

from vservo_node import params
from vservo_node.calib import handeye as he
from vservo_node.calib import samples as cs
from vservo_node.calib.check import check_hand_eye
from vservo_node.calib.trace import TraceRecorder
from vservo_node.control import frames
from vservo_node.episode import run_scenario_episode
from vservo_node.sim import load_scenario

SCENARIO = "tray_offset"
ERROR = frames.transform(Rotation.from_rotvec(np.radians([12.0, -16.0, 0.0])).as_matrix(),
                         [0.030, 0.0, 0.015])
# run-to-run spread of the final pose of tray_offset (README: ten repeats within 0.024 mm /
# 0.0045 deg) with room for a different start of the soft start: "the same accuracy"
SAME_MM, SAME_DEG = 0.1, 0.02


def _run(sc, T_belief, record=None):
    sc = dataclasses.replace(sc, T_tool_camera_belief=T_belief)
    return run_scenario_episode(sc, trace=record), sc


def calibrate_cell(tmp_path: Path):
    sc = load_scenario(SCENARIO)
    wrong = dataclasses.replace(sc, T_tool_camera_belief=sc.T_tool_camera_true @ ERROR)
    rec = TraceRecorder(wrong.arm_model("belief"), sc.camera, sc.target)
    r_wrong = run_scenario_episode(wrong, trace=rec)
    check = check_hand_eye(rec.trace())
    samples, info = cs.samples_from_sim(wrong, 12, seed=0)
    cal = he.calibrate(samples, "hand", 0.5 * (sc.camera.K[0, 0] + sc.camera.K[1, 1]))
    snippet = tmp_path / "hand_eye.yaml"
    snippet.write_text(he.params_snippet(cal))
    loaded = params.load_params_file(snippet)["robot.hand_eye"]
    T_loaded = frames.transform_from_xyz_quat(loaded[:3], loaded[3:])
    bag = calib_bags.write_calibration_bag(tmp_path, sc, [np.asarray(s.q) for s in samples])
    bag_samples, _ = cs.samples_from_bag(bag, sc.arm_model("urdf"), sc.target)
    cal_bag = he.calibrate(bag_samples, "hand", cal.focal_px)
    r_cal, _ = _run(sc, T_loaded)
    r_true, _ = _run(sc, sc.T_tool_camera_true)
    return {"sc": sc, "wrong": r_wrong, "check": check, "samples": samples, "info": info,
            "cal": cal, "cal_bag": cal_bag, "bag_samples": bag_samples, "T_loaded": T_loaded,
            "calibrated": r_cal, "true": r_true}


@pytest.fixture(scope="module")
def outcome(tmp_path_factory):
    return calibrate_cell(tmp_path_factory.mktemp("handeye"))


def test_the_wrong_hand_eye_halts_and_is_named(outcome):
    assert not outcome["wrong"].converged and outcome["wrong"].reason == "wrong_direction"
    assert outcome["check"].large and "wrong_direction" in outcome["check"].verdict()


def test_the_calibrated_hand_eye_is_the_true_one(outcome):
    sc = outcome["sc"]
    mm, deg = he.pose_difference(sc.T_tool_camera_true, outcome["T_loaded"])
    assert mm < 0.5 and deg < 0.05, (mm, deg)
    mm, deg = he.pose_difference(sc.T_tool_camera_true, outcome["cal_bag"].best.X)
    assert len(outcome["bag_samples"]) == len(outcome["samples"])
    assert mm < 0.5 and deg < 0.05, (mm, deg)


def test_with_the_calibrated_hand_eye_the_run_converges_as_with_the_true_one(outcome):
    cal, true = outcome["calibrated"], outcome["true"]
    assert cal.converged and true.converged, (cal.reason, true.reason)
    assert cal.pose_error_mm < true.pose_error_mm + SAME_MM
    assert cal.pose_error_deg < true.pose_error_deg + SAME_DEG


FIXED = "vs6_stand_combined"


@pytest.fixture(scope="module")
def fixed_outcome():
    return calibrate_fixed()


def calibrate_fixed():
    """The fixed camera: samples of the stand cell (the tool carries the board to proposed
    views), solved for the stand's pose and the board on the tool (cv2.calibrateHandEye on
    the inverted arm poses, cv2.calibrateRobotWorldHandEye, least squares), its parameter
    snippet loaded through the schema and control/mounting.py as the
    controller's belief; the run converges to the true mounting's accuracy."""
    import tempfile

    from vservo_node.control.mounting import mount_from_params

    sc = load_scenario(FIXED)
    samples, info = cs.samples_from_sim(sc, 12, seed=0)
    assert info["mounting"] == "fixed"
    cal = he.calibrate(samples, "fixed", 0.5 * (sc.camera.K[0, 0] + sc.camera.K[1, 1]))
    with tempfile.TemporaryDirectory() as folder:
        snippet = Path(folder) / "fixed.yaml"
        snippet.write_text(he.params_snippet(cal))
        checked = params.validate({**params.load_params_file(snippet),
                                   "limits.joint_acceleration": [2.0]})
    assert checked.ok, checked.errors
    loaded = mount_from_params(checked.values)
    runs = {label: run_scenario_episode(dataclasses.replace(sc, fixed_belief=fx))
            for label, fx in (("calibrated", loaded), ("true", sc.mount("true")))}
    return sc, cal, runs


def test_fixed_camera_calibration_converges_as_the_true_mounting(fixed_outcome):
    sc, cal, runs = fixed_outcome
    mm, deg = he.pose_difference(sc.mount("true").T_base_camera, cal.best.X)
    assert mm < 0.5 and deg < 0.05, (mm, deg)
    mm, deg = he.pose_difference(sc.mount("true").T_tool_target, cal.best.W)
    assert mm < 0.5 and deg < 0.05, (mm, deg)
    cal_run, true_run = runs["calibrated"], runs["true"]
    assert cal_run.converged and true_run.converged
    assert cal_run.pose_error_mm < true_run.pose_error_mm + SAME_MM
    assert cal_run.pose_error_deg < true_run.pose_error_deg + SAME_DEG


if __name__ == "__main__":
    import tempfile

    with tempfile.TemporaryDirectory() as folder:
        o = calibrate_cell(Path(folder))
    sc = o["sc"]
    print(f"{SCENARIO}, believed hand-eye {he.pose_difference(np.eye(4), ERROR)[0]:.1f} mm / "
          f"{he.pose_difference(np.eye(4), ERROR)[1]:.1f} deg off:")
    w = o["wrong"]
    print(f"  run: {w.reason or 'converged'} after {w.time_s:.2f} s; check: {o['check'].verdict()}")
    print(f"  {len(o['samples'])} samples from the cell ({len(o['info']['skipped'])} views "
          f"skipped), {len(o['bag_samples'])} from the bag")
    print(he.format_table(o["cal"], sc.T_tool_camera_true))
    for label, X in (("loaded snippet", o["T_loaded"]), ("from the bag", o["cal_bag"].best.X)):
        mm, deg = he.pose_difference(sc.T_tool_camera_true, X)
        print(f"  {label}: {mm:.3f} mm / {deg:.4f} deg from the true hand-eye")
    for label in ("calibrated", "true"):
        r = o[label]
        print(f"  run with the {label} hand-eye: {'converged' if r.converged else r.reason} in "
              f"{r.time_s:.2f} s, {r.pose_error_mm:.3f} mm / {r.pose_error_deg:.4f} deg from the "
              "taught pose")
    fsc, fcal, runs = calibrate_fixed()
    print(f"{FIXED} (fixed camera):")
    print(he.format_table(fcal, fsc.mount("true").T_base_camera))
    mm, deg = he.pose_difference(fsc.mount("true").T_tool_target, fcal.best.W)
    print(f"  target on the tool: {mm:.3f} mm / {deg:.4f} deg from the true one")
    for label, r in runs.items():
        print(f"  run with the {label} mounting: {'converged' if r.converged else r.reason} in "
              f"{r.time_s:.2f} s, {r.pose_error_mm:.3f} mm / {r.pose_error_deg:.4f} deg")
