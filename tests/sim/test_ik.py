"""Scenario poses solved by IK, checked with pinocchio's own forward kinematics of the full URDF
model (pinocchio.buildModelFromUrdf + framesForwardKinematics: every joint, the gripper fingers
included, no reduction) and with offsets composed by SciPy's Rotation, independently of
vservo_node's frames and kinematics modules.

Budget: the camera lands within 0.1 mm and 0.01 deg of the requested pose.
"""
from __future__ import annotations

import numpy as np
import pytest
import yaml
from scipy.spatial.transform import Rotation

from vservo_node import paths
from vservo_node.sim.ik import solve_camera_pose
from vservo_node.sim.scenario import load_scenario, scenario_from_dict

from sim_reference import assert_same_pose, camera_in_base, rigid

OFFSET_SCENARIOS = ["tray_twist", "tray_offset", "tray_combined", "tray_tags_offset",
                    "tray_poster_offset", "vs6_tray_offset", "vs6_tray_twist"]


def scenario_yaml(name):
    return yaml.safe_load(paths.shipped("scenarios", name).read_text())


@pytest.mark.parametrize("name", OFFSET_SCENARIOS)
def test_taught_and_start_poses_are_the_requested_ones(name):
    scenario = load_scenario(name)
    spec = scenario_yaml(name)
    above = spec["taught"]["above_target"]
    ox, oy = above.get("offset_xy", (0, 0))
    T_target_camera = rigid(Rotation.from_euler("z", above.get("about_axis_deg", 0),
                                                degrees=True).as_matrix(),
                            [ox, oy, -above["distance"]])
    x, y, z = spec["target"]["pose"]["xyz"]
    rpy = spec["target"]["pose"]["rpy_rad"]
    T_base_target = rigid(Rotation.from_euler("xyz", rpy).as_matrix(), [x, y, z])  # URDF rpy
    T_taught = T_base_target @ T_target_camera
    assert_same_pose(T_taught, camera_in_base(scenario, scenario.q_taught), "taught")

    offset = spec["start"]["offset"]
    tilt = np.radians(offset.get("tilt_deg", [0, 0]))
    R = (Rotation.from_rotvec([tilt[0], tilt[1], 0.0])
         * Rotation.from_euler("z", offset.get("about_axis_deg", 0), degrees=True))
    T_start = T_taught @ rigid(R.as_matrix(), offset.get("translation", [0, 0, 0]))
    assert_same_pose(T_start, camera_in_base(scenario, scenario.q_start), "start")


def test_true_hand_eye_perturbation_moves_the_real_camera():
    spec = scenario_yaml("tray_offset")
    spec["true_hand_eye"] = {"translation": [0.004, -0.003, 0.002], "rotation_deg": [1.0, -2.0,
                                                                                     0.5]}
    scenario = scenario_from_dict(spec)
    perturbation = rigid(Rotation.from_rotvec(np.radians([1.0, -2.0, 0.5])).as_matrix(),
                         [0.004, -0.003, 0.002])
    plain = load_scenario("tray_offset")
    # Same requested camera poses, so the true camera (URDF mount + perturbation) lands where
    # the unperturbed one did, on different joints.
    for q, q_plain in ((scenario.q_taught, plain.q_taught), (scenario.q_start, plain.q_start)):
        assert_same_pose(camera_in_base(plain, q_plain), camera_in_base(scenario, q, perturbation),
                         "perturbed mount")
        assert np.abs(q - q_plain).max() > 1e-3


def test_redundant_arm_stays_near_home():
    """For the 7-joint arm the solution is the posture nearest home among those giving the same
    camera pose (locally): moving along the self-motion (null space of the camera Jacobian)
    only takes it further from home (Liegeois 1977)."""
    scenario = load_scenario("tray_combined")
    arm = scenario.arm_model("true")
    q = scenario.q_start
    J = arm.frame_jacobian_base(q, "camera")
    null_direction = np.linalg.svd(J)[2][-1]  # 7 joints, rank 6: one self-motion direction
    gradient = q - scenario.q_home
    assert abs(null_direction @ gradient) < 1e-6 * max(1.0, np.linalg.norm(gradient))


def test_unreachable_pose_is_refused():
    scenario = load_scenario("vs6_tray_offset")
    arm = scenario.arm_model("true")
    far = arm.camera_pose(scenario.q_taught)
    far[:3, 3] += [3.0, 0.0, 0.0]
    with pytest.raises(ValueError, match="did not reach the camera pose"):
        solve_camera_pose(arm, far, scenario.q_taught)
