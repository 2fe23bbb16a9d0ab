"""Figures of merit of one recorded run, computed from `RunData` alone.

Times are seconds on the bag clock (see `bag.load_run`); ``t_start_s`` is the first status
record in state "servoing" (the run start), and durations are measured from it.

Parameters are read from the run's params.yaml under the names of vservo_node.params.SCHEMA
(flat dotted names, nested mappings, or a ROS 2 parameter file with ``ros__parameters``).
When a value is absent, the figure that needs it is None rather than a guess; joint limits
then come from the URDF alone.
"""
from __future__ import annotations

import math
from collections import Counter
from dataclasses import dataclass
from pathlib import Path

import numpy as np

from vservo_node.control.frames import transform_from_xyz_quat
from vservo_node.control.kinematics import URDF_MAX_BYTES, ArmModel
from vservo_node.params import flatten
from vservo_node.record.bag import RunData
from vservo_node.yaml_files import read_bounded

HALT_STATES = ("braking", "halted")


def run_params(run: RunData) -> dict:
    """The run's parameters as flat dotted names (``control.tolerance_px``...)."""
    tree = run.params
    sections = [v["ros__parameters"] for v in tree.values()
                if isinstance(v, dict) and isinstance(v.get("ros__parameters"), dict)]
    flat = {}
    for section in sections or [tree]:
        flat.update(flatten(section))
    return flat


def arm_of_run(run: RunData) -> ArmModel | None:
    """The arm model of the run: URDF from params (robot_description text or robot.urdf_path,
    relative paths against the bag folder) or from the recorded robot_description topic;
    frames from robot.*; the camera frame is left out if the URDF lacks it. None without URDF."""
    p = run_params(run)
    urdf = p.get("robot_description") or run.robot_description
    if not urdf and p.get("robot.urdf_path"):
        path = Path(p["robot.urdf_path"])
        path = path if path.is_absolute() else Path(run.path) / path
        # bounded and regular files only: the path comes from the bag (a hostile /dev/zero)
        urdf = (read_bounded(path, URDF_MAX_BYTES, prefix="robot.urdf_path of the bag: ")
                .decode("utf-8", "replace") if path.exists() else None)
    if not urdf:
        return None
    frames = (p.get("robot.base_frame", "base_link"), p.get("robot.tool_frame", "tool0"))
    min_joints = int(p.get("robot.min_joints", 1))
    try:
        arm = ArmModel.from_urdf(urdf, *frames, p.get("robot.camera_frame"), min_joints)
    except ValueError:
        arm = ArmModel.from_urdf(urdf, *frames, None, min_joints)
    hand_eye = p.get("robot.hand_eye") or []
    if len(hand_eye) == 7:
        arm.set_hand_eye(transform_from_xyz_quat(hand_eye[:3], hand_eye[3:]))
    return arm


@dataclass
class Motion:
    """Arm motion along the run from joint states and the URDF, chain order.

    t (T,) s; q (T, n) rad/m; qdot (T, n) rad/s or m/s (recorded velocities, or the gradient of
    positions where a message has none); lower/upper (n,) position limits; qdot_max (n,)
    velocity limits in use (URDF x limits.joint_velocity_scale); tool_speed (T,) m/s of
    robot.tool_point; tool_speed_max m/s or None; camera_xyz (T, 3) m, base frame (the tool
    origin when the camera frame is unknown)."""
    joint_names: list
    t: np.ndarray
    q: np.ndarray
    qdot: np.ndarray
    lower: np.ndarray
    upper: np.ndarray
    qdot_max: np.ndarray
    tool_speed: np.ndarray
    tool_speed_max: float | None
    camera_xyz: np.ndarray


def motion_of_run(run: RunData, arm: ArmModel | None) -> Motion | None:
    """Joint and Cartesian motion; None without an arm model or joint states for its chain."""
    if arm is None or len(run.joint_t) < 2 or not set(arm.joint_names) <= set(run.joint_names):
        return None
    cols = [run.joint_names.index(n) for n in arm.joint_names]
    q = run.joint_position[:, cols]
    keep = np.all(np.isfinite(q), axis=1)
    t, q = run.joint_t[keep], q[keep]
    qdot = run.joint_velocity[keep][:, cols]
    missing = ~np.isfinite(qdot)
    qdot[missing] = np.gradient(q, t, axis=0)[missing]
    p = run_params(run)
    offset = np.asarray(p.get("robot.tool_point", [0.0, 0.0, 0.0]), float)
    tool_speed = np.array([np.linalg.norm(arm.point_jacobian_base(qi, "tool", offset) @ vi)
                           for qi, vi in zip(q, qdot)])
    frame = "camera" if arm.T_tool_camera is not None else "tool"
    camera_xyz = np.array([arm.fk(qi, frame)[:3, 3] for qi in q])
    limit = p.get("limits.tool_linear_speed")
    return Motion(list(arm.joint_names), t, q, qdot, arm.lower, arm.upper,
                  arm.velocity_limits * float(p.get("limits.joint_velocity_scale", 1.0)),
                  tool_speed, None if limit is None else float(limit), camera_xyz)


def start_index(run: RunData) -> int | None:
    """Index of the first status record in state "servoing"; None if the run never started."""
    hits = np.flatnonzero(run.status["state"] == "servoing")
    return int(hits[0]) if hits.size else None


def ideal_decay(t: np.ndarray, gain: np.ndarray, rms0: float) -> np.ndarray:
    """RMS error of the ideal closed loop e_dot = -lambda(t) e from rms0 at t[0]:
    rms0 exp(-integral of lambda dt) (Chaumette & Hutchinson 2006, Part I, sec. II: exponential
    decoupled decrease), the integral by the trapezoid rule over the recorded gains."""
    lam = np.nan_to_num(np.asarray(gain, float))
    integral = np.concatenate(([0.0], np.cumsum(0.5 * (lam[1:] + lam[:-1]) * np.diff(t))))
    return rms0 * np.exp(-integral)


def time_to_tolerance(t: np.ndarray, rms: np.ndarray, tol: float) -> float | None:
    """Time from t[0] until the RMS error enters [0, tol] for good (it stays there for the rest
    of the records): the settling-time idea of a step response. None if it ends above tol."""
    ok = np.isfinite(rms)
    t, rms = t[ok], rms[ok]
    if rms.size == 0 or rms[-1] > tol:
        return None
    above = np.flatnonzero(rms > tol)
    k = above[-1] + 1 if above.size else 0
    return float(t[k] - t[0])


def overshoot_px(error: np.ndarray) -> float:
    """Largest excursion (px) of any feature-error component past zero, to the side opposite
    its first finite value: how far a point overshot its goal along u or v. error (T, 2N)."""
    worst = 0.0
    for column in np.asarray(error, float).T:
        finite = column[np.isfinite(column)]
        if finite.size and finite[0] != 0:
            worst = max(worst, float(np.max(-np.sign(finite[0]) * finite)))
    return worst


def halt_events(t: np.ndarray, states: np.ndarray, reasons: np.ndarray) -> list[dict]:
    """Entries into braking/halted from any other state: [{t_s, state, reason}]."""
    events, previous = [], None
    for ti, state, reason in zip(t, states, reasons):
        if state in HALT_STATES and previous not in HALT_STATES:
            events.append({"t_s": float(ti), "state": str(state), "reason": reason or ""})
        previous = state
    return events


def limit_activations(limits_acted: np.ndarray) -> dict[str, int]:
    """Number of status records in which each limit shaped the command."""
    return dict(Counter(name for acted in limits_acted for name in (acted or [])))


def _num(x) -> float | None:
    """JSON-friendly float: None for NaN/inf/None."""
    return None if x is None or not math.isfinite(float(x)) else float(x)


def compute_metrics(run: RunData, tolerance_px: float | None = None,
                    motion: Motion | None = None) -> dict:
    """Metrics of one run (JSON-ready; None where the bag does not tell).

    tolerance_px: overrides control.tolerance_px of params.yaml. motion: from
    `motion_of_run` (computed here when None).
    """
    st, t = run.status, run.status_t
    k0 = start_index(run)
    p = run_params(run)
    tol = tolerance_px if tolerance_px is not None else p.get("control.tolerance_px")
    out: dict = {"run": Path(run.path).name, "run_id": None, "converged": None,
                 "result_reason": None, "n_cycles": int(t.size), "t_start_s": None,
                 "duration_s": None, "initial_rms_px": None, "final_rms_px": None,
                 "tolerance_px": _num(tol), "time_to_tolerance_s": None, "overshoot_px": None,
                 "overshoot_pct": None}
    if k0 is not None:
        ts, rms = t[k0:], st["rms_px"][k0:]
        finite = np.flatnonzero(np.isfinite(rms))
        out.update(run_id=st["run_id"][k0], t_start_s=float(ts[0]),
                   duration_s=float(ts[-1] - ts[0]))
        if finite.size:
            out.update(initial_rms_px=float(rms[finite[0]]), final_rms_px=float(rms[finite[-1]]))
        if tol is not None:
            out["time_to_tolerance_s"] = time_to_tolerance(ts, rms, float(tol))
        if run.feature_error is not None:
            err = run.feature_error.values[run.feature_error.t >= ts[0]]
            out["overshoot_px"] = overshoot_px(err)
            if out["initial_rms_px"]:
                out["overshoot_pct"] = 100.0 * out["overshoot_px"] / out["initial_rms_px"]
    final_state = st["state"][-1] if t.size else None
    out["converged"] = (bool(run.result["converged"]) if run.result and "converged" in run.result
                        else final_state == "converged")
    out["result_reason"] = (run.result or {}).get("reason") or (
        st["reason"][-1] if t.size else None) or ""
    halts = halt_events(t, st["state"], st["reason"])
    cycle = st["cycle_ms"][np.isfinite(st["cycle_ms"])]
    out.update(
        n_halts=len(halts), halts=halts, limit_activations=limit_activations(st["limits_acted"]),
        cycle_ms_mean=_num(cycle.mean()) if cycle.size else None,
        cycle_ms_p95=_num(np.percentile(cycle, 95)) if cycle.size else None,
        cycle_ms_max=_num(cycle.max()) if cycle.size else None)
    motion = motion if motion is not None else motion_of_run(run, arm_of_run(run))
    out.update(peak_joint_speed_ratio=None, peak_joint_speed_joint=None, peak_tool_speed_m_s=None,
               tool_speed_limit_m_s=None, peak_tool_speed_ratio=None,
               min_joint_limit_margin=None)
    if motion is not None:
        ratio = np.abs(motion.qdot) / motion.qdot_max
        if np.any(np.isfinite(ratio)):
            j = int(np.nanargmax(np.nanmax(ratio, axis=0)))
            out.update(peak_joint_speed_ratio=_num(np.nanmax(ratio)),
                       peak_joint_speed_joint=motion.joint_names[j])
        margin = np.minimum(motion.q - motion.lower, motion.upper - motion.q)
        out["min_joint_limit_margin"] = _num(np.min(margin))
        out["peak_tool_speed_m_s"] = _num(motion.tool_speed.max())
        if motion.tool_speed_max:
            out.update(tool_speed_limit_m_s=motion.tool_speed_max,
                       peak_tool_speed_ratio=_num(motion.tool_speed.max() / motion.tool_speed_max))
    return out
