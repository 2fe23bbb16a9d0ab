"""sRGB -> CIELAB and Delta E*ab against published values and OpenCV."""
import cv2
import numpy as np
import pytest

from vservo_node.vision.image_io import delta_e_ab, srgb_to_lab, srgb_to_linear

# CIELAB (D65) of the sRGB primaries and white, from memory (values tabulated widely for
# IEC 61966-2-1 sRGB with the CIE 15:2004 CIELAB formulas); confirmed below by OpenCV.
PUBLISHED = {
    (1.0, 0.0, 0.0): (53.24, 80.09, 67.20),     # red, from memory
    (0.0, 1.0, 0.0): (87.73, -86.18, 83.18),    # green, from memory
    (0.0, 0.0, 1.0): (32.30, 79.19, -107.86),   # blue, from memory
    (1.0, 1.0, 1.0): (100.0, 0.0, 0.0),         # white D65, from memory
}


@pytest.mark.parametrize("rgb", list(PUBLISHED))
def test_primaries_match_published_values(rgb):
    # CIE 15:2004 sec. 8.2.1 (CIELAB); IEC 61966-2-1:1999 (sRGB). Tolerance 0.5 from the brief.
    assert np.abs(srgb_to_lab(np.array(rgb)) - PUBLISHED[rgb]).max() < 0.5


@pytest.mark.parametrize("rgb", list(PUBLISHED))
def test_published_values_confirmed_by_opencv(rgb):
    # Independent implementation: OpenCV cvtColor RGB2Lab on float32 input (D65 white).
    lab_cv = cv2.cvtColor(np.array([[rgb]], np.float32), cv2.COLOR_RGB2Lab).ravel()
    assert np.abs(lab_cv - PUBLISHED[rgb]).max() < 0.5


def test_agrees_with_opencv_on_random_colours():
    # OpenCV cvtColor RGB2Lab (float32) as the reference implementation; OpenCV interpolates
    # its transfer curve from a table, so agreement is to a few tenths (0.28 measured).
    rng = np.random.default_rng(1)
    rgb = rng.uniform(0, 1, (500, 3))
    lab_cv = cv2.cvtColor(rgb.astype(np.float32)[None], cv2.COLOR_RGB2Lab)[0]
    assert np.abs(srgb_to_lab(rgb) - lab_cv).max() < 0.5


def test_transfer_curve_pieces_meet():
    # IEC 61966-2-1: linear segment below 0.04045, power 2.4 segment above; they join there.
    lo = 0.04045 / 12.92
    hi = ((0.04045 + 0.055) / 1.055) ** 2.4
    assert abs(lo - hi) < 1e-6
    assert srgb_to_linear(0.0) == 0.0 and abs(srgb_to_linear(1.0) - 1.0) < 1e-12


def test_delta_e_is_euclidean_distance_in_lab():
    # CIE 15:2004 sec. 8.2.1: Delta E*ab = sqrt(dL^2 + da^2 + db^2).
    a, b = np.array([50.0, 10.0, -20.0]), np.array([53.0, 6.0, -8.0])
    assert delta_e_ab(a, b) == pytest.approx(np.sqrt(9 + 16 + 144))
    assert delta_e_ab(b, a) == delta_e_ab(a, b)
