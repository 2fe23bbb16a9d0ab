"""Reading run records, and plain rosbag2 bags of the same topics, back (`load_run`; the
format: vservo_node.record.bag)."""
from __future__ import annotations

import json
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

import numpy as np
from rosbags.highlevel import AnyReader

from vservo_node import interface as itf
from vservo_node.yaml_files import METADATA_MAX_BYTES, YamlFileError, brief, load_yaml, screen_yaml
from vservo_node.record.bag_format import (COMPRESSED_IMAGE, default_typestore, IMAGE, image_to_rgb,
                                           METADATA_FILE, PARAMS_FILE, PARAMS_MAX_BYTES,
                                           REFERENCE_DIR, RESULT_FILE)


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
    latest: dict[str, Any] = {}
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
            msg: Any = reader.deserialize(raw, conn.msgtype)
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
