"""Detectors for the three target kinds, and a tracker that searches windows between frames.

All detectors take an image from ``image_io.to_bgr_or_mono`` (BGR uint8, mono uint8, or mono
uint16 where noted) and return a ``Detection``: pixel points (N, 2) in OpenCV's convention
(u right, v down, origin at the centre of the top-left pixel) with one hashable key each.

- ``DotDetector``: segmentation (chroma, dark or bright score), connected components, and the
  sub-pixel centroid of each blob from grey-level image moments (weights = score above the
  local background, so partially covered edge pixels count by their coverage); area,
  roundness and ellipse-fill gates; the blob's mean colour, averaged in linear light. Keys are
  ``('blob', j)``: which dot a blob is, is decided by ``matching.match_dots``.
- ``MarkerDetector``: cv2.aruco.ArucoDetector (AprilTag 36h11 and the ArUco dictionaries) with
  sub-pixel corner refinement; keys ``('tag', id, corner)``. Accepts mono16.
- ``TexturedDetector``: ORB keypoints and descriptors (Rublee et al., ICCV 2011) matched to a
  ``PlanarModel`` (the taught view or the target's texture) with Lowe's ratio test (Lowe,
  IJCV 60(2), 2004, sec. 7.1), a homography by RANSAC (Fischler & Bolles 1981) carrying the
  model's servo points into the image; keys ``('pt', i)``; the inlier ratio is its quality.

``Tracker`` wraps any of them: after a full-frame detection it searches windows around the
positions predicted from the last two frames and falls back to the full frame when a feature
it had is missing.
"""
from __future__ import annotations

import math
import time
from dataclasses import dataclass, field

import cv2
import numpy as np

from vservo_node.vision.image_io import SRGB8_TO_LINEAR, linear_rgb_to_lab, to_mono8
from vservo_node.vision.targets import Target, render_target_texture


@dataclass
class Detection:
    """Features found in one image.

    Attributes:
        kind: 'dots', 'markers' or 'textured'.
        points: (N, 2) pixel coordinates, float64.
        keys: N hashable identities, e.g. ('blob', 2), ('tag', 17, 0), ('pt', 3).
        image_size: (width, height) of the image, pixels.
        colours_linear: dots only: (N, 3) mean colour, linear-light sRGB (R, G, B) in [0, 1].
        quality: figures per feature (arrays of N) or per image (scalars), by kind.
        timings: milliseconds spent, by stage.
        windowed: found by a window search rather than over the full frame.
        homography: textured only: 3x3 map from model coordinates to pixels.
    """
    kind: str
    points: np.ndarray
    keys: list
    image_size: tuple
    colours_linear: np.ndarray | None = None
    quality: dict = field(default_factory=dict)
    timings: dict = field(default_factory=dict)
    windowed: bool = False
    homography: np.ndarray | None = None

    def __len__(self):
        return len(self.keys)

    @property
    def colours_lab(self) -> np.ndarray | None:
        """Dots: (N, 3) CIELAB (D65) of the measured colours."""
        return None if self.colours_linear is None else linear_rgb_to_lab(self.colours_linear)


def _colour_image(image, allow16=False):
    if image.dtype == np.uint16 and image.ndim == 2:
        if allow16:
            return image
        raise ValueError("mono16 images are accepted by the marker detector only; convert "
                         "to 8 bits or use an 8-bit encoding")
    if image.dtype != np.uint8 or not (image.ndim == 2 or (image.ndim == 3
                                                            and image.shape[2] == 3)):
        raise ValueError(f"expected a BGR uint8 (H, W, 3) or mono (H, W) image, got "
                         f"{image.dtype} {image.shape}")
    return image


def _size(image):
    return (image.shape[1], image.shape[0])


def _window(image, rect, min_side=4):
    """(view, x0, y0) of ``image`` inside rect (x0, y0, x1, y1) clipped to the image, or None
    if less than ``min_side`` pixels of it lie in the image."""
    h, w = image.shape[:2]
    x0, y0 = max(0, int(rect[0])), max(0, int(rect[1]))
    x1, y1 = min(w, int(np.ceil(rect[2]))), min(h, int(np.ceil(rect[3])))
    if x1 - x0 < min_side or y1 - y0 < min_side:
        return None
    return image[y0:y1, x0:x1], x0, y0


def _search_area(grey, windows):
    """(view, x0, y0): the full image, or its part inside the single window given; None
    when the window lies outside the image."""
    return (grey, 0, 0) if windows is None else _window(grey, windows[0][1], min_side=16)


# ============================================================================ dots
class DotDetector:
    """Coloured (or dark / bright) discs of a dot target.

    Args:
        target: a ``dots`` Target (segmentation mode and threshold come from it).
        min_area_px: smallest blob area accepted, pixels.
        max_area_fraction: largest blob area accepted, as a fraction of the image area.
        min_roundness: smallest minor/major axis ratio of the blob's ellipse (0.3 accepts a
            disc seen at up to ~72 deg tilt).
        fill_range: accepted blob area / area of its moment ellipse (1 for an ellipse).
        window_scale: window half-size in dot radii when tracking.
    The gate values are common practice, no source.
    """
    kind = "dots"
    CHROMA_THRESHOLD = 50.0  # chroma max(R,G,B)-min(R,G,B) on 0..255; common practice, no source

    def __init__(self, target: Target, *, min_area_px=12.0, max_area_fraction=0.05,
                 min_roundness=0.3, fill_range=(0.8, 1.2), window_scale=2.5):
        if target.kind != "dots":
            raise ValueError(f"DotDetector needs a dots target, got {target.kind!r}")
        self.mode = target.segmentation
        self.threshold = target.threshold
        if self.threshold is None and self.mode == "chroma":
            self.threshold = self.CHROMA_THRESHOLD
        self.expected = len(target.dots)
        self.min_area_px = min_area_px
        self.max_area_fraction = max_area_fraction
        self.min_roundness = min_roundness
        self.fill_range = fill_range
        self.window_scale = window_scale
        self._auto_threshold = None  # Otsu's threshold of the last full frame ('auto' mode)

    # ---------------------------------------------------------------- segmentation
    def score(self, image: np.ndarray) -> np.ndarray:
        """uint8 image, high where a dot is: chroma, inverted grey (dark) or grey (bright)."""
        # numpy rather than cv2 here: as fast on full frames, and without cv2's per-call
        # overhead on the small windows of tracking (benchmarks/detect_bench.py)
        if self.mode == "chroma":
            if image.ndim != 3:
                raise ValueError("chroma segmentation needs a colour image, got a mono one; "
                                 "set segmentation mode 'dark' or 'bright' for mono cameras")
            b, g, r = image[..., 0], image[..., 1], image[..., 2]
            return np.maximum(np.maximum(b, g), r) - np.minimum(np.minimum(b, g), r)
        grey = image if image.ndim == 2 else cv2.cvtColor(image, cv2.COLOR_BGR2GRAY)
        return 255 - grey if self.mode == "dark" else grey

    def _mask(self, score, full_frame):
        threshold = self.threshold
        if threshold is None:
            if full_frame or self._auto_threshold is None:
                t = cv2.threshold(score, 0, 255, cv2.THRESH_BINARY | cv2.THRESH_OTSU)[0]
                if full_frame:
                    self._auto_threshold = t
                threshold = t
            else:
                threshold = self._auto_threshold
        return (score > threshold).view(np.uint8)

    # ---------------------------------------------------------------- measurement
    def _measure(self, image, score, labels, stats, i, max_area):
        """Centroid, colour and shape of component i; (None, reason) if a gate refuses it."""
        x, y, w, h, area = stats[i].tolist()  # Python ints: numpy scalars are slow here
        H, W = labels.shape
        if area < self.min_area_px or area > max_area:
            return None, "area"
        if x == 0 or y == 0 or x + w == W or y + h == H:
            return None, "border"
        x0, y0 = max(x - 2, 0), max(y - 2, 0)
        x1, y1 = min(x + w + 2, W), min(y + h + 2, H)
        lab = labels[y0:y1, x0:x1]
        s = score[y0:y1, x0:x1].astype(np.float32)
        own, background = lab == i, lab == 0
        n_background = np.count_nonzero(background)
        weights = s - (s[background].sum() / n_background if n_background else 0.0)
        weights[~(own | background) | (weights < 0)] = 0.0
        # grey-level moments up to order 2 (numpy: cv2.moments costs ~0.2 ms a call here)
        col, row = weights.sum(axis=0), weights.sum(axis=1)
        m00 = col.sum()
        if m00 <= 0:
            return None, "area"
        cols, rows = np.arange(x1 - x0), np.arange(y1 - y0)
        dx = cols - col @ cols / m00
        dy = rows - row @ rows / m00
        # the second moments as Python floats: the scalar arithmetic below is then cheap
        a, c = float(col @ (dx * dx) / m00), float(row @ (dy * dy) / m00)
        b = float(dy @ weights @ dx / m00)
        root = float(np.hypot((a - c) / 2, b))
        major = math.sqrt((a + c) / 2 + root)
        minor = math.sqrt(max((a + c) / 2 - root, 0.0))
        if major <= 0 or minor / major < self.min_roundness:
            return None, "roundness"
        fill = area / (4 * math.pi * minor * major)  # ellipse semi-axes are 2 sqrt(eigenvalue)
        if not self.fill_range[0] <= fill <= self.fill_range[1]:
            return None, "fill"
        interior = own & (weights >= 0.8 * weights.max())
        texels = SRGB8_TO_LINEAR[image[y0:y1, x0:x1][interior]]
        linear = texels.sum(axis=0) / len(texels)  # = mean(axis=0), without its overhead
        colour = linear[::-1] if image.ndim == 3 else np.repeat(linear, 3)
        centre = (x0 - dx[0], y0 - dy[0])
        return (centre, colour, float(area), math.sqrt(area / math.pi),
                minor / major, fill), None

    def _components(self, image, full_frame):
        score = self.score(image)
        n, labels, stats, _ = cv2.connectedComponentsWithStats(
            self._mask(score, full_frame), connectivity=8, ltype=cv2.CV_32S)
        return score, n, labels, stats

    # ---------------------------------------------------------------- detection
    def detect(self, image: np.ndarray, windows=None) -> Detection:
        """Blobs in the full image, or at most one per ``(key, (x0, y0, x1, y1))`` window."""
        t0 = time.perf_counter()
        image = _colour_image(image)
        max_area = self.max_area_fraction * image.shape[0] * image.shape[1]
        found, rejected = [], {}
        if windows is None:
            score, n, labels, stats = self._components(image, True)
            for i in range(1, n):
                blob, why = self._measure(image, score, labels, stats, i, max_area)
                if blob is None:
                    rejected[why] = rejected.get(why, 0) + 1
                else:
                    found.append((("blob", len(found)),) + blob)
        else:
            for key, rect in windows:
                view = _window(image, rect)
                if view is None:
                    rejected["window"] = rejected.get("window", 0) + 1
                    continue
                sub, x0, y0 = view
                score, n, labels, stats = self._components(sub, False)
                centre = np.array([(rect[0] + rect[2] - 1) / 2 - x0,
                                   (rect[1] + rect[3] - 1) / 2 - y0])
                best = None
                for i in range(1, n):
                    blob, _ = self._measure(sub, score, labels, stats, i, max_area)
                    if blob is not None:
                        d = np.hypot(*(np.asarray(blob[0]) - centre))
                        if best is None or d < best[0]:
                            best = (d, blob)
                if best is None:
                    rejected["window"] = rejected.get("window", 0) + 1
                    continue
                (u, v), *rest = best[1]
                found.append((key, (u + x0, v + y0), *rest))
        keys = [f[0] for f in found]
        cols = list(zip(*[f[1:] for f in found])) or [()] * 6
        points = np.array(cols[0], dtype=float).reshape(-1, 2)
        quality = {"area_px": np.array(cols[2]), "radius_px": np.array(cols[3]),
                   "roundness": np.array(cols[4]), "fill": np.array(cols[5]),
                   "rejected": rejected}
        return Detection("dots", points, keys, _size(image),
                         colours_linear=np.array(cols[1], dtype=float).reshape(-1, 3),
                         quality=quality, windowed=windows is not None,
                         timings={"detect_ms": 1e3 * (time.perf_counter() - t0)})

    def windows(self, last: Detection, predicted: np.ndarray) -> list:
        """One window per blob of ``last``, centred on its predicted position."""
        moved = np.hypot(*(predicted - last.points).T)
        half = np.maximum(self.window_scale * last.quality["radius_px"] + moved, 8.0)
        return [(k, (u - r, v - r, u + r + 1, v + r + 1))
                for k, (u, v), r in zip(last.keys, predicted, half)]


# ============================================================================ markers
class MarkerDetector:
    """Square fiducials of a marker target, corners refined to sub-pixel.

    Markers whose ids are not on the target are ignored (counted in quality['foreign_ids']).
    ``margin`` is the window margin when tracking, as a fraction of the markers' extent.
    """
    kind = "markers"

    def __init__(self, target: Target, *, margin=0.3):
        if target.kind != "markers":
            raise ValueError(f"MarkerDetector needs a markers target, got {target.kind!r}")
        params = cv2.aruco.DetectorParameters()
        params.cornerRefinementMethod = cv2.aruco.CORNER_REFINE_NONE  # refine_quad does it
        dictionary = target.aruco_dictionary()
        self._aruco = cv2.aruco.ArucoDetector(dictionary, params)
        self.cells = dictionary.markerSize + 2  # data bits plus the black border, per side
        self.ids = [m.id for m in target.markers]
        self.expected = 4 * len(self.ids)
        self.margin = margin
        # each marker's cells (border included) as 0 (black) / 1 (white), row by row, for
        # checking a tracked quad without running the detector (``_cells_match``)
        self._cells = {i: cv2.aruco.generateImageMarker(dictionary, i, self.cells, borderBits=1)
                       > 127 for i in self.ids}
        c = np.arange(self.cells) + 0.5
        self._cell_centres = np.stack(np.meshgrid(c, c), axis=-1).reshape(-1, 1, 2)

    # Window search: a marker larger than this many pixels a side is looked for in its window
    # shrunk to about this size (the quad search costs by area; ~6 px per cell of a 6x6 tag
    # still decodes), then its corners are refined on the full-resolution pixels. Common
    # practice, no source.
    WINDOW_SIDE_PX = 48.0
    # A tracked quad refined from its predicted corners is fitted again from the result while
    # a corner moved by more than REFIT_PX (the edge profiles reach only +-1.5..4 px across
    # the edges they start from), at most MAX_FITS times, and kept only when the last fit
    # moved no corner further than that. Common practice, no source.
    REFIT_PX = 0.5
    MAX_FITS = 3

    def detect(self, image: np.ndarray, windows=None) -> Detection:
        """Markers in the full image, or one per window ``(marker_id, (x0, y0, x1, y1)[,
        predicted corners (4, 2)])``: the marker of that id inside its window (``marker_id``
        None: any of the target's). With predicted corners they are refined directly and
        checked by reading the marker's cells; the detector runs in the window only when
        that fails."""
        t0 = time.perf_counter()
        image = _colour_image(image, allow16=True)
        found = []          # (id, corners (4, 2) in image pixels)
        ids_seen = []
        if windows is None:
            grey = to_mono8(image)
            corners, ids, _ = self._aruco.detectMarkers(grey)
            ids = [] if ids is None else ids.ravel().tolist()
            ids_seen += ids
            for marker_id, quad in zip(ids, corners):
                found.append((marker_id, grey, quad.reshape(4, 2), 0, 0))
        else:
            for want, rect, *guess in windows:
                view = _window(image, rect, min_side=16)
                if view is None:
                    continue
                sub, x0, y0 = view
                grey = to_mono8(sub)       # only the window's pixels are converted
                if guess and want is not None:
                    # the predicted corners refined directly, kept when all four edges fit and
                    # the cells read the marker's id; else the detector runs in the window
                    quad = guess[0] - (x0, y0)
                    refined, n_fit = refine_quad(grey, quad, self.cells, return_found=True)
                    moved, fits = np.abs(refined - quad).max(), 1
                    while n_fit == 4 and moved > self.REFIT_PX and fits < self.MAX_FITS:
                        # far from the prediction: the profiles were off-centre; fit again
                        again, n_fit = refine_quad(grey, refined, self.cells, return_found=True)
                        moved, refined, fits = np.abs(again - refined).max(), again, fits + 1
                    if (n_fit == 4 and moved <= self.REFIT_PX
                            and self._cells_match(grey, refined, want)):
                        found.append((want, None, refined + (x0, y0), 0, 0))
                        continue
                side = max(sub.shape[0], sub.shape[1]) / (1.0 + 2.0 * self.margin)
                scale = min(1.0, self.WINDOW_SIDE_PX / max(side, 1.0))
                small = grey if scale >= 1.0 else cv2.resize(
                    grey, None, fx=scale, fy=scale, interpolation=cv2.INTER_AREA)
                corners, ids, _ = self._aruco.detectMarkers(small)
                ids = [] if ids is None else ids.ravel().tolist()
                ids_seen += ids
                for marker_id, quad in zip(ids, corners):
                    if want is None or marker_id == want:
                        # pixel centres: u_full = (u_small + 0.5) / scale - 0.5
                        quad = (quad.reshape(4, 2) + 0.5) / scale - 0.5
                        found.append((marker_id, grey, quad, x0, y0))
        seen, keys, points = set(), [], []
        for marker_id, grey, quad, x0, y0 in found:
            if marker_id in self.ids and marker_id not in seen:
                seen.add(marker_id)
                keys += [("tag", marker_id, c) for c in range(4)]
                points.append(quad if grey is None else
                              refine_quad(grey, quad, self.cells) + (x0, y0))
        return Detection("markers", np.array(points, dtype=float).reshape(-1, 2), keys,
                         _size(image), windowed=windows is not None,
                         quality={"marker_ids": sorted(seen),
                                  "foreign_ids": sorted(set(ids_seen) - set(self.ids)),
                                  "duplicate_ids": sorted({i for i in ids_seen
                                                           if ids_seen.count(i) > 1})},
                         timings={"detect_ms": 1e3 * (time.perf_counter() - t0)})

    def windows(self, last: Detection, predicted: np.ndarray) -> list:
        """One window per marker of ``last`` around its predicted corners, grown by ``margin``
        of the marker's extent and 8 px (the detector needs a quiet zone inside the window)."""
        out = []
        for j in range(0, len(last.keys), 4):
            quad = predicted[j:j + 4]
            lo, hi = quad.min(axis=0), quad.max(axis=0)
            grow = self.margin * (hi - lo).max() + 8.0
            out.append((last.keys[j][1],
                        (lo[0] - grow, lo[1] - grow, hi[0] + grow + 1, hi[1] + grow + 1),
                        quad))
        return out

    def _cells_match(self, grey, quad, marker_id, max_wrong=1) -> bool:
        """Do the cells inside ``quad`` (corners in the detector's order) read marker
        ``marker_id``? Cell centres sampled through the quad's homography, split at the mean
        grey; at most ``max_wrong`` cells may disagree (common practice, no source)."""
        side = float(self.cells)
        square = np.array([[0, 0], [side, 0], [side, side], [0, side]], np.float32)
        H = cv2.getPerspectiveTransform(square, quad.astype(np.float32))
        uv = cv2.perspectiveTransform(self._cell_centres, H).reshape(self.cells, self.cells, 2)
        grey_at = cv2.remap(grey, uv[..., 0].astype(np.float32), uv[..., 1].astype(np.float32),
                            cv2.INTER_LINEAR, borderMode=cv2.BORDER_REPLICATE).astype(float)
        if grey_at.max() - grey_at.min() < 20.0:
            return False
        wrong = np.count_nonzero((grey_at > grey_at.mean()) != self._cells[marker_id])
        return wrong <= max_wrong


MAX_PROFILES = 32   # per edge; common practice, no source
_POPCOUNT = np.array([bin(i).count("1") for i in range(256)], dtype=np.uint8)


def _bit_count(words: np.ndarray) -> np.ndarray:
    """Set bits of each uint64 (NumPy >= 2.0's bitwise_count, else a byte table)."""
    if hasattr(np, "bitwise_count"):
        return np.bitwise_count(words)
    return _POPCOUNT[words.view(np.uint8)].reshape(*words.shape, 8).sum(axis=-1)


def _edge_lines(grey, quad, cell_px):
    """Sub-pixel lines (normals (4, 2), offsets (4,): n.x = d; NaN where not found) of the four
    dark-to-light edges of ``quad`` (edge i from corner i to corner i + 1), all four at once.

    Profiles across each edge are read by bilinear interpolation (one ``cv2.remap`` for the
    four); on each, the edge is where the intensity crosses the mean of its dark and light
    ends (the midpoint of a symmetric blur); a total-least-squares line is fitted to those
    points per edge. An edge too short or faint (fewer than 3 profiles with 20 grey levels of
    contrast) gives NaN.
    """
    a, b = quad, np.roll(quad, -1, axis=0)
    length = np.hypot(*(b - a).T)                                   # (4,)
    d = (b - a) / length[:, None]
    n = np.column_stack([d[:, 1], -d[:, 0]])
    centre = quad.mean(axis=0)
    flip = np.einsum("ij,ij->i", n, (a + b) / 2 - centre) < 0
    n[flip] = -n[flip]                         # outward: towards the white quiet zone
    half = float(np.clip(0.45 * cell_px, 1.5, 4.0))
    end = np.maximum(0.12 * length, 1.5 * half)
    usable = length - 2 * end
    # one profile per 1.5 px of edge, at most MAX_PROFILES (a line from 32 edge points is
    # as good as the sub-pixel crossings allow; longer edges only cost time)
    count = min(MAX_PROFILES, max(4, int(usable.max() / 1.5)))
    t = np.linspace(0.0, 1.0, count)
    along = end[:, None] + t[None, :] * np.maximum(usable, 0.0)[:, None]     # (4, K)
    across = np.arange(-half, half + 1e-9, 0.25)                              # (A,)
    pts = (a[:, None, None, :] + along[:, :, None, None] * d[:, None, None, :]
           + across[None, None, :, None] * n[:, None, None, :]).astype(np.float32)
    k, m = count, len(across)
    prof = cv2.remap(grey, pts[..., 0].reshape(4 * k, m), pts[..., 1].reshape(4 * k, m),
                     cv2.INTER_LINEAR, borderMode=cv2.BORDER_REPLICATE).astype(float)
    dark, light = prof[:, :2].mean(axis=1), prof[:, -2:].mean(axis=1)
    ok = light - dark > 20.0
    mid = (dark + light) / 2
    j = np.argmax(prof >= mid[:, None], axis=1)
    ok &= j > 0
    j = np.maximum(j, 1)
    rows = np.arange(4 * k)
    p0, p1 = prof[rows, j - 1], prof[rows, j]
    off = across[j - 1] + (mid - p0) / np.maximum(p1 - p0, 1e-9) * (across[1] - across[0])
    ok = ok.reshape(4, k) & (usable[:, None] >= 3)
    edge = (a[:, None, :] + along[:, :, None] * d[:, None, :]
            + off.reshape(4, k)[:, :, None] * n[:, None, :])               # (4, K, 2)
    w = ok.astype(float)
    cnt = w.sum(axis=1)
    c = (edge * w[:, :, None]).sum(axis=1) / np.maximum(cnt, 1)[:, None]
    r = (edge - c[:, None, :]) * w[:, :, None]
    sxx, syy = (r[..., 0] ** 2).sum(axis=1), (r[..., 1] ** 2).sum(axis=1)
    sxy = (r[..., 0] * r[..., 1]).sum(axis=1)
    # normal of the TLS line: eigenvector of the smaller eigenvalue of [[sxx, sxy], [sxy, syy]]
    theta = 0.5 * np.arctan2(2 * sxy, sxx - syy)             # direction of the line
    normal = np.column_stack([-np.sin(theta), np.cos(theta)])
    offset = np.einsum("ij,ij->i", normal, c)
    bad = cnt < 3
    normal[bad], offset[bad] = np.nan, np.nan
    return normal, offset


def refine_quad(grey: np.ndarray, quad: np.ndarray, cells: int,
                return_found: bool = False):
    """Corners (4, 2) of a marker's outer black square, refined by fitting its four edges
    with sub-pixel edge points and intersecting adjacent lines; corners whose edges cannot be
    fitted keep the given estimate. ``cells``: marker side in cells (bits + border).
    ``return_found``: also return how many corners were refined (0..4)."""
    quad = np.asarray(quad, dtype=float)
    cell_px = np.mean(np.hypot(*(np.roll(quad, -1, axis=0) - quad).T)) / cells
    normal, offset = _edge_lines(grey, quad, cell_px)
    out = quad.copy()
    found = 0
    nl, dl = normal.tolist(), offset.tolist()     # 2x2 solves by Cramer's rule, in floats
    for i in range(4):
        (a, b), (c, e) = nl[i - 1], nl[i]
        det = a * e - b * c
        if math.isfinite(det) and abs(det) > 1e-3:
            out[i] = ((dl[i - 1] * e - b * dl[i]) / det, (a * dl[i] - c * dl[i - 1]) / det)
            found += 1
    return (out, found) if return_found else out


# ============================================================================ textured
@dataclass
class PlanarModel:
    """Keypoints of a flat target and its servo points, in one set of plane coordinates.

    Coordinates are pixels of the taught view, or target metres for a model built from the
    target's texture; the textured detector maps them into an image by a homography.
    """
    keypoints: np.ndarray    # (K, 2)
    descriptors: np.ndarray  # (K, 32) uint8, ORB
    points: np.ndarray       # (P, 2) servo points
    keys: list               # P keys


def _orb(n_features):
    return cv2.ORB_create(nfeatures=n_features, scaleFactor=1.2, nlevels=8, fastThreshold=20)


def model_from_image(image: np.ndarray, points, keys, to_model=None,
                     n_features=2000) -> PlanarModel:
    """PlanarModel of an image of the target: ORB keypoints of ``image``, mapped by the 3x3
    ``to_model`` (default identity: model coordinates are this image's pixels)."""
    grey = to_mono8(_colour_image(image))
    kps, des = _orb(n_features).detectAndCompute(grey, None)
    if des is None or len(kps) < 4:
        raise ValueError(f"the image holds too few keypoints ({len(kps)}) for a textured model")
    xy = np.array([k.pt for k in kps], dtype=float)
    if to_model is not None:
        xy = cv2.perspectiveTransform(xy.reshape(-1, 1, 2), np.asarray(to_model, float))
        xy = xy.reshape(-1, 2)
    return PlanarModel(xy, des, np.asarray(points, dtype=float).reshape(-1, 2), list(keys))


def model_from_texture(target: Target, px_per_m=2000.0, n_features=2000) -> PlanarModel:
    """PlanarModel of a textured target from its texture; coordinates in target metres."""
    texture, T = render_target_texture(target, px_per_m)
    return model_from_image(texture, target.points, target.keys(), to_model=T,
                            n_features=n_features)


class TexturedDetector:
    """A textured planar target found by keypoint matching to a PlanarModel.

    Args:
        model: the keypoints and servo points to look for.
        n_features: ORB keypoints per image.
        ratio: Lowe's ratio test threshold (0.8: Lowe 2004, sec. 7.1).
        ransac_px: RANSAC inlier threshold, pixels (common practice, no source).
        min_inliers: fewer homography inliers count as not found (common practice, no source).
        margin: window margin when tracking, as a fraction of the points' extent.
    """
    kind = "textured"

    # Tracking: keypoints of the window only (fewer, fewer pyramid levels: the scale changes
    # little between frames; the window keeps its 0.6 margin: keypoints beyond the servo
    # points' hull hold the homography, and with 0.25 the tray_poster_offset episode's pose
    # estimates spread 1.1 mm / 0.21 deg per frame and it never arrived; with 0.6 0.24 mm /
    # 0.045 deg, against 0.08 mm / 0.015 deg for 1500 keypoints matched by brute force at
    # ~27 ms a frame), each compared only with the model keypoints the last homography
    # puts within GATE_PX (+ the predicted motion) of it, at most GATE_CANDIDATES of them;
    # Lowe's ratio among those, and at most MAX_HAMMING bits apart (of 256). Common practice,
    # no source.
    TRACK_FEATURES, TRACK_LEVELS = 500, 4
    GATE_PX, GATE_CANDIDATES, MAX_HAMMING = 24.0, 8, 64
    # ... then again around the homography of the first pass within REGATE_PX (a mismatch
    # that passed the wide gate is then no candidate); common practice, no source
    REGATE_PX = 4.0

    def __init__(self, model: PlanarModel, *, n_features=1500, ratio=0.8, ransac_px=3.0,
                 min_inliers=15, margin=0.6):
        self.model = model
        self._model_words = np.ascontiguousarray(model.descriptors).view(np.uint64)
        self._orb = _orb(n_features)
        self._orb_track = cv2.ORB_create(nfeatures=self.TRACK_FEATURES, scaleFactor=1.2,
                                         nlevels=self.TRACK_LEVELS, fastThreshold=20)
        self._matcher = cv2.BFMatcher(cv2.NORM_HAMMING)
        self.ratio, self.ransac_px, self.min_inliers = ratio, ransac_px, min_inliers
        self.expected = len(model.keys)
        self.margin = margin

    def _gated_matches(self, uv, words, H, reach, gate_px):
        """(model indices, image points) of the gated matches (see GATE_PX) of the keypoints
        at ``uv`` (n, 2) image pixels with descriptors ``words`` (n, 4) uint64."""
        from scipy.spatial import cKDTree
        model_uv = cv2.perspectiveTransform(self.model.keypoints.reshape(-1, 1, 2),
                                            H).reshape(-1, 2)
        dist, idx = cKDTree(model_uv).query(uv, k=self.GATE_CANDIDATES,
                                            distance_upper_bound=gate_px + reach)
        valid = np.isfinite(dist)
        idx[~valid] = 0
        # Hamming distances: the 256-bit descriptors as four 64-bit words, XOR, bit count
        bits = _bit_count(words[:, None, :] ^ self._model_words[idx]).sum(axis=2, dtype=np.int32)
        bits[~valid] = 10 ** 6
        rows = np.arange(len(uv))
        first = bits.argmin(axis=1)
        best = bits[rows, first]
        bits[rows, first] = 10 ** 6
        second = bits.min(axis=1)
        good = (best <= self.MAX_HAMMING) & (best < self.ratio * second)
        return idx[rows, first][good], uv[good]

    def detect(self, image: np.ndarray, windows=None) -> Detection:
        """The servo points in the full image, or in the window ``[(None, rect[, H, reach])]``
        (with the last homography ``H`` and the predicted motion ``reach`` px: gated
        matching, see ``GATE_PX``)."""
        t0 = time.perf_counter()
        grey_all = _colour_image(image)
        kps, des, x0, y0 = (), None, 0, 0
        gate = None
        if windows is None:
            kps, des = self._orb.detectAndCompute(to_mono8(grey_all), None)
        else:
            view = _window(grey_all, windows[0][1], min_side=16)
            if view is not None:
                sub, x0, y0 = view
                gate = windows[0][2:] or None
                orb = self._orb if gate is None else self._orb_track
                kps, des = orb.detectAndCompute(to_mono8(sub), None)
        quality = {"n_keypoints": len(kps), "n_matches": 0, "n_inliers": 0,
                   "inlier_ratio": 0.0, "reprojection_rms_px": float("nan")}
        empty = Detection("textured", np.zeros((0, 2)), [], _size(image), quality=quality,
                          windowed=windows is not None)
        if des is None or len(kps) < 4:
            quality["reason"] = "too few keypoints"
            return self._timed(empty, t0)
        if gate is None:
            pairs = self._matcher.knnMatch(des, self.model.descriptors, k=2)
            good = [p[0] for p in pairs
                    if len(p) == 2 and p[0].distance < self.ratio * p[1].distance]
            src = self.model.keypoints[[m.trainIdx for m in good]]
            dst = np.array([kps[m.queryIdx].pt for m in good]).reshape(-1, 2) + (x0, y0)
        else:
            uv = cv2.KeyPoint_convert(kps).astype(float) + (x0, y0)
            words = np.ascontiguousarray(des).view(np.uint64)      # (n, 4): 256 bits each
            H_last, reach = gate
            model_i, dst = self._gated_matches(uv, words, H_last, reach, self.GATE_PX)
            src = self.model.keypoints[model_i]
        quality["n_matches"] = len(dst)
        if len(dst) < max(self.min_inliers, 4):
            quality["reason"] = f"{len(dst)} descriptor matches, need {self.min_inliers}"
            return self._timed(empty, t0)
        H, inl = cv2.findHomography(src, dst, cv2.RANSAC, self.ransac_px, maxIters=2000,
                                    confidence=0.999)
        if gate is not None and H is not None:
            # second pass: gated again around this frame's own homography, tightly
            model_i, dst = self._gated_matches(uv, words, H, 0.0, self.REGATE_PX)
            src = self.model.keypoints[model_i]
            quality["n_matches"] = len(dst)
            H = inl = None
            if len(dst) >= max(self.min_inliers, 4):
                H, inl = cv2.findHomography(src, dst, cv2.RANSAC, self.ransac_px,
                                            maxIters=2000, confidence=0.999)
        inliers = 0 if inl is None else int(inl.sum())
        quality.update(n_inliers=inliers, inlier_ratio=inliers / len(dst))
        if H is None or inliers < self.min_inliers:
            quality["reason"] = f"{inliers} homography inliers, need {self.min_inliers}"
            return self._timed(empty, t0)
        inl = inl.ravel().astype(bool)
        err = cv2.perspectiveTransform(src[inl].reshape(-1, 1, 2), H).reshape(-1, 2) - dst[inl]
        quality["reprojection_rms_px"] = float(np.sqrt(np.mean(np.sum(err ** 2, axis=1))))
        uv = cv2.perspectiveTransform(self.model.points.reshape(-1, 1, 2), H).reshape(-1, 2)
        w, h = _size(image)
        inside = (uv[:, 0] >= -0.5) & (uv[:, 0] <= w - 0.5) & (uv[:, 1] >= -0.5) & (
            uv[:, 1] <= h - 0.5)
        quality["outside_image"] = [k for k, ok in zip(self.model.keys, inside) if not ok]
        det = Detection("textured", uv[inside], [k for k, ok in zip(self.model.keys, inside)
                                                 if ok], _size(image), quality=quality,
                        windowed=windows is not None, homography=H)
        return self._timed(det, t0)

    @staticmethod
    def _timed(det, t0):
        det.timings["detect_ms"] = 1e3 * (time.perf_counter() - t0)
        return det

    def windows(self, last: Detection, predicted: np.ndarray) -> list:
        """One window around the predicted servo points, grown by ``margin`` of their extent,
        with the last homography and the predicted motion for gated matching."""
        lo, hi = predicted.min(axis=0), predicted.max(axis=0)
        grow = self.margin * (hi - lo).max() + 32.0
        rect = (lo[0] - grow, lo[1] - grow, hi[0] + grow + 1, hi[1] + grow + 1)
        if last.homography is None or len(predicted) != len(last.points):
            return [(None, rect)]
        reach = float(np.hypot(*(predicted - last.points).T).max())
        return [(None, rect, last.homography, reach)]


def make_detector(target: Target, model: PlanarModel | None = None):
    """The detector for a target's kind; textured targets use ``model`` if given (e.g. the
    taught view), else a model of the target's texture."""
    if target.kind == "dots":
        return DotDetector(target)
    if target.kind == "markers":
        return MarkerDetector(target)
    return TexturedDetector(model if model is not None else model_from_texture(target))


# ============================================================================ tracking
class Tracker:
    """Window search between frames around predicted positions, with full-frame fallback.

    The first frame, any frame after a feature went missing from its window, and, while fewer
    features than the target has are tracked, every ``refresh_every``-th frame are searched in
    full. Positions are predicted at constant image velocity from the last two frames when
    both found the same features, else at the last position.
    """

    def __init__(self, detector, refresh_every=10):
        self.detector = detector
        self.refresh_every = refresh_every
        self.reset()

    def reset(self):
        self._last = self._before = None
        self._since_full = 0

    def _predicted(self):
        last, before = self._last, self._before
        same = (before is not None and before.keys == last.keys
                and (last.kind != "dots" or last.windowed))
        return 2 * last.points - before.points if same else last.points

    def detect(self, image: np.ndarray) -> Detection:
        """Detect in ``image`` (same type and size each frame), in windows when possible."""
        t0 = time.perf_counter()
        last = self._last
        det = None
        want_full = (last is None or len(last) == 0 or (
            len(last) < self.detector.expected and self._since_full >= self.refresh_every))
        if not want_full:
            det = self.detector.detect(image, self.detector.windows(last, self._predicted()))
            if not set(last.keys) <= set(det.keys):
                det = None  # a feature went missing from its window: search the full frame
        if det is None:
            det = self.detector.detect(image)
            self._since_full = 0
        else:
            self._since_full += 1
        det.timings["tracker_ms"] = 1e3 * (time.perf_counter() - t0)
        self._before, self._last = last, det
        return det
