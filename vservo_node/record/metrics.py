"""Figures of merit of one recorded run, computed from `RunData` alone: ONE definition of each
figure, shared by `vservo demo` (which prints its recorded run's metrics.json), `vservo report`,
`vservo compare` and `vservo sweep` (whose headless episodes map onto the same definitions in
:func:`episode_figures`). :data:`DEFINITIONS` states each definition in words; the report shows
them beside the figures.

Times are seconds on the record's clock (the log times of the bag, see `bag.load_run`); the
*run start* is the first status record in a moving state (servoing, settling, braking) and
durations are measured from it. The node's own run time (result ``time_s``) is kept beside as
``node_run_time_s``: it is measured on image stamps, which lag the node's clock by the camera's
delay, so the two differ by that delay (by seconds when a camera's stamps fall behind).

Parameters are read from the run's params.yaml under the names of vservo_node.params.SCHEMA
(flat dotted names, nested mappings, or a ROS 2 parameter file with ``ros__parameters``).
When a value is absent, the figure that needs it is None rather than a guess; joint limits
then come from the URDF alone.
"""
from __future__ import annotations

import math
from pathlib import Path

import numpy as np

from vservo_node.control import frames
from vservo_node.record.bag import RunData
from vservo_node.record.metrics_record import (arm_of_run, Command, command_of_run, envelope_path,
                                               GOAL_FROM_FINAL_POSE, goal_path, Motion,
                                               motion_of_run, params_of_tree, pose_estimate_series,
                                               pose_of, run_params, start_index)
from vservo_node.record.metrics_series import (_num, halt_events, ideal_decay, limit_activations,
                                               overshoot_px, ratio, rebound, time_to_tolerance)


# Split along its concerns: what a record holds (metrics_record), figures of one series
# (metrics_series); their names keep this import path.
__all__ = ["_num", "arm_of_run", "Command", "command_of_run", "compute_metrics", "DEFINITIONS",
           "envelope_path", "episode_figures", "fmt", "GOAL_FROM_FINAL_POSE", "goal_path",
           "halt_events", "headline", "ideal_decay", "limit_activations", "Motion",
           "motion_of_run", "overshoot_px", "params_of_tree", "pose_estimate_series", "pose_of",
           "ratio", "rebound", "result_metrics", "run_params", "start_index",
           "time_to_tolerance"]


DEFINITIONS = {
    "time_to_converge_s": "converged runs only: from the run start to the end of the dwell "
                          "(the first status record in state converged), on the record's clock",
    "time_to_halt_s": "halted runs only: from the run start until the arm stood still after "
                      "braking (the first status record in state halted), on the record's "
                      "clock",
    "node_run_time_s": "the run time the node reported (result time_s), on the node's clock",
    "duration_s": "from the run start to the last status record",
    "initial_rms_px": "RMS feature error of the first frame of the run",
    "final_rms_px": "RMS feature error of the last frame the servo judged",
    "time_to_tolerance_s": "from the run start until the RMS error enters the tolerance for "
                           "good (stays there to the end)",
    "overshoot_pct": "converged runs only: the largest rise of the RMS error above its lowest "
                     "value so far, in % of the initial RMS error (0 for a monotone decrease)",
    "final_pose_error_mm": "ground truth (simulated cell): distance between the camera's final "
                           "and taught positions",
    "final_pose_error_deg": "ground truth (simulated cell): angle between the camera's final "
                            "and taught orientations",
    "estimated_pose_error_mm": "the node's estimate of the final camera position error",
    "estimated_pose_error_deg": "the node's estimate of the final camera orientation error",
    "tolerance_mm": "control.tolerance_mm of the run (0 or None: arrival not judged in mm)",
    "tolerance_deg": "control.tolerance_deg of the run (0 or None: arrival not judged in deg)",
    "peak_joint_speed_ratio": "largest measured |joint speed| over its limit in use (URDF "
                              "velocity x limits.joint_velocity_scale); 1 = at the limit",
    "peak_joint_accel_ratio": "largest commanded |joint acceleration| (command change per "
                              "output period) over limits.joint_acceleration",
    "peak_tool_speed_ratio": "largest tool-point linear speed over limits.tool_linear_speed",
    "peak_camera_speed_ratio": "largest camera linear speed over limits.camera_linear_speed",
    "peak_angular_speed_ratio": "largest tool angular speed over limits.angular_speed",
    "peak_translation_ratio": "largest tool translation from the start pose over "
                              "limits.max_translation_m",
    "peak_rotation_ratio": "largest tool rotation from the start pose over "
                           "limits.max_rotation_deg",
    "min_joint_limit_margin": "closest approach of any joint to its URDF position limit, rad "
                              "(m for prismatic joints)",
}


def compute_metrics(run: RunData, tolerance_px: float | None = None,
                    motion: Motion | None = None, command: Command | None = None) -> dict:
    """Metrics of one run (JSON-ready; None where the record does not tell). See DEFINITIONS.

    tolerance_px: overrides control.tolerance_px of params.yaml. motion, command: from
    `motion_of_run` and `command_of_run` (computed here when None).
    """
    st, t = run.status, run.status_t
    k0 = start_index(run)
    p = run_params(run)
    result = run.result or {}
    tol = tolerance_px if tolerance_px is not None else p.get("control.tolerance_px")
    out: dict = {"run": _run_name(run), "run_id": result.get("run_id"), "piece": None,
                 "verdict": "incomplete", "converged": None, "reason": "", "detail": "",
                 "n_cycles": int(t.size), "t_start_s": None, "duration_s": None,
                 "time_to_converge_s": None, "time_to_halt_s": None,
                 "node_run_time_s": _num(result.get("time_s")),
                 "initial_rms_px": None, "final_rms_px": None, "tolerance_px": _num(tol),
                 "time_to_tolerance_s": None, "overshoot_pct": None}
    if run.piece is not None:
        out["piece"] = {"file": run.piece.file, "index": run.piece.index,
                        "count": run.piece.count, "t0_s": run.piece.t0_s,
                        "t1_s": run.piece.t1_s}
    # --- verdict: the run result when the record holds it, else the last status record
    states = st["state"].astype(str) if t.size else np.array([], str)
    ended = [i for i, s in enumerate(states) if s in ("converged", "halted")]
    if "converged" in result:
        out["converged"] = bool(result["converged"])
    elif ended:
        out["converged"] = states[ended[-1]] == "converged"
    if out["converged"] is not None:
        out["verdict"] = "converged" if out["converged"] else "halted"
    halts = halt_events(t, states, st["reason"], st.get("detail"))
    last_reason = next((r for r in st["reason"][::-1] if r), "") if t.size else ""
    out["reason"] = (result.get("reason") or (halts[-1]["reason"] if halts else "")
                     or ("" if out["converged"] else last_reason) or "")
    out["detail"] = result.get("detail") or (halts[-1]["detail"] if halts else "") or ""
    if k0 is not None:
        ts, rms = t[k0:], st["rms_px"][k0:]
        finite = np.flatnonzero(np.isfinite(rms))
        out.update(run_id=out["run_id"] or st["run_id"][k0], t_start_s=float(ts[0]),
                   duration_s=float(ts[-1] - ts[0]))
        if finite.size:
            out.update(initial_rms_px=float(rms[finite[0]]), final_rms_px=float(rms[finite[-1]]))
        if tol is not None:
            out["time_to_tolerance_s"] = time_to_tolerance(ts, rms, float(tol))
        if out["converged"] is not None:
            final = "converged" if out["converged"] else "halted"
            end = next((i for i in ended if states[i] == final and i >= k0), None)
            key = "time_to_converge_s" if out["converged"] else "time_to_halt_s"
            # the record's clock; the node's own time only when the end was not recorded
            out[key] = (float(t[end] - t[k0]) if end is not None
                        else out["node_run_time_s"] if run.piece is None else None)
        if out["converged"] and out["initial_rms_px"]:
            out["overshoot_pct"] = 100.0 * rebound(rms) / out["initial_rms_px"]
    if result.get("final_rms_px") is not None:
        out["final_rms_px"] = _num(result["final_rms_px"])
    out.update(_pose_errors(run, result))
    out.update(tolerance_mm=_num(p.get("control.tolerance_mm")),
               tolerance_deg=_num(p.get("control.tolerance_deg")))
    cycle = st["cycle_ms"][np.isfinite(st["cycle_ms"])]
    out.update(
        n_halts=len(halts), halts=halts, limit_activations=limit_activations(st["limits_acted"]),
        cycle_ms_mean=_num(cycle.mean()) if cycle.size else None,
        cycle_ms_p95=_num(np.percentile(cycle, 95)) if cycle.size else None,
        cycle_ms_max=_num(cycle.max()) if cycle.size else None)
    arm = None
    if motion is None:
        arm = arm_of_run(run)
        motion = motion_of_run(run, arm)
    out.update(_motion_figures(run, motion, command, p))
    return out


def _run_name(run: RunData) -> str:
    path = Path(run.path)
    return path.name if path.is_dir() or run.piece is None else f"{path.parent.name}/{path.name}"


def _pose_errors(run: RunData, result: dict) -> dict:
    """Ground truth (result, else the truth topics' last samples) and the node's estimate
    (result estimated_* fields, else the last status pose_error_*)."""
    out = {"final_pose_error_mm": _num(result.get("final_pose_error_mm")),
           "final_pose_error_deg": _num(result.get("final_pose_error_deg")),
           "estimated_pose_error_mm": None, "estimated_pose_error_deg": None}
    if out["final_pose_error_mm"] is None and run.camera_truth is not None \
            and run.taught_pose is not None and len(run.camera_truth.t):
        moved, turned = frames.pose_error(pose_of(run.taught_pose.values[-1]),
                                          pose_of(run.camera_truth.values[-1]))
        out.update(final_pose_error_mm=1e3 * moved, final_pose_error_deg=math.degrees(turned))
    for key, value in result.items():
        if key.startswith("estimated_pose_error"):
            out[key] = _num(value) if isinstance(value, (int, float)) else value
    for unit in ("mm", "deg"):
        column = run.status.get(f"pose_error_{unit}")
        key = f"estimated_pose_error_{unit}"
        if out[key] is None and column is not None and column.dtype == float:
            finite = column[np.isfinite(column)]
            out[key] = float(finite[-1]) if finite.size else None
    return out


def _motion_figures(run: RunData, motion: Motion | None, command: Command | None,
                    p: dict) -> dict:
    out = dict(peak_joint_speed_ratio=None, peak_joint_speed_joint=None,
               peak_joint_accel_ratio=None, peak_joint_accel_joint=None,
               peak_tool_speed_m_s=None, tool_speed_limit_m_s=None, peak_tool_speed_ratio=None,
               peak_camera_speed_m_s=None, camera_speed_limit_m_s=None,
               peak_camera_speed_ratio=None, peak_angular_speed_rad_s=None,
               angular_speed_limit_rad_s=None, peak_angular_speed_ratio=None,
               peak_translation_m=None, peak_translation_ratio=None, peak_rotation_deg=None,
               peak_rotation_ratio=None, min_joint_limit_margin=None, final_joints=None)
    if motion is None:
        return out
    speed_ratio = np.abs(motion.qdot) / motion.qdot_max
    if np.any(np.isfinite(speed_ratio)):
        j = int(np.nanargmax(np.nanmax(speed_ratio, axis=0)))
        out.update(peak_joint_speed_ratio=_num(np.nanmax(speed_ratio)),
                   peak_joint_speed_joint=motion.joint_names[j])
    command = command if command is not None else command_of_run(run, motion.joint_names)
    if command is not None and motion.qddot_max is not None and len(command.accel):
        accel_ratio = np.abs(command.accel) / motion.qddot_max
        if np.any(np.isfinite(accel_ratio)):
            j = int(np.nanargmax(np.nanmax(accel_ratio, axis=0)))
            out.update(peak_joint_accel_ratio=_num(np.nanmax(accel_ratio)),
                       peak_joint_accel_joint=motion.joint_names[j])
    margin = np.minimum(motion.q - motion.lower, motion.upper - motion.q)
    out["min_joint_limit_margin"] = _num(np.min(margin))
    for name, series, limit in (("tool_speed", motion.tool_speed, motion.tool_speed_max),
                                ("camera_speed", motion.camera_speed, motion.camera_speed_max),
                                ("angular_speed", motion.angular_speed,
                                 motion.angular_speed_max)):
        unit = "rad_s" if name == "angular_speed" else "m_s"
        peak = _num(series.max()) if series is not None and series.size else None
        out[f"peak_{name}_{unit}"] = peak
        out[f"{name}_limit_{unit}"] = limit
        out[f"peak_{name}_ratio"] = ratio(peak, limit)
    moved, turned = envelope_path(run, motion)
    if moved is not None:
        out["peak_translation_m"] = _num(moved.max())
        out["peak_rotation_deg"] = _num(turned.max())
        out["peak_translation_ratio"] = ratio(out["peak_translation_m"],
                                              p.get("limits.max_translation_m"))
        out["peak_rotation_ratio"] = ratio(out["peak_rotation_deg"],
                                           p.get("limits.max_rotation_deg"))
    out["final_joints"] = {n: float(v) for n, v in zip(motion.joint_names, motion.q[-1])}
    return out


def episode_figures(result, values: dict) -> dict:
    """A headless episode's result (vservo_node.episode.EpisodeResult) in the names and
    definitions of :func:`compute_metrics`, for the sweep's table. ``values``: the episode's
    validated controller parameters. Speeds there are of the true arm, as a record's are of
    the measured joints."""
    converged = bool(result.converged)
    limits = {"joint": float(values["limits.joint_velocity_scale"]),
              "tool": float(values["limits.tool_linear_speed"]),
              "camera": float(values["limits.camera_linear_speed"]),
              "angular": float(values["limits.angular_speed"])}
    initial = _num(result.initial_rms_px)
    return {
        "verdict": "converged" if converged else "halted", "converged": converged,
        "reason": result.reason or "",
        "time_to_converge_s": _num(result.time_s) if converged else None,
        "time_to_halt_s": None if converged else _num(result.time_s),
        "initial_rms_px": initial, "final_rms_px": _num(result.final_rms_px),
        "final_pose_error_mm": _num(result.pose_error_mm),
        "final_pose_error_deg": _num(result.pose_error_deg),
        # EpisodeResult's ratio is of the URDF limit; ours of the limit in use
        "peak_joint_speed_ratio": ratio(result.peak_joint_speed_ratio, limits["joint"]),
        "peak_tool_speed_m_s": _num(result.peak_tool_speed),
        "peak_tool_speed_ratio": ratio(result.peak_tool_speed, limits["tool"]),
        "peak_camera_speed_m_s": _num(result.peak_camera_speed),
        "peak_camera_speed_ratio": ratio(result.peak_camera_speed, limits["camera"]),
        "peak_angular_speed_rad_s": _num(result.peak_angular_speed),
        "peak_angular_speed_ratio": ratio(result.peak_angular_speed, limits["angular"]),
        "min_joint_limit_margin": _num(result.min_limit_margin),
        "camera_depth_change_max_m": _num(result.camera_depth_change_max),
    }


def result_metrics(result: dict | None) -> dict:
    """What a run result alone (interface.RESULT_FIELDS) says, in compute_metrics' names: for
    a run without a record. Figures that need the record are None."""
    result = result or {}
    converged = result.get("converged")
    out = {k: None for k in ("run", "run_id", "time_to_converge_s", "time_to_halt_s",
                             "final_rms_px", "tolerance_px", "final_pose_error_mm",
                             "final_pose_error_deg", "estimated_pose_error_mm",
                             "estimated_pose_error_deg", "peak_joint_speed_ratio",
                             "peak_joint_speed_joint", "peak_tool_speed_m_s",
                             "peak_tool_speed_ratio")}
    out.update(run_id=result.get("run_id"), converged=None if converged is None else
               bool(converged), reason=result.get("reason") or "",
               detail=result.get("detail") or "", halts=[], n_halts=0,
               verdict="incomplete" if converged is None else
               ("converged" if converged else "halted"))
    # the node's run time is on its own clock (image stamps against the start command): kept
    # apart, since the record clock's figures are unknown here
    out["node_run_time_s"] = _num(result.get("time_s"))
    for name in ("final_rms_px", "final_pose_error_mm", "final_pose_error_deg"):
        out[name] = _num(result.get(name))
    for name, value in result.items():
        if name.startswith("estimated_pose_error"):
            out[name] = _num(value) if isinstance(value, (int, float)) else value
    return out


# --- one line per headline figure: what demo, report and compare print --------------------------
def fmt(value, spec: str = ".3g", unit: str = "") -> str:
    """A number with its unit, or 'n/a'."""
    if value is None or (isinstance(value, float) and not math.isfinite(value)):
        return "n/a"
    return f"{format(value, spec)}{' ' + unit if unit else ''}"


def headline(m: dict) -> list[tuple[str, str]]:
    """(label, text) of the figures a user reads first, in order; the demo prints them, the
    report's verdict banner shows them, `vservo report` prints them."""
    rows = []
    node_time = ("" if m.get("node_run_time_s") is None
                 else f" (the node's own run time: {m['node_run_time_s']:.2f} s)")
    if m["verdict"] == "converged" and m.get("time_to_converge_s") is None:
        rows.append(("verdict", "converged" + node_time))
    elif m["verdict"] == "converged":
        rows.append(("verdict", f"converged in {fmt(m['time_to_converge_s'], '.2f', 's')}"))
    elif m["verdict"] == "halted":
        halts = m.get("halts") or []
        detected = (halts[-1]["t_s"] - m["t_start_s"]
                    if halts and m.get("t_start_s") is not None else None)
        rows.append(("verdict", f"halted: {m['reason'] or '(no reason)'}"
                     + (f", detected at {detected:.2f} s" if detected is not None else "")
                     + (f", stopped at {fmt(m['time_to_halt_s'], '.2f', 's')}"
                        if m.get("time_to_halt_s") is not None else node_time)))
    else:
        rows.append(("verdict", "no end of the run in this record"))
    if m.get("detail"):
        rows.append(("what fired", m["detail"]))
    rows.append(("final image error", f"{fmt(m['final_rms_px'], '.3f', 'px')} RMS " + (
        f"(tolerance {fmt(m['tolerance_px'], '.3g', 'px')})" if m.get("tolerance_px")
        else "(no pixel tolerance)" if m.get("tolerance_px") == 0 else "(tolerance n/a)")))
    if m.get("final_pose_error_mm") is not None:
        rows.append(("pose error (ground truth)",
                     f"{fmt(m['final_pose_error_mm'], '.3f', 'mm')}, "
                     f"{fmt(m['final_pose_error_deg'], '.3f', 'deg')}"))
    if m.get("estimated_pose_error_mm") is not None:
        tol = ((m.get("tolerance_mm") or 0) > 0 or (m.get("tolerance_deg") or 0) > 0)
        rows.append(("pose error (node's estimate)",
                     f"{fmt(m['estimated_pose_error_mm'], '.3f', 'mm')}, "
                     f"{fmt(m.get('estimated_pose_error_deg'), '.3f', 'deg')}"
                     + (f" (tolerance {fmt(m.get('tolerance_mm'), '.3g', 'mm')}, "
                        f"{fmt(m.get('tolerance_deg'), '.3g', 'deg')})" if tol else "")))
    if m.get("peak_joint_speed_ratio") is not None:
        rows.append(("peak joint speed", f"{fmt(100 * m['peak_joint_speed_ratio'], '.0f')} % "
                                         f"of its limit in use ({m['peak_joint_speed_joint']})"))
    if m.get("peak_tool_speed_m_s") is not None:
        rows.append(("peak tool speed", f"{fmt(1e3 * m['peak_tool_speed_m_s'], '.1f', 'mm/s')}"
                     + (f" ({fmt(100 * m['peak_tool_speed_ratio'], '.0f')} % of its limit)"
                        if m.get("peak_tool_speed_ratio") is not None else "")))
    return rows
