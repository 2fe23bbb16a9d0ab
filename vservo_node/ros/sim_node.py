"""The simulated cell as a ROS 2 node (executable ``vservo_sim``): a thin shell around
``vservo_node.sim.SimCell``.

Time: the cell advances on a grid of joint-state ticks (``1 / joint_state_rate`` s). A camera
frame is exposed on the tick nearest to each multiple of the camera period, so every image
stamp (the exposure time) equals the stamp of a joint state published on the same tick. With
``publish_clock`` the stamps are simulated time from 0 and ``/clock`` carries it (subscribers
set ``use_sim_time``); without it they are the wall clock at start plus simulated time, which
only stays honest at ``real_time_factor`` 1 in free-running mode, so other settings require
``publish_clock``. Without it the loop keeps its stamps honest on a machine too busy for real
time: more than 0.1 s behind the wall clock, it skips ahead without publishing the skipped
ticks (logged). ``publish_clock`` defaults to this node's own ``use_sim_time``, so a launch
that sets ``use_sim_time`` on every node gets a simulator that publishes the clock they follow
(and stamps in it), and a plain start gets wall-clock stamps; set it explicitly only to differ
(a warning says so when ``use_sim_time`` is true and ``publish_clock`` false).

Modes:
- free-running: one loop thread steps the cell tick by tick, paced to ``real_time_factor``
  (0: as fast as the machine goes), applying the newest command at each tick.
- ``lock_step``: after publishing a frame the loop waits for one controller command, applies
  it, then advances exactly one camera period (publishing every joint state and clock tick on
  the way) and publishes the next frame. Deterministic and as fast as the controller. If no
  command comes for ``lock_step_resend`` s of wall time the current frame is sent again, so a
  controller that subscribed late still gets a first image.

Ground truth: ``sim/camera_pose_truth`` and the latched ``sim/taught_camera_pose`` carry the
pose the arrival tolerances judge (``SimCell.judged_pose``): the camera's for a wrist camera,
the tool's for a scenario with a fixed camera (``mount``; the camera stands still there), so
the controller's true final pose error (``io.sim_truth``) is the tool's.

Commands (reliable QoS): joint velocities as std_msgs/Float64MultiArray in
``command_joint_order`` (default: the arm's chain order), or a single-point
trajectory_msgs/JointTrajectory (positions or velocities, joints by name). A refused command is
logged with its reason and ignored; the cell brakes by itself once ``command_timeout`` passes
without a command.

Moves of its own (std_srvs/Trigger, what an operator's pendant does on a real cell; the
teach flow of ``vservo teach --sim`` uses them): ``sim/go_to_taught_pose`` and
``sim/go_to_start_pose`` move the arm to the scenario's taught joints or back to its start
joints along one cubic per joint at no more than ``move_speed_scale`` of each joint's URDF
velocity limit (the single-point trajectory of ``SimArm.command_position``), and answer once
the arm rests there (within 1e-6 rad, under 1e-5 rad/s) and a camera frame exposed at rest
has been published. Refused, with the reason, while the arm follows controller commands (one
arrived within the cell's command timeout) or still moves, and while another move runs. A
controller command arriving during a move takes over the arm (as on a real cell) and the move
answers that it was interrupted. In lock-step mode the cell advances by itself during a move,
and a move may start while the arm still has speed (time stands still between commands, so it
would never come to rest): the cubic starts from the arm's velocity.
"""
from __future__ import annotations

import sys
import threading
import time
from dataclasses import dataclass

import numpy as np
import rclpy
from rcl_interfaces.msg import FloatingPointRange, ParameterDescriptor
from rclpy.callback_groups import MutuallyExclusiveCallbackGroup
from rclpy.exceptions import ParameterException
from rclpy.executors import MultiThreadedExecutor
from rclpy.node import Node
from rclpy.parameter import Parameter
from rosgraph_msgs.msg import Clock
from sensor_msgs.msg import CameraInfo, Image, JointState
from geometry_msgs.msg import PoseStamped
from std_msgs.msg import Float64MultiArray, String
from std_srvs.srv import Trigger
from trajectory_msgs.msg import JointTrajectory

from vservo_node import interface
from vservo_node.ros import convert, qos
from vservo_node.ros.node_main import run_node
from vservo_node.sim import SimCell, load_scenario


@dataclass(frozen=True)
class _Spec:
    default: object
    description: str
    low: float | None = None
    high: float | None = None


# Read-only: the loop is built around them at start (change them by restarting the node).
PARAMETERS = {
    "scenario": _Spec("tray_offset", "scenario: shipped name or path of a scenario YAML"),
    "joint_state_rate": _Spec(250.0, "joint state publication and integration rate, Hz "
                              "(>= the scenario's camera rate)", 1.0, 2000.0),
    "lock_step": _Spec(False, "advance exactly one camera frame per received command"),
    "lock_step_resend": _Spec(0.5, "lock-step: wall seconds without a command before the "
                              "current frame is sent again", 0.05, 60.0),
    "publish_clock": _Spec(None, "publish simulated time on /clock and stamp with it; "
                           "default: the node's use_sim_time"),
    "real_time_factor": _Spec(1.0, "simulated seconds per wall second; 0 = as fast as "
                              "possible (needs publish_clock unless 1)", 0.0, 100.0),
    "command_timeout": _Spec(0.0, "seconds of simulated time without a velocity command "
                             "before the arm brakes to rest; 0 = the scenario's", 0.0, 10.0),
    "command_joint_order": _Spec(Parameter.Type.STRING_ARRAY, "joint names in the order of "
                                 "the values of Float64MultiArray velocity commands; unset: "
                                 "the arm's chain order"),
    "move_speed_scale": _Spec(0.25, "moves of the go_to_*_pose services: peak joint speed as "
                              "a fraction of the URDF velocity limit", 0.01, 1.0),
}
# A move of the go_to_*_pose services has arrived when every joint is this close to its goal
# and this slow (true state); the position loop gets there ~0.5 s after its cubic ends.
ARRIVED_RAD = 1e-6
AT_REST_RAD_S = 1e-5
# Wall seconds a move may take beyond its planned duration before the service gives up.
MOVE_GRACE_S = 10.0
# Free-running on wall-clock stamps: further behind the wall clock than this, the loop skips
# ahead (a few camera frames; the controller's stamp checks allow far more; common practice,
# no source).
MAX_LAG_S = 0.1


def _descriptor(name: str, spec: _Spec) -> ParameterDescriptor:
    d = ParameterDescriptor(name=name, description=spec.description, read_only=True)
    if spec.low is not None:
        d.floating_point_range = [FloatingPointRange(from_value=float(spec.low),
                                                     to_value=float(spec.high))]
    return d


class TickSchedule:
    """Simulated time on a grid of ticks of ``1 / tick_rate`` s; camera frame ``k`` is exposed
    on tick ``round(k * tick_rate / camera_rate)``."""

    def __init__(self, tick_rate: float, camera_rate: float):
        if not 0 < camera_rate <= tick_rate:
            raise ValueError(f"camera rate {camera_rate} Hz must be > 0 and <= the joint "
                             f"state rate {tick_rate} Hz")
        self.tick_rate, self.camera_rate = float(tick_rate), float(camera_rate)
        self.dt = 1.0 / self.tick_rate

    def time(self, tick: int) -> float:
        """Simulated time of ``tick``, s."""
        return tick * self.dt

    def frame_tick(self, frame: int) -> int:
        return int(round(frame * self.tick_rate / self.camera_rate))


@dataclass
class _Command:
    kind: str                 # "velocity" or "position"
    values: np.ndarray        # in the arm's joint order
    duration: float | None = None  # position: time to reach the goal, s (None: the cell's)
    source: str = "controller"     # "controller" (a command topic) or "move" (a service)


class _Move:
    """One move of the go_to_*_pose services: planned by the service thread, followed by the
    loop thread, which ends it with ``finish``."""

    def __init__(self, pose: str, goal: np.ndarray, duration: float):
        self.pose, self.goal, self.duration = pose, goal, duration
        self.t_start: float | None = None   # simulated time the loop applied it
        self.arrived = False
        self.done = threading.Event()
        self.ok, self.message = False, ""

    def finish(self, ok: bool, message: str) -> None:
        if not self.done.is_set():
            self.ok, self.message = ok, message
            self.done.set()


class SimCellNode(Node):
    """Publishes the cell's joint states, camera images and ground truth; follows commands."""

    def __init__(self, **node_kwargs):
        super().__init__(interface.SIM_NODE, **node_kwargs)
        use_sim_time = bool(self.get_parameter("use_sim_time").value)
        p = {name: self.declare_parameter(
                 name, use_sim_time if spec.default is None else spec.default,
                 _descriptor(name, spec)).value
             for name, spec in PARAMETERS.items()}
        self._check_timing(p)
        if use_sim_time and not p["publish_clock"]:
            self.get_logger().warning(
                "use_sim_time is true but publish_clock is false: this node publishes no "
                "/clock, so every node following it waits for another clock source")
        self.cell = SimCell(load_scenario(p["scenario"]),
                            command_timeout=p["command_timeout"] or None)
        self.joint_names = list(self.cell.joint_names)
        self.command_order = list(p["command_joint_order"] or self.joint_names)
        if sorted(self.command_order) != sorted(self.joint_names):
            raise ValueError(f"command_joint_order {self.command_order} must name each arm "
                             f"joint once: {self.joint_names}")
        self._to_arm = [self.command_order.index(n) for n in self.joint_names]
        self.schedule = TickSchedule(p["joint_state_rate"], self.cell.camera_rate)
        self.lock_step, self.resend_s = p["lock_step"], p["lock_step_resend"]
        self.publish_clock, self.rtf = p["publish_clock"], p["real_time_factor"]
        self._stamp_origin_ns = 0 if self.publish_clock else time.time_ns()

        self._pending: _Command | None = None
        self._command_ready = threading.Condition()
        self._stop = threading.Event()
        self.failure: Exception | None = None
        self.move_speed_scale = p["move_speed_scale"]
        self._move: _Move | None = None        # guarded by _command_ready
        self._last_command_rx = -np.inf        # monotonic time of the last controller command
        self._speed = 0.0                      # fastest true joint speed at the last tick
        self._last_q = self.cell.arm.true_state()[0]   # true joints at the last tick
        self.skipped_s = 0.0                   # simulated time skipped to keep up (no clock)

        self._pub_joints = self.create_publisher(JointState, interface.TOPIC_JOINT_STATES,
                                                 qos.STATE)
        self._pub_image = self.create_publisher(Image, interface.TOPIC_IMAGE, qos.SENSOR_DATA)
        self._pub_info = self.create_publisher(CameraInfo, interface.TOPIC_CAMERA_INFO,
                                               qos.SENSOR_DATA)
        self._pub_camera_truth = self.create_publisher(
            PoseStamped, interface.TOPIC_SIM_CAMERA_POSE_TRUTH, qos.STATE)
        self._pub_target_truth = self.create_publisher(
            PoseStamped, interface.TOPIC_SIM_TARGET_POSE_TRUTH, qos.STATE)
        self._pub_clock = (self.create_publisher(Clock, "/clock", qos.CLOCK)
                           if self.publish_clock else None)
        self._publish_latched()
        self.create_subscription(Float64MultiArray, interface.TOPIC_JOINT_VELOCITY_CMD,
                                 self._on_velocity, qos.COMMANDS)
        self.create_subscription(JointTrajectory, interface.TOPIC_JOINT_TRAJECTORY_CMD,
                                 self._on_trajectory, qos.COMMANDS)
        # The move services wait for the arm in their own group (MultiThreadedExecutor in
        # main), so commands keep arriving and can interrupt a move.
        moves = MutuallyExclusiveCallbackGroup()
        self.create_service(Trigger, interface.SRV_SIM_GO_TO_TAUGHT,
                            lambda req, res: self._srv_move("taught", res), callback_group=moves)
        self.create_service(Trigger, interface.SRV_SIM_GO_TO_START,
                            lambda req, res: self._srv_move("start", res), callback_group=moves)
        self._loop = threading.Thread(target=self._run, name="vservo_sim_loop", daemon=True)
        self.get_logger().info(
            f"scenario {p['scenario']!r}: camera {self.cell.camera_rate:g} Hz, joint states "
            f"{self.schedule.tick_rate:g} Hz, {'lock-step' if self.lock_step else 'free-running'}"
            f", real-time factor {self.rtf:g}, clock {'on' if self.publish_clock else 'off'}")

    @staticmethod
    def _check_timing(p):
        needs_clock = p["lock_step"] or p["real_time_factor"] != 1.0
        if needs_clock and not p["publish_clock"]:
            raise ValueError("lock_step or real_time_factor != 1 needs publish_clock: true "
                             "(stamps would otherwise drift from the wall clock)")

    # ----------------------------------------------------------------- life cycle
    def start(self) -> None:
        self._loop.start()

    def stop(self) -> None:
        self._stop.set()
        with self._command_ready:
            if self._move is not None:
                self._move.finish(False, "the simulator is shutting down")
            self._command_ready.notify_all()
        if self._loop.is_alive():
            self._loop.join(timeout=5.0)

    # ----------------------------------------------------------------- commands
    def _on_velocity(self, msg: Float64MultiArray) -> None:
        try:
            values = convert.joint_array_values(msg, self.command_order)[self._to_arm]
        except ValueError as exc:
            self.get_logger().error(f"velocity command refused: {exc}", throttle_duration_sec=1)
            return
        self._submit(_Command("velocity", values))

    def _on_trajectory(self, msg: JointTrajectory) -> None:
        try:
            positions, velocities, reach_s = convert.trajectory_point_values(msg, self.joint_names)
        except ValueError as exc:
            self.get_logger().error(f"trajectory command refused: {exc}",
                                    throttle_duration_sec=1)
            return
        if positions is not None:
            self._submit(_Command("position", positions, reach_s or None))
        else:
            self._submit(_Command("velocity", velocities))

    def _submit(self, command: _Command) -> None:
        if not np.isfinite(command.values).all():
            self.get_logger().error(f"{command.kind} command refused: non-finite values "
                                    f"{command.values.tolist()}", throttle_duration_sec=1)
            return
        with self._command_ready:
            if command.source == "controller":
                self._last_command_rx = time.monotonic()
            self._pending = command
            self._command_ready.notify_all()

    # ----------------------------------------------------------------- moves (services)
    def _move_problem(self) -> str:
        """Why a move cannot start now ('' when it can). Caller holds _command_ready."""
        if self._move is not None:
            return f"a move to the {self._move.pose} pose is in progress"
        age = time.monotonic() - self._last_command_rx
        timeout = self.cell.arm.dynamics.command_timeout_s
        if age < timeout or (self._pending is not None and self._pending.source == "controller"):
            return (f"the arm is following controller commands (the last came {age:.2f} s ago "
                    f"on {interface.TOPIC_JOINT_VELOCITY_CMD} or "
                    f"{interface.TOPIC_JOINT_TRAJECTORY_CMD}); stop the run first "
                    f"({interface.SRV_STOP}) and try again once the arm rests")
        # (A lock-stepped cell's time stands still between commands: its arm may never come
        # to rest, and the move's cubic starts from the arm's velocity instead.)
        if self._speed > AT_REST_RAD_S and not self.lock_step:
            return (f"the arm still moves (fastest joint {self._speed:.4f} rad/s); try again "
                    "once it rests")
        return ""

    def _move_duration(self, goal: np.ndarray, q: np.ndarray) -> float:
        """Duration of a cubic from q to goal whose peak joint speed (1.5 x the mean) is
        move_speed_scale of the URDF limit on the joint that needs longest."""
        vmax = np.asarray(self.cell.arm_model.velocity_limits, dtype=float)
        return float(np.max(1.5 * np.abs(goal - q) / (self.move_speed_scale * vmax)))

    def _srv_move(self, pose: str, response):
        """go_to_taught_pose / go_to_start_pose: move, wait until the arm rests there."""
        scenario = self.cell.scenario
        goal = np.array(scenario.q_taught if pose == "taught" else scenario.q_start, float)
        what = f"go_to_{pose}_pose"
        with self._command_ready:
            problem = self._move_problem()
            if not problem:
                q = self._last_q
                duration = self._move_duration(goal, q)
                move = _Move(pose, goal, duration)
                self._move = move
                self._pending = _Command("position", goal, duration, source="move")
                self._command_ready.notify_all()
        if problem:
            response.success, response.message = False, f"{what} refused: {problem}"
            self.get_logger().warning(response.message)
            return response
        self.get_logger().info(f"{what}: moving (largest joint travel "
                               f"{np.max(np.abs(goal - q)):.3f} rad, {duration:.2f} s)")
        rtf = self.rtf if 0 < self.rtf < 1 else 1.0
        deadline = time.monotonic() + duration / rtf + MOVE_GRACE_S
        while not move.done.wait(0.05):
            if time.monotonic() > deadline:
                move.finish(False, f"the arm did not come to rest at the {pose} pose within "
                            f"{duration / rtf + MOVE_GRACE_S:.1f} s")
        with self._command_ready:
            if self._move is move:
                self._move = None
        response.success = move.ok
        response.message = move.message if move.ok else f"{what} failed: {move.message}"
        if move.ok:   # (rclpy refuses two severities from one call site)
            self.get_logger().info(response.message)
        else:
            self.get_logger().warning(response.message)
        return response

    def _track_move(self, tick: int, t: float, with_frame: bool) -> None:
        """Loop thread, after each tick's publication: the arm's speed for the refusals, and
        the active move's arrival (ended once a frame exposed at rest has gone out)."""
        q, dq = self.cell.arm.true_state(t)
        self._last_q, self._speed = q, float(np.max(np.abs(dq)))
        move = self._move
        if move is None or move.t_start is None:
            return
        if not move.arrived:
            move.arrived = (t >= move.t_start + move.duration - 1e-9
                            and float(np.max(np.abs(q - move.goal))) <= ARRIVED_RAD
                            and self._speed <= AT_REST_RAD_S)
        if move.arrived and with_frame:
            move.finish(True, f"at the {move.pose} pose (simulated time {t:.3f} s; moved in "
                        f"{t - move.t_start:.2f} s)")

    def _take_command(self, wait_s: float | None) -> _Command | None:
        """The newest unapplied command; waits up to ``wait_s`` wall seconds if given."""
        with self._command_ready:
            if wait_s is not None and self._pending is None and not self._stop.is_set():
                self._command_ready.wait(wait_s)
            command, self._pending = self._pending, None
        return command

    def _apply(self, command: _Command | None, t: float) -> None:
        if command is None:
            return
        move = self._move
        if move is not None:
            if command.source == "move":
                move.t_start = t
            else:
                move.finish(False, f"interrupted at simulated time {t:.3f} s by a "
                            f"{command.kind} command from the controller, which now moves "
                            "the arm")
        try:
            if command.kind == "velocity":
                self.cell.command_velocity(command.values, t)
            else:
                self.cell.command_position(command.values, t, command.duration)
        except ValueError as exc:  # the cell refuses e.g. out-of-limit targets
            self.get_logger().error(f"{command.kind} command refused by the cell: {exc}",
                                    throttle_duration_sec=1)

    # ----------------------------------------------------------------- loop
    def _run(self) -> None:
        try:
            # The simulated camera is built on its first render (seconds on a busy machine):
            # build it before simulated time starts, so the first frame is not late.
            self.cell.render(0.0)
            if self.lock_step:
                self._run_lock_step()
            else:
                self._run_free()
        except Exception as exc:  # report and end the process rather than freeze silently
            if not self.context.ok():
                return  # the process is shutting down (SIGINT): publishing just failed
            self.failure = exc
            self.get_logger().fatal(f"simulation loop stopped: {type(exc).__name__}: {exc}")
            rclpy.try_shutdown(context=self.context)

    def _run_free(self) -> None:
        tick, frame = 0, 0
        pace = _Pacer(self.rtf)
        if not self.publish_clock:   # wall-clock stamps: simulated time 0 is now
            self._stamp_origin_ns = time.time_ns()
        self._publish_tick(tick, with_frame=True)
        while not self._stop.is_set():
            self._apply(self._take_command(None), self.schedule.time(tick))
            behind = pace.behind(self.schedule.time(tick))
            if not self.publish_clock and behind > MAX_LAG_S:
                # Stamps are the wall clock: rather than stamp late, skip to it (publishing
                # nothing in between), as an overloaded camera or drive drops samples.
                skip = int(behind * self.schedule.tick_rate)
                self.cell.step(skip * self.schedule.dt)
                tick += skip
                while self.schedule.frame_tick(frame + 1) <= tick:
                    frame += 1
                self.skipped_s += skip * self.schedule.dt
                self.get_logger().warning(
                    f"the simulation fell {behind:.2f} s behind the wall clock (machine too "
                    f"busy for real time); skipped ahead ({self.skipped_s:.2f} s so far)",
                    throttle_duration_sec=5.0)
            self.cell.step(self.schedule.dt)
            tick += 1
            exposed = tick == self.schedule.frame_tick(frame + 1)
            frame += exposed
            pace.wait_until(self.schedule.time(tick))
            self._publish_tick(tick, with_frame=exposed)

    def _run_lock_step(self) -> None:
        tick, frame = 0, 0
        pace = _Pacer(self.rtf)
        self._publish_tick(tick, with_frame=True)
        while not self._stop.is_set():
            moving = self._move is not None   # a move advances without controller commands
            command = self._take_command(None if moving else self.resend_s)
            if command is None and not moving:
                if not self._stop.is_set():  # nobody answered: send the tick again
                    self._publish_tick(tick, with_frame=True)
                continue
            self._apply(command, self.schedule.time(tick))
            frame += 1
            while tick < self.schedule.frame_tick(frame) and not self._stop.is_set():
                self.cell.step(self.schedule.dt)
                tick += 1
                pace.wait_until(self.schedule.time(tick))
                self._publish_tick(tick, with_frame=tick == self.schedule.frame_tick(frame))

    # ----------------------------------------------------------------- publishing
    def _stamp(self, t: float):
        """builtin Time of simulated time ``t``, exact to the nanosecond."""
        return convert.ns_to_time(self._stamp_origin_ns + round(t * 1e9))

    def _publish_tick(self, tick: int, with_frame: bool) -> None:
        t = self.schedule.time(tick)
        stamp = self._stamp(t)
        if self._pub_clock is not None:
            self._pub_clock.publish(Clock(clock=stamp))
        q, dq = self.cell.joint_state(t)
        self._pub_joints.publish(convert.joint_state(self.joint_names, q, dq, stamp))
        if with_frame:
            self._publish_frame(tick)
        self._track_move(tick, t, with_frame)

    def _publish_frame(self, tick: int) -> None:
        """Ground truth, camera info and the image exposed at ``tick``, all with its stamp."""
        t = self.schedule.time(tick)
        stamp = self._stamp(t)
        base = self.cell.base_frame
        self._pub_camera_truth.publish(convert.matrix_to_pose(self.cell.judged_pose(t), stamp,
                                                              base))
        self._pub_target_truth.publish(convert.matrix_to_pose(self.cell.target_pose(t), stamp,
                                                              base))
        camera_frame = self.cell.camera_frame
        self._pub_info.publish(convert.model_to_camera_info(self.cell.camera_info, stamp,
                                                            camera_frame))
        self._pub_image.publish(convert.numpy_to_image(self.cell.render(t), "rgb8", stamp,
                                                       camera_frame))

    def _publish_latched(self) -> None:
        """robot_description and the taught camera pose, once, for late joiners too."""
        description = self.create_publisher(String, interface.TOPIC_ROBOT_DESCRIPTION,
                                            qos.LATCHED)
        description.publish(String(data=self.cell.urdf))
        taught = self.create_publisher(PoseStamped, interface.TOPIC_SIM_TAUGHT_POSE, qos.LATCHED)
        taught.publish(convert.matrix_to_pose(self.cell.taught_judged_pose, self._stamp(0.0),
                                              self.cell.base_frame))


class _Pacer:
    """Sleeps so that simulated time advances ``rtf`` times as fast as the wall clock
    (rtf 0: never sleeps)."""

    def __init__(self, rtf: float):
        self.rtf = rtf
        self.wall_start = time.monotonic()

    def behind(self, sim_time: float) -> float:
        """Wall seconds by which ``sim_time`` is late (0 when on time, or for rtf 0)."""
        if self.rtf <= 0:
            return 0.0
        return max(0.0, time.monotonic() - (self.wall_start + sim_time / self.rtf))

    def wait_until(self, sim_time: float) -> None:
        if self.rtf > 0:
            delay = self.wall_start + sim_time / self.rtf - time.monotonic()
            if delay > 0:
                time.sleep(delay)


def main(args=None) -> int:
    """Console entry point of ``vservo_sim``: parameters from ``--ros-args``."""
    # Two threads: a move service waits for the arm while commands keep arriving.
    node = run_node("vservo_sim", SimCellNode, SimCellNode.stop, args,
                    start_errors=(ValueError, FileNotFoundError, ParameterException),
                    start=SimCellNode.start, own_signals=True,
                    make_executor=lambda: MultiThreadedExecutor(num_threads=2))
    if node is None:
        return 2
    return 1 if node.failure else 0


if __name__ == "__main__":
    sys.exit(main())
