"""SimCell: images, joint states and truth agree on time; runs are deterministic; features can
be hidden or occluded; every shipped scenario starts with its whole target in view.

The camera pose is checked against pinocchio's forward kinematics of the full URDF
(tests/sim/test_ik.py, camera_in_base), the feature pixels against cv2.projectPoints.
"""
from __future__ import annotations

import copy
import dataclasses
import functools

import cv2
import numpy as np
import pytest
import yaml

from vservo_node import paths
from vservo_node.sim import SimCell, load_scenario
from vservo_node.sim.scenario import scenario_from_dict

from sim_reference import assert_same_pose, camera_in_base

SHIPPED = sorted(p.stem for p in (paths.config_dir() / "scenarios").glob("*.yaml"))


@functools.cache
def scenario(name="tray_offset"):
    return load_scenario(name)


def quiet(s):
    """The scenario without joint-state noise (so reported and true joints coincide)."""
    return dataclasses.replace(s, arm_dynamics=dataclasses.replace(
        s.arm_dynamics, joint_noise_std=0.0, velocity_noise_std=0.0))


def spec(name="tray_offset"):
    return copy.deepcopy(yaml.safe_load(paths.shipped("scenarios", name).read_text()))


def moving_cell(s):
    cell = SimCell(s)
    dq = np.linspace(-0.3, 0.3, len(cell.joint_names))
    for _ in range(20):
        cell.command_velocity(dq)
        cell.step(0.0123)  # ends between drive cycles on purpose
    return cell


def test_image_joint_state_and_truth_share_the_instant():
    cell = moving_cell(quiet(scenario()))
    t = cell.t
    q, _ = cell.joint_state(t)
    truth = cell.truth(t)
    assert np.array_equal(q, truth.q)
    mount_offset = (np.linalg.inv(cell.scenario.arm_model("urdf").T_tool_camera)
                    @ cell.scenario.T_tool_camera_true)
    assert_same_pose(camera_in_base(cell.scenario, q, mount_offset), truth.T_base_camera, "truth")
    image = cell.render(t)
    assert np.array_equal(image, cell.render_at(q, t))
    # The arm moves enough in 5 ms to change the picture: the check above can fail.
    assert not np.array_equal(image, cell.render_at(cell.joint_state(t - 0.005)[0], t))
    # Later, the same instant still gives the same picture and state.
    cell.command_velocity(np.zeros(len(q)))
    cell.step(0.2)
    assert np.array_equal(cell.render(t), image)
    assert np.array_equal(cell.joint_state(t)[0], q)


def test_truth_pixels_are_opencv_projections():
    cell = moving_cell(scenario())
    truth = cell.truth()
    T = truth.T_camera_target
    rvec, _ = cv2.Rodrigues(T[:3, :3])
    cam = cell.camera_info
    expected, _ = cv2.projectPoints(truth.points_target, rvec, T[:3, 3], cam.K, cam.D)
    assert np.allclose(truth.uv, expected.reshape(-1, 2), atol=1e-9)
    assert truth.detectable.all()
    assert truth.disc_centroids_uv.shape == (len(truth.keys), 2)


def test_same_scenario_and_commands_give_the_same_run():
    def run():
        cell = moving_cell(scenario())  # with joint-state and image noise
        return cell.render(), cell.joint_state()

    (a_image, (a_q, a_dq)), (b_image, (b_q, b_dq)) = run(), run()
    assert np.array_equal(a_image, b_image)
    assert np.array_equal(a_q, b_q) and np.array_equal(a_dq, b_dq)


def test_hidden_dot_is_painted_over_and_not_detectable():
    data = spec()
    data["target"]["hide"] = [["dot", 4]]
    cell = SimCell(scenario_from_dict(data), q0=scenario().q_taught)
    plain = SimCell(scenario(), q0=scenario().q_taught)
    truth = cell.truth()
    u, v = np.round(truth.uv[4]).astype(int)
    board = np.array(cell.scenario.target.background)
    assert np.abs(cell.render()[v, u].astype(int) - board).max() < 12   # board colour there
    assert np.abs(plain.render()[v, u].astype(int) - board).max() > 60  # the dot, normally
    assert list(truth.detectable) == [True, True, True, True, False]


def test_occluded_features_are_not_detectable_while_the_occluder_is_there():
    s = scenario()
    uv = SimCell(s, q0=s.q_taught).truth().uv
    u, v = uv[0]
    data = spec()
    data["image"]["occlusions"] = [{"rect_px": [u - 20, v - 20, u + 20, v + 20],
                                    "from_s": 1.0, "until_s": 2.0}]
    cell = SimCell(scenario_from_dict(data), q0=s.q_taught)
    assert cell.truth(0.0).detectable[0]
    cell.step(1.5)
    assert not cell.truth(1.5).detectable[0]
    assert cell.truth(1.5).detectable[1:].all()


def test_command_timeout_can_be_overridden():
    cell = SimCell(quiet(scenario()), command_timeout=0.05)
    cell.command_velocity(np.full(len(cell.joint_names), 0.1))
    cell.step(0.3)
    assert np.allclose(cell.joint_state()[1], 0.0)  # braked long ago (0.1 rad/s / 3 rad/s^2)


@pytest.mark.parametrize("name", SHIPPED)
def test_shipped_scenarios_start_and_end_with_every_feature_detectable(name):
    s = scenario(name)
    for q in (s.q_start, s.q_taught):
        truth = SimCell(s, q0=q).truth()
        assert truth.detectable.all(), f"{name}: features {truth.keys} " \
                                       f"detectable {truth.detectable.tolist()}"
