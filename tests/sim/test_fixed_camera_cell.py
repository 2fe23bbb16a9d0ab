"""The simulated fixed-camera cell (scenario ``mount``: a camera on a stand, the target on the
tool): placement, truth and images against pinocchio's forward kinematics of the full URDF
(sim_reference.camera_in_base with the tool frame) and cv2.projectPoints (reference
libraries); malformed mount entries are refused with the entry named."""
from __future__ import annotations

import copy
import dataclasses

import cv2
import numpy as np
import pytest
import yaml

from vservo_node import paths
from vservo_node.control import frames
from vservo_node.sim import SimCell, load_scenario
from vservo_node.sim.scenario import ScenarioError, scenario_from_dict

from sim_reference import assert_same_pose, camera_in_base

NAME = "vs6_stand_offset"


def spec(name=NAME):
    return copy.deepcopy(yaml.safe_load(paths.shipped("scenarios", name).read_text()))


def tool_in_base(scenario, q):
    return camera_in_base(dataclasses.replace(scenario, camera_frame=scenario.tool_frame), q)


def target_in_camera(scenario, q):
    """T_camera_target by pinocchio's FK and the scenario's stand and target poses."""
    fixed = scenario.mount("true")
    return frames.invert(fixed.T_base_camera) @ tool_in_base(scenario, q) @ fixed.T_tool_target


def test_taught_view_is_the_target_facing_the_camera_at_the_distance():
    s = load_scenario(NAME)
    # above_target {distance: 0.30}: the board 0.30 m along the optical axis, its axes the
    # camera's (board z into the board, away from the camera)
    assert_same_pose(frames.transform(np.eye(3), [0.0, 0.0, 0.30]),
                     target_in_camera(s, s.q_taught), "taught target")


def test_start_view_is_the_wrist_scenarios_start_view():
    # the offset is the apparent camera displacement: the fixed cell starts with the same
    # camera-target pose relative to its taught one as the wrist cell with the same offset
    fixed, wrist = load_scenario(NAME), load_scenario("vs6_tray_offset")
    rel_fixed = (np.linalg.inv(target_in_camera(fixed, fixed.q_taught))
                 @ target_in_camera(fixed, fixed.q_start))

    def wrist_ct(q):
        return np.linalg.inv(camera_in_base(wrist, q)) @ wrist.T_base_target

    rel_wrist = np.linalg.inv(wrist_ct(wrist.q_taught)) @ wrist_ct(wrist.q_start)
    assert_same_pose(rel_wrist, rel_fixed, "start relative to taught")
    assert np.linalg.norm(rel_fixed[:3, 3]) > 0.05     # a real offset


def test_truth_and_image_follow_the_tool_and_the_camera_stands_still():
    s = load_scenario(NAME)
    s = dataclasses.replace(s, arm_dynamics=dataclasses.replace(
        s.arm_dynamics, joint_noise_std=0.0, velocity_noise_std=0.0))
    cell = SimCell(s)
    image0 = cell.render(0.0)
    cell.command_velocity(np.linspace(-0.2, 0.2, len(cell.joint_names)))
    cell.step(0.25)
    truth = cell.truth()
    np.testing.assert_array_equal(truth.T_base_camera, s.mount("true").T_base_camera)
    T_ct = target_in_camera(s, truth.q)
    assert_same_pose(T_ct, truth.T_camera_target, "truth T_camera_target")
    rvec, _ = cv2.Rodrigues(T_ct[:3, :3])
    uv, _ = cv2.projectPoints(s.target.model_points(), rvec, T_ct[:3, 3], s.camera.K, s.camera.D)
    np.testing.assert_allclose(truth.uv, uv.reshape(-1, 2), atol=1e-6)
    assert truth.detectable.all()
    assert_same_pose(tool_in_base(s, truth.q), cell.judged_pose(), "judged pose = tool")
    # the features moved, and the image with them
    assert np.abs(truth.uv - cell.truth(0.0).uv).max() > 2.0
    assert np.abs(cell.render(cell.t).astype(int) - image0.astype(int)).mean() > 0.5


def test_belief_errors_move_the_believed_stand_and_target():
    d = spec()
    d["controller_belief"] = {"hand_eye_error": {"translation": [0.002, 0, 0]},
                              "target_error": {"rotation_deg": [0, 0, 1.0]}}
    s = scenario_from_dict(d)
    true, belief = s.mount("true"), s.mount("belief")
    stand = np.linalg.inv(true.T_base_camera) @ belief.T_base_camera
    np.testing.assert_allclose(stand[:3, 3], [0.002, 0, 0], atol=1e-12)
    turn = np.linalg.inv(true.T_tool_target) @ belief.T_tool_target
    assert np.degrees(np.arccos((np.trace(turn[:3, :3]) - 1) / 2)) == pytest.approx(1.0)


@pytest.mark.parametrize("edit, entry", [
    (lambda d: d["target"].update(pose={"xyz": [0.5, 0, 0], "rpy_rad": [0, 0, 0]}),
     "target.pose"),
    (lambda d: d.update(true_hand_eye={"translation": [0.01, 0, 0]}), "true_hand_eye"),
    (lambda d: d["mount"].pop("camera_pose"), "mount.camera_pose"),
    (lambda d: d["mount"].update(camera="ceiling"), "mount.camera"),
    (lambda d: d["mount"].update(camera_pose={"xyz": [0, 0], "rpy_rad": [0, 0, 0]}),
     "mount.camera_pose.xyz"),
    # the stand placed where the arm cannot show it the board
    (lambda d: d["mount"].update(camera_pose={"xyz": [3.0, 0, 0], "rpy_rad": [0, 0, 0]}),
     "taught.above_target"),
])
def test_malformed_mount_entries_are_refused(edit, entry):
    d = spec()
    edit(d)
    with pytest.raises(ScenarioError, match=entry.replace(".", r"\.")):
        scenario_from_dict(d)


def test_target_error_is_for_a_fixed_camera_only():
    d = spec("vs6_tray_offset")
    d["controller_belief"] = {"target_error": {"translation": [0.001, 0, 0]}}
    with pytest.raises(ScenarioError, match="fixed camera only"):
        scenario_from_dict(d)
