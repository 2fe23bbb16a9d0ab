"""Cost of moving camera images between NumPy and sensor_msgs/Image, in one process (no DDS).

Building a message: ways to fill ``Image.data`` from a NumPy frame (the generated setter copies
element by element for anything but array.array / bytes-like input). Receiving: the typed path
(rclpy deserializes into an Image, copying the pixels into an array.array) against a raw
subscription's bytes read in place by ``convert.image_from_cdr``.

    .venv/bin/python benchmarks/image_convert_bench.py
"""
from __future__ import annotations

import array
import sys
import time
from pathlib import Path

import numpy as np
from rclpy.serialization import deserialize_message, serialize_message
from sensor_msgs.msg import Image

sys.path.insert(0, str(Path(__file__).resolve().parent.parent))
from vservo_node.ros import convert  # noqa: E402

SIZES = {"640x480": (480, 640), "1920x1080": (1080, 1920)}


def _ms_per_call(fn, repeat):
    fn()
    start = time.perf_counter()
    for _ in range(repeat):
        fn()
    return (time.perf_counter() - start) / repeat * 1e3


def main():
    print(f"{'size':>10} {'operation':<46} {'ms/call':>9}")
    for size, (h, w) in SIZES.items():
        frame = np.random.default_rng(0).integers(0, 255, (h, w, 3), dtype=np.uint8)
        msg = convert.numpy_to_image(frame, "rgb8")
        wire = serialize_message(msg)
        blank = Image()

        def set_list():
            blank.data = frame.ravel().tolist()

        def set_array_from_ndarray():
            blank.data = array.array("B", frame.ravel())

        rows = [
            ("build: convert.numpy_to_image", lambda: convert.numpy_to_image(frame, "rgb8"), 50),
            ("build: data = ndarray.tolist()", set_list, 2),
            ("build: data = array.array('B', ndarray)", set_array_from_ndarray, 2),
            ("receive typed: deserialize + image_to_numpy",
             lambda: convert.image_to_numpy(deserialize_message(wire, Image)), 50),
            ("receive raw: image_from_cdr + image_to_numpy",
             lambda: convert.image_to_numpy(convert.image_from_cdr(wire)), 200),
            ("publish side: serialize_message", lambda: serialize_message(msg), 50),
        ]
        for label, fn, repeat in rows:
            print(f"{size:>10} {label:<46} {_ms_per_call(fn, repeat):>9.3f}")


if __name__ == "__main__":
    main()
