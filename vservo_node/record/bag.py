"""Run records: one servo run as a rosbag2 bag (MCAP storage), written crash-safe; and read back.

Writing (`RunRecorder`): messages arrive as CDR bytes (what rclpy's `serialize_message` returns)
or rosbags message objects, with their ROS 2 type name, topic and a timestamp in nanoseconds.
The bag is a folder ``<root>/<UTC time>_<scenario>/`` holding

- ``<folder>_<i>.mcap``: short MCAP files (splits), each closed with its summary section by the
  rosbags writer;
- ``metadata.yaml``: rosbag2 metadata (format version 9, as rosbags writes it), written when the
  bag opens and rewritten after every completed split, so it always lists only complete files;
- ``params.yaml``: the parameters of the run, ``result.json``: the run result once known;
- ``reference/``: a copy of the taught reference file and the files it names (`copy_reference`).

Crash safety: the split being written lives in a hidden folder ``.open/`` and is moved into the
bag only once closed. A SIGKILL therefore loses at most the open split: a split is closed when it
is ``split_s`` seconds old (wall clock, checked by a background thread every ``poll_s``) or
``split_bytes`` large, so by default at most 0.75 s + 0.05 s of data is lost (plus scheduling
delays of the recording thread).

Reading (`load_run`): any rosbag2 bag of the same topics, whether ours or from a plain
``ros2 bag record`` (sqlite3 or mcap), through rosbags' AnyReader; topics are found by their
name suffix (namespaces allowed) and type. Times are seconds since the first message of the bag
(bag log time), so all series share one clock.
"""
from __future__ import annotations

import json
import os
import re
import shutil
import threading
import time
from dataclasses import dataclass, field
from datetime import datetime, timezone
from pathlib import Path
from typing import Any

import numpy as np
from rosbags.highlevel import AnyReader
from rosbags.rosbag2 import StoragePlugin, Writer
from rosbags.typesys import Stores, get_typestore

from vservo_node import interface as itf
from vservo_node.yaml_files import (METADATA_MAX_BYTES, YamlFileError, brief, dump_yaml,
                                    load_yaml, screen_yaml)

ROSBAG2_VERSION = 9           # the newest format rosbags 0.11.9 writes (rosbag2 Jazzy and later)
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


def _write_atomic(path: Path, text: str) -> None:
    """Write, fsync and rename, so a reader sees either the old or the new file whole."""
    tmp = path.with_name(path.name + ".tmp")
    with open(tmp, "w", encoding="utf8") as f:
        f.write(text)
        f.flush()
        os.fsync(f.fileno())
    os.replace(tmp, path)


@dataclass
class _FileInfo:
    """One completed split: its name, time span (ns) and message count."""
    name: str
    start_ns: int
    end_ns: int
    count: int


@dataclass
class _Split:
    """The open split: a rosbags Writer in .open/<stem>/ and its bookkeeping."""
    writer: Writer
    stem: str
    opened_wall: float
    connections: dict = field(default_factory=dict)   # topic -> rosbags Connection
    counts: dict = field(default_factory=dict)        # topic -> messages in this split
    start_ns: int = 2**63 - 1
    end_ns: int = 0
    count: int = 0
    nbytes: int = 0


class RunRecorder:
    """Records one run into ``root/<UTC time>_<scenario>/`` as a split MCAP rosbag2 bag.

    Args:
        root: folder holding the runs (created if missing).
        scenario: short name of the scenario; part of the folder name.
        params: parameters of the run, saved as params.yaml at once (optional).
        started: start time (UTC) used in the folder name; now by default.
        typestore: rosbags typestore with every recorded type; ROS 2 Jazzy by default.
        split_s, split_bytes: a split is closed when this old (wall s) or this large (bytes).
        poll_s: period (wall s) of the thread that closes splits that have aged.
        image_every: keep every k-th message of each image topic (1 keeps all).
        image_format: None records sensor_msgs/Image as is; 'png' or 'jpeg' records it as
            sensor_msgs/CompressedImage on ``<topic>/compressed`` (image_transport's naming).
        jpeg_quality: 0..100 for 'jpeg'.
        folder_name: the bag folder's name instead of ``<UTC time>_<scenario>`` (a suffix
            ``-1``, ``-2``... is added if it exists).

    Thread-safe: `write` may be called from any thread. Use as a context manager or call
    `close`. Topic names are made absolute ('servo/status' -> '/servo/status').
    """

    def __init__(self, root: str | Path, scenario: str, *, params: dict | None = None,
                 started: datetime | None = None, typestore=None,
                 split_s: float = DEFAULT_SPLIT_S, split_bytes: int = DEFAULT_SPLIT_BYTES,
                 poll_s: float = DEFAULT_POLL_S, image_every: int = 1,
                 image_format: str | None = None, jpeg_quality: int = 90,
                 folder_name: str | None = None):
        if split_s <= 0 or poll_s <= 0 or split_bytes <= 0:
            raise ValueError(f"split_s, poll_s, split_bytes must be > 0, got "
                             f"{split_s}, {poll_s}, {split_bytes}")
        if image_every < 1:
            raise ValueError(f"image_every must be an integer >= 1, got {image_every}")
        if image_format not in (None, *_COMPRESS_FORMATS):
            raise ValueError(f"image_format must be None, 'png' or 'jpeg', got {image_format!r}")
        self.typestore = typestore or default_typestore()
        self.split_s, self.split_bytes, self.poll_s = split_s, split_bytes, poll_s
        self.image_every, self.image_format = image_every, image_format
        self.jpeg_quality = jpeg_quality
        self.bag_dir = self._make_folder(Path(root), scenario,
                                         started or datetime.now(timezone.utc), folder_name)
        self.scenario = scenario
        self._topics: dict[str, tuple[str, str]] = {}   # topic -> (msgtype, rihs01)
        self._counts: dict[str, int] = {}               # topic -> messages in completed splits
        self._image_seen: dict[str, int] = {}
        self._files: list[_FileInfo] = []
        self._split: _Split | None = None
        self._lock = threading.Lock()
        self._closed = False
        self._failure: Exception | None = None   # what stopped the ageing thread, if anything
        (self.bag_dir / OPEN_DIR).mkdir()
        if params is not None:
            _write_atomic(self.bag_dir / PARAMS_FILE, dump_yaml(params, sort_keys=False))
        self._write_metadata()
        self._stop = threading.Event()
        self._thread = threading.Thread(target=self._age_loop, name="RunRecorder", daemon=True)
        self._thread.start()

    @staticmethod
    def _make_folder(root: Path, scenario: str, started: datetime,
                     name: str | None = None) -> Path:
        root.mkdir(parents=True, exist_ok=True)
        base = name or run_folder_name(scenario, started)
        for i in range(1000):
            path = root / (base if i == 0 else f"{base}-{i}")
            try:
                path.mkdir()
                return path
            except FileExistsError:
                continue
        raise FileExistsError(f"no free run folder name under {root} for {base}")

    # --- writing -------------------------------------------------------------------------------
    def write(self, topic: str, msgtype: str, data: Any, stamp_ns: int) -> None:
        """Record one message.

        Args:
            topic: topic name; made absolute if relative.
            msgtype: ROS 2 type name, e.g. 'sensor_msgs/msg/JointState'.
            data: CDR bytes (bytes, bytearray, memoryview) or a rosbags message object.
            stamp_ns: log time, nanoseconds (the receive time, as ros2 bag record uses).
        """
        topic = topic if topic.startswith("/") else "/" + topic
        if msgtype in (IMAGE, COMPRESSED_IMAGE):
            with self._lock:
                n = self._image_seen.get(topic, 0)
                self._image_seen[topic] = n + 1
            if n % self.image_every:
                return
        raw = (bytes(data) if isinstance(data, (bytes, bytearray, memoryview))
               else bytes(self.typestore.serialize_cdr(data, msgtype)))
        if msgtype == IMAGE and self.image_format:
            compressed = self._compress(raw)
            if compressed is not None:
                topic, msgtype, raw = topic + "/compressed", COMPRESSED_IMAGE, compressed
        with self._lock:
            if self._closed:
                raise RuntimeError(f"recorder of {self.bag_dir} is closed")
            if self._failure is not None:
                raise RuntimeError(f"recording into {self.bag_dir} failed: "
                                   f"{self._failure}") from self._failure
            self._register(topic, msgtype)
            split = self._split or self._open_split()
            if topic not in split.connections:
                split.connections[topic] = split.writer.add_connection(
                    topic, msgtype, typestore=self.typestore)
            split.writer.write(split.connections[topic], int(stamp_ns), raw)
            split.start_ns = min(split.start_ns, int(stamp_ns))
            split.end_ns = max(split.end_ns, int(stamp_ns))
            split.count += 1
            split.nbytes += len(raw)
            split.counts[topic] = split.counts.get(topic, 0) + 1
            if split.nbytes >= self.split_bytes:
                self._close_split()

    def set_result(self, result: dict) -> None:
        """Save the run result (keys as interface.RESULT_FIELDS) as result.json, at once."""
        _write_atomic(self.bag_dir / RESULT_FILE, json.dumps(result, indent=2, sort_keys=True))

    def close(self) -> None:
        """Close the open split, refresh metadata.yaml and remove the .open/ folder."""
        with self._lock:
            if self._closed:
                return
            self._closed = True
        self._stop.set()
        self._thread.join()
        with self._lock:
            if self._split is not None:
                self._close_split()
        (self.bag_dir / OPEN_DIR).rmdir()

    def copy_reference(self, path: str | Path) -> Path | None:
        """Copy the taught reference file ``path`` (YAML) into ``reference/`` of the bag, with
        the files it names beside it (its ``image``: the taught view), so the record keeps the
        goal it was servoed to after the station is taught again. Returns the copy; None when
        ``path`` is not a readable file (the bag still records the path in params.yaml)."""
        source = Path(path)
        if not source.is_file():
            return None
        folder = self.bag_dir / REFERENCE_DIR
        folder.mkdir(exist_ok=True)
        copy = Path(shutil.copy2(source, folder / source.name))
        try:
            data = load_yaml(source, prefix="reference ")
        except YamlFileError:   # not plain YAML: the copy is all we can keep
            return copy
        for name in _named_files(data):
            beside = source.parent / name
            if beside.is_file() and not (folder / name).exists():
                (folder / name).parent.mkdir(parents=True, exist_ok=True)
                shutil.copy2(beside, folder / name)
        return copy

    def __enter__(self) -> RunRecorder:
        return self

    def __exit__(self, *exc) -> None:
        self.close()

    # --- internals -----------------------------------------------------------------------------
    def _register(self, topic: str, msgtype: str) -> None:
        known = self._topics.get(topic)
        if known is None:
            try:
                rihs01 = self.typestore.hash_rihs01(msgtype)
            except KeyError:
                raise ValueError(f"type {msgtype!r} of topic {topic} is not in the typestore; "
                                 "register its definition first") from None
            self._topics[topic] = (msgtype, rihs01)
            self._counts[topic] = 0
        elif known[0] != msgtype:
            raise ValueError(f"topic {topic} was recorded as {known[0]}, now given {msgtype}; "
                             "one type per topic expected")

    def _open_split(self) -> _Split:
        stem = f"{self.bag_dir.name}_{len(self._files)}"
        writer = Writer(self.bag_dir / OPEN_DIR / stem, version=ROSBAG2_VERSION,
                        storage_plugin=StoragePlugin.MCAP)
        writer.open()
        self._split = _Split(writer, stem, time.monotonic())
        return self._split

    def _close_split(self) -> None:
        """Close the open split, move its MCAP file into the bag, then rewrite metadata.yaml."""
        split, self._split = self._split, None
        split.writer.close()
        folder = self.bag_dir / OPEN_DIR / split.stem
        name = split.stem + ".mcap"
        with open(folder / name, "rb") as f:
            os.fsync(f.fileno())
        os.replace(folder / name, self.bag_dir / name)
        shutil.rmtree(folder)
        self._files.append(_FileInfo(name, split.start_ns, split.end_ns, split.count))
        for topic, n in split.counts.items():
            self._counts[topic] += n
        self._write_metadata()

    def _age_loop(self) -> None:
        """Close splits that have aged; on an error (e.g. disk full) stop and keep the error
        for the next `write` to raise."""
        while not self._stop.wait(self.poll_s):
            with self._lock:
                split = self._split
                if split is not None and time.monotonic() - split.opened_wall >= self.split_s:
                    try:
                        self._close_split()
                    except Exception as exc:   # noqa: BLE001 - reported by write()
                        self._failure = exc
                        return

    def _write_metadata(self) -> None:
        """metadata.yaml listing the completed splits: rosbag2 format version 9."""
        start = min((f.start_ns for f in self._files), default=0)
        end = max((f.end_ns for f in self._files), default=0)
        info = {
            "version": ROSBAG2_VERSION,
            "storage_identifier": "mcap",
            "relative_file_paths": [f.name for f in self._files],
            "duration": {"nanoseconds": end - start},
            "starting_time": {"nanoseconds_since_epoch": start},
            "message_count": sum(f.count for f in self._files),
            "topics_with_message_count": [
                {"topic_metadata": {"name": topic, "type": msgtype, "serialization_format": "cdr",
                                    "offered_qos_profiles": [],
                                    "type_description_hash": rihs01},
                 "message_count": self._counts[topic]}
                for topic, (msgtype, rihs01) in self._topics.items()],
            "compression_format": "",
            "compression_mode": "",
            "files": [{"path": f.name,
                       "starting_time": {"nanoseconds_since_epoch": f.start_ns},
                       "duration": {"nanoseconds": f.end_ns - f.start_ns},
                       "message_count": f.count} for f in self._files],
            "custom_data": {"vservo.scenario": self.scenario},
            "ros_distro": ROS_DISTRO,
        }
        _write_atomic(self.bag_dir / METADATA_FILE,
                      dump_yaml({"rosbag2_bagfile_information": info}, sort_keys=False))

    def _compress(self, raw: bytes) -> bytes | None:
        """sensor_msgs/Image CDR -> sensor_msgs/CompressedImage CDR; None if not encodable."""
        import cv2  # only needed when compressing

        ts = self.typestore
        img = ts.deserialize_cdr(raw, IMAGE)
        array = image_to_array(img)
        if array is None or (self.image_format == "jpeg" and array.dtype != np.uint8):
            return None
        if array.ndim == 3 and img.encoding.startswith("rgb"):
            array = cv2.cvtColor(array, cv2.COLOR_RGBA2BGRA if array.shape[2] == 4
                                 else cv2.COLOR_RGB2BGR)
        ext = ".png" if self.image_format == "png" else ".jpg"
        opts = [] if ext == ".png" else [cv2.IMWRITE_JPEG_QUALITY, int(self.jpeg_quality)]
        ok, buf = cv2.imencode(ext, array, opts)
        if not ok:
            return None
        # format string as image_transport's compressed plugin writes it (from memory):
        # "<raw encoding>; <png|jpeg> compressed <encoding of the compressed pixels>"
        packed = {1: "mono", 3: "bgr", 4: "bgra"}[1 if array.ndim == 2 else array.shape[2]]
        depth = 16 if array.dtype == np.uint16 else 8
        fmt = f"{img.encoding}; {self.image_format} compressed {packed}{depth}"
        msg = ts.types[COMPRESSED_IMAGE](header=img.header, format=fmt,
                                         data=np.frombuffer(buf.tobytes(), np.uint8))
        return bytes(ts.serialize_cdr(msg, COMPRESSED_IMAGE))


def _named_files(data) -> list[str]:
    """Relative file names a reference file names at its top level (``image: view.png``)."""
    if not isinstance(data, dict):
        return []
    return [v for v in data.values() if isinstance(v, str) and not Path(v).is_absolute()
            and Path(v).suffix.lower() in (".png", ".jpg", ".jpeg", ".yaml", ".npz")
            and ".." not in Path(v).parts]


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
        array = cv2.normalize(array, None, 0, 255, cv2.NORM_MINMAX, dtype=cv2.CV_8U)
    if array.ndim == 2:
        return np.repeat(array[..., None], 3, axis=2)
    array = array[..., :3]
    return np.ascontiguousarray(array if rgb_order else array[..., ::-1])


# --- reading -----------------------------------------------------------------------------------
@dataclass
class Series:
    """Samples of one topic: ``t`` (T,) seconds since the bag's first message (bag log time)
    and ``values`` (T, ...) float64, NaN-padded where messages differ in length."""
    t: np.ndarray
    values: np.ndarray


@dataclass
class Frame:
    """One camera image of the record: ``t`` s on the record's clock, ``rgb`` (H, W, 3) uint8."""
    t: float
    rgb: np.ndarray


@dataclass
class Piece:
    """Where a single split file lies in its bag: ``file`` name, ``index`` of ``count`` files,
    and its span ``t0_s``..``t1_s`` on the bag's clock (s since the bag's first message)."""
    file: str
    index: int
    count: int
    t0_s: float
    t1_s: float


@dataclass
class RunData:
    """One run read back from a bag. Series are None when their topic is absent.

    status: one array per interface.STATUS_FIELDS name over ``status_t``: floats for numbers
        (NaN where missing), object arrays for strings, lists and dicts, and ``dq`` (T, n);
        fields a newer node adds (e.g. ``detail``, ``pose_error_mm``) are kept the same way
        (floats when every value is a number or missing, else objects).
    joint_*: joint states reordered by name to ``joint_names`` (first message's order);
        positions rad or m, velocities rad/s or m/s, NaN where a message lacks a value.
    camera_twist, twist_cmd: [v; w] in m/s and rad/s. features, feature_error: pixels
        [u1, v1, ...]. *_truth, taught_pose: [x, y, z, qx, qy, qz, qw] in the base frame, m.
    """
    path: Path
    start_ns: int
    topics: dict[str, tuple[str, int]]
    status_t: np.ndarray
    status: dict[str, np.ndarray]
    joint_names: list[str]
    joint_t: np.ndarray
    joint_position: np.ndarray
    joint_velocity: np.ndarray
    joint_cmd: Series | None = None
    twist_cmd: Series | None = None
    camera_twist: Series | None = None
    feature_error: Series | None = None
    features: Series | None = None
    error_rms: Series | None = None
    camera_truth: Series | None = None
    target_truth: Series | None = None
    taught_pose: Series | None = None
    image_t: np.ndarray = field(default_factory=lambda: np.zeros(0))
    camera_info: dict | None = None
    robot_description: str | None = None
    params: dict = field(default_factory=dict)
    result: dict | None = None
    skipped: int = 0   # status records that were not valid JSON objects
    frames: list = field(default_factory=list)   # [Frame]: the first and the last image
    reference: dict | None = None       # the copied reference file (reference/*.yaml), parsed
    reference_path: Path | None = None
    piece: Piece | None = None          # set when one split file of a bag was read


def _flat(values: list) -> np.ndarray:
    """Rows of varying length -> (T, max length) float64, NaN-padded."""
    width = max((len(v) for v in values), default=0)
    out = np.full((len(values), width), np.nan)
    for i, v in enumerate(values):
        out[i, :len(v)] = v
    return out


def _twist(m) -> list[float]:
    return [m.twist.linear.x, m.twist.linear.y, m.twist.linear.z,
            m.twist.angular.x, m.twist.angular.y, m.twist.angular.z]


def _pose(m) -> list[float]:
    p, q = m.pose.position, m.pose.orientation
    return [p.x, p.y, p.z, q.x, q.y, q.z, q.w]


# attribute of RunData -> (interface topic, type, message -> row)
_ROW_SERIES = {
    "joint_cmd": (itf.TOPIC_JOINT_VELOCITY_CMD, "std_msgs/msg/Float64MultiArray",
                  lambda m: list(m.data)),
    "twist_cmd": (itf.TOPIC_TWIST_CMD, "geometry_msgs/msg/TwistStamped", _twist),
    "camera_twist": (itf.TOPIC_CAMERA_TWIST, "geometry_msgs/msg/TwistStamped", _twist),
    "feature_error": (itf.TOPIC_FEATURE_ERROR, "std_msgs/msg/Float64MultiArray",
                      lambda m: list(m.data)),
    "features": (itf.TOPIC_FEATURES, "std_msgs/msg/Float64MultiArray", lambda m: list(m.data)),
    "error_rms": (itf.TOPIC_ERROR_RMS, "std_msgs/msg/Float64", lambda m: [m.data]),
    "camera_truth": (itf.TOPIC_SIM_CAMERA_POSE_TRUTH, "geometry_msgs/msg/PoseStamped", _pose),
    "target_truth": (itf.TOPIC_SIM_TARGET_POSE_TRUTH, "geometry_msgs/msg/PoseStamped", _pose),
    "taught_pose": (itf.TOPIC_SIM_TAUGHT_POSE, "geometry_msgs/msg/PoseStamped", _pose),
}
_OTHER = {  # role -> (interface topic, type)
    "status": (itf.TOPIC_STATUS, "std_msgs/msg/String"),
    "joints": (itf.TOPIC_JOINT_STATES, "sensor_msgs/msg/JointState"),
    "camera_info": (itf.TOPIC_CAMERA_INFO, "sensor_msgs/msg/CameraInfo"),
    "robot_description": (itf.TOPIC_ROBOT_DESCRIPTION, "std_msgs/msg/String"),
    "run_result": (itf.TOPIC_RUN_RESULT, "std_msgs/msg/String"),
    "image": (itf.TOPIC_IMAGE, IMAGE),
    "image_compressed": (itf.TOPIC_IMAGE_COMPRESSED, COMPRESSED_IMAGE),
}
_STATUS_TEXT = ("run_id", "state", "reason", "limits_acted", "limit_counts", "detail")


def match_topic(names: dict[str, str], relative: str, msgtype: str) -> str | None:
    """The bag topic for an interface name: '/<rel>' itself, else the one '/ns/.../<rel>'.

    ``names`` maps bag topic -> type; topics of another type are ignored. Raises ValueError
    when several namespaces carry the name (the bag holds more than one robot).
    """
    exact = relative if relative.startswith("/") else "/" + relative
    hits = [n for n, t in names.items() if t == msgtype and (n == exact or n.endswith(exact))]
    if exact in hits:
        return exact
    if len(hits) > 1:
        raise ValueError(f"several topics end in {exact}: {sorted(hits)}; expected one run per bag")
    return hits[0] if hits else None


def _status_table(records: list[dict]) -> dict[str, np.ndarray]:
    table = {}
    extra = [k for k in dict.fromkeys(k for r in records for k in r) if k not in itf.STATUS_FIELDS]
    for name in (*itf.STATUS_FIELDS, *extra):
        values = [r.get(name) for r in records]
        numbers = [v for v in values if v is not None]
        numeric = name not in _STATUS_TEXT and bool(numbers) and all(
            isinstance(v, (int, float)) and not isinstance(v, bool) for v in numbers)
        numeric = numeric or (name in itf.STATUS_FIELDS and name not in _STATUS_TEXT)
        if name == "dq":
            table[name] = _flat([v or [] for v in values])
        elif numeric:
            table[name] = np.array([np.nan if v is None else v for v in values], dtype=float)
        else:
            column = np.empty(len(records), dtype=object)
            column[:] = values
            table[name] = column
    return table


def _piece_of(path: Path) -> tuple[Piece, int] | None:
    """(Piece, bag start ns) when ``path`` is one file listed in its folder's metadata.yaml."""
    meta = path.parent / METADATA_FILE
    if not path.is_file() or not meta.is_file():
        return None
    try:
        info = load_yaml(meta, max_bytes=METADATA_MAX_BYTES,
                         prefix="bag metadata ")["rosbag2_bagfile_information"]
        names = [f["path"] for f in info["files"]]
        index = names.index(path.name)
        start = int(info["starting_time"]["nanoseconds_since_epoch"])
        entry = info["files"][index]
        t0 = (int(entry["starting_time"]["nanoseconds_since_epoch"]) - start) * 1e-9
        t1 = t0 + int(entry["duration"]["nanoseconds"]) * 1e-9
    except (KeyError, TypeError, ValueError):
        return None
    return Piece(path.name, index, len(names), t0, t1), start


def _reference_of(folder: Path) -> tuple[dict | None, Path | None]:
    """The reference file copied into the bag (reference/*.yaml), parsed; (None, None) if none."""
    for path in sorted((folder / REFERENCE_DIR).glob("*.yaml")):
        try:
            data = load_yaml(path, prefix="copied reference ")
        except YamlFileError:
            continue
        if isinstance(data, dict):
            return data, path
    return None, None


def load_run(bag: str | Path) -> RunData:
    """Read a run from a rosbag2 bag folder (ours or ``ros2 bag record``'s) or one .mcap/.db3.

    Uses rosbags' AnyReader (Jazzy typestore for bags without embedded definitions) and picks
    topics by interface name and type; params.yaml, result.json and the copied reference are
    read when present. The first and the last camera image are decoded (``frames``).
    A bag folder's metadata.yaml is screened first (``yaml_files.screen_yaml``: size, syntax,
    no anchors/aliases or tags) and params.yaml read through ``yaml_files.load_yaml``; either
    refused is a YamlFileError (a ValueError) naming the file and the place.

    One split file of a bag (a path listed in its folder's metadata.yaml) is read as a
    ``piece``: times stay on the whole bag's clock, and the run result is the one the file
    holds itself (its run_result message), never the bag's result.json, so a report of the
    piece covers the piece's time span and nothing else.
    """
    path = Path(bag)
    folder = path if path.is_dir() else path.parent
    if path.is_dir() and (path / METADATA_FILE).exists():
        screen_yaml(path / METADATA_FILE, max_bytes=METADATA_MAX_BYTES, prefix="bag metadata ")
    params = _read_params(folder / PARAMS_FILE)
    piece_info = None if path.is_dir() else _piece_of(path)
    rows: dict[str, tuple[list, list]] = {}
    joints: list = []
    status: list[tuple[int, dict]] = []
    images: list[int] = []
    first_last: list = []   # (stamp, msgtype, raw) of the first and the newest image
    latest: dict[str, object] = {}
    skipped = 0
    with AnyReader([path], default_typestore=default_typestore()) as reader:
        types = {c.topic: c.msgtype for c in reader.connections}
        role_of = {}
        for role, (rel, msgtype) in list(_OTHER.items()) + [
                (k, v[:2]) for k, v in _ROW_SERIES.items()]:
            topic = match_topic(types, rel, msgtype)
            if topic is not None:
                role_of[topic] = role
        start_ns = reader.start_time if reader.message_count else 0
        if piece_info is not None:   # a piece keeps the whole bag's clock
            start_ns = piece_info[1]
        image_roles = {r for t, r in role_of.items() if r in ("image", "image_compressed")}
        image_role = "image" if "image" in image_roles else "image_compressed"
        wanted = [c for c in reader.connections if c.topic in role_of]
        for conn, stamp, raw in reader.messages(connections=wanted):
            role = role_of[conn.topic]
            if role in ("image", "image_compressed"):
                images.append(stamp)     # images are counted; the first and last decoded
                if role == image_role:
                    entry = (stamp, conn.msgtype, raw)
                    if not first_last:
                        first_last.append(entry)
                    elif len(first_last) == 1:
                        first_last.append(entry)
                    elif stamp >= first_last[1][0]:
                        first_last[1] = entry
                continue
            msg = reader.deserialize(raw, conn.msgtype)
            if role in _ROW_SERIES:
                ts, vals = rows.setdefault(role, ([], []))
                ts.append(stamp)
                vals.append(_ROW_SERIES[role][2](msg))
            elif role == "joints":
                joints.append((stamp, list(msg.name), np.asarray(msg.position, float),
                               np.asarray(msg.velocity, float)))
            elif role == "status":
                try:
                    record = json.loads(msg.data)
                except ValueError:
                    record = None
                if isinstance(record, dict):
                    status.append((stamp, record))
                else:
                    skipped += 1
            else:
                latest[role] = msg
        topics = {c.topic: (c.msgtype, c.msgcount) for c in reader.connections}
        frames = []
        for stamp, msgtype, raw in first_last:
            rgb = image_to_rgb(msgtype, reader.deserialize(raw, msgtype))
            if rgb is not None:
                frames.append((stamp, rgb))

    def secs(stamps) -> np.ndarray:
        return (np.asarray(stamps, dtype=np.int64) - start_ns) * 1e-9

    status.sort(key=lambda x: x[0])
    joints.sort(key=lambda x: x[0])
    names = joints[0][1] if joints else []
    position = np.full((len(joints), len(names)), np.nan)
    velocity = np.full_like(position, np.nan)
    for i, (_, jn, pos, vel) in enumerate(joints):
        for k, name in enumerate(jn):
            if name in names:
                j = names.index(name)
                position[i, j] = pos[k] if k < len(pos) else np.nan
                velocity[i, j] = vel[k] if k < len(vel) else np.nan
    series = {}
    for role, (ts, vals) in rows.items():
        order = np.argsort(ts, kind="stable")
        series[role] = Series(secs(ts)[order], _flat(vals)[order])
    # a piece of a bag reports only the result it holds itself, not the whole run's
    result = (_read_json(folder / RESULT_FILE)
              if piece_info is None and (folder / RESULT_FILE).exists() else None)
    if result is None and "run_result" in latest:
        result = json.loads(latest["run_result"].data)
    reference, reference_path = _reference_of(folder)
    info = latest.get("camera_info")
    return RunData(
        path=path, start_ns=start_ns, topics=topics,
        status_t=secs([s for s, _ in status]), status=_status_table([r for _, r in status]),
        joint_names=names, joint_t=secs([j[0] for j in joints]),
        joint_position=position, joint_velocity=velocity, **series,
        image_t=np.sort(secs(images)),
        camera_info=None if info is None else {
            "width": int(info.width), "height": int(info.height),
            "K": np.asarray(info.k, float).reshape(3, 3), "D": np.asarray(info.d, float),
            "distortion_model": info.distortion_model},
        robot_description=(latest["robot_description"].data
                           if "robot_description" in latest else None),
        params=params, result=result, skipped=skipped,
        frames=[Frame(float(secs([stamp])[0]), rgb) for stamp, rgb in frames],
        reference=reference, reference_path=reference_path,
        piece=piece_info[0] if piece_info else None)


def _read_json(path: Path) -> dict:
    return json.loads(path.read_text(encoding="utf8"))


def _read_params(path: Path) -> dict:
    """params.yaml as a dict; {} when absent or empty. YamlFileError when it is not plain YAML
    (``yaml_files.load_yaml``), not a mapping, or a controller parameter in it (flat, or in
    ``{node: {ros__parameters: ...}}`` sections) has the wrong type or list length
    (``params.check_value`` without ranges and choices, so bags recorded before a range changed
    still read), since the metrics take limits and frames from it."""
    import dataclasses

    from vservo_node import params as schema

    if not path.exists():
        return {}
    data = load_yaml(path, max_bytes=PARAMS_MAX_BYTES, prefix="bag params ")
    if data is None:
        return {}
    if not isinstance(data, dict):
        raise YamlFileError(f"bag params {path}: top level: expected a mapping of parameter "
                            f"names to values, got {brief(data)}")
    sections = [(f"{k}.ros__parameters.", v["ros__parameters"]) for k, v in data.items()
                if isinstance(v, dict) and isinstance(v.get("ros__parameters"), dict)]
    for prefix, section in sections or [("", data)]:
        for name, value in schema.flatten(section).items():
            param = schema.BY_NAME.get(name)
            if param is not None:
                loose = dataclasses.replace(param, low=None, high=None, choices=())
                _, reason = schema.check_value(loose, value)
                if reason:
                    raise YamlFileError(f"bag params {path}: {prefix}{reason}")
    return data
