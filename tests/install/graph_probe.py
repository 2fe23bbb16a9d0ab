"""Look at a running node from outside, as `ros2 node info` and `ros2 param get` would (those
come with ros2node/ros2param, which the ROS 2 tool wheels do not include): wait for the node,
then print one JSON object with its publishers, subscriptions, services, enclave and the values
of the parameters asked for.

    python graph_probe.py /cell1/vservo [--params a.b c.d] [--publishes TOPIC ...]
                          [--subscribes TOPIC ...] [--message TOPIC] [--state LABEL]
                          [--timeout S]

``--publishes`` / ``--subscribes`` also wait until the node's publishers / subscriptions include
those topics (a node announces its endpoints a moment after its name); ``--message`` until one message arrived on that topic
(of the type the graph names, best-effort so any publisher matches); ``--state`` until the
node's lifecycle state (lifecycle_msgs GetState on <node>/get_state) is LABEL, e.g. active.
Exit 0 with the JSON; 1 with a message on timeout.
Run it inside tools/isolated like every ROS process of the tests.
"""
import argparse
import importlib
import json
import sys
import time

import rclpy
from rcl_interfaces.srv import GetParameters
from rclpy.node import Node
from rclpy.parameter import parameter_value_to_python
from rclpy.qos import qos_profile_sensor_data


def main():
    parser = argparse.ArgumentParser()
    parser.add_argument("node", help="fully qualified node name, e.g. /cell1/vservo")
    parser.add_argument("--params", nargs="*", default=[])
    parser.add_argument("--publishes", nargs="*", default=[])
    parser.add_argument("--subscribes", nargs="*", default=[])
    parser.add_argument("--message", default=None)
    parser.add_argument("--state", default=None)
    parser.add_argument("--timeout", type=float, default=60.0)
    args = parser.parse_args()
    namespace, _, name = args.node.rpartition("/")
    namespace = namespace or "/"
    rclpy.init()
    probe = Node("vservo_graph_probe")
    deadline = time.monotonic() + args.timeout

    def wait(what, ready):
        while not ready():
            if time.monotonic() > deadline:
                print(f"graph_probe: timed out after {args.timeout} s waiting for {what}",
                      file=sys.stderr)
                sys.exit(1)
            rclpy.spin_once(probe, timeout_sec=0.1)

    def names():
        return {(ns, n) for n, ns in probe.get_node_names_and_namespaces()}

    wait(f"node {args.node}", lambda: (namespace, name) in names())

    def publishers():
        return dict(probe.get_publisher_names_and_types_by_node(name, namespace))

    def subscriptions():
        return dict(probe.get_subscriber_names_and_types_by_node(name, namespace))

    wait(f"{args.node} to publish {args.publishes}",
         lambda: set(args.publishes) <= set(publishers()))
    wait(f"{args.node} to subscribe to {args.subscribes}",
         lambda: set(args.subscribes) <= set(subscriptions()))
    if args.message:
        wait(f"a publisher on {args.message}",
             lambda: bool(probe.get_publishers_info_by_topic(args.message)))
        type_name = probe.get_publishers_info_by_topic(args.message)[0].topic_type
        package, _, message = type_name.split("/")
        msg_class = getattr(importlib.import_module(f"{package}.msg"), message)
        received = []
        probe.create_subscription(msg_class, args.message, received.append,
                                  qos_profile_sensor_data)
        wait(f"a message on {args.message}", lambda: bool(received))
    state = None
    if args.state:
        from lifecycle_msgs.srv import GetState
        client = probe.create_client(GetState, f"{args.node}/get_state")
        wait("the get_state service", client.service_is_ready)

        def reached():
            nonlocal state
            future = client.call_async(GetState.Request())
            wait("the lifecycle state", future.done)
            state = future.result().current_state.label
            if state != args.state:
                time.sleep(0.2)
            return state == args.state
        wait(f"{args.node} to be {args.state} (last seen: {state})", reached)
    out = {
        "state": state,
        "publishers": publishers(),
        "subscriptions": subscriptions(),
        "services": dict(probe.get_service_names_and_types_by_node(name, namespace)),
        "enclave": next((e for n, ns, e in probe.get_node_names_and_namespaces_with_enclaves()
                         if (ns, n) == (namespace, name)), None),
        "params": {},
    }
    if args.params:
        client = probe.create_client(GetParameters, f"{args.node}/get_parameters")
        wait("the get_parameters service", client.service_is_ready)
        future = client.call_async(GetParameters.Request(names=args.params))
        wait("the parameter values", future.done)
        out["params"] = {n: parameter_value_to_python(v)
                         for n, v in zip(args.params, future.result().values)}
    print(json.dumps(out))
    probe.destroy_node()
    rclpy.shutdown()


if __name__ == "__main__":
    main()
