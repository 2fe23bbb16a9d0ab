"""The pose-error solvers: PnP of the target model (warm-started refinement), the plane
homography with the taught depths, the first-order cross-check (vservo_node.control.pose_error)."""
from __future__ import annotations

import math
from typing import Any, cast

import cv2
import numpy as np
from numpy.typing import ArrayLike

from vservo_node.control import frames
from vservo_node.control.interaction import interaction_matrix
from vservo_node.control.pose_estimate import (_check_same_length, _model, check_points,
                                               MAX_RESIDUAL, OFF_PLANE_RATIO, plane_of,
                                               PoseEstimate, RETRY_RESIDUAL)


# ----------------------------------------------------------------------------- PnP
def _rt_to_T(rvec: ArrayLike, tvec: ArrayLike) -> np.ndarray:
    T = np.eye(4)
    T[:3, :3] = cv2.Rodrigues(np.asarray(rvec, dtype=float).reshape(3, 1))[0]
    T[:3, 3] = np.asarray(tvec, dtype=float).ravel()
    return T


def _residual(T_camera_target: np.ndarray, model: np.ndarray, xy: np.ndarray) -> float:
    """RMS distance (normalized units) between the model's projection and ``xy``; inf if a
    model point falls behind the camera."""
    p = model @ T_camera_target[:3, :3].T + T_camera_target[:3, 3]
    if np.any(p[:, 2] <= 0):
        return math.inf
    return float(np.sqrt(np.mean(np.sum((p[:, :2] / p[:, 2:] - xy) ** 2, axis=1))))


def pose_from_model(xy_in: ArrayLike, model_points: ArrayLike, planar: bool | None = None
                    ) -> tuple[np.ndarray, float]:
    """``(T_camera_target, rms)``: the target's pose in the camera frame from the normalized
    points ``xy`` (N, 2) of its model points (N, 3), and the RMS residual (normalized units).

    Planar model: SOLVEPNP_IPPE (Collins & Bartoli 2014) gives two candidate poses; the one
    with the smaller residual is refined by Levenberg-Marquardt on the reprojection error; when
    that residual exceeds ``RETRY_RESIDUAL``, SQPnP is tried too and the better fit kept.
    Non-planar: SOLVEPNP_SQPNP (Terzakis & Lourakis, ECCV 2020), then the same refinement. A fit
    worse than ``MAX_RESIDUAL`` is refused. ValueError when the input is degenerate or no pose
    puts the model in front of the camera. ``planar``: whether the model is planar, when the
    caller knows (else found here).
    """
    xy = check_points(xy_in, "image points")
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


def _solve_pnp(model: np.ndarray, xy: np.ndarray, flags: int) -> tuple[np.ndarray | None, float]:
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


def refine_pose(T_camera_target: np.ndarray, model: np.ndarray, xy: np.ndarray,
                iterations: int = WARM_ITERATIONS, step: float = WARM_STEP
                ) -> tuple[np.ndarray, float] | None:
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


def from_model(xy_now: ArrayLike, xy_taught: ArrayLike, model_points: ArrayLike,
               T_taught_target: ArrayLike | None = None, planar: bool | None = None,
               T_guess: np.ndarray | None = None) -> PoseEstimate:
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
    info: dict[str, Any] = {"residual_now": rms, "warm_start": warm is not None,
            "T_current_target": T_current_target}
    if T_taught_target is None:
        T_taught_target, rms_taught = pose_from_model(xy_taught, model_points)
        info["residual_taught"] = rms_taught
    T = np.asarray(T_taught_target, dtype=float) @ frames.invert(T_current_target)
    if not np.isfinite(T).all():
        raise ValueError("the PnP poses gave a non-finite displacement")
    return PoseEstimate("pnp", True, T, rms, info=info)


# ----------------------------------------------------------------------------- homography
def homography(xy_taught: ArrayLike, xy_now: ArrayLike) -> np.ndarray:
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


def from_homography(xy_now_in: ArrayLike, xy_taught_in: ArrayLike, taught_depths: ArrayLike
                    ) -> PoseEstimate:
    """Pose-error estimate without a model, from the plane-induced homography and the taught
    depths (see module doc).

    Args:
        xy_now, xy_taught: (N, 2) normalized coordinates of the same features now and taught.
        taught_depths: (N,) depths of the taught features, metres, or a scalar for all (a
            constant depth: a plane facing the camera).
    ValueError on degenerate input or when the taught points are not on one plane.
    """
    xy_taught = check_points(xy_taught_in, "taught points")
    xy_now = check_points(xy_now_in, "current points")
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
    info: dict[str, Any] = {"solutions": int(count), "plane_distance_m": d,
                            "plane_normal": n_taught, "taught_off_plane_m": off_plane}
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


def solve_known_plane(H_in: ArrayLike, n_in: ArrayLike, d: float) -> tuple[np.ndarray, np.ndarray]:
    """``(R, t)`` of ``H ~ R + t n^T / d`` for a known unit plane normal ``n`` and distance
    ``d > 0`` (the taught plane; see module doc): ``R`` the rotation nearest ``H [u1 u2]`` on
    the plane's directions (orthogonal Procrustes, Schoenemann 1966), ``t = d (H n / lambda -
    R n)`` with ``lambda`` the scale of ``H``. ``H`` must have the sign ``homography`` gives it
    (points in front of the camera map to points in front). ValueError when ``H`` is
    degenerate."""
    H = np.asarray(H_in, dtype=float)
    n = np.asarray(n_in, dtype=float)
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
def first_order(xy_now_in: ArrayLike, xy_taught_in: ArrayLike, taught_depths: ArrayLike,
                current_depths: ArrayLike | None = None,
                estimate: str = "taught_view") -> PoseEstimate:
    """First-order estimate: the camera twist ``v = -L^+ (s - s*)`` held for unit time
    (Chaumette & Hutchinson 2006, eq. 11 for ``L``; ``estimate`` as in
    ``interaction.interaction_matrix``; ``current_depths`` needed by 'current_view' and
    'blended'). ``T_current_taught ~ (exp([w]), v)``, valid to first order in the error."""
    xy_taught = check_points(xy_taught_in, "taught points")
    xy_now = check_points(xy_now_in, "current points")
    _check_same_length(xy_now, xy_taught, "current points", "taught points")
    if estimate in ("current_view", "blended") and current_depths is None:
        raise ValueError(f"the {estimate!r} interaction matrix needs the current depths")
    # current_depths is None only for 'taught_view', which does not read it
    L = interaction_matrix(estimate, xy_now, cast(ArrayLike, current_depths), xy_taught,
                           taught_depths)
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
    assert a.T_taught_current is not None and b.T_taught_current is not None   # both valid
    moved, turned = frames.pose_error(a.T_taught_current, b.T_taught_current)
    return 1e3 * moved, math.degrees(turned)
