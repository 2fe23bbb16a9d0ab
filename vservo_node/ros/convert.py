"""ROS message <-> NumPy conversion for the node shells (the only place message classes meet
the functional core's arrays).

Conventions (DEVELOPERS.md): SI units; twists ``[v; w]`` (m/s, rad/s); quaternions
``(x, y, z, w)``; poses are 4x4 ``T_frame_child`` (the pose of the message's child in
``header.frame_id``); joints are matched by name, never by position.

Images: ``image_to_numpy`` returns a view on the message's own buffer (no copy). It aliases the
message: keep the message (or copy the array) if the image must outlive the next one. For a
subscription created with ``raw=True`` (callback gets the serialized CDR bytes),
``image_from_cdr`` reads the few header fields and views the pixel bytes in place, skipping the
deserialization copy of the pixels (``benchmarks/image_convert_bench.py`` measures both).
"""
from __future__ import annotations

import array
import struct
from dataclasses import dataclass

import numpy as np
from builtin_interfaces.msg import Duration, Time
from geometry_msgs.msg import PoseStamped, TwistStamped
from sensor_msgs.msg import CameraInfo, CompressedImage, Image, JointState
from std_msgs.msg import Float64MultiArray, Header, MultiArrayDimension
from trajectory_msgs.msg import JointTrajectory, JointTrajectoryPoint

from vservo_node.control.frames import matrix_to_quat, transform_from_xyz_quat
from vservo_node.vision.camera import CameraModel

# sensor_msgs/image_encodings.hpp names -> (element dtype, channels)
ENCODINGS = {
    "rgb8": (np.uint8, 3), "bgr8": (np.uint8, 3), "rgba8": (np.uint8, 4),
    "bgra8": (np.uint8, 4), "mono8": (np.uint8, 1), "8UC1": (np.uint8, 1),
    "8UC3": (np.uint8, 3), "mono16": (np.uint16, 1), "16UC1": (np.uint16, 1),
    "32FC1": (np.float32, 1),
}

_NS_PER_S = 1_000_000_000


# ----------------------------------------------------------------------------- time
def time_to_sec(stamp) -> float:
    """Seconds (float) of a builtin_interfaces/Time (or Duration)."""
    return stamp.sec + stamp.nanosec * 1e-9


def sec_to_time(seconds: float) -> Time:
    """builtin_interfaces/Time of ``seconds`` (>= 0), rounded to the nearest nanosecond."""
    sec, nanosec = _split_ns(seconds, "time")
    return Time(sec=sec, nanosec=nanosec)


def sec_to_duration(seconds: float) -> Duration:
    """builtin_interfaces/Duration of ``seconds`` (>= 0), rounded to the nearest nanosecond."""
    sec, nanosec = _split_ns(seconds, "duration")
    return Duration(sec=sec, nanosec=nanosec)


def _split_ns(seconds, what):
    """(sec, nanosec); the fraction is taken before scaling so that epoch-sized stamps keep
    their nanoseconds as far as the float carries them."""
    if not np.isfinite(seconds) or seconds < 0:
        raise ValueError(f"{what} must be a finite number of seconds >= 0, got {seconds}")
    whole = int(seconds)
    nanosec = int(round((seconds - whole) * _NS_PER_S))
    return whole + nanosec // _NS_PER_S, nanosec % _NS_PER_S


def ns_to_time(nanoseconds: int) -> Time:
    """builtin_interfaces/Time of an integer count of nanoseconds (>= 0), exactly."""
    if nanoseconds < 0:
        raise ValueError(f"time must be >= 0, got {nanoseconds} ns")
    sec, nanosec = divmod(int(nanoseconds), _NS_PER_S)
    return Time(sec=sec, nanosec=nanosec)


def header(stamp: float | Time, frame_id: str = "") -> Header:
    """std_msgs/Header stamped ``stamp`` (seconds, or a builtin_interfaces/Time taken as is:
    wall-clock seconds as a float keep only ~0.2 us) in ``frame_id``."""
    return Header(stamp=stamp if isinstance(stamp, Time) else sec_to_time(stamp),
                  frame_id=frame_id)


# ----------------------------------------------------------------------------- images
def _image_layout(encoding):
    if encoding not in ENCODINGS:
        raise ValueError(f"unsupported image encoding {encoding!r}; expected one of "
                         f"{sorted(ENCODINGS)}")
    return ENCODINGS[encoding]


def image_to_numpy(msg) -> np.ndarray:
    """View (no copy) of an Image's pixels: (height, width) or (height, width, channels).

    Honours ``step`` (row padding) and ``is_bigendian``. ``msg`` may be a sensor_msgs/Image or
    a ``RawImage`` from ``image_from_cdr``. Raises ValueError if the buffer is too short for
    ``height`` rows of ``step`` bytes or ``step`` is shorter than one row.
    """
    dtype, channels = _image_layout(msg.encoding)
    dtype = np.dtype(dtype).newbyteorder(">" if msg.is_bigendian else "<")
    row_bytes = msg.width * channels * dtype.itemsize
    if msg.step < row_bytes:
        raise ValueError(f"image step {msg.step} is shorter than one row of {msg.width} "
                         f"{msg.encoding} pixels ({row_bytes} bytes)")
    buffer = np.frombuffer(msg.data, dtype=np.uint8)
    if buffer.size < msg.step * msg.height:
        raise ValueError(f"image data has {buffer.size} bytes, expected step*height = "
                         f"{msg.step}*{msg.height} = {msg.step * msg.height}")
    shape = (msg.height, msg.width, channels) if channels > 1 else (msg.height, msg.width)
    strides = (msg.step, channels * dtype.itemsize, dtype.itemsize)[:len(shape)]
    return np.ndarray(shape, dtype=dtype, buffer=buffer, strides=strides)


def numpy_to_image(pixels: np.ndarray, encoding: str, stamp: float | Time = 0.0,
                   frame_id: str = "") -> Image:
    """sensor_msgs/Image of ``pixels`` ((h, w) or (h, w, c), dtype per ``encoding``).

    One copy of the pixels: they go into an ``array.array('B')`` through the buffer protocol,
    the one type the generated ``data`` setter takes as is when ROS_PYTHON_CHECK_FIELDS=1 (a
    ``bytes`` value is then checked element by element) and copies with one memcpy otherwise.
    Rows are packed: ``step = width * channels * itemsize``; little-endian.
    """
    dtype, channels = _image_layout(encoding)
    pixels = np.asarray(pixels)
    expected_ndim = 2 if channels == 1 else 3
    if (pixels.ndim != expected_ndim or (channels > 1 and pixels.shape[2] != channels)
            or pixels.dtype != dtype):
        raise ValueError(f"{encoding} needs a {np.dtype(dtype).name} array of shape "
                         f"{'(h, w)' if channels == 1 else f'(h, w, {channels})'}, got "
                         f"{pixels.dtype.name} {pixels.shape}")
    pixels = np.ascontiguousarray(pixels, dtype=np.dtype(dtype).newbyteorder("<"))
    data = array.array("B")
    data.frombytes(pixels.reshape(-1).view(np.uint8))  # one memcpy, no per-element work
    msg = Image(header=header(stamp, frame_id), height=pixels.shape[0],
                width=pixels.shape[1], encoding=encoding, is_bigendian=0,
                step=pixels.shape[1] * channels * pixels.itemsize)
    msg.data = data
    return msg


@dataclass
class RawImage:
    """The fields of a serialized sensor_msgs/Image; ``data`` views the serialized bytes."""
    header: Header
    height: int
    width: int
    encoding: str
    is_bigendian: int
    step: int
    data: memoryview


class _CdrReader:
    """Reads plain CDR (OMG DDS-XTypes 1.3, sec. 7.4.1 "XCDR version 1"): primitives aligned to
    their size relative to the byte after the 4-byte encapsulation header; strings are a uint32
    length (including the NUL) then the bytes; sequences a uint32 count then the elements.
    """

    def __init__(self, buffer):
        self.buf = memoryview(buffer).cast("B")
        if len(self.buf) < 4:
            raise ValueError(f"serialized message too short ({len(self.buf)} bytes)")
        kind = bytes(self.buf[:2])
        if kind not in (b"\x00\x00", b"\x00\x01"):
            raise ValueError(f"unsupported CDR encapsulation {kind.hex()}: expected 0000 "
                             "(CDR_BE) or 0001 (CDR_LE)")
        self.endian = "<" if kind == b"\x00\x01" else ">"
        self.pos = 4

    def _take(self, size, align):
        self.pos += -(self.pos - 4) % align
        start, self.pos = self.pos, self.pos + size
        if self.pos > len(self.buf):
            raise ValueError(f"serialized message truncated at byte {start} "
                             f"(needs {size} more, has {len(self.buf) - start})")
        return self.buf[start:self.pos]

    def uint32(self):
        return struct.unpack(self.endian + "I", self._take(4, 4))[0]

    def int32(self):
        return struct.unpack(self.endian + "i", self._take(4, 4))[0]

    def uint8(self):
        return self._take(1, 1)[0]

    def string(self):
        size = self.uint32()
        return bytes(self._take(size, 1))[:-1].decode() if size else ""

    def bytes_view(self):
        return self._take(self.uint32(), 1)


def image_from_cdr(serialized) -> RawImage:
    """Read a serialized sensor_msgs/Image (a ``raw=True`` subscription's callback argument)
    without copying the pixels; ``image_to_numpy(image_from_cdr(b))`` views ``b`` itself.
    """
    r = _CdrReader(serialized)
    sec, nanosec, frame_id = r.int32(), r.uint32(), r.string()
    hdr = Header(stamp=Time(sec=sec, nanosec=nanosec), frame_id=frame_id)
    height, width, encoding = r.uint32(), r.uint32(), r.string()
    is_bigendian, step = r.uint8(), r.uint32()
    return RawImage(hdr, height, width, encoding, is_bigendian, step, r.bytes_view())


def compressed_image_bytes(msg: CompressedImage) -> tuple[str, np.ndarray]:
    """(format, 1-D uint8 view of the encoded bytes), ready for ``cv2.imdecode``; no copy."""
    return msg.format, np.frombuffer(msg.data, dtype=np.uint8)


def compressed_image(encoded, fmt: str, stamp: float | Time = 0.0,
                     frame_id: str = "") -> CompressedImage:
    """sensor_msgs/CompressedImage carrying the encoded bytes ``encoded`` (``fmt``: 'jpeg',
    'png', ...) as they are (one copy into the message)."""
    data = array.array("B")
    data.frombytes(memoryview(encoded).cast("B"))
    msg = CompressedImage(header=header(stamp, frame_id), format=fmt)
    msg.data = data
    return msg


# ----------------------------------------------------------------------------- camera
def camera_info_to_model(msg: CameraInfo, rectified: bool = False) -> CameraModel:
    """CameraModel of a CameraInfo; ``rectified`` says the image stream is rectified."""
    return CameraModel.from_camera_info(msg.width, msg.height, msg.distortion_model,
                                        list(msg.d), list(msg.k), list(msg.r), list(msg.p),
                                        rectified=rectified)


def model_to_camera_info(model: CameraModel, stamp: float | Time = 0.0,
                         frame_id: str = "") -> CameraInfo:
    """CameraInfo of a CameraModel (no binning, full-image region of interest)."""
    return CameraInfo(header=header(stamp, frame_id), width=model.width,
                      height=model.height, distortion_model=model.distortion_model,
                      d=model.D.tolist(), k=model.K.ravel().tolist(),
                      r=model.R.ravel().tolist(), p=model.P.ravel().tolist())


# ----------------------------------------------------------------------------- joints
def _indices_by_name(msg_names, wanted, what):
    index = {name: i for i, name in enumerate(msg_names)}
    missing = [name for name in wanted if name not in index]
    if missing:
        raise ValueError(f"{what} lacks joint(s) {missing}; it has {list(msg_names)}")
    return [index[name] for name in wanted]


def _field_by_name(values, idx, n_names, field, what):
    """values[idx], None if the field is empty; refuses a field not one value per name."""
    values = np.asarray(values, dtype=float)
    if values.size == 0:
        return None
    if values.size != n_names:
        raise ValueError(f"{what} has {values.size} {field} for {n_names} joint names")
    return values[idx]


def joint_state_to_arrays(msg: JointState, joint_names) -> tuple[np.ndarray, np.ndarray | None]:
    """(q, dq) ordered as ``joint_names`` (rad or m; rad/s or m/s). ``dq`` is None when the
    message has no velocities. Raises ValueError naming the missing joints.
    """
    idx = _indices_by_name(msg.name, joint_names, "joint state")
    n = len(msg.name)
    q = _field_by_name(msg.position, idx, n, "positions", "joint state")
    if q is None:
        raise ValueError("joint state has no positions")
    return q, _field_by_name(msg.velocity, idx, n, "velocities", "joint state")


def joint_state(joint_names, q, dq=None, stamp: float | Time = 0.0,
                frame_id: str = "") -> JointState:
    """sensor_msgs/JointState of positions ``q`` (and velocities ``dq``) in ``joint_names``."""
    names = list(joint_names)
    q = _vector(q, len(names), "q")
    msg = JointState(header=header(stamp, frame_id), name=names, position=q.tolist())
    if dq is not None:
        msg.velocity = _vector(dq, len(names), "dq").tolist()
    return msg


def _vector(values, n, name):
    v = np.asarray(values, dtype=float).ravel()
    if v.size != n:
        raise ValueError(f"{name} must have {n} entries (one per joint), got {v.size}")
    return v


def joint_array(values, joint_names) -> Float64MultiArray:
    """std_msgs/Float64MultiArray of ``values`` in the order ``joint_names`` (the order agreed
    with the receiver, e.g. the sim node's ``command_joint_order``); the layout's one
    dimension is labelled 'joints'."""
    v = _vector(values, len(joint_names), "values")
    dim = MultiArrayDimension(label="joints", size=v.size, stride=v.size)
    msg = Float64MultiArray(data=v.tolist())
    msg.layout.dim = [dim]
    return msg


def joint_array_values(msg: Float64MultiArray, joint_names) -> np.ndarray:
    """Values of a Float64MultiArray sent in the order ``joint_names``; raises ValueError when
    the count differs (a sender with another joint order is refused, not guessed)."""
    v = np.asarray(msg.data, dtype=float)
    if v.size != len(joint_names):
        raise ValueError(f"joint command has {v.size} values, expected {len(joint_names)} "
                         f"in the order {list(joint_names)}")
    return v


def trajectory_point(joint_names, positions=None, velocities=None, time_from_start_s=0.0,
                     stamp: float | Time = 0.0) -> JointTrajectory:
    """trajectory_msgs/JointTrajectory with one point (positions and/or velocities)."""
    names = list(joint_names)
    if positions is None and velocities is None:
        raise ValueError("a trajectory point needs positions or velocities")
    point = JointTrajectoryPoint(time_from_start=sec_to_duration(time_from_start_s))
    if positions is not None:
        point.positions = _vector(positions, len(names), "positions").tolist()
    if velocities is not None:
        point.velocities = _vector(velocities, len(names), "velocities").tolist()
    return JointTrajectory(header=header(stamp), joint_names=names, points=[point])


def trajectory_point_values(msg: JointTrajectory, joint_names):
    """(positions or None, velocities or None, time_from_start s) of a single-point
    JointTrajectory, reordered to ``joint_names``. Raises ValueError for another number of
    points, missing joints, or a point with neither positions nor velocities."""
    if len(msg.points) != 1:
        raise ValueError(f"joint trajectory must have exactly one point, got {len(msg.points)}")
    idx = _indices_by_name(msg.joint_names, joint_names, "joint trajectory")
    point = msg.points[0]
    n = len(msg.joint_names)
    positions = _field_by_name(point.positions, idx, n, "positions", "trajectory point")
    velocities = _field_by_name(point.velocities, idx, n, "velocities", "trajectory point")
    if positions is None and velocities is None:
        raise ValueError("trajectory point has neither positions nor velocities")
    return positions, velocities, time_to_sec(point.time_from_start)


# ----------------------------------------------------------------------------- geometry
def pose_to_matrix(msg: PoseStamped) -> np.ndarray:
    """4x4 pose ``T_frame_child`` of a PoseStamped (frame = ``msg.header.frame_id``)."""
    p, o = msg.pose.position, msg.pose.orientation
    return transform_from_xyz_quat([p.x, p.y, p.z], [o.x, o.y, o.z, o.w])


def matrix_to_pose(T, stamp: float | Time = 0.0, frame_id: str = "") -> PoseStamped:
    """PoseStamped of a 4x4 rigid transform ``T`` (metres), quaternion with w >= 0."""
    T = np.asarray(T, dtype=float)
    if T.shape != (4, 4):
        raise ValueError(f"pose must be a 4x4 transform, got shape {T.shape}")
    msg = PoseStamped(header=header(stamp, frame_id))
    msg.pose.position.x, msg.pose.position.y, msg.pose.position.z = T[:3, 3].tolist()
    o = msg.pose.orientation
    o.x, o.y, o.z, o.w = matrix_to_quat(T[:3, :3]).tolist()
    return msg


def twist_to_vector(msg: TwistStamped) -> np.ndarray:
    """Twist ``[vx, vy, vz, wx, wy, wz]`` (m/s, rad/s) of a TwistStamped."""
    v, w = msg.twist.linear, msg.twist.angular
    return np.array([v.x, v.y, v.z, w.x, w.y, w.z])


def vector_to_twist(twist, stamp: float | Time = 0.0, frame_id: str = "") -> TwistStamped:
    """TwistStamped of a twist ``[v; w]`` (6,), m/s and rad/s, expressed in ``frame_id``."""
    t = _vector(twist, 6, "twist [v; w]")
    msg = TwistStamped(header=header(stamp, frame_id))
    v, w = msg.twist.linear, msg.twist.angular
    v.x, v.y, v.z, w.x, w.y, w.z = t.tolist()
    return msg
