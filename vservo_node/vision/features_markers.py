"""The square-fiducial board detector and the edge refinement of a marker's quad
(vservo_node.vision.features)."""
from __future__ import annotations

import math
import time
from typing import cast, Literal, overload, Sequence

import cv2
import numpy as np

from vservo_node.vision.image_io import to_mono8
from vservo_node.vision.targets import Target
from vservo_node.vision.features_base import _colour_image, _size, _window, Detection, Window


# ============================================================================ markers
class MarkerDetector:
    """Square fiducials of a marker target, corners refined to sub-pixel.

    Markers whose ids are not on the target are ignored (counted in quality['foreign_ids']).
    ``margin`` is the window margin when tracking, as a fraction of the markers' extent.
    """
    kind = "markers"

    def __init__(self, target: Target, *, margin: float = 0.3) -> None:
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

    def detect(self, image: np.ndarray, windows: Sequence[Window] | None = None) -> Detection:
        """Markers in the full image, or one per window ``(marker_id, (x0, y0, x1, y1)[,
        predicted corners (4, 2)])``: the marker of that id inside its window (``marker_id``
        None: any of the target's). With predicted corners they are refined directly and
        checked by reading the marker's cells; the detector runs in the window only when
        that fails."""
        t0 = time.perf_counter()
        image = _colour_image(image, allow16=True)
        # (id, grey image to refine on or None, corners (4, 2), offset x0, y0)
        found: list[tuple[int, np.ndarray | None, np.ndarray, int, int]] = []
        ids_seen: list[int] = []
        if windows is None:
            grey = to_mono8(image)
            corners, id_array, _ = self._aruco.detectMarkers(grey)
            ids: list[int] = ([] if id_array is None
                              else cast(list[int], id_array.ravel().tolist()))
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
                corners, id_array, _ = self._aruco.detectMarkers(small)
                ids = [] if id_array is None else cast(list[int], id_array.ravel().tolist())
                ids_seen += ids
                for marker_id, quad in zip(ids, corners):
                    if want is None or marker_id == want:
                        # pixel centres: u_full = (u_small + 0.5) / scale - 0.5
                        quad = (quad.reshape(4, 2) + 0.5) / scale - 0.5
                        found.append((marker_id, grey, quad, x0, y0))
        seen: set[int] = set()
        keys: list[tuple[str, int, int]] = []
        points: list[np.ndarray] = []
        for marker_id, refine_on, quad, x0, y0 in found:
            if marker_id in self.ids and marker_id not in seen:
                seen.add(marker_id)
                keys += [("tag", marker_id, c) for c in range(4)]
                points.append(quad if refine_on is None else
                              refine_quad(refine_on, quad, self.cells) + (x0, y0))
        return Detection("markers", np.array(points, dtype=float).reshape(-1, 2), keys,
                         _size(image), windowed=windows is not None,
                         quality={"marker_ids": sorted(seen),
                                  "foreign_ids": sorted(set(ids_seen) - set(self.ids)),
                                  "duplicate_ids": sorted({i for i in ids_seen
                                                           if ids_seen.count(i) > 1})},
                         timings={"detect_ms": 1e3 * (time.perf_counter() - t0)})

    def windows(self, last: Detection, predicted: np.ndarray) -> list[Window]:
        """One window per marker of ``last`` around its predicted corners, grown by ``margin``
        of the marker's extent and 8 px (the detector needs a quiet zone inside the window)."""
        out: list[Window] = []
        for j in range(0, len(last.keys), 4):
            quad = predicted[j:j + 4]
            lo, hi = quad.min(axis=0), quad.max(axis=0)
            grow = self.margin * (hi - lo).max() + 8.0
            out.append((last.keys[j][1],
                        (lo[0] - grow, lo[1] - grow, hi[0] + grow + 1, hi[1] + grow + 1),
                        quad))
        return out

    def _cells_match(self, grey: np.ndarray, quad: np.ndarray, marker_id: int,
                     max_wrong: int = 1) -> bool:
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
        return bool(wrong <= max_wrong)


MAX_PROFILES = 32   # per edge; common practice, no source


_POPCOUNT = np.array([bin(i).count("1") for i in range(256)], dtype=np.uint8)


def _bit_count(words: np.ndarray) -> np.ndarray:
    """Set bits of each uint64 (NumPy >= 2.0's bitwise_count, else a byte table)."""
    counts: np.ndarray
    if hasattr(np, "bitwise_count"):
        counts = np.bitwise_count(words)
    else:
        counts = _POPCOUNT[words.view(np.uint8)].reshape(*words.shape, 8).sum(axis=-1)
    return counts


def _edge_lines(grey: np.ndarray, quad: np.ndarray, cell_px: float
                ) -> tuple[np.ndarray, np.ndarray]:
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


@overload
def refine_quad(grey: np.ndarray, quad: np.ndarray, cells: int,
                return_found: Literal[False] = False) -> np.ndarray: ...


@overload
def refine_quad(grey: np.ndarray, quad: np.ndarray, cells: int,
                return_found: Literal[True]) -> tuple[np.ndarray, int]: ...


def refine_quad(grey: np.ndarray, quad: np.ndarray, cells: int,
                return_found: bool = False) -> np.ndarray | tuple[np.ndarray, int]:
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
