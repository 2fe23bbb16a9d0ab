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

import time

import numpy as np

from vservo_node.vision.targets import Target
from vservo_node.vision.features_base import Detection, Detector
from vservo_node.vision.features_dots import DotDetector
from vservo_node.vision.features_markers import MAX_PROFILES, MarkerDetector, refine_quad
from vservo_node.vision.features_textured import (PlanarModel, TexturedDetector, model_from_image,
                                                  model_from_texture)

# Split by detector (features_dots, features_markers, features_textured; the detection and the
# image helpers they share in features_base); every public name keeps this import path.
__all__ = ["MAX_PROFILES", "Detection", "Detector", "DotDetector", "MarkerDetector",
           "PlanarModel", "TexturedDetector", "Tracker", "make_detector", "model_from_image",
           "model_from_texture", "refine_quad"]


def make_detector(target: Target, model: PlanarModel | None = None) -> Detector:
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

    def __init__(self, detector: Detector, refresh_every: int = 10) -> None:
        self.detector = detector
        self.refresh_every = refresh_every
        self.reset()

    def reset(self) -> None:
        self._last: Detection | None = None
        self._before: Detection | None = None
        self._since_full = 0

    def _predicted(self) -> np.ndarray:
        last, before = self._last, self._before
        assert last is not None   # called after a detection only
        same = (before is not None and before.keys == last.keys
                and (last.kind != "dots" or last.windowed))
        if same:
            assert before is not None
            predicted: np.ndarray = 2 * last.points - before.points
            return predicted
        return last.points

    def detect(self, image: np.ndarray) -> Detection:
        """Detect in ``image`` (same type and size each frame), in windows when possible."""
        t0 = time.perf_counter()
        last = self._last
        det: Detection | None = None
        want_full = (last is None or len(last) == 0 or (
            len(last) < self.detector.expected and self._since_full >= self.refresh_every))
        if not want_full:
            assert last is not None
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
