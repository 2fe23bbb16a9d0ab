"""Photometric effects of the simulated camera: noise, blur, gain, occluders, determinism.

Noise is modelled as zero-mean Gaussian per channel (common practice, no source); the blur is
compared with OpenCV's GaussianBlur of the sharp image.
"""
from __future__ import annotations

import cv2
import numpy as np
import pytest

from vservo_node.sim.camera_sim import Occluder, Photometric, SimCamera
from vservo_node.sim.render import PlanarTexture
from vservo_node.vision.camera import CameraModel

CAMERA = CameraModel.pinhole(640, 480, 600.0, 600.0, 319.5, 239.5)
T_FRONT = np.array([[1.0, 0, 0, 0.01], [0, 1.0, 0, -0.005], [0, 0, 1.0, 0.3], [0, 0, 0, 1]])


def checker_texture():
    tile = np.kron((np.indices((8, 8)).sum(axis=0) % 2) * 200 + 30, np.ones((16, 16)))
    image = np.repeat(tile[..., None], 3, axis=2).astype(np.uint8)
    return PlanarTexture.from_extent(image, image.shape[1] / 0.12, (-0.06, -0.06))


def render(photometric, t=0.0, seed=3):
    return SimCamera(CAMERA, checker_texture(), photometric, seed=seed).render(T_FRONT, t)


def test_noise_has_the_asked_spread_and_is_fixed_by_seed_and_time():
    clean = render(Photometric()).astype(float)
    noisy = render(Photometric(noise_std=3.0)).astype(float)
    unsaturated = (clean > 20) & (clean < 235)
    diff = (noisy - clean)[unsaturated]
    assert diff.std() == pytest.approx(3.0, rel=0.05)
    assert abs(diff.mean()) < 0.05
    assert np.array_equal(render(Photometric(noise_std=3.0)), render(Photometric(noise_std=3.0)))
    assert not np.array_equal(render(Photometric(noise_std=3.0), t=0.0),
                              render(Photometric(noise_std=3.0), t=1 / 30))
    assert not np.array_equal(render(Photometric(noise_std=3.0), seed=3),
                              render(Photometric(noise_std=3.0), seed=4))


def test_blur_matches_opencv_gaussian_blur():
    sharp = render(Photometric())
    blurred = render(Photometric(blur_sigma_px=1.5))
    reference = cv2.GaussianBlur(sharp, (0, 0), 1.5, borderType=cv2.BORDER_REPLICATE)
    # The board and a margin of 4 sigma around it are blurred; the table is smooth anyway.
    assert np.abs(blurred.astype(int) - reference.astype(int)).max() <= 2
    assert np.abs(blurred.astype(int) - sharp.astype(int)).max() > 50  # it did blur edges


def test_gain_scales_brightness():
    base = render(Photometric()).astype(float)
    bright = render(Photometric(gain=1.2)).astype(float)
    unsaturated = base * 1.2 < 250
    assert np.allclose(bright[unsaturated], np.round(base[unsaturated] * 1.2), atol=1.0)


def test_occluder_is_drawn_only_while_active():
    occluder = Occluder(rect_px=(100, 50, 220, 400), colour=(10, 200, 30), from_s=1.0,
                        until_s=2.0)
    photometric = Photometric(occluders=(occluder,))
    before, during = render(photometric, t=0.5), render(photometric, t=1.5)
    assert np.all(during[50:400, 100:220] == (10, 200, 30))
    assert not np.any(np.all(before[50:400, 100:220] == (10, 200, 30), axis=2))
    assert np.array_equal(before[:, 300:], during[:, 300:])


@pytest.mark.parametrize("field, value", [("noise_std", -1.0), ("gain", 0.0),
                                          ("blur_sigma_px", -0.5)])
def test_refuses_bad_settings(field, value):
    with pytest.raises(ValueError, match=field):
        Photometric(**{field: value})
