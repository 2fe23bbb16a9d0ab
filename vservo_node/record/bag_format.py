"""The run record's names (files, folders, message types, the typestore) and the image
conversions the writer and the reader share (the format: vservo_node.record.bag)."""
from __future__ import annotations

import re
from datetime import datetime, timezone
from typing import Final

import numpy as np
from rosbags.typesys import Stores, get_typestore

ROSBAG2_VERSION: Final = 9     # the newest format rosbags 0.11.9 writes (rosbag2 Jazzy and later)
ROS_DISTRO = "jazzy"
DEFAULT_SPLIT_S = 0.75        # wall seconds per split; loss bound split + poll = 0.8 s < 1 s
DEFAULT_POLL_S = 0.05
DEFAULT_SPLIT_BYTES = 16 * 2**20
OPEN_DIR = ".open"
PARAMS_FILE = "params.yaml"
RESULT_FILE = "result.json"
METADATA_FILE = "metadata.yaml"
REFERENCE_DIR = "reference"   # the taught reference of the run, copied in (see copy_reference)
# params.yaml holds robot_description (the URDF text, up to ~1 MB for large robots) besides the
# controller parameters: the cap of a URDF (control/kinematics.py), not of our small files.
PARAMS_MAX_BYTES = 16 << 20

IMAGE = "sensor_msgs/msg/Image"
COMPRESSED_IMAGE = "sensor_msgs/msg/CompressedImage"
_COMPRESS_FORMATS = ("png", "jpeg")


def default_typestore():
    """rosbags typestore of ROS 2 Jazzy: definitions and RIHS01 hashes of every type we record."""
    return get_typestore(Stores.ROS2_JAZZY)


def run_folder_name(scenario: str, started: datetime) -> str:
    """``YYYYmmddTHHMMSSZ_<scenario>`` in UTC; the scenario is reduced to [A-Za-z0-9_-]."""
    stamp = started.astimezone(timezone.utc).strftime("%Y%m%dT%H%M%SZ")
    slug = re.sub(r"[^A-Za-z0-9_-]+", "_", scenario).strip("_") or "run"
    return f"{stamp}_{slug}"



_ENCODINGS = {  # sensor_msgs/image_encodings: name -> (dtype, channels)
    "mono8": (np.uint8, 1), "8UC1": (np.uint8, 1), "mono16": (np.uint16, 1),
    "16UC1": (np.uint16, 1), "rgb8": (np.uint8, 3), "bgr8": (np.uint8, 3), "8UC3": (np.uint8, 3),
    "rgba8": (np.uint8, 4), "bgra8": (np.uint8, 4), "32FC1": (np.float32, 1),
}


def image_to_array(img) -> np.ndarray | None:
    """sensor_msgs/Image (rosbags object) -> (H, W[, C]) array in its own channel order.

    None for encodings not in the table above (e.g. Bayer patterns).
    """
    entry = _ENCODINGS.get(img.encoding)
    if entry is None:
        return None
    dtype, channels = np.dtype(entry[0]), entry[1]
    dtype = dtype.newbyteorder(">" if img.is_bigendian else "<")
    rows = np.frombuffer(img.data.tobytes(), np.uint8).reshape(img.height, img.step)
    row_bytes = img.width * channels * dtype.itemsize
    pixels = np.ascontiguousarray(rows[:, :row_bytes]).view(dtype).astype(dtype.newbyteorder("="))
    shape = (img.height, img.width) if channels == 1 else (img.height, img.width, channels)
    return pixels.reshape(shape)


def image_to_rgb(msgtype: str, msg) -> np.ndarray | None:
    """An Image or CompressedImage (rosbags objects) as (H, W, 3) uint8 RGB for display; 16-bit
    and float images are stretched to 0..255. None when it cannot be decoded."""
    import cv2  # only needed to show images

    if msgtype == COMPRESSED_IMAGE:
        array = cv2.imdecode(np.asarray(msg.data, np.uint8), cv2.IMREAD_UNCHANGED)
        rgb_order = False      # OpenCV decodes colour as BGR
    else:
        array = image_to_array(msg)
        rgb_order = msg.encoding.startswith("rgb")
    if array is None:
        return None
    if array.dtype != np.uint8:
        array = cv2.normalize(array, None, 0, 255, cv2.NORM_MINMAX,  # type: ignore[call-overload]
                              dtype=cv2.CV_8U)
    if array.ndim == 2:
        return np.repeat(array[..., None], 3, axis=2)
    array = array[..., :3]
    return np.ascontiguousarray(array if rgb_order else array[..., ::-1])
