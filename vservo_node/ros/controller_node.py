"""The controller node (executable ``vservo_node``, node name ``vservo``): camera images and
joint states in, limited joint (or Cartesian) commands out, with a supervisor users drive
through four services. A thin shell: ``vservo_node.perception`` turns images into
observations and ``vservo_node.servo.Servo`` decides every command.

Entry point: ``main(args=None)`` (console script ``vservo_node =
vservo_node.ros.controller_node:main``; also ``python -m vservo_node.ros.controller_node
--ros-args ...``). Parameters: every entry of ``vservo_node.params.SCHEMA``, usually from a
file (``--ros-args --params-file config/vservo_sim.yaml``).

Parameters
    Declared with descriptors (description, unit, range, choices, read-only). File values are
    checked with ``params.validate`` at start: every error is logged, an invalid value falls
    back to its default, and enabling motion is refused until the problems are gone (unknown
    names in the file count as problems: a typo must not silently drop a limit). Live changes
    go through ``params.check_change``: out-of-range values are refused with the reason and the
    old value is kept; while motion is enabled the limits marked "tighten" may only tighten
    (and ``io.require_permit`` may only be switched on); ``target.file``, ``reference.file`` and
    ``depth.source`` are refused while a run moves. Read-only (restart to change): ``robot.*``,
    ``robot_description``, ``io.command_interface``, ``io.command_joint_order``,
    ``io.output_rate_hz``, ``io.compressed_image``, ``io.image_rectified``. Accepted changes
    apply at once: servo settings and the LimitSet are rebuilt in place (the limiter keeps its
    previous command, so a lowered limit is reached through the deceleration limit).

Inputs (relative names, remap them; ``vservo_node.interface``)
    ``camera/image`` (sensor_msgs/Image, read as a view of the serialized bytes, no copy, for
    bgr8/mono8/mono16) or ``camera/image/compressed`` when ``io.compressed_image``; sensor-data
    QoS. ``camera/camera_info`` (sensor-data QoS). ``joint_states`` (joints matched by name;
    best-effort subscription, so reliable and best-effort publishers both match).
    ``camera/depth`` (aligned, 16UC1 mm or 32FC1 m) when ``depth.source`` is
    ``depth_image``. Robot model: the file ``robot.urdf_path``, else the ``robot_description``
    parameter, else the ``robot_description`` topic (std_msgs/String, transient local).
    ``cell/speed_scale`` (std_msgs/Float64, clipped to [0, 1]) scales every speed limit.
    ``cell/motion_permit`` (std_msgs/Bool heartbeat) when ``io.require_permit``.
    ``sim/camera_pose_truth`` and ``sim/taught_camera_pose`` (with ``io.sim_truth`` only) fill the
    pose error of the run result.
    Image time = header stamp + ``io.camera_time_offset_s``. The last second of joint states is
    kept and each image is evaluated at the joints interpolated at its time.
    At the edge: joint states and images stamped more than ``io.stamp_tolerance_s`` from the
    node's clock (either way), joint states with non-finite positions (these also halt a
    moving run ``numerical_fault``), undecodable or empty frames are refused, counted
    (``inputs_refused`` in the diagnostics) and logged (throttled); they never reach the
    servo and never replace good joint history. An image newer than the newest joint state
    by more than ``io.joint_state_timeout_s`` or older than the kept second cannot be paired.

Clocks
    The servo runs on one clock, the node's steady clock: run start, every output tick, frame
    receipt, and so every timeout and the run time. Stamps (ROS time, simulated with
    use_sim_time) only pair images with joint states and are checked against the node's ROS
    clock.

Cycle
    One executor thread runs every callback, timer and service; the image callback only hands
    the serialized image to a perception thread through a one-frame slot (the newest frame
    wins; replaced frames are counted in the diagnostics). That thread decodes it (a view of
    the bytes for bgr8/mono8/mono16), runs perception outside the servo lock, then
    ``servo.observe(obs, q(t_image), t_image)`` under it; feature topics are published for
    every processed image, moving or not. A steady-clock
    timer at ``io.output_rate_hz`` runs the watchdogs, then ``servo.command(q_latest, t, 1 /
    io.output_rate_hz)`` and publishes the command while a run moves (servoing, settling,
    braking). When a run ends (converged or halted) one explicit zero is published and nothing
    more until the next start: a velocity controller holds the last command it got, and a
    node that is disabled or armed never publishes on the command topic.

Commands (reliable QoS, ``io.command_interface``)
    ``joint_velocity``: std_msgs/Float64MultiArray on ``servo/joint_velocity_cmd``, rad/s (m/s
    for prismatic joints) in ``io.command_joint_order`` (default: chain order; names off the
    chain get 0). ``joint_trajectory``: trajectory_msgs/JointTrajectory on
    ``servo/joint_trajectory_cmd``, one point per cycle, header stamp zero (start now),
    positions integrated from the previous commanded position (the measured one only at the
    start of a run), velocities the command, time_from_start one output period; braking sends
    the decelerating points, the end a point at rest. ``tool_twist`` / ``camera_twist``:
    geometry_msgs/TwistStamped on ``servo/twist_cmd`` [v; w] of the tool origin in
    ``robot.base_frame`` axes / of the camera in its optical frame, computed from the limited
    joint command. With a Cartesian interface the downstream controller owns the joint
    velocity, acceleration and position limits and its own braking; this node still limits the
    joint command it derives the twist from, but cannot see what the arm does with it.

Watchdogs (steady clock, judged by receipt time, so they work while /clock stalls; they act
only while a run moves, through ``servo.halt``, and name what they saw in the halt detail):
no usable image (decoded, stamp sane, size matching camera_info) for ``io.image_timeout_s`` ->
``image_stale``; no usable joint state for ``io.joint_state_timeout_s`` -> ``joints_stale``;
usable images none of which could be paired with a joint state for ``io.image_timeout_s`` ->
``frames_unpaired`` (with the measured skew);
with ``io.require_permit`` no True on ``cell/motion_permit`` within ``io.permit_timeout_s`` (or
a False) -> ``permit_withdrawn``; camera_info missing, refused, changed during a run, or of
another size than the images -> ``camera_info_invalid``. An unexpected exception in a callback
is logged and halts a moving run with ``internal_error``; the output tick never raises (an
error inside it brakes blind from the last command, ``Servo.brake_blind``, and publishes the
zero). The servo itself judges the run timeout, the motion envelope, the follow checks and
"no observation for io.image_timeout_s" on every output tick, so none of them depends on a
frame being paired. Each halt reason is logged once per run, with its detail, and appears in
the status.

Shutdown
    SIGINT or SIGTERM (once or repeated, to the process or its group, as a terminal Ctrl-C
    under ``ros2 launch`` sends them) asks for a stop (``node_main.run_node``): the node keeps
    spinning while a moving run brakes (reason ``shutdown``) and its explicit zero goes out
    (at most 3 s), refuses enable and start meanwhile, waits up to 0.5 s for the arm's
    controller to acknowledge the last command, and exits 0 without a traceback.

Outputs
    ``servo/status`` (std_msgs/String, JSON object with ``interface.STATUS_FIELDS``) once per
    image while the servo exists (``t`` = image time, ``cycle_ms`` = perception + servo time)
    and on every state or reason change (``t`` = node time); non-finite numbers are null.
    ``servo/feature_error`` [du1, dv1, ...] px and ``servo/error_rms`` px (current minus taught
    pixels), ``servo/features`` [u1, v1, ...] px, per image with a match; ``servo/camera_twist``
    (TwistStamped, camera optical frame) per output cycle while moving; ``servo/run_result``
    (std_msgs/String JSON with ``interface.RESULT_FIELDS``, transient local) once per run end;
    ``/diagnostics`` at 1 Hz; ``servo/overlay`` (bgr8) when ``io.publish_overlay`` and someone
    subscribes.

Services (std_srvs; every refusal names the failing checks in ``message``, as
``check: detail``, and is logged)
    ``servo/enable_motion`` (SetBool). true: checks ``parameters`` (valid), ``robot_model``
    (loaded), ``servo`` (built from both), ``reference`` (loaded, with depths when
    ``depth.source`` is ``taught``), ``inputs`` (image, camera_info consistent, joint states
    fresh), ``command_topic`` (a subscriber, and no publisher but this node), ``permit`` (when
    required). false: always accepted.
    ``servo/start`` (Trigger): checks ``state`` (enabled, no run moving), the inputs, command
    topic and permit as above, ``reference``, ``features`` (at least ``control.min_features``
    matched in a fresh image) and ``initial_error`` (RMS <= ``control.max_initial_error_px``).
    ``servo/stop`` (Trigger): brakes a moving run (reason ``stop_requested``).
    ``servo/capture_reference`` (Trigger): the current view (a fresh image) is taught, written to
    ``reference.directory``/``reference.name``.yaml, and loaded (``reference.file`` is set to
    it); refused while a run moves.

State x service (states: ``interface.SUPERVISOR_STATES``; "checks": the checks above pass or
the call is refused naming them; "ok": accepted, state unchanged; every call answers at once):

=================  ===============  ===================  ===========  ================  ==========
state              enable true      enable false         start        stop              capture
=================  ===============  ===================  ===========  ================  ==========
disabled           checks, armed    ok                   refused      ok                checks,
                                                                                        loaded
armed              ok               disabled             checks,      ok                checks,
                                                         servoing                       loaded
servoing,          ok               braking              refused      braking           refused
settling                            (motion_disabled),                (stop_requested),
                                    halted, disabled                  halted
braking            ok               ok, ends halted,     refused      ok                refused
                                    then disabled
converged,         ok               disabled             checks,      ok                checks,
halted                                                   servoing                       loaded
=================  ===============  ===================  ===========  ================  ==========

Before the robot model and valid parameters exist there is no servo: enable and start are
refused (naming the missing piece), stop and enable false succeed doing nothing.
"""
from __future__ import annotations

import bisect
import datetime
import functools
import json
import math
import sys
import threading
import time
from collections import deque
from pathlib import Path

import cv2
import numpy as np
from diagnostic_msgs.msg import DiagnosticArray, DiagnosticStatus, KeyValue
from geometry_msgs.msg import PoseStamped, TwistStamped
from rcl_interfaces.msg import (FloatingPointRange, IntegerRange, ParameterDescriptor,
                                SetParametersResult)
from rclpy.clock import Clock, ClockType
from rclpy.duration import Duration
from rclpy.node import Node
from rclpy.parameter import Parameter
from sensor_msgs.msg import CameraInfo, CompressedImage, Image, JointState
from std_msgs.msg import Bool, Float64, Float64MultiArray, String
from std_srvs.srv import SetBool, Trigger
from trajectory_msgs.msg import JointTrajectory

from vservo_node import interface as itf
from vservo_node import params
from vservo_node.control import frames
from vservo_node.control.kinematics import ArmModel
from vservo_node.episode import servo_config_from_params
from vservo_node.perception import DepthImage, DepthSettings, Perception, taught_view
from vservo_node.ros import convert, qos
from vservo_node.ros.node_main import install_signal_handlers, run_node
from vservo_node.ros.output_loop import OutputLoop
from vservo_node.servo import HALT_REASONS, MOVING_STATES, Observation, Servo, ServoSettings
from vservo_node.vision import image_io
from vservo_node.vision.reference import load_reference, reference_path, save_reference
from vservo_node.vision.targets import load_target

# Parameters the node is built around (publishers, subscriptions, the arm model).
READ_ONLY = frozenset({"io.sim_truth",
    "robot.urdf_path", "robot_description", "robot.base_frame", "robot.tool_frame",
    "robot.camera_frame", "robot.hand_eye", "robot.tool_point", "robot.min_joints",
    "io.command_interface", "io.command_joint_order", "io.output_rate_hz",
    "io.compressed_image", "io.image_rectified"})
# Parameters that rebuild perception and the taught view: refused while a run moves.
STOPPED_ONLY = frozenset({"target.file", "reference.file", "depth.source",
                          "io.camera_time_offset_s"})
VISION_PARAMS = STOPPED_ONLY | {"depth.constant_m"}
# Parameters of the servo (settings or limits).
SERVO_PARAMS = frozenset(p.name for p in params.SCHEMA
                         if p.name.split(".")[0] in ("control", "limits", "depth"))
# Parameters rclpy declares itself; not ours to check.
ROS_OWN = ("use_sim_time", "start_type_description_service")
JOINT_HISTORY_S = 1.0      # joint states kept for evaluation at image times
DEPTH_FRAMES = 4           # depth frames kept for pairing with images
DIAGNOSTICS_PERIOD_S = 1.0
ACTIVE_RUN = ("servoing", "settling")
SHUTDOWN_ACK_S = 0.5       # how long shutdown waits for the final zero to be acknowledged

_ROS_TYPES = {bool: Parameter.Type.BOOL, int: Parameter.Type.INTEGER,
              float: Parameter.Type.DOUBLE, str: Parameter.Type.STRING}


def ros_type(param: params.Param) -> Parameter.Type:
    """The ROS parameter type of a schema entry."""
    if param.type is list:
        return Parameter.Type.DOUBLE_ARRAY if param.item is float else Parameter.Type.STRING_ARRAY
    return _ROS_TYPES[param.type]


def descriptor(param: params.Param) -> ParameterDescriptor:
    """ParameterDescriptor of a schema entry: description with unit, range, constraints."""
    text = param.description + (f" [{param.unit}]" if param.unit else "")
    notes = []
    if param.choices:
        notes.append("one of: " + ", ".join(param.choices))
    if param.length:
        notes.append("length " + " or ".join(map(str, param.length)))
    if param.tighten:
        verbs = ("switched off", "switched on") if param.type is bool else ("lowered", "raised")
        notes.append("while motion is enabled may only be " + verbs[param.tighten == "up"])
    if param.required:
        notes.append("required")
    # dynamic typing (scalars): a value of the wrong type reaches our check, which says what
    # was expected (rclpy's own check words it "expected '3' got '2'"); list parameters keep
    # static typing (rclpy cannot type an empty default), integers are made doubles before
    # either check (_coerce_numbers)
    d = ParameterDescriptor(name=param.name, description=text,
                            additional_constraints="; ".join(notes),
                            read_only=param.name in READ_ONLY,
                            dynamic_typing=param.type is not list)
    if param.type is float and param.low is not None:
        d.floating_point_range = [FloatingPointRange(from_value=float(param.low),
                                                     to_value=float(param.high), step=0.0)]
    elif param.type is int and param.low is not None:
        d.integer_range = [IntegerRange(from_value=int(param.low), to_value=int(param.high),
                                        step=1)]
    return d


def _coerce_numbers(parameters):
    """Pre-set callback: integers given for our float parameters become doubles (``ros2 param
    set /vservo control.gain_near 2`` means 2.0); everything else passes unchanged."""
    out = []
    for p in parameters:
        param = params.BY_NAME.get(p.name)
        wants_float = param is not None and (param.type is float or param.item is float)
        if wants_float and p.type_ == Parameter.Type.INTEGER:
            p = Parameter(p.name, Parameter.Type.DOUBLE, float(p.value))
        elif wants_float and p.type_ == Parameter.Type.INTEGER_ARRAY:
            p = Parameter(p.name, Parameter.Type.DOUBLE_ARRAY, [float(v) for v in p.value])
        out.append(p)
    return out


def plain(value):
    """A parameter value as plain Python (arrays become lists)."""
    return list(value) if isinstance(value, (list, tuple)) or hasattr(value, "typecode") else value


json_safe = itf.json_safe   # kept here for callers of the node module


class JointHistory:
    """Joint positions (chain order) by stamp over the last ``span_s`` seconds.

    ``at(t)`` interpolates linearly between the two states around ``t`` (the shorter way round
    for ``continuous`` joints), returns the newest state for a ``t`` after it (no
    extrapolation) and None for a ``t`` before the oldest kept state.
    """

    def __init__(self, continuous: np.ndarray, span_s: float = JOINT_HISTORY_S):
        self.continuous = np.asarray(continuous, dtype=bool)
        self.span_s = span_s
        self._t: list[float] = []
        self._q: list[np.ndarray] = []

    def add(self, t: float, q: np.ndarray) -> None:
        """Add the state at time ``t`` (s); an older or equal stamp replaces nothing but the
        newest state of the same stamp."""
        if self._t and t <= self._t[-1]:
            if t == self._t[-1]:
                self._q[-1] = q
            return
        self._t.append(t)
        self._q.append(q)
        drop = bisect.bisect_left(self._t, t - self.span_s)
        if drop:
            del self._t[:drop], self._q[:drop]

    def latest(self) -> np.ndarray | None:
        return self._q[-1] if self._q else None

    def span(self) -> tuple[float, float] | None:
        """(oldest, newest) stamp kept, or None."""
        return (self._t[0], self._t[-1]) if self._t else None

    def at(self, t: float) -> np.ndarray | None:
        if not self._t or t < self._t[0]:
            return None
        if t >= self._t[-1]:
            return self._q[-1]
        i = bisect.bisect_right(self._t, t)
        t0, t1, q0, q1 = self._t[i - 1], self._t[i], self._q[i - 1], self._q[i]
        step = q1 - q0
        step[self.continuous] = (step[self.continuous] + np.pi) % (2 * np.pi) - np.pi
        return q0 + (t - t0) / (t1 - t0) * step


class CommandOutput:
    """The command message of one output cycle for ``kind`` (``params.COMMAND_INTERFACES``),
    from the limited joint velocity ``cmd`` (rad/s or m/s, chain order) at joints ``q``.

    - joint_velocity: Float64MultiArray in ``joint_order`` (empty: chain order; names off the
      chain get 0).
    - joint_trajectory: one JointTrajectory point, header stamp zero (start now): positions
      ``p_k = p_(k-1) + cmd * period`` from the previous commanded position (from ``q`` at the
      first call after ``reset``), velocities ``cmd``, time_from_start one period.
    - tool_twist: TwistStamped [v; w] of the tool origin in ``base_frame`` axes.
    - camera_twist: TwistStamped [v; w] of the camera in its optical frame ``camera_frame``.
    """

    def __init__(self, kind: str, arm: ArmModel, joint_order, period: float, base_frame: str,
                 camera_frame: str):
        if kind not in params.COMMAND_INTERFACES:
            raise ValueError(f"unknown command interface {kind!r}; expected one of "
                             f"{', '.join(params.COMMAND_INTERFACES)}")
        self.check_order(joint_order, arm.joint_names)
        self.kind, self.arm, self.period = kind, arm, period
        self.order = list(joint_order) or list(arm.joint_names)
        self._index = [self.order.index(name) for name in arm.joint_names]
        self.base_frame, self.camera_frame = base_frame, camera_frame
        self._position = None

    @staticmethod
    def check_order(joint_order, joint_names) -> None:
        """ValueError unless an explicit order names every chain joint."""
        missing = [name for name in joint_names if joint_order and name not in joint_order]
        if missing:
            raise ValueError(f"io.command_joint_order lacks chain joint(s) {missing}")

    def reset(self) -> None:
        """The next trajectory point starts from the measured position."""
        self._position = None

    def message(self, cmd: np.ndarray, q: np.ndarray, stamp: float):
        if self.kind == "joint_velocity":
            values = np.zeros(len(self.order))
            values[self._index] = cmd
            return convert.joint_array(values, self.order)
        if self.kind == "joint_trajectory":
            start = np.array(q, dtype=float) if self._position is None else self._position
            self._position = start + np.asarray(cmd, dtype=float) * self.period
            return convert.trajectory_point(self.arm.joint_names, self._position, cmd,
                                            time_from_start_s=self.period)
        if self.kind == "tool_twist":
            return convert.vector_to_twist(self.arm.jacobian_base(q) @ cmd, stamp,
                                           self.base_frame)
        twist = self.arm.camera_from_tool() @ self.arm.jacobian_tool(q) @ cmd
        return convert.vector_to_twist(twist, stamp, self.camera_frame)


class FrameSlot:
    """A one-frame mailbox between the executor and the perception thread: ``put`` replaces
    a frame not yet taken (the newest frame wins; ``dropped`` counts the replaced ones),
    ``take`` blocks until a frame or ``close`` (then returns None)."""

    def __init__(self):
        self._cond = threading.Condition()
        self._item = None
        self._closed = False
        self.dropped = 0

    def put(self, item) -> None:
        with self._cond:
            self.dropped += self._item is not None
            self._item = item
            self._cond.notify()

    def take(self):
        with self._cond:
            self._cond.wait_for(lambda: self._item is not None or self._closed)
            item, self._item = self._item, None
            return None if self._closed else item

    def close(self) -> None:
        with self._cond:
            self._closed = True
            self._cond.notify_all()


def _guarded(method):
    """Log an unexpected exception of a callback instead of letting it end the node; halt a
    moving run (reason ``internal_error``)."""
    @functools.wraps(method)
    def wrapper(self, *args):
        try:
            return method(self, *args)
        except Exception as exc:  # noqa: BLE001 - the node must not die on one bad callback
            self._internal_error(method.__name__, exc)
            return None
    return wrapper


def _guarded_service(method):
    """As ``_guarded`` for a service: the response says the call failed and why."""
    @functools.wraps(method)
    def wrapper(self, request, response):
        try:
            return method(self, request, response)
        except Exception as exc:  # noqa: BLE001
            self._internal_error(method.__name__, exc)
            response.success, response.message = False, f"internal error: {exc}"
            return response
    return wrapper


class ControllerNode(Node):
    """The controller node; see the module docstring for its behaviour."""

    def __init__(self, **node_kwargs):
        # undeclared names reach our check, which refuses them naming the nearest parameter
        # (rclpy's own refusal reads "undeclared parameter(s): []")
        node_kwargs.setdefault("allow_undeclared_parameters", True)
        super().__init__(itf.CONTROLLER_NODE, **node_kwargs)
        self._lock = threading.RLock()
        self._declare_parameters()
        v = self._values
        self._period = 1.0 / v["io.output_rate_hz"]
        self.arm: ArmModel | None = None
        self.servo: Servo | None = None
        self.perception: Perception | None = None
        self._problems = {"robot_model": "not loaded yet", "servo": "", "vision": ""}
        self._reference = None
        self._camera = None
        self._camera_key = None
        self._camera_problem = "no camera_info received"
        self._joints: JointHistory | None = None
        self._joint_problem = ""
        # receipt times (steady clock); "frame": the last image that was decoded, had a sane
        # stamp and fit the camera model; "paired": ... and could be paired with a joint state
        # (the watchdogs judge these two: frames that arrive but cannot be used do not count)
        self._rx = dict.fromkeys(("image", "frame", "paired", "joints", "camera_info",
                                  "permit"))
        self._frame_problem = ""         # why the last image was refused
        self._pair_problem = ""          # why the last usable image could not be paired
        self._refused: dict[str, int] = {}   # refused inputs by kind (diagnostics)
        self._permit = False
        self._last_image = None          # (image, t, frame_id)
        self._last_obs = None            # (Observation | None, PerceptionInfo, receipt time)
        self._depth_frames: deque = deque(maxlen=DEPTH_FRAMES)
        self._frame_status = None        # (image time, cycle ms) not yet in a status message
        self._last_state = None
        self._last_status: dict = {}
        self._announced = ""
        self._commanding = False
        self._output: CommandOutput | None = None
        self._vision_dirty = False
        self._pending_values = None
        self._truth = {"camera": None, "taught": None}
        self._warned: dict[str, float] = {}
        self._runs = 0
        self._shutting_down = False
        self._command_sent = False      # anything published on the command topic yet
        self._last_tick, self._ticks, self._late_ticks = None, 0, 0

        self._frames = FrameSlot()
        self._worker = threading.Thread(target=self._perception_loop, name="perception",
                                        daemon=True)
        steady = Clock(clock_type=ClockType.STEADY_TIME)
        self._make_publishers()
        self._make_subscriptions()
        for srv_type, name, callback in (
                (SetBool, itf.SRV_ENABLE_MOTION, self._srv_enable),
                (Trigger, itf.SRV_START, self._srv_start),
                (Trigger, itf.SRV_STOP, self._srv_stop),
                (Trigger, itf.SRV_CAPTURE_REFERENCE, self._srv_capture)):
            self.create_service(srv_type, name, callback)
        self.add_on_set_parameters_callback(self._on_set_parameters)
        self.add_post_set_parameters_callback(self._after_set_parameters)
        self._load_robot_from_parameters()
        self.create_timer(DIAGNOSTICS_PERIOD_S, self._on_diagnostics_timer, clock=steady)
        # The output tick runs on its own steady-clock thread, not as an executor timer that
        # would queue behind every subscription callback (output_loop.py says why).
        self._output_loop = OutputLoop(self._period, self._on_output_timer,
                                       on_error=lambda exc: self._on_output_error(exc))
        self._worker.start()
        self._output_loop.start()
        problems = self._parameter_problems()
        self.get_logger().info(
            f"{itf.CONTROLLER_NODE} ready: motion disabled; command interface "
            f"{v['io.command_interface']} on {self._command_topic}"
            + (f"; {len(problems)} parameter problem(s): enabling is refused until fixed"
               if problems else ""))

    # ------------------------------------------------------------------------ parameters
    def _declare_parameters(self) -> None:
        """Declare every SCHEMA entry with its file value when valid, else its default."""
        # rclpy keeps --params-file / -p values in _parameter_overrides; reading them here lets
        # an invalid or mistyped file value be reported instead of aborting the declaration.
        overrides = {name: plain(p.value) for name, p in self._parameter_overrides.items()
                     if name not in ROS_OWN and not name.startswith("qos_overrides.")}
        result = params.validate(overrides)
        self._values = result.values
        remaining = set(params.validate(self._values).errors)  # not fixed by the defaults
        self._file_errors = {}
        for error in result.errors:
            name = error.split(":")[0]
            if name in overrides and error not in remaining:
                self._file_errors[name] = error + (" (in the parameter file; default used)"
                                                   if name in params.BY_NAME else
                                                   " (in the parameter file; ignored)")
        for param in params.SCHEMA:
            value = self._values[param.name]
            initial = ros_type(param) if value == [] else value  # rclpy cannot type []
            self.declare_parameter(param.name, initial, descriptor(param), ignore_override=True)
        self.add_pre_set_parameters_callback(_coerce_numbers)
        for message in self._parameter_problems():
            self.get_logger().error(f"parameter problem: {message}")
        for warning in result.warnings:
            self.get_logger().warning(f"parameter warning: {warning}")

    def _parameter_problems(self) -> list[str]:
        return list(self._file_errors.values()) + params.validate(self._values).errors

    def _on_set_parameters(self, parameters) -> SetParametersResult:
        """Check a live change (all-or-nothing); the post-set callback applies it."""
        try:
            with self._lock:
                reason, new = self._check_change(parameters)
        except Exception as exc:  # noqa: BLE001 - a refusal, never a crash
            reason, new = f"internal error while checking: {exc}", None
        if reason:
            self.get_logger().warning(f"parameter change refused: {reason}")
            return SetParametersResult(successful=False, reason=reason)
        self._pending_values = new
        return SetParametersResult(successful=True)

    def _check_change(self, parameters):
        servo = self.servo
        enabled = bool(servo and servo.enabled)
        moving = bool(servo and servo.state in MOVING_STATES)
        new = dict(self._values)
        for p in parameters:
            param = params.BY_NAME.get(p.name)
            if param is None:
                if p.name in ROS_OWN or p.name.startswith("qos_overrides."):
                    continue  # rclpy's own (use_sim_time)
                return params.unknown_name_message(p.name), None
            value = plain(p.value)
            reason = params.check_change(p.name, self._values[p.name], value, enabled)
            if reason is None and moving and p.name in STOPPED_ONLY:
                reason = (f"{p.name}: cannot change while a run moves (state {servo.state}); "
                          "stop first")
            if reason:
                return reason, None
            new[p.name] = params.check_value(param, value)[0]
        before = set(params.validate(self._values).errors)
        checked = params.validate(new)
        added = [e for e in checked.errors if e not in before]
        if added:
            return "; ".join(added), None
        if checked.ok:
            # build everything the change will apply, so an accepted change cannot fail later
            changed = {p.name for p in parameters}
            try:
                if self.arm is not None:
                    Servo.check_config(self.arm, *self._servo_config(new))
                if changed & VISION_PARAMS:
                    self._load_vision_files(new)
            except (ValueError, OSError) as exc:
                return str(exc), None
        return "", new

    def _after_set_parameters(self, parameters) -> None:
        try:
            self._apply_parameters(parameters)
        except Exception as exc:  # noqa: BLE001 - checked before; never let it end the node
            self._internal_error("applying parameters", exc)

    def _apply_parameters(self, parameters) -> None:
        changed = {p.name for p in parameters if p.name in params.BY_NAME}
        with self._lock:
            self._values = self._pending_values or self._values
            self._pending_values = None
            for name in changed:
                self._file_errors.pop(name, None)
            if changed & VISION_PARAMS:
                self._rebuild_vision()
            if self.servo is None:
                self._build_servo()
            elif changed & (SERVO_PARAMS | {"io.image_timeout_s"}):
                self.servo.reconfigure(*self._servo_config(self._values))
        self.get_logger().info("parameters changed: " + ", ".join(
            f"{n} = {self._values[n]!r}" for n in sorted(changed)))

    # ------------------------------------------------------------------------ robot + servo
    def _load_robot_from_parameters(self) -> None:
        v = self._values
        if v["robot.urdf_path"]:
            try:
                text = Path(v["robot.urdf_path"]).read_text()
            except OSError as exc:
                self._problems["robot_model"] = f"cannot read robot.urdf_path: {exc}"
                self.get_logger().error(self._problems["robot_model"])
                return
            self._load_robot(text, v["robot.urdf_path"])
        elif v["robot_description"]:
            self._load_robot(v["robot_description"], "the robot_description parameter")
        else:
            self._problems["robot_model"] = (f"waiting for a URDF on the "
                                             f"{itf.TOPIC_ROBOT_DESCRIPTION} topic")
            self.create_subscription(String, itf.TOPIC_ROBOT_DESCRIPTION,
                                     self._on_robot_description, qos.LATCHED)

    @_guarded
    def _on_robot_description(self, msg: String) -> None:
        with self._lock:
            if self.servo is not None and self.servo.enabled:
                self._warn("robot_description", "a new robot_description arrived while motion "
                           "is enabled; ignored (disable motion to reload it)")
                return
            self._load_robot(msg.data, f"the {itf.TOPIC_ROBOT_DESCRIPTION} topic")

    def _load_robot(self, urdf: str, source: str) -> None:
        """Arm model from URDF text; the problem is kept for the enable check."""
        v = self._values
        hand_eye = v["robot.hand_eye"]
        try:
            arm = ArmModel.from_urdf(urdf, v["robot.base_frame"], v["robot.tool_frame"],
                                     None if hand_eye else v["robot.camera_frame"],
                                     v["robot.min_joints"])
            if hand_eye:
                arm.set_hand_eye(frames.transform_from_xyz_quat(hand_eye[:3], hand_eye[3:]))
            CommandOutput.check_order(v["io.command_joint_order"], arm.joint_names)
        except ValueError as exc:
            self.arm = None
            self._problems["robot_model"] = f"from {source}: {exc}"
            self.get_logger().error(f"robot model refused: {self._problems['robot_model']}")
            return
        self.arm = arm
        self._problems["robot_model"] = ""
        self._joints = JointHistory(arm.continuous)
        self._output = CommandOutput(v["io.command_interface"], arm,
                                     v["io.command_joint_order"], self._period,
                                     v["robot.base_frame"], v["robot.camera_frame"])
        self.get_logger().info(f"robot model from {source}: {arm.n} joints "
                               f"{', '.join(arm.joint_names)}")
        self._build_servo()

    def _servo_config(self, values) -> tuple[ServoSettings, object]:
        """(ServoSettings, LimitSet) of valid parameter values for the loaded arm;
        ValueError saying what does not fit the arm."""
        return servo_config_from_params(self.arm, values)

    def _build_servo(self) -> None:
        """A new Servo (disabled) from the arm and valid parameters, or the reason why not."""
        if self.arm is None:
            return
        if not params.validate(self._values).ok:
            self._problems["servo"] = "waiting for valid parameters"
            return
        try:
            settings, limits = self._servo_config(self._values)
        except ValueError as exc:
            self._problems["servo"] = str(exc)
            self.get_logger().error(f"servo not built: {exc}")
            return
        self.servo = Servo(self.arm, settings, limits, self._values["robot.tool_point"])
        self._problems["servo"] = ""
        self._rebuild_vision()


    # ------------------------------------------------------------------------ vision
    def _rebuild_vision(self) -> None:
        """Perception and the servo's taught view from target, reference and camera."""
        if self.servo is not None and self.servo.state in MOVING_STATES:
            self._vision_dirty = True
            return
        self._vision_dirty = False
        self.perception = None
        self._reference = None
        if self.servo is not None:
            self.servo.set_reference(None)
        v = self._values
        try:
            target, reference = self._load_vision_files(v)
        except (ValueError, OSError) as exc:
            self._problems["vision"] = str(exc)
            self.get_logger().error(f"target or reference refused: {exc}")
            return
        if self._camera is None:
            self._problems["vision"] = "no camera model yet (camera_info)"
            return
        try:
            perception = Perception(target, self._camera, reference, DepthSettings.from_params(v))
            view = (taught_view(reference, self._camera, target) if reference is not None
                    else None)
        except (ValueError, OSError) as exc:
            self._problems["vision"] = str(exc)
            self.get_logger().error(f"perception not ready: {exc}")
            return
        self.perception, self._reference = perception, reference
        self._problems["vision"] = ""
        if self.servo is not None:
            self.servo.set_reference(view)
        self._last_obs = None

    @staticmethod
    def _load_vision_files(values) -> tuple:
        """(target, reference or None) from the files the parameters name; ValueError or
        OSError naming the file and what is wrong."""
        target = load_target(values["target.file"])
        reference = (load_reference(values["reference.file"], target)
                     if values["reference.file"] else None)
        return target, reference

    @_guarded
    def _on_camera_info(self, msg: CameraInfo) -> None:
        key = (msg.width, msg.height, msg.distortion_model, tuple(msg.d), tuple(msg.k),
               tuple(msg.r), tuple(msg.p))
        with self._lock:
            self._rx["camera_info"] = time.monotonic()
            if key == self._camera_key:
                return
            first = self._camera_key is None
            self._camera_key = key
            try:
                camera = convert.camera_info_to_model(msg, self._values["io.image_rectified"])
            except ValueError as exc:
                self._camera = None
                self._camera_problem = f"camera_info refused: {exc}"
                self.get_logger().error(self._camera_problem)
                self._halt("camera_info_invalid")
                return
            if not first and self.servo is not None and self.servo.state in MOVING_STATES:
                self._camera_problem = "camera_info changed during a run"
                self._halt("camera_info_invalid")
            self._camera = camera
            self.get_logger().info(f"camera model: {camera}")
            self._rebuild_vision()

    def _image_problem(self, image) -> str:
        if self._camera is None:
            return self._camera_problem
        h, w = image.shape[:2]
        if (w, h) != (self._camera.width, self._camera.height):
            return (f"images are {w}x{h} but camera_info says "
                    f"{self._camera.width}x{self._camera.height}")
        return ""

    def _on_raw_image(self, data: bytes) -> None:
        """Hand the serialized image to the perception thread (newest frame wins)."""
        self._frames.put((time.monotonic(), data))

    def _on_compressed_image(self, msg: CompressedImage) -> None:
        self._frames.put((time.monotonic(), msg))

    def _perception_loop(self) -> None:
        """The perception thread: decode, perceive and observe the newest frame."""
        while True:
            item = self._frames.take()
            if item is None:
                return
            self._on_frame(*item)

    @_guarded
    def _on_frame(self, rx: float, payload) -> None:
        try:
            if isinstance(payload, CompressedImage):
                header = payload.header
                fmt, data = convert.compressed_image_bytes(payload)
                image = image_io.to_bgr_or_mono(data, fmt)
            else:
                raw = convert.image_from_cdr(payload)  # pixels stay a view of the bytes
                header = raw.header
                image = image_io.to_bgr_or_mono(raw.data, raw.encoding, raw.width, raw.height,
                                                raw.step, bool(raw.is_bigendian))
        except ValueError as exc:
            with self._lock:
                self._frame_refused(f"image refused: {exc}")
            return
        self._on_image(image, header, rx)

    def _stamp(self, header) -> float:
        """Image time (s): header stamp (node time if unstamped) + io.camera_time_offset_s."""
        t = convert.time_to_sec(header.stamp) or self._now()
        return t + self._values["io.camera_time_offset_s"]

    def _stamp_problem(self, what: str, t: float) -> str:
        """Why a message stamped ``t`` (s) is refused, or "": further than
        io.stamp_tolerance_s from the node's clock, either way."""
        now, tolerance = self._now(), self._values["io.stamp_tolerance_s"]
        skew = t - now
        if abs(skew) <= tolerance:
            return ""
        hint = (" (use_sim_time is set but no /clock arrives?)" if now == 0.0 else
                " (clocks of the camera/driver and this node out of step?)")
        return (f"{what} stamped {skew:+.3f} s from this node's clock (io.stamp_tolerance_s = "
                f"{tolerance} s){hint}")

    def _refuse_input(self, kind: str, problem: str) -> None:
        """Count and (throttled) log a refused input."""
        self._refused[kind] = self._refused.get(kind, 0) + 1
        self._warn(f"refused:{kind}", f"{problem}; refused ({self._refused[kind]} so far)")

    def _pair(self, t: float):
        """Joints at image time ``t`` and "" or None and why they cannot be had: the image
        is older than the kept history or newer than the newest joint state by more than
        io.joint_state_timeout_s (joints that lag the image cannot stand in for it)."""
        if self._joints is None:
            return None, "no robot model yet"
        span = self._joints.span()
        if span is None:
            return None, "no joint state received yet"
        oldest, newest = span
        if t > newest + self._values["io.joint_state_timeout_s"]:
            return None, (f"image stamped {t - newest:.3f} s after the newest joint state: "
                          "cannot pair frames with joint states")
        q = self._joints.at(t)
        if q is None:
            return None, (f"image stamped {newest - t:.3f} s before the newest joint state "
                          f"(only {JOINT_HISTORY_S} s kept): cannot pair frames with joint "
                          "states")
        return q, ""

    def _frame_refused(self, problem: str) -> None:
        self._frame_problem = problem
        self._refuse_input("image", problem)

    def _on_image(self, image: np.ndarray, header, rx: float) -> None:
        t0 = time.perf_counter()
        t = self._stamp(header)
        with self._lock:
            self._rx["image"] = rx
            stamp_problem = self._stamp_problem("image", t)
            if stamp_problem:
                self._frame_refused(stamp_problem)
                return
            self._last_image = (image, t, header.frame_id)
            problem = self._image_problem(image)
            if problem:
                self._camera_problem = problem
                self._halt("camera_info_invalid", problem)
                return
            self._camera_problem = ""
            self._rx["frame"], self._frame_problem = rx, ""
            q, self._pair_problem = self._pair(t)
            if self._pair_problem:
                self._refuse_input("unpaired", self._pair_problem)
            else:
                self._rx["paired"] = rx
            perception = self.perception
            depth = self._depth_near(t)
        if perception is None:
            return
        try:
            obs, info = perception.process(image, t, depth)
        except ValueError as exc:
            self._warn("perception", f"perception failed: {exc}")
            return
        with self._lock:
            if perception is not self.perception:
                return  # rebuilt meanwhile: this frame used the old reference or camera
            self._last_obs = (obs, info, rx)
            servo = self.servo
            if q is not None and servo is not None and servo.state in ACTIVE_RUN:
                servo.observe(obs or _no_features(), q, rx)
            if servo is not None:
                self._frame_status = (t, 1e3 * (time.perf_counter() - t0))
        if self._shutting_down:
            return   # the node is being destroyed: publish nothing from this thread
        self._publish_features(obs, info)
        if self._values["io.publish_overlay"] and self._pub_overlay.get_subscription_count():
            self._publish_overlay(image, info, t, header.frame_id)

    @_guarded
    def _on_depth(self, msg: Image) -> None:
        if msg.encoding not in image_io.DEPTH_ENCODINGS:
            self._warn("depth", f"depth image refused: encoding {msg.encoding!r}, expected one "
                       f"of {', '.join(image_io.DEPTH_ENCODINGS)}")
            return
        pixels = convert.image_to_numpy(msg)  # a view; the message stays alive with it
        with self._lock:
            self._depth_frames.append((self._stamp(msg.header),
                                       DepthImage(pixels, msg.encoding)))

    def _depth_near(self, t: float) -> DepthImage | None:
        """The kept depth frame nearest to ``t`` within one camera period, else None."""
        frames_ = list(self._depth_frames)
        if not frames_:
            return None
        t_d, depth = min(frames_, key=lambda f: abs(f[0] - t))
        return depth if abs(t_d - t) <= 1.0 / self._values["io.camera_rate_hz"] else None

    # ------------------------------------------------------------------------ other inputs
    @_guarded
    def _on_joint_state(self, msg: JointState) -> None:
        rx = time.monotonic()
        with self._lock:
            if self.arm is None:
                return
            names = set(msg.name)
            if not names & set(self.arm.joint_names):
                return  # another group's joints (e.g. a gripper) on the same topic
            try:
                q, _ = convert.joint_state_to_arrays(msg, self.arm.joint_names)
            except ValueError as exc:
                self._joint_problem = f"joint state refused: {exc}"
                self._refuse_input("joints", self._joint_problem)
                return
            if not np.all(np.isfinite(q)):
                bad = [n for n, v in zip(self.arm.joint_names, q) if not math.isfinite(v)]
                self._joint_problem = f"joint state with non-finite position(s) {bad}"
                self._refuse_input("joints", self._joint_problem)
                self._halt("numerical_fault", self._joint_problem)
                return
            t = convert.time_to_sec(msg.header.stamp) or self._now()
            stamp_problem = self._stamp_problem("joint state", t)
            if stamp_problem:
                self._joint_problem = stamp_problem
                self._refuse_input("joints", stamp_problem)
                return
            self._joints.add(t, q)
            self._rx["joints"] = rx
            self._joint_problem = ""

    @_guarded
    def _on_speed_scale(self, msg: Float64) -> None:
        value = msg.data
        clipped = min(max(value, 0.0), 1.0) if math.isfinite(value) else 0.0
        if clipped != value:
            self._warn("speed_scale", f"speed scale {value} outside [0, 1]; using {clipped}")
        with self._lock:
            if self.servo is not None:
                self.servo.external_scale = clipped

    @_guarded
    def _on_permit(self, msg: Bool) -> None:
        with self._lock:
            self._permit = bool(msg.data)
            self._rx["permit"] = time.monotonic()

    @_guarded
    def _on_truth(self, which: str, msg: PoseStamped) -> None:
        self._truth[which] = convert.pose_to_matrix(msg)

    # ------------------------------------------------------------------------ output cycle
    def _on_output_timer(self) -> None:
        """The output tick. Never raises: an unexpected error brakes blind (servo.command's
        own guard) or, failing that, publishes an explicit zero."""
        now = time.monotonic()
        if self._last_tick is not None:   # timer health: late by more than one period
            self._ticks += 1
            self._late_ticks += now - self._last_tick > 2.0 * self._period
        self._last_tick = now
        try:
            self._output_tick()
        except Exception as exc:  # noqa: BLE001 - the last-resort guard of the output path
            self._on_output_error(exc)

    def _on_output_error(self, exc: BaseException) -> None:
        self._warn("output_tick", f"internal error in the output tick: "
                   f"{type(exc).__name__}: {exc}", every_s=1.0)
        with self._lock:
            self._last_resort(exc)

    def _last_resort(self, exc: Exception) -> None:
        servo = self.servo
        if servo is None or servo.state not in MOVING_STATES and not self._commanding:
            return
        servo.halt("internal_error", self._servo_time(), f"{type(exc).__name__}: {exc}")
        cmd, _ = servo.brake_blind(self._servo_time(), self._period)
        try:
            q = self._joints.latest()
            self._publish_command(cmd, q if q is not None else np.zeros(self.arm.n))
        except Exception:  # noqa: BLE001 - the plainest zero we can send
            if self._values["io.command_interface"] == "joint_velocity":
                self._pub_command.publish(Float64MultiArray(data=[0.0] * len(self._output.order)))
        self._commanding = servo.state in MOVING_STATES

    def _output_tick(self) -> None:
        with self._lock:
            servo = self.servo
            q = self._joints.latest() if self._joints is not None else None
            if servo is None or q is None:
                return
            t = self._servo_time()
            self._watchdogs(servo, t)
            cmd, status = servo.command(q, t, self._period)
            self._announce(servo)
            if servo.state in MOVING_STATES:
                self._publish_command(cmd, q)
                self._commanding = True
                self._pub_camera_twist.publish(convert.vector_to_twist(
                    servo.camera_twist(q, cmd), t, self._values["robot.camera_frame"]))
            elif self._commanding:
                self._end_run(servo, q)
            self._publish_status(servo, status)
            if servo.state in ("converged", "halted") and not servo.enabled:
                servo.enable(False, t)  # a run that braked on disable: 'disabled' next cycle
            if self._vision_dirty and servo.state not in MOVING_STATES:
                self._rebuild_vision()

    def _watchdogs(self, servo: Servo, t: float) -> None:
        """Halt a moving run whose inputs went stale (receipt time, steady clock)."""
        if servo.state not in ACTIVE_RUN:
            return
        v = self._values
        frame_age, paired_age = self._age("frame"), self._age("paired")
        if self._camera_problem:
            servo.halt("camera_info_invalid", t, self._camera_problem)
        elif frame_age > v["io.image_timeout_s"]:
            servo.halt("image_stale", t, (self._frame_problem + "; " if self._frame_problem
                                          else "") + f"no usable image for {frame_age:.2f} s "
                       f"(io.image_timeout_s = {v['io.image_timeout_s']} s)")
        elif self._age("joints") > v["io.joint_state_timeout_s"]:
            servo.halt("joints_stale", t, (self._joint_problem + "; " if self._joint_problem
                                           else "") + f"no usable joint state for "
                       f"{self._age('joints'):.2f} s (io.joint_state_timeout_s = "
                       f"{v['io.joint_state_timeout_s']} s)")
        elif paired_age > v["io.image_timeout_s"]:
            servo.halt("frames_unpaired", t, f"{self._pair_problem} (no image paired for "
                       f"{paired_age:.2f} s; io.image_timeout_s = {v['io.image_timeout_s']} s)")
        elif v["io.require_permit"] and not self._permit_ok():
            servo.halt("permit_withdrawn", t, f"no fresh True on {itf.TOPIC_MOTION_PERMIT} "
                       f"within io.permit_timeout_s = {v['io.permit_timeout_s']} s"
                       if self._permit else f"False on {itf.TOPIC_MOTION_PERMIT}")

    def _age(self, what: str) -> float:
        rx = self._rx[what]
        return math.inf if rx is None else time.monotonic() - rx

    def _permit_ok(self) -> bool:
        return self._permit and self._age("permit") <= self._values["io.permit_timeout_s"]

    def _halt(self, reason: str, detail: str = "") -> None:
        if self.servo is not None:
            self.servo.halt(reason, self._servo_time(), detail)

    def _publish_command(self, cmd: np.ndarray, q: np.ndarray) -> None:
        self._pub_command.publish(self._output.message(cmd, q, self._now()))
        self._command_sent = True

    def _end_run(self, servo: Servo, q: np.ndarray) -> None:
        """The explicit zero after a run, and the run result."""
        self._publish_command(np.zeros(self.arm.n), q)
        self._commanding = False
        self._output.reset()
        if servo.result is None:
            return
        result = dict(servo.result)
        camera, taught = self._truth["camera"], self._truth["taught"]
        if camera is not None and taught is not None:
            moved, turned = frames.pose_error(taught, camera)
            result["final_pose_error_mm"] = 1e3 * moved
            result["final_pose_error_deg"] = math.degrees(turned)
        self._pub_result.publish(String(data=json.dumps(json_safe(
            {k: result.get(k) for k in itf.RESULT_FIELDS}))))
        self.get_logger().info(f"run {result['run_id']} ended: "
                               f"{'converged' if result['converged'] else 'halted'}"
                               f"{' (' + result['reason'] + ')' if result['reason'] else ''} "
                               f"after {result['time_s']:.2f} s, final RMS "
                               f"{result['final_rms_px']:.2f} px")

    def _announce(self, servo: Servo) -> None:
        """Log each halt reason once per run."""
        if servo.reason and servo.reason != self._announced:
            self._announced = servo.reason
            self.get_logger().warning(
                f"halt: {servo.reason}: {HALT_REASONS.get(servo.reason, servo.reason)}"
                + (f": {servo.detail}" if servo.detail else ""))

    def _publish_status(self, servo: Servo, status: dict) -> None:
        self._last_status = status
        state = (servo.state, servo.reason)
        frame, self._frame_status = self._frame_status, None
        if frame is None and state == self._last_state:
            return
        self._last_state = state
        if frame is not None:
            status["t"], status["cycle_ms"] = frame    # the image's stamp
        else:
            status["t"] = self._now()   # ROS time too (the servo's own clock is steady)
        self._pub_status.publish(String(data=json.dumps(json_safe(
            {k: status.get(k) for k in itf.STATUS_FIELDS}))))

    def _publish_features(self, obs, info) -> None:
        if obs is None:
            return
        error = info.uv - info.uv_ref
        self._pub_features.publish(Float64MultiArray(data=info.uv.ravel().tolist()))
        self._pub_feature_error.publish(Float64MultiArray(data=error.ravel().tolist()))
        self._pub_error_rms.publish(Float64(data=_rms(error)))

    def _publish_overlay(self, image, info, t: float, frame_id: str) -> None:
        """Detections (green), taught positions (red) and error vectors (yellow)."""
        canvas = image_io.to_mono8(image) if image.dtype == np.uint16 else image
        canvas = cv2.cvtColor(canvas, cv2.COLOR_GRAY2BGR) if canvas.ndim == 2 else canvas.copy()
        to_fixed = lambda p: (int(round(p[0] * 16)), int(round(p[1] * 16)))  # noqa: E731
        for now, ref in zip(info.uv, info.uv_ref):
            cv2.line(canvas, to_fixed(ref), to_fixed(now), (0, 220, 255), 1, cv2.LINE_AA, 4)
            cv2.circle(canvas, to_fixed(now), 6 * 16, (0, 200, 0), 1, cv2.LINE_AA, 4)
            cv2.circle(canvas, to_fixed(ref), 3 * 16, (0, 0, 230), -1, cv2.LINE_AA, 4)
        state = self.servo.state if self.servo is not None else "no servo"
        label = f"{state}  rms {_rms(info.uv - info.uv_ref):.2f} px  matched {info.n_matched}"
        cv2.putText(canvas, label, (8, 20), cv2.FONT_HERSHEY_SIMPLEX, 0.5, (255, 255, 255), 1,
                    cv2.LINE_AA)
        self._pub_overlay.publish(convert.numpy_to_image(canvas, "bgr8", t, frame_id))

    @_guarded
    def _on_diagnostics_timer(self) -> None:
        with self._lock:
            servo, last = self.servo, self._last_status
            problems = self._parameter_problems()
            missing = [f"{k}: {v}" for k, v in self._problems.items() if v]
            values = {
                "state": servo.state if servo else "no servo",
                "reason": servo.reason if servo else "",
                "rms_px": last.get("rms_px", math.nan),
                "sigma_min": last.get("sigma_min", math.nan),
                "limit_counts": json.dumps(last.get("limit_counts", {})),
                "image_age_s": self._age("image"), "joint_state_age_s": self._age("joints"),
                "camera_info_age_s": self._age("camera_info"),
                "camera_info": self._camera_problem or "ok",
                "permit": "not required" if not self._values["io.require_permit"] else (
                    "ok" if self._permit_ok() else "withdrawn"),
                "parameter_problems": "; ".join(problems) or "none",
                "not_ready": "; ".join(missing) or "none",
                "frames_dropped": self._frames.dropped,
                "inputs_refused": json.dumps(self._refused),
                "output_ticks": self._ticks, "output_ticks_late": self._late_ticks,
                "last_image_problem": self._frame_problem or "none",
            }
        if problems or self.arm is None:
            level, message = DiagnosticStatus.ERROR, "; ".join(problems + missing)
        elif missing:
            level, message = DiagnosticStatus.WARN, "; ".join(missing)
        elif values["state"] in ("braking", "halted"):
            level, message = DiagnosticStatus.WARN, f"{values['state']}: {values['reason']}"
        else:
            level, message = DiagnosticStatus.OK, values["state"]
        status = DiagnosticStatus(
            level=level, name=f"{self.get_fully_qualified_name()}: visual servo",
            message=message,
            hardware_id=self._values["robot.tool_frame"],
            values=[KeyValue(key=k, value=f"{v:.3f}" if isinstance(v, float) else str(v))
                    for k, v in values.items()])
        self._pub_diagnostics.publish(DiagnosticArray(header=convert.header(self._now()),
                                                      status=[status]))

    # ------------------------------------------------------------------------ services
    def _input_problems(self) -> list[str]:
        v = self._values
        out = []
        for what, topic, timeout_name, problem in (
                ("frame", self._image_topic, "io.image_timeout_s", self._frame_problem),
                ("joints", itf.TOPIC_JOINT_STATES, "io.joint_state_timeout_s",
                 self._joint_problem)):
            age = self._age(what)
            detail = f": {problem}" if problem else ""
            if age == math.inf:
                out.append(f"inputs: nothing usable received on {topic}{detail}")
            elif age > v[timeout_name]:
                out.append(f"inputs: last usable message on {topic} is {age:.2f} s old "
                           f"({timeout_name} = {v[timeout_name]}){detail}")
        if self._camera_problem:
            out.append(f"inputs: {self._camera_problem}")
        elif self._age("frame") <= v["io.image_timeout_s"] and self._pair_problem \
                and self._joints is not None and self._joints.span() is not None:
            out.append(f"inputs: {self._pair_problem}")
        if v["io.require_permit"] and not self._permit_ok():
            out.append(f"permit: no fresh True on {itf.TOPIC_MOTION_PERMIT} "
                       f"(io.require_permit; io.permit_timeout_s = {v['io.permit_timeout_s']})")
        # The run recorder listens to the command topic too; it is not an arm controller.
        subscribers = sum(1 for info in self.get_subscriptions_info_by_topic(self._command_topic)
                          if info.node_name != itf.RECORDER_NODE)
        publishers = self.count_publishers(self._command_topic)
        if subscribers == 0:
            out.append(f"command_topic: nobody subscribes to {self._command_topic}; the arm's "
                       "controller must listen there (remap it)")
        if publishers > 1:
            out.append(f"command_topic: {publishers - 1} other publisher(s) on "
                       f"{self._command_topic}; only one node may command the arm")
        return out

    def _reference_problems(self) -> list[str]:
        if self._problems["vision"]:
            return [f"reference: perception not ready: {self._problems['vision']}"]
        if self._reference is None:
            return ["reference: none loaded (set reference.file or call "
                    f"{itf.SRV_CAPTURE_REFERENCE})"]
        if self._values["depth.source"] == "taught" and self._reference.depths is None:
            return [f"reference: {self._values['reference.file']} has no depths, which "
                    "depth.source=taught needs (teach with a camera model and a target with "
                    "geometry, or set depth.source)"]
        return []

    def _enable_problems(self) -> list[str]:
        out = [f"parameters: {e}" for e in self._parameter_problems()]
        for check in ("robot_model", "servo"):
            if self._problems[check]:
                out.append(f"{check}: {self._problems[check]}")
        if self.servo is None and not out:
            out.append("servo: not built")
        return out + self._reference_problems() + self._input_problems()

    def _start_problems(self) -> list[str]:
        servo = self.servo
        if servo is None:
            return self._enable_problems()
        if not servo.enabled:
            return [f"state: motion is not enabled (call {itf.SRV_ENABLE_MOTION} first)"]
        if servo.state not in ("armed", "converged", "halted"):
            return [f"state: a run is in progress (state {servo.state}); stop it first"]
        out = self._reference_problems() + self._input_problems()
        q = self._joints.latest() if self._joints is not None else None
        if q is not None:
            out += [f"joints: {line}" for line in servo.joints_outside_limits(q)]
        if out:
            return out
        s = servo.settings
        obs, info, rx = self._last_obs if self._last_obs else (None, None, None)
        if info is None or time.monotonic() - rx > self._values["io.image_timeout_s"]:
            return ["features: no fresh image has been processed yet"]
        if obs is None or len(obs.keys) < s.min_features:
            return [f"features: {info.n_matched} matched, control.min_features = "
                    f"{s.min_features}" + (f" ({info.reason})" if info.reason else "")]
        rms = _rms(info.uv - info.uv_ref)
        if rms > s.max_initial_error_px:
            return [f"initial_error: RMS image error {rms:.1f} px > "
                    f"control.max_initial_error_px = {s.max_initial_error_px}"]
        return []

    def _refuse(self, response, what: str, problems: list[str]):
        response.success = False
        response.message = f"{what} refused: " + "; ".join(problems)
        self.get_logger().warning(response.message)
        return response

    @_guarded_service
    def _srv_enable(self, request, response):
        with self._lock:
            servo, t = self.servo, self._servo_time()
            if not request.data:
                if servo is None:
                    response.success, response.message = True, "motion disabled (no servo yet)"
                else:
                    response.success, response.message = servo.enable(False, t)
                self.get_logger().info(response.message)
                return response
            if servo is not None and servo.enabled:
                response.success = True
                response.message = f"motion already enabled (state {servo.state})"
                return response
            problems = (["node: shutting down"] if self._shutting_down
                        else self._enable_problems())
            if problems:
                return self._refuse(response, "enable", problems)
            servo.enable(True, t)
            response.success, response.message = True, (
                f"motion enabled: state {servo.state}; call {itf.SRV_START} to servo")
            self.get_logger().info(response.message)
            return response

    @_guarded_service
    def _srv_start(self, request, response):
        with self._lock:
            problems = (["node: shutting down"] if self._shutting_down
                        else self._start_problems())
            if problems:
                return self._refuse(response, "start", problems)
            self._runs += 1
            run_id = f"{datetime.datetime.now():%Y%m%d-%H%M%S}-{self._runs}"
            ok, message = self.servo.start(self._joints.latest(), self._servo_time(), run_id)
            if ok:
                self._announced = ""
                self._output.reset()
            response.success, response.message = ok, message
            self.get_logger().info(message)
            return response

    @_guarded_service
    def _srv_stop(self, request, response):
        with self._lock:
            if self.servo is None:
                response.success, response.message = True, "nothing to stop (no servo yet)"
            else:
                response.success, response.message = self.servo.stop(self._servo_time())
            self.get_logger().info(response.message)
            return response

    @_guarded_service
    def _srv_capture(self, request, response):
        with self._lock:
            servo, perception, last = self.servo, self.perception, self._last_image
            problems = []
            if servo is not None and servo.state in MOVING_STATES:
                problems.append(f"state: cannot teach while a run moves (state {servo.state});"
                                " stop first")
            if last is None or self._age("frame") > self._values["io.image_timeout_s"]:
                problems.append(f"inputs: no fresh image on {self._image_topic}")
            elif self._camera_problem:
                problems.append(f"inputs: {self._camera_problem}")
            elif perception is None:
                problems.append(f"perception: {self._problems['vision']}")
            name, directory = self._values["reference.name"], self._values["reference.directory"]
        if problems:
            return self._refuse(response, "capture_reference", problems)
        image = last[0]
        try:
            path = reference_path(directory, name)
            reference = perception.capture(image, name)
            save_reference(reference, path)
        except (ValueError, OSError) as exc:
            return self._refuse(response, "capture_reference", [f"teach: {exc}"])
        result = self.set_parameters([Parameter("reference.file", value=str(path))])[0]
        if not result.successful:
            return self._refuse(response, "capture_reference",
                                [f"load: saved {path} but could not load it: {result.reason}"])
        response.success = True
        response.message = (f"reference {name!r} taught ({len(reference.keys)} features) and "
                            f"saved to {path}; loaded")
        self.get_logger().info(response.message)
        return response

    # ------------------------------------------------------------------------ plumbing
    def _make_publishers(self) -> None:
        kind = self._values["io.command_interface"]
        command = {"joint_velocity": (Float64MultiArray, itf.TOPIC_JOINT_VELOCITY_CMD),
                   "joint_trajectory": (JointTrajectory, itf.TOPIC_JOINT_TRAJECTORY_CMD)}.get(
            kind, (TwistStamped, itf.TOPIC_TWIST_CMD))
        self._pub_command = self.create_publisher(*command, qos.COMMANDS)
        self._command_topic = self._pub_command.topic_name
        self._pub_status = self.create_publisher(String, itf.TOPIC_STATUS, qos.STATE)
        self._pub_feature_error = self.create_publisher(Float64MultiArray, itf.TOPIC_FEATURE_ERROR,
                                                        qos.STATE)
        self._pub_error_rms = self.create_publisher(Float64, itf.TOPIC_ERROR_RMS, qos.STATE)
        self._pub_features = self.create_publisher(Float64MultiArray, itf.TOPIC_FEATURES,
                                                   qos.STATE)
        self._pub_camera_twist = self.create_publisher(TwistStamped, itf.TOPIC_CAMERA_TWIST,
                                                       qos.STATE)
        self._pub_result = self.create_publisher(String, itf.TOPIC_RUN_RESULT, qos.LATCHED)
        self._pub_overlay = self.create_publisher(Image, itf.TOPIC_OVERLAY, qos.SENSOR_DATA)
        self._pub_diagnostics = self.create_publisher(DiagnosticArray, itf.TOPIC_DIAGNOSTICS,
                                                      qos.STATE)

    def _make_subscriptions(self) -> None:
        v = self._values
        if v["io.compressed_image"]:
            sub = self.create_subscription(CompressedImage, itf.TOPIC_IMAGE_COMPRESSED,
                                           self._on_compressed_image, qos.SENSOR_DATA)
        else:
            sub = self.create_subscription(Image, itf.TOPIC_IMAGE, self._on_raw_image,
                                           qos.SENSOR_DATA, raw=True)
        self._image_topic = sub.topic_name
        if v["depth.source"] == "depth_image":
            self.create_subscription(Image, itf.TOPIC_DEPTH, self._on_depth, qos.SENSOR_DATA)
        self.create_subscription(CameraInfo, itf.TOPIC_CAMERA_INFO, self._on_camera_info,
                                 qos.SENSOR_DATA)
        self.create_subscription(JointState, itf.TOPIC_JOINT_STATES, self._on_joint_state,
                                 qos.STATE_IN)
        self.create_subscription(Float64, itf.TOPIC_SPEED_SCALE, self._on_speed_scale,
                                 qos.STATE_IN)
        self.create_subscription(Bool, itf.TOPIC_MOTION_PERMIT, self._on_permit, qos.STATE_IN)
        if v["io.sim_truth"]:   # a simulated cell's ground truth, never on a real arm
            self.create_subscription(PoseStamped, itf.TOPIC_SIM_CAMERA_POSE_TRUTH,
                                     functools.partial(self._on_truth, "camera"), qos.STATE)
            self.create_subscription(PoseStamped, itf.TOPIC_SIM_TAUGHT_POSE,
                                     functools.partial(self._on_truth, "taught"), qos.LATCHED)

    def _now(self) -> float:
        """Node time (ROS time; simulated with use_sim_time), seconds: stamps of what the node
        publishes, and the clock input stamps are checked against."""
        return self.get_clock().now().nanoseconds * 1e-9

    @staticmethod
    def _servo_time() -> float:
        """The servo's one clock (steady, seconds): run start, every output tick, frame
        receipt and so every timeout and run time. Image stamps only pair frames with joint
        states."""
        return time.monotonic()

    def _warn(self, key: str, message: str, every_s: float = 5.0) -> None:
        """Log a warning at most every ``every_s`` seconds per key."""
        now = time.monotonic()
        if now - self._warned.get(key, -math.inf) >= every_s:
            self._warned[key] = now
            self.get_logger().warning(message)

    def _internal_error(self, where: str, exc: Exception) -> None:
        self._warn(f"internal:{where}", f"internal error in {where}: "
                   f"{type(exc).__name__}: {exc}", every_s=1.0)
        with self._lock:
            self._halt("internal_error")

    def finish_for_shutdown(self) -> bool:
        """Called while the node keeps spinning after a stop was asked for (signal): the first
        call halts a moving run (reason ``shutdown``); True once no run moves and the explicit
        zero is out. Enable and start are refused from the first call on."""
        with self._lock:
            servo = self.servo
            if not self._shutting_down:
                self._shutting_down = True
                if servo is not None and servo.state in ACTIVE_RUN:
                    servo.halt("shutdown", self._servo_time(), "the node was asked to stop "
                               "(SIGINT/SIGTERM); braking before it exits")
                    self.get_logger().warning("stop requested during a run: braking to zero")
            return not self._commanding and (servo is None or servo.state not in MOVING_STATES)

    def shutdown(self) -> None:
        """Stop the perception thread; an explicit zero if a run was still commanding the arm
        (finish_for_shutdown ran out of time), and wait (bounded) until the arm's controller
        acknowledged the last command."""
        self._shutting_down = True
        self._output_loop.stop()     # no output tick runs after this (bounded wait)
        self._frames.close()
        self._worker.join(timeout=2.0)
        with self._lock:
            q = self._joints.latest() if self._joints is not None else None
            if self._commanding:
                self._publish_command(np.zeros(self.arm.n),
                                      q if q is not None else np.zeros(self.arm.n))
                self._commanding = False
                self.get_logger().warning("shutting down during a run: explicit zero sent")
            if self._command_sent:
                try:
                    acked = self._pub_command.wait_for_all_acked(
                        Duration(seconds=SHUTDOWN_ACK_S))
                except Exception:  # noqa: BLE001 - best effort while the context ends
                    acked = False
                if not acked:
                    self.get_logger().warning(
                        f"the last command was not acknowledged within {SHUTDOWN_ACK_S} s")


    def destroy_node(self) -> None:
        """Stop the output thread before the publishers go (shutdown() normally did)."""
        self._output_loop.stop()
        super().destroy_node()


def _no_features() -> Observation:
    """The observation of an image in which nothing matched (the servo halts on it)."""
    return Observation((), np.zeros((0, 2)), np.zeros((0, 2)))


def _rms(error_px: np.ndarray) -> float:
    """RMS length of (M, 2) pixel error vectors; NaN for none."""
    if len(error_px) == 0:
        return math.nan
    return float(np.sqrt(np.mean(np.sum(np.asarray(error_px) ** 2, axis=1))))


def main(args=None) -> int:
    """Console entry point of ``vservo_node``; parameters from ``--ros-args``."""
    # Our own signal handling: the context must outlive SIGINT/SIGTERM long enough to send the
    # explicit zero of a run in progress.
    install_signal_handlers()
    run_node("vservo_node", ControllerNode, ControllerNode.shutdown, args, own_signals=True,
             finish=ControllerNode.finish_for_shutdown)
    return 0


if __name__ == "__main__":
    sys.exit(main())
