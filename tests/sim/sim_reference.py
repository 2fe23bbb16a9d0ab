"""Independent references for the sim tests: camera poses by pinocchio's forward kinematics of
the full URDF model (pinocchio.buildModelFromUrdf + framesForwardKinematics: every joint, the
gripper fingers included, no reduction), compared with pose errors computed by SciPy."""
from __future__ import annotations

import functools

import numpy as np
import pinocchio as pin
from scipy.spatial.transform import Rotation


@functools.cache
def full_model(urdf_path):
    model = pin.buildModelFromUrdf(str(urdf_path))
    return model, model.createData()


def camera_in_base(scenario, q, perturbation=np.eye(4)):
    """T_base_camera by pinocchio on the full URDF model, joints set by name."""
    model, data = full_model(scenario.urdf_path)
    q_full = pin.neutral(model)
    for name, value in zip(scenario.joint_names, q):
        joint = model.joints[model.getJointId(name)]
        if joint.nq == 2:   # continuous joint: (cos, sin)
            q_full[joint.idx_q:joint.idx_q + 2] = np.cos(value), np.sin(value)
        else:
            q_full[joint.idx_q] = value
    pin.framesForwardKinematics(model, data, q_full)
    base = data.oMf[model.getFrameId(scenario.base_frame)]
    camera = data.oMf[model.getFrameId(scenario.camera_frame)]
    return (base.inverse() * camera).homogeneous @ perturbation


def rigid(R, t):
    T = np.eye(4)
    T[:3, :3], T[:3, 3] = R, t
    return T


def assert_same_pose(T_expected, T, what):
    translation_mm = np.linalg.norm(T[:3, 3] - T_expected[:3, 3]) * 1e3
    angle_deg = np.degrees(Rotation.from_matrix(T_expected[:3, :3].T @ T[:3, :3]).magnitude())
    assert translation_mm < 0.1 and angle_deg < 0.01, \
        f"{what}: {translation_mm:.4f} mm, {angle_deg:.5f} deg from the requested pose"
