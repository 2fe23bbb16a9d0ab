"""Shared pieces of the sim-node tests: start/stop the node process, collect what it sends."""
import time
from pathlib import Path

import yaml
from rclpy.qos import QoSProfile, ReliabilityPolicy
from rosgraph_msgs.msg import Clock
from sensor_msgs.msg import CameraInfo, Image, JointState

from vservo_node import interface
from vservo_node.ros import convert, harness, qos
from vservo_node.sim import load_scenario

SIM = "vservo_node.ros.sim_node"
CONFIG = Path(__file__).resolve().parents[2] / "config" / "sim_cell.yaml"
JOINT_STATE_RATE = 250.0
COMMAND_TIMEOUT = 0.1
# The test's own joint-state queue: deep, so a busy test process loses nothing.
DEEP = QoSProfile(depth=200, reliability=ReliabilityPolicy.RELIABLE)


def stamp_ns(msg):
    return msg.header.stamp.sec * 1_000_000_000 + msg.header.stamp.nanosec


class Collector:
    """Everything the test node hears from a sim node, with wall arrival times."""

    def __init__(self, node):
        self.node = node
        self.joints, self.images, self.infos, self.clock = [], [], [], []
        self._subs = [
            node.create_subscription(JointState, interface.TOPIC_JOINT_STATES,
                                     lambda m: self.joints.append((time.monotonic(), m)),
                                     DEEP),
            node.create_subscription(Image, interface.TOPIC_IMAGE, self._on_image,
                                     qos.SENSOR_DATA),
            node.create_subscription(CameraInfo, interface.TOPIC_CAMERA_INFO,
                                     lambda m: self.infos.append((time.monotonic(), m)),
                                     qos.SENSOR_DATA),
            node.create_subscription(Clock, "/clock", lambda m: self.clock.append(m.clock),
                                     qos.CLOCK),
        ]

    def _on_image(self, msg):
        pixels = convert.image_to_numpy(msg)
        meta = dict(stamp_ns=stamp_ns(msg), frame_id=msg.header.frame_id,
                    encoding=msg.encoding, shape=pixels.shape,
                    mean=float(pixels[::8, ::8].mean()))
        self.images.append((time.monotonic(), meta))

    def clear(self):
        for store in (self.joints, self.images, self.infos, self.clock):
            store.clear()

    def spin_for(self, seconds, processes):
        end = time.monotonic() + seconds
        harness.spin_until(self.node, lambda: time.monotonic() > end, seconds + 5.0,
                           f"{seconds} s of traffic", processes)

    def last_q(self, names):
        return convert.joint_state_to_arrays(self.joints[-1][1], names)

    def close(self):
        for sub in self._subs:
            self.node.destroy_subscription(sub)


def start_sim(ros_node, *overrides):
    params = ["--params-file", str(CONFIG), "-p", f"command_timeout:={COMMAND_TIMEOUT}"]
    for item in overrides:
        params += ["-p", item]
    proc = harness.start_module(SIM, ros_args=params, name="vservo_sim")
    harness.wait_for_publisher(ros_node, interface.TOPIC_IMAGE, 30.0, [proc])
    return proc


def stop_sim(proc):
    code = proc.stop()
    output = proc.output()
    proc.remove_log()
    assert code == 0, f"vservo_sim exited with {code} on SIGINT:\n{output[-3000:]}"


def config_scenario():
    """The scenario named in config/sim_cell.yaml (what the node loads by default)."""
    params = yaml.safe_load(CONFIG.read_text())["/**/vservo_sim"]["ros__parameters"]
    return load_scenario(params["scenario"])
