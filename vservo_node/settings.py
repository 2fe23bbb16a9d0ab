"""The controller's parameters as one typed, frozen object built from ``params.SCHEMA``.

``Settings.from_values(values)`` takes a validated parameter dict (``params.validate``) and
returns groups of typed fields that follow the schema's names: ``robot.base_frame`` is
``settings.robot.base_frame``, ``io.camera_rate_hz`` is ``settings.io.camera_rate_hz``; the one
name without a group, ``robot_description``, is ``settings.robot.description``. List
parameters become tuples. The fields carry no defaults: every default lives in the schema, and
``tests/test_settings.py`` checks that the fields and the schema's entries are the same set,
with the same types.

``servo_config(settings, arm)`` is the ONE mapping from parameters to the servo core's
``ServoSettings`` and ``LimitSet``; the node and every headless run call it, so they judge
the same settings. A new servo parameter is one schema entry, one field here and one line in
``servo_config``. No rclpy here.
"""
from __future__ import annotations

import dataclasses
from dataclasses import dataclass
from typing import Any, Mapping

import numpy as np

from vservo_node import params
from vservo_node.control.safety import LimitSet
from vservo_node.servo import ServoSettings


@dataclass(frozen=True)
class RobotSettings:
    urdf_path: str
    description: str             # the parameter ``robot_description``
    base_frame: str
    tool_frame: str
    camera_frame: str
    hand_eye: tuple[float, ...]
    camera_mount: str
    fixed_camera_pose: tuple[float, ...]
    fixed_camera_frame: str
    target_on_tool: tuple[float, ...]
    tool_point: tuple[float, ...]
    min_joints: int


@dataclass(frozen=True)
class TargetSettings:
    file: str


@dataclass(frozen=True)
class ReferenceSettings:
    file: str
    directory: str
    name: str


@dataclass(frozen=True)
class DepthParams:
    source: str
    constant_m: float


@dataclass(frozen=True)
class ControlSettings:
    interaction_estimate: str
    scheme: str
    gain_near: float
    gain_far: float
    gain_half_error_px: float
    soft_start_s: float
    singular_threshold: float
    max_damping: float
    null_space_gain: float
    tolerance_px: float
    tolerance_mm: float
    tolerance_deg: float
    dwell_s: float
    settled_joint_speed: float
    min_features: int
    max_run_s: float
    max_initial_error_px: float
    direction_probe_px: float
    direction_probe_s: float
    predict_between_frames: bool
    loop_delay_s: float


@dataclass(frozen=True)
class LimitSettings:
    joint_velocity_scale: float
    joint_acceleration: tuple[float, ...]
    position_margin: float
    tool_linear_speed: float
    camera_linear_speed: float
    angular_speed: float
    max_translation_m: float
    max_rotation_deg: float
    min_camera_distance_m: float


@dataclass(frozen=True)
class IoSettings:
    command_interface: str
    command_joint_order: tuple[str, ...]
    camera_rate_hz: float
    output_rate_hz: float
    image_timeout_s: float
    joint_state_timeout_s: float
    require_permit: bool
    permit_timeout_s: float
    stamp_tolerance_s: float
    camera_time_offset_s: float
    image_rectified: bool
    compressed_image: bool
    sim_truth: bool
    publish_overlay: bool

    @property
    def output_period_s(self) -> float:
        return 1.0 / self.output_rate_hz


# group attribute of Settings -> (schema prefix, dataclass)
GROUPS: dict[str, tuple[str, type]] = {
    "robot": ("robot", RobotSettings), "target": ("target", TargetSettings),
    "reference": ("reference", ReferenceSettings), "depth": ("depth", DepthParams),
    "control": ("control", ControlSettings), "limits": ("limits", LimitSettings),
    "io": ("io", IoSettings)}
# schema names that do not follow "<group>.<field>"
SPECIAL_NAMES = {"robot_description": ("robot", "description")}


def schema_name(group: str, field: str) -> str:
    """The schema entry of field ``field`` of group ``group``."""
    for name, place in SPECIAL_NAMES.items():
        if place == (group, field):
            return name
    return f"{GROUPS[group][0]}.{field}"


def field_of(name: str) -> tuple[str, str]:
    """(group, field) of the schema entry ``name``; KeyError for a name no field holds."""
    if name in SPECIAL_NAMES:
        return SPECIAL_NAMES[name]
    prefix, _, field = name.partition(".")
    for group, (group_prefix, cls) in GROUPS.items():
        if group_prefix == prefix and field in {f.name for f in dataclasses.fields(cls)}:
            return group, field
    raise KeyError(name)


@dataclass(frozen=True)
class Settings:
    """Every controller parameter, typed and frozen (see the module docstring)."""
    robot: RobotSettings
    target: TargetSettings
    reference: ReferenceSettings
    depth: DepthParams
    control: ControlSettings
    limits: LimitSettings
    io: IoSettings

    @classmethod
    def from_values(cls, values: Mapping[str, Any]) -> "Settings":
        """From parameter values by schema name; entries missing from ``values`` take the
        schema's default. Values are taken as they are (validate them first)."""
        groups = {}
        for group, (_, group_cls) in GROUPS.items():
            kwargs = {}
            for f in dataclasses.fields(group_cls):
                name = schema_name(group, f.name)
                value = values[name] if name in values else params.BY_NAME[name].default
                kwargs[f.name] = tuple(value) if isinstance(value, (list, tuple)) else value
            groups[group] = group_cls(**kwargs)
        return cls(**groups)

    @classmethod
    def defaults(cls) -> "Settings":
        return cls.from_values({})


def limits_for(arm, *, velocity_scale: float = 0.5, acceleration=2.0, position_margin=0.03,
               tool_linear_max=0.10, camera_linear_max=0.10, angular_max=0.6) -> LimitSet:
    """A LimitSet for ``arm`` from URDF velocity/position limits and the given settings."""
    accel = np.broadcast_to(np.asarray(acceleration, dtype=float), (arm.n,)).copy()
    return LimitSet(velocity=arm.velocity_limits.copy(), acceleration=accel,
                    lower=arm.lower + position_margin, upper=arm.upper - position_margin,
                    velocity_scale=velocity_scale, tool_linear_max=tool_linear_max,
                    camera_linear_max=camera_linear_max, angular_max=angular_max)


def depth_settings(settings: Settings):
    """Perception's ``DepthSettings`` (imported on call: perception pulls in OpenCV)."""
    from vservo_node.perception import DepthSettings
    return DepthSettings(settings.depth.source, settings.depth.constant_m)


def servo_config(settings: Settings, arm) -> tuple[ServoSettings, LimitSet]:
    """(ServoSettings, LimitSet) for ``arm`` from the parameters: the one mapping (module
    docstring). ValueError saying what does not fit the arm."""
    c, lim, depth = settings.control, settings.limits, settings.depth
    acceleration = lim.joint_acceleration
    if len(acceleration) not in (1, arm.n):
        raise ValueError(f"limits.joint_acceleration has {len(acceleration)} values; expected 1 "
                         f"or {arm.n} (one per joint of {', '.join(arm.joint_names)})")
    limits = limits_for(arm, velocity_scale=lim.joint_velocity_scale,
                        acceleration=list(acceleration), position_margin=lim.position_margin,
                        tool_linear_max=lim.tool_linear_speed,
                        camera_linear_max=lim.camera_linear_speed, angular_max=lim.angular_speed)
    servo = ServoSettings(
        interaction_estimate=c.interaction_estimate,
        gain_near=c.gain_near,
        gain_far=c.gain_far,
        gain_half_error_px=c.gain_half_error_px,
        soft_start_s=c.soft_start_s,
        singular_threshold=c.singular_threshold,
        max_damping=c.max_damping,
        null_space_gain=c.null_space_gain,
        tolerance_px=c.tolerance_px,
        tolerance_mm=c.tolerance_mm,
        tolerance_deg=c.tolerance_deg,
        dwell_s=c.dwell_s,
        settled_joint_speed=c.settled_joint_speed,
        min_features=c.min_features,
        max_run_s=c.max_run_s,
        max_initial_error_px=c.max_initial_error_px,
        direction_probe_px=c.direction_probe_px,
        direction_probe_s=c.direction_probe_s,
        predict_between_frames=c.predict_between_frames,
        scheme=c.scheme,
        depth_source="observed" if depth.source in ("target_model", "depth_image")
        else depth.source,
        constant_depth_m=depth.constant_m,
        max_translation_m=lim.max_translation_m,
        max_rotation_deg=lim.max_rotation_deg,
        min_camera_distance_m=lim.min_camera_distance_m,
        observation_timeout_s=settings.io.image_timeout_s,
    )
    return servo, limits
