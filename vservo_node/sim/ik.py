"""Inverse kinematics of the camera pose, for placing the simulated arm (not for servoing).

Damped Newton iterations on the 6-D pose error of the camera frame (Wampler 1986, "Manipulator
inverse kinematic solutions based on vector formulations and damped least-squares methods",
IEEE Trans. SMC 16(1); Nakamura & Hanafusa 1986): with the camera's geometric Jacobian ``J``
(pinocchio, through ``ArmModel.frame_jacobian_base(q, "camera")``, ``[v; w]`` in base axes)
and the pose error ``e = [p* - p; log(R* R^T)]`` in base axes,

    dq = J^T (J J^T + mu^2 I)^-1 e  +  (I - J^+ J) k (q_rest - q)

where the second term (Liegeois 1977, gradient projection onto the null space) keeps a
redundant arm near a rest posture (its home) without moving the camera. Joints are kept inside
their limits after every step.
"""
from __future__ import annotations

import numpy as np
import pinocchio as pin

# Stop when the camera is this close to the goal: 1e-3 mm and 1e-5 deg, well inside the
# 0.1 mm / 0.01 deg the scenarios promise (tests/sim/test_ik.py checks with pinocchio's FK).
TOL_M = 1e-6
TOL_RAD = np.radians(1e-5)
_DAMPING = 1e-4      # mu, in (m or rad): negligible unless the arm is near a singularity
_NULL_GAIN = 0.5     # k, fraction of the rest-posture error removed per iteration
_MAX_STEP = 0.2      # rad, largest joint change per iteration (keeps Newton in its basin)
_MAX_ITER = 500


def pose_error(T_goal, T) -> np.ndarray:
    """``[p* - p; log(R* R^T)]`` (6,), base axes: the twist that moves ``T`` onto ``T_goal``."""
    return np.concatenate([T_goal[:3, 3] - T[:3, 3],
                           pin.log3(T_goal[:3, :3] @ T[:3, :3].T)])


def solve_camera_pose(arm, T_base_camera, q_seed, q_rest=None) -> np.ndarray:
    """Joint positions (n,) that put ``arm``'s camera frame (its ``T_tool_camera``) at
    ``T_base_camera`` (4x4, metres), starting from ``q_seed``; a redundant arm stays near
    ``q_rest`` (default ``q_seed``).

    Raises ValueError, saying how far it got, if the pose is not reached (out of reach, beyond
    the joint limits, or a seed in another basin).
    """
    q = np.clip(np.asarray(q_seed, dtype=float), arm.lower, arm.upper)
    q_rest = q.copy() if q_rest is None else np.asarray(q_rest, dtype=float)
    T_goal = np.asarray(T_base_camera, dtype=float)
    for _ in range(_MAX_ITER):
        e = pose_error(T_goal, arm.camera_pose(q))
        J = arm.frame_jacobian_base(q, "camera")
        null_step = _null_space_step(J, q_rest - q)
        if _reached(e) and np.linalg.norm(null_step) < 1e-9:
            return q
        dq = J.T @ np.linalg.solve(J @ J.T + _DAMPING**2 * np.eye(6), e) + null_step
        largest = np.max(np.abs(dq))
        if largest > _MAX_STEP:
            dq *= _MAX_STEP / largest
        q = np.clip(q + dq, arm.lower, arm.upper)
    e = pose_error(T_goal, arm.camera_pose(q))
    if _reached(e):
        return q  # the pose is met; only the posture was still drifting towards rest
    raise ValueError(
        f"inverse kinematics did not reach the camera pose after {_MAX_ITER} iterations: "
        f"{np.linalg.norm(e[:3]) * 1e3:.3f} mm and {np.degrees(np.linalg.norm(e[3:])):.4f} deg "
        f"away (out of reach, beyond joint limits, or a seed too far from it)")


def _reached(e) -> bool:
    return bool(np.linalg.norm(e[:3]) < TOL_M and np.linalg.norm(e[3:]) < TOL_RAD)


def _null_space_step(J, toward_rest) -> np.ndarray:
    """``(I - J^+ J) k toward_rest``: zero for a non-redundant arm."""
    if J.shape[1] <= 6:
        return np.zeros(J.shape[1])
    N = np.eye(J.shape[1]) - np.linalg.pinv(J) @ J
    return N @ (_NULL_GAIN * toward_rest)
