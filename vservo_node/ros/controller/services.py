"""The supervisor's services: ``servo/enable_motion``, ``servo/start``, ``servo/stop`` and
``servo/capture_reference``, and the checks each call runs. Every refusal names the failing
checks as ``check: detail`` (the state x service table is in ``controller_node.py``).

The services exist from configure to cleanup; enable (true), start and capture are refused
unless the node is active, stop and enable (false) always succeed.
"""
from __future__ import annotations

import datetime
import math
import time

from rclpy.parameter import Parameter
from std_srvs.srv import SetBool, Trigger

from vservo_node import interface as itf
from vservo_node.ros.controller.guards import guarded_service
from vservo_node.ros.controller.outputs import rms
from vservo_node.servo import MOVING_STATES
from vservo_node.vision.reference import joints_at_capture, reference_path, save_reference
from vservo_node.ros.controller.state import ControllerState


class SupervisorServices(ControllerState):
    """Mixin of ControllerNode: the supervisor's services."""

    def _make_services(self) -> None:
        self._services_made = [self.create_service(srv_type, name, callback) for
                               srv_type, name, callback in (
            (SetBool, itf.SRV_ENABLE_MOTION, self._srv_enable),
            (Trigger, itf.SRV_START, self._srv_start),
            (Trigger, itf.SRV_STOP, self._srv_stop),
            (Trigger, itf.SRV_CAPTURE_REFERENCE, self._srv_capture))]

    def _destroy_services(self) -> None:
        for service in self._services_made:
            self.destroy_service(service)
        self._services_made = []

    # ------------------------------------------------------------------------ checks
    def _node_problems(self) -> list[str]:
        """The node itself: shutting down, or not active (lifecycle)."""
        if self._shutting_down:
            return ["node: shutting down"]
        if not self._active:
            return [f"node: not active (lifecycle state {self._lifecycle_label()}); "
                    "activate it first"]
        return []

    def _input_problems(self) -> list[str]:
        io = self.settings.io
        out = []
        for what, topic, timeout_name, timeout, problem in (
                ("frame", self._image_topic, "io.image_timeout_s", io.image_timeout_s,
                 self._frame_problem),
                ("joints", itf.TOPIC_JOINT_STATES, "io.joint_state_timeout_s",
                 io.joint_state_timeout_s, self._joint_problem)):
            age = self._age(what)
            detail = f": {problem}" if problem else ""
            if age == math.inf:
                out.append(f"inputs: nothing usable received on {topic}{detail}")
            elif age > timeout:
                out.append(f"inputs: last usable message on {topic} is {age:.2f} s old "
                           f"({timeout_name} = {timeout}){detail}")
        if self._camera_problem:
            out.append(f"inputs: {self._camera_problem}")
        elif self._age("frame") <= io.image_timeout_s and self._pair_problem \
                and self._joints is not None and self._joints.span() is not None:
            out.append(f"inputs: {self._pair_problem}")
        if io.require_permit and not self._permit_ok():
            out.append(f"permit: no fresh True on {itf.TOPIC_MOTION_PERMIT} "
                       f"(io.require_permit; io.permit_timeout_s = {io.permit_timeout_s})")
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
        if self.settings.depth.source == "taught" and self._reference.depths is None:
            return [f"reference: {self.settings.reference.file} has no depths, which "
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
        if info is None or rx is None or \
                time.monotonic() - rx > self.settings.io.image_timeout_s:
            return ["features: no fresh image has been processed yet"]
        if obs is None or len(obs.keys) < s.min_features:
            return [f"features: {info.n_matched} matched, control.min_features = "
                    f"{s.min_features}" + (f" ({info.reason})" if info.reason else "")]
        error = rms(info.uv - info.uv_ref)
        if error > s.max_initial_error_px:
            return [f"initial_error: RMS image error {error:.1f} px > "
                    f"control.max_initial_error_px = {s.max_initial_error_px}"]
        return []

    def _refuse(self, response, what: str, problems: list[str]):
        response.success = False
        response.message = f"{what} refused: " + "; ".join(problems)
        self.get_logger().warning(response.message)
        return response

    # ------------------------------------------------------------------------ services
    @guarded_service
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
            problems = self._node_problems() or self._enable_problems()
            if problems:
                return self._refuse(response, "enable", problems)
            servo.enable(True, t)
            response.success, response.message = True, (
                f"motion enabled: state {servo.state}; call {itf.SRV_START} to servo")
            self.get_logger().info(response.message)
            return response

    @guarded_service
    def _srv_start(self, request, response):
        with self._lock:
            self._rebuild_vision_if_due()
            problems = self._node_problems() or self._start_problems()
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

    @guarded_service
    def _srv_stop(self, request, response):
        with self._lock:
            if self.servo is None:
                response.success, response.message = True, "nothing to stop (no servo yet)"
            else:
                response.success, response.message = self.servo.stop(self._servo_time())
            self.get_logger().info(response.message)
            return response

    @guarded_service
    def _srv_capture(self, request, response):
        with self._lock:
            self._rebuild_vision_if_due()
            servo, perception, last = self.servo, self.perception, self._last_image
            problems = self._node_problems()
            if problems:
                return self._refuse(response, "capture_reference", problems)
            if servo is not None and servo.state in MOVING_STATES:
                problems.append(f"state: cannot teach while a run moves (state {servo.state});"
                                " stop first")
            if last is None or self._age("frame") > self.settings.io.image_timeout_s:
                problems.append(f"inputs: no fresh image on {self._image_topic}")
            elif self._camera_problem:
                problems.append(f"inputs: {self._camera_problem}")
            elif perception is None:
                problems.append(f"perception: {self._problems['vision']}")
            name, directory = self.settings.reference.name, self.settings.reference.directory
            q, why = self._pair(last[1]) if last is not None else (None, "")
            joint_names = self.arm.joint_names if self.arm is not None else None
        if problems:
            return self._refuse(response, "capture_reference", problems)
        image = last[0]
        try:
            path = reference_path(directory, name)
            reference, joints_note = joints_at_capture(perception.capture(image, name),
                                                       joint_names, q, why)
            save_reference(reference, path)
        except (ValueError, OSError) as exc:
            return self._refuse(response, "capture_reference", [f"teach: {exc}"])
        result = self.set_parameters([Parameter("reference.file", value=str(path))])[0]
        if not result.successful:
            return self._refuse(response, "capture_reference",
                                [f"load: saved {path} but could not load it: {result.reason}"])
        response.success = True
        response.message = (f"reference {name!r} taught ({len(reference.keys)} features) and "
                            f"saved to {path}; loaded" + (f"; {joints_note}" if joints_note
                                                          else ""))
        self.get_logger().info(response.message)
        return response
