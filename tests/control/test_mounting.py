"""Fixed camera (eye-to-hand) geometry, vservo_node/control/mounting.py, against outside checks:

- the image Jacobian ``L(s, Z) J_c(q)`` against central differences of the simulated projection
  of the target's points, computed through pinocchio's forward kinematics on the full,
  unreduced URDF model (reference library; no code of ours in the reference path but the
  pinhole projection X/Z, Y/Z);
- its sign: a small joint step, the feature motion predicted against the one simulated; the
  formula is Chaumette & Hutchinson, "Visual servo control, Part II: Advanced approaches",
  IEEE RAM 14(1), 2007, eye-in-hand and eye-to-hand systems (from memory), confirmed here by
  those independent computations;
- the tool pose error estimated from the features against the true tool displacement (rigid
  body motion composed with pinocchio's SE3).
"""
from pathlib import Path

import numpy as np
import pinocchio as pin
import pytest

from vservo_node import params
from vservo_node.control import frames
from vservo_node.control.interaction import point_interaction_matrix
from vservo_node.control.kinematics import ArmModel
from vservo_node.control.mounting import (FixedCamera, fixed_camera_jacobian, mount_from_params,
                                          tool_pose_error)
from vservo_node.control.pose_error import PoseErrorEstimator
from vservo_node.paths import config_dir

URDF = config_dir() / "robots" / "vs6_bench.urdf"
H = 1e-6
HOME = np.array([0.0, 0.7484, 0.8388, 0.0, 1.7044, 0.0])   # config/robots/vs6_bench.yaml
# invented cell: a camera on the table looking up at a board held 2 cm off the flange
T_TOOL_TARGET = frames.transform(frames.rpy_to_matrix([np.pi, 0.0, 0.3]), [0.01, -0.02, 0.02])
POINTS = np.array([[-0.04, -0.04, 0.0], [0.04, -0.04, 0.0], [0.04, 0.04, 0.0],
                   [-0.04, 0.04, 0.0], [0.012, -0.006, 0.0]])


def _arm():
    return ArmModel.from_urdf_file(URDF, "base_link", "tool0")


class _PinocchioCell:
    """The reference: the target's points in a fixed camera through pinocchio's own FK on the
    full URDF (fingers at zero), not through ArmModel."""

    def __init__(self, T_base_camera, T_tool_target):
        self.model = pin.buildModelFromXML(Path(URDF).read_text())
        self.data = self.model.createData()
        self.T_camera_base = np.linalg.inv(T_base_camera)
        self.T_tool_target = T_tool_target
        self.names = [f"vs6_j{i}" for i in range(1, 7)]

    def _q(self, q):
        q_full = pin.neutral(self.model)
        for name, value in zip(self.names, q):
            joint = self.model.joints[self.model.getJointId(name)]
            if joint.nq == 2:
                q_full[joint.idx_q:joint.idx_q + 2] = np.cos(value), np.sin(value)
            else:
                q_full[joint.idx_q] = value
        return q_full

    def T_base_tool(self, q):
        pin.framesForwardKinematics(self.model, self.data, self._q(q))
        base = self.data.oMf[self.model.getFrameId("base_link")]
        tool = self.data.oMf[self.model.getFrameId("tool0")]
        return (base.inverse() * tool).homogeneous

    def points_camera(self, q):
        T = self.T_camera_base @ self.T_base_tool(q) @ self.T_tool_target
        return POINTS @ T[:3, :3].T + T[:3, 3]

    def features(self, q):
        p = self.points_camera(q)
        return (p[:, :2] / p[:, 2:]).ravel()


def _camera_facing(arm, q, distance=0.3):
    """A still camera 'distance' in front of the target at q, looking at its printed side."""
    T_base_target = arm.fk(q) @ T_TOOL_TARGET
    T_target_camera = frames.transform(frames.rpy_to_matrix([0.05, -0.08, 0.4]),
                                       [0.01, 0.015, -distance])
    return T_base_target @ T_target_camera


@pytest.fixture
def cell():
    arm = _arm()
    mount = FixedCamera(_camera_facing(arm, HOME), T_TOOL_TARGET)
    return arm, mount, _PinocchioCell(mount.T_base_camera, T_TOOL_TARGET)


def _image_jacobian(arm, mount, ref, q):
    p = ref.points_camera(q)
    return point_interaction_matrix(p[:, :2] / p[:, 2:], p[:, 2]) @ mount.camera_jacobian(arm, q)


def test_image_jacobian_matches_finite_differences_of_the_projection(cell):
    # s(q) through pinocchio's FK and the pinhole; central differences against L(s, Z) J_c(q)
    # (Chaumette & Hutchinson 2006, Part I, eq. 11 for L; Part II 2007 for the eye-to-hand J_c)
    arm, mount, ref = cell
    rng = np.random.default_rng(3)
    for q in [HOME, HOME + rng.normal(0, 0.05, 6), HOME + rng.normal(0, 0.05, 6)]:
        fd = np.column_stack([(ref.features(q + H * e) - ref.features(q - H * e)) / (2 * H)
                              for e in np.eye(6)])
        J = _image_jacobian(arm, mount, ref, q)
        assert np.abs(J - fd).max() < 1e-6 * max(1.0, np.abs(fd).max())


def test_small_joint_step_moves_features_as_predicted(cell):
    # sign: a 2 mrad joint step, predicted J dq against the simulated change (first order, so
    # within a few per cent); the wrist formula (no minus) predicts the opposite motion
    arm, mount, ref = cell
    rng = np.random.default_rng(5)
    for _ in range(5):
        dq = rng.normal(size=6)
        dq *= 2e-3 / np.linalg.norm(dq)
        seen = ref.features(HOME + dq) - ref.features(HOME)
        predicted = _image_jacobian(arm, mount, ref, HOME) @ dq
        cosine = seen @ predicted / (np.linalg.norm(seen) * np.linalg.norm(predicted))
        assert cosine > 0.999
        assert np.linalg.norm(seen - predicted) < 0.03 * np.linalg.norm(seen)
        p = ref.points_camera(HOME)
        wrong_sign = point_interaction_matrix(p[:, :2] / p[:, 2:], p[:, 2]) @ (
            -mount.camera_jacobian(arm, HOME)) @ dq
        assert seen @ wrong_sign < 0


def test_reference_point_matters(cell):
    # the twist transform's reference point is the camera origin: a constant base-to-camera
    # transform applied to the tool-origin Jacobian in base axes (reference point the tool)
    # does not match the simulated motion, so the test above could fail
    arm, mount, ref = cell
    fd = np.column_stack([(ref.features(HOME + H * e) - ref.features(HOME - H * e)) / (2 * H)
                          for e in np.eye(6)])
    p = ref.points_camera(HOME)
    L = point_interaction_matrix(p[:, :2] / p[:, 2:], p[:, 2])
    wrong = L @ (-frames.rotation_block(frames.invert(mount.T_base_camera)[:3, :3])
                 @ arm.jacobian_base(HOME))
    assert np.abs(wrong - fd).max() > 0.1 * np.abs(fd).max()


def test_fixed_camera_jacobian_is_the_negated_twist_transform():
    rng = np.random.default_rng(1)
    T = frames.transform(frames.rpy_to_matrix(rng.normal(size=3)), rng.normal(size=3))
    J = rng.normal(size=(6, 7))
    np.testing.assert_allclose(fixed_camera_jacobian(T, J), -frames.twist_transform(T) @ J)


def test_cartesian_jacobians_match_point_jacobians(cell):
    # the limiter's target-origin Jacobian is the point Jacobian v + w x r of ArmModel
    # (tests/control/test_kinematics.py checks those against finite differences)
    arm, mount, _ = cell
    tool_point = np.array([0.0, 0.01, 0.05])
    tool_jac, target_jac, angular = mount.cartesian_jacobians(arm, HOME, tool_point)
    np.testing.assert_allclose(tool_jac, arm.point_jacobian_base(HOME, "tool", tool_point),
                               atol=1e-12)
    np.testing.assert_allclose(target_jac, arm.point_jacobian_base(HOME, "tool",
                                                                   T_TOOL_TARGET[:3, 3]),
                               atol=1e-12)
    np.testing.assert_allclose(angular, arm.jacobian_base(HOME)[3:], atol=1e-12)


@pytest.mark.parametrize("with_model", [True, False])
def test_tool_pose_error_from_features(cell, with_model):
    # taught and current views of the board through pinocchio's FK; the estimate of the
    # tool's displacement against the true one (PnP: the tool origin; homography: the point
    # the estimate is expressed at is the target's centroid, compared at that point)
    arm, mount, ref = cell
    q_now = HOME + np.array([0.01, -0.008, 0.005, 0.012, -0.01, 0.02])
    p_taught, p_now = ref.points_camera(HOME), ref.points_camera(q_now)
    xy_taught = p_taught[:, :2] / p_taught[:, 2:]
    xy_now = p_now[:, :2] / p_now[:, 2:]
    estimator = PoseErrorEstimator(xy_taught, model_points=POINTS if with_model else None,
                                   taught_depths=None if with_model else p_taught[:, 2])
    errors = mount.pose_errors(estimator)
    est = errors.estimate(xy_now)
    assert est.valid, est.reason
    T_taught, T_now = ref.T_base_tool(HOME), ref.T_base_tool(q_now)
    true_mm, true_deg = tool_pose_error(T_taught, T_now)
    if not with_model:   # the same rigid motion, measured at the target's centroid
        c = np.append(POINTS.mean(axis=0), 1.0)
        T_c = T_TOOL_TARGET @ frames.transform(np.eye(3), c[:3])
        true_mm = 1e3 * np.linalg.norm((T_now @ T_c)[:3, 3] - (T_taught @ T_c)[:3, 3])
    assert errors.point == ("tool" if with_model else "target_centroid")
    assert true_mm > 5.0 and true_deg > 0.5    # a real displacement
    assert abs(est.translation_mm - true_mm) < 1e-3
    assert abs(est.rotation_deg - true_deg) < 1e-4
    # at the goal: zero
    assert errors.estimate(xy_taught).translation_mm < 1e-6


def test_mount_from_params():
    arm = _arm()
    assert mount_from_params(params.defaults(), arm) is None
    values = dict(params.defaults(), **{"robot.camera_mount": "fixed",
                                        "robot.target_on_tool": [0, 0, 0.02, 1, 0, 0, 0],
                                        "robot.fixed_camera_pose": [0.5, 0, 0, 0, 0, 0, 1]})
    mount = mount_from_params(values, arm)
    np.testing.assert_allclose(mount.T_base_camera[:3, 3], [0.5, 0, 0])
    np.testing.assert_allclose(mount.T_tool_target[:3, :3], np.diag([1.0, -1.0, -1.0]))
    # a URDF frame that moves with the chain is refused, one rigid to the base is taken
    values.update({"robot.fixed_camera_pose": [], "robot.fixed_camera_frame": "vs6_link3"})
    with pytest.raises(ValueError, match="moves with the servo chain"):
        mount_from_params(values, arm)
    values["robot.fixed_camera_frame"] = "world"
    np.testing.assert_allclose(mount_from_params(values, arm).T_base_camera,
                               arm.fk(HOME, "world"), atol=1e-12)
    values["robot.target_on_tool"] = []
    with pytest.raises(ValueError, match="robot.target_on_tool"):
        mount_from_params(values, arm)


@pytest.mark.parametrize("change, message", [
    ({}, "needs robot.target_on_tool"),
    ({"robot.target_on_tool": [0, 0, 0, 0, 0, 0, 1]}, "needs the camera's pose"),
    ({"robot.target_on_tool": [0, 0, 0, 0, 0, 0, 0], "robot.fixed_camera_frame": "stand"},
     "zero norm"),
    ({"robot.target_on_tool": [0, 0, 0, 0, 0, 0, 1], "robot.fixed_camera_frame": "stand",
      "io.command_interface": "camera_twist"}, "the camera stands still"),
])
def test_schema_refuses_an_incomplete_fixed_mount(change, message):
    result = params.validate({"robot.camera_mount": "fixed",
                              "limits.joint_acceleration": [3.0], **change})
    assert any(message in e for e in result.errors), result.errors
    ok = params.validate({"robot.camera_mount": "fixed", "limits.joint_acceleration": [3.0],
                          "robot.target_on_tool": [0, 0, 0, 0, 0, 0, 1],
                          "robot.fixed_camera_frame": "stand"})
    assert ok.ok, ok.errors
