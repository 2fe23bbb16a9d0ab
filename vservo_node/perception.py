"""From camera images to the servo's observations: detect, match to the taught reference,
normalize, attach depth. No ROS and no clocks here (the caller passes each image's time).

``Perception(target, camera, reference, depth)`` holds what one camera stream needs:

- ``process(image, t, depth_image=None) -> (Observation | None, PerceptionInfo)``: detection
  (full frame first, then windows around predicted positions: ``vision.features.Tracker``),
  correspondence with the taught reference (``Reference.match``: dots by colour and layout,
  markers and posters by key; the previous frame's matches serve as predictions), pixels to
  undistorted normalized coordinates through the camera model, and per-point depth:

  ==============  ===============================================================================
  depth.source    ``Observation.depth``
  ==============  ===============================================================================
  constant        None: the servo applies ``depth.constant_m`` itself
  taught          None: the servo applies the reference's taught depths itself
  target_model    Z of each point in the pose of the target's model fitted to the matched points
                  (``vision.depth.from_pnp``, IPPE); None (taught depths) when PnP fails
  depth_image     the aligned depth image at each point (``vision.depth.from_depth_image``);
                  invalid pixels fall back to the taught depth (else ``depth.constant_m``)
  ==============  ===============================================================================

  The observation's keys are reference keys (e.g. ``('dot', 3)``), so they match the
  ``TaughtView`` the servo drives to. ``None`` when no reference is loaded or nothing matched.
- ``capture(image, name)``: teach a reference from the current view (``vision.reference``).
- ``taught_view(reference, camera, target)``: the servo's ``TaughtView`` of a reference as the
  current camera sees it (normalized coordinates as taught; pixels re-projected through the
  current camera, so a reference taught at another resolution works; the target's model
  points of the features, for the pose-error estimate).

Conventions (DEVELOPERS.md): pixels ``(u, v)`` in OpenCV's convention; normalized
``(x, y) = (X/Z, Y/Z)`` in the camera optical frame; depths in metres along the optical axis.
"""
from __future__ import annotations

import time
from dataclasses import dataclass, field

import numpy as np

from vservo_node.params import default
from vservo_node.servo import Observation, TaughtView
from vservo_node.vision import depth as depth_mod
from vservo_node.vision.camera import CameraModel
from vservo_node.vision.features import Tracker, make_detector
from vservo_node.vision.reference import Reference, capture_reference, check_target
from vservo_node.vision.targets import Target

OBSERVED_DEPTH_SOURCES = ("target_model", "depth_image")


@dataclass(frozen=True)
class DepthSettings:
    """``source``: one of ``vservo_node.params.DEPTH_SOURCES``; ``constant_m``: metres."""
    source: str = default("depth.source")
    constant_m: float = default("depth.constant_m")


@dataclass(frozen=True)
class DepthImage:
    """An aligned depth frame: ``pixels`` (H, W) uint16 mm (16UC1) or float32 m (32FC1)."""
    pixels: np.ndarray
    encoding: str


@dataclass
class PerceptionInfo:
    """What one ``process`` call saw.

    ``t``: image time (s); ``n_detected``: detections; ``n_matched``: matched to the
    reference; ``missing``: reference keys not matched; ``outliers``: (detection key, reason)
    of detections left out; ``reason``: '' or why there is no observation;
    ``depth_invalid``: keys whose depth is a fallback; ``uv`` (M, 2) and ``uv_ref`` (M, 2):
    matched pixels and the reference's pixels of the same keys (for overlays);
    ``timings``: milliseconds by stage ('detect', 'match', 'depth', 'total').
    """
    t: float
    n_detected: int = 0
    n_matched: int = 0
    missing: list = field(default_factory=list)
    outliers: list = field(default_factory=list)
    reason: str = ""
    depth_invalid: list = field(default_factory=list)
    uv: np.ndarray = field(default_factory=lambda: np.zeros((0, 2)))
    uv_ref: np.ndarray = field(default_factory=lambda: np.zeros((0, 2)))
    timings: dict = field(default_factory=dict)


def taught_view(reference: Reference, camera: CameraModel,
                target: Target | None = None) -> TaughtView:
    """The servo's TaughtView of ``reference`` for images of ``camera``.

    Normalized coordinates are the taught ones (or, for a reference taught without a camera
    model, those of its pixels through ``camera``, refused by ``Reference.points_for`` when the
    resolution differs); pixels are re-projected through ``camera``. With ``target`` (the one
    the reference was taught on) and its feature positions, the view carries the features'
    model points, so the servo estimates its pose error by PnP.
    """
    uv = reference.points_for(camera)
    xy = reference.normalized if reference.normalized is not None else (
        camera.pixels_to_normalized(uv))
    model = None
    if target is not None and target.has_geometry:
        check_target(reference, target)
        model = target.model_points(reference.keys)
    return TaughtView(tuple(reference.keys), np.array(xy, dtype=float), np.array(uv, dtype=float),
                      None if reference.depths is None else np.array(reference.depths, float),
                      image_size=(camera.width, camera.height), model=model)


class Perception:
    """Detection, matching, normalization and depth for one camera stream (see module doc).

    Not thread-safe: the tracker keeps the last frames, so call ``process`` from one thread.
    """

    def __init__(self, target: Target, camera: CameraModel, reference: Reference | None = None,
                 depth: DepthSettings = DepthSettings()):
        if depth.source == "target_model" and not target.has_geometry:
            raise ValueError(f"depth.source=target_model needs feature positions in target "
                             f"{target.name!r}; add them or choose another depth source")
        self.target = target
        self.camera = camera
        self.depth = depth
        self.reference: Reference | None = None
        self._tracker = Tracker(make_detector(target))
        self._predicted: dict | None = None
        self._ref_points: np.ndarray | None = None  # reference.points_for(camera), per stream
        self.set_reference(reference)

    def set_reference(self, reference: Reference | None) -> None:
        """Servo to ``reference`` from now on (None: detect only). Restarts tracking."""
        if reference is not None:
            # a textured reference brings its own detector (matching to the taught view)
            self._tracker = Tracker(reference.detector(self.target))
        self.reference = reference
        self.reset()

    def set_camera(self, camera: CameraModel) -> None:
        """Use a new camera model (e.g. camera_info changed). Restarts tracking."""
        self.camera = camera
        self.reset()

    def reset(self) -> None:
        """Forget the previous frames (next frame: full-frame search, no predictions)."""
        self._tracker.reset()
        self._predicted = None
        self._ref_points = None

    def process(self, image: np.ndarray, t: float, depth_image: DepthImage | None = None
                ) -> tuple[Observation | None, PerceptionInfo]:
        """Observation of one image (BGR or mono, as from ``image_io.to_bgr_or_mono``) taken
        at time ``t`` (s); ValueError if the image size differs from the camera model's."""
        t0 = time.perf_counter()
        height, width = image.shape[:2]
        if (width, height) != (self.camera.width, self.camera.height):
            raise ValueError(f"image is {width}x{height} but the camera model is "
                             f"{self.camera.width}x{self.camera.height}")
        detection = self._tracker.detect(image)
        info = PerceptionInfo(t, n_detected=len(detection))
        info.timings["detect"] = detection.timings.get("tracker_ms", 0.0)
        if self.reference is None:
            info.reason = "no reference loaded"
            return None, self._finish(info, t0)
        t1 = time.perf_counter()
        if self._ref_points is None:  # the same until the reference or the camera changes
            self._ref_points = self.reference.points_for(self.camera, detection.image_size)
        # the match's quality figures are not reported here, so the diagnostic homography
        # fit of dot matches is skipped (fit_rms; other kinds match by key and ignore it)
        match = self.reference.match(detection, self.camera, predicted=self._predicted,
                                     ref_points=self._ref_points, fit_rms=False)
        info.timings["match"] = 1e3 * (time.perf_counter() - t1)
        info.n_matched, info.missing, info.outliers = len(match), match.missing, match.rejected
        info.uv, info.uv_ref = match.points, match.ref_points
        if len(match) == 0:
            self._predicted = None
            info.reason = match.reason or "no feature matched"
            return None, self._finish(info, t0)
        self._predicted = match.as_dict()
        info.reason = match.reason
        t2 = time.perf_counter()
        z = self._depths(match, depth_image, info)
        info.timings["depth"] = 1e3 * (time.perf_counter() - t2)
        obs = Observation(tuple(match.keys), match.points.copy(),
                          self.camera.pixels_to_normalized(match.points), z)
        return obs, self._finish(info, t0)

    def _depths(self, match, depth_image: DepthImage | None, info: PerceptionInfo):
        """Per-point depths (M,) for the observed sources; None for constant / taught."""
        source = self.depth.source
        if source == "target_model":
            if len(match) < 4:
                info.depth_invalid = list(match.keys)
                return None
            try:
                return depth_mod.from_pnp(match.points, self.target.model_points(match.keys),
                                          self.camera).z
            except ValueError as exc:
                info.depth_invalid = list(match.keys)
                info.reason = info.reason or f"PnP depth failed: {exc}"
                return None
        if source == "depth_image":
            fallback = self._fallback_depths(match.keys)
            if depth_image is None:
                info.depth_invalid = list(match.keys)
                return fallback
            d = depth_mod.from_depth_image(depth_image.pixels, depth_image.encoding,
                                           match.points, fallback)
            info.depth_invalid = [k for k, ok in zip(match.keys, d.valid) if not ok]
            return d.z
        return None

    def _fallback_depths(self, keys) -> np.ndarray:
        """Taught depths of ``keys`` when the reference has them, else the constant depth."""
        reference = self.reference      # set whenever features are matched
        if reference is not None and reference.depths is not None:
            return depth_mod.taught(reference, keys).z
        return depth_mod.constant(len(keys), self.depth.constant_m).z

    @staticmethod
    def _finish(info: PerceptionInfo, t0: float) -> PerceptionInfo:
        info.timings["total"] = 1e3 * (time.perf_counter() - t0)
        return info

    def capture(self, image: np.ndarray, name: str) -> Reference:
        """Teach reference ``name`` from ``image`` with this camera (normalized coordinates and,
        when the target has geometry, PnP depths). BadReferenceError (a ValueError) says why a
        view cannot be taught."""
        return capture_reference(name, self.target, image, self.camera)
