"""Writing run records crash-safe (`RunRecorder`; the format: vservo_node.record.bag)."""
from __future__ import annotations

import json
import os
import shutil
import threading
import time
from dataclasses import dataclass, field
from datetime import datetime, timezone
from pathlib import Path
from typing import Any

import numpy as np
from rosbags.rosbag2 import StoragePlugin, Writer

from vservo_node.yaml_files import YamlFileError, dump_yaml, load_yaml
from vservo_node.record.bag_format import (_COMPRESS_FORMATS, COMPRESSED_IMAGE, DEFAULT_POLL_S,
                                           DEFAULT_SPLIT_BYTES, DEFAULT_SPLIT_S, default_typestore,
                                           IMAGE, image_to_array, METADATA_FILE, OPEN_DIR,
                                           PARAMS_FILE, REFERENCE_DIR, RESULT_FILE, ROS_DISTRO,
                                           ROSBAG2_VERSION, run_folder_name)


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
        assert split is not None, "no split is open"
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
