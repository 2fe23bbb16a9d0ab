"""What the controller node's CPU is spent on before any servoing: no image, 30 and 60 fps.

    tools/isolated .venv/bin/python benchmarks/controller_cpu_split.py

Starts the controller (shipped defaults, vs7_bench URDF, no reference taught) and the bench
cell of ``vservo bench`` (vservo_node/bench/ros_rows.py: joint states at 120 Hz, 640x480
frames with camera_info at the rate given; 0.0001 fps = practically no image), lets them run
3 s, then prints the controller's user + system CPU over 8 s in percent of one core. The
difference between the rows is what the frames cost; the first row is the floor set by the
joint-state callbacks and the output loop.
"""
import json
import sys
import tempfile
import time
from pathlib import Path

import rclpy
import yaml
from std_msgs.msg import String

from vservo_node.bench.ros_rows import ROOT, cpu_seconds
from vservo_node.ros import dds, harness, qos


def measure(fps: float, tmp: Path) -> float:
    params = {"robot": {"urdf_path": str(ROOT / "config/robots/vs7_bench.urdf")},
              "reference": {"directory": str(tmp), "name": "bench"},
              "limits": {"joint_acceleration": [3.0]}, "io": {"camera_rate_hz": 30.0}}
    (tmp / "p.yaml").write_text(yaml.safe_dump({"vservo": {"ros__parameters": params}}))
    procs = [harness.start_module("vservo_node.ros.controller_node",
                                  ros_args=["--params-file", str(tmp / "p.yaml")]),
             harness.NodeProcess([sys.executable, "-m", "vservo_node.bench.ros_rows", "--role",
                                  "cell", "--fps", str(fps)], "bench_cell")]
    node = rclpy.create_node("cpu_split")
    try:
        pub = node.create_publisher(String, "bench/control", qos.STATE)
        harness.wait_for_subscriber(node, "bench/control", 30.0, procs)
        for _ in range(5):      # discovery is not symmetric: repeat the order
            pub.publish(String(data=json.dumps({"run": True})))
            rclpy.spin_once(node, timeout_sec=0.5)
        time.sleep(3.0)
        pid = procs[0].popen.pid
        c0, t0 = cpu_seconds(pid), time.monotonic()
        time.sleep(8.0)
        return (cpu_seconds(pid) - c0) / (time.monotonic() - t0)
    finally:
        for proc in procs:
            proc.stop()
            proc.remove_log()
        node.destroy_node()


def main() -> int:
    harness.require_isolation()
    dds.use_shm_profile()
    rclpy.init()
    try:
        for fps in (0.0001, 30.0, 60.0):
            with tempfile.TemporaryDirectory(prefix="cpu_split_") as folder:
                cpu = measure(fps, Path(folder))
            print(f"{'no image' if fps < 1 else f'{fps:.0f} fps 640x480'}: controller CPU "
                  f"{100 * cpu:.1f} % of one core (motion disabled, no reference taught)")
    finally:
        rclpy.shutdown()
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
