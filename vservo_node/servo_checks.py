"""The supervisor's checks, as methods Servo inherits: the image direction check and the start
nod, the follow check, the motion envelope, the singular image Jacobian, the speed-scale
margins, the checks of every output tick (``_supervise``) and arrival (``_arrival``); see
DEVELOPERS.md, "The supervisor's direction checks". They read the servo's settings, run and
taught view and call its ``halt``; thresholds are ServoSettings fields (schema
``supervisor.*``) or the documented class constants below.
"""
from __future__ import annotations

import math
from typing import Any

import numpy as np

from vservo_node.control import frames
from vservo_node.control.law import LawInfo
from vservo_node.control.safety import LimitSet
from vservo_node.interface import HaltReason, State
from vservo_node.servo_inputs import TaughtView
from vservo_node.servo_run import Frame, RunState
from vservo_node.servo_settings import ServoSettings


class SupervisorChecks:
    """Mixin of :class:`vservo_node.servo.Servo` (not used alone)."""

    arm: Any
    mount: Any
    settings: ServoSettings
    limits: LimitSet
    reference: TaughtView | None
    _run: RunState | None
    _direction_detail: str
    _follow_detail: str

    _last_cmd: np.ndarray
    state: str

    @property
    def _active_run(self) -> RunState:
        """The run in progress: the checks run only within one (RuntimeError otherwise, which
        the output tick turns into a blind brake)."""
        if self._run is None:
            raise RuntimeError("no run in progress")
        return self._run

    @property
    def _taught(self) -> TaughtView:
        """The taught view (a run starts only with one)."""
        if self.reference is None:
            raise RuntimeError("no taught reference")
        return self.reference

    def halt(self, reason: str, t: float, detail: str = "") -> None:
        raise NotImplementedError      # Servo.halt

    def _end(self, state: str, reason: str, t: float) -> None:
        raise NotImplementedError      # Servo._end

    # The wrong-direction check fits seen = a * (translational flow) + (rotational flow); the
    # fitted a is believed depth / true depth. Plausible: a in this range (depths within a
    # factor of ~3), and the fit explaining the seen motion (residual below this fraction).
    WRONG_DIRECTION_DEPTH_RATIO: tuple[float, float] = (0.3, 3.0)
    WRONG_DIRECTION_RESIDUAL = 0.6
    # ... and, besides, the seen motion more than 60 deg away from the predicted one: a tilted
    # hand-eye (5 deg) under a turn about the optical axis leaves a large residual (the turn's
    # small flow picks up the uniform flow of the tilt's share) while the features still go
    # where predicted, ~40 deg off (measured on tray_combined).
    WRONG_DIRECTION_COSINE = 0.5

    def _wrong_direction(self, prev: Frame, e: np.ndarray, q: np.ndarray) -> bool | None:
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
        norm_px = self._taught.px_per_unit / math.sqrt(len(e) / 2)
        if np.linalg.norm(predicted) * norm_px < s.wrong_direction_min_px:
            return None
        left = seen - moved_by_rotation
        tt = float(moved_by_translation @ moved_by_translation)
        # the best plausible depth ratio (an implausible one would explain nothing real; when
        # the translational flow is small the ratio is ill-determined and the clip holds it)
        ratio = float(np.clip(float(moved_by_translation @ left) / tt if tt > 0 else 1.0,
                              *self.WRONG_DIRECTION_DEPTH_RATIO))
        residual = float(np.linalg.norm(left - ratio * moved_by_translation))
        seen_norm = float(np.linalg.norm(seen))
        cosine = float(seen @ predicted) / max(seen_norm * float(np.linalg.norm(predicted)), 1e-300)
        opposed = (residual > self.WRONG_DIRECTION_RESIDUAL * seen_norm
                   and cosine < self.WRONG_DIRECTION_COSINE)
        self._direction_detail = (
            f"features moved {math.degrees(math.acos(max(-1.0, min(1.0, cosine)))):.0f} deg away "
            f"from the predicted motion (fit residual {residual / max(seen_norm, 1e-300):.2f} of "
            "the seen motion) for several frames: check " + (
                "the hand-eye (robot.hand_eye), the camera's optical frame and the depth source"
                if self.mount is None else "robot.camera_mount, the fixed camera's pose "
                "(robot.fixed_camera_pose / _frame), robot.target_on_tool and the depth source"))
        run = self._active_run
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
        s, run = self.settings, self._active_run
        if run.probe_t0 is None:
            run.probe_t0 = t
        if not self._nodding(t):
            return None
        tau = t - run.probe_t0
        # peak angle = peak speed * period / pi; shift (px) = focal (px per unit) * angle
        peak = math.pi * s.direction_probe_px / (s.direction_probe_s * self._taught.px_per_unit)
        w = peak * math.sin(2.0 * math.pi * tau / s.direction_probe_s) / math.sqrt(2.0)
        twist = np.array([0.0, 0.0, 0.0, w, w, 0.0])
        return np.asarray(np.linalg.pinv(camera_jac, rcond=1e-3) @ twist)

    def _envelope_fraction(self, q: np.ndarray) -> float:
        """Fraction of the motion envelope used: the larger of tool translation and rotation
        from the start pose over their maxima (> 1: outside)."""
        s, run = self.settings, self._active_run
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
        s, run = self.settings, self._active_run
        nodding = self._nodding(t)
        if run.follow_q0 is None:
            if nodding and run.probe_t0 is None:
                return ""         # no image yet: nothing commanded, the nod starts with one
            self._open_follow_window(q, t, "nod_out" if nodding else "run")
            return ""
        if run.follow_phase == "nod_out":
            if nodding and run.probe_t0 is not None and \
                    t - run.probe_t0 < 0.5 * s.direction_probe_s:
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
        run = self._active_run
        run.follow_q0, run.follow_t0, run.follow_cmd, run.follow_phase = q.copy(), t, 0.0, phase

    def _judge_following(self, q: np.ndarray, judge_travel: bool = True) -> str:
        s, run = self.settings, self._active_run
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
            return HaltReason.NOT_FOLLOWING if judge_travel else ""
        if float(moved @ asked) < self.FOLLOW_COSINE * measured * commanded:
            worst = int(np.argmin(moved * asked))
            cosine = max(-1.0, min(1.0, float(moved @ asked) / (measured * commanded)))
            self._follow_detail = (
                f"follow check: joints travelled {math.degrees(math.acos(cosine)):.0f}"
                f" deg away from their command (joint {self.arm.joint_names[worst]} moved "
                f"{moved[worst]:+.4f} rad, commanded {asked[worst]:+.4f} rad): check "
                "io.command_joint_order and the signs of the arm's controller")
            return HaltReason.WRONG_DIRECTION
        return ""

    def _singular_too_long(self, info: LawInfo, t: float) -> bool:
        """Halt image_jacobian_singular when the judged singular value stayed below
        singular_halt_fraction x singular_threshold for singular_halt_s: the damped solve then
        barely moves the arm, and the run would only end at its timeout."""
        s, run = self.settings, self._active_run
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
        self.halt(HaltReason.IMAGE_JACOBIAN_SINGULAR, t,
                  f"judged singular value {sigma:.2e} < {floor:.2e} for "
                  f"{t - run.singular_since:.2f}"
                  f" s: {why}")
        return True

    def _margins(self, info: LawInfo, uv: np.ndarray, q: np.ndarray, envelope_used: float
                 ) -> float:
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
        size = self._taught.image_size
        if size is not None and len(uv):
            width, height = size
            room_px = np.min(np.minimum.reduce([uv[:, 0], uv[:, 1], width - 1 - uv[:, 0],
                                                height - 1 - uv[:, 1]]))
            scales.append(ramp(float(room_px), s.border_margin_px))
        scales.append(ramp(1.0 - envelope_used, s.envelope_zone))
        return min(scales)

    def _nodding(self, t: float) -> bool:
        """Is the start nod running at time t (or still to start: no image yet)?"""
        s, run = self.settings, self._active_run
        if s.direction_probe_px <= 0 or s.direction_probe_s <= 0:
            return False
        return run.probe_t0 is None or 0.0 <= t - run.probe_t0 < s.direction_probe_s

    def _supervise(self, q: np.ndarray, t: float) -> None:
        """The checks that bound motion, judged on every output tick from the latest joints,
        whether or not a frame could be used: run timeout, no observation for
        observation_timeout_s, the motion envelope, and the arm following its command."""
        s, run = self.settings, self._active_run
        if t - run.t_start > s.max_run_s:
            detail = f"run lasted {t - run.t_start:.2f} s > control.max_run_s = {s.max_run_s} s"
            if s.pose_tolerance.active:   # say how far the arrival criterion in mm/deg was
                detail += (f"; {run.pose_window.summary().describe()} against control."
                           f"tolerance_mm = {s.tolerance_mm}, tolerance_deg = "
                           f"{s.tolerance_deg} (a noisier estimate needs a longer "
                           "control.dwell_s)")
            self.halt(HaltReason.RUN_TIMEOUT, t, detail)
            return
        since = run.last_obs_t if run.last_obs_t is not None else run.t_start
        if t - since > s.observation_timeout_s:
            self.halt(HaltReason.IMAGE_STALE, t, f"no image used by the servo for "
                      f"{t - since:.2f} s "
                      f"(io.image_timeout_s = {s.observation_timeout_s} s)")
            return
        if self._envelope_fraction(q) > 1.0:
            moved_m, turned = frames.pose_error(run.T_base_tool_start, self.arm.fk(q))
            self.halt(HaltReason.MOTION_ENVELOPE, t, f"tool moved {1e3 * moved_m:.1f} mm / turned "
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

    def _arrival(self, xy_now: np.ndarray, ref_i: np.ndarray, rms_px: float, t: float) -> None:
        """Arrival: every criterion set holds for the dwell time with the joints (nearly)
        stopped: the RMS image error within control.tolerance_px, and the camera's pose error,
        estimated from the features each frame and averaged over the last dwell_s, within
        control.tolerance_mm / tolerance_deg (``control.pose_error``)."""
        s, run = self.settings, self._active_run
        if run.pose_estimator is not None:
            run.pose = run.pose_estimator.estimate(xy_now, ref_i)
            # the first-order cross-check only where the result reports it: near the goal
            check = (run.pose_estimator.first_order(xy_now, ref_i)
                     if self.state == State.SETTLING else None)
            run.pose_window.add(t, run.pose, check)
        tolerance = s.pose_tolerance
        px_ok = s.tolerance_px <= 0 or rms_px <= s.tolerance_px
        pose_ok = not tolerance.active or (px_ok and
                                           run.pose_window.summary().within(tolerance))
        if px_ok and pose_ok:
            if run.below_since is None:
                run.below_since = t
            self.state = State.SETTLING
            stopped = np.max(np.abs(self._last_cmd)) <= s.settled_joint_speed
            if t - run.below_since >= s.dwell_s and stopped:
                self._end(State.CONVERGED, "", t)
        else:
            run.below_since = None
            self.state = State.SERVOING
