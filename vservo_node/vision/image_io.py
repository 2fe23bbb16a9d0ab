"""Pixel buffers to OpenCV images, and the colour arithmetic the detectors share.

`to_bgr_or_mono` turns the bytes of a sensor_msgs/Image (or of a sensor_msgs/CompressedImage,
JPEG or PNG) into a numpy image OpenCV reads: BGR uint8 (H, W, 3), mono uint8 (H, W) or, for
``mono16``, mono uint16 (H, W). bgr8, mono8 and little-endian mono16 come back as views of
the caller's buffer (no copy, row padding kept through the stride); the other encodings need
one conversion.

Colour: sRGB (IEC 61966-2-1:1999: transfer curve, primaries, D65 white) to CIE XYZ to CIELAB
and the colour difference Delta E*ab (CIE 15:2004, Colorimetry, sec. 8.2.1).
"""
from __future__ import annotations

from typing import Any, NoReturn, Sequence

import cv2
import numpy as np
from numpy.typing import ArrayLike

# A garbage frame makes OpenCV's decoders log a warning of their own on every frame; the
# callers refuse such frames with a throttled message that names the stream instead (cv2.error
# exceptions still reach them).
cv2.utils.logging.setLogLevel(cv2.utils.logging.LOG_LEVEL_FATAL)

# sensor_msgs/image_encodings names we decode; CompressedImage formats are matched separately.
RAW_ENCODINGS = ("mono8", "mono16", "bgr8", "rgb8", "bgra8", "rgba8",
                 "bayer_rggb8", "bayer_bggr8", "bayer_gbrg8", "bayer_grbg8")
COMPRESSED_FORMATS = ("jpeg", "png")
# Depth images (aligned to the colour image): 16UC1 millimetres, 32FC1 metres (REP 118).
DEPTH_ENCODINGS = ("16UC1", "32FC1")
SUPPORTED_ENCODINGS = RAW_ENCODINGS + COMPRESSED_FORMATS

_CHANNELS = {"mono8": 1, "mono16": 1, "bgr8": 3, "rgb8": 3, "bgra8": 4, "rgba8": 4,
             "16UC1": 1, "32FC1": 1}
_DTYPE = {"mono16": np.uint16, "16UC1": np.uint16, "32FC1": np.float32}
# ROS names the Bayer pattern by its top-left 2x2 block; OpenCV 4 has the same-named aliases
# (COLOR_BayerRGGB2BGR == COLOR_BayerBG2BGR). tests/vision/test_image_io.py mosaics a known
# picture with each pattern and checks the round trip.
_BAYER = {"bayer_rggb8": cv2.COLOR_BayerRGGB2BGR, "bayer_bggr8": cv2.COLOR_BayerBGGR2BGR,
          "bayer_gbrg8": cv2.COLOR_BayerGBRG2BGR, "bayer_grbg8": cv2.COLOR_BayerGRBG2BGR}
_CONVERT = {"rgb8": cv2.COLOR_RGB2BGR, "bgra8": cv2.COLOR_BGRA2BGR, "rgba8": cv2.COLOR_RGBA2BGR}


def _refuse(encoding: str, supported: Sequence[str] = SUPPORTED_ENCODINGS) -> NoReturn:
    raise ValueError(f"unsupported image encoding {encoding!r}; supported: "
                     f"{', '.join(supported)} (CompressedImage formats may read "
                     "e.g. 'rgb8; jpeg compressed bgr8')")


def compressed_kind(fmt: str) -> str | None:
    """'jpeg' or 'png' for a CompressedImage ``format`` string, None if it names neither.

    Formats look like ``jpeg``, ``png`` or ``rgb8; jpeg compressed bgr8`` (image_transport).
    Depth streams (``compressedDepth``) are not colour images and are refused by the caller.
    """
    text = fmt.lower()
    if "compresseddepth" in text:
        return None
    for kind in COMPRESSED_FORMATS:
        if kind in text or (kind == "jpeg" and "jpg" in text):
            return kind
    return None


def raw_view(buffer: Any, encoding: str, width: int, height: int, step: int,
             is_bigendian: bool = False) -> np.ndarray:
    """Numpy view (H, W) or (H, W, C) of a raw image buffer, without copying.

    Takes the encodings of ``RAW_ENCODINGS`` and ``DEPTH_ENCODINGS``. ``step`` is the row
    length in bytes (>= width * bytes per pixel; padding is skipped by the stride). Big-endian
    data is returned as a big-endian dtype view.
    """
    bayer = encoding in _BAYER
    if encoding not in _CHANNELS and not bayer:
        _refuse(encoding, RAW_ENCODINGS + DEPTH_ENCODINGS)
    channels = 1 if bayer else _CHANNELS[encoding]
    dtype = np.dtype(_DTYPE.get(encoding, np.uint8))
    if dtype.itemsize > 1:
        dtype = dtype.newbyteorder(">" if is_bigendian else "<")
    row = width * channels * dtype.itemsize
    if width <= 0 or height <= 0:
        raise ValueError(f"{encoding} image size must be positive, got {width}x{height}")
    if step < row:
        raise ValueError(f"{encoding} step {step} bytes is shorter than a row of {width} pixels "
                         f"({row} bytes)")
    flat = np.frombuffer(buffer, dtype=np.uint8)
    needed = step * (height - 1) + row
    if flat.size < needed:
        raise ValueError(f"{encoding} buffer holds {flat.size} bytes, a {width}x{height} image "
                         f"with step {step} needs {needed}")
    shape = (height, width) if channels == 1 else (height, width, channels)
    strides = (step, dtype.itemsize) if channels == 1 else (step, channels, 1)
    return np.ndarray(shape, dtype=dtype, buffer=flat, strides=strides)


def to_bgr_or_mono(buffer: Any, encoding: str, width: int | None = None, height: int | None = None,
                   step: int | None = None, is_bigendian: bool = False) -> np.ndarray:
    """Decode an image buffer to BGR uint8, mono uint8 or (mono16) mono uint16.

    Args:
        buffer: any object with the buffer protocol (bytes, bytearray, array.array, ndarray).
        encoding: a sensor_msgs/Image encoding from ``RAW_ENCODINGS``, or a CompressedImage
            format naming JPEG or PNG (then width, height and step are not needed).
        width, height: pixels; step: bytes per row (defaults to the unpadded row).
        is_bigendian: sensor_msgs/Image ``is_bigendian`` (matters for mono16 only).

    Raises:
        ValueError naming the encoding and the supported list for anything else, or naming
        the inconsistency for a buffer that does not fit its header.
    """
    kind = None if encoding in RAW_ENCODINGS else compressed_kind(encoding)
    if kind is not None:
        data = np.frombuffer(buffer, dtype=np.uint8)
        if data.size == 0:
            raise ValueError(f"empty {kind} image ({encoding!r}): no bytes to decode")
        try:
            image = cv2.imdecode(data, cv2.IMREAD_UNCHANGED)
        except cv2.error as exc:
            raise ValueError(f"could not decode the {kind} bytes of a {encoding!r} image: "
                             f"{str(exc).strip().splitlines()[-1]}") from None
        if image is None:
            raise ValueError(f"could not decode the {kind} bytes of a {encoding!r} image")
        if image.ndim == 3 and image.shape[2] == 4:
            image = cv2.cvtColor(image, cv2.COLOR_BGRA2BGR)
        if image.dtype not in (np.uint8, np.uint16) or (image.dtype == np.uint16
                                                         and image.ndim == 3):
            raise ValueError(f"decoded {kind} image is {image.dtype} with shape {image.shape}; "
                             "expected 8-bit grey or colour, or 16-bit grey")
        return image
    if encoding not in RAW_ENCODINGS:
        _refuse(encoding)
    if width is None or height is None:
        raise ValueError(f"a raw {encoding} image needs width and height")
    if step is None:
        step = width * (1 if encoding in _BAYER else _CHANNELS[encoding]) * (
            2 if encoding == "mono16" else 1)
    view = raw_view(buffer, encoding, width, height, step, is_bigendian)
    if encoding in ("bgr8", "mono8"):
        return view
    if encoding == "mono16":
        return view if view.dtype.isnative else view.astype(np.uint16)
    if encoding in _BAYER:
        return cv2.cvtColor(view, _BAYER[encoding])
    return cv2.cvtColor(view, _CONVERT[encoding])


def to_mono8(image: np.ndarray) -> np.ndarray:
    """Grey uint8 of a BGR uint8, mono uint8 or mono uint16 image.

    16-bit images are stretched linearly from their minimum to their maximum value, so a 12-bit
    camera in a 16-bit container keeps its contrast (common practice, no source).
    """
    if image.dtype == np.uint16:
        return np.asarray(cv2.normalize(image, None, 0, 255, cv2.NORM_MINMAX,  # type: ignore[call-overload]
                                        dtype=cv2.CV_8U))
    if image.dtype != np.uint8:
        raise ValueError(f"expected a uint8 or uint16 image, got {image.dtype}")
    if image.ndim == 3:
        return cv2.cvtColor(image, cv2.COLOR_BGR2GRAY)
    return image


# ----------------------------------------------------------------------------- colour
# IEC 61966-2-1:1999 sRGB: linear RGB -> XYZ (D65), and the D65 white as the row sums (Y = 1).
_RGB_TO_XYZ = np.array([[0.4124, 0.3576, 0.1805],
                        [0.2126, 0.7152, 0.0722],
                        [0.0193, 0.1192, 0.9505]])
_WHITE_D65 = _RGB_TO_XYZ.sum(axis=1)
_DELTA = 6.0 / 29.0  # CIE 15:2004 CIELAB: the cube root is replaced by a line below DELTA^3


def srgb_to_linear(c: ArrayLike) -> np.ndarray:
    """Linear-light values of gamma-encoded sRGB values ``c`` in [0, 1] (IEC 61966-2-1)."""
    v = np.asarray(c, dtype=float)
    return np.where(v <= 0.04045, v / 12.92, ((v + 0.055) / 1.055) ** 2.4)


# Linear-light value of each 8-bit code, for averaging pixel colours in linear light.
SRGB8_TO_LINEAR = srgb_to_linear(np.arange(256) / 255.0)


def linear_rgb_to_lab(rgb: ArrayLike) -> np.ndarray:
    """CIELAB (L*, a*, b*) of linear-light sRGB ``rgb`` (..., 3) in [0, 1], D65 white."""
    xyz = np.asarray(rgb, dtype=float) @ _RGB_TO_XYZ.T / _WHITE_D65
    f = np.where(xyz > _DELTA ** 3, np.cbrt(xyz), xyz / (3 * _DELTA ** 2) + 4.0 / 29.0)
    return np.stack([116.0 * f[..., 1] - 16.0,
                     500.0 * (f[..., 0] - f[..., 1]),
                     200.0 * (f[..., 1] - f[..., 2])], axis=-1)


def srgb_to_lab(rgb: ArrayLike) -> np.ndarray:
    """CIELAB of gamma-encoded sRGB ``rgb`` (..., 3) in [0, 1] (R, G, B order)."""
    return linear_rgb_to_lab(srgb_to_linear(rgb))


def delta_e_ab(lab1: ArrayLike, lab2: ArrayLike) -> np.ndarray:
    """CIE 1976 colour difference Delta E*ab: Euclidean distance in CIELAB (broadcasts)."""
    distance: np.ndarray = np.linalg.norm(np.asarray(lab1, float) - np.asarray(lab2, float),
                                          axis=-1)
    return distance
