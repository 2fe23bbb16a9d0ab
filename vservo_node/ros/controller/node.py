"""The controller as a managed (lifecycle) node: what each transition builds and tears down.

=============  ==========================================================================
transition     what happens
=============  ==========================================================================
(construct)    parameters declared (file values checked, problems logged); lifecycle
               services; nothing else. State ``unconfigured``.
configure      settings from the parameters; lifecycle publishers and the supervisor
               services; target and reference files read; the arm model (file, parameter or
               the robot_description topic) and the servo built. Problems (a missing file,
               a model that does not load) are kept and refuse enabling, as before; configure
               itself fails only on an unexpected error.
activate       input subscriptions and the perception thread, the diagnostics timer, the
               output thread (``OutputLoop``, steady clock); publishers enabled. Motion still
               needs ``servo/enable_motion`` and ``servo/start``.
deactivate     enable and start refused from here on; a moving run brakes (reason
               ``stop_requested``, detail naming the deactivation) and its explicit zero goes
               out while the output thread still runs (at most ``BRAKE_WAIT_S``; past that
               the thread stops and the zero is sent at once); then the output thread stops,
               motion is disabled, inputs are unsubscribed, the last command is waited on for
               acknowledgement (``SHUTDOWN_ACK_S``) and the publishers are disabled.
cleanup        publishers, services, the robot_description subscription, the arm model,
               the servo, perception and every input history dropped: ``unconfigured``.
shutdown       from any state: deactivate's steps if active, then cleanup's.
error          (a transition raised) the same as shutdown, then ``unconfigured``.
=============  ==========================================================================

A process stop (SIGINT/SIGTERM, ``node_main.run_node``) first brakes a moving run while the
executor still spins (``finish_for_shutdown``), then ``shutdown`` takes the node through the
lifecycle's shutdown transition.
"""
from __future__ import annotations

import math
import threading
import time
from collections import deque

import numpy as np
from rclpy.clock import Clock, ClockType
from rclpy.duration import Duration
from rclpy.lifecycle import LifecycleNode, LifecycleState, TransitionCallbackReturn

from vservo_node import interface as itf
from vservo_node.ros.controller import ACTIVE_RUN
from vservo_node.ros.controller.inputs import DEPTH_FRAMES, FrameSlot, InputCallbacks
from vservo_node.ros.controller.model import ModelBuilding
from vservo_node.ros.controller.output_cycle import OutputCycle
from vservo_node.ros.controller.outputs import Publishing, command_topic_type
from vservo_node.ros.controller.parameters import ParameterHandling
from vservo_node.ros.controller.services import SupervisorServices
from vservo_node.ros.frame_loss import FrameLossMonitor
from vservo_node.ros.output_loop import OutputLoop
from vservo_node.servo import MOVING_STATES

DIAGNOSTICS_PERIOD_S = 1.0
SHUTDOWN_ACK_S = 0.5       # how long deactivate/shutdown wait for the last command's ack
BRAKE_WAIT_S = 3.0         # longest deactivate/shutdown wait for a moving run to brake

SUCCESS = TransitionCallbackReturn.SUCCESS
FAILURE = TransitionCallbackReturn.FAILURE


class ControllerNode(ParameterHandling, ModelBuilding, InputCallbacks, Publishing, OutputCycle,
                     SupervisorServices, LifecycleNode):
    """The controller node; ``vservo_node.ros.controller_node`` documents its behaviour, this
    module its lifecycle."""

    def __init__(self, **node_kwargs):
        # undeclared names reach our check, which refuses them naming the nearest parameter
        # (rclpy's own refusal reads "undeclared parameter(s): []")
        node_kwargs.setdefault("allow_undeclared_parameters", True)
        super().__init__(itf.CONTROLLER_NODE, **node_kwargs)
        self._lock = threading.RLock()
        self._configured = self._active = self._shutting_down = False
        self._pending_values = self._pending_files = None
        self._warned: dict[str, float] = {}
        self._runs = 0
        self._output_loop: OutputLoop | None = None
        self._diagnostics_timer = None
        self._subscriptions_active: list = []
        self._publishers_made: list = []
        self._services_made: list = []
        self._sub_robot_description = None
        self._worker: threading.Thread | None = None
        self._declare_parameters()
        self.add_on_set_parameters_callback(self._on_set_parameters)
        self.add_post_set_parameters_callback(self._after_set_parameters)
        self._reset_state()
        self.get_logger().info(f"{itf.CONTROLLER_NODE}: unconfigured (managed node: configure "
                               "and activate it)")

    def _reset_state(self) -> None:
        """Everything configure builds and the inputs fill, as before configure."""
        self._period = self.settings.io.output_period_s
        self.arm = self.servo = self.perception = None
        self._problems = {"robot_model": "not loaded yet", "servo": "", "vision": ""}
        self._vision_files, self._vision_files_problem = None, "not configured"
        self._reference = self._camera = self._camera_key = None
        self._camera_problem = "no camera_info received"
        self._joints = None
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
        self._output = None
        self._vision_dirty = False
        self._truth = {"camera": None, "taught": None}
        self._command_sent = False       # anything published on the command topic yet
        self._last_tick, self._ticks, self._late_ticks = None, 0, 0
        self._frames = FrameSlot()
        # frames lost in transport (README, "Receiving large frames"); checked with diagnostics
        self._frame_loss = FrameLossMonitor(self.settings.io.camera_rate_hz)
        kind = self.settings.io.command_interface
        self._command_topic = command_topic_type(kind)[1]   # resolved once publishing
        self._image_topic = (itf.TOPIC_IMAGE_COMPRESSED if self.settings.io.compressed_image
                             else itf.TOPIC_IMAGE)

    # ------------------------------------------------------------------------ lifecycle
    def on_configure(self, state: LifecycleState) -> TransitionCallbackReturn:
        try:
            with self._lock:
                self._reset_state()
                self._make_publishers()
                self._make_services()
                self._set_vision_files()
                self._load_robot_from_parameters()
                self._configured = True
        except Exception as exc:  # noqa: BLE001 - a failed transition, never a dead node
            self.get_logger().error(f"configure failed: {type(exc).__name__}: {exc}")
            self._teardown()
            return FAILURE
        problems = self._parameter_problems()
        self.get_logger().info(
            f"configured: command interface {self.settings.io.command_interface} on "
            f"{self._command_topic}" + (f"; {len(problems)} parameter problem(s): enabling "
                                        "is refused until fixed" if problems else ""))
        return SUCCESS

    def on_activate(self, state: LifecycleState) -> TransitionCallbackReturn:
        result = super().on_activate(state)      # the lifecycle publishers
        if result != SUCCESS:
            return result
        with self._lock:
            self._make_subscriptions()
            steady = Clock(clock_type=ClockType.STEADY_TIME)
            self._diagnostics_timer = self.create_timer(DIAGNOSTICS_PERIOD_S,
                                                        self._on_diagnostics_timer, clock=steady)
            self._last_tick = None
            # The output tick runs on its own steady-clock thread, not as an executor timer
            # that would queue behind every subscription callback (output_loop.py says why).
            self._output_loop = OutputLoop(self._period, self._on_output_tick,
                                           on_error=self._on_output_error)
            self._output_loop.start()
            self._active = True
        self.get_logger().info("active: motion disabled; call "
                               f"{itf.SRV_ENABLE_MOTION}, then {itf.SRV_START}")
        return SUCCESS

    def on_deactivate(self, state: LifecycleState) -> TransitionCallbackReturn:
        self._bring_to_rest("the node is being deactivated (lifecycle)", "stop_requested")
        self.get_logger().info("inactive: motion disabled, inputs unsubscribed")
        return super().on_deactivate(state)

    def on_cleanup(self, state: LifecycleState) -> TransitionCallbackReturn:
        self._teardown()
        self.get_logger().info("unconfigured")
        return SUCCESS

    def on_shutdown(self, state: LifecycleState) -> TransitionCallbackReturn:
        self._shutting_down = True
        self._bring_to_rest("the node is shutting down", "shutdown")
        self._teardown()
        return SUCCESS

    def on_error(self, state: LifecycleState) -> TransitionCallbackReturn:
        self.get_logger().error(f"a lifecycle transition failed from {state.label}: bringing "
                                "the node to rest and unconfigured")
        self._bring_to_rest("a lifecycle transition failed", "internal_error")
        self._teardown()
        return SUCCESS

    def _lifecycle_label(self) -> str:
        return self._state_machine.current_state[1]

    def _bring_to_rest(self, why: str, reason: str) -> None:
        """Brake a moving run to its explicit zero while the output thread still runs, then
        stop the thread, disable motion and drop the inputs (see the module table)."""
        with self._lock:
            was_active, self._active = self._active, False
            servo = self.servo
            if servo is not None and servo.state in ACTIVE_RUN:
                servo.halt(reason, self._servo_time(), f"{why}; braking to zero")
                self.get_logger().warning(f"{why} during a run: braking to zero")
        if not was_active:
            return
        deadline = time.monotonic() + BRAKE_WAIT_S
        while time.monotonic() < deadline and not self._at_rest():
            time.sleep(self._period / 2)
        if self._output_loop is not None:
            self._output_loop.stop()
        with self._lock:
            if self._commanding:     # the brake did not finish in time: the zero now
                n = self.arm.n if self.arm is not None else 0
                q = self._joints.latest() if self._joints is not None else None
                self._publish_command(np.zeros(n), q if q is not None else np.zeros(n))
                self._commanding = False
                self.get_logger().warning(f"{why}: run still braking after {BRAKE_WAIT_S} s; "
                                          "explicit zero sent")
            if servo is not None and servo.enabled:
                servo.enable(False, self._servo_time())
            if self._diagnostics_timer is not None:
                self.destroy_timer(self._diagnostics_timer)
                self._diagnostics_timer = None
        self._destroy_subscriptions()
        self._wait_for_ack()

    def _at_rest(self) -> bool:
        with self._lock:
            return not self._commanding and (self.servo is None
                                             or self.servo.state not in MOVING_STATES)

    def _wait_for_ack(self) -> None:
        """Wait (bounded) until the arm's controller acknowledged the last command."""
        if not self._command_sent:
            return
        try:
            acked = self._pub_command.wait_for_all_acked(Duration(seconds=SHUTDOWN_ACK_S))
        except Exception:  # noqa: BLE001 - best effort while the context ends
            acked = False
        if not acked:
            self.get_logger().warning(
                f"the last command was not acknowledged within {SHUTDOWN_ACK_S} s")

    def _teardown(self) -> None:
        """What cleanup drops (module table); safe on a partly configured or partly
        activated node (the error path): threads, timer and inputs first, outside the lock
        (the perception thread may be waiting for it)."""
        if self._output_loop is not None:
            self._output_loop.stop()
        if self._diagnostics_timer is not None:
            self.destroy_timer(self._diagnostics_timer)
            self._diagnostics_timer = None
        self._destroy_subscriptions()
        with self._lock:
            self._configured = False
            self._destroy_publishers()
            self._destroy_services()
            if self._sub_robot_description is not None:
                self.destroy_subscription(self._sub_robot_description)
                self._sub_robot_description = None
            self._reset_state()

    def autostart(self) -> None:
        """Configure and activate (the plain entry point, for users without lifecycle
        tooling); a failed step is logged and leaves the node where it stopped."""
        for step, trigger in (("configure", self.trigger_configure),
                              ("activate", self.trigger_activate)):
            result = trigger()
            if result != SUCCESS:
                self.get_logger().error(f"autostart: {step} did not succeed ({result.name}); "
                                        f"node left {self._lifecycle_label()}")
                return

    # ------------------------------------------------------------------------ process stop
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
        """The lifecycle's shutdown transition, unless the node is already finalized: a run
        still commanding the arm (finish_for_shutdown ran out of time) gets its explicit zero,
        threads stop, the last command is waited on (bounded)."""
        self._shutting_down = True
        if self._lifecycle_label() == "finalized":
            return
        try:
            self.trigger_shutdown()
        except Exception as exc:  # noqa: BLE001 - rest the node by hand
            self.get_logger().error(f"shutdown transition failed: {exc}; stopping directly")
            self._bring_to_rest("the node is shutting down", "shutdown")
            self._teardown()

    def destroy_node(self) -> None:
        """Stop the output thread before the publishers go (shutdown() normally did)."""
        if self._output_loop is not None:
            self._output_loop.stop()
        self._frames.close()
        super().destroy_node()

    # ------------------------------------------------------------------------ plumbing
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
