"""The servo's tunables, each bound to its parameter in ``vservo_node.params.SCHEMA``.

Every field of :class:`ServoSettings` takes its default from the schema entry named in its
metadata (``param``), so the schema is the one definition of each default.
``PARAM_OF_FIELD`` lists the binding (tests/test_params.py checks it against the schema);
``settings.servo_config`` is the one mapping from parameter values to a ServoSettings.
"""
from __future__ import annotations

import dataclasses
from dataclasses import dataclass
from typing import Any, Callable

from vservo_node.control.law import DampingSchedule, GainSchedule, LawConfig
from vservo_node.control.pose_error import PoseTolerance
from vservo_node.params import default


def _depth_mode(source: str) -> str:
    """depth.source -> the servo's depth mode: depths measured per frame (target_model,
    depth_image) are 'observed'; constant and taught stay as they are."""
    return "observed" if source in ("target_model", "depth_image") else source


def _param(name: str, convert: Callable[[Any], Any] | None = None) -> Any:
    """A dataclass field whose default is the schema's default of parameter ``name``."""
    value = default(name)
    return dataclasses.field(default=convert(value) if convert else value,
                             metadata={"param": name})


@dataclass(frozen=True)
class ServoSettings:
    """The servo's tunables (one field per schema parameter; see the schema for ranges, units
    and descriptions)."""

    interaction_estimate: str = _param("control.interaction_estimate")
    gain_near: float = _param("control.gain_near")
    gain_far: float = _param("control.gain_far")
    gain_half_error_px: float = _param("control.gain_half_error_px")
    soft_start_s: float = _param("control.soft_start_s")
    singular_threshold: float = _param("control.singular_threshold")
    max_damping: float = _param("control.max_damping")
    null_space_gain: float = _param("control.null_space_gain")
    tolerance_px: float = _param("control.tolerance_px")        # 0 = not used
    tolerance_mm: float = _param("control.tolerance_mm")        # estimated camera translation
    tolerance_deg: float = _param("control.tolerance_deg")      # ... and rotation; 0 = not used
    dwell_s: float = _param("control.dwell_s")
    settled_joint_speed: float = _param("control.settled_joint_speed")
    min_features: int = _param("control.min_features")
    max_run_s: float = _param("control.max_run_s")
    max_initial_error_px: float = _param("control.max_initial_error_px")
    depth_source: str = _param("depth.source", _depth_mode)     # constant | taught | observed
    constant_depth_m: float = _param("depth.constant_m")
    max_translation_m: float = _param("limits.max_translation_m")
    max_rotation_deg: float = _param("limits.max_rotation_deg")
    min_camera_distance_m: float = _param("limits.min_camera_distance_m")
    direction_probe_px: float = _param("control.direction_probe_px")   # start nod (0 = none)
    direction_probe_s: float = _param("control.direction_probe_s")
    predict_between_frames: bool = _param("control.predict_between_frames")
    scheme: str = _param("control.scheme")                      # decoupled.SCHEMES
    # no observation for this long while a run moves -> image_stale; judged on the output
    # tick, so a run halts even when no frame can be used at all
    observation_timeout_s: float = _param("io.image_timeout_s")
    # supervisor checks (our design; thresholds are common practice, no source)
    wrong_direction_frames: int = _param("supervisor.wrong_direction_frames")
    wrong_direction_min_px: float = _param("supervisor.wrong_direction_min_px")
    diverge_factor: float = _param("supervisor.diverge_factor")
    diverge_margin_px: float = _param("supervisor.diverge_margin_px")
    follow_window_s: float = _param("supervisor.follow_window_s")
    follow_min_ratio: float = _param("supervisor.follow_min_ratio")
    singular_halt_fraction: float = _param("supervisor.singular_halt_fraction")
    singular_halt_s: float = _param("supervisor.singular_halt_s")
    # speed-scale margins: each is 1 away from its hazard and falls linearly to margin_floor
    # at it; hard halts take over beyond
    margin_floor: float = _param("supervisor.margin_floor")
    border_margin_px: float = _param("supervisor.border_margin_px")
    joint_zone_rad: float = _param("supervisor.joint_zone_rad")
    envelope_zone: float = _param("supervisor.envelope_zone")

    @property
    def pose_tolerance(self) -> PoseTolerance:
        return PoseTolerance(self.tolerance_mm, self.tolerance_deg)

    def law_config(self) -> LawConfig:
        return LawConfig(
            gain=GainSchedule(self.gain_near, self.gain_far, self.gain_half_error_px),
            damping=DampingSchedule(self.singular_threshold, self.max_damping),
            soft_start_tau=self.soft_start_s, null_space_gain=self.null_space_gain)


#: Field name -> parameter name, for every field of ServoSettings.
PARAM_OF_FIELD: dict[str, str] = {f.name: f.metadata["param"]
                                  for f in dataclasses.fields(ServoSettings)}
