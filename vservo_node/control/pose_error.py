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
from dataclasses import dataclass
from typing import Sequence

import cv2
import numpy as np
from numpy.typing import ArrayLike
from scipy.spatial.transform import Rotation

from vservo_node.control import frames
from vservo_node.control.pose_estimate import (check_points, _check_same_length, COLLINEAR_RATIO,
                                               invalid, MAX_RESIDUAL, METHODS, MIN_POINTS, _model,
                                               OFF_PLANE_RATIO, PLANAR_RATIO, plane_of,
                                               PoseEstimate, RETRY_RESIDUAL)
from vservo_node.control.pose_solve import (disagreement, first_order, from_homography, from_model,
                                            homography, pose_from_model, refine_pose,
                                            solve_known_plane, WARM_ITERATIONS, WARM_STEP)


# Split along its concerns: the estimate and its input checks (pose_estimate), the solvers
# (pose_solve); their names keep this import path.
__all__ = ["check_points", "COLLINEAR_RATIO", "CONFIDENCE_FACTOR", "disagreement", "first_order",
           "from_homography", "from_model", "homography", "invalid", "MAX_RESIDUAL", "METHODS",
           "MIN_POINTS", "MIN_SPREAD_FRAMES", "OFF_PLANE_RATIO", "PLANAR_RATIO", "plane_of",
           "pose_from_model", "PoseErrorEstimator", "PoseEstimate", "PoseTolerance",
           "PoseWindow", "refine_pose", "RETRY_RESIDUAL", "solve_known_plane",
           "WARM_ITERATIONS", "WARM_STEP", "WindowSummary"]

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

    def __init__(self, xy_taught: ArrayLike, model_points: ArrayLike | None = None,
                 taught_depths: ArrayLike | None = None, warm_start: bool = True) -> None:
        self.xy_taught = check_points(xy_taught, "taught points")
        # PnP frame after frame: start from the last frame's pose (``refine_pose``), a few
        # Gauss-Newton steps instead of IPPE + LM (~1 ms) while the track holds
        self.warm_start = bool(warm_start)
        self._last_pose: np.ndarray | None = None
        n = len(self.xy_taught)
        self.model_points: np.ndarray | None = None
        self._planar = False
        self.T_taught_target: np.ndarray | None = None
        if model_points is not None:
            model, self._planar = _model(model_points)
            _check_same_length(model, self.xy_taught, "model points", "taught points")
            self.model_points = model
            self.T_taught_target, _ = pose_from_model(self.xy_taught, model)
        self.taught_depths: np.ndarray | None = None
        if taught_depths is not None:
            Z = np.broadcast_to(np.asarray(taught_depths, dtype=float), (n,)).copy()
            if not (np.isfinite(Z) & (Z > 0)).all():
                raise ValueError(f"taught depths must be finite and > 0 m, got {Z.tolist()}")
            self.taught_depths = Z
        if self.model_points is None and self.taught_depths is None:
            raise ValueError("a metric pose error needs the target's model or the taught depths")
        self.method = "pnp" if self.model_points is not None else "homography"

    def _select(self, index: ArrayLike | None) -> slice | np.ndarray:
        if index is None:
            return slice(None)
        chosen = np.asarray(index, dtype=int).ravel()
        if chosen.size and (chosen.min() < 0 or chosen.max() >= len(self.xy_taught)):
            raise ValueError(f"feature index out of range 0..{len(self.xy_taught) - 1}: "
                             f"{chosen.tolist()}")
        if len(set(chosen.tolist())) != chosen.size:
            raise ValueError(f"repeated feature indices {chosen.tolist()}")
        return chosen

    def estimate(self, xy_now: ArrayLike, index: ArrayLike | None = None) -> PoseEstimate:
        """The estimate for the current points ``xy_now`` (M, 2) of taught features ``index``
        (M,) (default: all, in order). Never raises on bad data: an invalid estimate says why."""
        try:
            sel = self._select(index)
            xy_taught = self.xy_taught[sel]
            if self.method == "pnp":
                assert self.model_points is not None   # method pnp: the model is given
                # a subset of a planar model is planar; of a non-planar one, check it
                estimate = from_model(xy_now, xy_taught, self.model_points[sel],
                                      T_taught_target=self.T_taught_target,
                                      planar=True if self._planar else None,
                                      T_guess=self._last_pose if self.warm_start else None)
                self._last_pose = estimate.info["T_current_target"]
                return estimate
            assert self.taught_depths is not None   # method homography: depths are given
            return from_homography(xy_now, xy_taught, self.taught_depths[sel])
        except (ValueError, cv2.error, np.linalg.LinAlgError) as exc:
            self._last_pose = None
            return invalid(self.method, str(exc))

    def first_order(self, xy_now: ArrayLike, index: ArrayLike | None = None) -> PoseEstimate:
        """The first-order cross-check for the same input (taught-view interaction matrix with
        the taught depths, or the model's depths in the taught pose)."""
        try:
            sel = self._select(index)
            if self.taught_depths is not None:
                Z = self.taught_depths[sel]
            else:
                T = self.T_taught_target
                # no taught depths: the model and its taught pose are given
                assert T is not None and self.model_points is not None
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


def _displacement(estimate: PoseEstimate) -> np.ndarray:
    """``T_taught_current`` of a valid estimate (which always has one)."""
    assert estimate.T_taught_current is not None
    return estimate.T_taught_current


def _quat(R: np.ndarray) -> np.ndarray:
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


def _mean_displacement(estimates: Sequence[PoseEstimate],
                       quats: Sequence[np.ndarray] | None = None
                       ) -> tuple[np.ndarray, float, float]:
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
        # (t, estimate, first-order estimate or None)
        self._items: list[tuple[float, PoseEstimate, PoseEstimate | None]] = []
        # the estimate's rotation as a quaternion (x, y, z, w) or None
        self._quats: list[np.ndarray | None] = []
        self._check_quats: list[np.ndarray | None] = []   # ... and the first-order check's

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
        self._quats.append(_quat(_displacement(estimate)[:3, :3])
                           if estimate.valid else None)
        self._check_quats.append(_quat(_displacement(check)[:3, :3])
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
