"""Arrival in task units: the Servo stops when the camera's pose error, estimated from the
features (vservo_node.control.pose_error) and averaged over the dwell, is within
control.tolerance_mm / control.tolerance_deg; the pixel tolerance stays an option and both
must hold when both are set.

Judged against the simulator's ground truth: the true camera pose at the end against the true
taught one (pinocchio forward kinematics of the true arm, episode.EpisodeResult.pose_error_*).
Core cases: the kinematic loop with ideal projected points (episode.run_point_case). Scenario
cases: headless episodes of the shipped scenarios with projected sensing (the target's points
through the true camera with the detectors' measured jitter, seeded per run).
"""
import math

import numpy as np
import pytest

from vservo_node import interface, params
from vservo_node.episode import PointCase, run_point_case, run_scenario_episode
from vservo_node.servo import Servo, ServoSettings, TaughtView

OFFSET = dict(translation_m=(0.08, 0.0, 0.05), tilt_deg=10.0)
REQUIREMENT = {"control.tolerance_mm": 0.5, "control.tolerance_deg": 0.1}


def test_a_loose_pixel_tolerance_stops_early_a_pose_tolerance_does_not():
    # 2 px alone stops the camera millimetres from the goal; with 0.2 mm / 0.05 deg added, the
    # same run goes on until the estimated (and the true) pose error is inside them.
    loose = run_point_case(PointCase(tolerance_px=2.0, **OFFSET))
    both = run_point_case(PointCase(tolerance_px=2.0, tolerance_mm=0.2, tolerance_deg=0.05,
                                    **OFFSET))
    assert loose.converged and both.converged
    assert loose.pose_error_mm > 1.0, loose.pose_error_mm
    assert both.pose_error_mm < 0.2 and both.pose_error_deg < 0.05
    assert both.time_s > loose.time_s
    # the estimate (PnP of the four points, the same camera model as the truth) agrees with the
    # true pose error to a small fraction of the tolerance noise-free
    assert abs(both.estimated_pose_error_mm - both.pose_error_mm) < 0.02
    assert abs(both.estimated_pose_error_deg - both.pose_error_deg) < 0.005
    # and after the pixel-only stop it tells the user how far off it stopped (its mean lags the
    # camera still creeping during that dwell, so it reads a little high)
    assert loose.pose_error_mm < loose.estimated_pose_error_mm < 1.2 * loose.pose_error_mm


def test_pose_tolerance_alone_stops_inside_it():
    r = run_point_case(PointCase(tolerance_px=0.0, tolerance_mm=0.3, tolerance_deg=0.05,
                                 **OFFSET))
    assert r.converged, r.reason
    assert r.pose_error_mm < 0.3 and r.pose_error_deg < 0.05
    # noise-free, the single frames scatter only as the camera creeps during the dwell
    assert r.estimated_pose_error_spread_mm < 0.3


def test_status_and_result_carry_the_estimate():
    r = run_point_case(PointCase(tolerance_px=0.0, tolerance_mm=0.3, tolerance_deg=0.05,
                                 **OFFSET), record=True)
    assert {"pose_error_mm", "pose_error_deg"} <= set(interface.STATUS_FIELDS)
    assert {"estimated_pose_error_mm", "estimated_pose_error_deg",
            "estimated_pose_error_spread_mm", "estimated_pose_error_spread_deg"} <= set(
        interface.RESULT_FIELDS)
    moving = [s for s in r.statuses if s["state"] in ("servoing", "settling")]
    first, last = moving[3]["pose_error_mm"], moving[-1]["pose_error_mm"]
    # the start offset is 8 cm across and 5 cm along the axis (|t| = 94 mm)
    assert first == pytest.approx(1e3 * math.hypot(0.08, 0.05), rel=0.05)
    assert last < 0.3 and all(math.isfinite(s["pose_error_deg"]) for s in moving[1:])


def test_a_requirement_that_cannot_be_met_in_time_says_how_far_it_was():
    r = run_point_case(PointCase(tolerance_px=0.0, tolerance_mm=0.3, tolerance_deg=0.05,
                                 max_run_s=2.0, duration_s=4.0, **OFFSET), record=True)
    assert not r.converged and r.reason == "run_timeout"
    detail = r.statuses[-1]["detail"]
    assert "estimated pose error" in detail and "control.tolerance_mm = 0.3" in detail


def test_start_is_refused_when_no_pose_estimate_is_possible():
    from vservo_node.control.kinematics import load_robot
    from vservo_node.episode import limits_for

    arm = load_robot("vs6_bench").arm
    servo = Servo(arm, ServoSettings(tolerance_px=0.0, tolerance_mm=0.5), limits_for(arm))
    xy = np.array([[0.0, 0.0], [0.1, 0.0], [0.2, 0.0], [0.3, 0.0]])     # collinear
    servo.set_reference(TaughtView(tuple(range(4)), xy, xy * 600 + 320, np.full(4, 0.3)))
    servo.enable(True, 0.0)
    ok, why = servo.start(load_robot("vs6_bench").home, 0.0)
    assert not ok and "tolerance_mm" in why and "collinear" in why
    # the pixel tolerance alone does not need it
    servo.reconfigure(ServoSettings(tolerance_px=0.5), limits_for(arm))
    assert servo.start(load_robot("vs6_bench").home, 0.0)[0]


def test_parameters_need_an_arrival_criterion():
    assert params.validate({"limits.joint_acceleration": [3.0], "control.tolerance_px": 0.0,
                            **REQUIREMENT}).ok
    bad = params.validate({"limits.joint_acceleration": [3.0], "control.tolerance_px": 0.0})
    assert not bad.ok and any("no arrival criterion" in e for e in bad.errors)
    assert not params.validate({"limits.joint_acceleration": [3.0],
                                "control.tolerance_mm": -1.0}).ok


# ----------------------------------------------------------------------------- scenarios
@pytest.mark.parametrize("name", ["vs6_wide_offset"])
def test_twenty_noisy_runs_stop_inside_the_stated_tolerance(name):
    """The stop criterion against the simulator's ground truth: 20 seeded runs (projected
    sensing with the detectors' measured pixel jitter, a different noise draw each, taught
    through the same noise) with the shipped parameters, which state 0.5 mm / 0.1 deg.
    vs6_wide_offset is the hardest of the shipped scenarios for it: the smallest target in the
    image (0.42 m, 1280x720) gives the noisiest estimate."""
    values = params.load_params_file(
        __import__("vservo_node.paths", fromlist=["config_dir"]).config_dir()
        / "vservo_sim.yaml")
    tol_mm, tol_deg = values["control.tolerance_mm"], values["control.tolerance_deg"]
    assert (tol_mm, tol_deg) == (0.5, 0.1)
    worst_mm = worst_deg = 0.0
    for seed in range(20):
        r = run_scenario_episode(name, seed=seed, sensing="projected")
        assert r.converged, f"seed {seed}: {r.reason}"
        assert r.pose_error_mm <= tol_mm and r.pose_error_deg <= tol_deg, (
            seed, r.pose_error_mm, r.pose_error_deg)
        worst_mm, worst_deg = max(worst_mm, r.pose_error_mm), max(worst_deg, r.pose_error_deg)
    print(f"\n{name}: worst true pose error over 20 runs {worst_mm:.3f} mm, {worst_deg:.4f} deg")
