"""The coloured-dot board detector (vservo_node.vision.features)."""
from __future__ import annotations

import math
import time
from typing import Any, Sequence

import cv2
import numpy as np

from vservo_node.vision.image_io import SRGB8_TO_LINEAR
from vservo_node.vision.targets import Target
from vservo_node.vision.features_base import _colour_image, _size, _window, Detection, Window


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

    def __init__(self, target: Target, *, min_area_px: float = 12.0,
                 max_area_fraction: float = 0.05, min_roundness: float = 0.3,
                 fill_range: tuple[float, float] = (0.8, 1.2), window_scale: float = 2.5
                 ) -> None:
        if target.kind != "dots":
            raise ValueError(f"DotDetector needs a dots target, got {target.kind!r}")
        self.mode = target.segmentation
        self.threshold: float | None = target.threshold
        if self.threshold is None and self.mode == "chroma":
            self.threshold = self.CHROMA_THRESHOLD
        self.expected = len(target.dots)
        self.min_area_px = min_area_px
        self.max_area_fraction = max_area_fraction
        self.min_roundness = min_roundness
        self.fill_range = fill_range
        self.window_scale = window_scale
        # Otsu's threshold of the last full frame ('auto' mode)
        self._auto_threshold: float | None = None

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
            chroma: np.ndarray = np.maximum(np.maximum(b, g), r) - np.minimum(np.minimum(b, g), r)
            return chroma
        grey = image if image.ndim == 2 else cv2.cvtColor(image, cv2.COLOR_BGR2GRAY)
        return 255 - grey if self.mode == "dark" else grey

    def _mask(self, score: np.ndarray, full_frame: bool) -> np.ndarray:
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
    def _measure(self, image: np.ndarray, score: np.ndarray, labels: np.ndarray,
                 stats: np.ndarray, i: int, max_area: float
                 ) -> tuple[tuple[Any, ...] | None, str | None]:
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

    def _components(self, image: np.ndarray, full_frame: bool
                    ) -> tuple[np.ndarray, int, np.ndarray, np.ndarray]:
        score = self.score(image)
        n, labels, stats, _ = cv2.connectedComponentsWithStats(
            self._mask(score, full_frame), connectivity=8, ltype=cv2.CV_32S)
        return score, n, labels, stats

    # ---------------------------------------------------------------- detection
    def detect(self, image: np.ndarray, windows: Sequence[Window] | None = None) -> Detection:
        """Blobs in the full image, or at most one per ``(key, (x0, y0, x1, y1))`` window."""
        t0 = time.perf_counter()
        image = _colour_image(image)
        max_area = self.max_area_fraction * image.shape[0] * image.shape[1]
        found: list[tuple[Any, ...]] = []
        rejected: dict[str, int] = {}
        if windows is None:
            score, n, labels, stats = self._components(image, True)
            for i in range(1, n):
                blob, why = self._measure(image, score, labels, stats, i, max_area)
                if blob is None:
                    assert why is not None   # a refused blob says why
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
                best: tuple[float, tuple[Any, ...]] | None = None
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

    def windows(self, last: Detection, predicted: np.ndarray) -> list[Window]:
        """One window per blob of ``last``, centred on its predicted position."""
        moved = np.hypot(*(predicted - last.points).T)
        half = np.maximum(self.window_scale * last.quality["radius_px"] + moved, 8.0)
        return [(k, (u - r, v - r, u + r + 1, v + r + 1))
                for k, (u, v), r in zip(last.keys, predicted, half)]
