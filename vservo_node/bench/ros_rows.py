"""The DDS rows of ``vservo bench``: the controller node's CPU and its image-to-command latency.

Three processes besides this one, all children of a process run through ``tools/isolated``,
all with the shipped shared-memory Fast DDS profile (``ros.dds``, config/fastdds_shm.xml):

- the bench cell (``--role cell``): an ideal velocity-controlled vs7_bench arm (commands
  integrated, 0.1 s drive timeout) and a pinhole camera of the size asked (f = 600 px per 640
  px of width) over the tray_dots board 0.4 m away, rendered live; joint states at 120 Hz,
  camera_info + a bgr8 image every 120/fps ticks, each image stamped with the wall clock
  just before it is published;
- the controller node (``vservo_node.ros.controller_node``), shipped defaults except robot,
  reference directory and io.camera_rate_hz;
- a bare subscriber (``--role baseline``): the same raw subscription the node makes (sensor
  data QoS, serialized message viewed as NumPy without copying), wall clock on entry minus the
  stamp: the transport-only baseline, measured on the same frames in the same run.

The node's status record carries the stamp of the frame its cycle used (``t``) and goes out
in the output tick that publishes the command computed from that frame; the first status with
a new ``t`` received here marks that command. Its latency is receipt time minus stamp, so it
includes one hop of a small message back to this process (not subtracted: an over-estimate
by that hop) and the wait for the next output tick (up to one io.output_rate_hz period).

CPU: user + system time of the controller process (/proc/<pid>/stat) over the watching
interval (reference taught, motion disabled, images and joint states flowing) and over the
servoing interval (runs from a joint offset of ~24 px to arrival, repeated).
"""
from __future__ import annotations

import argparse
import json
import os
import re
import sys
import tempfile
import threading
import time
from pathlib import Path

import numpy as np

from vservo_node.interface import RUN_STATES

ROOT = Path(__file__).resolve().parents[2]
CELL_RATE_HZ = 120.0
OFFSET = [0.06, -0.04, 0.04, 0.06, -0.04, 0.06, 0.08]   # rad from home, ~24 px at 320x240
SERVO_STATES = RUN_STATES


# =============================================================================== cell process
def cell_main(args) -> None:
    import rclpy
    from rclpy.executors import SingleThreadedExecutor
    from sensor_msgs.msg import CameraInfo, Image, JointState
    from std_msgs.msg import Float64MultiArray, String

    from vservo_node import interface as itf
    from vservo_node.control import frames
    from vservo_node.control.kinematics import load_robot
    from vservo_node.ros import convert, qos
    from vservo_node.sim.render import PlanarTexture, PlaneRenderer
    from vservo_node.vision.camera import CameraModel
    from vservo_node.vision.targets import load_target, render_target_texture

    robot = load_robot("vs7_bench")
    arm, home = robot.arm, robot.home
    w, h = args.width, args.height
    f = 600.0 * w / 640
    camera = CameraModel.pinhole(w, h, f, f, (w - 1) / 2, (h - 1) / 2)
    renderer = PlaneRenderer(camera)
    texture = PlanarTexture(*render_target_texture(load_target("tray_dots"), 4000.0 * w / 640))
    T_base_target = arm.camera_pose(home) @ frames.transform(np.eye(3), [0.0, 0.0, 0.4])
    lock = threading.Lock()
    state = {"q": home.copy(), "cmd": np.zeros(arm.n), "cmd_t": -1.0, "running": False}
    rclpy.init()
    node = rclpy.create_node("bench_cell")
    pub_joints = node.create_publisher(JointState, itf.TOPIC_JOINT_STATES, qos.STATE)
    pub_image = node.create_publisher(Image, itf.TOPIC_IMAGE, qos.SENSOR_DATA)
    pub_info = node.create_publisher(CameraInfo, itf.TOPIC_CAMERA_INFO, qos.SENSOR_DATA)

    def on_command(msg):
        with lock:
            state["cmd"] = convert.joint_array_values(msg, arm.joint_names)
            state["cmd_t"] = time.monotonic()

    def on_control(msg):
        order = json.loads(msg.data)
        with lock:
            state["running"] |= bool(order.get("run"))
            if "offset" in order:
                state["q"] = home + np.asarray(order["offset"], float)
                state["cmd"] = np.zeros(arm.n)

    node.create_subscription(Float64MultiArray, itf.TOPIC_JOINT_VELOCITY_CMD, on_command,
                             qos.COMMANDS)
    node.create_subscription(String, "bench/control", on_control, qos.STATE)
    executor = SingleThreadedExecutor()
    executor.add_node(node)
    threading.Thread(target=executor.spin, daemon=True).start()
    dt = 1.0 / CELL_RATE_HZ
    every = max(1, int(round(CELL_RATE_HZ / args.fps)))
    image = np.empty((h, w, 3), np.uint8)
    tick, next_t = 0, time.monotonic()
    try:
        while rclpy.ok():
            with lock:
                if time.monotonic() - state["cmd_t"] < 0.1:   # a drive's command timeout
                    state["q"] = state["q"] + state["cmd"] * dt
                q, running = state["q"].copy(), state["running"]
            if running:
                pub_joints.publish(convert.joint_state(arm.joint_names, q, stamp=time.time()))
                if tick % every == 0:
                    image.fill(90)
                    renderer.draw(image, texture, frames.invert(arm.camera_pose(q))
                                  @ T_base_target)
                    stamp = time.time()
                    pub_info.publish(convert.model_to_camera_info(camera, stamp))
                    pub_image.publish(convert.numpy_to_image(image, "bgr8", stamp))
            tick += 1
            next_t += dt
            time.sleep(max(0.0, next_t - time.monotonic()))
    except KeyboardInterrupt:
        pass
    finally:
        executor.shutdown()
        rclpy.try_shutdown()


# =============================================================================== baseline
def baseline_main(args) -> None:
    """A bare subscriber of the images: wall clock on entering the callback minus the stamp,
    after viewing the pixels (as the node's perception thread gets them); writes the figures
    to ``args.out`` when interrupted."""
    import rclpy
    from sensor_msgs.msg import Image

    from vservo_node import interface as itf
    from vservo_node.ros import convert, qos

    rclpy.init()
    node = rclpy.create_node("bench_baseline")
    stamps, latency = [], []

    def on_image(data):
        rx = time.time()
        msg = convert.image_from_cdr(data)
        convert.image_to_numpy(msg)
        sent = convert.time_to_sec(msg.header.stamp)
        stamps.append(sent)
        latency.append(1e3 * (rx - sent))

    node.create_subscription(Image, itf.TOPIC_IMAGE, on_image, qos.SENSOR_DATA, raw=True)
    try:
        rclpy.spin(node)
    except (KeyboardInterrupt, Exception):   # rclpy raises ExternalShutdownException too
        pass
    finally:
        Path(args.out).write_text(json.dumps({"stamps": stamps, "latency_ms": latency}))
        rclpy.try_shutdown()


# =============================================================================== orchestrator
def _run_end(statuses, first: int, run_id: str) -> str:
    """'' or how the run ``run_id`` ended ('converged' or 'halted:REASON'), from the statuses
    received since ``statuses[first]`` (the previous run's end may still be in flight)."""
    for _, s in statuses[first:]:
        if s.get("run_id") == run_id and s["state"] in ("converged", "halted"):
            return s["state"] + (":" + s["reason"] if s["reason"] else "")
    return ""


def cpu_seconds(pid: int) -> float:
    fields = Path(f"/proc/{pid}/stat").read_text().rsplit(")", 1)[1].split()
    return (int(fields[11]) + int(fields[12])) / os.sysconf("SC_CLK_TCK")


def measure(width: int, height: int, fps: float, watch_s: float = 5.0,
            servo_s: float = 8.0) -> dict:
    """One configuration: {'cpu_watch', 'cpu_servo' (fractions of one core), 'latency_ms',
    'baseline_ms' (per frame), 'frames_published'..., 'runs'}. Needs tools/isolated."""
    from vservo_node.ros import harness

    harness.require_isolation()
    with tempfile.TemporaryDirectory(prefix="vservo_bench_") as folder:
        return _measure(Path(folder), width, height, fps, watch_s, servo_s)


def _measure(tmp: Path, width, height, fps, watch_s, servo_s) -> dict:
    import rclpy
    import yaml
    from std_msgs.msg import String
    from std_srvs.srv import SetBool, Trigger

    from vservo_node import interface as itf
    from vservo_node.ros import dds, harness, qos

    params = {"robot": {"urdf_path": str(ROOT / "config/robots/vs7_bench.urdf")},
              "reference": {"directory": str(tmp), "name": "bench"},
              "limits": {"joint_acceleration": [3.0]},
              "io": {"camera_rate_hz": float(fps)}}
    (tmp / "params.yaml").write_text(yaml.safe_dump({"vservo": {"ros__parameters": params}}))
    script = [sys.executable, "-m", "vservo_node.bench.ros_rows"]
    size = ["--width", str(width), "--height", str(height), "--fps", str(fps)]
    out = tmp / "baseline.json"
    procs = [harness.start_module("vservo_node.ros.controller_node",
                                  ros_args=["--params-file", str(tmp / "params.yaml")]),
             harness.NodeProcess(script + ["--role", "cell"] + size, "bench_cell"),
             harness.NodeProcess(script + ["--role", "baseline", "--out", str(out)],
                                 "bench_baseline")]
    controller = procs[0].popen.pid
    dds.use_shm_profile()
    rclpy.init()
    node = rclpy.create_node("bench_orchestrator")
    statuses = []      # (receipt wall time, status)
    node.create_subscription(String, itf.TOPIC_STATUS,
                             lambda m: statuses.append((time.time(), json.loads(m.data))),
                             qos.STATE)
    control = node.create_publisher(String, "bench/control", qos.STATE)

    clients = {}

    def call(srv_type, name, request=None):
        if name not in clients:
            clients[name] = harness.ready_client(node, srv_type, "/" + name, 30.0, procs)
        return harness.call_service(node, clients[name], request or srv_type.Request(), 10.0,
                                    procs)

    def spin_for(seconds):
        end = time.monotonic() + seconds
        harness.spin_until(node, lambda: time.monotonic() > end, seconds + 5, "time", procs)

    try:
        harness.wait_for_subscriber(node, "bench/control", 30.0, procs)
        for _attempt in range(10):       # discovery is not symmetric: repeat until frames flow
            control.publish(String(data=json.dumps({"run": True})))
            spin_for(1.0)
            if statuses:
                break
        harness.spin_until(node, lambda: bool(statuses), 30.0, "a status", procs)
        response = call(Trigger, itf.SRV_CAPTURE_REFERENCE)
        if not response.success:
            raise RuntimeError(f"capture_reference refused: {response.message}")
        spin_for(1.0)
        c0, t0 = cpu_seconds(controller), time.monotonic()
        spin_for(watch_s)
        cpu_watch = (cpu_seconds(controller) - c0) / (time.monotonic() - t0)
        refusals = []
        for _attempt in range(10):        # a loaded machine can hold back a frame or two
            response = call(SetBool, itf.SRV_ENABLE_MOTION, SetBool.Request(data=True))
            if response.success:
                break
            refusals.append(response.message)
            spin_for(0.3)
        else:
            raise RuntimeError(f"enable_motion refused: {response.message}")
        latency, seen, runs, ends = [], set(), 0, []
        busy_cpu = busy_s = 0.0
        t_end = time.monotonic() + servo_s
        while time.monotonic() < t_end:
            control.publish(String(data=json.dumps({"offset": OFFSET})))
            spin_for(0.5)
            first = len(statuses)
            c0, t0 = cpu_seconds(controller), time.monotonic()
            for _attempt in range(10):    # a loaded machine can hold back a frame or two
                response = call(Trigger, itf.SRV_START)
                if response.success:
                    break
                refusals.append(response.message)
                spin_for(0.3)
            else:
                raise RuntimeError(f"start refused: {response.message}")
            runs += 1
            found = re.search(r"run (\S+) started", response.message)
            if not found:
                raise RuntimeError(f"no run id in the start response {response.message!r}")
            run_id = found.group(1)
            harness.spin_until(node, lambda: bool(_run_end(statuses, first, run_id)),  # noqa: B023
                               30.0,
                               f"the end of run {run_id}", procs)
            busy_cpu += cpu_seconds(controller) - c0
            busy_s += time.monotonic() - t0
            for rx, s in statuses[first:]:
                if (s.get("run_id") == run_id and s["state"] in SERVO_STATES
                        and s["t"] not in seen):
                    seen.add(s["t"])
                    latency.append(1e3 * (rx - s["t"]))
            ends.append(_run_end(statuses, first, run_id))
        procs[2].stop()
        baseline = json.loads(out.read_text()) if out.exists() else {"latency_ms": []}
        return {"width": width, "height": height, "fps": fps,
                "cpu_watch": cpu_watch, "cpu_servo": busy_cpu / busy_s if busy_s else None,
                "latency_ms": latency, "baseline_ms": baseline["latency_ms"],
                "runs": runs, "run_ends": ends, "start_refusals": refusals}
    finally:
        for proc in procs:
            proc.stop()
            proc.remove_log()
        node.destroy_node()
        rclpy.shutdown()


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--role", choices=("cell", "baseline"), required=True)
    parser.add_argument("--width", type=int, default=640)
    parser.add_argument("--height", type=int, default=480)
    parser.add_argument("--fps", type=float, default=30.0)
    parser.add_argument("--out")
    args, _ = parser.parse_known_args()
    {"cell": cell_main, "baseline": baseline_main}[args.role](args)


if __name__ == "__main__":
    main()
