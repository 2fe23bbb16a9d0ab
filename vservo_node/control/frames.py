"""Rotations, quaternions, homogeneous transforms and twist transforms.

Conventions (DEVELOPERS.md):
- ``T_a_b`` is the pose of frame b expressed in frame a (4x4 homogeneous, metres), so
  ``p_a = T_a_b @ [p_b; 1]`` and ``T_a_c = T_a_b @ T_b_c``.
- Quaternions are ``(x, y, z, w)`` (geometry_msgs/Quaternion, SciPy ``Rotation.as_quat``).
- Twists are ``[v; w]``: linear velocity (m/s) first, then angular velocity (rad/s).
"""

import math

import numpy as np
from numpy.typing import ArrayLike, NDArray
from scipy.spatial.transform import Rotation


def _vector3(v: ArrayLike, name: str) -> NDArray[np.float64]:
    out = np.asarray(v, dtype=float)
    if out.shape != (3,):
        raise ValueError(f"{name} must have shape (3,), got {out.shape}")
    return out


def _rotation(R: ArrayLike, name: str = "R") -> NDArray[np.float64]:
    out = np.asarray(R, dtype=float)
    if out.shape != (3, 3):
        raise ValueError(f"{name} must be a 3x3 rotation matrix, got shape {out.shape}")
    return out


def _homogeneous(T: ArrayLike, name: str = "T") -> NDArray[np.float64]:
    out = np.asarray(T, dtype=float)
    if out.shape != (4, 4):
        raise ValueError(f"{name} must be a 4x4 homogeneous transform, got shape {out.shape}")
    return out


def skew(v: ArrayLike) -> NDArray[np.float64]:
    """Return the 3x3 skew-symmetric matrix ``[v]x`` such that ``skew(v) @ u == cross(v, u)``."""
    x, y, z = _vector3(v, "v")
    return np.array([[0.0, -z, y], [z, 0.0, -x], [-y, x, 0.0]])


def transform(R: ArrayLike, t: ArrayLike) -> NDArray[np.float64]:
    """Return the 4x4 transform with rotation ``R`` (3x3) and translation ``t`` (3,) in metres."""
    T = np.eye(4)
    T[:3, :3] = _rotation(R)
    T[:3, 3] = _vector3(t, "t")
    return T


def invert(T: ArrayLike) -> NDArray[np.float64]:
    """Return the inverse of a rigid transform: ``invert(T_a_b) == T_b_a``."""
    H = _homogeneous(T)
    R, t = H[:3, :3], H[:3, 3]
    return transform(R.T, -R.T @ t)


def quat_to_matrix(q_xyzw: ArrayLike) -> NDArray[np.float64]:
    """Return the 3x3 rotation of a quaternion ``(x, y, z, w)``; it is normalised first.

    Raises ValueError for a quaternion of (near) zero norm.
    """
    q = np.asarray(q_xyzw, dtype=float)
    if q.shape != (4,):
        raise ValueError(f"quaternion must have 4 components (x, y, z, w), got shape {q.shape}")
    if not np.isfinite(q).all() or np.linalg.norm(q) < 1e-12:
        raise ValueError(f"quaternion must be finite and non-zero, got {q.tolist()}")
    return np.asarray(Rotation.from_quat(q).as_matrix(), dtype=float)


def matrix_to_quat(R: ArrayLike) -> NDArray[np.float64]:
    """Return the unit quaternion ``(x, y, z, w)`` of a 3x3 rotation, with ``w >= 0``."""
    q = np.asarray(Rotation.from_matrix(_rotation(R)).as_quat(), dtype=float)
    return -q if q[3] < 0 else q


def transform_from_xyz_quat(xyz: ArrayLike, q_xyzw: ArrayLike) -> NDArray[np.float64]:
    """Return the 4x4 transform of a position (m) and a quaternion ``(x, y, z, w)``."""
    return transform(quat_to_matrix(q_xyzw), xyz)


def rpy_to_matrix(rpy: ArrayLike) -> NDArray[np.float64]:
    """Return the rotation of URDF roll-pitch-yaw angles (rad): ``Rz(yaw) @ Ry(pitch) @ Rx(roll)``.

    That is a rotation about fixed x by roll, then fixed y by pitch, then fixed z by yaw
    (URDF specification, <origin rpy>), SciPy's extrinsic ``"xyz"`` sequence.
    """
    return np.asarray(Rotation.from_euler("xyz", _vector3(rpy, "rpy")).as_matrix(), dtype=float)


def transform_from_xyz_rpy(xyz: ArrayLike, rpy: ArrayLike) -> NDArray[np.float64]:
    """Return the 4x4 transform of a URDF ``<origin xyz rpy>`` (metres, radians)."""
    return transform(rpy_to_matrix(rpy), xyz)


def rotation_block(R: ArrayLike) -> NDArray[np.float64]:
    """Return the 6x6 block-diagonal ``diag(R, R)``: re-expresses a ``[v; w]`` twist in new axes
    without moving its reference point."""
    M = _rotation(R)
    B = np.zeros((6, 6))
    B[:3, :3] = M
    B[3:, 3:] = M
    return B


def twist_transform(T_a_b: ArrayLike) -> NDArray[np.float64]:
    """Return the 6x6 matrix mapping a ``[v; w]`` twist expressed in frame b (reference point at
    b's origin) to the same rigid motion expressed in frame a (reference point at a's origin).

    ``V_a = twist_transform(T_a_b) @ V_b`` with ``[[R, skew(p) R], [0, R]]``, where ``R, p`` are
    the rotation and translation of ``T_a_b`` (Lynch & Park 2017, Modern Robotics, sec. 3.3.2,
    adjoint ``[Ad_T]`` re-ordered from ``[w; v]`` to ``[v; w]``).
    """
    T = _homogeneous(T_a_b, "T_a_b")
    R, p = T[:3, :3], T[:3, 3]
    X = rotation_block(R)
    X[:3, 3:] = skew(p) @ R
    return X


def pose_error(T1: ArrayLike, T2: ArrayLike) -> tuple[float, float]:
    """Return ``(translation_m, rotation_rad)`` between two poses given in the same frame:
    the distance between their origins and the angle of the relative rotation ``R1^T R2``."""
    A, B = _homogeneous(T1, "T1"), _homogeneous(T2, "T2")
    d = B[:3, 3] - A[:3, 3]
    translation = math.sqrt(float(d @ d))
    R = A[:3, :3].T @ B[:3, :3]
    # angle = atan2(sin, cos) with 2 sin = |vee(R - R^T)| and 2 cos = trace - 1 (Rodrigues;
    # Lynch & Park 2017, Modern Robotics, sec. 3.2.3.3): accurate near 0 and near pi alike
    s = math.hypot(R[2, 1] - R[1, 2], R[0, 2] - R[2, 0], R[1, 0] - R[0, 1])
    rotation = math.atan2(0.5 * s, 0.5 * (R[0, 0] + R[1, 1] + R[2, 2] - 1.0))
    return translation, rotation
