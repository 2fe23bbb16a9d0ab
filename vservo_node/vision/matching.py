"""Correspondence between a detection and the taught reference.

- Dots: one global assignment (Hungarian method: Kuhn, Naval Research Logistics Quarterly 2,
  1955; scipy.optimize.linear_sum_assignment) on the CIELAB colour difference Delta E*ab
  (CIE 15:2004), gated by ``max_delta_e``, plus the pixel distance to predicted positions when
  the previous frame gives them. Exposure changes are absorbed by a common gain on the
  measured colours in linear light, chosen to minimise the assignment cost. When reference
  colours repeat (closer than ``ambiguity_delta_e``) and no prediction separates them, the
  assignments within each colour group are tried and the one whose points fit one homography
  to the reference best is kept (a plane's two views are related by a homography: Hartley &
  Zisserman 2003, sec. 13.1). With five or more matches a RANSAC homography rejects points
  that do not fit (Fischler & Bolles, Comm. ACM 24(6), 1981). That relation holds for an ideal
  pinhole: given the camera, the geometric checks run on undistorted normalized coordinates
  of the detections (and the reference's plane or normalized coordinates), with the pixel
  thresholds divided by the focal length fx; without it, on pixels (a lens with little
  distortion only).
- Markers and textured targets: by key (marker id and corner; servo point index).

The result lists what was matched (current pixels and reference points in the same order),
which reference features were not seen, and which detections were rejected and why, so the
servo can decide. Fewer than ``min_matched`` (default 4) matches is "not ok": three points
give several poses with the same image and singular configurations (Chaumette & Hutchinson,
IEEE RAM 13(4), 2006, sec. IV-A).
"""
from __future__ import annotations

import itertools
from dataclasses import dataclass, field
from typing import Any, Iterable, Mapping, Sequence, TYPE_CHECKING

import cv2
import numpy as np
from numpy.typing import ArrayLike
from scipy.optimize import linear_sum_assignment

from vservo_node.vision.image_io import delta_e_ab, linear_rgb_to_lab

if TYPE_CHECKING:
    from vservo_node.vision.camera import CameraModel
    from vservo_node.vision.features_base import Detection

MIN_MATCHED = 4


@dataclass
class MatchResult:
    """Matched features, in reference order.

    Attributes:
        points: (M, 2) current pixels.
        ref_points: (M, 2) the reference's coordinates of the same features (whatever the
            reference uses: taught pixels, or target metres).
        keys: M reference keys.
        detection_index: (M,) index of each match in the detection.
        missing: reference keys not matched.
        rejected: (detection key, reason) for detections left out: 'colour' (no reference
            colour within the gate), 'position' (too far from every prediction of a dot of
            its colour), 'unassigned' (another detection fitted better),
            'geometry' (off the homography of the others), 'not in reference'.
        quality: figures such as 'gain', 'delta_e' (M,), 'homography_rms_px', 'ambiguous'.
        min_matched: matches needed for ``ok``.
    """
    points: np.ndarray
    ref_points: np.ndarray
    keys: list[Any]
    detection_index: np.ndarray
    missing: list[Any]
    rejected: list[tuple[Any, str]]
    quality: dict[str, Any] = field(default_factory=dict)
    min_matched: int = MIN_MATCHED

    def __len__(self) -> int:
        return len(self.keys)

    @property
    def ok(self) -> bool:
        return len(self) >= self.min_matched

    @property
    def reason(self) -> str:
        """'' when ok, else why not."""
        if self.ok:
            return ""
        return (f"{len(self)} features matched, need {self.min_matched}; missing "
                f"{self.missing}")

    def as_dict(self) -> dict[Any, tuple[float, ...]]:
        """{key: (u, v)}: e.g. the ``predicted`` positions for the next frame's match."""
        return {k: tuple(p) for k, p in zip(self.keys, self.points)}


def assign(cost: ArrayLike, allowed: ArrayLike) -> tuple[np.ndarray, np.ndarray]:
    """Minimum-cost assignment among allowed pairs, with as many pairs as possible.

    Forbidden pairs cost more than any full set of allowed ones, so the Hungarian method
    first maximises the number of allowed pairs, then minimises their total cost.
    Returns (rows, cols) of the allowed pairs chosen.
    """
    costs = np.asarray(cost, dtype=float)
    ok = np.asarray(allowed, dtype=bool)
    if costs.size == 0:
        return np.zeros(0, int), np.zeros(0, int)
    big = (np.abs(costs[ok]).sum() + 1.0) * (min(costs.shape) + 1)
    rows, cols = linear_sum_assignment(np.where(ok, costs, big))
    keep = ok[rows, cols]
    return rows[keep], cols[keep]


def _result(detection: Detection, ref_keys: Sequence[Any], ref_points: ArrayLike,
            pairs_in: Iterable[tuple[int, int]], reasons: Mapping[int, str],
            quality: dict[str, Any], min_matched: int) -> MatchResult:
    pairs = sorted(pairs_in)
    idx_ref = np.array([r for r, _ in pairs], dtype=int)
    idx_det = np.array([d for _, d in pairs], dtype=int)
    ref_xy = np.asarray(ref_points, dtype=float).reshape(-1, 2)
    matched = set(idx_ref.tolist())
    used = set(idx_det.tolist())
    return MatchResult(
        points=detection.points[idx_det].reshape(-1, 2),
        ref_points=ref_xy[idx_ref] if len(ref_xy) else np.zeros((len(pairs), 2)),
        keys=[ref_keys[r] for r in idx_ref], detection_index=idx_det,
        missing=[k for r, k in enumerate(ref_keys) if r not in matched],
        rejected=[(detection.keys[j], reasons.get(j, "unassigned"))
                  for j in range(len(detection)) if j not in used],
        quality=quality, min_matched=min_matched)


def match_by_key(detection: Detection, ref_keys: Iterable[Iterable[Any]], ref_points: ArrayLike,
                 *, min_matched: int = MIN_MATCHED) -> MatchResult:
    """Markers and textured targets: features correspond by key."""
    where = {k: j for j, k in enumerate(detection.keys)}
    keys = [tuple(k) for k in ref_keys]
    pairs = [(r, where[k]) for r, k in enumerate(keys) if k in where]
    known = set(keys)
    reasons = {j: "not in reference" for j, k in enumerate(detection.keys) if k not in known}
    return _result(detection, keys, ref_points, pairs, reasons, {}, min_matched)


# ----------------------------------------------------------------------------- dots
def _colour_groups(ref_lab: np.ndarray, threshold: float) -> list[list[int]]:
    """Groups (lists of reference indices) whose colours chain within ``threshold``."""
    n = len(ref_lab)
    close = delta_e_ab(ref_lab[:, None], ref_lab[None]) < threshold
    group = list(range(n))
    for i, j in zip(*np.nonzero(close)):
        gi, gj = group[i], group[j]
        if gi != gj:
            group = [gi if g == gj else g for g in group]
    return [[i for i in range(n) if group[i] == g] for g in sorted(set(group))]


def _homography_fit(src: np.ndarray, dst: np.ndarray) -> tuple[float, bool] | None:
    """(rms px, orientation kept) of the least-squares homography src -> dst, or None."""
    H, _ = cv2.findHomography(src, dst, 0)
    if H is None:
        return None
    w = np.hstack([src, np.ones((len(src), 1))]) @ H[2]
    if np.any(w * w[0] <= 0):
        return None  # the plane would cross the line at infinity between points
    proj = cv2.perspectiveTransform(src.reshape(-1, 1, 2), H).reshape(-1, 2)
    rms = float(np.sqrt(np.mean(np.sum((proj - dst) ** 2, axis=1))))
    return rms, bool(np.linalg.det(H) * np.sign(w[0]) ** 3 > 0)


# Triples of a 4-point sample whose orientations OpenCV's homography RANSAC compares.
_TRIPLES = np.array([[0, 1, 2], [1, 2, 3], [0, 2, 3], [0, 1, 3]])
_FLT_EPSILON = float(np.finfo(np.float32).eps)
# The shortcut below decides only with this much room (a factor on OpenCV's collinearity
# tolerance, a fraction of its squared inlier threshold) and leaves closer calls to OpenCV.
_COLLINEAR_ROOM = 100.0
_INLIER_ROOM = 0.25
_SHORTCUT_MAX_POINTS = 6


def _subsets(n: int) -> tuple[np.ndarray, np.ndarray]:
    """(4-point subsets (S, 4), their triples (S, 4, 3)) of n points, cached."""
    if n not in _SUBSETS:
        subsets = np.array(list(itertools.combinations(range(n), 4)))
        _SUBSETS[n] = subsets, subsets[:, _TRIPLES]
    return _SUBSETS[n]


_SUBSETS: dict[int, tuple[np.ndarray, np.ndarray]] = {}


def ransac_keeps_all(src: np.ndarray, dst: np.ndarray, threshold_px: float) -> bool:
    """True only when ``cv2.findHomography(src, dst, cv2.RANSAC, threshold_px)`` is certain
    to keep every point, so the call (a few tenths of a millisecond) can be skipped.

    OpenCV's RANSAC (calib3d fundam.cpp / ptsetreg.cpp) draws 4-point samples, skips those
    with (nearly) collinear points or inconsistent triangle orientations between the two
    sets, fits the sample's exact homography and counts points whose squared reprojection
    error is within ``threshold_px**2``; the first model that keeps every point ends the
    search with an all-inlier mask. So if every 4-point subset OpenCV could accept keeps
    every point, and at least one subset is acceptable, the mask is all ones whatever the
    random draws. This checks that for up to ``_SHORTCUT_MAX_POINTS`` points, on the float32
    coordinates OpenCV uses, with room on each test so rounding cannot flip it; otherwise
    (an outlier, a close call, many points) it says False and the caller asks OpenCV.

    A sample's homography carries a point through its coordinates in the projective basis
    of the sample (first three points scaled so that they sum to the fourth): the point
    with those coordinates in the other image is where the homography maps it.
    """
    n = len(src)
    if n < 5 or n > _SHORTCUT_MAX_POINTS or len(dst) != n:
        return False
    subsets, triples = _subsets(n)
    pts = np.empty((2, n, 3))
    pts[0, :, :2], pts[1, :, :2] = src, dst
    pts[..., :2] = pts[..., :2].astype(np.float32)    # what OpenCV computes with
    pts[..., 2] = 1.0
    # signed doubled areas of every triple of every subset, in both images
    area = np.linalg.det(pts[:, triples])                              # (2, S, 4)
    # OpenCV calls a triple collinear when |area| <= FLT_EPSILON times a sum of coordinate
    # differences; 4 x the bounding box's width + height bounds that sum
    extent = 4.0 * np.ptp(pts[..., :2], axis=1).sum(axis=1)            # (2,)
    if np.any(np.abs(area) <= _COLLINEAR_ROOM * _FLT_EPSILON * extent[:, None, None]):
        return False  # a near-collinear triple: too close to call
    negative = np.count_nonzero(area[0] * area[1] < 0, axis=1)
    accepted = (negative == 0) | (negative == 4)
    if not accepted.any():
        return False
    S = subsets[accepted]
    basis = pts[:, S[:, :3]].swapaxes(-1, -2)                          # (2, S', 3, 3)
    scale = np.linalg.solve(basis, pts[:, S[:, 3], :, None])[..., 0]   # (2, S', 3)
    coords = np.linalg.solve(basis[0], pts[0].T[None].repeat(len(S), 0))  # (S', 3, n)
    mapped = basis[1] @ (scale[1, :, :, None] / scale[0, :, :, None] * coords)
    w = mapped[:, 2]
    if np.any(np.abs(w) < 1e-9 * np.abs(mapped).max()):
        return False
    err = ((mapped[:, :2] / w[:, None] - pts[1, :, :2].T) ** 2).sum(axis=1)   # (S', n)
    return bool(np.all(err <= _INLIER_ROOM * threshold_px ** 2))


def _disambiguate(pairs: list[tuple[int, int]], groups: list[list[int]], allowed: np.ndarray,
                  points: np.ndarray, ref_points: np.ndarray, geometry_px: float,
                  max_trials: float) -> tuple[list[tuple[int, int]], dict[str, Any]]:
    """Try the assignments within repeated-colour groups; keep the best homography fit."""
    fixed = [(r, d) for r, d in pairs if not any(r in g for g in groups)]
    options: list[list[tuple[tuple[int, int], ...]]] = []
    for g in groups:
        candidates = [d for d in range(allowed.shape[1]) if allowed[g, d].any()]
        pool: list[int | None] = [*candidates] + [None] * max(0, len(g) - len(candidates))
        parts = {tuple((r, d) for r, d in zip(g, perm) if d is not None and allowed[r, d])
                 for perm in itertools.permutations(pool, len(g))}
        options.append(sorted(parts))
    if np.prod([len(o) for o in options], dtype=float) > max_trials:
        return pairs, {"ambiguous": True, "candidates": None}
    fits: list[tuple[float, int, list[tuple[int, int]]]] = []
    for combo in itertools.product(*options):
        trial = fixed + [pair for part in combo for pair in part]
        if len({d for _, d in trial}) < len(trial) or len(trial) < 4:
            continue
        r, d = map(list, zip(*trial))
        fit = _homography_fit(ref_points[r], points[d])
        if fit is not None and fit[1]:
            fits.append((fit[0], -len(trial), trial))
    if not fits:
        return pairs, {"ambiguous": True, "candidates": 0}
    fits.sort(key=lambda f: (f[1], f[0]))
    good = [f for f in fits if f[1] == fits[0][1] and f[0] <= geometry_px]
    return fits[0][2], {"ambiguous": len(good) > 1, "candidates": len(good)}


# Exposure gains tried, linear light: 0.25 .. 4 in steps of 4.4 % (about 1 Delta E in L*).
_GAINS = np.geomspace(0.25, 4.0, 65)


def _exposure_gain(ref_lab: np.ndarray, colours_linear: np.ndarray, extra: np.ndarray,
                   gate: np.ndarray, max_delta_e: float) -> float:
    """The gain on measured colours that lets most reference dots find a colour within the
    gate, and among those the smallest sum of each dot's best cost (then the nearest to 1)."""
    lab = linear_rgb_to_lab(_GAINS[:, None, None] * colours_linear[None])
    de = delta_e_ab(ref_lab[None, :, None], lab[:, None])     # gains x refs x detections
    cost = np.where(gate & (de <= max_delta_e), de + extra, np.inf).min(axis=2)
    found = np.isfinite(cost)
    order = np.lexsort((np.abs(np.log(_GAINS)), np.where(found, cost, 0.0).sum(axis=1),
                        -found.sum(axis=1)))  # ties: the gain nearest 1
    return float(_GAINS[order[0]])


def match_dots(detection: Detection, ref_keys: Iterable[Iterable[Any]], ref_lab: ArrayLike,
               ref_points: ArrayLike | None = None,
               predicted: Mapping[Any, ArrayLike] | None = None, *,
               max_delta_e: float = 30.0, max_jump_px: float = 40.0, px_weight: float = 1.0,
               compensate_exposure: bool = True, ambiguity_delta_e: float = 15.0,
               geometry_px: float = 3.0, max_trials: float = 5000,
               min_matched: int = MIN_MATCHED, fit_rms: bool = True,
               camera: CameraModel | None = None,
               ref_geometry: ArrayLike | None = None) -> MatchResult:
    """Match detected blobs to reference dots by colour, and by geometry where needed.

    Args:
        detection: a dots Detection (points and colours_linear).
        ref_keys, ref_lab: the reference dots' keys and CIELAB colours (N, 3).
        ref_points: the reference dots' coordinates (N, 2) on the plane or in the taught image,
            for repeated colours and outlier rejection; None skips both.
        predicted: {reference key: (u, v)} expected current pixels (e.g. the previous frame's
            ``MatchResult.as_dict()``); predicted dots only match within ``max_jump_px`` and
            pay ``px_weight`` Delta E units per pixel away.
        max_delta_e: colour gate (Delta E*ab, after exposure compensation).
        compensate_exposure: fit one gain in linear light (0.25 .. 4) before the colour gate.
        ambiguity_delta_e: reference colours closer than this count as the same colour.
        geometry_px: homography residual allowed, current-image pixels (divided by the focal
            length fx when ``camera`` is given).
        fit_rms: fit the least-squares homography of the matches for the quality figure
            ``homography_rms_px`` (a diagnostic; False leaves it NaN and saves ~0.2 ms for
            callers that never read it, such as ``Perception``).
        camera: the current image's CameraModel; with it the geometric checks (repeated
            colours, outliers, the diagnostic fit) use the detections' undistorted normalized
            coordinates, so a lens's distortion is not taken for a misfit.
        ref_geometry: (N, 2) the reference dots' coordinates for the geometric checks, in
            the same order as ``ref_keys``: positions on the target plane (any units) or
            undistorted normalized coordinates of the taught view; default ``ref_points``.
            With ``camera`` it must not be distorted pixels.
    The default thresholds are common practice, no source.
    """
    keys = [tuple(k) for k in ref_keys]
    lab_ref = np.asarray(ref_lab, dtype=float).reshape(-1, 3)
    n_ref, n_det = len(keys), len(detection)
    ref_xy = None if ref_points is None else np.asarray(ref_points, float).reshape(-1, 2)
    quality: dict[str, Any] = {"gain": 1.0, "ambiguous": False, "homography_rms_px": float("nan")}
    # the geometric checks' coordinates: reference (plane or normalized) and detections
    # (normalized when the camera is known); px_per_unit turns their residuals into pixels
    geo_ref = ref_xy if ref_geometry is None else (
        np.asarray(ref_geometry, float).reshape(-1, 2))
    if geo_ref is not None and len(geo_ref) != n_ref:
        raise ValueError(f"ref_geometry has {len(geo_ref)} points for {n_ref} reference dots")
    px_per_unit = 1.0 if camera is None else float(camera.intrinsics[0, 0])
    geo_threshold = geometry_px / px_per_unit
    if n_det == 0 or n_ref == 0:
        return _result(detection, keys, ref_xy if ref_xy is not None else [], [],
                       {}, quality, min_matched)

    extra = np.zeros((n_ref, n_det))
    gate = np.ones((n_ref, n_det), dtype=bool)
    has_prediction = np.zeros(n_ref, dtype=bool)
    for r, key in enumerate(keys):
        if predicted and key in predicted:
            dist = np.linalg.norm(detection.points - np.asarray(predicted[key], float), axis=1)
            extra[r], gate[r], has_prediction[r] = px_weight * dist, dist <= max_jump_px, True

    colours = detection.colours_linear
    assert colours is not None   # a dots detection measures its blobs' colours
    gain = _exposure_gain(lab_ref, colours, extra, gate,
                          max_delta_e) if compensate_exposure else 1.0
    de = delta_e_ab(lab_ref[:, None], linear_rgb_to_lab(colours * gain)[None])
    allowed = gate & (de <= max_delta_e)
    rows, cols = assign(de + extra, allowed)
    quality["gain"] = gain
    pairs = list(zip(rows.tolist(), cols.tolist()))
    reasons = {j: "colour" if not (de[:, j] <= max_delta_e).any() else "position"
               for j in range(n_det) if not allowed[:, j].any()}

    if geo_ref is not None:
        geo_det = (detection.points if camera is None
                   else camera.pixels_to_normalized(detection.points))
        groups = [g for g in _colour_groups(lab_ref, ambiguity_delta_e)
                  if len(g) > 1 and not has_prediction[g].all()]
        if groups:
            pairs, info = _disambiguate(pairs, groups, allowed, geo_det, geo_ref,
                                        geo_threshold, max_trials)
            quality.update(info)
        if len(pairs) >= 5:
            ri, di = map(np.array, zip(*pairs))
            inl = None
            if not ransac_keeps_all(geo_ref[ri], geo_det[di], geo_threshold):
                _, inl = cv2.findHomography(geo_ref[ri], geo_det[di], cv2.RANSAC, geo_threshold)
            if inl is not None:
                keep = inl.ravel().astype(bool)
                reasons.update({int(j): "geometry" for j in di[~keep]})
                pairs = [p for p, k in zip(pairs, keep) if k]
        if fit_rms and len(pairs) >= 4:
            rl, dl = map(list, zip(*pairs))
            fit = _homography_fit(geo_ref[rl], geo_det[dl])
            if fit is not None:
                quality["homography_rms_px"] = fit[0] * px_per_unit
    quality["delta_e"] = np.array([de[r, d] for r, d in sorted(pairs)])
    return _result(detection, keys, ref_xy if ref_xy is not None else [], pairs,
                   reasons, quality, min_matched)
