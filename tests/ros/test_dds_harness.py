"""The shared-memory DDS profile and the process harness, with real processes."""
import sys
import textwrap
import xml.etree.ElementTree as ET

import numpy as np
import pytest
from rclpy.serialization import serialize_message
from sensor_msgs.msg import Image

from vservo_node.ros import convert, dds, harness, qos

NS = {"dds": "http://www.eprosima.com"}


def test_profile_only_when_user_has_none():
    env = {}
    path = dds.use_shm_profile(env)
    assert path.is_file() and env == {"FASTDDS_DEFAULT_PROFILES_FILE": str(path)}
    for user_choice in ({"FASTDDS_DEFAULT_PROFILES_FILE": "/mine.xml"},
                        {"FASTRTPS_DEFAULT_PROFILES_FILE": "/mine.xml"},
                        {"RMW_IMPLEMENTATION": "rmw_cyclonedds_cpp"}):
        env = dict(user_choice)
        assert dds.use_shm_profile(env) is None and env == user_choice
    env = {"RMW_IMPLEMENTATION": "rmw_fastrtps_cpp"}
    assert dds.use_shm_profile(env) == path


def test_segment_holds_full_hd_frames():
    """The segment must hold a whole serialized 1920x1080 rgb8 Image (size measured by
    serializing one), with room for frames in flight; the Fast DDS default (512 KiB, Fast DDS
    SharedMemTransport source, from memory) is below even one VGA frame."""
    root = ET.parse(dds.shm_profile_path()).getroot()
    sizes = [int(e.text) for e in root.iterfind(".//dds:transport_descriptor/dds:segment_size", NS)]
    assert len(sizes) == 1
    frame = convert.numpy_to_image(np.zeros((1080, 1920, 3), np.uint8), "rgb8",
                                   frame_id="camera_optical_frame")
    full_hd = len(serialize_message(frame))
    vga = len(serialize_message(convert.numpy_to_image(np.zeros((480, 640, 3), np.uint8),
                                                       "rgb8")))
    assert sizes[0] >= 4 * full_hd
    assert vga > 512 * 1024
    used = [e.text for e in root.iterfind(".//dds:participant//dds:transport_id", NS)]
    declared = [e.text for e in root.iterfind(".//dds:transport_descriptor/dds:transport_id", NS)]
    assert sorted(used) == sorted(declared)


PUBLISHER = textwrap.dedent("""
    import time, numpy as np, rclpy
    from sensor_msgs.msg import Image
    from vservo_node.ros import convert, harness, qos
    rclpy.init()
    node = rclpy.create_node("vga_publisher")
    pub = node.create_publisher(Image, "test/vga", qos.SENSOR_DATA)
    harness.wait_for_subscriber(node, "test/vga", timeout=20.0)
    time.sleep(0.5)
    frame = np.full((480, 640, 3), 7, np.uint8)
    for i in range(20):
        frame[0, 0, 0] = i
        pub.publish(convert.numpy_to_image(frame, "rgb8", stamp=float(i)))
        time.sleep(1 / 30)
    time.sleep(1.0)
""")


def test_vga_frames_cross_processes_best_effort_with_profile(ros_node):
    """Measured with benchmarks/image_latency_bench.py: without the profile 2 of 60 best-effort
    VGA frames arrived, with it 60 of 60. 15 of 20 leaves room for a loaded machine."""
    received = []
    sub = ros_node.create_subscription(
        Image, "test/vga", lambda m: received.append(convert.image_to_numpy(m)[0, 0, 0]),
        qos.SENSOR_DATA)
    proc = harness.NodeProcess([sys.executable, "-c", PUBLISHER], "vga_publisher")
    try:
        harness.wait_for_publisher(ros_node, "test/vga", timeout=20.0, processes=[proc])
        harness.spin_until(ros_node, lambda: not proc.alive(), 30.0, "the publisher to finish")
        harness.spin_until(ros_node, lambda: len(received) >= 15, 1.0, "15 of 20 frames")
    finally:
        proc.stop()
        ros_node.destroy_subscription(sub)
    assert proc.popen.returncode == 0, proc.describe()
    assert list(received) == sorted(received)  # in order, none twice


def test_dead_process_is_reported_with_its_output(ros_node):
    proc = harness.NodeProcess(
        [sys.executable, "-c", "import sys; print('no scenario x', file=sys.stderr); "
                               "sys.exit(3)"], "dies")
    with pytest.raises(harness.ProcessFailed, match="(?s)exited with 3.*no scenario x"):
        harness.wait_for_publisher(ros_node, "never", timeout=10.0, processes=[proc])
    proc.stop()
    proc.remove_log()


def test_timeout_names_the_topic(ros_node):
    with pytest.raises(TimeoutError, match="a message on no/such/topic"):
        harness.wait_for_message(ros_node, "no/such/topic", Image, qos.SENSOR_DATA, timeout=0.3)


def test_stop_escalates_to_sigkill():
    proc = harness.NodeProcess(
        [sys.executable, "-c", "import signal, time; signal.signal(signal.SIGINT, "
                               "signal.SIG_IGN); print('ready', flush=True); time.sleep(60)"],
        "stubborn")
    harness.wait_until(lambda: "ready" in proc.output(), 10.0, "ready", [proc])
    assert proc.stop(timeout=0.3) == -9
    proc.remove_log()
