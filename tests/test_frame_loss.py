"""The frame-loss monitor (vservo_node/ros/frame_loss.py): pure logic, no ROS context."""
import struct

import numpy as np

from vservo_node.ros.frame_loss import FrameLossMonitor, cdr_stamp


def feed(monitor, fps, seconds, keep, t0=100.0, infos=True):
    """Frames at ``fps`` for ``seconds``; image k arrives when keep(k); camera_info always."""
    for k in range(int(fps * seconds)):
        t = t0 + k / fps
        stamp = 1.7e9 + k / fps
        if infos:
            monitor.info(stamp, t)
        if keep(k):
            monitor.image(stamp, t + 0.002)
    return t0 + seconds


def test_all_frames_no_warning_and_nothing_before_a_full_window():
    m = FrameLossMonitor(30.0)
    end = feed(m, 30.0, 1.0, lambda k: True)
    assert m.check(end) == ""                      # less than a window watched
    end = feed(m, 30.0, 4.0, lambda k: k % 40 != 0, t0=end)   # one frame in 40 lost
    assert m.check(end) == ""


def test_lost_frames_against_the_camera_info_rate():
    m = FrameLossMonitor(30.0)
    end = feed(m, 30.0, 4.0, lambda k: k % 3 == 0)         # two of three lost
    text = m.check(end)
    assert "being lost" in text and "camera_info messages received" in text
    assert "fastdds_shm.xml" in text
    # every kept frame follows a gap of 3 periods; the lost frames' camera_info came alone
    assert " gap(s)" in text and "without their image" in text
    n_img = int(text.split(": ")[1].split(" images")[0])
    assert 25 <= n_img <= 35


def test_nothing_arrives_but_camera_info_and_the_camera_rate_when_no_info():
    m = FrameLossMonitor(30.0)
    end = feed(m, 30.0, 4.0, lambda k: False)
    assert "0 images" in m.check(end)
    m = FrameLossMonitor(60.0)
    end = feed(m, 20.0, 4.0, lambda k: True, infos=False)   # 20 fps where 60 were expected
    text = m.check(end)
    assert "io.camera_rate_hz = 60" in text
    # the camera running slower than expected with its own camera_info agreeing is no loss
    m = FrameLossMonitor(60.0)
    assert m.check(feed(m, 20.0, 4.0, lambda k: True)) == ""


def test_cdr_stamp_reads_the_header_of_both_byte_orders():
    for flag, fmt in ((1, "<iI"), (0, ">iI")):
        data = bytes([0, flag, 0, 0]) + struct.pack(fmt, 1700000000, 250000000) + b"xyz"
        assert np.isclose(cdr_stamp(data), 1700000000.25)
    assert cdr_stamp(b"\x00\x01") is None


def test_cdr_stamp_of_a_message_serialized_by_rclpy():
    """Against rclpy.serialization.serialize_message (the ROS client library; no context
    is started): the stamp of a real serialized sensor_msgs/Image."""
    from builtin_interfaces.msg import Time
    from rclpy.serialization import serialize_message
    from sensor_msgs.msg import Image
    msg = Image(height=2, width=3, encoding="mono8", step=3, data=bytes(6))
    msg.header.stamp = Time(sec=1712345678, nanosec=987654321)
    assert abs(cdr_stamp(serialize_message(msg)) - 1712345678.987654321) < 1e-6
