"""Where the camera is: on the tool (``wrist``, eye-in-hand) or fixed in the cell, looking at a
target carried by the tool (``fixed``, eye-to-hand).

The servo's law and supervisor are written for one quantity: the camera's twist relative to
the target, ``v_c = [v; w]`` in the camera optical frame, which moves the image points as
``s_dot = L(s, Z) v_c`` (Chaumette & Hutchinson, "Visual servo control, Part I: Basic
approaches", IEEE RAM 13(4), 2006, eq. 11; there the target is still and the camera moves).
A mounting supplies the 6 x n Jacobian of that relative twist in the joint rates,
``v_c = J_c(q) q_dot``; everything above it (DLS, gain schedule, nod, wrong-direction check,
prediction between frames, the decoupled scheme) is the same in both mountings.

Wrist: ``J_c = twist_transform(T_camera_tool) J_tool(q)`` (the camera rides on the tool;
``ArmModel.camera_from_tool``).

Fixed (eye-to-hand): the camera stands still at ``T_base_camera`` and the target rides on the
tool at ``T_tool_target``. Derivation. Let ``V_t = twist_transform(T_camera_tool(q)) J_tool(q)
q_dot`` be the tool's (hence the target's) twist expressed in the camera frame with the camera
origin as reference point (DEVELOPERS.md, twist transform; ``T_camera_tool = inv(T_base_camera)
fk(q)``). A point X of the target, in camera coordinates, then moves as ``X_dot = v_t + w_t x
X``. A camera moving with twist ``v_c`` past still points sees ``X_dot = -v - w x X`` (the same
paper, the equation before eq. 11). The two agree for every X exactly when ``v_c = -V_t``, so

    J_c(q) = -twist_transform(T_camera_tool(q)) @ J_tool(q),    s_dot = L(s, Z) J_c(q) q_dot.

The sign is the eye-to-hand sign of Chaumette & Hutchinson, "Visual servo control, Part II:
Advanced approaches", IEEE RAM 14(1), 2007, section on eye-in-hand and eye-to-hand systems
(``s_dot = -L_s cV_0 0J(q) q_dot``, from memory); the frame is ours: the reference point of
the transformed twist must be the camera origin, which is why ``T_camera_tool`` (which depends
on q) and not a constant base-to-camera transform applied to a Jacobian at another reference
point. tests/control/test_mounting.py checks ``J_c`` against a finite difference of the
simulated projection through pinocchio's forward kinematics, and the sign by a small joint
step, predicted against simulated.

With a fixed camera the pose error the arrival tolerances judge is the **tool's**: the
feature-based estimate (``control.pose_error``, the camera's displacement from the taught
view, a target standing still) is turned into the target's motion seen from the still camera
(its inverse) and expressed at the tool's origin (:class:`ToolPoseErrors`).
"""
from __future__ import annotations

import math
from dataclasses import dataclass
from typing import Any, Iterable, Mapping, TYPE_CHECKING

import numpy as np
from numpy.typing import ArrayLike

from vservo_node.control import frames
from vservo_node.control.pose_error import PoseErrorEstimator, PoseEstimate

if TYPE_CHECKING:
    from vservo_node.control.kinematics import ArmModel

MOUNTS = ("wrist", "fixed")


def fixed_camera_jacobian(T_camera_tool: ArrayLike, J_tool: ArrayLike) -> np.ndarray:
    """(6, n) relative camera twist per joint rate for a still camera watching the tool:
    ``-twist_transform(T_camera_tool) @ J_tool`` (module doc). ``T_camera_tool``: the tool's
    pose in the camera optical frame at q; ``J_tool``: the tool-frame (body) Jacobian at q."""
    J_c: np.ndarray = -frames.twist_transform(T_camera_tool) @ np.asarray(J_tool, dtype=float)
    return J_c


@dataclass(frozen=True)
class FixedCamera:
    """A camera fixed in the cell (``T_base_camera``: its optical frame in the base frame) and
    the target rigid to the tool (``T_tool_target``: the target file's frame in the tool
    frame), 4x4, metres."""

    T_base_camera: np.ndarray
    T_tool_target: np.ndarray
    name = "fixed"

    def __post_init__(self) -> None:
        for label in ("T_base_camera", "T_tool_target"):
            T = np.asarray(getattr(self, label), dtype=float)
            if T.shape != (4, 4) or not np.isfinite(T).all():
                raise ValueError(f"{label} must be a finite 4x4 transform, got shape {T.shape}")
            R = T[:3, :3]
            if (np.abs(R.T @ R - np.eye(3)).max() > 1e-6 or np.linalg.det(R) <= 0
                    or np.abs(T[3] - [0, 0, 0, 1]).max() > 1e-9):
                raise ValueError(f"{label} is not a rigid transform (rotation part not "
                                 "orthonormal with determinant +1, or last row not 0 0 0 1)")
            object.__setattr__(self, label, T.copy())

    @classmethod
    def from_poses(cls, camera_pose7: Iterable[float], target_pose7: Iterable[float]
                   ) -> "FixedCamera":
        """From two ``[x, y, z, qx, qy, qz, qw]`` lists (robot.fixed_camera_pose,
        robot.target_on_tool)."""
        return cls(_pose7(camera_pose7, "robot.fixed_camera_pose"),
                   _pose7(target_pose7, "robot.target_on_tool"))

    def T_camera_tool(self, arm: ArmModel, q: ArrayLike) -> np.ndarray:
        T: np.ndarray = frames.invert(self.T_base_camera) @ arm.fk(q)
        return T

    def T_camera_target(self, arm: ArmModel, q: ArrayLike) -> np.ndarray:
        """The target's pose in the camera optical frame at joints q."""
        T: np.ndarray = self.T_camera_tool(arm, q) @ self.T_tool_target
        return T

    def camera_jacobian(self, arm: ArmModel, q: ArrayLike) -> np.ndarray:
        """(6, n) the camera's twist relative to the target, camera frame (module doc)."""
        return fixed_camera_jacobian(self.T_camera_tool(arm, q), arm.jacobian_tool(q))

    def cartesian_jacobians(self, arm: ArmModel, q: ArrayLike, tool_point: ArrayLike
                            ) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
        """The limiter's three 3 x n Jacobians, base axes: the tool point's linear velocity,
        the target origin's (in the slot of the wrist camera's origin: the point the camera
        watches; limits.camera_linear_speed bounds it) and the tool's angular velocity."""
        J = arm.jacobian_base(q)
        R = arm.fk(q)[:3, :3]
        tool_jac = J[:3] - frames.skew(R @ np.asarray(tool_point, dtype=float)) @ J[3:]
        target_jac = J[:3] - frames.skew(R @ self.T_tool_target[:3, 3]) @ J[3:]
        return tool_jac, target_jac, J[3:]

    def pose_errors(self, estimator: PoseErrorEstimator) -> "ToolPoseErrors":
        return ToolPoseErrors(estimator, self.T_tool_target)


def _pose7(values_in: Iterable[float], name: str) -> np.ndarray:
    values = [float(v) for v in values_in]
    if len(values) != 7:
        raise ValueError(f"{name}: {len(values)} numbers; expected 7 [x, y, z, qx, qy, qz, qw]")
    try:
        return frames.transform_from_xyz_quat(values[:3], values[3:])
    except ValueError as exc:
        raise ValueError(f"{name}: {exc}") from None


def mount_from_params(values: Mapping[str, Any], arm: ArmModel | None = None
                      ) -> FixedCamera | None:
    """The mounting of validated parameter values: None for ``robot.camera_mount`` wrist, a
    :class:`FixedCamera` for fixed (its pose from ``robot.fixed_camera_pose`` or, when that is
    empty, from the URDF frame ``robot.fixed_camera_frame`` of ``arm``, which must not move with
    the servo chain). ValueError saying what is missing or wrong."""
    if values.get("robot.camera_mount", "wrist") != "fixed":
        return None
    target = values.get("robot.target_on_tool") or []
    if len(target) != 7:
        raise ValueError("robot.camera_mount fixed needs robot.target_on_tool: the target's pose "
                         "in the tool frame [x, y, z, qx, qy, qz, qw]")
    pose = values.get("robot.fixed_camera_pose") or []
    if pose:
        return FixedCamera.from_poses(pose, target)
    frame = values.get("robot.fixed_camera_frame", "")
    if not frame:
        raise ValueError("robot.camera_mount fixed needs the camera's pose: "
                         "robot.fixed_camera_pose [x, y, z, qx, qy, qz, qw] in the base frame, "
                         "or robot.fixed_camera_frame (a frame of the URDF)")
    if arm is None:
        raise ValueError("robot.fixed_camera_frame needs the robot model")
    return FixedCamera(fixed_frame_pose(arm, frame), _pose7(target, "robot.target_on_tool"))


def fixed_frame_pose(arm: ArmModel, frame: str) -> np.ndarray:
    """``T_base_frame`` of a URDF frame that the servo chain does not move (a camera on a
    stand); ValueError if it moves with any joint of the chain."""
    q = np.clip(np.zeros(arm.n), arm.lower, arm.upper)
    J = arm.frame_jacobian_base(q, frame)
    if np.abs(J).max() > 1e-9:
        raise ValueError(f"robot.fixed_camera_frame '{frame}' moves with the servo chain's "
                         "joints; a fixed camera's frame must be rigid to the base")
    return arm.fk(q, frame)


class ToolPoseErrors:
    """Pose-error estimates of the tool for a fixed camera, from a
    ``control.pose_error.PoseErrorEstimator`` of the taught view (same interface:
    ``method``, ``estimate``, ``first_order``).

    The estimator gives ``D = T_taught_current``: the camera's displacement as if the target
    stood still. With the camera still, the target moved instead by ``M = inv(D)`` (camera
    frame, about the camera origin): ``T_camera_target_now = inv(D) T_camera_target_taught``.
    Returned: ``[R_M | M p - p]``, the motion of a frame at the point p with camera axes, so
    its translation is how far p moved and its rotation angle is the tool's. ``p`` is the tool
    origin at the taught pose (from the target's taught pose, PnP of the model, and
    ``T_tool_target``) when the estimator has the target model; else the centroid of the taught
    points (homography estimate: no tool pose is known), and ``point`` says which."""

    def __init__(self, estimator: PoseErrorEstimator, T_tool_target: ArrayLike) -> None:
        self.estimator = estimator
        self.method = estimator.method
        if estimator.T_taught_target is not None:
            T_camera_tool = estimator.T_taught_target @ frames.invert(T_tool_target)
            self.p = T_camera_tool[:3, 3].copy()
            self.point = "tool"
        else:
            xy, Z = estimator.xy_taught, estimator.taught_depths
            assert Z is not None   # an estimator without the target model has taught depths
            self.p = np.mean(np.column_stack([xy * Z[:, None], Z]), axis=0)
            self.point = "target_centroid"

    def _converted(self, est: PoseEstimate) -> PoseEstimate:
        if not est.valid:
            return est
        assert est.T_taught_current is not None   # a valid estimate has its displacement
        M = frames.invert(est.T_taught_current)
        T = np.eye(4)
        T[:3, :3] = M[:3, :3]
        T[:3, 3] = M[:3, :3] @ self.p + M[:3, 3] - self.p
        if not np.isfinite(T).all():
            return PoseEstimate(est.method, False, reason="non-finite tool displacement")
        info = dict(est.info, point=self.point)
        return PoseEstimate(est.method, True, T, est.residual, est.reason, info)

    def estimate(self, xy_now: ArrayLike, index: ArrayLike | None = None) -> PoseEstimate:
        return self._converted(self.estimator.estimate(xy_now, index))

    def first_order(self, xy_now: ArrayLike, index: ArrayLike | None = None) -> PoseEstimate:
        return self._converted(self.estimator.first_order(xy_now, index))


def tool_pose_error(T_base_tool_taught: ArrayLike, T_base_tool_now: ArrayLike
                    ) -> tuple[float, float]:
    """(mm, deg): the true pose error of the tool (distance of the origins, relative rotation
    angle), what :class:`ToolPoseErrors` estimates with the target model."""
    moved, turned = frames.pose_error(T_base_tool_taught, T_base_tool_now)
    return 1e3 * moved, math.degrees(turned)
