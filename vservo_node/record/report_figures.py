"""The report's figures, one function per figure: frames, error, camera path, pose estimate,
joint and Cartesian limits, envelope, timeline, cycle times (vservo_node.record.report)."""
from __future__ import annotations

import math

import numpy as np
from matplotlib.figure import Figure
from matplotlib.ticker import MaxNLocator

from vservo_node.interface import SUPERVISOR_STATES
from vservo_node.record.bag import RunData
from vservo_node.record.metrics import (GOAL_FROM_FINAL_POSE, Command, Motion,
                                        envelope_path, fmt, goal_path, ideal_decay,
                                        run_params,
                                        start_index)
from vservo_node.record.report_plots import (_acted_rug, _features_at, _halt_marks, _legend, _log_y,
                                             _nice_scale, new_figure, STATE_COLOURS, WIDTH_IN)


# ----------------------------------------------------------------------------- figures
def fig_frames(run: RunData, metrics: dict, taught=None) -> Figure | None:
    """The camera at the start and at the end: detected features (green circles), reference
    marks (blue squares, s - e), error vectors from each feature toward its mark (yellow,
    lengthened when tiny, the factor in the title), the feature paths on the end frame; and,
    given ``taught`` (``taught_view``), the taught image with its taught features."""
    frames = run.frames
    if not frames and run.features is None:
        return None
    size = (run.camera_info["width"], run.camera_info["height"]) if run.camera_info else None
    if frames:
        size = (frames[0].rgb.shape[1], frames[0].rgb.shape[0])
        shots = [("start", frames[0])] + ([("end", frames[-1])] if len(frames) > 1 else [])
    else:
        shots = [("start", None), ("end", None)]
    if size is None:
        return None
    aspect = size[1] / size[0]
    panels = len(shots) + (taught is not None)
    fig = new_figure(WIDTH_IN, (WIDTH_IN / panels - 0.8) * aspect + 0.95, right=0.2, left=0.7,
                     wspace=0.15 if panels < 3 else 0.25)
    axes = fig.subplots(1, panels, squeeze=False)[0]
    if taught is not None:
        ax, (rgb, uv) = axes[-1], taught
        h, w = rgb.shape[:2]
        ax.imshow(rgb, extent=(-0.5, w - 0.5, h - 0.5, -0.5))
        ax.plot(uv[:, 0], uv[:, 1], "s", mfc="none", mec="#2979ff", ms=9, mew=1.5,
                label="taught feature")
        for k, (u, v) in enumerate(uv):
            ax.annotate(str(k + 1), (u, v), xytext=(6, 6), textcoords="offset points",
                        color="#2979ff", fontsize=8)
        ax.set(xlim=(-0.5, w - 0.5), ylim=(h - 0.5, -0.5), xlabel="u (px)", ylabel="v (px)",
               title=f"taught view (reference image, {w}x{h})")
        ax.title.set_fontsize(10)
        ax.legend(fontsize=7, loc="lower right", framealpha=0.8)
    paths = None
    if run.features is not None:
        paths = run.features.values.reshape(len(run.features.t), -1, 2)
    for ax, (which, frame) in zip(axes, shots):
        if frame is not None:
            ax.imshow(frame.rgb, extent=(-0.5, size[0] - 0.5, size[1] - 0.5, -0.5))
            t = frame.t
        else:
            ax.set_facecolor("0.92")
            t = run.features.t[0] if which == "start" else run.features.t[-1]
        uv, err = _features_at(run, t)
        title = f"{which} (t = {t:.2f} s)"
        if which == "end" and paths is not None:
            for i in range(paths.shape[1]):
                path = paths[:, i][np.all(np.isfinite(paths[:, i]), axis=1)]
                if len(path):
                    ax.plot(path[:, 0], path[:, 1], color="w", lw=0.8, alpha=0.7)
        if uv is not None:
            ok = np.all(np.isfinite(uv), axis=1)
            ax.plot(uv[ok, 0], uv[ok, 1], "o", mfc="none", mec="#00e676", ms=9, mew=1.5,
                    label="detected feature")
            for k, (u, v) in enumerate(uv):
                if np.isfinite(u) and np.isfinite(v):
                    ax.annotate(str(k + 1), (u, v), xytext=(6, 6), textcoords="offset points",
                                color="#00e676", fontsize=8)
            if err is not None:
                goal = uv - err
                ok &= np.all(np.isfinite(err), axis=1)
                ax.plot(goal[ok, 0], goal[ok, 1], "s", mfc="none", mec="#2979ff", ms=9,
                        mew=1.5, label="reference mark")
                norms = np.linalg.norm(err[ok], axis=1)
                scale = _nice_scale(float(norms.max()) if norms.size else 0.0)
                ax.quiver(uv[ok, 0], uv[ok, 1], -err[ok, 0] * scale, -err[ok, 1] * scale,
                          angles="xy", scale_units="xy", scale=1, color="#ffd600", width=0.004,
                          label="error vector" + (f" x{scale:g}" if scale != 1 else ""))
                rms = float(np.sqrt(np.mean(np.sum(err[ok] ** 2, axis=1)))) if ok.any() else None
                title += f", RMS error {fmt(rms, '.3g', 'px')}"
                if scale != 1:
                    title += f", vectors x{scale:g}"
        ax.set(xlim=(-0.5, size[0] - 0.5), ylim=(size[1] - 0.5, -0.5), xlabel="u (px)",
               ylabel="v (px)", title=title)
        ax.title.set_fontsize(10)
        if uv is not None:
            ax.legend(fontsize=7, loc="lower right", framealpha=0.8)
    return fig


def fig_error(run: RunData, metrics: dict) -> Figure | None:
    """RMS image error (px, log) with the ideal decay; below it the error of each feature."""
    rms = run.status["rms_px"]
    if not np.any(np.isfinite(rms) & (rms > 0)):
        return None
    per_feature = run.feature_error is not None and run.feature_error.values.shape[1] >= 2
    fig = new_figure(WIDTH_IN, 6.4 if per_feature else 3.6)
    axes = fig.subplots(2 if per_feature else 1, 1, sharex=True, squeeze=False)[:, 0]
    ax = axes[0]
    _log_y(ax)
    ax.plot(run.status_t, rms, label="recorded RMS error")
    k0 = start_index(run)
    if k0 is not None and metrics["initial_rms_px"]:
        k1 = len(run.status_t)
        if metrics["halts"]:   # the ideal loop is undefined once braking
            k1 = max(k0 + 1, int(np.searchsorted(run.status_t, metrics["halts"][0]["t_s"])))
        t = run.status_t[k0:k1]
        ax.plot(t, ideal_decay(t, run.status["gain"][k0:k1], metrics["initial_rms_px"]), "--",
                    label="ideal: exp(-\u222b\u03bb dt)")
        ax.axvline(t[0], color="0.6", lw=0.8)
    if metrics["tolerance_px"]:
        ax.axhline(metrics["tolerance_px"], color="g", ls=":", label="tolerance")
    _halt_marks(ax, metrics)
    ax.set(ylabel="RMS image error (px)", title="Image error (RMS over the features)")
    _legend(ax)
    if per_feature:
        ax2 = axes[1]
        _log_y(ax2)
        e = run.feature_error.values.reshape(len(run.feature_error.t), -1, 2)
        norms = np.linalg.norm(e, axis=2)
        for i in range(norms.shape[1]):
            ax2.plot(run.feature_error.t, norms[:, i], lw=1, label=f"feature {i + 1}")
        if metrics["tolerance_px"]:
            ax2.axhline(metrics["tolerance_px"], color="g", ls=":")
        _halt_marks(ax2, metrics)
        ax2.set(ylabel="|error| of each feature (px)", title="Error of each feature "
                "(numbers as on the camera frames)")
        _legend(ax2, ncol=1 + norms.shape[1] // 12)
    axes[-1].set_xlabel("time (s)")
    return fig


def fig_camera_path(run: RunData, motion: Motion | None, metrics: dict,
                    path=None) -> Figure | None:
    """Position (mm) and orientation (deg) error of the camera from its goal over time, and
    the position error's components in the goal camera's axes. ``path``: ``goal_path``'s
    answer when the caller has it."""
    path = goal_path(run, motion) if path is None else path
    if path is None:
        return None
    t, mm, deg, local, source = path
    fig = new_figure(WIDTH_IN, 5.2)
    ax1, ax2 = fig.subplots(2, 1, sharex=True)
    ax1.plot(t, mm, color="k", lw=1.6, label="distance")
    for k, axis in enumerate("xyz"):
        ax1.plot(t, local[:, k], lw=0.9, label=f"{axis} (goal camera axes)")
    ax1.axhline(0, color="0.6", lw=0.6)
    ax1.set(ylabel="position error (mm)", title=f"Camera to its goal: {source}")
    ax1.title.set_fontsize(10)
    _legend(ax1)
    ax2.plot(t, deg, color="k", lw=1.6, label="rotation angle")
    ax2.set(ylabel="orientation error (deg)", xlabel="time (s)")
    for ax in (ax1, ax2):
        _halt_marks(ax, metrics)
    _legend(ax2)
    return fig


def fig_pose_estimate(run: RunData, metrics: dict, path, estimate) -> Figure | None:
    """The node's pose-error estimate per frame (``metrics.pose_estimate_series``) against the
    camera's measured error to its goal (``goal_path``: ground truth, or forward kinematics
    against the taught joints), position (mm) and orientation (deg), log scale, with
    control.tolerance_mm / _deg. None without an estimate."""
    if estimate is None:
        return None
    t_est, mm_est, deg_est = estimate
    known = path is not None and path[4] != GOAL_FROM_FINAL_POSE
    fig = new_figure(WIDTH_IN, 5.2)
    axes = fig.subplots(2, 1, sharex=True)
    floor = {"mm": 1e-3, "deg": 1e-4}   # below: drawn at the floor (a log axis has no zero)
    for ax, unit, est, col, tol_key, label in (
            (axes[0], "mm", mm_est, 1, "tolerance_mm", "position error (mm)"),
            (axes[1], "deg", deg_est, 2, "tolerance_deg", "orientation error (deg)")):
        if known:
            ax.plot(path[0], np.maximum(path[col], floor[unit]), color="k", lw=1.2, zorder=3,
                    label="ground truth" if path[4].startswith("ground truth")
                    else "forward kinematics")   # on top: the estimate's dots hug it
        ax.plot(t_est, np.maximum(est, floor[unit]), ".", ms=3, color="#1e88e5",
                label="node's estimate (per frame)")
        if metrics.get(tol_key):
            ax.axhline(metrics[tol_key], color="g", ls=":", label=f"tolerance "
                       f"{metrics[tol_key]:g} {unit}")
        _log_y(ax)
        ax.set(ylabel=label)
        _halt_marks(ax, metrics)
        _legend(ax)
    axes[0].set_title(f"Pose error: the node's estimate against {path[4]}" if known else
                      "Pose error: the node's estimate (the record holds no measured goal to "
                      "compare it with)", fontsize=10)
    axes[1].set_xlabel("time (s)")
    return fig


def fig_joint_limits(run: RunData, motion: Motion, command: Command | None,
                     metrics: dict) -> Figure:
    """Per joint, as fractions of their bounds: measured speed over the limit in use, the
    commanded acceleration over its limit, and the position within the URDF range."""
    rows = 3 if command is not None and motion.qddot_max is not None else 2
    fig = new_figure(WIDTH_IN, 2.6 * rows + 0.4)
    axes = fig.subplots(rows, 1, sharex=True)
    ax = axes[0]
    for j, name in enumerate(motion.joint_names):
        ax.plot(motion.t, np.abs(motion.qdot[:, j]) / motion.qdot_max[j], lw=1,
                label=f"{name} ({motion.qdot_max[j]:.3g})")
    ax.axhline(1.0, color="r", ls="--", lw=1, label="limit")
    scale = run.status["speed_scale"]
    if np.any(np.isfinite(scale) & (scale < 1)):
        ax.step(run.status_t, scale, where="post", color="r", lw=0.8, alpha=0.6,
                label="x speed scale")
    _acted_rug(ax, run, ("joint_velocity",))
    _halt_marks(ax, metrics)
    ax.set(ylabel="|speed| / limit (-)", ylim=(0, 1.15),
           title="Joint speed (measured) over its limit in use, rad/s or m/s in the legend")
    _legend(ax)
    k = 1
    if rows == 3:
        ax = axes[k]
        for j, name in enumerate(motion.joint_names):
            ax.plot(command.t[1:], np.abs(command.accel[:, j]) / motion.qddot_max[j], lw=0.8,
                    label=f"{name} ({motion.qddot_max[j]:.3g})")
        ax.axhline(1.0, color="r", ls="--", lw=1, label="limit")
        _acted_rug(ax, run, ("joint_acceleration",))
        _halt_marks(ax, metrics)
        ax.set(ylabel="|acceleration| / limit (-)", ylim=(0, 1.15),
               title="Joint acceleration (commanded, change per output period) over its limit, "
                     "rad/s\u00b2 in the legend")
        _legend(ax)
        k += 1
    ax = axes[k]
    bounded = np.isfinite(motion.lower) & np.isfinite(motion.upper)
    for j, name in enumerate(motion.joint_names):
        if bounded[j]:
            span = motion.upper[j] - motion.lower[j]
            ax.plot(motion.t, (motion.q[:, j] - motion.lower[j]) / span, lw=1, label=name)
    margins = motion.position_margin / (motion.upper - motion.lower)[bounded] \
        if np.any(bounded) else []
    for m in margins[:1]:
        ax.axhspan(0, m, color="r", alpha=0.12, label="position margin")
        ax.axhspan(1 - m, 1, color="r", alpha=0.12)
    _acted_rug(ax, run, ("position_envelope",))
    _halt_marks(ax, metrics)
    ax.set(ylabel="position in range (-)", ylim=(-0.02, 1.02), xlabel="time (s)",
           title="Joint position within its URDF range (0 = lower limit, 1 = upper; "
                 "continuous joints left out)")
    _legend(ax)
    return fig


def fig_cartesian_limits(run: RunData, motion: Motion, metrics: dict) -> Figure:
    """Tool-point and camera linear speed (mm/s) and tool angular speed (deg/s) against their
    limits (dashed)."""
    fig = new_figure(WIDTH_IN, 6.6)
    axes = fig.subplots(3, 1, sharex=True)
    series = (("tool point linear speed", motion.tool_speed, motion.tool_speed_max, 1e3,
               "mm/s", "tool_linear_speed"),
              ("camera linear speed", motion.camera_speed, motion.camera_speed_max, 1e3,
               "mm/s", "camera_linear_speed"),
              ("tool angular speed", motion.angular_speed, motion.angular_speed_max,
               180 / math.pi, "deg/s", "angular_speed"))
    for ax, (label, values, limit, unit_scale, unit, name) in zip(axes, series):
        if values is not None:
            ax.plot(motion.t, values * unit_scale, lw=1, label="measured")
        if limit:
            ax.axhline(limit * unit_scale, color="r", ls="--", lw=1,
                       label=f"limit {limit * unit_scale:.3g} {unit}")
        _acted_rug(ax, run, (name,))
        _halt_marks(ax, metrics)
        ax.set(ylabel=f"speed ({unit})", title=label.capitalize())
        ax.title.set_fontsize(10)
        _legend(ax)
    axes[-1].set_xlabel("time (s)")
    return fig


def fig_envelope(run: RunData, motion: Motion, metrics: dict) -> Figure | None:
    """Tool translation (mm) and rotation (deg) from its start pose against the envelope."""
    moved, turned = envelope_path(run, motion)
    if moved is None:
        return None
    p = run_params(run)
    fig = new_figure(WIDTH_IN, 4.4)
    ax1, ax2 = fig.subplots(2, 1, sharex=True)
    ax1.plot(motion.t, moved * 1e3, lw=1.2, label="from the start pose")
    if p.get("limits.max_translation_m"):
        ax1.axhline(p["limits.max_translation_m"] * 1e3, color="r", ls="--", lw=1,
                    label=f"limit ({p['limits.max_translation_m'] * 1e3:.0f} mm)")
    ax1.set(ylabel="translation (mm)", title="Motion envelope: tool translation and rotation "
            "from the start pose (limits.max_translation_m, limits.max_rotation_deg)")
    _legend(ax1)
    ax2.plot(motion.t, turned, lw=1.2, label="from the start pose")
    if p.get("limits.max_rotation_deg"):
        ax2.axhline(p["limits.max_rotation_deg"], color="r", ls="--", lw=1,
                    label=f"limit ({p['limits.max_rotation_deg']:.0f} deg)")
    ax2.set(ylabel="rotation (deg)", xlabel="time (s)")
    for ax in (ax1, ax2):
        _halt_marks(ax, metrics)
    _legend(ax2)
    return fig


def fig_timeline(run: RunData, metrics: dict) -> Figure | None:
    """Supervisor state over time, one row per state; halt reasons written at their entry."""
    t, states = run.status_t, run.status["state"]
    if t.size == 0:
        return None
    fig = new_figure(WIDTH_IN, 2.6, left=1.15)
    ax = fig.add_subplot()
    edges = np.append(t, t[-1] + (np.median(np.diff(t)) if t.size > 1 else 0.0))
    for row, state in enumerate(SUPERVISOR_STATES):
        spans = [(edges[i], edges[i + 1] - edges[i]) for i in range(t.size) if states[i] == state]
        ax.broken_barh(spans, (row - 0.4, 0.8), color=STATE_COLOURS[state])
    for halt in metrics["halts"]:
        row = SUPERVISOR_STATES.index(halt["state"])
        ax.annotate(halt["reason"] or "(no reason)", (halt["t_s"], row), xytext=(4, 8),
                    textcoords="offset points", fontsize=8, color="r")
    ax.set_yticks(range(len(SUPERVISOR_STATES)), SUPERVISOR_STATES, fontsize=8)
    ax.set(xlabel="time (s)", ylabel="state (category)", title="Supervisor states")
    return fig


def fig_cycle_times(run: RunData) -> Figure | None:
    cycle = run.status["cycle_ms"][np.isfinite(run.status["cycle_ms"])]
    if cycle.size == 0:
        return None
    fig = new_figure(6.0, 2.8, right=0.3)
    ax = fig.add_subplot()
    ax.hist(cycle, bins=min(40, max(5, cycle.size // 5)))
    ax.yaxis.set_major_locator(MaxNLocator(integer=True))   # counts are whole
    ax.set(xlabel="cycle compute time (ms)", ylabel="cycles (count)", title="Cycle time")
    return fig
