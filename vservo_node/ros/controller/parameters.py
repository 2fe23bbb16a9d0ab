"""The controller's ROS parameters: declaration from ``params.SCHEMA`` with descriptors, the
live-change check (all-or-nothing) and its application.

Every value the node reads comes from ``self.settings`` (``vservo_node.settings.Settings``),
rebuilt from the checked values whenever a change is accepted; ``self._values`` (by schema
name) only feeds the schema's own checks. Which parameters are read-only, refused while a run
moves, or rebuild what: the constants below.
"""
from __future__ import annotations

from rcl_interfaces.msg import (FloatingPointRange, IntegerRange, ParameterDescriptor,
                                SetParametersResult)
from rclpy.parameter import Parameter

from vservo_node import params
from vservo_node.servo import MOVING_STATES, Servo
from vservo_node.settings import Settings, servo_config
from vservo_node.ros.controller.state import ControllerState

# Parameters the node is built around (publishers, subscriptions, the arm model).
READ_ONLY = frozenset({"io.sim_truth",
    "robot.urdf_path", "robot_description", "robot.base_frame", "robot.tool_frame",
    "robot.camera_frame", "robot.hand_eye", "robot.tool_point", "robot.min_joints",
    "robot.camera_mount", "robot.fixed_camera_pose", "robot.fixed_camera_frame",
    "robot.target_on_tool",
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
    # either check (coerce_numbers)
    d = ParameterDescriptor(name=param.name, description=text,
                            additional_constraints="; ".join(notes),
                            read_only=param.name in READ_ONLY,
                            dynamic_typing=param.type is not list)
    if param.type is float and param.low is not None and param.high is not None:
        d.floating_point_range = [FloatingPointRange(from_value=float(param.low),
                                                     to_value=float(param.high), step=0.0)]
    elif param.type is int and param.low is not None and param.high is not None:
        d.integer_range = [IntegerRange(from_value=int(param.low), to_value=int(param.high),
                                        step=1)]
    return d


def coerce_numbers(parameters):
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


class ParameterHandling(ControllerState):
    """Mixin of ControllerNode: declaration, live-change check and application."""

    def _declare_parameters(self) -> None:
        """Declare every SCHEMA entry with its file value when valid, else its default."""
        # rclpy keeps --params-file / -p values in _parameter_overrides; reading them here lets
        # an invalid or mistyped file value be reported instead of aborting the declaration.
        overrides = {name: plain(p.value) for name, p in self._parameter_overrides.items()
                     if name not in ROS_OWN and not name.startswith("qos_overrides.")}
        result = params.validate(overrides)
        self._values = result.values
        self.settings = Settings.from_values(self._values)
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
        self.add_pre_set_parameters_callback(coerce_numbers)
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
        """("", new values) or (reason, None). Everything the change will apply is built
        here (the servo's settings, the target and reference files), so an accepted change
        cannot fail later; the files read are kept for ``_apply_parameters``."""
        servo = self.servo
        enabled = bool(servo and servo.enabled)
        moving = bool(servo and servo.state in MOVING_STATES)
        new = dict(self._values)
        self._pending_files = None
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
            changed = {p.name for p in parameters}
            settings = Settings.from_values(new)
            try:
                if self.arm is not None:
                    Servo.check_config(self.arm, *servo_config(settings, self.arm))
                if changed & VISION_PARAMS and self._configured:
                    self._pending_files = self._load_vision_files(settings)
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
            self.settings = Settings.from_values(self._values)
            for name in changed:
                self._file_errors.pop(name, None)
            if self._configured:   # unconfigured: configure reads the values
                if changed & VISION_PARAMS:
                    self._set_vision_files(self._pending_files)
                    self._rebuild_vision()
                if self.servo is None:
                    self._build_servo()
                elif changed & (SERVO_PARAMS | {"io.image_timeout_s"}):
                    self.servo.reconfigure(*servo_config(self.settings, self.arm))
            self._pending_files = None
        self.get_logger().info("parameters changed: " + ", ".join(
            f"{n} = {self._values[n]!r}" for n in sorted(changed)))
