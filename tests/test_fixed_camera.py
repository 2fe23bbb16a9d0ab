"""Fixed camera (eye-to-hand) closed loop: the shipped stand scenarios through the node's code
path (tests/test_scenario_episode.py also runs each shipped scenario once with rendered images
and judges it against the simulator's ground truth). Here: seeded runs against the stated
requirement, the supervisor's direction check on a wrong image Jacobian, and the parameter
path from robot.camera_mount to the servo.

Ground truth is the simulator's: the tool's true pose at the end against its true taught pose
(pinocchio forward kinematics of the true arm); the requirement is the one config/vservo_sim.yaml
states (control.tolerance_mm / tolerance_deg, 0.5 mm / 0.1 deg) and judges on the servo's own
estimate (control/pose_error.py through control/mounting.py).
"""
from __future__ import annotations

import dataclasses

import numpy as np
import pytest

from vservo_node import params, paths
from vservo_node.control import frames
from vservo_node.control.mounting import FixedCamera
from vservo_node.episode import episode_params, run_scenario_episode, servo_from_params
from vservo_node.sim import load_scenario


def _requirement():
    values = params.load_params_file(paths.config_dir() / "vservo_sim.yaml")
    return values["control.tolerance_mm"], values["control.tolerance_deg"]


@pytest.mark.parametrize("name", ["vs6_stand_combined"])
def test_seeded_runs_stop_inside_the_stated_tolerance(name):
    # five noise draws (projected sensing with the detectors' measured jitter); the combined
    # scenario also has the controller believe the stand and the board 1-2 mm / 0.3-1 deg off
    tol_mm, tol_deg = _requirement()
    assert (tol_mm, tol_deg) == (0.5, 0.1)
    worst = [0.0, 0.0]
    for seed in range(5):
        r = run_scenario_episode(name, seed=seed, sensing="projected")
        assert r.converged, f"seed {seed}: {r.reason}"
        assert r.pose_error_mm <= tol_mm and r.pose_error_deg <= tol_deg, (
            seed, r.pose_error_mm, r.pose_error_deg)
        worst = [max(worst[0], r.pose_error_mm), max(worst[1], r.pose_error_deg)]
    print(f"\n{name}: worst true tool pose error over 5 runs {worst[0]:.3f} mm, "
          f"{worst[1]:.4f} deg")


class _Mirrored(FixedCamera):
    """A controller that got the eye-to-hand sign wrong (the wrist formula's sign)."""

    def camera_jacobian(self, arm, q):
        return -super().camera_jacobian(arm, q)


def test_a_wrong_sign_halts_wrong_direction_within_the_nod():
    sc = load_scenario("vs6_stand_offset")
    belief = sc.mount("belief")
    wrong = dataclasses.replace(sc, fixed_belief=_Mirrored(belief.T_base_camera,
                                                           belief.T_tool_target))
    r = run_scenario_episode(wrong, sensing="projected", record=True)
    assert (r.converged, r.reason) == (False, "wrong_direction")
    assert r.time_s < 0.6                      # the nod lasts 0.3 s, braking follows
    assert "robot.fixed_camera_pose" in r.statuses[-1]["detail"]
    assert r.statuses[-1]["dq"] == [0.0] * 6   # ended in an explicit zero


def test_the_mount_parameters_reach_the_servo():
    sc = load_scenario("vs6_stand_offset")
    fixed = sc.mount("true")

    def pose7(T):
        return [*T[:3, 3], *frames.matrix_to_quat(T[:3, :3])]

    values = episode_params({"robot.camera_mount": "fixed",
                             "robot.fixed_camera_pose": pose7(fixed.T_base_camera),
                             "robot.target_on_tool": pose7(fixed.T_tool_target)})
    servo = servo_from_params(sc.arm_model("true"), values)
    np.testing.assert_allclose(servo.mount.T_base_camera, fixed.T_base_camera, atol=1e-12)
    np.testing.assert_allclose(servo.camera_twist(sc.q_taught, np.ones(6)),
                               fixed.camera_jacobian(sc.arm_model("true"), sc.q_taught)
                               @ np.ones(6), atol=1e-12)


def test_the_decoupled_scheme_runs_on_the_relative_jacobian_too():
    # control.scheme decoupled builds its task Jacobian from the same relative camera twist
    # (L @ J_c): the combined start (60 deg turn) converges inside the stated requirement
    tol_mm, tol_deg = _requirement()
    r = run_scenario_episode("vs6_stand_combined", {"control.scheme": "decoupled"},
                             sensing="projected")
    assert r.converged, r.reason
    assert r.pose_error_mm <= tol_mm and r.pose_error_deg <= tol_deg
