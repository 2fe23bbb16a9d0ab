"""A pose-error estimate (``PoseEstimate``) and the checks of its inputs: point counts,
collinear and planar points, the taught plane (vservo_node.control.pose_error)."""
from __future__ import annotations

import math
from dataclasses import dataclass, field
from typing import Any, Sized

import numpy as np
from numpy.typing import ArrayLike
from scipy.spatial.transform import Rotation

from vservo_node.control import frames


MIN_POINTS = 4


# Points whose spread across their best-fit line is below this fraction of their spread along
# it count as collinear; model points this far off their best-fit plane count as non-planar
# (relative to their extent). Common practice, no source.
COLLINEAR_RATIO = 1e-3


PLANAR_RATIO = 1e-6


# Taught 3-D points further than this fraction of their extent (RMS) from one plane do not
# define the plane the homography needs. Common practice, no source.
OFF_PLANE_RATIO = 0.02


# PnP: a refined IPPE pose whose RMS residual exceeds RETRY_RESIDUAL (normalized units, ~1 px
# at a 600 px focal length) is compared with SQPnP's (measured: OpenCV 4.13's IPPE returns the
# identity for an exact half turn about the optical axis of a board facing the camera, the same
# finding as control/decoupled.py). A fit whose residual still exceeds MAX_RESIDUAL (~6 px at
# 600 px) is no pose of these points: a mismatched feature or a wrong model. Common practice,
# no source.
RETRY_RESIDUAL = 1.5e-3


MAX_RESIDUAL = 1e-2


METHODS = ("pnp", "homography", "first_order")


@dataclass(frozen=True)
class PoseEstimate:
    """One estimate of the camera's displacement from the taught view.

    Attributes:
        method: one of ``METHODS``.
        valid: False when no estimate could be made (``reason`` says why); then
            ``T_taught_current`` is None and the figures are NaN.
        T_taught_current: 4x4 pose of the current camera frame in the taught camera frame.
        residual: RMS reprojection residual of the fit, normalized units (NaN for first_order).
        reason: '' or why the estimate is invalid.
        info: method-specific figures (e.g. 'normal_error_deg', 'solutions').
    """
    method: str
    valid: bool
    T_taught_current: np.ndarray | None = None
    residual: float = math.nan
    reason: str = ""
    info: dict[str, Any] = field(default_factory=dict)

    @property
    def translation_mm(self) -> float:
        """Distance between the current and the taught camera origins, mm (NaN if invalid)."""
        if not self.valid:
            return math.nan
        assert self.T_taught_current is not None   # valid: it has one
        return 1e3 * float(np.linalg.norm(self.T_taught_current[:3, 3]))

    @property
    def rotation_deg(self) -> float:
        """Angle of the rotation between the current and the taught camera frames, degrees."""
        if not self.valid:
            return math.nan
        assert self.T_taught_current is not None
        return math.degrees(frames.pose_error(np.eye(4), self.T_taught_current)[1])

    @property
    def translation_m(self) -> np.ndarray:
        """(3,) translation of ``T_taught_current``, metres (NaN if invalid)."""
        if not self.valid:
            return np.full(3, math.nan)
        assert self.T_taught_current is not None
        return self.T_taught_current[:3, 3].copy()

    @property
    def rotation_vector(self) -> np.ndarray:
        """(3,) rotation vector (axis * angle, rad) of ``T_taught_current`` (NaN if invalid)."""
        if not self.valid:
            return np.full(3, math.nan)
        assert self.T_taught_current is not None
        rotvec: np.ndarray = Rotation.from_matrix(self.T_taught_current[:3, :3]).as_rotvec()
        return rotvec


def invalid(method: str, reason: str) -> PoseEstimate:
    """An invalid estimate of ``method`` that says why."""
    return PoseEstimate(method, False, reason=reason)


# ----------------------------------------------------------------------------- checks
def check_points(xy_in: ArrayLike, name: str = "xy", min_points: int = MIN_POINTS) -> np.ndarray:
    """``xy`` as an (N, 2) float array of finite, non-collinear normalized points, N >=
    ``min_points``; ValueError otherwise."""
    xy = np.asarray(xy_in, dtype=float)
    if xy.ndim != 2 or xy.shape[1] != 2:
        raise ValueError(f"{name} must have shape (N, 2), got {xy.shape}")
    if len(xy) < min_points:
        raise ValueError(f"{name}: {len(xy)} points, need at least {min_points} to fix a pose")
    bad = np.flatnonzero(~np.isfinite(xy).all(axis=1))
    if bad.size:
        raise ValueError(f"{name}: non-finite coordinates at points {bad.tolist()}; expected "
                         "finite normalized coordinates")
    s = np.linalg.svd(xy - xy.mean(axis=0), compute_uv=False)
    if not s[0] > 0 or s[1] < COLLINEAR_RATIO * s[0]:
        raise ValueError(f"{name}: the {len(xy)} points are (nearly) collinear; a pose needs "
                         "points spread over an area of the image")
    return xy


def _check_same_length(a: Sized, b: Sized, name_a: str, name_b: str) -> None:
    if len(a) != len(b):
        raise ValueError(f"{name_a} has {len(a)} points but {name_b} has {len(b)}; expected the "
                         "same features in the same order")


def _model(points: ArrayLike) -> tuple[np.ndarray, bool]:
    """(N, 3) finite model points and whether they are planar; ValueError otherwise."""
    P = np.asarray(points, dtype=float)
    if P.ndim != 2 or P.shape[1] != 3:
        raise ValueError(f"model points must have shape (N, 3), got {P.shape}")
    if not np.isfinite(P).all():
        raise ValueError("model points must be finite (metres in the target frame)")
    s = np.linalg.svd(P - P.mean(axis=0), compute_uv=False)
    if not s[0] > 0 or s[1] < COLLINEAR_RATIO * s[0]:
        raise ValueError("model points are (nearly) collinear; a pose needs points spread "
                         "over an area")
    return P, bool(s[2] <= PLANAR_RATIO * s[0])


def plane_of(points_cam: ArrayLike) -> tuple[np.ndarray, float, float]:
    """Best-fit plane ``n^T X = d`` of 3-D points (N, 3) in a camera frame: ``(n, d, rms)``
    with ``n`` a unit normal pointing away from the camera (``d > 0``) and ``rms`` the points'
    RMS distance to the plane, metres. ValueError for fewer than 3 or collinear points, or a
    plane through the camera centre."""
    X = np.asarray(points_cam, dtype=float)
    if X.ndim != 2 or X.shape[1] != 3 or len(X) < 3:
        raise ValueError(f"a plane needs (N >= 3, 3) points, got {X.shape}")
    if not np.isfinite(X).all():
        raise ValueError("plane points must be finite")
    c = X.mean(axis=0)
    _, s, Vt = np.linalg.svd(X - c)
    if not s[0] > 0 or s[1] < COLLINEAR_RATIO * s[0]:
        raise ValueError("the points are (nearly) collinear and fix no plane")
    n = Vt[2]
    d = float(n @ c)
    if d < 0:
        n, d = -n, -d
    if not d > 1e-9:
        raise ValueError("the points' plane passes through the camera centre")
    return n, d, float(s[2] / math.sqrt(len(X)))
