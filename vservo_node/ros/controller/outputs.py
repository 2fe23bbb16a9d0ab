"""The controller's outputs: the command message per command interface (``CommandOutput``)
and everything else it publishes (``Publishing``): status, features, overlay, run result,
diagnostics.

The publishers are lifecycle publishers, created on configure: they publish only while the
node is active (rclpy drops what is published otherwise), so the node's transitions order
the explicit zero before deactivating them (``node.py``).
"""
from __future__ import annotations

import json
import math
import time

import cv2
import numpy as np
from diagnostic_msgs.msg import DiagnosticArray, DiagnosticStatus, KeyValue
from geometry_msgs.msg import TwistStamped
from sensor_msgs.msg import Image
from std_msgs.msg import Float64, Float64MultiArray, String
from trajectory_msgs.msg import JointTrajectory

from vservo_node import interface as itf
from vservo_node import params
from vservo_node.control.kinematics import ArmModel
from vservo_node.ros import convert, qos
from vservo_node.ros.controller.guards import guarded
from vservo_node.vision import image_io
from vservo_node.ros.controller.state import ControllerState

json_safe = itf.json_safe


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
        self._position: np.ndarray | None = None

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


def rms(error_px: np.ndarray) -> float:
    """RMS length of (M, 2) pixel error vectors; NaN for none."""
    if len(error_px) == 0:
        return math.nan
    return float(np.sqrt(np.mean(np.sum(np.asarray(error_px) ** 2, axis=1))))


def command_topic_type(kind: str) -> tuple[type, str]:
    """(message type, topic) of a command interface."""
    return {"joint_velocity": (Float64MultiArray, itf.TOPIC_JOINT_VELOCITY_CMD),
            "joint_trajectory": (JointTrajectory, itf.TOPIC_JOINT_TRAJECTORY_CMD)}.get(
        kind, (TwistStamped, itf.TOPIC_TWIST_CMD))


class Publishing(ControllerState):
    """Mixin of ControllerNode: the publishers and what goes on them."""

    def _make_publishers(self) -> None:
        pub = self.create_lifecycle_publisher
        self._pub_command = pub(*command_topic_type(self.settings.io.command_interface),
                                qos.COMMANDS)
        self._command_topic = self._pub_command.topic_name
        self._pub_status = pub(String, itf.TOPIC_STATUS, qos.STATE)
        self._pub_feature_error = pub(Float64MultiArray, itf.TOPIC_FEATURE_ERROR, qos.STATE)
        self._pub_error_rms = pub(Float64, itf.TOPIC_ERROR_RMS, qos.STATE)
        self._pub_features = pub(Float64MultiArray, itf.TOPIC_FEATURES, qos.STATE)
        self._pub_camera_twist = pub(TwistStamped, itf.TOPIC_CAMERA_TWIST, qos.STATE)
        self._pub_result = pub(String, itf.TOPIC_RUN_RESULT, qos.LATCHED)
        self._pub_overlay = pub(Image, itf.TOPIC_OVERLAY, qos.SENSOR_DATA)
        self._pub_diagnostics = pub(DiagnosticArray, itf.TOPIC_DIAGNOSTICS, qos.STATE)
        self._publishers_made = [self._pub_command, self._pub_status, self._pub_feature_error,
                                 self._pub_error_rms, self._pub_features,
                                 self._pub_camera_twist, self._pub_result, self._pub_overlay,
                                 self._pub_diagnostics]

    def _destroy_publishers(self) -> None:
        for publisher in self._publishers_made:
            self.destroy_lifecycle_publisher(publisher)
        self._publishers_made = []

    def _publish_command(self, cmd: np.ndarray, q: np.ndarray) -> None:
        if self._output is None:
            raise RuntimeError("no command output: no robot model")
        self._pub_command.publish(self._output.message(cmd, q, self._now()))
        self._command_sent = True

    def _publish_result(self, result: dict) -> None:
        self._pub_result.publish(String(data=json.dumps(json_safe(
            {k: result.get(k) for k in itf.RESULT_FIELDS}))))

    def _publish_status(self, servo, status: dict) -> None:
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
        self._pub_error_rms.publish(Float64(data=rms(error)))

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
        label = f"{state}  rms {rms(info.uv - info.uv_ref):.2f} px  matched {info.n_matched}"
        cv2.putText(canvas, label, (8, 20), cv2.FONT_HERSHEY_SIMPLEX, 0.5, (255, 255, 255), 1,
                    cv2.LINE_AA)
        self._pub_overlay.publish(convert.numpy_to_image(canvas, "bgr8", t, frame_id))

    @guarded
    def _on_diagnostics_timer(self) -> None:
        lost = self._frame_loss.check(time.monotonic())
        if lost:
            self._warn("frame_loss", lost, every_s=10.0)
        with self._lock:
            self._rebuild_vision_if_due()
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
                "permit": "not required" if not self.settings.io.require_permit else (
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
            hardware_id=self.settings.robot.tool_frame,
            values=[KeyValue(key=k, value=f"{v:.3f}" if isinstance(v, float) else str(v))
                    for k, v in values.items()])
        self._pub_diagnostics.publish(DiagnosticArray(header=convert.header(self._now()),
                                                      status=[status]))
