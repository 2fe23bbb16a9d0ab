"""How fast the simulated-cell node (vservo_sim) runs when asked to go as fast as it can.

1. free-running, real_time_factor 0, /clock on: simulated seconds per wall second, watched on
   /clock by this process.
2. lock-step, real_time_factor 0: this process plays a controller that answers every image
   with a zero velocity command at once; frames per wall second and simulated seconds per
   wall second (an upper bound for lock-step tests: a real controller adds its own cycle time).

    .venv/bin/python benchmarks/sim_node_bench.py [--seconds 5] [--scenario tray_offset]

Re-runs itself through tools/isolated when not already isolated (it starts ROS contexts).
"""
from __future__ import annotations

import argparse
import os
import sys
import time
from pathlib import Path

ROOT = Path(__file__).resolve().parent.parent
sys.path.insert(0, str(ROOT))

SIM = "vservo_node.ros.sim_node"


def _measure(node, proc, seconds, answer_images):
    import rclpy
    from rosgraph_msgs.msg import Clock
    from sensor_msgs.msg import Image, JointState
    from std_msgs.msg import Float64MultiArray

    from vservo_node import interface
    from vservo_node.ros import convert, harness, qos

    clock, frames = [], []
    subs = [node.create_subscription(Clock, "/clock", lambda m: clock.append(
        convert.time_to_sec(m.clock)), qos.CLOCK)]
    pub = node.create_publisher(Float64MultiArray, interface.TOPIC_JOINT_VELOCITY_CMD,
                                qos.COMMANDS)
    n_joints = []

    def on_image(msg):
        frames.append(time.monotonic())
        if answer_images and n_joints:
            pub.publish(Float64MultiArray(data=[0.0] * n_joints[0]))

    subs.append(node.create_subscription(Image, interface.TOPIC_IMAGE, on_image,
                                         qos.SENSOR_DATA))
    joint_state = harness.wait_for_message(node, interface.TOPIC_JOINT_STATES,
                                           JointState, qos.STATE, 30.0,
                                           processes=[proc])
    n_joints.append(len(joint_state.name))
    if answer_images:
        harness.wait_for_subscriber(node, interface.TOPIC_JOINT_VELOCITY_CMD, 10.0, [proc])
        pub.publish(Float64MultiArray(data=[0.0] * n_joints[0]))  # start the exchange
    harness.spin_until(node, lambda: len(clock) > 2, 30.0, "/clock", [proc])
    wall0, sim0, frames0 = time.monotonic(), clock[-1], len(frames)
    end = wall0 + seconds
    while time.monotonic() < end:
        rclpy.spin_once(node, timeout_sec=0.05)
    wall = time.monotonic() - wall0
    for sub in subs:
        node.destroy_subscription(sub)
    node.destroy_publisher(pub)
    return (clock[-1] - sim0) / wall, (len(frames) - frames0) / wall


def main():
    parser = argparse.ArgumentParser(description=__doc__.split("\n\n")[0])
    parser.add_argument("--seconds", type=float, default=5.0)
    parser.add_argument("--scenario", default="tray_offset")
    args = parser.parse_args()
    if not os.environ.get("VSERVO_ISOLATION"):
        isolated = str(ROOT / "tools" / "isolated")
        os.execv(isolated, [isolated, sys.executable, *sys.argv])

    import rclpy

    from vservo_node.ros import dds, harness

    dds.use_shm_profile()
    rclpy.init()
    node = rclpy.create_node("sim_node_bench")
    common = ["-p", f"scenario:={args.scenario}", "-p", "publish_clock:=true",
              "-p", "real_time_factor:=0.0"]
    print(f"vservo_sim, scenario {args.scenario}, {args.seconds:g} s per row, "
          f"joint states 250 Hz")
    print(f"{'mode':<34} {'sim s / wall s':>15} {'frames / wall s':>16}")
    for label, extra, answer in (
            ("free-running, as fast as possible", [], False),
            ("lock-step, instant zero commands", ["-p", "lock_step:=true"], True)):
        proc = harness.start_module(SIM, ros_args=common + extra, name="vservo_sim")
        try:
            rtf, fps = _measure(node, proc, args.seconds, answer)
        finally:
            proc.stop()
            proc.remove_log()
        print(f"{label:<34} {rtf:>15.2f} {fps:>16.1f}")
    node.destroy_node()
    rclpy.shutdown()


if __name__ == "__main__":
    main()
