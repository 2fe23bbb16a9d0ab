"""Decoupled control for large rotations: straight camera path, target kept in view.

Why a second scheme
-------------------
Point IBVS fails by nature for large rotations about the optical axis: at 180 deg the image
error of every point lies along the optical-axis *translation* column of the current
interaction matrix, so the law retreats along the axis to infinity without turning at all
(Chaumette 1998, "Potential problems of stability and convergence in image-based and
position-based visual servoing", LNCIS 237; the closed form is checked in
tests/control/test_decoupled.py), and the blended estimate loses its turning column there (its
w_z column vanishes). Well before 180 deg the same coupling moves the camera along its axis.

The scheme: straight translation, rotation that keeps the target in view
-----------------------------------------------------------------------
With the relative pose of the current camera to the taught one (below), six features::

    e = [c*t_c,  x_r - x_r*,  y_r - y_r*,  (theta u)_z]

``c*t_c`` (m): the current camera origin in the taught camera frame; ``(x_r, y_r)``: the
normalized image position of a reference point of the target (the centroid of its points),
starred as taught; ``(theta u)_z``: the optical-axis component of the rotation ``c*R_c`` as
angle times axis. Their rates per camera twist ``[v; w]`` (current optical frame)::

    d/dt c*t_c      = c*R_c v                                  (PBVS; Chaumette & Hutchinson
                                                                 2006, Part I, sec. PBVS)
    d/dt (x_r, y_r) = rows of the point interaction matrix     (ibid., eq. 11)
    d/dt theta u    = L_w w, L_w = I + theta/2 [u]x + (1 - sinc theta / sinc^2(theta/2)) [u]x^2
                      (Malis, Chaumette & Boudet 1999; sign: :func:`rotation_interaction`)

and ``v_c = -lambda L^-1 e``. The first block depends on ``v`` alone, so ``c*t_c`` decays
along a straight line: the camera moves on the straight segment to the taught pose whatever
the rotation does (and the limiter's scaling keeps the direction). The rotation then solves for
the reference point moving on a straight image segment from where it is seen to where it was
taught (so the target's centre stays in view) and for an exponential turn about the optical
axis. This is the position-based "shortest-path" idea of Kyrki, Kragic & Christensen 2004 ("New
shortest-path approaches to visual servoing", IEEE/RSJ IROS; features recalled from memory, the
properties are checked here by simulation). At the goal all six features vanish only at the
taught pose: position fixed, the reference ray fixed, and the remaining turn about that ray
fixed by ``(theta u)_z`` (the ray is in front of the camera, so it is not orthogonal to z).

Why this one (the choice)
-------------------------
The goals are: any turn about the optical axis up to 180 deg; the camera near the straight
path (within 20 mm at 125 deg); the target kept in view. Measured on a free-flying camera with
the tray board 0.30 m away (``python tests/control/test_decoupled.py`` prints the table;
``test_alternatives_considered`` checks the claims), largest distance of the camera from the
straight segment / largest |y| of a point (a 480 px high image at 615 px holds |y| <= 0.39):

    start                               chosen          2.5D            PBVS
    125 or 180 deg about the axis       0.0 mm          1.5-2.7 mm      0.0 mm
    125 deg + 0.1 m offsets + tilts     0.2-0.3 mm      24-41 mm        0.2-0.3 mm
    180 deg, board taught off-centre    0.0 mm, 0.31    97 mm, 0.31     0.0 mm, 0.50

- *2.5D visual servoing* (Malis, Chaumette & Boudet 1999, IEEE T-RA 15(2)): translation on
  ``(x_r, y_r, log Z_r/Z_r*)`` and the whole ``theta u`` geodesic. The camera path is straight
  only while the reference point lies on the optical axis.
- *PBVS* on ``(c*t_c, theta u)``: the straight path, but nothing in the image is controlled; a
  board taught off-centre swings around the image centre under a half turn and leaves a 4:3
  image.
- *Partitioned control* (Corke & Hutchinson 2001, IEEE T-RA 17(4)): only the optical-axis
  turn and depth are decoupled; the other four degrees of freedom keep point-IBVS coupling
  (no straight path), and visibility needs an added repulsive potential.
- *Image moments* (Tahri & Chaumette 2005, IEEE T-RO 21(6)): second-order moments give the
  orientation modulo 180 deg, so a half turn is invisible to them, and for our boards (a square
  of four dots plus one) they are nearly isotropic, so the orientation is ill-conditioned
  anyway. We have matched points with identities; a pose uses them all.

Where the pose comes from
-------------------------
The taught view with its per-point depths *is* a 3-D model of the target in the taught camera
frame (``P*_i = Z*_i [x*_i, y*_i, 1]``; the depths come from PnP at teach time). PnP of that
model against the current normalized points (OpenCV ``solvePnP``: IPPE for a planar model,
Collins & Bartoli 2014, with SQPnP as fallback; Levenberg-Marquardt refinement) gives the pose
of the taught camera frame in the current one. At the goal the two views coincide and the
estimate is the identity whatever the intrinsics or depth-scale errors, so the equilibrium is
the taught image; a wrong depth scale only scales the translation rate. This PnP is private
here for now; when ``control/pose_error.py`` (pose error between taught and current views)
lands, the two should share one implementation (TODO de-duplicate).

No hand-over to point IBVS near the goal: there the two laws command the same camera twist to
first order (each inverts a full-rank linearization of the same pose error; checked in
tests/control/test_decoupled.py: 0.4 % apart at 0.3 mm / 0.06 deg, ten times less at a tenth of
that), and both stop on the same image error; a hand-over would only add a switch.

Conventions: twists ``[v; w]`` in the camera optical frame (DEVELOPERS.md); normalized image
coordinates; metres; radians. No rclpy and no state: the caller keeps the previous ``theta u``
(see :func:`theta_u`).
"""
from __future__ import annotations

import math
from dataclasses import dataclass
from typing import Any

import cv2
import numpy as np
from numpy.typing import ArrayLike
from scipy.spatial.transform import Rotation

from vservo_node.control.frames import invert, skew
from vservo_node.control.interaction import point_interaction_matrix

#: The servo's control schemes (parameter control.scheme): point IBVS, or this module's.
SCHEMES = ("point", "decoupled")
#: A model counts as planar when its smallest principal spread is below this fraction of its
#: largest (common practice, no source; taught depths from PnP of a board are planar to the
#: noise of the taught pixels, far below this).
PLANAR_RATIO = 0.01
#: Continuity of theta u near a half turn: the representation ``-(2 pi - theta) u`` is kept
#: when it is closer to the previous value and its angle is at most this (rad). Beyond pi the
#: law turns the long way round, which only happens when noise straddles 180 deg; the bound
#: keeps L_w far from its singularity at 2 pi (our design, no source).
MAX_ANGLE = math.radians(200.0)
#: IPPE (Collins & Bartoli 2014) is tried first on planar models; when its refined residual
#: exceeds this (normalized units, ~1 px at a 600 px focal length) SQPnP (Terzakis & Lourakis
#: 2020) is tried too and the smaller residual wins. Measured: OpenCV 4.13's IPPE returns the
#: identity for an exact half turn about the optical axis of a fronto-parallel board
#: (tests/control/test_decoupled.py), which the fallback catches.
RETRY_RESIDUAL = 1.5e-3


@dataclass(frozen=True)
class RelativePose:
    """Pose of the taught camera frame in the current one, ``T_now_taught`` (4x4, m), and the
    RMS reprojection residual of the model in the current view (normalized units)."""

    T_now_taught: np.ndarray
    residual: float
    method: str


@dataclass(frozen=True)
class Task:
    """One evaluation of the decoupled task.

    ``error`` (6,): ``[c*t_c (m); x_r - x_r*; y_r - y_r*; (theta u)_z (rad)]`` and ``L``
    (6, 6) with ``e_dot = L v_c`` for the camera twist ``v_c = [v; w]`` in the current camera
    optical frame (module docstring). ``theta_u`` (3,) rad: the whole rotation ``c*R_c``;
    ``reference_now`` / ``reference_taught`` (3,) m: the reference point in the current / the
    taught camera frame; ``pose``: the relative pose it was computed from.
    """

    error: np.ndarray
    L: np.ndarray
    theta_u: np.ndarray
    reference_now: np.ndarray
    reference_taught: np.ndarray
    pose: RelativePose


def taught_model(xy_taught: ArrayLike, z_taught: ArrayLike) -> np.ndarray:
    """The taught points in the taught camera frame, (N, 3) m: ``Z* [x*, y*, 1]``."""
    xy = np.asarray(xy_taught, dtype=float)
    z = np.broadcast_to(np.asarray(z_taught, dtype=float), (len(xy),))
    if xy.ndim != 2 or xy.shape[1] != 2:
        raise ValueError(f"taught points have shape {xy.shape}; expected (N, 2)")
    if not np.all(np.isfinite(z) & (z > 0)) or not np.all(np.isfinite(xy)):
        raise ValueError(f"taught depths must be finite and > 0 m, got {z.tolist()}")
    return np.column_stack([xy * z[:, None], z])


def _is_planar(model: np.ndarray) -> bool:
    spread = np.linalg.svd(model - model.mean(axis=0), compute_uv=False)
    return bool(spread[0] > 0 and spread[2] <= PLANAR_RATIO * spread[0])


def relative_pose(xy_now: ArrayLike, model: ArrayLike) -> RelativePose:
    """PnP of ``model`` (N, 3, taught camera frame) against ``xy_now`` (N, 2, normalized).

    ValueError (with what was wrong) for fewer than 4 points, a degenerate model, no solution,
    or a solution that puts a point behind the camera.
    """
    xy = np.ascontiguousarray(xy_now, dtype=float).reshape(-1, 2)
    obj = np.ascontiguousarray(model, dtype=float).reshape(-1, 3)
    if len(xy) != len(obj) or len(xy) < 4:
        raise ValueError(f"the relative pose needs >= 4 points with taught depths, got "
                         f"{len(xy)} current and {len(obj)} taught points")
    if not (np.all(np.isfinite(xy)) and np.all(np.isfinite(obj))):
        raise ValueError("non-finite points reached the relative pose; expected finite values")
    spread = np.linalg.svd(obj - obj.mean(axis=0), compute_uv=False)
    if spread[1] <= 1e-6 * max(spread[0], 1e-12):
        raise ValueError("the taught points are (nearly) collinear; expected a spread-out target")
    candidates = [_solve(obj, xy, "ippe")] if _is_planar(obj) else []
    if not candidates or not candidates[0][0] <= RETRY_RESIDUAL:
        candidates.append(_solve(obj, xy, "sqpnp"))
    residual, method, R, t = min(candidates, key=lambda c: c[0])
    if not math.isfinite(residual):
        raise ValueError(f"solvePnP found no pose of the taught points in the current view "
                         f"({method})")
    cam = obj @ R.T + t
    if np.any(cam[:, 2] <= 0):
        raise ValueError("the relative pose puts taught points behind the camera; expected all "
                         "in front (mismatched features?)")
    T = np.eye(4)
    T[:3, :3], T[:3, 3] = R, t
    return RelativePose(T, residual, method)


def _solve(obj: np.ndarray, xy: np.ndarray, method: str) -> tuple[float, str, Any, Any]:
    """(residual, method, R, t) of one PnP solver with Levenberg-Marquardt refinement;
    residual inf when the solver failed."""
    eye = np.eye(3)
    flag = cv2.SOLVEPNP_IPPE if method == "ippe" else cv2.SOLVEPNP_SQPNP
    try:
        ok, rvec, tvec = cv2.solvePnP(obj, xy, eye, None, flags=flag)
        if ok:
            rvec, tvec = cv2.solvePnPRefineLM(obj, xy, eye, None, rvec, tvec)
    except cv2.error:
        ok = False
    if not ok or not (np.all(np.isfinite(rvec)) and np.all(np.isfinite(tvec))):
        return math.inf, method, None, None
    R, t = cv2.Rodrigues(rvec)[0], tvec.ravel()
    cam = obj @ R.T + t
    with np.errstate(divide="ignore", invalid="ignore"):
        residual = float(np.sqrt(np.mean(np.sum((cam[:, :2] / cam[:, 2:] - xy) ** 2, axis=1))))
    return (residual if math.isfinite(residual) else math.inf), method, R, t

def theta_u(R_taught_now: ArrayLike, previous: ArrayLike | None = None) -> np.ndarray:
    """Angle times axis (rad) of ``c*R_c`` = ``R_taught_now`` (rotation of the current camera
    frame in the taught one). Near a half turn the axis is ill-defined (``theta u`` and
    ``-(2 pi - theta) u`` are the same rotation): given ``previous`` (the last value), the one
    closer to it is returned, up to :data:`MAX_ANGLE`, so noise cannot flip the turning
    direction from one image to the next."""
    rotvec: np.ndarray = Rotation.from_matrix(np.asarray(R_taught_now, dtype=float)).as_rotvec()
    angle = float(np.linalg.norm(rotvec))
    if previous is None or angle < 1e-9:
        return rotvec
    alternative = rotvec * (1.0 - 2.0 * math.pi / angle)
    last = np.asarray(previous, dtype=float)
    if (2.0 * math.pi - angle <= MAX_ANGLE and
            np.linalg.norm(alternative - last) < np.linalg.norm(rotvec - last)):
        return alternative
    return rotvec


def rotation_interaction(tu: ArrayLike) -> np.ndarray:
    """``L_w`` (3x3) with ``d(theta u)/dt = L_w w`` for ``theta u`` of ``c*R_c`` and ``w`` the
    angular velocity in the *current* camera frame:
    ``I + theta/2 [u]x + (1 - sinc(theta) / sinc^2(theta/2)) [u]x^2``, sinc(x) = sin(x)/x.
    Malis, Chaumette & Boudet 1999 and Chaumette & Hutchinson 2006 (Part I, sec. PBVS) write
    the skew term with -theta/2: the sign flips with the direction the rotation is taken in
    (their form is ours for the inverse rotation); the tests check this one against a numerical
    derivative. ``L_w theta u = theta u`` either way."""
    v = np.asarray(tu, dtype=float)
    theta = float(np.linalg.norm(v))
    if theta < 1e-12:
        return np.eye(3)
    u = skew(v / theta)

    def sinc(a: float) -> float:
        return math.sin(a) / a

    return np.eye(3) + 0.5 * theta * u + (1.0 - sinc(theta) / sinc(0.5 * theta) ** 2) * (u @ u)


def task(xy_now: ArrayLike, xy_taught: ArrayLike, z_taught: ArrayLike,
         previous_theta_u: ArrayLike | None = None) -> Task:
    """The decoupled error and interaction matrix from the current normalized points ``xy_now``
    (N, 2), the taught ones ``xy_taught`` (N, 2) and their taught depths ``z_taught`` (N,) m
    (or one value: a fronto-parallel model), in matching order. ``previous_theta_u``: the last
    ``Task.theta_u`` of this run (see :func:`theta_u`). ValueError as :func:`relative_pose`."""
    model = taught_model(xy_taught, z_taught)
    return task_at(relative_pose(xy_now, model), model.mean(axis=0), previous_theta_u)


def task_at(pose: RelativePose, reference_taught: ArrayLike,
            previous_theta_u: ArrayLike | None = None) -> Task:
    """The task at a given relative pose, for the reference point ``reference_taught`` (3,)
    (taught camera frame, m)."""
    T_now_taught = pose.T_now_taught
    T_taught_now = invert(T_now_taught)
    R = T_taught_now[:3, :3]
    tu = theta_u(R, previous_theta_u)
    reference = np.asarray(reference_taught, dtype=float)
    now = T_now_taught[:3, :3] @ reference + T_now_taught[:3, 3]
    if not now[2] > 0:
        raise ValueError(f"the reference point is behind the camera (depth {now[2]:.3f} m)")
    x, y, Z = now[0] / now[2], now[1] / now[2], now[2]
    error = np.concatenate([T_taught_now[:3, 3],
                            [x - reference[0] / reference[2], y - reference[1] / reference[2],
                             tu[2]]])
    L = np.zeros((6, 6))
    L[:3, :3] = R
    L[3:5] = point_interaction_matrix([[x, y]], Z)
    L[5, 3:] = rotation_interaction(tu)[2]
    return Task(error, L, tu, now, reference, pose)


def predicted(t: Task, displacement: ArrayLike) -> Task:
    """The task after the camera moved by ``displacement`` ``[v; w] dt`` (m, rad; current
    camera frame) from where ``t`` was computed: the relative pose moved to first order,
    ``T_now'_taught = [R(w dt) | v dt]^-1 T_now_taught``, and the task rebuilt there (for
    the servo's features predicted between frames). ValueError as :func:`task_at`."""
    d = np.asarray(displacement, dtype=float)
    step = np.eye(4)
    step[:3, :3] = Rotation.from_rotvec(d[3:]).as_matrix()
    step[:3, 3] = d[:3]
    moved = RelativePose(invert(step) @ t.pose.T_now_taught, math.nan, "predicted")
    return task_at(moved, t.reference_taught, t.theta_u)


def camera_twist(t: Task, gain: float) -> np.ndarray:
    """The plain law ``v_c = -gain L^-1 e`` (6,), ``[v; w]`` in the camera optical frame;
    its linear part is ``-gain c*R_c^T c*t_c``. The servo instead hands ``(L @ J_camera, e)``
    to its control law (the same solution for a square, invertible arm Jacobian, plus damping,
    gain schedule and soft start)."""
    return -float(gain) * np.linalg.solve(t.L, t.error)
