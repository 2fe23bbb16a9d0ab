"""What a detector reports (``Detection``) and the image helpers every detector uses: colour
images, sizes, search windows (vservo_node.vision.features)."""
from __future__ import annotations

from dataclasses import dataclass, field
from typing import Any, Protocol, Sequence

import numpy as np

from vservo_node.vision.image_io import linear_rgb_to_lab


@dataclass
class Detection:
    """Features found in one image.

    Attributes:
        kind: 'dots', 'markers' or 'textured'.
        points: (N, 2) pixel coordinates, float64.
        keys: N hashable identities, e.g. ('blob', 2), ('tag', 17, 0), ('pt', 3).
        image_size: (width, height) of the image, pixels.
        colours_linear: dots only: (N, 3) mean colour, linear-light sRGB (R, G, B) in [0, 1].
        quality: figures per feature (arrays of N) or per image (scalars), by kind.
        timings: milliseconds spent, by stage.
        windowed: found by a window search rather than over the full frame.
        homography: textured only: 3x3 map from model coordinates to pixels.
    """
    kind: str
    points: np.ndarray
    keys: list[Any]
    image_size: tuple[int, int]
    colours_linear: np.ndarray | None = None
    quality: dict[str, Any] = field(default_factory=dict)
    timings: dict[str, float] = field(default_factory=dict)
    windowed: bool = False
    homography: np.ndarray | None = None

    def __len__(self) -> int:
        return len(self.keys)

    @property
    def colours_lab(self) -> np.ndarray | None:
        """Dots: (N, 3) CIELAB (D65) of the measured colours."""
        return None if self.colours_linear is None else linear_rgb_to_lab(self.colours_linear)


def _colour_image(image: np.ndarray, allow16: bool = False) -> np.ndarray:
    if image.dtype == np.uint16 and image.ndim == 2:
        if allow16:
            return image
        raise ValueError("mono16 images are accepted by the marker detector only; convert "
                         "to 8 bits or use an 8-bit encoding")
    if image.dtype != np.uint8 or not (image.ndim == 2 or (image.ndim == 3
                                                            and image.shape[2] == 3)):
        raise ValueError(f"expected a BGR uint8 (H, W, 3) or mono (H, W) image, got "
                         f"{image.dtype} {image.shape}")
    return image


def _size(image: np.ndarray) -> tuple[int, int]:
    return (image.shape[1], image.shape[0])


def _window(image: np.ndarray, rect: Sequence[float], min_side: int = 4
            ) -> tuple[np.ndarray, int, int] | None:
    """(view, x0, y0) of ``image`` inside rect (x0, y0, x1, y1) clipped to the image, or None
    if less than ``min_side`` pixels of it lie in the image."""
    h, w = image.shape[:2]
    x0, y0 = max(0, int(rect[0])), max(0, int(rect[1]))
    x1, y1 = min(w, int(np.ceil(rect[2]))), min(h, int(np.ceil(rect[3])))
    if x1 - x0 < min_side or y1 - y0 < min_side:
        return None
    return image[y0:y1, x0:x1], x0, y0


def _search_area(grey: np.ndarray, windows: Sequence[Window] | None
                 ) -> tuple[np.ndarray, int, int] | None:
    """(view, x0, y0): the full image, or its part inside the single window given; None
    when the window lies outside the image."""
    return (grey, 0, 0) if windows is None else _window(grey, windows[0][1], min_side=16)


# A search window of a detector: (key or marker id or None, (x0, y0, x1, y1), then what the
# detector kind adds: a marker's predicted corners, the textured target's last homography and
# predicted motion).
Window = tuple[Any, ...]


class Detector(Protocol):
    """What ``Tracker`` and the servo use of a detector (DotDetector, MarkerDetector,
    TexturedDetector)."""
    kind: str
    expected: int

    def detect(self, image: np.ndarray, windows: Sequence[Window] | None = None) -> Detection:
        ...

    def windows(self, last: Detection, predicted: np.ndarray) -> list[Window]:
        ...
