"""Window searches that fall outside the image find nothing instead of failing."""
import numpy as np
import pytest

from vservo_node.vision.features import make_detector
from vservo_node.vision.targets import load_target


@pytest.mark.parametrize("name", ["tray_dots", "tray_tags", "tray_poster"])
def test_window_outside_the_image(name):
    detector = make_detector(load_target(name))
    image = np.full((48, 64, 3), 128, np.uint8)
    det = detector.detect(image, [(("blob", 0), (100.0, 100.0, 200.0, 200.0))])
    assert len(det) == 0 and det.windowed and det.image_size == (64, 48)
