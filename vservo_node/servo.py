"""One servo: from matched image points and joint positions to a limited joint command.

The functional heart of the package, shared by the ROS node, the headless simulator, the
closed-loop tests and the sweeps. No ROS and no clocks here: every call passes its time.

Two rates, one object:
- ``observe(obs, q, t)`` runs once per camera frame: it builds the image Jacobian
  ``J_img = L(s, Z) @ V_camera_tool @ J_tool(q)`` (2N x n), evaluates the control law and the
  supervisor's checks, and stores the desired joint velocity. With ``scheme`` decoupled the
  law runs on that scheme's task instead (``L @ J_camera`` and its error, from
  vservo_node.control.decoupled); the supervisor still judges the image points.
- ``command(q, t, dt)`` runs at the output rate: it steps the previous command toward the
  desired one through the safety limiter (so commands between frames stay rate-limited), ramps
  to zero while braking, and returns the command with the cycle's status record.
``step(obs, q, t, dt)`` does both, for loops that run at one rate.

Supervisor (states in vservo_node.interface.SUPERVISOR_STATES):
  disabled --enable--> armed --start--> servoing <-> settling --dwell--> converged
  any moving state --halt reason--> braking --command at zero--> halted
Halting ramps the command to zero at the deceleration limit, then reports an explicit zero.
"""
from __future__ import annotations

import functools
import math
from dataclasses import dataclass, field
from typing import Any, Hashable, Sequence

import numpy as np

from vservo_node.control import decoupled, frames
from vservo_node.control.interaction import interaction_matrix, point_interaction_matrix
from vservo_node.control.law import (ControlLaw, DampingSchedule, GainSchedule, LawConfig)
from vservo_node.control.pose_error import (PoseErrorEstimator, PoseEstimate, PoseTolerance,
                                            PoseWindow)
from vservo_node.control.safety import LimitSet, Limiter

# Halt reasons (published and logged once each).
HALT_REASONS = {
    "stop_requested": "stop was requested",
    "too_few_features": "fewer matched features than the minimum",
    "image_stale": "no fresh image",
    "joints_stale": "no fresh joint state",
    "permit_withdrawn": "the cell withdrew the motion permit",
    "camera_info_invalid": "camera_info missing or inconsistent with the image",
    "joint_limit_envelope": "a joint reached its braking envelope",
    "motion_envelope": "the tool left its motion envelope",
    "too_close": "a feature came closer than the minimum camera distance",
    "wrong_direction": "features move against the motion the image Jacobian predicts, or the "
                       "joints against their command",
    "not_following": "the arm is not following its command",
    "diverging": "the image error grows",
    "initial_error_too_large": "the first image error is above control.max_initial_error_px",
    "run_timeout": "the run exceeded its maximum duration",
    "numerical_fault": "a non-finite value reached the control law or the limiter",
    "motion_disabled": "motion was disabled",
    "internal_error": "an unexpected error in the node (see its log)",
    "frames_unpaired": "images arrive but none can be paired with a joint state (their stamps "
                       "and the joint states' do not overlap)",
    "image_jacobian_singular": "the image Jacobian stayed nearly singular: the features no "
                               "longer determine the camera motion",
    "shutdown": "the node was asked to shut down (signal or lifecycle) during a run",
    "pose_estimate_failed": "the decoupled scheme found no pose of the taught points in the "
                            "current view",
}
MOVING_STATES = ("servoing", "settling", "braking")


@dataclass(frozen=True)
class TaughtView:
    """What the camera saw when the pose was taught.

    ``keys``: feature identities in order; ``xy`` (N, 2) normalized coordinates; ``uv`` (N, 2)
    pixels in the current camera model (for errors in px); ``depth`` (N,) metres, or None;
    ``model`` (N, 3) the features' positions in a frame fixed to the target (metres, e.g. the
    target file's), or None: with it the pose error is estimated by PnP, without it from the
    plane homography and the depths (``control.pose_error``).
    """

    keys: tuple[Hashable, ...]
    xy: np.ndarray
    uv: np.ndarray
    depth: np.ndarray | None = None
    image_size: tuple[int, int] | None = None   # (width, height) px, for the border margin
    model: np.ndarray | None = None

    def __post_init__(self) -> None:
        n = len(self.keys)
        if n == 0 or len(set(self.keys)) != n:
            raise ValueError(f"taught view needs distinct feature keys, got {list(self.keys)}")
        for name, arr in (("xy", self.xy), ("uv", self.uv)):
            if np.shape(arr) != (n, 2):
                raise ValueError(f"taught view {name} has shape {np.shape(arr)}; expected ({n}, 2)")
        if self.depth is not None and (np.shape(self.depth) != (n,) or
                                       not np.all(np.asarray(self.depth) > 0)):
            raise ValueError(f"taught depths must be {n} positive values, got {self.depth}")
        if self.model is not None and (np.shape(self.model) != (n, 3) or
                                       not np.all(np.isfinite(self.model))):
            raise ValueError(f"taught model points must be ({n}, 3) finite metres, got shape "
                             f"{np.shape(self.model)}")

    def index(self) -> dict[Hashable, int]:
        return {k: i for i, k in enumerate(self.keys)}

    @functools.cached_property
    def px_per_unit(self) -> float:
        """Pixels per normalized unit, from the view itself (spread of uv over spread of xy)."""
        d_uv = np.linalg.norm(self.uv - self.uv.mean(axis=0), axis=1).sum()
        d_xy = np.linalg.norm(self.xy - self.xy.mean(axis=0), axis=1).sum()
        return float(d_uv / d_xy) if d_xy > 0 else 1.0


@dataclass(frozen=True)
class Observation:
    """Matched features of one image: ``keys`` (M,), ``uv`` (M, 2) px, ``xy`` (M, 2)
    normalized, ``depth`` (M,) metres or None (then the configured depth source applies)."""

    keys: tuple[Hashable, ...]
    uv: np.ndarray
    xy: np.ndarray
    depth: np.ndarray | None = None


@dataclass(frozen=True)
class ServoSettings:
    """The servo's tunables (names follow the parameter schema in vservo_node.params)."""

    interaction_estimate: str = "blended"
    gain_near: float = 1.0
    gain_far: float = 0.5
    gain_half_error_px: float = 60.0
    soft_start_s: float = 0.5
    singular_threshold: float = 0.003
    max_damping: float = 0.003
    null_space_gain: float = 0.5
    tolerance_px: float = 0.5             # 0 = not used
    tolerance_mm: float = 0.0             # estimated camera translation from the taught pose
    tolerance_deg: float = 0.0            # ... and rotation; 0 = not used
    dwell_s: float = 0.3
    settled_joint_speed: float = 0.01
    min_features: int = 4
    max_run_s: float = 60.0
    max_initial_error_px: float = 400.0
    depth_source: str = "taught"          # constant | taught | observed
    constant_depth_m: float = 0.4
    max_translation_m: float = 0.30
    max_rotation_deg: float = 180.0
    min_camera_distance_m: float = 0.08
    # supervisor checks (our design; thresholds are common practice, no source)
    wrong_direction_frames: int = 3       # consecutive opposed judgements before a halt
    wrong_direction_min_px: float = 2.0   # judge once the predicted motion (RMS) reaches this
    direction_probe_px: float = 6.0       # start nod: peak feature shift (0 = no nod)
    direction_probe_s: float = 0.3        # start nod: duration (one sine period)
    predict_between_frames: bool = False  # re-run the law at each output tick on predicted features
    scheme: str = "point"                 # control.scheme: decoupled.SCHEMES
    diverge_factor: float = 1.5           # halt when rms > factor * best + diverge_margin_px
    diverge_margin_px: float = 20.0
    follow_window_s: float = 0.5          # judge following over this window
    follow_min_ratio: float = 0.2         # measured / commanded joint travel below -> halt
    # no observation for this long while a run moves -> image_stale (io.image_timeout_s);
    # judged on the output tick, so a run halts even when no frame can be used at all
    observation_timeout_s: float = 0.25
    # the judged singular value below this fraction of singular_threshold for singular_halt_s
    # -> image_jacobian_singular (our thresholds, common practice, no source)
    singular_halt_fraction: float = 0.05
    singular_halt_s: float = 1.0
    # speed-scale margins (our design, common practice, no source): each is 1 away from its
    # hazard and falls linearly to margin_floor at it; hard halts take over beyond
    margin_floor: float = 0.2
    border_margin_px: float = 20.0        # slow down when a feature is this close to the border
    joint_zone_rad: float = 0.15          # ... when a joint is this close to its (margined) limit
    envelope_zone: float = 0.2            # ... in the last fifth of the motion envelope

    @classmethod
    def from_params(cls, values: dict[str, Any]) -> "ServoSettings":
        """Build from a validated parameter dict (vservo_node.params names)."""
        get = values.get
        depth = get("depth.source", "taught")
        return cls(
            interaction_estimate=get("control.interaction_estimate", cls.interaction_estimate),
            gain_near=get("control.gain_near", cls.gain_near),
            gain_far=get("control.gain_far", cls.gain_far),
            gain_half_error_px=get("control.gain_half_error_px", cls.gain_half_error_px),
            soft_start_s=get("control.soft_start_s", cls.soft_start_s),
            singular_threshold=get("control.singular_threshold", cls.singular_threshold),
            max_damping=get("control.max_damping", cls.max_damping),
            null_space_gain=get("control.null_space_gain", cls.null_space_gain),
            tolerance_px=get("control.tolerance_px", cls.tolerance_px),
            tolerance_mm=get("control.tolerance_mm", cls.tolerance_mm),
            tolerance_deg=get("control.tolerance_deg", cls.tolerance_deg),
            dwell_s=get("control.dwell_s", cls.dwell_s),
            settled_joint_speed=get("control.settled_joint_speed", cls.settled_joint_speed),
            min_features=get("control.min_features", cls.min_features),
            max_run_s=get("control.max_run_s", cls.max_run_s),
            max_initial_error_px=get("control.max_initial_error_px", cls.max_initial_error_px),
            direction_probe_px=get("control.direction_probe_px", cls.direction_probe_px),
            direction_probe_s=get("control.direction_probe_s", cls.direction_probe_s),
            predict_between_frames=get("control.predict_between_frames",
                                       cls.predict_between_frames),
            scheme=get("control.scheme", cls.scheme),
            depth_source="observed" if depth in ("target_model", "depth_image") else depth,
            constant_depth_m=get("depth.constant_m", cls.constant_depth_m),
            max_translation_m=get("limits.max_translation_m", cls.max_translation_m),
            max_rotation_deg=get("limits.max_rotation_deg", cls.max_rotation_deg),
            min_camera_distance_m=get("limits.min_camera_distance_m", cls.min_camera_distance_m),
            observation_timeout_s=get("io.image_timeout_s", cls.observation_timeout_s),
        )

    @property
    def pose_tolerance(self) -> PoseTolerance:
        return PoseTolerance(self.tolerance_mm, self.tolerance_deg)

    def law_config(self) -> LawConfig:
        return LawConfig(
            gain=GainSchedule(self.gain_near, self.gain_far, self.gain_half_error_px),
            damping=DampingSchedule(self.singular_threshold, self.max_damping),
            soft_start_tau=self.soft_start_s, null_space_gain=self.null_space_gain)


@dataclass
class _RunState:
    run_id: str
    t_start: float
    T_base_tool_start: np.ndarray
    best_rms: float = math.inf
    below_since: float | None = None
    wrong_frames: int = 0
    direction_anchor: "_Frame | None" = None
    probe_t0: float | None = None
    follow_cmd: np.ndarray | float = 0.0   # commanded joint travel (rad) in the window
    follow_phase: str = "run"              # nod_out, nod_back or run (Servo._following)
    follow_t0: float = 0.0
    follow_q0: np.ndarray | None = None
    final_rms: float = math.nan
    end_t: float | None = None
    last_obs_t: float | None = None        # time of the last observation the law used
    theta_u: np.ndarray | None = None      # decoupled scheme: the last turn, kept continuous
    singular_since: float | None = None
    pose: PoseEstimate | None = None       # the last frame's pose-error estimate
    pose_window: PoseWindow | None = None  # the estimates of the last dwell_s
    pose_estimator: PoseErrorEstimator | None = None


@dataclass
class _Frame:
    """What observe() keeps for the next frame and for command()."""
    t: float
    q: np.ndarray
    keys: tuple
    e: np.ndarray
    J_move: np.ndarray   # (2, 2N, n): feature motion from camera translation, from rotation
    rms_px: float
    law_inputs: tuple | None = None   # (z_now, xy_ref, z_ref) for the law between frames
    task: decoupled.Task | None = None   # decoupled scheme: its task at this frame


def _check_scheme(settings: ServoSettings) -> None:
    if settings.scheme not in decoupled.SCHEMES:
        raise ValueError(f"control scheme {settings.scheme!r}; expected one of "
                         f"{', '.join(decoupled.SCHEMES)}")


class Servo:
    """Composes the interaction matrix, the arm model, the law, the limiter and the supervisor.

    ``arm``: a vservo_node.control.kinematics.ArmModel (its T_tool_camera is the hand-eye the
    servo believes). ``limits``: vservo_node.control.safety.LimitSet for the arm's joints.
    ``tool_point``: point (tool frame, m) whose linear speed is limited.
    """

    def __init__(self, arm, settings: ServoSettings, limits: LimitSet,
                 tool_point: Sequence[float] = (0.0, 0.0, 0.0), mount=None):
        _check_scheme(settings)
        self.arm = arm
        # None: the camera on the tool (arm.T_tool_camera); a control.mounting.FixedCamera: a
        # camera in the cell watching a target on the tool (the image Jacobian, the limiter's
        # watched point and the pose error follow it)
        self.mount = mount
        self.settings = settings
        self.limits = limits
        self.tool_point = np.asarray(tool_point, dtype=float)
        self.law = ControlLaw(settings.law_config(), arm.lower, arm.upper)
        self.limiter = Limiter(limits)
        self.reference: TaughtView | None = None
        self.state = "disabled"
        self.enabled = False
        self.reason = ""
        self.detail = ""          # what the check that fired saw, with its figures
        self._direction_detail = ""
        self._follow_detail = ""
        self.external_scale = 1.0
        self._run: _RunState | None = None
        self._frame: _Frame | None = None
        self._desired = np.zeros(arm.n)
        self._last_cmd = np.zeros(arm.n)
        self._law_info = None
        self._margin_scale = 1.0
        self._runs = 0
        self.result: dict[str, Any] | None = None

    # --- configuration ---------------------------------------------------------------------
    @staticmethod
    def check_config(arm, settings: ServoSettings, limits: LimitSet) -> None:
        """ValueError saying what does not fit, for settings and limits this arm would get:
        everything :meth:`reconfigure` builds is built here first, so a change that passes
        this check applies without raising."""
        ControlLaw(settings.law_config(), arm.lower, arm.upper)
        Limiter(limits)
        _check_scheme(settings)
        if settings.tolerance_px <= 0 and not settings.pose_tolerance.active:
            raise ValueError("no arrival criterion: set control.tolerance_px or "
                             "control.tolerance_mm / control.tolerance_deg above 0")
        if limits.n != arm.n:
            raise ValueError(f"limits for {limits.n} joints; the arm has {arm.n}")

    def reconfigure(self, settings: ServoSettings, limits: LimitSet) -> None:
        """New settings and limits, applied at once (also mid-run): the running limiter keeps
        its previous command, so a lowered limit is reached through the deceleration limit."""
        self.check_config(self.arm, settings, limits)
        self.settings = settings
        self.law.config = settings.law_config()
        self.limits = limits
        self.limiter.limits = limits

    # --- supervisor commands -------------------------------------------------------------
    def set_reference(self, view: TaughtView) -> None:
        if self.state in MOVING_STATES:
            raise RuntimeError("cannot change the reference while moving; stop first")
        self.reference = view

    def enable(self, on: bool, t: float) -> tuple[bool, str]:
        """Enable or disable motion. Disabling while moving brakes to zero first."""
        self.enabled = bool(on)
        if on:
            if self.state == "disabled":
                self.state = "armed"
            return True, "motion enabled"
        if self.state in ("servoing", "settling"):
            self.halt("motion_disabled", t)
        elif self.state != "braking":
            self.state = "disabled"
        return True, "motion disabled"

    def start(self, q: np.ndarray, t: float, run_id: str | None = None) -> tuple[bool, str]:
        """Begin a run from joint positions q. Allowed when motion is enabled and no run moves."""
        if not self.enabled:
            return False, "motion is not enabled (call enable first)"
        if self.state not in ("armed", "converged", "halted"):
            return False, f"cannot start in state '{self.state}' (a run is in progress)"
        if self.reference is None:
            return False, "no taught reference loaded"
        outside = self.joints_outside_limits(q)
        if outside:
            return False, "joint(s) outside their limits: " + "; ".join(outside)
        estimator, why = self._pose_estimator()
        if estimator is None and self.settings.pose_tolerance.active:
            return False, (f"control.tolerance_mm / tolerance_deg need the pose error, which "
                           f"cannot be estimated for this reference: {why}")
        self._runs += 1
        self._run = _RunState(run_id or f"run{self._runs}", t,
                              self.arm.fk(np.asarray(q, float)),
                              pose_window=PoseWindow(self.settings.dwell_s),
                              pose_estimator=estimator)
        self._frame = None
        self._law_info = None
        self._desired = np.zeros(self.arm.n)
        self.limiter = Limiter(self.limits)  # counts are per run
        self._last_cmd = np.zeros(self.arm.n)
        self.state, self.reason, self.detail, self.result = "servoing", "", "", None
        return True, f"run {self._run.run_id} started"

    def _pose_estimator(self) -> tuple[PoseErrorEstimator | None, str]:
        """The pose-error estimator of the taught view (PnP with its model points, else the
        plane homography with its depths or the constant depth), or None and why not."""
        view = self.reference
        depth = view.depth if view.depth is not None else self.settings.constant_depth_m
        try:
            estimator = PoseErrorEstimator(view.xy, model_points=view.model, taught_depths=depth)
            return (estimator if self.mount is None else self.mount.pose_errors(estimator)), ""
        except ValueError as exc:
            return None, str(exc)

    def pose_summary(self):
        """The pose-error estimates of the current (or last) run's last dwell_s
        (``control.pose_error.WindowSummary``), or None before any run."""
        run = self._run
        return run.pose_window.summary() if run is not None and run.pose_window else None

    def joints_outside_limits(self, q) -> list[str]:
        """One line per joint of q outside the arm's position limits (or not finite)."""
        q = np.asarray(q, dtype=float)
        out = []
        if q.shape != (self.arm.n,):
            return [f"{q.shape[0] if q.ndim else 0} joint values for {self.arm.n} joints"]
        for name, value, low, high in zip(self.arm.joint_names, q, self.arm.lower,
                                          self.arm.upper):
            if not math.isfinite(value):
                out.append(f"{name} = {value} (not finite)")
            elif value < low or value > high:
                out.append(f"{name} = {value:.4f} rad outside [{low:.4f}, {high:.4f}]")
        return out

    def stop(self, t: float) -> tuple[bool, str]:
        if self.state in ("servoing", "settling"):
            self.halt("stop_requested", t)
            return True, "stopping: braking to zero"
        return True, f"nothing to stop in state '{self.state}'"

    def halt(self, reason: str, t: float, detail: str = "") -> None:
        """Begin braking for reason (a key of HALT_REASONS), ``detail`` saying what the check
        saw. Only the first reason counts."""
        if self.state not in ("servoing", "settling"):
            return
        self.state, self.reason, self.detail = "braking", reason, detail
        self._desired = np.zeros(self.arm.n)

    # --- the vision cycle ------------------------------------------------------------------
    def observe(self, obs: Observation, q: np.ndarray, t: float) -> None:
        """Run the law for one image (time t = image time, q = joints at that time)."""
        if self.state not in ("servoing", "settling") or self.reference is None:
            return
        s, run = self.settings, self._run
        q = np.asarray(q, dtype=float)
        ref_index = self.reference.index()
        pairs = [(i, ref_index[k]) for i, k in enumerate(obs.keys) if k in ref_index]
        if len(pairs) < s.min_features:
            self.halt("too_few_features", t, f"{len(pairs)} of {len(self.reference.keys)} "
                      f"taught features matched; control.min_features = {s.min_features}")
            return
        now_i, ref_i = (np.array(ix) for ix in zip(*pairs))
        keys = tuple(obs.keys[i] for i in now_i)
        xy_now, xy_ref = np.asarray(obs.xy, float)[now_i], self.reference.xy[ref_i]
        uv_now, uv_ref = np.asarray(obs.uv, float)[now_i], self.reference.uv[ref_i]
        z_ref = (self.reference.depth[ref_i] if self.reference.depth is not None
                 else np.full(len(ref_i), s.constant_depth_m))
        z_now = self._current_depth(obs, now_i, z_ref)
        if not (np.all(np.isfinite(xy_now)) and np.all(np.isfinite(z_now)) and
                np.all(np.isfinite(q))):
            bad = [name for name, v in (("features", xy_now), ("depths", z_now), ("joints", q))
                   if not np.all(np.isfinite(v))]
            self.halt("numerical_fault", t, "non-finite " + ", ".join(bad) + " in an image cycle")
            return
        if np.min(z_now) < s.min_camera_distance_m:
            self.halt("too_close", t, f"nearest feature at {np.min(z_now):.3f} m < "
                      f"limits.min_camera_distance_m = {s.min_camera_distance_m} m")
            return
        e = (xy_now - xy_ref).ravel()
        error_px = uv_now - uv_ref
        rms_px = float(np.sqrt(np.mean(np.sum(error_px ** 2, axis=1))))
        camera_jac = self._camera_jacobian(q)
        J_img = interaction_matrix(s.interaction_estimate, xy_now, z_now, xy_ref, z_ref) @ camera_jac
        # the local image Jacobian (current features) predicts how features move; the law's
        # estimate may be taught or blended, which only approximates it far from the goal
        L_local = point_interaction_matrix(xy_now, z_now)
        J_move = np.stack([L_local[:, :3] @ camera_jac[:3], L_local[:, 3:] @ camera_jac[3:]])
        prev = self._frame
        if prev is None and rms_px > s.max_initial_error_px:
            self.halt("initial_error_too_large", t, f"first RMS error {rms_px:.1f} px > "
                      f"control.max_initial_error_px = {s.max_initial_error_px}")
            return
        J_law, e_law, task = J_img, e, None
        if s.scheme == "decoupled":
            try:
                task = decoupled.task(xy_now, xy_ref, z_ref, run.theta_u)
            except ValueError as exc:
                self.halt("pose_estimate_failed", t, f"{exc} (control.scheme decoupled needs the "
                          "taught depths and >= 4 matched points on a spread-out target)")
                return
            run.theta_u = task.theta_u
            J_law, e_law = task.L @ camera_jac, task.error
        if prev is None or prev.keys != keys or (prev.task is None) != (task is None):
            self.law.restart(e_law, t)
        frame = _Frame(t, q, keys, e, J_move, rms_px, (z_now, xy_ref, z_ref), task)
        anchor = run.direction_anchor
        if anchor is None or anchor.keys != keys:
            run.direction_anchor = frame
        else:
            verdict = self._wrong_direction(anchor, e, q)
            if verdict is not None:          # judged: the next judgement starts here
                run.direction_anchor = frame
            if verdict:
                self.halt("wrong_direction", t, "image check: " + self._direction_detail)
                return
        self._frame = frame
        run.last_obs_t = t
        run.best_rms = min(run.best_rms, rms_px)
        run.final_rms = rms_px
        if rms_px > s.diverge_factor * run.best_rms + s.diverge_margin_px:
            self.halt("diverging", t, f"RMS error {rms_px:.1f} px > {s.diverge_factor} x best "
                      f"{run.best_rms:.1f} px + {s.diverge_margin_px} px")
            return
        envelope_used = self._envelope_fraction(q)   # for the margins; the tick halts on it
        dq, info = self.law.compute(J_law, e_law, rms_px, q, t,
                                    null_space_enabled=self.state == "servoing")
        self._law_info = info
        if info.fault:
            self.halt("numerical_fault", t, "the control law got non-finite values")
            return
        if self._singular_too_long(info, t):
            return
        nod = self._probe(camera_jac, t)
        if nod is None:
            self._desired = dq
        else:                  # the law waits for the nod; its soft start begins after it
            self.law.restart(e_law, t)
            self._desired = nod
        self._margin_scale = self._margins(info, uv_now, q, envelope_used)
        self._arrival(xy_now, ref_i, rms_px, t)

    def _arrival(self, xy_now: np.ndarray, ref_i: np.ndarray, rms_px: float, t: float) -> None:
        """Arrival: every criterion set holds for the dwell time with the joints (nearly)
        stopped: the RMS image error within control.tolerance_px, and the camera's pose error,
        estimated from the features each frame and averaged over the last dwell_s, within
        control.tolerance_mm / tolerance_deg (``control.pose_error``)."""
        s, run = self.settings, self._run
        if run.pose_estimator is not None:
            run.pose = run.pose_estimator.estimate(xy_now, ref_i)
            # the first-order cross-check only where the result reports it: near the goal
            check = (run.pose_estimator.first_order(xy_now, ref_i)
                     if self.state == "settling" else None)
            run.pose_window.add(t, run.pose, check)
        tolerance = s.pose_tolerance
        px_ok = s.tolerance_px <= 0 or rms_px <= s.tolerance_px
        pose_ok = not tolerance.active or (px_ok and
                                           run.pose_window.summary().within(tolerance))
        if px_ok and pose_ok:
            if run.below_since is None:
                run.below_since = t
            self.state = "settling"
            stopped = np.max(np.abs(self._last_cmd)) <= s.settled_joint_speed
            if t - run.below_since >= s.dwell_s and stopped:
                self._end("converged", "", t)
        else:
            run.below_since = None
            self.state = "servoing"

    def _current_depth(self, obs: Observation, now_i: np.ndarray, z_ref: np.ndarray):
        s = self.settings
        if s.depth_source == "observed" and obs.depth is not None:
            return np.asarray(obs.depth, float)[now_i]
        if s.depth_source == "constant":
            return np.full(len(now_i), s.constant_depth_m)
        return z_ref  # taught depth: the depth at the goal stands in for the current one

    # The wrong-direction check fits seen = a * (translational flow) + (rotational flow); the
    # fitted a is believed depth / true depth. Plausible: a in this range (depths within a
    # factor of ~3), and the fit explaining the seen motion (residual below this fraction).
    WRONG_DIRECTION_DEPTH_RATIO = (0.3, 3.0)
    WRONG_DIRECTION_RESIDUAL = 0.6
    # ... and, besides, the seen motion more than 60 deg away from the predicted one: a tilted
    # hand-eye (5 deg) under a turn about the optical axis leaves a large residual (the turn's
    # small flow picks up the uniform flow of the tilt's share) while the features still go
    # where predicted, ~40 deg off (measured on tray_combined).
    WRONG_DIRECTION_COSINE = 0.5

    def _wrong_direction(self, prev: _Frame, e: np.ndarray, q: np.ndarray) -> bool | None:
        """Is the feature motion seen since frame ``prev`` explained by the local image
        Jacobian for the joint motion in between? None: too little motion to judge yet (the
        caller keeps ``prev`` as its anchor until the predicted motion reaches
        wrong_direction_min_px RMS, so feature noise, ~1 px on textured targets, cannot
        dominate the judgement).

        The prediction splits into the flow from the camera's translation, which scales with
        1/depth, and the flow from its rotation, which does not (Chaumette & Hutchinson 2006,
        eq. 11). Believed depths may be off, so the seen motion is fitted as
        ``a * translational + rotational`` by least squares, with ``a`` (believed over true
        depth) held to a plausible range: with the right hand-eye, optical frame and joint order
        the fit is close; a mirrored or turned hand-eye leaves a large residual. A judgement is
        opposed when the residual is large *and* the seen motion points more than 60 deg away
        from the predicted one; several opposed judgements in a row (wrong_direction_frames)
        -> True. Neither test alone will do: the cosine flips sign with 40 % short depths where
        the two flows nearly cancel (tray_offset's start), the residual grows large under a
        5 deg hand-eye tilt during a turn (tray_combined). Where the flows cancel, a mirrored
        hand-eye also looks like a depth error; the start nod (:meth:`_probe`) breaks that tie.
        """
        s = self.settings
        moved_by_translation, moved_by_rotation = prev.J_move @ (q - prev.q)
        seen = e - prev.e
        predicted = moved_by_translation + moved_by_rotation
        norm_px = self.reference.px_per_unit / math.sqrt(len(e) / 2)
        if np.linalg.norm(predicted) * norm_px < s.wrong_direction_min_px:
            return None
        left = seen - moved_by_rotation
        tt = float(moved_by_translation @ moved_by_translation)
        # the best plausible depth ratio (an implausible one would explain nothing real; when
        # the translational flow is small the ratio is ill-determined and the clip holds it)
        ratio = float(np.clip(float(moved_by_translation @ left) / tt if tt > 0 else 1.0,
                              *self.WRONG_DIRECTION_DEPTH_RATIO))
        residual = np.linalg.norm(left - ratio * moved_by_translation)
        seen_norm = np.linalg.norm(seen)
        cosine = float(seen @ predicted) / max(seen_norm * np.linalg.norm(predicted), 1e-300)
        opposed = (residual > self.WRONG_DIRECTION_RESIDUAL * seen_norm
                   and cosine < self.WRONG_DIRECTION_COSINE)
        self._direction_detail = (
            f"features moved {math.degrees(math.acos(max(-1.0, min(1.0, cosine)))):.0f} deg away "
            f"from the predicted motion (fit residual {residual / max(seen_norm, 1e-300):.2f} of "
            "the seen motion) for several frames: check " + (
                "the hand-eye (robot.hand_eye), the camera's optical frame and the depth source"
                if self.mount is None else "robot.camera_mount, the fixed camera's pose "
                "(robot.fixed_camera_pose / _frame), robot.target_on_tool and the depth source"))
        run = self._run
        run.wrong_frames = run.wrong_frames + 1 if opposed else 0
        return run.wrong_frames >= s.wrong_direction_frames

    def _probe(self, camera_jac: np.ndarray, t: float) -> np.ndarray | None:
        """Joint velocity of the start nod at image time t, None outside it. For
        direction_probe_s from the run's first image the law waits and the camera turns about
        its own centre, about the image diagonal, by one sine period of angular speed: it
        tilts by up to direction_probe_px / focal length and comes back (net rotation zero, as
        far as the limiter lets the command follow; the servo removes any rest).

        Why: where the features' translational and rotational flows nearly cancel (a lateral
        offset seen through a narrow field of view), a mirrored hand-eye moves the features in a
        way a plausible depth error would also explain, and the servo's own motion cannot tell
        the two apart for many frames. The flow of a rotation about the camera centre does not
        depend on depth (Chaumette & Hutchinson 2006, Part I, eq. 11, the columns of w), so
        the nod makes the first judgements of :meth:`_wrong_direction` decisive: seen against
        predicted, a turned or mirrored optical frame or hand-eye shows up as a reversed or
        turned flow within the nod. About the diagonal, a half turn about the optical axis, x
        or y all reverse or turn the seen flow. (A command sent in the wrong joint order is
        not seen here, since the prediction uses the measured joints; :meth:`_following`
        judges the nod's way out for it.) The law waits because its own
        early motion can swamp the nod's flow (a turn about the optical axis, which a half
        turn of the hand-eye about that axis leaves correct). 0 px disables the nod.
        """
        s, run = self.settings, self._run
        if run.probe_t0 is None:
            run.probe_t0 = t
        if not self._nodding(t):
            return None
        tau = t - run.probe_t0
        # peak angle = peak speed * period / pi; shift (px) = focal (px per unit) * angle
        peak = math.pi * s.direction_probe_px / (s.direction_probe_s * self.reference.px_per_unit)
        w = peak * math.sin(2.0 * math.pi * tau / s.direction_probe_s) / math.sqrt(2.0)
        twist = np.array([0.0, 0.0, 0.0, w, w, 0.0])
        return np.linalg.pinv(camera_jac, rcond=1e-3) @ twist

    def _envelope_fraction(self, q: np.ndarray) -> float:
        """Fraction of the motion envelope used: the larger of tool translation and rotation
        from the start pose over their maxima (> 1: outside)."""
        s, run = self.settings, self._run
        moved_m, turned_rad = frames.pose_error(run.T_base_tool_start, self.arm.fk(q))
        return max(moved_m / s.max_translation_m if s.max_translation_m > 0 else math.inf,
                   math.degrees(turned_rad) / s.max_rotation_deg if s.max_rotation_deg > 0
                   else math.inf)

    # The joints count as moving against their command when their net travel over a follow
    # window points more than 60 deg away from the commanded net travel (our threshold, common
    # practice, no source; the drives' lag shifts the two in time, not in direction, unless the
    # motion turns within the window).
    FOLLOW_COSINE = 0.5

    def _following(self, q: np.ndarray, t: float) -> str:
        """Judge the arm against its command over each follow window: "" (fine or not judged),
        "not_following" (it travelled less than follow_min_ratio of the commanded net travel)
        or "wrong_direction" (it travelled the wrong way: the command's joint order or signs
        do not match the joints it moves). Judged only when the command asked for real net
        travel (FOLLOW_MIN_TRAVEL over the window). Windows: the start nod's way out (from
        the first image to its turning point, where its net travel is largest), then none
        until the nod is back (its return leaves ~0 net travel, whose direction is noise),
        then every follow_window_s."""
        s, run = self.settings, self._run
        nodding = self._nodding(t)
        if run.follow_q0 is None:
            if nodding and run.probe_t0 is None:
                return ""         # no image yet: nothing commanded, the nod starts with one
            self._open_follow_window(q, t, "nod_out" if nodding else "run")
            return ""
        if run.follow_phase == "nod_out":
            if nodding and t - run.probe_t0 < 0.5 * s.direction_probe_s:
                return ""
            # direction only: a laggy arm may not have come far yet (judged later, over whole
            # windows), and a direction from too little travel is not judged at all
            verdict = self._judge_following(q, judge_travel=False)
            self._open_follow_window(q, t, "nod_back" if nodding else "run")
            return verdict
        if run.follow_phase == "nod_back":
            if nodding:
                return ""
            self._open_follow_window(q, t, "run")
            return ""
        if t - run.follow_t0 < s.follow_window_s:
            return ""
        verdict = self._judge_following(q)
        self._open_follow_window(q, t, "run")
        return verdict

    # net commanded joint travel (rad) below which a follow window is not judged (our
    # threshold, common practice, no source: well above the reported joints' noise)
    FOLLOW_MIN_TRAVEL = 5e-3

    def _open_follow_window(self, q: np.ndarray, t: float, phase: str) -> None:
        run = self._run
        run.follow_q0, run.follow_t0, run.follow_cmd, run.follow_phase = q.copy(), t, 0.0, phase

    def _judge_following(self, q: np.ndarray, judge_travel: bool = True) -> str:
        s, run = self.settings, self._run
        moved = q - run.follow_q0
        asked = np.asarray(run.follow_cmd, dtype=float)
        measured, commanded = float(np.linalg.norm(moved)), float(np.linalg.norm(asked))
        if commanded <= self.FOLLOW_MIN_TRAVEL:
            return ""
        if measured < s.follow_min_ratio * commanded:
            self._follow_detail = (
                f"follow check: joints travelled {measured:.4f} rad of the {commanded:.4f} rad "
                f"commanded (< {s.follow_min_ratio} of it): is the arm's controller active and "
                "listening to this node's command topic?")
            return "not_following" if judge_travel else ""
        if float(moved @ asked) < self.FOLLOW_COSINE * measured * commanded:
            worst = int(np.argmin(moved * asked))
            self._follow_detail = (
                f"follow check: joints travelled {math.degrees(math.acos(max(-1.0, min(1.0, float(moved @ asked) / (measured * commanded))))):.0f}"
                f" deg away from their command (joint {self.arm.joint_names[worst]} moved "
                f"{moved[worst]:+.4f} rad, commanded {asked[worst]:+.4f} rad): check "
                "io.command_joint_order and the signs of the arm's controller")
            return "wrong_direction"
        return ""

    def _singular_too_long(self, info, t: float) -> bool:
        """Halt image_jacobian_singular when the judged singular value stayed below
        singular_halt_fraction x singular_threshold for singular_halt_s: the damped solve then
        barely moves the arm, and the run would only end at its timeout."""
        s, run = self.settings, self._run
        sigma = info.dls.sigma_judge if info.dls is not None else math.inf
        floor = s.singular_halt_fraction * s.singular_threshold
        if not sigma < floor:
            run.singular_since = None
            return False
        if run.singular_since is None:
            run.singular_since = t
        if t - run.singular_since < s.singular_halt_s:
            return False
        why = ("the features (nearly) cannot tell some camera motions apart, e.g. a turn near "
               "180 deg about the optical axis; teach closer to the start view or set "
               "control.scheme: decoupled" if s.scheme == "point" else
               "the arm (nearly) cannot make some camera motions here (a kinematic "
               "singularity of the camera Jacobian)")
        self.halt("image_jacobian_singular", t,
                  f"judged singular value {sigma:.2e} < {floor:.2e} for {t - run.singular_since:.2f}"
                  f" s: {why}")
        return True

    def _margins(self, info, uv: np.ndarray, q: np.ndarray, envelope_used: float) -> float:
        """Speed scale in [margin_floor, 1]: the smallest of the singularity, joint-limit,
        image-border and motion-envelope margins (our design; common practice, no source).
        Each slows the motion smoothly as its hazard nears; hard halts act beyond."""
        s = self.settings

        def ramp(room: float, zone: float) -> float:
            return float(np.clip(room / zone, s.margin_floor, 1.0)) if zone > 0 else 1.0

        scales = [1.0]
        if info.dls is not None:
            scales.append(ramp(info.dls.sigma_judge, s.singular_threshold))
        bounded = np.isfinite(self.limits.lower) & np.isfinite(self.limits.upper)
        if np.any(bounded):
            room = np.minimum(q - self.limits.lower, self.limits.upper - q)[bounded]
            scales.append(ramp(float(np.min(room)), s.joint_zone_rad))
        size = self.reference.image_size
        if size is not None and len(uv):
            width, height = size
            room_px = np.min(np.minimum.reduce([uv[:, 0], uv[:, 1], width - 1 - uv[:, 0],
                                                height - 1 - uv[:, 1]]))
            scales.append(ramp(float(room_px), s.border_margin_px))
        scales.append(ramp(1.0 - envelope_used, s.envelope_zone))
        return min(scales)

    # --- the output cycle ------------------------------------------------------------------
    def command(self, q: np.ndarray, t: float, dt: float) -> tuple[np.ndarray, dict]:
        """Limited joint command for this output period and the status record.

        Never raises: non-finite joints halt ``numerical_fault`` and an unexpected error
        ``internal_error``; either way the command ramps from the last one to zero at the
        deceleration limit without kinematics (:meth:`brake_blind`)."""
        try:
            return self._command(q, t, dt)
        except Exception as exc:  # noqa: BLE001 - the last-resort guard of the output tick
            self.halt("internal_error", t, f"{type(exc).__name__} in the output cycle: {exc}")
            return self.brake_blind(t, dt)

    def _command(self, q, t: float, dt: float) -> tuple[np.ndarray, dict]:
        q = np.asarray(q, dtype=float)
        if self.state not in MOVING_STATES:
            cmd = np.zeros(self.arm.n)
            self._last_cmd = cmd
            return cmd, self._status(t, cmd, [])
        if q.shape != (self.arm.n,) or not np.all(np.isfinite(q)):
            bad = [n for n, v in zip(self.arm.joint_names, np.ravel(q)) if not math.isfinite(v)]
            self.halt("numerical_fault", t, "non-finite joint position(s): " + ", ".join(bad)
                      if bad else f"joint positions of shape {q.shape}")
            return self.brake_blind(t, dt)
        if self.state != "braking":
            self._supervise(q, t)
        if self.state != "braking" and self.settings.predict_between_frames:
            self._predict(q, t)
        desired = self._desired if self.state != "braking" else np.zeros(self.arm.n)
        scale = min(self.external_scale, self._margin_scale)
        J_tool_pt, J_cam_pt, J_ang = self._cartesian_jacobians(q)
        cmd, report = self.limiter.step(desired, q, dt, J_tool_pt, J_cam_pt, J_ang,
                                        speed_scale=scale)
        if report.fault and self.state != "braking":
            self.halt("numerical_fault", t, f"limiter: {report.fault}")
        if "position_envelope" in report.acted and self.state != "braking":
            joint = (self.arm.joint_names[report.winner_joint]
                     if report.winner == "position_envelope" and report.winner_joint is not None
                     else "a joint")
            self.halt("joint_limit_envelope", t, f"{joint} is within its braking distance of "
                      f"its limit (limits.position_margin included)")
        self._run.follow_cmd = self._run.follow_cmd + cmd * dt
        return self._finish_tick(cmd, t, list(report.acted))

    def _supervise(self, q: np.ndarray, t: float) -> None:
        """The checks that bound motion, judged on every output tick from the latest joints,
        whether or not a frame could be used: run timeout, no observation for
        observation_timeout_s, the motion envelope, and the arm following its command."""
        s, run = self.settings, self._run
        if t - run.t_start > s.max_run_s:
            detail = f"run lasted {t - run.t_start:.2f} s > control.max_run_s = {s.max_run_s} s"
            if s.pose_tolerance.active:   # say how far the arrival criterion in mm/deg was
                detail += (f"; {run.pose_window.summary().describe()} against control."
                           f"tolerance_mm = {s.tolerance_mm}, tolerance_deg = "
                           f"{s.tolerance_deg} (a noisier estimate needs a longer "
                           "control.dwell_s)")
            self.halt("run_timeout", t, detail)
            return
        since = run.last_obs_t if run.last_obs_t is not None else run.t_start
        if t - since > s.observation_timeout_s:
            self.halt("image_stale", t, f"no image used by the servo for {t - since:.2f} s "
                      f"(io.image_timeout_s = {s.observation_timeout_s} s)")
            return
        if self._envelope_fraction(q) > 1.0:
            moved_m, turned = frames.pose_error(run.T_base_tool_start, self.arm.fk(q))
            self.halt("motion_envelope", t, f"tool moved {1e3 * moved_m:.1f} mm / turned "
                      f"{math.degrees(turned):.1f} deg from its start pose (limits."
                      f"max_translation_m = {s.max_translation_m}, max_rotation_deg = "
                      f"{s.max_rotation_deg})")
            return
        # the arm against its command (before the image error's growth, judged per frame in
        # observe: when the arm moves wrongly the error also grows, and the more specific
        # reason is the more useful one)
        following = self._following(q, t)
        if following:
            self.halt(following, t, self._follow_detail)

    def brake_blind(self, t: float, dt: float) -> tuple[np.ndarray, dict]:
        """Ramp the last command to zero at the deceleration limit, every joint scaled alike
        (direction kept), with no kinematics and no joint positions: the path for non-finite
        joints and unexpected errors. Ends the run (halted) once at zero."""
        last = np.asarray(self._last_cmd, dtype=float)
        if not np.all(np.isfinite(last)):
            last = np.zeros(self.arm.n)
        speed = np.abs(last)
        moving = speed > 0
        c = 0.0
        if np.any(moving):
            accel = np.broadcast_to(self.limits.acceleration, last.shape)
            c = max(0.0, 1.0 - float(np.min(accel[moving] * dt / speed[moving])))
        cmd = c * last
        try:
            self.limiter.previous = cmd.copy()
        except Exception:  # noqa: BLE001 - a broken limiter must not stop the braking
            pass
        if self.state == "servoing" or self.state == "settling":
            self.state = "braking"
        return self._finish_tick(cmd, t, ["blind_brake"])

    def _finish_tick(self, cmd: np.ndarray, t: float, acted: list) -> tuple[np.ndarray, dict]:
        if self.state == "braking" and np.max(np.abs(cmd)) <= 1e-9:
            cmd = np.zeros(self.arm.n)
            self._end("halted", self.reason, t)
        self._last_cmd = cmd
        return cmd, self._status(t, cmd, acted)

    def step(self, obs: Observation | None, q: np.ndarray, t: float, dt: float
             ) -> tuple[np.ndarray, dict]:
        if obs is not None:
            self.observe(obs, q, t)
        return self.command(q, t, dt)

    def _predict(self, q: np.ndarray, t: float) -> None:
        """Between frames, re-run the law on the features predicted for the joints now: the
        last frame's error plus the local image Jacobian times the joint travel since that
        frame (first order: s(q) ~ s(q_f) + J (q - q_f), Chaumette & Hutchinson 2006, Part I,
        eq. 3-4 with v_c = J_cam dq), and the image Jacobian rebuilt at the predicted features
        and the joints now (depths kept from the frame). The supervisor still judges only
        real frames; the nod, when running, is left alone. With the decoupled scheme its task
        is rebuilt at the relative pose moved by the camera displacement J_cam(q_f) (q - q_f)
        (first order; decoupled.predicted)."""
        frame, run = self._frame, self._run
        if frame is None or frame.law_inputs is None or run is None or self._nodding(t):
            return
        dq_since = q - frame.q
        if not np.all(np.isfinite(dq_since)):
            return
        e = frame.e + (frame.J_move[0] + frame.J_move[1]) @ dq_since
        norm_e = float(np.linalg.norm(frame.e))
        rms_px = frame.rms_px * float(np.linalg.norm(e)) / norm_e if norm_e > 0 else 0.0
        camera_jac = self._camera_jacobian(q)
        if frame.task is not None:
            try:
                task = decoupled.predicted(frame.task,
                                           self._camera_jacobian(frame.q) @ dq_since)
            except ValueError:
                return        # keep the frame's command; the next frame judges
            e_law, J_law = task.error, task.L @ camera_jac
        else:
            z_now, xy_ref, z_ref = frame.law_inputs
            xy_now = xy_ref + e.reshape(-1, 2)
            e_law = e
            J_law = interaction_matrix(self.settings.interaction_estimate, xy_now, z_now,
                                       xy_ref, z_ref) @ camera_jac
        dq, info = self.law.compute(J_law, e_law, rms_px, q, t,
                                    null_space_enabled=self.state == "servoing")
        if info.fault:
            return
        self._law_info = info
        self._desired = dq

    def _nodding(self, t: float) -> bool:
        """Is the start nod running at time t (or still to start: no image yet)?"""
        s, run = self.settings, self._run
        if s.direction_probe_px <= 0 or s.direction_probe_s <= 0:
            return False
        return run.probe_t0 is None or 0.0 <= t - run.probe_t0 < s.direction_probe_s

    def _camera_jacobian(self, q: np.ndarray) -> np.ndarray:
        """(6, n) camera twist [v; w] in the camera optical frame per joint velocity (relative
        to the target: with a fixed camera, control.mounting)."""
        if self.mount is not None:
            return self.mount.camera_jacobian(self.arm, q)
        return self.arm.camera_from_tool() @ self.arm.jacobian_tool(q)

    def _cartesian_jacobians(self, q):
        """Tool point, camera origin (linear; a fixed camera's target origin) and tool angular
        Jacobians, 3 x n each."""
        if self.mount is not None:
            return self.mount.cartesian_jacobians(self.arm, q, self.tool_point)
        return self.arm.cartesian_jacobians(q, self.tool_point)

    def _end(self, state: str, reason: str, t: float) -> None:
        self.state, self.reason = state, reason
        self._desired = np.zeros(self.arm.n)
        run = self._run
        run.end_t = t
        pose = run.pose_window.summary() if run.pose_window is not None else None
        self.result = {
            "run_id": run.run_id, "converged": state == "converged", "reason": reason,
            "time_s": t - run.t_start, "final_rms_px": run.final_rms, "detail": self.detail,
            "final_pose_error_mm": None, "final_pose_error_deg": None,
            "pose_estimate": (run.pose_estimator.method if run.pose_estimator is not None
                              else ""),
            "estimated_pose_error_mm": pose.mm if pose else math.nan,
            "estimated_pose_error_deg": pose.deg if pose else math.nan,
            "estimated_pose_error_spread_mm": pose.spread_mm if pose else math.nan,
            "estimated_pose_error_spread_deg": pose.spread_deg if pose else math.nan,
            "estimated_pose_error_frames": pose.n if pose else 0,
            "pose_estimate_check_mm": pose.check_mm if pose else math.nan,
            "pose_estimate_check_deg": pose.check_deg if pose else math.nan,
        }

    def _status(self, t: float, cmd: np.ndarray, acted: list[str]) -> dict:
        frame, info = self._frame, self._law_info
        dls = info.dls if info is not None else None
        pose = self._run.pose if self._run is not None else None
        return {
            "t": t,
            "run_id": self._run.run_id if self._run else "",
            "state": self.state,
            "reason": self.reason,
            "detail": self.detail,
            "rms_px": frame.rms_px if frame else math.nan,
            "pose_error_mm": pose.translation_mm if pose is not None else math.nan,
            "pose_error_deg": pose.rotation_deg if pose is not None else math.nan,
            "n_matched": len(frame.keys) if frame else 0,
            "gain": info.gain if info else 0.0,
            "sigma_min": dls.sigma_judge if dls else math.nan,
            "damping": dls.damping if dls else 0.0,
            "speed_scale": min(self.external_scale, self._margin_scale),
            "limits_acted": acted,
            "limit_counts": dict(self.limiter.counts),
            "cycle_ms": 0.0,
            "dq": cmd.tolist(),
        }

    # --- read-only views for the shells -----------------------------------------------------
    def camera_twist(self, q: np.ndarray, dq: np.ndarray) -> np.ndarray:
        """Camera twist [v; w] in the camera optical frame for joint velocity dq."""
        return self._camera_jacobian(q) @ dq
