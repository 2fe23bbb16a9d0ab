"""Projected sensing: the target's feature points projected through the true camera, with pixel
noise, in place of rendering an image and perceiving it.

For sweeps of many episodes where what is studied is the servo (start offsets, calibration
errors, gains) rather than the detectors. What it keeps of the image path: the true camera model
with its lens distortion, the image border, painted-over features and image-space occluders (the
same visibility as the cell's ground truth, ``SimCell._detectable``), normalization through the
camera model the controller *believes*, PnP depths through that model (``depth.source``
target_model, as ``Perception`` does; taught depths from PnP at the taught pose, as
``capture_reference`` does), feature keys of the target's own. What it drops: detection and
matching (their noise is replaced by Gaussian pixel noise of ``noise_px`` per axis; their
failures, mismatches and the dots' perspective centroid bias do not occur), the photometric
effects, and the cost. ``depth.source`` depth_image gives the true depths.

Noise defaults: the frame-to-frame jitter of the perceived pixels on the shipped scenarios'
images, camera still (benchmarks/sensing_jitter.py; measured at the taught pose / half-way to
the start): dots 0.006 / 0.007 px, fiducial corners 0.0025 / 0.003 px, the poster's servo
points 0.008 / 0.19 px (a homography fit to ORB matches, looser away from the taught view). The
defaults take the half-way figures for dots and markers and 0.01 px for the poster: near the
goal, where its jitter decides whether the run settles within tolerance (0.05 px kept
tray_poster_offset above its 0.1 px tolerance); its looser points far from the goal are not
modelled. The detectors' static bias against the true projection (tests/vision) is not
modelled: the reference is taught through the same detector, so it cancels at the goal.
"""
from __future__ import annotations

import numpy as np

from vservo_node.servo import Observation, TaughtView
from vservo_node.sim import seeding
from vservo_node.sim.truth import unambiguous, inside_image, project_points, unoccluded
from vservo_node.vision import depth as depth_mod
from vservo_node.vision.matching import MIN_MATCHED
from vservo_node.vision.reference import BadReferenceError

NOISE_PX = {"dots": 0.007, "markers": 0.003, "textured": 0.01}
# the projected points' own random stream (not the images': nothing is rendered here)
PROJECTED_NOISE = 3


def default_noise_px(target) -> float:
    """The default pixel noise (px, per axis) of ``target``'s kind (module doc)."""
    return NOISE_PX.get(target.kind, 0.1)


def _monotonic_radius(camera) -> float:
    """Normalized radius below which the camera's radial distortion map r -> r * radial(r)
    still increases (90 % of the first turning point, sampled to r = 3); 0 for models other
    than plumb_bob / rational_polynomial (every visible point is then checked)."""
    if camera.effective_distortion not in ("plumb_bob", "rational_polynomial"):
        return 0.0
    D = camera.D
    k1, k2, _, _, k3 = D[:5]
    k4, k5, k6 = D[5:8] if D.size >= 8 else (0.0, 0.0, 0.0)
    r = np.linspace(0.0, 3.0, 30001)
    r2 = r * r
    mapped = r * ((1 + r2 * (k1 + r2 * (k2 + r2 * k3))) / (1 + r2 * (k4 + r2 * (k5 + r2 * k6))))
    falling = np.flatnonzero(np.diff(mapped) <= 0)
    return 0.9 * (r[falling[0]] if falling.size else 3.0)


class ProjectedSensor:
    """Observations of ``scenario``'s target for the true arm at joints q.

    Args:
        scenario: a loaded ``sim.Scenario`` (true camera, target, its pose, hidden features,
            occluders, true hand-eye, seed).
        camera: the camera model the controller believes (normalization, PnP).
        depth_source: ``depth.source`` (``vservo_node.params.DEPTH_SOURCES``).
        noise_px: Gaussian pixel noise per axis (px); None: :func:`default_noise_px`.
    """

    def __init__(self, scenario, camera, depth_source: str = "taught",
                 noise_px: float | None = None):
        self.scenario = scenario
        self.camera = camera
        self.depth_source = depth_source
        target = scenario.target
        self.noise_px = default_noise_px(target) if noise_px is None else float(noise_px)
        if not self.noise_px >= 0:
            raise ValueError(f"noise_px must be >= 0, got {noise_px!r}")
        if not target.has_geometry:
            raise ValueError(f"projected sensing needs the positions of {target.name!r}'s "
                             "features on the board; use image sensing")
        self.keys = tuple(target.keys())
        self.points_target = target.model_points()
        self.arm = scenario.arm_model("true")
        self.true_camera = scenario.camera
        self._r_safe = _monotonic_radius(self.true_camera)
        hidden = set(scenario.hidden)
        self.shown = np.array([(k[0], k[1]) not in hidden for k in self.keys])
        self.occluders = tuple(scenario.photometric.occluders)

    def pixels(self, q, t: float):
        """(uv (N, 2) true distorted pixels, Z (N,) m, visible (N,) bool) at joints q, time t."""
        T_camera_target = self.scenario.camera_target(self.arm, q)
        points = self.points_target @ T_camera_target[:3, :3].T + T_camera_target[:3, 3]
        uv = project_points(self.true_camera, points)
        visible = inside_image(self.true_camera, uv)
        # a pixel the lens polynomial reached by folding back is not an image of the point
        # (sim.truth.unambiguous); rays inside the radius where the radial map still grows
        # cannot fold, so only the others need the (iterative) check
        with np.errstate(invalid="ignore", divide="ignore"):
            r2 = (points[:, 0] ** 2 + points[:, 1] ** 2) / points[:, 2] ** 2
        check = visible & ~(r2 < self._r_safe ** 2)
        if check.any():
            visible[check] = unambiguous(self.true_camera, points[check], uv[check])
        visible &= self.shown & unoccluded(uv, self.occluders, t)
        return uv, points[:, 2], visible

    def _noisy(self, uv, t: float):
        if self.noise_px == 0 or len(uv) == 0:
            return uv
        rng = np.random.default_rng(seeding.seed_material(self.scenario.seed, PROJECTED_NOISE, t))
        return uv + rng.normal(0.0, self.noise_px, uv.shape)

    def observe(self, q, t: float) -> Observation | None:
        """The Observation at true joints q and time t (s); None when no feature is visible."""
        uv, z, visible = self.pixels(q, t)
        if not visible.any():
            return None
        keys = tuple(k for k, v in zip(self.keys, visible) if v)
        seen = self._noisy(uv[visible], t)
        depth = None
        if self.depth_source == "target_model" and len(keys) >= MIN_MATCHED:
            try:
                depth = depth_mod.from_pnp(seen, self.points_target[visible], self.camera).z
            except ValueError:
                depth = None
        elif self.depth_source == "depth_image":
            depth = z[visible].copy()
        return Observation(keys, seen, self.camera.pixels_to_normalized(seen), depth)

    def taught_view(self, q_taught, t: float) -> TaughtView:
        """The TaughtView at the taught joints, exposed at time t: as ``capture_reference``
        teaches (PnP depths: the target has geometry). BadReferenceError when fewer than
        MIN_MATCHED features are visible."""
        uv, _, visible = self.pixels(q_taught, t)
        if visible.sum() < MIN_MATCHED:
            raise BadReferenceError(f"cannot teach: {int(visible.sum())} of {len(self.keys)} "
                                    f"features visible at the taught pose")
        seen = self._noisy(uv[visible], t)
        depths = depth_mod.from_pnp(seen, self.points_target[visible], self.camera).z
        return TaughtView(tuple(k for k, v in zip(self.keys, visible) if v),
                          self.camera.pixels_to_normalized(seen), seen, depths,
                          image_size=(self.camera.width, self.camera.height),
                          model=self.points_target[visible])
