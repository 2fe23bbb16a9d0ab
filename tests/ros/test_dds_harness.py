"""The shared-memory DDS profile and the process harness, with real processes."""
import subprocess
import sys
import textwrap
import xml.etree.ElementTree as ET

import numpy as np
import pytest
from rclpy.serialization import serialize_message
from sensor_msgs.msg import Image

from vservo_node.ros import convert, dds, harness, qos
from vservo_node.ros.dds import PROFILE_VARIABLES

NS = {"dds": "http://www.eprosima.com"}


def test_profile_only_when_user_has_none():
    """The variable(s) each Fast DDS reads: FASTRTPS_DEFAULT_PROFILES_FILE for Fast DDS 2 (Jazzy
    ships 2.14), FASTDDS_DEFAULT_PROFILES_FILE for Fast DDS 3 (eProsima, Fast DDS documentation,
    "XML profiles" / "Environment variables", 2.x and 3.x editions)."""
    for major, expected in ((2, PROFILE_VARIABLES), (None, PROFILE_VARIABLES),
                            (3, ("FASTDDS_DEFAULT_PROFILES_FILE",))):
        env = {}
        path = dds.use_shm_profile(env, major=major)
        assert path.is_file() and env == dict.fromkeys(expected, str(path)), major
    for user_choice in ({"FASTDDS_DEFAULT_PROFILES_FILE": "/mine.xml"},
                        {"FASTRTPS_DEFAULT_PROFILES_FILE": "/mine.xml"},
                        {"RMW_IMPLEMENTATION": "rmw_cyclonedds_cpp"}):
        for major in (2, 3):
            env = dict(user_choice)
            assert dds.use_shm_profile(env, major=major) is None and env == user_choice
    env = {"RMW_IMPLEMENTATION": "rmw_fastrtps_cpp", "FASTRTPS_DEFAULT_PROFILES_FILE": ""}
    assert dds.use_shm_profile(env, major=2) == path   # set but empty: nobody chose a file
    assert (env["FASTRTPS_DEFAULT_PROFILES_FILE"] == env["FASTDDS_DEFAULT_PROFILES_FILE"]
            == str(path))


def test_fast_dds_version_from_the_wheels_or_the_distribution(monkeypatch):
    """This venv's wheels carry Fast DDS 3 (ros-fastdds, Kilted's stack); without wheels a
    sourced install's ROS_DISTRO tells."""
    from importlib import metadata
    assert dds.fast_dds_major({}) == int(metadata.version("ros-fastdds").split(".")[0]) == 3

    def missing(name):
        raise metadata.PackageNotFoundError(name)
    monkeypatch.setattr(dds.metadata, "version", missing)
    assert dds.fast_dds_major({"ROS_DISTRO": "jazzy"}) == 2
    assert dds.fast_dds_major({"ROS_DISTRO": "kilted"}) == 3
    assert dds.fast_dds_major({}) is None


SEGMENT_PROBE = textwrap.dedent("""
    import os, sys, rclpy
    from vservo_node.ros import dds
    if sys.argv[1] == "profile":
        dds.use_shm_profile()
    rclpy.init()
    node = rclpy.create_node("segment_probe")
    maps = open("/proc/self/maps").read().split()
    segments = {w for w in maps
                if w.startswith("/dev/shm/fastdds_") or w.startswith("/dev/shm/fastrtps_")}
    print(max((os.path.getsize(s) for s in segments if os.path.exists(s)), default=0))
    node.destroy_node()
    rclpy.shutdown()
""")


def test_profile_reaches_fast_dds():
    """The profile really applies: the largest shared-memory segment this process maps is the
    profile's 32 MiB (plus Fast DDS's bookkeeping) with it, Fast DDS's 512 KiB default without
    it; no deprecation warning about the variable name."""
    sizes = {}
    for mode in ("profile", "none"):
        env = harness.child_environment()
        for name in PROFILE_VARIABLES:
            env.pop(name, None)
        proc = subprocess.run([sys.executable, "-c", SEGMENT_PROBE, mode], env=env,
                              capture_output=True, text=True, timeout=60)
        assert proc.returncode == 0, proc.stderr
        assert "deprecated" not in proc.stderr, proc.stderr
        sizes[mode] = int(proc.stdout.split()[-1])
    assert sizes["profile"] >= 32 * 2**20 > 2**20 > sizes["none"], sizes


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
