"""The simulated camera: what it sees (table, target, occluders) and how the sensor spoils it
(blur, gain, noise). Images are ``(H, W, 3)`` uint8 RGB (``rgb8``); no ROS, no clock: the
caller passes the exposure time ``t`` (seconds) and the target pose in the camera optical
frame, and the same inputs always give the same image.

The table behind the target is a fixed picture in image coordinates (a plain colour with a
mild, smooth texture): it has no corners or edges a detector could lock onto, so leaving it
still while the camera moves costs no realism that the servo could notice, and saves a warp.
"""
from __future__ import annotations

from dataclasses import dataclass, field

import cv2
import numpy as np

from vservo_node.sim import seeding
from vservo_node.sim.render import PlanarTexture, PlaneRenderer

# Noise tiles are this many pixels larger than the image; each frame reads them at a random
# offset, so consecutive frames get different noise without drawing new random numbers.
_NOISE_PAD = 61
# Blur reaches this many sigmas beyond the drawn box (GaussianBlur's own kernel is ~3 sigma).
_BLUR_REACH = 4.0
# The table texture varies over about this many pixels (a smooth blotch pattern).
_TABLE_GRAIN_PX = 24


@dataclass(frozen=True)
class Occluder:
    """A flat-coloured rectangle in front of the lens (a cable, a finger of the gripper).

    ``rect_px`` is ``(x0, y0, x1, y1)`` in pixels (end exclusive); it is drawn while
    ``from_s <= t < until_s``.
    """

    rect_px: tuple
    colour: tuple = (60, 60, 65)
    from_s: float = 0.0
    until_s: float = float("inf")

    def active(self, t: float) -> bool:
        return self.from_s <= t < self.until_s


@dataclass(frozen=True)
class Photometric:
    """Image effects, all in 8-bit grey levels (0..255) and pixels.

    - ``noise_std``: Gaussian sensor noise per channel (grey levels), added last.
    - ``blur_sigma_px``: Gaussian defocus blur (pixels), applied before gain and noise.
    - ``gain``: brightness gain (exposure) applied to the whole image.
    - ``table_rgb``, ``table_texture``: table colour and the amplitude (grey levels) of its
      smooth texture.
    - ``occluders``: :class:`Occluder` rectangles.
    """

    noise_std: float = 0.0
    blur_sigma_px: float = 0.0
    gain: float = 1.0
    table_rgb: tuple = (150, 136, 118)
    table_texture: float = 6.0
    occluders: tuple = field(default_factory=tuple)

    def __post_init__(self):
        for name in ("noise_std", "blur_sigma_px", "table_texture"):
            if not getattr(self, name) >= 0:
                raise ValueError(f"{name} must be >= 0, got {getattr(self, name)!r}")
        if not self.gain > 0:
            raise ValueError(f"gain must be > 0, got {self.gain!r}")


class SimCamera:
    """Renders a planar target seen by one camera.

    Args:
        model: the camera (``vservo_node.vision.camera.CameraModel``, raw distorted stream);
            its lens distortion is applied when rendering.
        texture: the target's printed picture (:class:`PlanarTexture`, RGB).
        photometric: :class:`Photometric` effects.
        seed: seed of the table texture and of the noise.
    """

    def __init__(self, model, texture: PlanarTexture, photometric: Photometric = Photometric(),
                 seed: int = 0):
        self.model = model
        self.texture = texture
        self.photometric = photometric
        self.seed = int(seed)
        self._renderer = PlaneRenderer(model)
        rng = np.random.default_rng(seeding.seed_material(self.seed, seeding.TABLE))
        self._table = self._table_image(rng)
        self._noise = self._noise_tiles(rng) if photometric.noise_std > 0 else None

    def _table_image(self, rng):
        w, h = self.model.width, self.model.height
        p = self.photometric
        coarse = rng.standard_normal((h // _TABLE_GRAIN_PX + 2, w // _TABLE_GRAIN_PX + 2))
        blotches = cv2.resize(coarse, (w, h), interpolation=cv2.INTER_CUBIC)
        table = np.asarray(p.table_rgb, dtype=float) + p.table_texture * blotches[..., None]
        return np.clip(np.round(table), 0, 255).astype(np.uint8)

    def _noise_tiles(self, rng):
        """Two uint8 tiles holding the positive and the negative part of Gaussian noise, so
        adding noise is two saturating uint8 operations."""
        shape = (self.model.height + _NOISE_PAD, self.model.width + _NOISE_PAD, 3)
        noise = np.round(rng.normal(0.0, self.photometric.noise_std, shape))
        noise = np.clip(noise, -255, 255)
        return (np.maximum(noise, 0).astype(np.uint8), np.maximum(-noise, 0).astype(np.uint8))

    def render(self, T_camera_target, t: float) -> np.ndarray:
        """The image (H, W, 3) uint8 RGB exposed at time ``t`` (seconds) with the target at
        ``T_camera_target`` (4x4, target pose in the camera optical frame, metres). A target
        behind the camera, seen from its back or out of view leaves only the table."""
        p = self.photometric
        image = self._table.copy()
        box = self._renderer.draw(image, self.texture, T_camera_target)
        for occluder in p.occluders:
            if occluder.active(t):
                box = self._occlude(image, occluder, box)
        if p.blur_sigma_px > 0 and box is not None:
            self._blur(image, box)
        if p.gain != 1.0:
            cv2.convertScaleAbs(image, dst=image, alpha=p.gain)
        if self._noise is not None:
            rng = np.random.default_rng(seeding.seed_material(self.seed, seeding.IMAGE_NOISE, t))
            dy, dx = rng.integers(0, _NOISE_PAD, 2)
            h, w = image.shape[:2]
            # One offset for both parts: together they are the same signed noise sample.
            cv2.add(image, self._noise[0][dy:dy + h, dx:dx + w], dst=image)
            cv2.subtract(image, self._noise[1][dy:dy + h, dx:dx + w], dst=image)
        return image

    def _occlude(self, image, occluder, box):
        """Fill the occluder's rectangle; return the union of it (clipped) and ``box``."""
        h, w = image.shape[:2]
        x0, y0, x1, y1 = (int(round(v)) for v in occluder.rect_px)
        x0, y0, x1, y1 = max(x0, 0), max(y0, 0), min(x1, w), min(y1, h)
        if x0 >= x1 or y0 >= y1:
            return box
        image[y0:y1, x0:x1] = occluder.colour
        if box is None:
            return x0, y0, x1, y1
        return min(box[0], x0), min(box[1], y0), max(box[2], x1), max(box[3], y1)

    def _blur(self, image, box):
        """Blur the drawn box and a margin around it; the table outside is smooth already."""
        h, w = image.shape[:2]
        reach = int(np.ceil(_BLUR_REACH * self.photometric.blur_sigma_px))
        x0, y0 = max(box[0] - reach, 0), max(box[1] - reach, 0)
        x1, y1 = min(box[2] + reach, w), min(box[3] + reach, h)
        roi = image[y0:y1, x0:x1]
        cv2.GaussianBlur(roi, (0, 0), self.photometric.blur_sigma_px, dst=roi,
                         borderType=cv2.BORDER_REPLICATE)
