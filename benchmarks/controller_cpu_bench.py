"""CPU use of the controller node process while it watches and while it servos.

    tools/isolated .venv/bin/python benchmarks/controller_cpu_bench.py

Starts the controller node and the stub cell of tests/ros/test_controller_node.py (ideal
velocity-controlled vs7_bench arm, 320x240 images at ~33 Hz, joint states at 100 Hz), teaches
a reference, then reads the controller's user + system CPU time (/proc/<pid>/stat) over
WATCH_S seconds with motion disabled and over one run (enable, jump the arm, start, until
converged). Prints CPU in percent of one core and the output cycle count of the run.
"""
import json
import os
import sys
import tempfile
import time
from pathlib import Path

import rclpy
import yaml
from sensor_msgs.msg import Image
from std_msgs.msg import String
from std_srvs.srv import SetBool, Trigger

from vservo_node import interface as itf
from vservo_node.ros import dds, harness, qos

ROOT = Path(__file__).resolve().parents[1]
STUB = ROOT / "tests" / "ros" / "test_controller_node.py"
WATCH_S = 5.0
OFFSET = [0.06, -0.04, 0.04, 0.06, -0.04, 0.06, 0.08]   # rad, from the stub's home


def cpu_seconds(pid: int) -> float:
    fields = Path(f"/proc/{pid}/stat").read_text().rsplit(")", 1)[1].split()
    return (int(fields[11]) + int(fields[12])) / os.sysconf("SC_CLK_TCK")


def call(node, procs, srv_type, name, request=None):
    client = node.create_client(srv_type, name)
    harness.spin_until(node, client.service_is_ready, 20.0, name, procs)
    future = client.call_async(request or srv_type.Request())
    harness.spin_until(node, future.done, 10.0, f"{name} response", procs)
    return future.result()


def main() -> int:
    harness.require_isolation()
    with tempfile.TemporaryDirectory(prefix="controller_cpu_") as folder:
        return measure(Path(folder))


def measure(tmp: Path) -> int:
    params = {"robot": {"urdf_path": str(ROOT / "config/robots/vs7_bench.urdf")},
              "reference": {"directory": str(tmp), "name": "bench"},
              "control": {"gain_near": 3.0, "gain_far": 2.0, "soft_start_s": 0.1},
              "limits": {"joint_acceleration": [3.0]},
              "io": {"output_rate_hz": 100.0, "joint_state_timeout_s": 0.2}}
    (tmp / "params.yaml").write_text(yaml.safe_dump({"vservo": {"ros__parameters": params}}))
    procs = [harness.start_module("vservo_node.ros.controller_node",
                                  ros_args=["--params-file", str(tmp / "params.yaml")]),
             harness.NodeProcess([sys.executable, str(STUB), "--stub"], "stub_cell")]
    controller = procs[0].popen.pid
    dds.use_shm_profile()
    rclpy.init()
    node = rclpy.create_node("controller_cpu_bench")
    status = []
    node.create_subscription(String, itf.TOPIC_STATUS,
                             lambda m: status.append(json.loads(m.data)), qos.STATE)
    control = node.create_publisher(String, "stub/control", qos.STATE)
    try:
        harness.wait_for_subscriber(node, "stub/control", 30.0, procs)
        # the order can go out before the stub's subscription has matched this publisher
        # (discovery is not symmetric): repeat it until images flow
        for attempt in range(10):
            control.publish(String(data=json.dumps({"run": True})))
            try:
                harness.wait_for_message(node, itf.TOPIC_IMAGE, Image, qos.SENSOR_DATA, 2.0,
                                         processes=procs)
                break
            except TimeoutError:
                if attempt == 9:
                    raise
        harness.spin_until(node, lambda: bool(status), 20.0, "a status", procs)
        print(call(node, procs, Trigger, "/" + itf.SRV_CAPTURE_REFERENCE).message)
        c0, t0 = cpu_seconds(controller), time.monotonic()
        harness.spin_until(node, lambda: time.monotonic() - t0 > WATCH_S, WATCH_S + 5, "time",
                           procs)
        watching = (cpu_seconds(controller) - c0) / (time.monotonic() - t0)
        call(node, procs, SetBool, "/" + itf.SRV_ENABLE_MOTION, SetBool.Request(data=True))
        control.publish(String(data=json.dumps({"offset": OFFSET})))
        harness.spin_until(node, lambda: time.monotonic() - t0 > WATCH_S + 0.5, 10.0, "time",
                           procs)
        c0, t0 = cpu_seconds(controller), time.monotonic()
        print(call(node, procs, Trigger, "/" + itf.SRV_START).message)
        harness.spin_until(node, lambda: status[-1]["state"] in ("converged", "halted"), 30.0,
                           "the end of the run", procs)
        run_s = time.monotonic() - t0
        servoing = (cpu_seconds(controller) - c0) / run_s
        print(f"controller CPU, motion disabled, images + joints streaming: "
              f"{100 * watching:.0f} % of one core")
        print(f"controller CPU during a run of {run_s:.2f} s ({status[-1]['state']}): "
              f"{100 * servoing:.0f} % of one core")
    finally:
        for proc in procs:
            proc.stop()
            proc.remove_log()
        node.destroy_node()
        rclpy.shutdown()
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
