"""The run recorder node (executable ``vservo_recorder``, node name ``vservo_recorder``): one
bag per servo run, written by ``vservo_node.record.bag.RunRecorder``, then its report.

Entry point ``main(args=None)`` (console script ``vservo_recorder =
vservo_node.ros.recorder_node:main``; also ``python -m vservo_node.ros.recorder_node
--ros-args ...``).

Recorded topics (relative names from ``vservo_node.interface``: remap them). Every subscription
is ``raw=True``: the serialized CDR bytes go to the bag as they came, nothing is deserialized
but the status and run result the recorder reads. Log times are the receive times on the node
clock (ROS time: the simulated clock under ``use_sim_time``), in nanoseconds.
    ``joint_states``; the commands ``servo/joint_velocity_cmd``, ``servo/joint_trajectory_cmd``,
    ``servo/twist_cmd``; ``servo/status``, ``servo/feature_error``, ``servo/error_rms``,
    ``servo/camera_twist``, ``servo/features``, ``servo/run_result``; ``camera/camera_info``,
    ``camera/image`` (compressed by default, see ``image_format``); ``robot_description``;
    the simulator's ground truth ``sim/*`` when present. QoS: sensor-data for camera topics,
    transient local for the latched ones
    (``servo/run_result``, ``robot_description``, ``sim/taught_camera_pose``), reliable state
    otherwise. The latched topics other than the run result are published once, so the newest
    message of each is kept and written into every bag when it opens (log time = that of the
    status record that opened it).

Runs
    A bag opens when ``servo/status`` shows a run id not seen before in a moving state
    (``servoing``, ``settling``, ``braking``; a recorder started mid-run records the rest of
    it), starting with that status record. The run ends at its ``servo/run_result`` (or a
    status of that run in ``converged``/``halted``, whichever comes first); ``tail_s`` wall
    seconds later the bag closes. A result received during the run or its tail is saved as
    ``result.json``. Run results of other runs (e.g. the latched one of an earlier run) are
    ignored. Messages while no bag is open are not recorded. A new run that starts before the
    tail is over closes the bag at once. With ``record_continuously`` one bag covers the
    whole session (opened at start, closed at shutdown, so without an automatic report;
    ``result.json`` holds the latest run's result).

Taught reference
    The controller's ``reference.file`` (read from its parameters) is copied into
    ``<bag>/reference/`` with the files it names (its taught image), when the bag opens or when
    the parameters arrive; a file this node cannot read is logged and only its path is kept.

Controller parameters (``params.yaml`` of each bag, as a ROS 2 parameter file of the
controller node, ``{<fully qualified name>: {ros__parameters: {<dotted name>: value}}}``)
    Fetched through the ListParameters, GetParameterTypes and GetParameters services of
    ``controller_node`` as soon as they appear (a request unanswered for 5 s is retried), then
    kept current from ``/parameter_events``. Parameters declared without a value are left out.
    A bag that opens before they are known starts without params.yaml (a warning is logged);
    it is written as soon as they arrive.

Readiness
    ``recorder/ready`` (std_msgs/Bool, transient local) carries True once the controller's
    parameters are known and a ``servo/status`` record has been received (the controller's
    status publisher reaches this node). From then on a run is recorded from its first status
    record, with params.yaml. A tool that starts runs right after starting the recorder
    (``vservo demo``) waits for it; a recorder started later joins the run in progress.

After a bag closes
    With ``make_report`` the report (``vservo_node.record.report.write_report``) is written to
    ``<bag>/report/`` on a background thread; then the bag's absolute path is published on
    ``recorder/last_bag`` (std_msgs/String, transient local), so a tool that receives it finds
    the report complete. A failed report is logged and the path is published all the same.

Parameters (read at start; read-only)
    ``output_dir`` (str, 'runs'): folder of the bags, created if missing; a bag is
    ``<output_dir>/<UTC time>_<scenario>/``. ``scenario`` (str, 'live'). ``make_report`` (bool,
    true). ``record_continuously`` (bool, false). ``tail_s`` (float >= 0, 0.5 s).
    ``image_every`` (int >= 1, 1): keep every k-th image. ``image_format`` ('raw' | 'png' |
    'jpeg', 'jpeg'): 'jpeg' and 'png' record sensor_msgs/Image as CompressedImage on
    ``camera/image/compressed`` (a 9 s demo run: ~10 MB with JPEG, ~230 MB raw); 'raw' as it
    comes. ``jpeg_quality`` (int 0..100, 90). ``controller_node`` (str,
    'vservo'). ``max_queue_mb`` (float 1..65536, 256 MiB): messages waiting for the writer
    thread; beyond it new messages are dropped and counted (a warning per second says how
    many).

Threads: the executor thread runs the callbacks, which only stamp, decide and enqueue; one
writer thread owns the open RunRecorder (PNG/JPEG encoding and file writes happen there), so
a slow disk or encoder never stalls reception; one report thread draws reports.

Shutdown: SIGINT or SIGTERM closes the open bag cleanly (no report for it: run
``vservo report <bag>``), finishes the reports of runs that ended before, and publishes the
paths in the order the bags closed. After a SIGKILL the bag keeps every split RunRecorder had
completed (RunRecorder's bound: at most about 0.8 s is lost, plus what was queued for the
writer).

Note for the controller: this node subscribes to the command topics, so it counts as one of
their subscribers.
"""
from __future__ import annotations

import functools
import json
import sys
import time
from collections.abc import Callable, Sequence
from concurrent.futures import ThreadPoolExecutor
from pathlib import Path

# Imported at start, not on first use: OpenCV's import (JPEG/PNG encoding, the report's
# frames) holds the GIL for about a second on a loaded machine, and when that happened at the
# first image of a run the executor thread lost ~1.5 s of joint states and images (measured on
# two demo runs). The report module below (matplotlib) is imported at start for the same reason.
import cv2  # noqa: F401
from geometry_msgs.msg import PoseStamped, TwistStamped
from rcl_interfaces.msg import (FloatingPointRange, IntegerRange, ParameterDescriptor,
                                ParameterEvent, ParameterType)
from rcl_interfaces.srv import GetParameters, GetParameterTypes, ListParameters
from rclpy.clock import Clock, ClockType
from rclpy.duration import Duration
from rclpy.exceptions import ParameterException
from rclpy.node import Node
from rclpy.parameter import parameter_value_to_python
from rclpy.qos import qos_profile_parameter_events
from rclpy.serialization import deserialize_message
from rclpy.task import Future
from sensor_msgs.msg import CameraInfo, Image, JointState
from std_msgs.msg import Bool, Float64, Float64MultiArray, String
from trajectory_msgs.msg import JointTrajectory

from vservo_node import interface as itf
from vservo_node.record.bag import RunRecorder
from vservo_node.record.report import write_report
from vservo_node.ros import qos
from vservo_node.ros.node_main import run_node
from vservo_node.ros.output_loop import lower_thread_priority

RECORDER_NODE = itf.RECORDER_NODE
TOPIC_LAST_BAG = itf.TOPIC_LAST_BAG
TOPIC_READY = itf.TOPIC_RECORDER_READY   # std_msgs/Bool, transient local: see "Readiness"
MOVING_STATES = itf.MOVING_STATES
END_STATES = ("converged", "halted")
TICK_S = 0.1              # steady timer: run tails, parameter fetch; also lets signals in
FETCH_TIMEOUT_S = 5.0     # a parameter request unanswered this long is given up and retried
ACK_TIMEOUT_S = 1.0       # at shutdown, wait this long for recorder/last_bag to be received
IMAGE_FORMATS = ("raw", "png", "jpeg")
REPORT_NICE = 10          # the report thread's nice steps below the recorder (our choice)

# topic -> (message class, QoS). Status and run result are read as well as recorded.
RECORDED = {
    itf.TOPIC_JOINT_STATES: (JointState, qos.STATE),
    itf.TOPIC_JOINT_VELOCITY_CMD: (Float64MultiArray, qos.STATE),
    itf.TOPIC_JOINT_TRAJECTORY_CMD: (JointTrajectory, qos.STATE),
    itf.TOPIC_TWIST_CMD: (TwistStamped, qos.STATE),
    itf.TOPIC_STATUS: (String, qos.STATE),
    itf.TOPIC_FEATURE_ERROR: (Float64MultiArray, qos.STATE),
    itf.TOPIC_ERROR_RMS: (Float64, qos.STATE),
    itf.TOPIC_CAMERA_TWIST: (TwistStamped, qos.STATE),
    itf.TOPIC_FEATURES: (Float64MultiArray, qos.STATE),
    itf.TOPIC_RUN_RESULT: (String, qos.LATCHED),
    itf.TOPIC_CAMERA_INFO: (CameraInfo, qos.SENSOR_DATA),
    itf.TOPIC_IMAGE: (Image, qos.SENSOR_DATA),
    itf.TOPIC_ROBOT_DESCRIPTION: (String, qos.LATCHED),
    itf.TOPIC_SIM_CAMERA_POSE_TRUTH: (PoseStamped, qos.STATE),
    itf.TOPIC_SIM_TARGET_POSE_TRUTH: (PoseStamped, qos.STATE),
    itf.TOPIC_SIM_TAUGHT_POSE: (PoseStamped, qos.LATCHED),
}


# re-exported: tests and tools import them from here
from vservo_node.ros.recorder_writer import (BagWriter, RunSegmenter,  # noqa: E402,F401
                                             reference_file, type_name)


def _plain(value):
    """A parameter value as YAML-safe Python: received arrays (array.array) become lists."""
    return value if isinstance(value, (str, bool, int, float, type(None))) else list(value)


class ControllerParams:
    """The controller node's parameters, fetched through its ListParameters,
    GetParameterTypes and GetParameters services and kept current from ``/parameter_events``.

    A fetch lists every name, asks their types, then asks the values of those that are set.
    The types step is needed because rclpy's GetParameters answers all or nothing: one
    declared but unset name in the request (a parameter declared with a type and no value,
    as the controller does for its empty-list defaults) makes it return no values at all.
    Unset parameters are left out of ``values``; a reply with fewer values than names asked is
    refused and the fetch retried.

    ``values`` is None until the first fetch answered. ``on_fetched()`` is called (executor
    thread) when it has. Call ``poll(now)`` periodically: it starts a fetch while none is known.
    """

    def __init__(self, node: Node, controller: str, on_fetched: Callable[[], None]):
        self._node, self._on_fetched = node, on_fetched
        self._list = node.create_client(ListParameters, f"{controller}/list_parameters")
        self._types = node.create_client(GetParameterTypes,
                                          f"{controller}/get_parameter_types")
        self._get = node.create_client(GetParameters, f"{controller}/get_parameters")
        self.node_name = self._list.service_name.rsplit("/", 1)[0]   # fully qualified
        self.values: dict | None = None
        self._request: tuple[object, Future, float] | None = None   # (client, future, sent)
        node.create_subscription(ParameterEvent, "/parameter_events", self._on_event,
                                 qos_profile_parameter_events)

    def as_file(self) -> dict | None:
        """ROS 2 parameter-file form ``{node: {'ros__parameters': {...}}}``; None if unknown."""
        if self.values is None:
            return None
        return {self.node_name: {"ros__parameters": dict(sorted(self.values.items()))}}

    def poll(self, now: float) -> None:
        if self._request is not None and now - self._request[2] > FETCH_TIMEOUT_S:
            client, future, _ = self._request
            client.remove_pending_request(future)
            self._request = None
            self._node.get_logger().warning(
                f"{self.node_name} did not answer a parameter request within "
                f"{FETCH_TIMEOUT_S} s; retrying")
        if self.values is None and self._request is None and self._list.service_is_ready():
            self._send(self._list, ListParameters.Request(
                depth=ListParameters.Request.DEPTH_RECURSIVE), self._on_list)

    def _send(self, client, request, done: Callable[[Future], None]) -> None:
        future = client.call_async(request)
        self._request = (client, future, time.monotonic())
        future.add_done_callback(done)

    def _failed(self, future: Future, asked: Sequence[str] = (), answer: str = "") -> bool:
        """True (and a warning; the next poll retries) when a request raised, or when the
        reply's list ``answer`` ('types', 'values') does not hold one entry per name asked."""
        self._request = None
        if future.exception() is not None:
            problem = f"failed: {future.exception()}"
        elif answer and len(got := getattr(future.result(), answer)) != len(asked):
            problem = (f"answered {len(got)} {answer} for {len(asked)} names (one was "
                       "undeclared or unset meanwhile)")
        else:
            return False
        self._node.get_logger().warning(
            f"parameter request to {self.node_name} {problem}; retrying")
        return True

    def _on_list(self, future: Future) -> None:
        if not self._failed(future):
            names = list(future.result().result.names)
            self._send(self._types, GetParameterTypes.Request(names=names),
                       functools.partial(self._on_types, names))

    def _on_types(self, names: list[str], future: Future) -> None:
        if not self._failed(future, names, "types"):
            set_names = [name for name, kind in zip(names, future.result().types)
                         if kind != ParameterType.PARAMETER_NOT_SET]
            self._send(self._get, GetParameters.Request(names=set_names),
                       functools.partial(self._on_get, set_names))

    def _on_get(self, names: list[str], future: Future) -> None:
        if self._failed(future, names, "values"):
            return
        self.values = {name: _plain(parameter_value_to_python(value))
                       for name, value in zip(names, future.result().values)
                       if value.type != ParameterType.PARAMETER_NOT_SET}
        self._node.get_logger().info(f"{len(self.values)} parameters of {self.node_name} known")
        self._on_fetched()

    def _on_event(self, event: ParameterEvent) -> None:
        if self.values is None or event.node != self.node_name:
            return
        for p in (*event.new_parameters, *event.changed_parameters):
            self.values[p.name] = _plain(parameter_value_to_python(p.value))
        for p in event.deleted_parameters:
            self.values.pop(p.name, None)


def _descriptor(description: str, **ranges) -> ParameterDescriptor:
    kind = {"integer_range": IntegerRange, "floating_point_range": FloatingPointRange}
    extra = {key: [kind[key](**bounds)] for key, bounds in ranges.items()}
    return ParameterDescriptor(description=description, read_only=True, **extra)


PARAMETERS = {  # name -> (default, descriptor)
    "output_dir": ("runs", _descriptor("folder of the bags (one sub-folder per bag)")),
    "scenario": ("live", _descriptor("scenario name, part of each bag's folder name")),
    "make_report": (True, _descriptor("write <bag>/report/ after each bag closes")),
    "record_continuously": (False, _descriptor("one bag for the whole session, not one per run")),
    "tail_s": (0.5, _descriptor("wall seconds recorded after a run ends",
                                floating_point_range={"from_value": 0.0, "to_value": 60.0})),
    "image_every": (1, _descriptor("keep every k-th image",
                                   integer_range={"from_value": 1, "to_value": 1000, "step": 1})),
    "image_format": ("jpeg", _descriptor("'jpeg' (default) or 'png' records images as "
                                         "CompressedImage on <image topic>/compressed; 'raw' "
                                         "as they come (~30 MB per second at 640x480, 30 Hz)")),
    "jpeg_quality": (90, _descriptor("JPEG quality for image_format 'jpeg'",
                                     integer_range={"from_value": 0, "to_value": 100,
                                                    "step": 1})),
    "controller_node": (itf.CONTROLLER_NODE, _descriptor("node whose parameters go to "
                                                         "params.yaml")),
    "max_queue_mb": (256.0, _descriptor("MiB of messages waiting for the writer thread before "
                                        "new ones are dropped",
                                        floating_point_range={"from_value": 1.0,
                                                              "to_value": 65536.0})),
}


class RecorderNode(Node):
    """See the module docstring. Raises ValueError for an invalid parameter value."""

    def __init__(self, **kwargs):
        super().__init__(RECORDER_NODE, **kwargs)
        p = {name: self.declare_parameter(name, default, descriptor).value
             for name, (default, descriptor) in PARAMETERS.items()}
        if p["image_format"] not in IMAGE_FORMATS:
            raise ValueError(f"image_format must be one of {IMAGE_FORMATS}, got "
                             f"{p['image_format']!r}")
        self.output_dir = Path(p["output_dir"]).resolve()
        self.make_report = p["make_report"]
        self._recorder_args = dict(image_every=p["image_every"],
                                   image_format=(None if p["image_format"] == "raw"
                                                 else p["image_format"]),
                                   jpeg_quality=p["jpeg_quality"])
        self._scenario = p["scenario"]
        self.segmenter = RunSegmenter(p["tail_s"], p["record_continuously"])
        self._latest_latched: dict[str, tuple[str, bytes]] = {}
        self._dropped_reported, self._dropped_warned_at = 0, -1.0
        self._pub_last_bag = self.create_publisher(String, TOPIC_LAST_BAG, qos.LATCHED)
        self._pub_ready = self.create_publisher(Bool, TOPIC_READY, qos.LATCHED)
        self._status_seen = self._ready = False
        # reports (matplotlib, seconds of CPU after each run) never compete with the command
        # path of the controller or the camera on the same machine: their thread runs at the
        # lowest priority that still progresses (REPORT_NICE nice steps down)
        self._reports = ThreadPoolExecutor(max_workers=1, thread_name_prefix="vservo_report",
                                           initializer=lower_thread_priority,
                                           initargs=(REPORT_NICE,))
        self.writer = BagWriter(self._new_recorder, self._on_closed,
                                int(p["max_queue_mb"] * 2**20), self.get_logger())
        self.params = ControllerParams(self, p["controller_node"], self._on_params_fetched)
        for topic, (msg_class, profile) in RECORDED.items():
            self._subscribe(topic, msg_class, profile)
        self.create_timer(TICK_S, self._tick, clock=Clock(clock_type=ClockType.STEADY_TIME))
        if self.segmenter.continuous:
            self._open(self.get_clock().now().nanoseconds)
        self.get_logger().info(
            f"recording {'the whole session' if self.segmenter.continuous else 'each run'} "
            f"into {self.output_dir}")

    # ------------------------------------------------------------------------ subscriptions
    def _subscribe(self, topic: str, msg_class, profile) -> None:
        """Record ``topic`` under its resolved (remapped, absolute) name."""
        name, msgtype = self.resolve_topic_name(topic), type_name(msg_class)
        keep_latest = profile is qos.LATCHED and topic != itf.TOPIC_RUN_RESULT
        handle = {itf.TOPIC_STATUS: self._on_status,
                  itf.TOPIC_RUN_RESULT: self._on_result}.get(topic)

        def callback(raw: bytes) -> None:
            stamp_ns = self.get_clock().now().nanoseconds
            if handle is not None:
                handle(raw, stamp_ns)
            if keep_latest:
                self._latest_latched[name] = (msgtype, raw)
            if self.segmenter.recording:
                self.writer.write(name, msgtype, raw, stamp_ns)

        self.create_subscription(msg_class, topic, callback, profile, raw=True)

    def _on_status(self, raw: bytes, stamp_ns: int) -> None:
        self._status_seen = True
        self._announce_ready()
        record = _json_object(raw)
        for action in self.segmenter.on_status(record, time.monotonic()) if record else ():
            if action == "close":
                self.writer.close()
            else:
                self._open(stamp_ns)

    def _on_result(self, raw: bytes, stamp_ns: int) -> None:
        result = _json_object(raw)
        if result and self.segmenter.on_result(result, time.monotonic()):
            self.writer.set_result(result)

    # ------------------------------------------------------------------------ bags
    def _open(self, stamp_ns: int) -> None:
        """Open a bag; the newest latched messages go in first, logged at ``stamp_ns``."""
        params = self.params.as_file()
        if params is None:
            self.get_logger().warning(
                f"parameters of {self.params.node_name} unknown (its parameter services did "
                "not answer yet): the bag starts without params.yaml, written when they arrive")
        self.writer.open(params)
        for topic, (msgtype, raw) in self._latest_latched.items():
            self.writer.write(topic, msgtype, raw, stamp_ns)

    def _new_recorder(self, params: dict | None) -> RunRecorder:
        return RunRecorder(self.output_dir, self._scenario, params=params,
                           **self._recorder_args)

    def _on_params_fetched(self) -> None:
        if self.segmenter.recording:
            self.writer.set_params(self.params.as_file())
        self._announce_ready()

    def _announce_ready(self) -> None:
        """Publish True on recorder/ready, once: status received and parameters known."""
        if self._ready or not self._status_seen or self.params.values is None:
            return
        self._ready = True
        self._pub_ready.publish(Bool(data=True))
        self.get_logger().info("ready: receiving the controller's status, parameters known")

    def _on_closed(self, bag_dir: Path, report: bool) -> None:
        """Writer thread: hand the bag to the report thread, which announces the bags in the
        order they closed."""
        self._reports.submit(self._finish, bag_dir, report and self.make_report)

    def _finish(self, bag_dir: Path, report: bool) -> None:
        """Report thread: write the report if asked, then publish the bag's path."""
        if report:
            try:
                page, _ = write_report(bag_dir)
                self.get_logger().info(f"report: {page}")
            except Exception as exc:   # noqa: BLE001 - a bad run must not stop the recorder
                self.get_logger().error(f"report of {bag_dir} failed: "
                                        f"{type(exc).__name__}: {exc}")
        elif self.make_report:
            self.get_logger().info(f"no report for {bag_dir} (closed at shutdown): run "
                                   f"`vservo report {bag_dir}`")
        self._pub_last_bag.publish(String(data=str(bag_dir)))
        self.get_logger().info(f"bag closed: {bag_dir}")

    # ------------------------------------------------------------------------ timer, shutdown
    def _tick(self) -> None:
        now = time.monotonic()
        self.params.poll(now)
        if self.segmenter.on_tick(now):
            self.writer.close()
        dropped = self.writer.dropped
        if dropped > self._dropped_reported and now - self._dropped_warned_at >= 1.0:
            self.get_logger().warning(f"{dropped - self._dropped_reported} message(s) dropped: "
                                      "the writer is behind by more than max_queue_mb")
            self._dropped_reported, self._dropped_warned_at = dropped, now

    def shutdown(self) -> None:
        """Close the open bag (no report), finish the reports of runs that ended, announce
        every closed bag."""
        if self.segmenter.recording:
            self.writer.close(report=False)
        self.writer.stop()
        self._reports.shutdown(wait=True)
        # the process is about to exit: let reliable subscribers acknowledge the last path
        self._pub_last_bag.wait_for_all_acked(Duration(seconds=ACK_TIMEOUT_S))


def _json_object(raw: bytes) -> dict | None:
    """The JSON object carried by a serialized std_msgs/String; None if it is not one."""
    try:
        value = json.loads(deserialize_message(raw, String).data)
    except ValueError:
        return None
    return value if isinstance(value, dict) else None


def main(args=None) -> int:
    """Console entry point of ``vservo_recorder``; parameters from ``--ros-args``."""
    # Our own signal handling: the context must outlive SIGINT/SIGTERM until the open bag is
    # closed and announced. The steady tick timer wakes the executor so the handler runs.
    node = run_node("vservo_recorder", RecorderNode, RecorderNode.shutdown, args,
                    start_errors=(ValueError, ParameterException), own_signals=True)
    return 2 if node is None else 0


if __name__ == "__main__":
    sys.exit(main())
