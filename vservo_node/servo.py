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

Supervisor (states: vservo_node.interface.State; halt reasons: interface.HaltReason):
  disabled --enable--> armed --start--> servoing <-> settling --dwell--> converged
  any moving state --halt reason--> braking --command at zero--> halted
Halting ramps the command to zero at the deceleration limit, then reports an explicit zero.
"""
from __future__ import annotations

import math
from typing import TYPE_CHECKING, Any, Sequence

import numpy as np

from vservo_node.control import decoupled
from vservo_node.control.interaction import interaction_matrix, point_interaction_matrix
from vservo_node.control.law import ControlLaw, LawInfo
from vservo_node.control.pose_error import PoseErrorEstimator, PoseWindow
from vservo_node.control.safety import LimitSet, Limiter
from vservo_node.interface import (HALT_REASONS, MOVING_STATES, RUN_STATES, STARTABLE_STATES,
                                   HaltReason, State)
from vservo_node.servo_checks import SupervisorChecks
from vservo_node.servo_inputs import Observation, TaughtView
from vservo_node.servo_run import (Frame, Matched, RunState, joints_outside, run_result,
                                   status_record)
from vservo_node.servo_settings import PARAM_OF_FIELD, ServoSettings

if TYPE_CHECKING:
    from vservo_node.control.kinematics import ArmModel
    from vservo_node.control.pose_error import WindowSummary

# Public names of the servo, re-exported from the modules it is split into (import paths kept).
__all__ = ["HALT_REASONS", "MOVING_STATES", "PARAM_OF_FIELD", "Observation", "Servo",
           "ServoSettings", "TaughtView"]


def _check_scheme(settings: ServoSettings) -> None:
    if settings.scheme not in decoupled.SCHEMES:
        raise ValueError(f"control scheme {settings.scheme!r}; expected one of "
                         f"{', '.join(decoupled.SCHEMES)}")


class Servo(SupervisorChecks):
    """Composes the interaction matrix, the arm model, the law, the limiter and the supervisor.

    ``arm``: a vservo_node.control.kinematics.ArmModel (its T_tool_camera is the hand-eye the
    servo believes). ``limits``: vservo_node.control.safety.LimitSet for the arm's joints.
    ``tool_point``: point (tool frame, m) whose linear speed is limited.
    """

    def __init__(self, arm: ArmModel, settings: ServoSettings, limits: LimitSet,
                 tool_point: Sequence[float] = (0.0, 0.0, 0.0), mount: Any = None) -> None:
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
        self.state = State.DISABLED
        self.enabled = False
        self.reason = ""
        self.detail = ""          # what the check that fired saw, with its figures
        self._direction_detail = ""
        self._follow_detail = ""
        self.external_scale = 1.0
        self._run: RunState | None = None
        self._frame: Frame | None = None
        self._desired = np.zeros(arm.n)
        self._last_cmd = np.zeros(arm.n)
        self._law_info: LawInfo | None = None
        self._margin_scale = 1.0
        self._runs = 0
        self.result: dict[str, Any] | None = None

    # --- configuration ---------------------------------------------------------------------
    @staticmethod
    def check_config(arm: ArmModel, settings: ServoSettings, limits: LimitSet) -> None:
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
    def set_reference(self, view: TaughtView | None) -> None:
        if self.state in MOVING_STATES:
            raise RuntimeError("cannot change the reference while moving; stop first")
        self.reference = view

    def enable(self, on: bool, t: float) -> tuple[bool, str]:
        """Enable or disable motion. Disabling while moving brakes to zero first."""
        self.enabled = bool(on)
        if on:
            if self.state == State.DISABLED:
                self.state = State.ARMED
            return True, "motion enabled"
        if self.state in RUN_STATES:
            self.halt(HaltReason.MOTION_DISABLED, t)
        elif self.state != State.BRAKING:
            self.state = State.DISABLED
        return True, "motion disabled"

    def start(self, q: np.ndarray, t: float, run_id: str | None = None) -> tuple[bool, str]:
        """Begin a run from joint positions q. Allowed when motion is enabled and no run moves."""
        if not self.enabled:
            return False, "motion is not enabled (call enable first)"
        if self.state not in STARTABLE_STATES:
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
        self._run = RunState(run_id or f"run{self._runs}", t,
                              self.arm.fk(np.asarray(q, float)),
                              pose_window=PoseWindow(self.settings.dwell_s),
                              pose_estimator=estimator)
        self._frame = None
        self._law_info = None
        self._desired = np.zeros(self.arm.n)
        self.limiter = Limiter(self.limits)  # counts are per run
        self._last_cmd = np.zeros(self.arm.n)
        self.state, self.reason, self.detail, self.result = State.SERVOING, "", "", None
        return True, f"run {self._run.run_id} started"

    def _pose_estimator(self) -> tuple[PoseErrorEstimator | None, str]:
        """The pose-error estimator of the taught view (PnP with its model points, else the
        plane homography with its depths or the constant depth), or None and why not."""
        view = self._taught
        depth = view.depth if view.depth is not None else self.settings.constant_depth_m
        try:
            estimator = PoseErrorEstimator(view.xy, model_points=view.model, taught_depths=depth)
            return (estimator if self.mount is None else self.mount.pose_errors(estimator)), ""
        except ValueError as exc:
            return None, str(exc)

    def pose_summary(self) -> WindowSummary | None:
        """The pose-error estimates of the current (or last) run's last dwell_s
        (``control.pose_error.WindowSummary``), or None before any run."""
        run = self._run
        return run.pose_window.summary() if run is not None and run.pose_window else None

    def joints_outside_limits(self, q: np.ndarray | Sequence[float]) -> list[str]:
        """One line per joint of q outside the arm's position limits (or not finite)."""
        return joints_outside(self.arm.joint_names, self.arm.lower, self.arm.upper, q)

    def stop(self, t: float) -> tuple[bool, str]:
        if self.state in RUN_STATES:
            self.halt(HaltReason.STOP_REQUESTED, t)
            return True, "stopping: braking to zero"
        return True, f"nothing to stop in state '{self.state}'"

    def halt(self, reason: str, t: float, detail: str = "") -> None:
        """Begin braking for reason (a key of HALT_REASONS), ``detail`` saying what the check
        saw. Only the first reason counts."""
        if self.state not in RUN_STATES:
            return
        self.state, self.reason, self.detail = State.BRAKING, reason, detail
        self._desired = np.zeros(self.arm.n)

    # --- the vision cycle ------------------------------------------------------------------
    def observe(self, obs: Observation, q: np.ndarray, t: float) -> None:
        """Run the law for one image (time t = image time, q = joints at that time), in named
        steps: match the taught features, check the inputs, the first error, the law's task,
        the image checks (direction, divergence), then the law, the nod and arrival. A step
        whose check fails halts and ends the cycle."""
        if self.state not in RUN_STATES or self.reference is None:
            return
        q = np.asarray(q, dtype=float)
        m = self._match(obs, t)
        if m is None or not self._inputs_usable(m, q, t):
            return
        e = (m.xy_now - m.xy_ref).ravel()
        rms_px = float(np.sqrt(np.mean(np.sum((m.uv_now - m.uv_ref) ** 2, axis=1))))
        camera_jac = self._camera_jacobian(q)
        if self._frame is None and self._initial_error_too_large(rms_px, t):
            return
        law_task = self._law_task(m, e, camera_jac, t)
        if law_task is None:
            return
        J_law, e_law, task = law_task
        prev = self._frame
        if prev is None or prev.keys != m.keys or (prev.task is None) != (task is None):
            self.law.restart(e_law, t)
        frame = Frame(t, q, m.keys, e, self._motion_jacobian(m, camera_jac), rms_px,
                      (m.z_now, m.xy_ref, m.z_ref), task)
        if self._judged_wrong_direction(frame, t):
            return
        self._accept(frame, t)
        if self._diverging(rms_px, t):
            return
        self._apply_law(J_law, e_law, frame, m, camera_jac, t)

    def _match(self, obs: Observation, t: float) -> Matched | None:
        """The observation's features matched to the taught view (their depths now and as
        taught), or None after halting too_few_features."""
        s, ref = self.settings, self._taught
        ref_index = ref.index()
        pairs = [(i, ref_index[k]) for i, k in enumerate(obs.keys) if k in ref_index]
        if len(pairs) < s.min_features:
            self.halt(HaltReason.TOO_FEW_FEATURES, t,
                      f"{len(pairs)} of {len(ref.keys)} taught features matched; "
                      f"control.min_features = {s.min_features}")
            return None
        now_i, ref_i = (np.array(ix) for ix in zip(*pairs))
        z_ref = (ref.depth[ref_i] if ref.depth is not None
                 else np.full(len(ref_i), s.constant_depth_m))
        return Matched(tuple(obs.keys[i] for i in now_i), now_i, ref_i,
                       np.asarray(obs.xy, float)[now_i], ref.xy[ref_i],
                       np.asarray(obs.uv, float)[now_i], ref.uv[ref_i],
                       self._current_depth(obs, now_i, z_ref), z_ref)

    def _inputs_usable(self, m: Matched, q: np.ndarray, t: float) -> bool:
        """Finite features, depths and joints, no feature too close; else halt."""
        s = self.settings
        if not (np.all(np.isfinite(m.xy_now)) and np.all(np.isfinite(m.z_now)) and
                np.all(np.isfinite(q))):
            bad = [name for name, v in (("features", m.xy_now), ("depths", m.z_now),
                                        ("joints", q)) if not np.all(np.isfinite(v))]
            self.halt(HaltReason.NUMERICAL_FAULT, t,
                      "non-finite " + ", ".join(bad) + " in an image cycle")
            return False
        if np.min(m.z_now) < s.min_camera_distance_m:
            self.halt(HaltReason.TOO_CLOSE, t, f"nearest feature at {np.min(m.z_now):.3f} m < "
                      f"limits.min_camera_distance_m = {s.min_camera_distance_m} m")
            return False
        return True

    def _initial_error_too_large(self, rms_px: float, t: float) -> bool:
        s = self.settings
        if rms_px > s.max_initial_error_px:
            self.halt(HaltReason.INITIAL_ERROR_TOO_LARGE, t, f"first RMS error {rms_px:.1f} px "
                      f"> control.max_initial_error_px = {s.max_initial_error_px}")
            return True
        return False

    @staticmethod
    def _motion_jacobian(m: Matched, camera_jac: np.ndarray) -> np.ndarray:
        """(2, 2N, n): feature motion per joint rate from the camera's translation and from
        its rotation. The local image Jacobian (current features) predicts how features move;
        the law's estimate may be taught or blended, which only approximates it far from the
        goal."""
        L_local = point_interaction_matrix(m.xy_now, m.z_now)
        return np.stack([L_local[:, :3] @ camera_jac[:3], L_local[:, 3:] @ camera_jac[3:]])

    def _law_task(self, m: Matched, e: np.ndarray, camera_jac: np.ndarray, t: float
                  ) -> tuple[np.ndarray, np.ndarray, decoupled.Task | None] | None:
        """(J_law, e_law, task) the law solves: the image Jacobian and the feature error, or
        with the decoupled scheme that scheme's task; None after halting
        pose_estimate_failed."""
        s, run = self.settings, self._active_run
        if s.scheme != "decoupled":
            L = interaction_matrix(s.interaction_estimate, m.xy_now, m.z_now, m.xy_ref, m.z_ref)
            return L @ camera_jac, e, None
        try:
            task = decoupled.task(m.xy_now, m.xy_ref, m.z_ref, run.theta_u)
        except ValueError as exc:
            self.halt(HaltReason.POSE_ESTIMATE_FAILED, t, f"{exc} (control.scheme decoupled "
                      "needs the taught depths and >= 4 matched points on a spread-out target)")
            return None
        run.theta_u = task.theta_u
        return task.L @ camera_jac, task.error, task

    def _judged_wrong_direction(self, frame: Frame, t: float) -> bool:
        """The image direction check against the run's anchor frame (:meth:`_wrong_direction`);
        True after halting wrong_direction."""
        run = self._active_run
        anchor = run.direction_anchor
        if anchor is None or anchor.keys != frame.keys:
            run.direction_anchor = frame
            return False
        verdict = self._wrong_direction(anchor, frame.e, frame.q)
        if verdict is not None:          # judged: the next judgement starts here
            run.direction_anchor = frame
        if verdict:
            self.halt(HaltReason.WRONG_DIRECTION, t, "image check: " + self._direction_detail)
            return True
        return False

    def _accept(self, frame: Frame, t: float) -> None:
        """The frame becomes the last one the law used."""
        run = self._active_run
        self._frame = frame
        run.last_obs_t = t
        run.best_rms = min(run.best_rms, frame.rms_px)
        run.final_rms = frame.rms_px

    def _diverging(self, rms_px: float, t: float) -> bool:
        s, run = self.settings, self._active_run
        if rms_px > s.diverge_factor * run.best_rms + s.diverge_margin_px:
            self.halt(HaltReason.DIVERGING, t, f"RMS error {rms_px:.1f} px > {s.diverge_factor}"
                      f" x best {run.best_rms:.1f} px + {s.diverge_margin_px} px")
            return True
        return False

    def _apply_law(self, J_law: np.ndarray, e_law: np.ndarray, frame: Frame, m: Matched,
                   camera_jac: np.ndarray, t: float) -> None:
        """The law's command for this frame (or the nod's while it runs), the margins' speed
        scale, then arrival."""
        q = frame.q
        envelope_used = self._envelope_fraction(q)   # for the margins; the tick halts on it
        dq, info = self.law.compute(J_law, e_law, frame.rms_px, q, t,
                                    null_space_enabled=self.state == State.SERVOING)
        self._law_info = info
        if info.fault:
            self.halt(HaltReason.NUMERICAL_FAULT, t, "the control law got non-finite values")
            return
        if self._singular_too_long(info, t):
            return
        nod = self._probe(camera_jac, t)
        if nod is None:
            self._desired = dq
        else:                  # the law waits for the nod; its soft start begins after it
            self.law.restart(e_law, t)
            self._desired = nod
        self._margin_scale = self._margins(info, m.uv_now, q, envelope_used)
        self._arrival(m.xy_now, m.ref_i, frame.rms_px, t)

    def _current_depth(self, obs: Observation, now_i: np.ndarray, z_ref: np.ndarray
                       ) -> np.ndarray:
        s = self.settings
        if s.depth_source == "observed" and obs.depth is not None:
            return np.asarray(np.asarray(obs.depth, float)[now_i])
        if s.depth_source == "constant":
            return np.full(len(now_i), s.constant_depth_m)
        return z_ref  # taught depth: the depth at the goal stands in for the current one

    # --- the output cycle ------------------------------------------------------------------
    def command(self, q: np.ndarray, t: float, dt: float) -> tuple[np.ndarray, dict[str, Any]]:
        """Limited joint command for this output period and the status record.

        Never raises: non-finite joints halt ``numerical_fault`` and an unexpected error
        ``internal_error``; either way the command ramps from the last one to zero at the
        deceleration limit without kinematics (:meth:`brake_blind`)."""
        try:
            return self._command(q, t, dt)
        except Exception as exc:  # noqa: BLE001 - the last-resort guard of the output tick
            self.halt(HaltReason.INTERNAL_ERROR, t,
                      f"{type(exc).__name__} in the output cycle: {exc}")
            return self.brake_blind(t, dt)

    def _command(self, q: np.ndarray, t: float, dt: float) -> tuple[np.ndarray, dict[str, Any]]:
        q = np.asarray(q, dtype=float)
        if self.state not in MOVING_STATES:
            cmd = np.zeros(self.arm.n)
            self._last_cmd = cmd
            return cmd, self._status(t, cmd, [])
        if q.shape != (self.arm.n,) or not np.all(np.isfinite(q)):
            bad = [n for n, v in zip(self.arm.joint_names, np.ravel(q)) if not math.isfinite(v)]
            self.halt(HaltReason.NUMERICAL_FAULT, t,
                      "non-finite joint position(s): " + ", ".join(bad)
                      if bad else f"joint positions of shape {q.shape}")
            return self.brake_blind(t, dt)
        if self.state != State.BRAKING:
            self._supervise(q, t)
        if self.state != State.BRAKING and self.settings.predict_between_frames:
            self._predict(q, t)
        desired = self._desired if self.state != State.BRAKING else np.zeros(self.arm.n)
        scale = min(self.external_scale, self._margin_scale)
        J_tool_pt, J_cam_pt, J_ang = self._cartesian_jacobians(q)
        cmd, report = self.limiter.step(desired, q, dt, J_tool_pt, J_cam_pt, J_ang,
                                        speed_scale=scale)
        if report.fault and self.state != State.BRAKING:
            self.halt(HaltReason.NUMERICAL_FAULT, t, f"limiter: {report.fault}")
        if "position_envelope" in report.acted and self.state != State.BRAKING:
            joint = (self.arm.joint_names[report.winner_joint]
                     if report.winner == "position_envelope" and report.winner_joint is not None
                     else "a joint")
            self.halt(HaltReason.JOINT_LIMIT_ENVELOPE, t, f"{joint} is within its braking "
                      "distance of its limit (limits.position_margin included)")
        run = self._active_run
        run.follow_cmd = run.follow_cmd + cmd * dt
        return self._finish_tick(cmd, t, list(report.acted))

    def brake_blind(self, t: float, dt: float) -> tuple[np.ndarray, dict[str, Any]]:
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
        if self.state in RUN_STATES:
            self.state = State.BRAKING
        return self._finish_tick(cmd, t, ["blind_brake"])

    def _finish_tick(self, cmd: np.ndarray, t: float, acted: list[str]
                     ) -> tuple[np.ndarray, dict[str, Any]]:
        if self.state == State.BRAKING and np.max(np.abs(cmd)) <= 1e-9:
            cmd = np.zeros(self.arm.n)
            self._end(State.HALTED, self.reason, t)
        self._last_cmd = cmd
        return cmd, self._status(t, cmd, acted)

    def step(self, obs: Observation | None, q: np.ndarray, t: float, dt: float
             ) -> tuple[np.ndarray, dict[str, Any]]:
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
                                    null_space_enabled=self.state == State.SERVOING)
        if info.fault:
            return
        self._law_info = info
        self._desired = dq

    def _camera_jacobian(self, q: np.ndarray) -> np.ndarray:
        """(6, n) camera twist [v; w] in the camera optical frame per joint velocity (relative
        to the target: with a fixed camera, control.mounting)."""
        if self.mount is not None:
            return np.asarray(self.mount.camera_jacobian(self.arm, q))
        return np.asarray(self.arm.camera_from_tool() @ self.arm.jacobian_tool(q))

    def _cartesian_jacobians(self, q: np.ndarray
                             ) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
        """Tool point, camera origin (linear; a fixed camera's target origin) and tool angular
        Jacobians, 3 x n each."""
        if self.mount is not None:
            tool, camera, angular = self.mount.cartesian_jacobians(self.arm, q, self.tool_point)
        else:
            tool, camera, angular = self.arm.cartesian_jacobians(q, self.tool_point)
        return tool, camera, angular

    def _end(self, state: str, reason: str, t: float) -> None:
        self.state, self.reason = state, reason
        self._desired = np.zeros(self.arm.n)
        run = self._active_run
        run.end_t = t
        self.result = run_result(run, state, reason, self.detail, t)

    def _status(self, t: float, cmd: np.ndarray, acted: list[str]) -> dict[str, Any]:
        return status_record(t, self._run, self._frame, self._law_info, self.state, self.reason,
                             self.detail, min(self.external_scale, self._margin_scale),
                             dict(self.limiter.counts), cmd, acted)

    # --- read-only views for the shells -----------------------------------------------------
    def camera_twist(self, q: np.ndarray, dq: np.ndarray) -> np.ndarray:
        """Camera twist [v; w] in the camera optical frame for joint velocity dq."""
        return np.asarray(self._camera_jacobian(q) @ dq)
