"""Image buffers: every accepted encoding decodes to the same detection; others are refused."""
import array

import cv2
import numpy as np
import pytest
import vision_synth as vs

from vservo_node.vision.features import DotDetector, MarkerDetector
from vservo_node.vision.image_io import (SUPPORTED_ENCODINGS, raw_view, to_bgr_or_mono,
                                         to_mono8)
from vservo_node.vision.matching import match_dots
from vservo_node.vision.targets import load_target

SIZE = (640, 480)
K = vs.intrinsics(600.0, SIZE)
POSE = vs.pose((15, -10, 20), (0.01, 0.0, 0.4))

# sensor_msgs/image_encodings: bayer_XXXX8 names the colours of the top-left 2x2 block, row by
# row. Channel index in a BGR image for each of the four positions [0,0], [0,1], [1,0], [1,1].
BAYER_LAYOUT = {"bayer_rggb8": (2, 1, 1, 0), "bayer_bggr8": (0, 1, 1, 2),
                "bayer_gbrg8": (1, 0, 2, 1), "bayer_grbg8": (1, 2, 0, 1)}


def mosaic(bgr, encoding):
    out = np.empty(bgr.shape[:2], np.uint8)
    for (dy, dx), ch in zip(((0, 0), (0, 1), (1, 0), (1, 1)), BAYER_LAYOUT[encoding]):
        out[dy::2, dx::2] = bgr[dy::2, dx::2, ch]
    return out


def encode(bgr, encoding):
    """(buffer, step) of a BGR image in a raw encoding, or bytes of a compressed one."""
    if encoding == "rgb8":
        a = bgr[..., ::-1]
    elif encoding == "bgra8":
        a = np.dstack([bgr, np.full(bgr.shape[:2], 255, np.uint8)])
    elif encoding == "rgba8":
        a = np.dstack([bgr[..., ::-1], np.full(bgr.shape[:2], 255, np.uint8)])
    elif encoding.startswith("bayer"):
        a = mosaic(bgr, encoding)
    elif encoding in ("png", "jpeg"):
        ok, data = cv2.imencode("." + encoding, bgr, [cv2.IMWRITE_JPEG_QUALITY, 95])
        return data.tobytes(), None
    else:
        a = bgr
    a = np.ascontiguousarray(a)
    return a.tobytes(), a.strides[0]


@pytest.fixture(scope="module")
def dots_scene():
    target = load_target("tray_dots")
    return target, vs.render(target, K, SIZE, POSE, noise=1.0)


@pytest.fixture(scope="module")
def tags_scene():
    target = load_target("tray_tags")
    return target, vs.render(target, K, SIZE, POSE, noise=1.0)


def identified(target, image):
    det = DotDetector(target).detect(image)
    m = match_dots(det, target.keys(), target.nominal_lab(), target.model_points()[:, :2])
    return m.keys, m.points


COLOUR_ENCODINGS = ["bgr8", "rgb8", "bgra8", "rgba8", "bayer_rggb8", "bayer_bggr8",
                    "bayer_gbrg8", "bayer_grbg8", "png", "jpeg"]


@pytest.mark.parametrize("encoding", COLOUR_ENCODINGS)
def test_colour_encodings_give_the_same_dots(dots_scene, encoding):
    target, bgr = dots_scene
    keys0, pts0 = identified(target, bgr)
    assert keys0 == target.keys()
    buffer, step = encode(bgr, encoding)
    image = to_bgr_or_mono(buffer, encoding, SIZE[0], SIZE[1], step)
    keys, pts = identified(target, image)
    assert keys == keys0
    # Lossless encodings decode to the very same pixels; Bayer demosaicing and JPEG change
    # edges a little (tolerance common practice, no source).
    lossless = encoding in ("bgr8", "rgb8", "bgra8", "rgba8", "png")
    assert np.abs(pts - pts0).max() < (1e-9 if lossless else 0.3)


@pytest.mark.parametrize("encoding", ["mono8", "mono16", "png16", "bgr8", "bayer_grbg8"])
def test_marker_encodings_give_the_same_corners(tags_scene, encoding):
    target, bgr = tags_scene
    grey = cv2.cvtColor(bgr, cv2.COLOR_BGR2GRAY)
    ref = MarkerDetector(target).detect(grey)
    if encoding == "mono8":
        image = to_bgr_or_mono(grey.tobytes(), "mono8", *SIZE)
    elif encoding == "mono16":
        image = to_bgr_or_mono((grey.astype(np.uint16) * 257).tobytes(), "mono16", *SIZE)
    elif encoding == "png16":
        image = to_bgr_or_mono(cv2.imencode(".png", grey.astype(np.uint16) * 257)[1], "png")
        assert image.dtype == np.uint16
    else:
        buffer, step = encode(bgr, encoding)
        image = to_bgr_or_mono(buffer, encoding, SIZE[0], SIZE[1], step)
    det = MarkerDetector(target).detect(image)
    assert det.keys == ref.keys and len(det) == 16
    assert np.abs(det.points - ref.points).max() < (0.3 if "bayer" in encoding else 1e-3)


def test_bayer_names_follow_ros_layout():
    # A smooth picture mosaicked by the sensor_msgs layout must demosaic back to itself; a
    # swapped pattern would exchange red and blue (errors of ~100 grey levels).
    yy, xx = np.mgrid[0:64, 0:64]
    bgr = np.dstack([40 + 2 * xx, 60 + yy, 200 - 2 * yy]).astype(np.uint8)
    for encoding in BAYER_LAYOUT:
        out = to_bgr_or_mono(mosaic(bgr, encoding).tobytes(), encoding, 64, 64)
        assert np.abs(out[4:-4, 4:-4].astype(int) - bgr[4:-4, 4:-4]).max() <= 4, encoding


def test_views_without_copies_and_row_padding():
    rng = np.random.default_rng(0)
    padded = rng.integers(0, 256, (10, 7 * 3 + 5), dtype=np.uint8)  # 5 bytes of padding a row
    buf = bytearray(padded.tobytes())
    view = to_bgr_or_mono(buf, "bgr8", 7, 10, step=26)
    assert np.shares_memory(view, np.frombuffer(buf, np.uint8))
    assert np.array_equal(view, padded[:, :21].reshape(10, 7, 3))
    mono = array.array("B", range(20))
    assert np.shares_memory(to_bgr_or_mono(mono, "mono8", 5, 4), np.frombuffer(mono, np.uint8))
    # OpenCV reads the padded view as it is
    assert cv2.cvtColor(view, cv2.COLOR_BGR2GRAY).shape == (10, 7)


def test_mono16_big_endian():
    values = np.array([[1, 256, 4095, 65535]], dtype=np.uint16)
    little = to_bgr_or_mono(values.astype("<u2").tobytes(), "mono16", 4, 1)
    big = to_bgr_or_mono(values.astype(">u2").tobytes(), "mono16", 4, 1, is_bigendian=True)
    assert np.array_equal(little, values) and np.array_equal(big, values)
    # stretched from min to max: (v - 1) * 255 / (65535 - 1), rounded
    assert to_mono8(values).tolist() == np.rint((values - 1.0) * 255 / 65534).tolist()


@pytest.mark.parametrize("encoding", ["yuv422", "bgr16", "16UC1", "32FC1", "8UC3", ""])
def test_unsupported_encodings_are_refused_with_the_list(encoding):
    with pytest.raises(ValueError) as err:
        to_bgr_or_mono(bytes(48), encoding, 4, 4)
    message = str(err.value)
    assert repr(encoding) in message
    assert all(name in message for name in SUPPORTED_ENCODINGS)


def test_inconsistent_buffers_are_refused():
    with pytest.raises(ValueError, match="needs 48"):
        to_bgr_or_mono(bytes(47), "bgr8", 4, 4)
    with pytest.raises(ValueError, match="shorter than a row"):
        to_bgr_or_mono(bytes(48), "bgr8", 4, 4, step=8)
    with pytest.raises(ValueError, match="could not decode"):
        to_bgr_or_mono(b"not a jpeg", "rgb8; jpeg compressed bgr8")


def test_depth_views():
    mm = np.array([[0, 1000], [65535, 250]], dtype=np.uint16)
    assert np.array_equal(raw_view(mm.tobytes(), "16UC1", 2, 2, 4), mm)
    m = np.array([[np.nan, 1.5]], dtype=np.float32)
    v = raw_view(m.tobytes(), "32FC1", 2, 1, 8)
    assert v.dtype == np.float32 and v[0, 1] == 1.5


@pytest.mark.parametrize("data, encoding", [(b"", "jpeg"), (b"", "png"),
                                            (b"\x89PNG\r\n\x1a\nnot a png at all", "png"),
                                            (b"\xff\xd8\xff\xe0 not a jpeg", "jpeg")])
def test_empty_or_garbage_compressed_frames_are_refused_in_words(data, encoding, capfd):
    """An empty CompressedImage used to escape as an internal error (halt internal_error),
    and OpenCV's decoders printed a warning of their own on every garbage frame."""
    with pytest.raises(ValueError, match="decode|empty"):
        to_bgr_or_mono(data, encoding)
    assert capfd.readouterr().err == ""
