"""The ROS side of the operator commands (`vservo teach/enable/disable/start/stop/status/watch`,
vservo_node/commands/operator.py): one short-lived node per command.

The node lives in the controller's namespace, so the controller's relative names
(``servo/start``, ``servo/status``, ``joint_states``, the simulated cell's ``sim/...``) resolve
as the controller's own do. rclpy installs no signal handlers here: Ctrl-C raises
KeyboardInterrupt in the spinning thread, which the command turns into exit code 130.
"""
from __future__ import annotations

import json
import math
import os
import shutil
import sys
import time
from collections.abc import Callable

import rclpy
from diagnostic_msgs.msg import DiagnosticArray
from rclpy.executors import SingleThreadedExecutor
from rclpy.signals import SignalHandlerOptions
from sensor_msgs.msg import JointState
from std_msgs.msg import Float64, Float64MultiArray, String
from std_srvs.srv import SetBool, Trigger

from vservo_node import interface as itf
from vservo_node.commands.operator import (EXIT_INTERRUPTED, EXIT_OK, EXIT_REFUSED, EXIT_TIMEOUT,
                                           Timeout, clock_stamp, controller_target,
                                           fully_qualified, result_line, started_run_id,
                                           status_line, watch_line)
from vservo_node.ros import dds, qos
from vservo_node.ros.harness import DISCOVERY_SETTLE_S

SPIN_STEP_S = 0.05
FRESH_S = 1.0   # `vservo watch`: age up to which a per-image error counts as current
# `vservo status`: how long a state read from /diagnostics waits for a servo/status record
# (which has the run id and matched features) before it is printed instead.
DIAGNOSTIC_GRACE_S = 1.5
RETRY_PERIOD_S = 0.5
# States in which the arm may move (servo.MOVING_STATES; not imported to keep this light).
MOVING = itf.MOVING_STATES


class Operator:
    """A node in the controller's namespace with bounded waits on services and topics."""

    def __init__(self, args):
        self.namespace, self.name = controller_target(args.namespace, args.node)
        self.controller = fully_qualified(self.namespace, self.name)
        self.timeout = float(args.timeout)
        dds.use_shm_profile()
        rclpy.init(args=[], signal_handler_options=SignalHandlerOptions.NO)
        self.node = rclpy.create_node(f"vservo_cli_{os.getpid()}", namespace=self.namespace)
        self.executor = SingleThreadedExecutor()
        self.executor.add_node(self.node)
        self._clients: dict[str, object] = {}

    def close(self) -> None:
        try:
            self.executor.shutdown(timeout_sec=1.0)
            self.node.destroy_node()
        finally:
            rclpy.try_shutdown()

    # ------------------------------------------------------------------ waiting
    def spin_for(self, seconds: float) -> None:
        end = time.monotonic() + seconds
        while time.monotonic() < end:
            self.executor.spin_once(timeout_sec=min(SPIN_STEP_S, max(0.0, end - time.monotonic())))

    def spin_until(self, condition: Callable[[], bool], timeout: float) -> bool:
        """Spin until ``condition()``; False if ``timeout`` s passed first."""
        end = time.monotonic() + timeout
        while not condition():
            if time.monotonic() > end:
                return False
            self.executor.spin_once(timeout_sec=SPIN_STEP_S)
        return True

    # ------------------------------------------------------------------ services
    def _client(self, srv_type, name: str):
        client = self._clients.get(name)
        if client is None:
            client = self.node.create_client(srv_type, name)
            full = self.node.resolve_service_name(name)
            if not self.spin_until(client.service_is_ready, self.timeout):
                raise Timeout(f"no service {full} after {self.timeout:g} s"
                              + self._elsewhere(name))
            # A service that shows ready may not have matched our response reader yet
            # (harness.DISCOVERY_SETTLE_S).
            self.spin_for(DISCOVERY_SETTLE_S)
            self._clients[name] = client
        return client

    def _elsewhere(self, name: str) -> str:
        """Where services of that name exist in other namespaces, as a hint."""
        suffix = "/" + name
        # (the graph lists our own client's name too: not a hint)
        found = sorted({n[:-len(suffix)] or "/" for n, _ in self.node.get_service_names_and_types()
                        if n.endswith(suffix)} - {self.namespace})
        if found:
            return f"; it exists under {', '.join(found)} (use --namespace)"
        return ("; none in the ROS graph (is the node running, on this ROS_DOMAIN_ID, and "
                "reachable from here?)")

    def call(self, srv_type, name: str, request, timeout: float | None = None):
        """The response of one call; Timeout when the service is absent or silent."""
        timeout = self.timeout if timeout is None else timeout
        client = self._client(srv_type, name)
        future = client.call_async(request)
        if not self.spin_until(future.done, timeout):
            client.remove_pending_request(future)
            raise Timeout(f"no answer from {self.node.resolve_service_name(name)} within "
                          f"{timeout:g} s")
        return future.result()

    def call_until_accepted(self, srv_type, name: str, request, retry_s: float):
        """Call; while refused and ``retry_s`` lasts, call again every RETRY_PERIOD_S."""
        end = time.monotonic() + retry_s
        while True:
            response = self.call(srv_type, name, request)
            if response.success or time.monotonic() + RETRY_PERIOD_S > end:
                return response
            self.spin_for(RETRY_PERIOD_S)

    # ------------------------------------------------------------------ topics
    def subscribe_json(self, topic: str, profile, keep: Callable[[dict, float], None]):
        def on_message(msg: String) -> None:
            try:
                record = json.loads(msg.data)
            except ValueError:
                return
            if isinstance(record, dict):
                keep(record, time.time())
        return self.node.create_subscription(String, topic, on_message, profile)


def _say(response, what: str) -> int:
    """Print a service's answer (stdout if accepted, stderr if refused); the exit code."""
    if response.success:
        print(response.message, flush=True)
        return EXIT_OK
    print(response.message or f"{what} refused (no reason given)", file=sys.stderr, flush=True)
    return EXIT_REFUSED


def _with_operator(body: Callable[[Operator], int]):
    def run(args) -> int:
        op = Operator(args)
        try:
            return body(op, args)
        finally:
            try:
                op.close()
            except KeyboardInterrupt:
                pass
    return run


# ============================================================================ commands
@_with_operator
def run_enable(op: Operator, args) -> int:
    return _say(op.call_until_accepted(SetBool, itf.SRV_ENABLE_MOTION, SetBool.Request(data=True),
                                       args.retry), "enable")


@_with_operator
def run_disable(op: Operator, args) -> int:
    return _say(op.call(SetBool, itf.SRV_ENABLE_MOTION, SetBool.Request(data=False)), "disable")


@_with_operator
def run_stop(op: Operator, args) -> int:
    return _say(op.call(Trigger, itf.SRV_STOP, Trigger.Request()), "stop")


@_with_operator
def run_start(op: Operator, args) -> int:
    results: dict[str, dict] = {}
    moving_runs: list[str] = []
    if args.wait:   # subscribe first: the result is latched, the run may be short
        op.subscribe_json(itf.TOPIC_RUN_RESULT, qos.LATCHED,
                          lambda r, _: results.__setitem__(str(r.get("run_id")), r))
        op.subscribe_json(itf.TOPIC_STATUS, qos.STATE,
                          lambda s, _: s.get("state") in MOVING and s.get("run_id")
                          and moving_runs.append(s["run_id"]))
    # A run that moves after start was called is the new one: start is refused while one moves.
    op._client(Trigger, itf.SRV_START)
    moving_runs.clear()
    response = op.call_until_accepted(Trigger, itf.SRV_START, Trigger.Request(), args.retry)
    code = _say(response, "start")
    if code != EXIT_OK or not args.wait:
        return code
    # The run id: from the reply ("run <id> started"), else the first moving status.
    run_id = started_run_id(response.message)
    try:
        if run_id is None and not op.spin_until(lambda: bool(moving_runs), op.timeout):
            raise Timeout(f"no status of the new run on {itf.TOPIC_STATUS} within "
                          f"{op.timeout:g} s")
        run_id = run_id or moving_runs[0]
        if not op.spin_until(lambda: run_id in results, args.result_timeout):
            raise Timeout(f"no result of run {run_id} on "
                          f"{op.node.resolve_topic_name(itf.TOPIC_RUN_RESULT)} within "
                          f"{args.result_timeout:g} s (the run may still be going: "
                          "`vservo status`)")
    except KeyboardInterrupt:
        print("interrupted: asking the controller to stop the run", file=sys.stderr, flush=True)
        try:
            stop = op.call(Trigger, itf.SRV_STOP, Trigger.Request(), timeout=3.0)
            print(stop.message, file=sys.stderr, flush=True)
        except (Timeout, KeyboardInterrupt) as exc:
            print(f"stop not confirmed: {exc}", file=sys.stderr, flush=True)
        return EXIT_INTERRUPTED
    result = results[run_id]
    print(result_line(result), flush=True)
    return EXIT_OK if result.get("converged") else EXIT_REFUSED


@_with_operator
def run_teach(op: Operator, args) -> int:
    if not args.sim:
        return _say(op.call(Trigger, itf.SRV_CAPTURE_REFERENCE, Trigger.Request()), "teach")
    joint_stamps: list[float] = []
    image_times: list[float] = []

    def on_joints(msg: JointState) -> None:
        joint_stamps.append(msg.header.stamp.sec + 1e-9 * msg.header.stamp.nanosec)
        del joint_stamps[:-2]

    def on_status(status: dict, _wall: float) -> None:
        # Records of processed images carry the image time and a cycle time (> 0); records
        # of state changes alone carry node time and cycle_ms 0.
        if (status.get("cycle_ms") or 0) > 0 and status.get("t") is not None:
            image_times.append(float(status["t"]))

    op.node.create_subscription(JointState, itf.TOPIC_JOINT_STATES, on_joints, qos.STATE)
    op.subscribe_json(itf.TOPIC_STATUS, qos.STATE, on_status)
    code = _say(op.call(Trigger, itf.SRV_SIM_GO_TO_TAUGHT, Trigger.Request(),
                        timeout=args.move_timeout), "go_to_taught_pose")
    if code != EXIT_OK:
        return code
    failure = None   # a timeout while at the taught pose: go back first, then report it
    try:
        # Every joint state from now on is stamped at or after the arrival; an image the
        # controller processed with a time at or after it shows the taught view.
        joint_stamps.clear()
        if not op.spin_until(lambda: bool(joint_stamps), op.timeout):
            raise Timeout(f"no joint state on {op.node.resolve_topic_name(itf.TOPIC_JOINT_STATES)}"
                          f" within {op.timeout:g} s")
        arrived = joint_stamps[0]
        if not op.spin_until(lambda: any(t >= arrived for t in image_times), op.timeout):
            raise Timeout(f"the controller processed no image taken at the taught pose within "
                          f"{op.timeout:g} s (no record on "
                          f"{op.node.resolve_topic_name(itf.TOPIC_STATUS)} with an image time "
                          f">= {arrived:.3f} s; is the controller running, with its robot "
                          "model and camera_info?)")
        code = _say(op.call(Trigger, itf.SRV_CAPTURE_REFERENCE, Trigger.Request()), "teach")
    except Timeout as exc:
        failure = exc
    if not args.stay:   # (Ctrl-C skips this: the arm stays where it is)
        back = _say(op.call(Trigger, itf.SRV_SIM_GO_TO_START, Trigger.Request(),
                            timeout=args.move_timeout), "go_to_start_pose")
        code = code if code != EXIT_OK else back
    if failure is not None:
        raise failure
    return code


@_with_operator
def run_status(op: Operator, args) -> int:
    state = {"key": None, "lines": 0, "diagnostic": None}
    diagnostic_name = f"{op.controller}: visual servo"

    def show(record: dict, wall: float, key) -> None:
        last = state["key"]
        if last is not None and (key == last or (last[2] is None and key[:2] == last[:2])):
            state["key"] = key if key[2] is not None else last
            return
        state["key"] = key
        state["lines"] += 1
        print(status_line(record, wall), flush=True)

    def on_status(record: dict, wall: float) -> None:
        show(record, wall, (record.get("state"), record.get("reason") or "",
                            record.get("run_id") or ""))

    def on_diagnostics(msg: DiagnosticArray) -> None:
        if state["lines"] or state["diagnostic"]:   # only a first line may come from here
            return
        for entry in msg.status:
            if entry.name == diagnostic_name:
                values = {kv.key: kv.value for kv in entry.values}
                record = {"state": values.get("state"), "reason": values.get("reason")}
                try:
                    record["rms_px"] = float(values.get("rms_px", "nan"))
                except ValueError:
                    pass
                state["diagnostic"] = (record, time.time(), time.monotonic())

    def first_from_diagnostics() -> bool:
        """Print the diagnostics' state when no status record followed it within
        DIAGNOSTIC_GRACE_S (the controller publishes none without images or changes)."""
        pending = state["diagnostic"]
        if state["lines"] == 0 and pending and time.monotonic() - pending[2] > \
                DIAGNOSTIC_GRACE_S:
            record, wall, _ = pending
            show(record, wall, (record["state"], record["reason"] or "", None))
        return state["lines"] > 0

    op.subscribe_json(itf.TOPIC_STATUS, qos.STATE, on_status)
    op.node.create_subscription(DiagnosticArray, itf.TOPIC_DIAGNOSTICS, on_diagnostics,
                                qos.STATE)
    if args.once:
        if not op.spin_until(first_from_diagnostics, op.timeout + DIAGNOSTIC_GRACE_S):
            raise Timeout(f"no status of {op.controller} within {op.timeout:g} s (neither "
                          f"{op.node.resolve_topic_name(itf.TOPIC_STATUS)} nor "
                          f"{itf.TOPIC_DIAGNOSTICS})")
        return EXIT_OK
    while True:
        op.executor.spin_once(timeout_sec=SPIN_STEP_S)
        first_from_diagnostics()


@_with_operator
def run_watch(op: Operator, args) -> int:
    tty = sys.stdout.isatty()
    latest: dict = {"status": None, "rx": None, "key": None, "new": False}
    # Outside a run the status has no error (the supervisor measures only while servoing);
    # the per-image feature topics do, moving or not.
    image: dict = {"rms_px": None, "n_matched": None, "rx": -math.inf}

    def on_error_rms(msg: Float64) -> None:
        image.update(rms_px=msg.data, rx=time.monotonic())

    def on_features(msg: Float64MultiArray) -> None:
        image.update(n_matched=len(msg.data) // 2, rx=time.monotonic())

    def shown(record: dict) -> dict:
        if record.get("rms_px") is None and time.monotonic() - image["rx"] < FRESH_S:
            return {**record, "rms_px": image["rms_px"], "n_matched": image["n_matched"]}
        return record

    def on_status(record: dict, _wall: float) -> None:
        key = (record.get("state"), record.get("reason"), record.get("run_id"))
        changed = latest["key"] is not None and key != latest["key"]
        latest.update(status=record, rx=time.monotonic(), key=key, new=not changed)
        if changed:
            emit(shown(record), 0.0, keep=True)

    def emit(record: dict, age_s: float, keep: bool = False) -> None:
        """A line; on a terminal it replaces the live line (``keep``: and stays above)."""
        line = watch_line(record, age_s)
        if tty:
            width = shutil.get_terminal_size((120, 20)).columns
            sys.stdout.write("\r\x1b[2K" + line[:max(10, width - 1)] + ("\n" if keep else ""))
            sys.stdout.flush()
        else:
            print(f"{clock_stamp(time.time())} {line}", flush=True)

    op.subscribe_json(itf.TOPIC_STATUS, qos.STATE, on_status)
    op.node.create_subscription(Float64, itf.TOPIC_ERROR_RMS, on_error_rms, qos.STATE)
    op.node.create_subscription(Float64MultiArray, itf.TOPIC_FEATURES, on_features, qos.STATE)
    period = 0.1 if tty else max(0.05, args.period)
    next_line = time.monotonic()
    if tty:
        sys.stdout.write(f"watching {op.node.resolve_topic_name(itf.TOPIC_STATUS)} "
                         "(Ctrl-C to end)\n")
    try:
        while True:
            op.executor.spin_once(timeout_sec=SPIN_STEP_S)
            now = time.monotonic()
            if now < next_line:
                continue
            next_line = now + period
            if latest["status"] is not None and (tty or latest["new"]):
                emit(shown(latest["status"]), now - latest["rx"])
                latest["new"] = False
            elif latest["status"] is None and tty:
                sys.stdout.write("\r\x1b[2Kwaiting for the controller's status ...")
                sys.stdout.flush()
    finally:
        if tty:
            sys.stdout.write("\n")
            sys.stdout.flush()


__all__ = ["run_enable", "run_disable", "run_start", "run_stop", "run_teach", "run_status",
           "run_watch", "EXIT_INTERRUPTED", "EXIT_TIMEOUT"]
