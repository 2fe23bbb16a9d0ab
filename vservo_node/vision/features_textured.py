"""The textured planar target: its keypoint model and detector (vservo_node.vision.features)."""
from __future__ import annotations

import time
from dataclasses import dataclass
from typing import Any, Iterable, Sequence

import cv2
import numpy as np
from numpy.typing import ArrayLike

from vservo_node.vision.image_io import to_mono8
from vservo_node.vision.targets import Target, render_target_texture
from vservo_node.vision.features_base import _colour_image, _size, _window, Detection, Window
from vservo_node.vision.features_markers import _bit_count


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
    keys: list[Any]          # P keys


def _orb(n_features: int) -> cv2.ORB:
    return cv2.ORB.create(nfeatures=n_features, scaleFactor=1.2, nlevels=8, fastThreshold=20)


def model_from_image(image: np.ndarray, points: ArrayLike, keys: Iterable[Any],
                     to_model: ArrayLike | None = None, n_features: int = 2000) -> PlanarModel:
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


def model_from_texture(target: Target, px_per_m: float = 2000.0, n_features: int = 2000
                       ) -> PlanarModel:
    """PlanarModel of a textured target from its texture; coordinates in target metres."""
    texture, T = render_target_texture(target, px_per_m)
    assert target.points is not None   # a textured target has its servo points
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

    def __init__(self, model: PlanarModel, *, n_features: int = 1500, ratio: float = 0.8,
                 ransac_px: float = 3.0, min_inliers: int = 15, margin: float = 0.6) -> None:
        self.model = model
        self._model_words = np.ascontiguousarray(model.descriptors).view(np.uint64)
        self._orb = _orb(n_features)
        self._orb_track = cv2.ORB.create(nfeatures=self.TRACK_FEATURES, scaleFactor=1.2,
                                         nlevels=self.TRACK_LEVELS, fastThreshold=20)
        self._matcher = cv2.BFMatcher(cv2.NORM_HAMMING)
        self.ratio, self.ransac_px, self.min_inliers = ratio, ransac_px, min_inliers
        self.expected = len(model.keys)
        self.margin = margin

    def _gated_matches(self, uv: np.ndarray, words: np.ndarray, H: np.ndarray, reach: float,
                       gate_px: float) -> tuple[np.ndarray, np.ndarray]:
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

    def detect(self, image: np.ndarray, windows: Sequence[Window] | None = None) -> Detection:
        """The servo points in the full image, or in the window ``[(None, rect[, H, reach])]``
        (with the last homography ``H`` and the predicted motion ``reach`` px: gated
        matching, see ``GATE_PX``)."""
        t0 = time.perf_counter()
        grey_all = _colour_image(image)
        kps: Sequence[cv2.KeyPoint] = ()
        des, x0, y0 = None, 0, 0
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
        quality: dict[str, Any] = {"n_keypoints": len(kps), "n_matches": 0, "n_inliers": 0,
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
            uv = np.asarray(cv2.KeyPoint.convert(kps)).astype(float) + (x0, y0)
            words = np.ascontiguousarray(des).view(np.uint64)      # (n, 4): 256 bits each
            H_last, reach = gate
            model_i, dst = self._gated_matches(uv, words, H_last, reach, self.GATE_PX)
            src = self.model.keypoints[model_i]
        quality["n_matches"] = len(dst)
        if len(dst) < max(self.min_inliers, 4):
            quality["reason"] = f"{len(dst)} descriptor matches, need {self.min_inliers}"
            return self._timed(empty, t0)
        H: np.ndarray | None
        inl: np.ndarray | None
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
        assert inl is not None   # findHomography gives its inlier mask with the homography
        inl = inl.ravel().astype(bool)
        err = cv2.perspectiveTransform(src[inl].reshape(-1, 1, 2), H).reshape(-1, 2) - dst[inl]
        quality["reprojection_rms_px"] = float(np.sqrt(np.mean(np.sum(err ** 2, axis=1))))
        servo_uv = cv2.perspectiveTransform(self.model.points.reshape(-1, 1, 2),
                                            H).reshape(-1, 2)
        w, h = _size(image)
        inside = (servo_uv[:, 0] >= -0.5) & (servo_uv[:, 0] <= w - 0.5) & (
            servo_uv[:, 1] >= -0.5) & (servo_uv[:, 1] <= h - 0.5)
        quality["outside_image"] = [k for k, ok in zip(self.model.keys, inside) if not ok]
        det = Detection("textured", servo_uv[inside], [k for k, ok in zip(self.model.keys, inside)
                                                 if ok], _size(image), quality=quality,
                        windowed=windows is not None, homography=H)
        return self._timed(det, t0)

    @staticmethod
    def _timed(det: Detection, t0: float) -> Detection:
        det.timings["detect_ms"] = 1e3 * (time.perf_counter() - t0)
        return det

    def windows(self, last: Detection, predicted: np.ndarray) -> list[Window]:
        """One window around the predicted servo points, grown by ``margin`` of their extent,
        with the last homography and the predicted motion for gated matching."""
        lo, hi = predicted.min(axis=0), predicted.max(axis=0)
        grow = self.margin * (hi - lo).max() + 32.0
        rect = (lo[0] - grow, lo[1] - grow, hi[0] + grow + 1, hi[1] + grow + 1)
        if last.homography is None or len(predicted) != len(last.points):
            return [(None, rect)]
        reach = float(np.hypot(*(predicted - last.points).T).max())
        return [(None, rect, last.homography, reach)]
