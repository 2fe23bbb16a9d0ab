"""The package on ROS 2 Jazzy's Python stack (.venv-ros2-jazzy: ros-jazzy-rclpy 7.1.6, Fast DDS
2.14, Jazzy's launch and ros2cli): colcon build gives the executables, and the shipped Fast DDS
profile reaches Fast DDS 2.14, which reads FASTRTPS_DEFAULT_PROFILES_FILE only (issue 12, point
6). `ros2 launch` of the simulated cell on this stack: test_launch.py's start/stop test,
parametrized by stack.
"""
import textwrap

from ros2_helpers import Ros2, require_isolation

# The largest Fast DDS shared-memory segment this process maps, after vservo_node's own set-up
# ("profile") or without any profile ("none").
SEGMENT_PROBE = textwrap.dedent("""
    import os, sys, rclpy
    from vservo_node.ros import dds
    if sys.argv[1] == "profile":
        dds.use_shm_profile()
    rclpy.init()
    node = rclpy.create_node("segment_probe")
    words = open("/proc/self/maps").read().split()
    segments = {w for w in words if w.startswith(("/dev/shm/fastdds_", "/dev/shm/fastrtps_"))}
    print(sorted(k for k in os.environ if k.endswith("_DEFAULT_PROFILES_FILE")))
    print(max((os.path.getsize(s) for s in segments if os.path.exists(s)), default=0))
    node.destroy_node()
    rclpy.shutdown()
""")


def test_colcon_build_on_jazzy(ros2_jazzy, workspace_jazzy):
    out = ros2_jazzy.run(Ros2.sourced(workspace_jazzy, "ros2", "pkg", "executables",
                                      "vservo_node")).stdout
    assert {line.split()[1] for line in out.splitlines() if line.strip()} == {
        "vservo", "vservo_node", "vservo_managed", "vservo_sim", "vservo_recorder"}
    version = ros2_jazzy.run(Ros2.sourced(workspace_jazzy, "python", "-c", (
        "import importlib.metadata as m; print(m.version('ros-rclpy'), "
        "m.version('ros-fastrtps'))"))).stdout.split()
    assert version[0] == "7.1.6" and version[1].startswith("2.14."), version


def test_shm_profile_reaches_fast_dds_2(ros2_jazzy, workspace_jazzy):
    """With vservo_node's set-up the process maps the profile's 32 MiB segment (plus Fast DDS's
    bookkeeping), without it Fast DDS's 512 KiB default (SharedMemTransport, from memory; the
    two sizes are what this compares)."""
    require_isolation()
    seen = {}
    for mode in ("profile", "none"):
        proc = ros2_jazzy.run(Ros2.sourced(workspace_jazzy, "python", "-c", SEGMENT_PROBE, mode))
        names, size = proc.stdout.strip().splitlines()[-2:]
        seen[mode] = (names, int(size))
    assert "FASTRTPS_DEFAULT_PROFILES_FILE" in seen["profile"][0], seen
    assert seen["profile"][1] >= 32 * 2**20 > 2**20 > seen["none"][1], seen
