"""What the servo keeps while a run lasts: the run's bookkeeping, the last frame, the features
of one image matched to the taught view."""
from __future__ import annotations

import math
from dataclasses import dataclass, field
from typing import Any, Hashable, Sequence

import numpy as np

from vservo_node.control import decoupled
from vservo_node.control.law import LawInfo
from vservo_node.control.pose_error import PoseErrorEstimator, PoseEstimate, PoseWindow


@dataclass
class RunState:
    """What one run keeps between frames and ticks (Servo._run)."""

    run_id: str
    t_start: float
    T_base_tool_start: np.ndarray
    best_rms: float = math.inf
    below_since: float | None = None
    wrong_frames: int = 0
    direction_anchor: Frame | None = None
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
    # the estimates of the last dwell_s (Servo.start gives it its span)
    pose_window: PoseWindow = field(default_factory=lambda: PoseWindow(0.0))
    pose_estimator: PoseErrorEstimator | None = None


@dataclass
class Frame:
    """What observe() keeps for the next frame and for command()."""
    t: float
    q: np.ndarray
    keys: tuple[Hashable, ...]
    e: np.ndarray
    J_move: np.ndarray   # (2, 2N, n): feature motion from camera translation, from rotation
    rms_px: float
    # (z_now, xy_ref, z_ref) for the law between frames
    law_inputs: tuple[np.ndarray, np.ndarray, np.ndarray] | None = None
    task: decoupled.Task | None = None   # decoupled scheme: its task at this frame


@dataclass(frozen=True)
class Matched:
    """The features of one image matched to the taught view, in match order: ``keys``,
    indices into the observation (``now_i``) and the taught view (``ref_i``), normalized
    coordinates, pixels and depths now and as taught."""
    keys: tuple[Hashable, ...]
    now_i: np.ndarray
    ref_i: np.ndarray
    xy_now: np.ndarray
    xy_ref: np.ndarray
    uv_now: np.ndarray
    uv_ref: np.ndarray
    z_now: np.ndarray
    z_ref: np.ndarray


def run_result(run: RunState, state: str, reason: str, detail: str, t: float
               ) -> dict[str, Any]:
    """The run's result (interface.RESULT_FIELDS) when it ends at time t in ``state``: the
    estimated pose error of the last dwell; the true one is filled in by whoever knows it."""
    pose = run.pose_window.summary() if run.pose_window is not None else None
    return {
        "run_id": run.run_id, "converged": state == "converged", "reason": str(reason),
        "time_s": t - run.t_start, "final_rms_px": run.final_rms, "detail": detail,
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


def status_record(t: float, run: RunState | None, frame: Frame | None, info: LawInfo | None,
                  state: str, reason: str, detail: str, speed_scale: float,
                  limit_counts: dict[str, int], cmd: np.ndarray, acted: list[str]
                  ) -> dict[str, Any]:
    """The status record of one output tick (interface.STATUS_FIELDS), with plain strings."""
    dls = info.dls if info is not None else None
    pose = run.pose if run is not None else None
    return {
        "t": t,
        "run_id": run.run_id if run else "",
        "state": str(state),       # the plain string (interface.State's value)
        "reason": str(reason),
        "detail": detail,
        "rms_px": frame.rms_px if frame else math.nan,
        "pose_error_mm": pose.translation_mm if pose is not None else math.nan,
        "pose_error_deg": pose.rotation_deg if pose is not None else math.nan,
        "n_matched": len(frame.keys) if frame else 0,
        "gain": info.gain if info else 0.0,
        "sigma_min": dls.sigma_judge if dls else math.nan,
        "damping": dls.damping if dls else 0.0,
        "speed_scale": speed_scale,
        "limits_acted": acted,
        "limit_counts": limit_counts,
        "cycle_ms": 0.0,
        "dq": cmd.tolist(),
    }


def joints_outside(names: Sequence[str], lower: np.ndarray, upper: np.ndarray,
                   q: np.ndarray | Sequence[float]) -> list[str]:
    """One line per joint of q outside [lower, upper] (or not finite)."""
    q = np.asarray(q, dtype=float)
    out = []
    if q.shape != (len(names),):
        return [f"{q.shape[0] if q.ndim else 0} joint values for {len(names)} joints"]
    for name, value, low, high in zip(names, q, lower, upper):
        if not math.isfinite(value):
            out.append(f"{name} = {value} (not finite)")
        elif value < low or value > high:
            out.append(f"{name} = {value:.4f} rad outside [{low:.4f}, {high:.4f}]")
    return out
