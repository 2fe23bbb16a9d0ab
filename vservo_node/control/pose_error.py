"""The camera's displacement from the taught view, estimated from image points.

Input: the same features seen now and when the pose was taught, as undistorted normalized
coordinates ``(x, y) = (X/Z, Y/Z)`` in the camera optical frame (DEVELOPERS.md). Output:
``T_taught_current``, the pose of the current camera frame in the taught camera frame (so its
translation is where the camera is now, seen from where it was taught), with the translation's
length in millimetres and the rotation's angle in degrees.

Three estimates:

- ``from_model``: with the target's 3-D model (target frame), the target's pose in each view by
  PnP on normalized points (identity intrinsics): ``cv2.solvePnPGeneric`` with SOLVEPNP_IPPE for
  a planar model (Collins & Bartoli, "Infinitesimal plane-based pose estimation", IJCV 109(3),
  2014; of its two solutions the one with the smaller residual is refined by
  Levenberg-Marquardt, ``cv2.solvePnPRefineLM``), SOLVEPNP_SQPNP for a non-planar one; then
  ``T_taught_current = T_taught_target @ inv(T_current_target)``.
- ``from_homography``: without a model. The taught points' 3-D positions in the taught camera
  frame (``Z * [x, y, 1]`` with the taught depths) give the plane ``n^T X = d``. Points of that
  plane map between the views by ``x_current ~ H x_taught`` with ``H = R + t n^T / d``, where
  ``(R, t)`` is ``T_current_taught`` (Faugeras & Lustman, "Motion and structure from motion in a
  piecewise planar environment", IJPRAI 2(3), 1988). ``H`` is fitted to all points by least
  squares (``cv2.findHomography`` method 0: DLT, then Levenberg-Marquardt on the transfer
  error) and decomposed (``cv2.decomposeHomographyMat`` with ``K = I``: up to four solutions,
  Malis & Vargas, "Deeper understanding of the homography decomposition for vision-based
  control", INRIA RR-6303, 2007); the physically valid one is the one whose plane normal is
  nearest the taught plane's, and its ``t / d`` is scaled by the taught plane distance ``d``.
  Near the goal OpenCV's decomposition gives up on the translation: below ``|t| / d`` of about
  1e-3 (0.3 mm at 0.3 m; measured, tests/control/test_pose_error.py) it returns one pure
  rotation with ``t = 0``, and there the plane normal cannot be recovered from the image at
  all. With the taught plane known, ``H = lambda (R + t n^T / d)`` is solved for ``R`` and ``t``
  directly instead: for ``u`` orthogonal to ``n``, ``H u = lambda R u``, so ``R`` is the
  rotation nearest ``H [u1 u2]`` (orthogonal Procrustes: Schoenemann, "A generalized solution
  of the orthogonal Procrustes problem", Psychometrika 31, 1966) and ``t = d (H n / lambda -
  R n)``. The estimate uses that solve whenever OpenCV returns no solution with a translation.
- ``first_order``: the camera twist that would null the feature error to first order,
  ``v = -L^+ e`` with ``e = s - s*`` and ``L`` the interaction matrix (Chaumette & Hutchinson,
  "Visual servo control, Part I: Basic approaches", IEEE RAM 13(4), 2006, eq. 11), applied for
  unit time: ``T_current_taught ~ (exp(w), v)``. Near the goal it agrees with the others to
  second order; ``disagreement`` measures by how much (a cross-check, not an estimate to stop
  on).

Bad input (wrong shapes, non-finite values, fewer than 4 points, collinear points, a model
that does not fit) raises ``ValueError`` saying what was wrong and what was expected;
``PoseErrorEstimator.estimate`` turns any of these into an invalid ``PoseEstimate`` with the
reason, so a servo loop gets a flagged result and never a NaN passed on silently.

Precision is bounded by the image, not by the method: a sideways shift paired with a tilt that
keeps the target centred barely moves the image of a small target, so single-frame estimates
spread most along that combination (tests/control/test_pose_error.py measures it). Average
several frames before judging a tolerance.
"""
from __future__ import annotations

import math
from dataclasses import dataclass, field

import cv2
import numpy as np
from scipy.spatial.transform import Rotation

from vservo_node.control import frames
from vservo_node.control.interaction import interaction_matrix

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
    info: dict = field(default_factory=dict)

    @property
    def translation_mm(self) -> float:
        """Distance between the current and the taught camera origins, mm (NaN if invalid)."""
        if not self.valid:
            return math.nan
        return 1e3 * float(np.linalg.norm(self.T_taught_current[:3, 3]))

    @property
    def rotation_deg(self) -> float:
        """Angle of the rotation between the current and the taught camera frames, degrees."""
        if not self.valid:
            return math.nan
        return math.degrees(frames.pose_error(np.eye(4), self.T_taught_current)[1])

    @property
    def translation_m(self) -> np.ndarray:
        """(3,) translation of ``T_taught_current``, metres (NaN if invalid)."""
        if not self.valid:
            return np.full(3, math.nan)
        return self.T_taught_current[:3, 3].copy()

    @property
    def rotation_vector(self) -> np.ndarray:
        """(3,) rotation vector (axis * angle, rad) of ``T_taught_current`` (NaN if invalid)."""
        if not self.valid:
            return np.full(3, math.nan)
        return Rotation.from_matrix(self.T_taught_current[:3, :3]).as_rotvec()


def invalid(method: str, reason: str) -> PoseEstimate:
    """An invalid estimate of ``method`` that says why."""
    return PoseEstimate(method, False, reason=reason)


# ----------------------------------------------------------------------------- checks
def check_points(xy, name="xy", min_points=MIN_POINTS) -> np.ndarray:
    """``xy`` as an (N, 2) float array of finite, non-collinear normalized points, N >=
    ``min_points``; ValueError otherwise."""
    xy = np.asarray(xy, dtype=float)
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


def _check_same_length(a, b, name_a, name_b):
    if len(a) != len(b):
        raise ValueError(f"{name_a} has {len(a)} points but {name_b} has {len(b)}; expected the "
                         "same features in the same order")


def _model(points) -> tuple[np.ndarray, bool]:
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


def plane_of(points_cam) -> tuple[np.ndarray, float, float]:
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


# ----------------------------------------------------------------------------- PnP
def _rt_to_T(rvec, tvec) -> np.ndarray:
    T = np.eye(4)
    T[:3, :3] = cv2.Rodrigues(np.asarray(rvec, dtype=float).reshape(3, 1))[0]
    T[:3, 3] = np.asarray(tvec, dtype=float).ravel()
    return T


def _residual(T_camera_target, model, xy) -> float:
    """RMS distance (normalized units) between the model's projection and ``xy``; inf if a
    model point falls behind the camera."""
    p = model @ T_camera_target[:3, :3].T + T_camera_target[:3, 3]
    if np.any(p[:, 2] <= 0):
        return math.inf
    return float(np.sqrt(np.mean(np.sum((p[:, :2] / p[:, 2:] - xy) ** 2, axis=1))))


def pose_from_model(xy, model_points, planar: bool | None = None) -> tuple[np.ndarray, float]:
    """``(T_camera_target, rms)``: the target's pose in the camera frame from the normalized
    points ``xy`` (N, 2) of its model points (N, 3), and the RMS residual (normalized units).

    Planar model: SOLVEPNP_IPPE (Collins & Bartoli 2014) gives two candidate poses; the one
    with the smaller residual is refined by Levenberg-Marquardt on the reprojection error; when
    that residual exceeds ``RETRY_RESIDUAL``, SQPnP is tried too and the better fit kept.
    Non-planar: SOLVEPNP_SQPNP (Terzakis & Lourakis, ECCV 2020), then the same refinement. A fit
    worse than ``MAX_RESIDUAL`` is refused. ValueError when the input is degenerate or no pose puts the model in front of
    the camera. ``planar``: whether the model is planar, when the caller knows (else found
    here).
    """
    xy = check_points(xy, "image points")
    if planar is None:
        model, planar = _model(model_points)
    else:
        model = np.asarray(model_points, dtype=float)
    _check_same_length(xy, model, "image points", "model points")
    best, best_rms = _solve_pnp(model, xy, cv2.SOLVEPNP_IPPE if planar else cv2.SOLVEPNP_SQPNP)
    if planar and not best_rms <= RETRY_RESIDUAL:
        other, other_rms = _solve_pnp(model, xy, cv2.SOLVEPNP_SQPNP)
        if other_rms < best_rms:
            best, best_rms = other, other_rms
    if best is None or not (np.isfinite(best).all() and math.isfinite(best_rms)):
        raise ValueError("PnP found no pose that puts the target in front of the camera")
    if best_rms > MAX_RESIDUAL:
        raise ValueError(f"the target model does not fit the points: RMS residual {best_rms:.4f}"
                         f" (normalized) > {MAX_RESIDUAL}; a mismatched feature or another "
                         "target's model")
    return best, best_rms


def _solve_pnp(model, xy, flags):
    """(T_camera_target, rms) of one OpenCV solver, its best candidate refined by
    Levenberg-Marquardt; (None, inf) when it finds none."""
    eye = np.eye(3)
    try:
        n, rvecs, tvecs, _ = cv2.solvePnPGeneric(model, xy, eye, None, flags=flags)
    except cv2.error:
        return None, math.inf
    # the candidate with the smaller residual (IPPE's two are the planar pose ambiguity), then
    # refined; one refinement per frame keeps the per-frame cost near half a millisecond
    candidates = [_rt_to_T(r, t) for r, t in zip(rvecs[:n], tvecs[:n])]
    residuals = [_residual(T, model, xy) for T in candidates]
    if not candidates or not math.isfinite(min(residuals)):
        return None, math.inf
    i = int(np.argmin(residuals))
    rvec, tvec = cv2.solvePnPRefineLM(model, xy, eye, None, rvecs[i].copy(), tvecs[i].copy())
    T = _rt_to_T(rvec, tvec)
    return T, _residual(T, model, xy)


# Warm start (PoseErrorEstimator, frame after frame): Gauss-Newton on the same reprojection
# error from the last frame's pose. Its result is the same least-squares optimum LM reaches, taken
# only when it converged (last step below WARM_STEP: 1 um / 1 urad) within WARM_ITERATIONS to a
# fit as good as a full solve accepts without retrying (RETRY_RESIDUAL); else the full solve
# runs. Common practice, no source.
WARM_ITERATIONS = 6
WARM_STEP = 1e-6


def refine_pose(T_camera_target, model, xy, iterations=WARM_ITERATIONS, step=WARM_STEP):
    """``(T_camera_target, rms)`` refined by Gauss-Newton on the reprojection error of the
    normalized points ``xy`` (N, 2) of ``model`` (N, 3), from the pose given; None when it did
    not converge (a point behind the camera, a singular normal matrix, steps still larger than
    ``step`` after ``iterations``).

    The residual's Jacobian with respect to a twist ``[v; w]`` of the target (camera frame) is
    minus the points' interaction matrix at their projections (Chaumette & Hutchinson, IEEE RAM
    2006, eq. 11: the camera moving by ``v_c`` is the target moving by ``-v_c``), so each step
    solves ``L delta = r`` in the least-squares sense and moves the target by ``delta`` (Hartley
    & Zisserman, Multiple View Geometry, 2nd ed. 2004, sec. A6.1, Gauss-Newton).
    """
    R = T_camera_target[:3, :3]
    t = T_camera_target[:3, 3]
    n = len(xy)
    L = np.empty((n, 2, 6))
    for _ in range(iterations):
        p = model @ R.T + t
        Z = p[:, 2]
        if not (Z > 0).all():
            return None
        iz = 1.0 / Z
        x, y = p[:, 0] * iz, p[:, 1] * iz
        r = np.empty((n, 2))
        r[:, 0], r[:, 1] = x - xy[:, 0], y - xy[:, 1]
        L[:, 0, 0], L[:, 0, 1], L[:, 0, 2] = -iz, 0.0, x * iz
        L[:, 0, 3], L[:, 0, 4], L[:, 0, 5] = x * y, -(1 + x * x), y
        L[:, 1, 0], L[:, 1, 1], L[:, 1, 2] = 0.0, -iz, y * iz
        L[:, 1, 3], L[:, 1, 4], L[:, 1, 5] = 1 + y * y, -x * y, -x
        A = L.reshape(-1, 6)
        try:
            delta = np.linalg.solve(A.T @ A, A.T @ r.ravel())
        except np.linalg.LinAlgError:
            return None
        dR = cv2.Rodrigues(delta[3:])[0]
        R, t = dR @ R, dR @ t + delta[:3]
        if float(delta @ delta) < step * step:
            T = np.eye(4)
            T[:3, :3], T[:3, 3] = R, t
            rms = _residual(T, model, xy)
            return (T, rms) if rms <= RETRY_RESIDUAL else None
    return None


def from_model(xy_now, xy_taught, model_points, T_taught_target=None,
               planar: bool | None = None, T_guess=None) -> PoseEstimate:
    """Pose-error estimate from the target's 3-D model (see module doc).

    Args:
        xy_now, xy_taught: (N, 2) normalized coordinates of the same features now and taught.
        model_points: (N, 3) the features in the target frame, metres.
        T_taught_target: the target's pose in the taught view if already known (e.g. from all
            taught features, when only some are seen now); else PnP on ``xy_taught``.
        planar: whether the model is planar, if known (saves checking it).
        T_guess: a pose of the target near the current one (the last frame's): tried first by
            ``refine_pose``; the full solve runs when that does not converge.
    ValueError on degenerate input.
    """
    warm = None
    if T_guess is not None:
        xy = check_points(xy_now, "image points")
        model = np.asarray(model_points, dtype=float)
        _check_same_length(xy, model, "image points", "model points")
        warm = refine_pose(T_guess, model, xy)
    if warm is not None:
        T_current_target, rms = warm
    else:
        T_current_target, rms = pose_from_model(xy_now, model_points, planar)
    info = {"residual_now": rms, "warm_start": warm is not None,
            "T_current_target": T_current_target}
    if T_taught_target is None:
        T_taught_target, rms_taught = pose_from_model(xy_taught, model_points)
        info["residual_taught"] = rms_taught
    T = np.asarray(T_taught_target, dtype=float) @ frames.invert(T_current_target)
    if not np.isfinite(T).all():
        raise ValueError("the PnP poses gave a non-finite displacement")
    return PoseEstimate("pnp", True, T, rms, info=info)


# ----------------------------------------------------------------------------- homography
def homography(xy_taught, xy_now) -> np.ndarray:
    """Least-squares homography ``H`` with ``x_now ~ H x_taught`` over all points (normalized
    coordinates; cv2.findHomography method 0: DLT then Levenberg-Marquardt), signed so that
    points in front of the camera stay in front. ValueError when the points fix none."""
    src = check_points(xy_taught, "taught points")
    dst = check_points(xy_now, "current points")
    _check_same_length(src, dst, "current points", "taught points")
    H, _ = cv2.findHomography(src, dst, 0)
    if H is None or not np.isfinite(H).all() or abs(np.linalg.det(H)) < 1e-12:
        raise ValueError("no homography fits the taught and current points")
    # sign: a point in front of both cameras maps with a positive third coordinate
    # (H x* = (Z / Z*) x up to a positive scale)
    w = np.column_stack([src, np.ones(len(src))]) @ H[2]
    if np.median(w) < 0:
        H = -H
    return H


def from_homography(xy_now, xy_taught, taught_depths) -> PoseEstimate:
    """Pose-error estimate without a model, from the plane-induced homography and the taught
    depths (see module doc).

    Args:
        xy_now, xy_taught: (N, 2) normalized coordinates of the same features now and taught.
        taught_depths: (N,) depths of the taught features, metres, or a scalar for all (a
            constant depth: a plane facing the camera).
    ValueError on degenerate input or when the taught points are not on one plane.
    """
    xy_taught = check_points(xy_taught, "taught points")
    xy_now = check_points(xy_now, "current points")
    _check_same_length(xy_now, xy_taught, "current points", "taught points")
    Z = np.broadcast_to(np.asarray(taught_depths, dtype=float), (len(xy_taught),))
    if not (np.isfinite(Z) & (Z > 0)).all():
        raise ValueError(f"taught depths must be finite and > 0 m, got {np.asarray(Z).tolist()}")
    X = np.column_stack([xy_taught * Z[:, None], Z])
    n_taught, d, off_plane = plane_of(X)
    extent = float(np.linalg.norm(X.max(axis=0) - X.min(axis=0)))
    if off_plane > OFF_PLANE_RATIO * extent:
        raise ValueError(f"the taught points lie {1e3 * off_plane:.1f} mm (RMS) off one plane "
                         f"over an extent of {1e3 * extent:.0f} mm; the homography needs a "
                         "planar target (give the target's model instead)")
    H = homography(xy_taught, xy_now)
    count, Rs, ts, ns = cv2.decomposeHomographyMat(H, np.eye(3))
    moved = [i for i in range(count) if np.linalg.norm(ts[i]) > 0]
    info = {"solutions": int(count), "plane_distance_m": d, "plane_normal": n_taught,
            "taught_off_plane_m": off_plane}
    if moved:
        # The physically valid solution: its plane normal agrees with the taught plane's; the
        # other three are the mirrored solution and the two with the normal reversed, which
        # put the plane behind the camera (Malis & Vargas 2007).
        dots = [float(ns[i].ravel() @ n_taught) for i in moved]
        i = moved[int(np.argmax(dots))]
        R, t = Rs[i], ts[i].ravel() * d
        info["normal_error_deg"] = math.degrees(math.acos(min(1.0, max(-1.0, max(dots)))))
        info["solver"] = "decomposition"
    else:
        R, t = solve_known_plane(H, n_taught, d)
        info["solver"] = "known_plane"
    T_current_taught = frames.transform(R, t)
    T = frames.invert(T_current_taught)
    if not np.isfinite(T).all():
        raise ValueError("the homography decomposition gave a non-finite displacement")
    proj = cv2.perspectiveTransform(xy_taught.reshape(-1, 1, 2), H).reshape(-1, 2)
    rms = float(np.sqrt(np.mean(np.sum((proj - xy_now) ** 2, axis=1))))
    if not rms <= MAX_RESIDUAL:
        raise ValueError(f"the points do not fit one plane's homography: RMS residual {rms:.4f} "
                         f"(normalized) > {MAX_RESIDUAL}; a mismatched feature?")
    return PoseEstimate("homography", True, T, rms, info=info)


def solve_known_plane(H, n, d) -> tuple[np.ndarray, np.ndarray]:
    """``(R, t)`` of ``H ~ R + t n^T / d`` for a known unit plane normal ``n`` and distance
    ``d > 0`` (the taught plane; see module doc): ``R`` the rotation nearest ``H [u1 u2]`` on
    the plane's directions (orthogonal Procrustes, Schoenemann 1966), ``t = d (H n / lambda -
    R n)`` with ``lambda`` the scale of ``H``. ``H`` must have the sign ``homography`` gives it
    (points in front of the camera map to points in front). ValueError when ``H`` is
    degenerate."""
    H = np.asarray(H, dtype=float)
    n = np.asarray(n, dtype=float)
    n = n / np.linalg.norm(n)
    a = np.eye(3)[int(np.argmin(np.abs(n)))]        # the axis least aligned with n
    u1 = np.cross(n, a)
    u1 /= np.linalg.norm(u1)
    U = np.column_stack([u1, np.cross(n, u1)])      # (3, 2) orthonormal, orthogonal to n
    M = H @ U @ U.T
    A, s, Bt = np.linalg.svd(M)
    if not s[1] > 1e-12 * max(s[0], 1e-300):
        raise ValueError("the homography maps the plane's directions to a line")
    D = np.diag([1.0, 1.0, np.linalg.det(A @ Bt)])
    R = A @ D @ Bt
    lam = float(np.trace(R.T @ M)) / 2.0           # the sum of the two singular values
    t = d * (H @ n / lam - R @ n)
    return R, t


# ----------------------------------------------------------------------------- first order
def first_order(xy_now, xy_taught, taught_depths, current_depths=None,
                estimate="taught_view") -> PoseEstimate:
    """First-order estimate: the camera twist ``v = -L^+ (s - s*)`` held for unit time
    (Chaumette & Hutchinson 2006, eq. 11 for ``L``; ``estimate`` as in
    ``interaction.interaction_matrix``; ``current_depths`` needed by 'current_view' and
    'blended'). ``T_current_taught ~ (exp([w]), v)``, valid to first order in the error."""
    xy_taught = check_points(xy_taught, "taught points")
    xy_now = check_points(xy_now, "current points")
    _check_same_length(xy_now, xy_taught, "current points", "taught points")
    if estimate in ("current_view", "blended") and current_depths is None:
        raise ValueError(f"the {estimate!r} interaction matrix needs the current depths")
    L = interaction_matrix(estimate, xy_now, current_depths, xy_taught, taught_depths)
    e = (xy_now - xy_taught).ravel()
    v = -np.linalg.lstsq(L, e, rcond=None)[0]     # = -pinv(L) e, without forming pinv
    if not np.isfinite(v).all():
        raise ValueError("the interaction matrix gave a non-finite twist")
    T_current_taught = np.eye(4)
    T_current_taught[:3, :3] = cv2.Rodrigues(v[3:].reshape(3, 1))[0]   # exp([w])
    T_current_taught[:3, 3] = v[:3]
    return PoseEstimate("first_order", True, frames.invert(T_current_taught),
                        info={"twist": v})


def disagreement(a: PoseEstimate, b: PoseEstimate) -> tuple[float, float]:
    """``(mm, deg)`` between two estimates of the same displacement: the distance between their
    translations and the angle between their rotations (NaN when either is invalid)."""
    if not (a.valid and b.valid):
        return math.nan, math.nan
    moved, turned = frames.pose_error(a.T_taught_current, b.T_taught_current)
    return 1e3 * moved, math.degrees(turned)


# ----------------------------------------------------------------------------- estimator
class PoseErrorEstimator:
    """Pose-error estimates against one taught view; what depends on the taught view alone (the
    target's taught pose, the taught plane) is computed once.

    Args:
        xy_taught: (N, 2) normalized coordinates of the taught features.
        model_points: (N, 3) the same features in the target frame (metres), or None.
        taught_depths: (N,) taught depths (metres), or a scalar, or None.
    With a model the estimate is PnP, else the homography with the taught depths; with neither,
    construction raises ValueError (no metric estimate is possible).
    """

    def __init__(self, xy_taught, model_points=None, taught_depths=None, warm_start=True):
        self.xy_taught = check_points(xy_taught, "taught points")
        # PnP frame after frame: start from the last frame's pose (``refine_pose``), a few
        # Gauss-Newton steps instead of IPPE + LM (~1 ms) while the track holds
        self.warm_start = bool(warm_start)
        self._last_pose = None
        n = len(self.xy_taught)
        self.model_points = None
        self._planar = False
        self.T_taught_target = None
        if model_points is not None:
            model, self._planar = _model(model_points)
            _check_same_length(model, self.xy_taught, "model points", "taught points")
            self.model_points = model
            self.T_taught_target, _ = pose_from_model(self.xy_taught, model)
        self.taught_depths = None
        if taught_depths is not None:
            Z = np.broadcast_to(np.asarray(taught_depths, dtype=float), (n,)).copy()
            if not (np.isfinite(Z) & (Z > 0)).all():
                raise ValueError(f"taught depths must be finite and > 0 m, got {Z.tolist()}")
            self.taught_depths = Z
        if self.model_points is None and self.taught_depths is None:
            raise ValueError("a metric pose error needs the target's model or the taught depths")
        self.method = "pnp" if self.model_points is not None else "homography"

    def _select(self, index):
        if index is None:
            return slice(None)
        index = np.asarray(index, dtype=int).ravel()
        if index.size and (index.min() < 0 or index.max() >= len(self.xy_taught)):
            raise ValueError(f"feature index out of range 0..{len(self.xy_taught) - 1}: "
                             f"{index.tolist()}")
        if len(set(index.tolist())) != index.size:
            raise ValueError(f"repeated feature indices {index.tolist()}")
        return index

    def estimate(self, xy_now, index=None) -> PoseEstimate:
        """The estimate for the current points ``xy_now`` (M, 2) of taught features ``index``
        (M,) (default: all, in order). Never raises on bad data: an invalid estimate says why."""
        try:
            sel = self._select(index)
            xy_taught = self.xy_taught[sel]
            if self.method == "pnp":
                # a subset of a planar model is planar; of a non-planar one, check it
                estimate = from_model(xy_now, xy_taught, self.model_points[sel],
                                      T_taught_target=self.T_taught_target,
                                      planar=True if self._planar else None,
                                      T_guess=self._last_pose if self.warm_start else None)
                self._last_pose = estimate.info["T_current_target"]
                return estimate
            return from_homography(xy_now, xy_taught, self.taught_depths[sel])
        except (ValueError, cv2.error, np.linalg.LinAlgError) as exc:
            self._last_pose = None
            return invalid(self.method, str(exc))

    def first_order(self, xy_now, index=None) -> PoseEstimate:
        """The first-order cross-check for the same input (taught-view interaction matrix with
        the taught depths, or the model's depths in the taught pose)."""
        try:
            sel = self._select(index)
            if self.taught_depths is not None:
                Z = self.taught_depths[sel]
            else:
                T = self.T_taught_target
                Z = (self.model_points[sel] @ T[:3, :3].T + T[:3, 3])[:, 2]
            return first_order(xy_now, self.xy_taught[sel], Z)
        except (ValueError, np.linalg.LinAlgError) as exc:
            return invalid("first_order", str(exc))


# ----------------------------------------------------------------------------- dwell average
@dataclass(frozen=True)
class PoseTolerance:
    """An arrival requirement in task units: the camera within ``mm`` (translation) and ``deg``
    (rotation) of the taught pose; 0 leaves that part out."""
    mm: float = 0.0
    deg: float = 0.0

    def __post_init__(self) -> None:
        for name in ("mm", "deg"):
            value = getattr(self, name)
            if not (math.isfinite(value) and value >= 0):
                raise ValueError(f"pose tolerance {name} must be finite and >= 0 (0 = not "
                                 f"used), got {value!r}")

    @property
    def active(self) -> bool:
        return self.mm > 0 or self.deg > 0


# A tolerance counts as met when the mean plus this many standard errors of the mean
# (spread / sqrt(n)) is inside it: about 95 % one-sided for a normally distributed mean (common
# practice, no source). Fewer than MIN_SPREAD_FRAMES estimates give no spread to judge.
CONFIDENCE_FACTOR = 2.0
MIN_SPREAD_FRAMES = 3


@dataclass(frozen=True)
class WindowSummary:
    """The estimates of one window: ``n`` valid ones (``n_invalid`` others); ``mm`` and ``deg``
    the translation and rotation of their mean displacement (translations averaged, rotations
    by their chordal mean: SciPy ``Rotation.mean``); ``spread_mm`` and ``spread_deg`` the RMS
    distance of the single estimates from that mean (the single-frame scatter; the mean's own
    uncertainty is about spread / sqrt(n) for independent frames); ``check_mm`` and
    ``check_deg`` the disagreement of the mean with the mean first-order estimate (NaN when
    none was added); ``span_s`` the time between the first and last estimate.
    ``bound_mm`` / ``bound_deg``: the mean plus ``CONFIDENCE_FACTOR`` standard errors, what a
    tolerance is judged on, so a noisy estimate does not stop a run early by luck."""
    n: int = 0
    n_invalid: int = 0
    mm: float = math.nan
    deg: float = math.nan
    spread_mm: float = math.nan
    spread_deg: float = math.nan
    check_mm: float = math.nan
    check_deg: float = math.nan
    span_s: float = 0.0

    def _bound(self, mean: float, spread: float) -> float:
        if self.n < MIN_SPREAD_FRAMES:
            return mean
        return mean + CONFIDENCE_FACTOR * spread / math.sqrt(self.n)

    @property
    def bound_mm(self) -> float:
        return self._bound(self.mm, self.spread_mm)

    @property
    def bound_deg(self) -> float:
        return self._bound(self.deg, self.spread_deg)

    def within(self, tolerance: PoseTolerance) -> bool:
        """True when every estimate was valid and the mean, plus its uncertainty
        (``bound_mm``, ``bound_deg``), is inside ``tolerance`` (the parts it uses)."""
        if self.n == 0 or self.n_invalid:
            return False
        return ((tolerance.mm <= 0 or self.bound_mm <= tolerance.mm)
                and (tolerance.deg <= 0 or self.bound_deg <= tolerance.deg))

    def describe(self) -> str:
        """One line for logs and halt details."""
        if self.n == 0:
            return (f"no valid pose-error estimate in the last window ({self.n_invalid} "
                    "invalid)")
        return (f"estimated pose error {self.mm:.3f} mm / {self.deg:.4f} deg (mean of {self.n} "
                f"frames; with 2 standard errors {self.bound_mm:.3f} mm / "
                f"{self.bound_deg:.4f} deg; single-frame spread {self.spread_mm:.3f} mm / "
                f"{self.spread_deg:.4f} deg)"
                + (f", {self.n_invalid} frames without an estimate" if self.n_invalid else ""))


def _quat(R) -> np.ndarray:
    """Unit quaternion (x, y, z, w) of a rotation matrix, sign free (Shepperd, "Quaternion from
    rotation matrix", J. Guidance and Control 1(3), 1978: from the largest of w, x, y, z);
    plain floats, as SciPy's Rotation costs ~0.1 ms a call on one matrix."""
    (a, b, c), (d, e, f), (g, h, i) = R.tolist()
    trace = a + e + i
    k = max(trace, a, e, i)
    if k == trace:
        w = 0.5 * math.sqrt(max(1.0 + trace, 0.0))
        q = ((h - f) / (4 * w), (c - g) / (4 * w), (d - b) / (4 * w), w)
    elif k == a:
        x = 0.5 * math.sqrt(max(1.0 + a - e - i, 0.0))
        q = (x, (b + d) / (4 * x), (c + g) / (4 * x), (h - f) / (4 * x))
    elif k == e:
        y = 0.5 * math.sqrt(max(1.0 - a + e - i, 0.0))
        q = ((b + d) / (4 * y), y, (f + h) / (4 * y), (c - g) / (4 * y))
    else:
        z = 0.5 * math.sqrt(max(1.0 - a - e + i, 0.0))
        q = ((c + g) / (4 * z), (f + h) / (4 * z), z, (d - b) / (4 * z))
    return np.array(q)


def _mean_displacement(estimates, quats=None):
    """(T, spread_mm, spread_deg) of valid estimates: mean translation, chordal-mean rotation.

    The rotation mean is the unit quaternion maximising sum (q_i . q)^2, the eigenvector of the
    largest eigenvalue of sum q_i q_i^T (Markley, Cheng, Crassidis & Oshman, "Averaging
    quaternions", J. Guidance, Control, and Dynamics 30(4), 2007; what SciPy's
    ``Rotation.mean`` computes, tests/control/test_pose_error.py), in a few array operations
    since it runs every frame. ``quats``: the estimates' rotations as quaternions, when the
    caller has them already (PoseWindow converts each estimate once, on adding it)."""
    T = np.array([e.T_taught_current for e in estimates])
    t = T[:, :3, 3]
    q = Rotation.from_matrix(T[:, :3, :3]).as_quat() if quats is None else np.asarray(quats)
    t_mean = t.mean(axis=0)
    _, vectors = np.linalg.eigh(q.T @ q)
    q_mean = vectors[:, -1]
    spread_m = math.sqrt(float(np.mean(np.sum((t - t_mean) ** 2, axis=1))))
    # angle between unit quaternions: 2 atan2(|q x|, |q . q_mean|) on the relative rotation
    cos_half = np.clip(np.abs(q @ q_mean), 0.0, 1.0)
    angles = 2.0 * np.arctan2(np.sqrt(np.maximum(0.0, 1.0 - cos_half ** 2)), cos_half)
    spread_rad = math.sqrt(float(np.mean(angles ** 2)))
    x, y, z, w = (q_mean / math.sqrt(float(q_mean @ q_mean))).tolist()
    R_mean = np.array([[1 - 2 * (y * y + z * z), 2 * (x * y - z * w), 2 * (x * z + y * w)],
                       [2 * (x * y + z * w), 1 - 2 * (x * x + z * z), 2 * (y * z - x * w)],
                       [2 * (x * z - y * w), 2 * (y * z + x * w), 1 - 2 * (x * x + y * y)]])
    T = np.eye(4)
    T[:3, :3], T[:3, 3] = R_mean, t_mean
    return T, 1e3 * spread_m, math.degrees(spread_rad)


class PoseWindow:
    """The pose-error estimates of the last ``span_s`` seconds (the arrival dwell), for judging
    a tolerance on their mean rather than on one noisy frame. ``add`` once per frame with the
    frame's time; ``summary`` describes what the window holds."""

    def __init__(self, span_s: float):
        if not (math.isfinite(span_s) and span_s >= 0):
            raise ValueError(f"window span must be finite and >= 0 s, got {span_s!r}")
        self.span_s = float(span_s)
        self._items: list = []    # (t, estimate, first-order estimate or None)
        self._quats: list = []    # the estimate's rotation as a quaternion (x, y, z, w) or None
        self._check_quats: list = []   # ... and the first-order check's, or None

    def clear(self) -> None:
        self._items.clear()
        self._quats.clear()
        self._check_quats.clear()

    def __len__(self) -> int:
        return len(self._items)

    def add(self, t: float, estimate: PoseEstimate, check: PoseEstimate | None = None) -> None:
        """Add the estimate of the frame at time ``t`` (s) and optionally its first-order
        cross-check; estimates older than ``t - span_s`` leave the window."""
        if self._items and t < self._items[-1][0]:
            self.clear()           # time went backwards: start over
        self._items.append((float(t), estimate, check))
        self._quats.append(_quat(estimate.T_taught_current[:3, :3])
                           if estimate.valid else None)
        self._check_quats.append(_quat(check.T_taught_current[:3, :3])
                                 if check is not None and check.valid else None)
        start = t - self.span_s - 1e-9
        while self._items and self._items[0][0] < start:
            self._items.pop(0)
            self._quats.pop(0)
            self._check_quats.pop(0)

    def summary(self) -> WindowSummary:
        valid = [e for _, e, _ in self._items if e.valid]
        n_invalid = len(self._items) - len(valid)
        if not valid:
            return WindowSummary(0, n_invalid)
        T, spread_mm, spread_deg = _mean_displacement(
            valid, [q for q in self._quats if q is not None])
        moved, turned = frames.pose_error(np.eye(4), T)
        check_mm = check_deg = math.nan
        checks = [c for _, _, c in self._items if c is not None and c.valid]
        if checks:
            T_check = _mean_displacement(checks, [q for q in self._check_quats
                                                  if q is not None])[0]
            check_m, check_rad = frames.pose_error(T, T_check)
            check_mm, check_deg = 1e3 * check_m, math.degrees(check_rad)
        return WindowSummary(len(valid), n_invalid, 1e3 * moved, math.degrees(turned),
                             spread_mm, spread_deg, check_mm, check_deg,
                             self._items[-1][0] - self._items[0][0])
