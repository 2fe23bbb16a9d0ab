"""The output cycle: what runs every ``io.output_rate_hz`` period on the output thread while
the node is active (``vservo_node.ros.output_loop.OutputLoop``, steady clock).

One tick: the watchdogs (inputs gone stale halt a moving run), ``servo.command`` from the
latest joints, the command while a run moves, the explicit zero and the run result when it
ends, the status. Nothing here reads files or builds models (``model.py`` does, on configure
and on the parameter path). The tick never raises: an unexpected error brakes blind from the
last command (``Servo.brake_blind``) or, failing that, publishes the plainest zero.
"""
from __future__ import annotations

import math
import time

import numpy as np
from std_msgs.msg import Float64MultiArray

from vservo_node import interface as itf
from vservo_node.control import frames
from vservo_node.ros import convert
from vservo_node.ros.controller import ACTIVE_RUN
from vservo_node.servo import HALT_REASONS, MOVING_STATES, Servo
from vservo_node.ros.controller.state import ControllerState


class OutputCycle(ControllerState):
    """Mixin of ControllerNode: the output tick and the watchdogs."""

    def _on_output_tick(self) -> None:
        """The output tick (output thread). Never raises."""
        now = time.monotonic()
        if self._last_tick is not None:   # timing health: late by more than one period
            self._ticks += 1
            self._late_ticks += now - self._last_tick > 2.0 * self._period
        self._last_tick = now
        try:
            self._output_tick()
        except Exception as exc:  # noqa: BLE001 - the last-resort guard of the output path
            self._on_output_error(exc)

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
                    servo.camera_twist(q, cmd), t, self.settings.robot.camera_frame))
            elif self._commanding:
                self._end_run(servo, q)
            self._publish_status(servo, status)
            if servo.state in ("converged", "halted") and not servo.enabled:
                servo.enable(False, t)  # a run that braked on disable: 'disabled' next cycle

    def _watchdogs(self, servo: Servo, t: float) -> None:
        """Halt a moving run whose inputs went stale (receipt time, steady clock)."""
        if servo.state not in ACTIVE_RUN:
            return
        io = self.settings.io
        frame_age, paired_age, joints_age = (self._age("frame"), self._age("paired"),
                                             self._age("joints"))
        if self._camera_problem:
            servo.halt("camera_info_invalid", t, self._camera_problem)
        elif frame_age > io.image_timeout_s:
            servo.halt("image_stale", t, (self._frame_problem + "; " if self._frame_problem
                                          else "") + f"no usable image for {frame_age:.2f} s "
                       f"(io.image_timeout_s = {io.image_timeout_s} s)")
        elif joints_age > io.joint_state_timeout_s:
            servo.halt("joints_stale", t, (self._joint_problem + "; " if self._joint_problem
                                           else "") + f"no usable joint state for "
                       f"{joints_age:.2f} s (io.joint_state_timeout_s = "
                       f"{io.joint_state_timeout_s} s)")
        elif paired_age > io.image_timeout_s:
            servo.halt("frames_unpaired", t, f"{self._pair_problem} (no image paired for "
                       f"{paired_age:.2f} s; io.image_timeout_s = {io.image_timeout_s} s)")
        elif io.require_permit and not self._permit_ok():
            servo.halt("permit_withdrawn", t, f"no fresh True on {itf.TOPIC_MOTION_PERMIT} "
                       f"within io.permit_timeout_s = {io.permit_timeout_s} s"
                       if self._permit else f"False on {itf.TOPIC_MOTION_PERMIT}")

    def _end_run(self, servo: Servo, q: np.ndarray) -> None:
        """The explicit zero after a run, and the run result."""
        self._publish_command(np.zeros(len(q)), q)
        self._commanding = False
        if self._output is not None:
            self._output.reset()
        if servo.result is None:
            return
        result = dict(servo.result)
        camera, taught = self._truth["camera"], self._truth["taught"]
        if camera is not None and taught is not None:
            moved, turned = frames.pose_error(taught, camera)
            result["final_pose_error_mm"] = 1e3 * moved
            result["final_pose_error_deg"] = math.degrees(turned)
        self._publish_result(result)
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

    # ------------------------------------------------------------------------ last resort
    def _on_output_error(self, exc: BaseException) -> None:
        self._warn("output_tick", f"internal error in the output tick: "
                   f"{type(exc).__name__}: {exc}", every_s=1.0)
        with self._lock:
            self._last_resort(exc)

    def _last_resort(self, exc: BaseException) -> None:
        servo = self.servo
        if servo is None or servo.state not in MOVING_STATES and not self._commanding:
            return
        servo.halt("internal_error", self._servo_time(), f"{type(exc).__name__}: {exc}")
        cmd, _ = servo.brake_blind(self._servo_time(), self._period)
        try:
            q = self._joints.latest() if self._joints is not None else None
            self._publish_command(cmd, q if q is not None else np.zeros(len(cmd)))
        except Exception:  # noqa: BLE001 - the plainest zero we can send
            if self.settings.io.command_interface == "joint_velocity" and self._output:
                self._pub_command.publish(Float64MultiArray(data=[0.0] * len(self._output.order)))
        self._commanding = servo.state in MOVING_STATES

    def _halt(self, reason: str, detail: str = "") -> None:
        if self.servo is not None:
            self.servo.halt(reason, self._servo_time(), detail)
