"""Message <-> NumPy conversion (vservo_node/ros/convert.py). No ROS context is started here:
message classes and rclpy.serialization work without rclpy.init, so no isolation is needed."""
import array

import numpy as np
import pytest
from builtin_interfaces.msg import Time
from rclpy.serialization import serialize_message
from rosbags.typesys import Stores, get_typestore
from scipy.spatial.transform import Rotation
from sensor_msgs.msg import CameraInfo, Image, JointState
from trajectory_msgs.msg import JointTrajectory, JointTrajectoryPoint

from vservo_node.ros import convert
from vservo_node.vision.camera import CameraModel

RNG = np.random.default_rng(7)
NAMES = ["j1", "j2", "j3", "j4", "j5", "j6"]


def _shares(view, msg):
    return np.shares_memory(view, np.frombuffer(msg.data, dtype=np.uint8))


# ----------------------------------------------------------------------------- images
@pytest.mark.parametrize("encoding,shape,dtype", [
    ("rgb8", (48, 64, 3), np.uint8), ("mono8", (48, 64), np.uint8),
    ("bgra8", (5, 7, 4), np.uint8), ("16UC1", (6, 9), np.uint16),
    ("32FC1", (6, 9), np.float32)])
def test_image_round_trip_is_exact_and_zero_copy(encoding, shape, dtype):
    pixels = (RNG.random(shape) * 200).astype(dtype)
    msg = convert.numpy_to_image(pixels, encoding, stamp=12.5, frame_id="cam")
    # sensor_msgs/msg/Image.msg: step is the full row length in bytes.
    assert msg.step == shape[1] * (shape[2] if len(shape) == 3 else 1) * np.dtype(dtype).itemsize
    assert isinstance(msg.data, array.array) and len(msg.data) == msg.step * msg.height
    view = convert.image_to_numpy(msg)
    np.testing.assert_array_equal(view, pixels)
    assert _shares(view, msg), "image_to_numpy copied the pixels"
    assert (msg.header.frame_id, convert.time_to_sec(msg.header.stamp)) == ("cam", 12.5)


def test_image_view_honours_row_padding_and_big_endian():
    # sensor_msgs/msg/Image.msg: rows are `step` bytes apart (step may exceed width*bpp);
    # is_bigendian gives the byte order of multi-byte pixels.
    h, w, pad = 4, 5, 6
    values = np.arange(h * w, dtype=np.uint16).reshape(h, w) * 257 + 1
    rows = [values[r].astype(">u2").tobytes() + b"\xee" * pad for r in range(h)]
    msg = Image(height=h, width=w, encoding="mono16", is_bigendian=1, step=2 * w + pad)
    msg.data = array.array("B", b"".join(rows))
    view = convert.image_to_numpy(msg)
    np.testing.assert_array_equal(view, values)
    assert _shares(view, msg)


def test_image_refuses_bad_layouts_with_reasons():
    msg = Image(height=2, width=3, encoding="rgb8", step=8)
    msg.data = array.array("B", bytes(16))
    with pytest.raises(ValueError, match="step 8 is shorter than one row"):
        convert.image_to_numpy(msg)
    msg.step = 9
    with pytest.raises(ValueError, match="expected step\\*height"):
        convert.image_to_numpy(msg)
    msg.encoding = "yuv422"
    with pytest.raises(ValueError, match="unsupported image encoding 'yuv422'"):
        convert.image_to_numpy(msg)
    with pytest.raises(ValueError, match="rgb8 needs a uint8 array of shape \\(h, w, 3\\)"):
        convert.numpy_to_image(np.zeros((4, 4), np.uint8), "rgb8")


def test_non_contiguous_input_is_packed():
    big = RNG.integers(0, 255, (10, 20, 3), dtype=np.uint8)
    part = big[::2, 3:15]
    np.testing.assert_array_equal(convert.image_to_numpy(convert.numpy_to_image(part, "rgb8")),
                                  part)


@pytest.mark.parametrize("frame_id", ["", "c", "camera_optical_frame"])
def test_raw_cdr_image_matches_rclpy_and_rosbags(frame_id):
    """The CDR reader against two independent serializers: rclpy/Fast-CDR (the wire bytes a
    raw subscription gets) and rosbags' pure-Python CDR (rosbags.typesys serialize_cdr).
    Frame ids of 0, 1 and 20 characters move the alignment of the fields after them."""
    pixels = RNG.integers(0, 255, (7, 11, 3), dtype=np.uint8)
    msg = convert.numpy_to_image(pixels, "rgb8", stamp=3.25, frame_id=frame_id)
    wire = serialize_message(msg)
    store = get_typestore(Stores.ROS2_KILTED)
    T = store.types
    ref = T["sensor_msgs/msg/Image"](
        header=T["std_msgs/msg/Header"](stamp=T["builtin_interfaces/msg/Time"](sec=3,
                                        nanosec=250_000_000), frame_id=frame_id),
        height=7, width=11, encoding="rgb8", is_bigendian=0, step=33, data=pixels.ravel())
    ref_bytes = store.serialize_cdr(ref, "sensor_msgs/msg/Image")
    # Same length; bytes may differ only in alignment padding (rclpy leaves it unset).
    assert len(wire) == len(ref_bytes)
    for blob in (wire, ref_bytes.tobytes()):
        raw = convert.image_from_cdr(blob)
        assert (raw.height, raw.width, raw.encoding, raw.step) == (7, 11, "rgb8", 33)
        assert raw.header.frame_id == frame_id
        assert convert.time_to_sec(raw.header.stamp) == 3.25
        view = convert.image_to_numpy(raw)
        np.testing.assert_array_equal(view, pixels)
        assert np.shares_memory(view, np.frombuffer(blob, np.uint8)), "raw path copied pixels"


def test_raw_cdr_big_endian_and_refusals():
    store = get_typestore(Stores.ROS2_KILTED)
    T = store.types
    ref = T["sensor_msgs/msg/Image"](
        header=T["std_msgs/msg/Header"](stamp=T["builtin_interfaces/msg/Time"](sec=1,
                                        nanosec=5), frame_id="xy"),
        height=2, width=2, encoding="mono8", is_bigendian=0, step=2,
        data=np.array([1, 2, 3, 4], np.uint8))
    big = store.serialize_cdr(ref, "sensor_msgs/msg/Image", little_endian=False).tobytes()
    assert big[:2] == b"\x00\x00"  # CDR_BE encapsulation (OMG DDS-XTypes 1.3, 7.6.3.1.2)
    raw = convert.image_from_cdr(big)
    assert (raw.header.stamp.sec, raw.header.stamp.nanosec, raw.header.frame_id) == (1, 5, "xy")
    np.testing.assert_array_equal(convert.image_to_numpy(raw), [[1, 2], [3, 4]])
    with pytest.raises(ValueError, match="unsupported CDR encapsulation 0007"):
        convert.image_from_cdr(b"\x00\x07\x00\x00" + big[4:])
    with pytest.raises(ValueError, match="truncated"):
        convert.image_from_cdr(big[:-3])


def test_compressed_image_passes_bytes_through():
    payload = bytes(RNG.integers(0, 255, 300, dtype=np.uint8))
    msg = convert.compressed_image(payload, "jpeg", stamp=1.0, frame_id="cam")
    fmt, view = convert.compressed_image_bytes(msg)
    assert fmt == "jpeg" and view.tobytes() == payload
    assert np.shares_memory(view, np.frombuffer(msg.data, np.uint8))


# ----------------------------------------------------------------------------- camera
def test_camera_info_round_trip():
    model = CameraModel(640, 480, [[600.0, 0, 319.5], [0, 602.0, 241.0], [0, 0, 1]],
                        [-0.2, 0.05, 0.001, -0.002, 0.01], "plumb_bob")
    info = convert.model_to_camera_info(model, stamp=2.0, frame_id="cam_optical")
    assert isinstance(info, CameraInfo) and len(info.k) == 9 and len(info.p) == 12
    back = convert.camera_info_to_model(info)
    assert (back.width, back.height, back.distortion_model) == (640, 480, "plumb_bob")
    for a, b in ((back.K, model.K), (back.D, model.D), (back.P, model.P), (back.R, model.R)):
        np.testing.assert_array_equal(a, b)
    # sensor_msgs/msg/CameraInfo.msg: K is row-major [fx 0 cx; 0 fy cy; 0 0 1].
    assert (info.k[0], info.k[2], info.k[4], info.k[5]) == (600.0, 319.5, 602.0, 241.0)


def test_camera_info_uncalibrated_is_refused():
    with pytest.raises(ValueError, match="not calibrated"):
        convert.camera_info_to_model(CameraInfo(width=640, height=480))


# ----------------------------------------------------------------------------- joints
def test_joint_state_is_read_by_name_not_position():
    shuffled = ["j3", "j1", "extra", "j6", "j2", "j5", "j4"]
    q_by_name = {n: i * 0.1 for i, n in enumerate(shuffled)}
    msg = JointState(name=shuffled, position=[q_by_name[n] for n in shuffled],
                     velocity=[-q_by_name[n] for n in shuffled])
    q, dq = convert.joint_state_to_arrays(msg, NAMES)
    np.testing.assert_array_equal(q, [q_by_name[n] for n in NAMES])
    np.testing.assert_array_equal(dq, -q)
    msg.velocity = []
    assert convert.joint_state_to_arrays(msg, NAMES)[1] is None


def test_joint_state_missing_names_and_short_fields_are_refused():
    msg = convert.joint_state(NAMES[:4], np.zeros(4))
    with pytest.raises(ValueError, match=r"lacks joint\(s\) \['j5', 'j6'\]"):
        convert.joint_state_to_arrays(msg, NAMES)
    msg = JointState(name=NAMES, position=[0.0] * 5)
    with pytest.raises(ValueError, match="5 positions for 6 joint names"):
        convert.joint_state_to_arrays(msg, NAMES)


def test_joint_state_build_round_trip():
    q, dq = RNG.normal(size=6), RNG.normal(size=6)
    msg = convert.joint_state(NAMES, q, dq, stamp=4.5)
    q2, dq2 = convert.joint_state_to_arrays(msg, list(reversed(NAMES)))
    np.testing.assert_array_equal(q2, q[::-1])
    np.testing.assert_array_equal(dq2, dq[::-1])


def test_joint_array_keeps_order_and_refuses_wrong_count():
    values = RNG.normal(size=6)
    msg = convert.joint_array(values, NAMES)
    assert msg.layout.dim[0].label == "joints" and msg.layout.dim[0].size == 6
    np.testing.assert_array_equal(convert.joint_array_values(msg, NAMES), values)
    with pytest.raises(ValueError, match="has 6 values, expected 5"):
        convert.joint_array_values(msg, NAMES[:5])


def test_trajectory_point_reordered_by_name():
    pos, vel = RNG.normal(size=6), RNG.normal(size=6)
    msg = convert.trajectory_point(NAMES, pos, vel, time_from_start_s=0.25)
    p, v, t = convert.trajectory_point_values(msg, NAMES[::-1])
    np.testing.assert_array_equal(p, pos[::-1])
    np.testing.assert_array_equal(v, vel[::-1])
    assert t == 0.25
    only_v = convert.trajectory_point(NAMES, velocities=vel)
    assert convert.trajectory_point_values(only_v, NAMES)[0] is None


def test_trajectory_refusals():
    two = JointTrajectory(joint_names=NAMES, points=[JointTrajectoryPoint()] * 2)
    with pytest.raises(ValueError, match="exactly one point, got 2"):
        convert.trajectory_point_values(two, NAMES)
    empty = JointTrajectory(joint_names=NAMES, points=[JointTrajectoryPoint()])
    with pytest.raises(ValueError, match="neither positions nor velocities"):
        convert.trajectory_point_values(empty, NAMES)
    with pytest.raises(ValueError, match="lacks joint"):
        convert.trajectory_point_values(convert.trajectory_point(NAMES[:2], [0, 0]), NAMES)


# ----------------------------------------------------------------------------- geometry
def test_pose_round_trip_and_quaternion_order_against_scipy():
    rot = Rotation.from_rotvec([0.3, -1.1, 2.0])
    T = np.eye(4)
    T[:3, :3], T[:3, 3] = rot.as_matrix(), [0.4, -0.2, 1.3]
    msg = convert.matrix_to_pose(T, stamp=7.0, frame_id="base")
    o = msg.pose.orientation
    # SciPy Rotation.as_quat() is scalar-last (x, y, z, w), as geometry_msgs/Quaternion.
    q_ref = rot.as_quat()
    q_ref = -q_ref if q_ref[3] < 0 else q_ref
    np.testing.assert_allclose([o.x, o.y, o.z, o.w], q_ref, atol=1e-12)
    np.testing.assert_allclose(convert.pose_to_matrix(msg), T, atol=1e-12)
    assert msg.header.frame_id == "base"


def test_twist_round_trip_is_v_then_w():
    twist = np.array([0.1, 0.2, 0.3, -1.0, -2.0, -3.0])
    msg = convert.vector_to_twist(twist, frame_id="cam")
    assert (msg.twist.linear.x, msg.twist.angular.z) == (0.1, -3.0)
    np.testing.assert_array_equal(convert.twist_to_vector(msg), twist)


# ----------------------------------------------------------------------------- time
@pytest.mark.parametrize("seconds,sec,nanosec", [
    (0.0, 0, 0), (1.5, 1, 500_000_000), (2.9999999999, 3, 0), (1e-9, 0, 1),
    (1_700_000_000.25, 1_700_000_000, 250_000_000)])
def test_time_split(seconds, sec, nanosec):
    # builtin_interfaces/msg/Time.msg: nanosec in [0, 1e9), the fraction of the second.
    t = convert.sec_to_time(seconds)
    assert (t.sec, t.nanosec) == (sec, nanosec)
    assert abs(convert.time_to_sec(t) - seconds) < 1e-6


def test_time_refuses_negative_and_nan():
    for bad in (-0.5, float("nan")):
        with pytest.raises(ValueError, match="finite number of seconds >= 0"):
            convert.sec_to_time(bad)
    assert convert.time_to_sec(Time(sec=2, nanosec=1)) == 2.000000001


def test_exact_nanosecond_stamps():
    # A wall-clock float keeps ~0.24 us at 1.7e9 s (IEEE 754 binary64, 52-bit fraction);
    # integer nanoseconds go through exactly.
    ns = 1_700_000_000_123_456_789
    t = convert.ns_to_time(ns)
    assert (t.sec, t.nanosec) == (1_700_000_000, 123_456_789)
    msg = convert.joint_state(NAMES, np.zeros(6), stamp=t)
    assert msg.header.stamp == t
    with pytest.raises(ValueError, match=">= 0"):
        convert.ns_to_time(-1)
