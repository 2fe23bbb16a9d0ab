"""Large rotations about the optical axis on the six-joint demo arm with the decoupled scheme
(control.scheme decoupled, vservo_node/control/decoupled.py), through the node's code path
(run_scenario_episode: simulated drives with lag and latency, Perception's depths, Servo at two
rates, no DDS), judged against the simulator's ground truth. Projected sensing keeps it cheap:
the target's points through the true camera with the detectors' measured jitter
(vservo_node/sim/projected.py).

Goals (issue 11, on the shipped scenarios vs6_tray_turn180 / turn150_close / turn125): 180 deg
converges within 20 s with the tool under 0.1 m/s; at 125 deg the camera stays within 20 mm of
the straight path to the goal; every limit holds all along. The final pose error is judged
against the requirement issue 11 quotes from users, 0.5 mm / 0.1 deg.

Figures: ``python tests/test_large_rotations.py`` prints them for the three scenarios.
"""
from __future__ import annotations

import dataclasses
import functools
import math

import numpy as np
import pytest
from scipy.spatial.transform import Rotation

from vservo_node import episode
from vservo_node.control.frames import transform
from vservo_node.episode import episode_params, run_scenario_episode
from vservo_node.servo import Servo, ServoSettings
from vservo_node.sim import load_scenario

SCENARIOS = ("vs6_tray_turn180", "vs6_tray_turn150_close", "vs6_tray_turn125")
GOAL_S, TOOL_SPEED, PATH_M = 20.0, 0.10, 0.020          # issue 11
POSE_MM, POSE_DEG = 0.5, 0.1                           # the users' requirement quoted there
FEW_FRAMES = 10            # as tests/test_direction_check.py (ours, common practice, no source)


@functools.lru_cache(maxsize=None)
def _episode(name: str, scheme: str | None = None):
    overrides = {"control.scheme": scheme} if scheme else None
    return run_scenario_episode(name, overrides, record=True, sensing="projected")


def _straight_path_deviation(scenario, camera_trace) -> float:
    """Largest distance (m) of the true camera origin from the straight segment between its
    start and the true taught camera pose."""
    a = camera_trace[0]
    b = scenario.arm_model("true").camera_pose(scenario.q_taught)[:3, 3]
    d = b - a
    s = np.clip((camera_trace - a) @ d / max(float(d @ d), 1e-300), 0.0, 1.0)
    return float(np.max(np.linalg.norm(camera_trace - (a + s[:, None] * d), axis=1)))


def _tool_speeds(scenario, q_trace, period) -> np.ndarray:
    """Tool-point speed (m/s) over each output period, from the true joints at the ticks
    through pinocchio's forward kinematics (the arm model's fk): |p_k+1 - p_k| / period."""
    arm = scenario.arm_model("true")
    tool_point = np.asarray(episode_params()["robot.tool_point"])
    p = np.array([T[:3, :3] @ tool_point + T[:3, 3] for T in (arm.fk(q, "tool")
                                                                for q in q_trace)])
    return np.linalg.norm(np.diff(p, axis=0), axis=1) / period


@pytest.mark.parametrize("name", SCENARIOS)
def test_converges_inside_every_limit_and_arrives(name):
    scenario = load_scenario(name)
    values = episode_params(scenario.controller)
    assert values["control.scheme"] == "decoupled"       # the scenario asks for it
    r = _episode(name)
    assert r.converged, f"{name}: {r.reason} after {r.time_s:.2f} s at {r.final_rms_px:.2f} px"
    assert r.time_s <= GOAL_S
    assert r.pose_error_mm <= POSE_MM and r.pose_error_deg <= POSE_DEG, (r.pose_error_mm,
                                                                          r.pose_error_deg)
    # speed over the whole run, not only its peak bookkeeping: every output period
    speeds = _tool_speeds(scenario, r.q_trace, 1.0 / values["io.output_rate_hz"])
    assert len(speeds) >= int(r.time_s * values["io.output_rate_hz"]) - 1
    assert np.max(speeds) < TOOL_SPEED and r.peak_tool_speed < TOOL_SPEED
    assert r.peak_camera_speed <= values["limits.camera_linear_speed"] * 1.01
    assert r.peak_angular_speed <= values["limits.angular_speed"] * 1.01
    assert r.peak_joint_speed_ratio <= values["limits.joint_velocity_scale"] * 1.01
    assert r.min_limit_margin > 0.0
    assert _straight_path_deviation(scenario, r.camera_trace) < PATH_M


def test_at_125_deg_the_camera_keeps_to_the_straight_path_where_point_ibvs_swings_off():
    """The 125 deg scenario exercises what the scheme is for: point IBVS (the default law)
    also converges there but leaves the straight path by more than 20 mm; the decoupled
    scheme keeps to it (it moves c*t_c, the camera's position in the taught frame, along a
    straight line; Chaumette & Hutchinson 2006, Part I, sec. PBVS)."""
    scenario = load_scenario("vs6_tray_turn125")
    decoupled = _straight_path_deviation(scenario, _episode("vs6_tray_turn125").camera_trace)
    point = _episode("vs6_tray_turn125", "point")
    assert point.converged
    assert _straight_path_deviation(scenario, point.camera_trace) > PATH_M > decoupled


def _half_turned_hand_eye(name):
    sc = load_scenario(name)
    turn = transform(Rotation.from_euler("z", math.pi).as_matrix(), np.zeros(3))
    return dataclasses.replace(sc, T_tool_camera_belief=sc.T_tool_camera_belief @ turn)


@pytest.mark.parametrize("nod_px", [None, 0.0], ids=["with_nod", "image_check_alone"])
def test_the_image_direction_check_catches_a_half_turned_hand_eye(nod_px):
    """A hand-eye believed turned 180 deg about the optical axis mirrors the commanded twist's
    v_x, v_y, w_x, w_y: the features move against what the local image Jacobian predicts from
    the measured joints (Chaumette & Hutchinson 2006, eq. 11). With the start nod the check
    decides within a few frames, as for the point law (tests/test_direction_check.py). Without
    the nod it judges the decoupled law's own motion, which here is mostly the turn about the
    optical axis that such a hand-eye leaves right: measured 3.2 s (the point law on the same
    case: 4.0 s); bound (ours, no source) 5 s."""
    sc = _half_turned_hand_eye("vs6_tray_turn125")
    overrides = None if nod_px is None else {"control.direction_probe_px": nod_px}
    r = run_scenario_episode(sc, overrides, sensing="projected")
    assert not r.converged and r.reason == "wrong_direction", r.reason
    if nod_px is None:
        assert r.time_s * sc.fps <= FEW_FRAMES
    else:
        assert r.time_s <= 5.0


@pytest.mark.parametrize("robot, order", [
    ("vs7_bench", (0, 1, 2, 3, 5, 4, 6)),    # two wrist joints swapped in the command
    ("vs7_bench", (6, 5, 4, 3, 2, 1, 0)),    # the whole command reversed
    ("vs6_bench", (1, 0, 2, 3, 4, 5)),       # the first two swapped
])
def test_the_follow_check_catches_a_command_in_the_wrong_joint_order(monkeypatch, robot, order):
    """The cases and bounds of tests/test_direction_check.py (wrong_direction within 2.5 s, the
    wrist swap within the nod, 0.3 s) with the decoupled scheme: the follow check compares the
    joints' net travel with the commanded one, whatever law commanded it."""
    original = Servo.step

    def step(self, obs, q, t, dt):
        cmd, status = original(self, obs, q, t, dt)
        return cmd[list(order)], status

    monkeypatch.setattr(Servo, "step", step)
    monkeypatch.setattr(episode, "ServoSettings",
                        functools.partial(ServoSettings, scheme="decoupled"))
    r = episode.run_point_case(episode.PointCase(robot=robot, translation_m=(0.08, 0.0, 0.05),
                                                 tilt_deg=10.0))
    assert r.reason == "wrong_direction", r.reason
    assert r.time_s < (0.3 if order == (0, 1, 2, 3, 5, 4, 6) else 2.5)


@pytest.mark.parametrize("robot_name", ["vs7_bench", "vs6_bench"])
def test_predicted_task_command_matches_the_command_at_the_true_features(robot_name):
    """control.predict_between_frames with the decoupled scheme predicts the scheme's own
    error to first order, e(q) ~ e(q_f) + L J_cam(q_f) (q - q_f) (the definition e_dot = L v_c
    with v_c = J_cam dq; Chaumette & Hutchinson 2006, Part I, eq. 3-4). The check and its bound
    are those of tests/test_prediction.py: the command from the prediction is within 0.2 of
    the held command's distance to the command at the true features (ideal points, a joint
    step of one 30 fps frame of motion, some way from the goal)."""
    from vservo_node.control.kinematics import load_robot
    from vservo_node.episode import PointScene, limits_for
    from vservo_node.vision.camera import CameraModel

    robot = load_robot(robot_name)
    camera = CameraModel.pinhole(640, 480, 600.0, 600.0, 319.5, 239.5)
    T_goal = robot.arm.camera_pose(robot.home)
    board = np.array([[-0.05, -0.05, 0.4], [0.05, -0.05, 0.4], [0.05, 0.05, 0.4],
                      [-0.05, 0.05, 0.4], [0.0, 0.02, 0.4]])
    scene = PointScene((T_goal[:3, :3] @ board.T).T + T_goal[:3, 3], camera, robot.arm)
    rng = np.random.default_rng(3)
    q_frame = robot.home + rng.normal(0.0, 0.05, robot.arm.n)
    step = rng.normal(0.0, 1.0, robot.arm.n)
    step *= 0.004 / np.max(np.abs(step))

    def desired(predict, q_obs, q_cmd, t_cmd):
        settings = ServoSettings(soft_start_s=0.0, direction_probe_px=0.0, scheme="decoupled",
                                 predict_between_frames=predict, depth_source="observed")
        servo = Servo(robot.arm, settings, limits_for(robot.arm))
        servo.set_reference(scene.taught_view(robot.home))
        servo.enable(True, 0.0)
        assert servo.start(q_obs, 0.0)[0]
        servo.observe(scene.sense()(q_obs, 0.0), q_obs, 0.0)
        servo.command(q_cmd, t_cmd, 0.008)
        return servo._desired.copy()

    q_now = q_frame + step
    predicted = desired(True, q_frame, q_now, 0.02)
    held = desired(False, q_frame, q_now, 0.02)
    exact = desired(False, q_now, q_now, 0.0)
    assert not np.allclose(held, exact)
    assert np.linalg.norm(predicted - exact) < 0.2 * np.linalg.norm(held - exact), (
        np.linalg.norm(predicted - exact), np.linalg.norm(held - exact))


def test_no_pose_halts_with_a_reason_and_an_unknown_scheme_is_refused():
    """Fewer than 4 matched points (control.min_features 3, allowed for the point law) give no
    pose: the run halts pose_estimate_failed, braking to an explicit zero, and the detail says
    what was wrong and what is needed. A scheme outside decoupled.SCHEMES is refused up front."""
    from vservo_node.control.kinematics import load_robot
    from vservo_node.episode import PointScene, limits_for
    from vservo_node.vision.camera import CameraModel

    robot = load_robot("vs6_bench")
    camera = CameraModel.pinhole(640, 480, 600.0, 600.0, 319.5, 239.5)
    T_goal = robot.arm.camera_pose(robot.home)
    board = np.array([[-0.05, -0.05, 0.4], [0.05, -0.05, 0.4], [0.05, 0.05, 0.4]])
    scene = PointScene((T_goal[:3, :3] @ board.T).T + T_goal[:3, 3], camera, robot.arm)
    settings = ServoSettings(scheme="decoupled", min_features=3, depth_source="observed")
    servo = Servo(robot.arm, settings, limits_for(robot.arm))
    servo.set_reference(scene.taught_view(robot.home))
    r = episode.run_episode(servo, scene.sense(), robot.home + 0.02, T_goal, robot.arm,
                            duration_s=2.0, record=True)
    assert r.reason == "pose_estimate_failed" and not r.converged
    assert ">= 4 points" in servo.detail and "control.scheme decoupled" in servo.detail
    assert r.statuses[-1]["dq"] == [0.0] * robot.arm.n and servo.state == "halted"
    moments = dataclasses.replace(settings, scheme="moments")
    with pytest.raises(ValueError, match="expected one of point, decoupled"):
        Servo.check_config(robot.arm, moments, limits_for(robot.arm))
    with pytest.raises(ValueError, match="expected one of point, decoupled"):
        Servo(robot.arm, moments, limits_for(robot.arm))


if __name__ == "__main__":
    import sys

    sensing = sys.argv[1] if len(sys.argv) > 1 else "projected"   # or: image
    rate = episode_params()["io.output_rate_hz"]
    for name in SCENARIOS:
        sc = load_scenario(name)
        for scheme in ("decoupled", "point"):
            r = run_scenario_episode(name, {"control.scheme": scheme}, record=True,
                                     sensing=sensing)
            speeds = _tool_speeds(sc, r.q_trace, 1.0 / rate)
            print(f"{name} {scheme} ({sensing}): converged {r.converged} ({r.reason or '-'}) "
                  f"in {r.time_s:.2f} s, pose error {r.pose_error_mm:.3f} mm / "
                  f"{r.pose_error_deg:.3f} deg, tool speed max {np.max(speeds):.4f} m/s "
                  f"(peak {r.peak_tool_speed:.4f}), camera speed peak "
                  f"{r.peak_camera_speed:.4f} m/s, off the straight path "
                  f"{1e3 * _straight_path_deviation(sc, r.camera_trace):.1f} mm")
