"""Drive one run of the simulated cell started by `ros2 launch`, through the controller's
services, as an operator without the `vservo` commands would (rclpy only): enable motion
(retried until the inputs are fresh), wait for the recorder to be ready, start, wait for the run
result and for the recorder's bag. Prints one JSON object: the run result, the enable/start
replies, the recorder's last bag.

    python drive_run.py SCENARIO [--timeout S]

Run with the package of the colcon install on the path (source install/setup.bash), inside
tools/isolated.
"""
import argparse
import json
import time

import rclpy
from std_msgs.msg import Bool

from vservo_node import interface
from vservo_node.ros import demo_run, harness, qos
from vservo_node.sim import load_scenario


def main():
    parser = argparse.ArgumentParser()
    parser.add_argument("scenario")
    parser.add_argument("--timeout", type=float, default=120.0)
    args = parser.parse_args()
    deadline = time.monotonic() + args.timeout
    rclpy.init()
    node = demo_run.Watcher(load_scenario(args.scenario).arm_model("belief"))
    out = {}
    try:
        harness.wait_for_message(node, interface.TOPIC_RECORDER_READY, Bool, qos.LATCHED,
                                 max(1.0, deadline - time.monotonic()), lambda m: m.data, [])
        out["enable"] = demo_run.enable_motion(node, [], deadline)
        out["start"] = demo_run.start_run(node, [])
        harness.spin_until(node, lambda: node.result is not None,
                           max(1.0, deadline - time.monotonic()), "the run result", [])
        out["result"] = node.result
        harness.spin_until(node, lambda: node.last_bag is not None,
                           max(1.0, deadline - time.monotonic()), "the recorder's bag", [])
        out["bag"] = node.last_bag
    finally:
        print(json.dumps(out), flush=True)
        node.destroy_node()
        rclpy.shutdown()


if __name__ == "__main__":
    main()
