"""Report of one recorded run: a self-contained HTML page (figures inlined) and metrics.json,
drawn with matplotlib's Agg canvas (no display needed).

The page answers, top to bottom: did it arrive, and how well (a verdict banner: converged or
halted, the reason and the check that fired, what to look at, accuracy in px and mm/deg);
what the camera saw at the start and at the end (frames with the detected features, the
reference marks and the error vectors); how the error fell, overall and per feature; how far
the camera still was from its goal over time (position and orientation); every limit against
its bound (joint speed, acceleration and range; tool, camera and angular speed; the motion
envelope); the supervisor's states; the parameters used, with what differs from the defaults;
every figure of metrics.json with its definition. A figure whose data is not in the record is
left out and named at the end. Every axis carries its unit.
"""
from __future__ import annotations

import base64
import html
import io
import json
import math
from pathlib import Path

import numpy as np
from matplotlib.backends.backend_agg import FigureCanvasAgg
from matplotlib.figure import Figure
from matplotlib.ticker import MaxNLocator, NullFormatter

from vservo_node import params as schema
from vservo_node.interface import SUPERVISOR_STATES
from vservo_node.record import halts
from vservo_node.record.bag import RunData, load_run
from vservo_node.record.metrics import (DEFINITIONS, GOAL_FROM_FINAL_POSE, Command, Motion,
                                        arm_of_run, command_of_run, compute_metrics,
                                        envelope_path, fmt, goal_path, headline, ideal_decay,
                                        motion_of_run, pose_estimate_series, run_params,
                                        start_index)

STATE_COLOURS = dict(zip(SUPERVISOR_STATES, ("#9e9e9e", "#90caf9", "#1e88e5", "#26a69a",
                                             "#43a047", "#fb8c00", "#e53935")))
VERDICT_COLOURS = {"converged": ("#e8f5e9", "#2e7d32"), "halted": ("#ffebee", "#c62828"),
                   "incomplete": ("#fff8e1", "#f57f17")}
WIDTH_IN = 11.0   # figure width, inches at 100 dpi: 1100 px, the page's width


def new_figure(width: float = WIDTH_IN, height: float = 3.6, right: float = 1.9,
               left: float = 0.85, hspace: float = 0.32, wspace: float = 0.2) -> Figure:
    """A figure on an Agg canvas, ``width`` x ``height`` inches, with fixed margins in inches
    (``right``: room for the legends outside the plots). Fixed margins, not a layout engine:
    the engine measured every label on every draw and took half of a report's time."""
    fig = Figure(figsize=(width, height))
    FigureCanvasAgg(fig)
    fig.subplots_adjust(left=left / width, right=1 - right / width, bottom=0.55 / height,
                        top=1 - 0.4 / height, hspace=hspace, wspace=wspace)
    return fig


def encode_figure(fig: Figure, fmt_: str = "png") -> tuple[str, str]:
    """(mime type, base64) of the figure at 100 dpi; 'jpeg' for figures of camera images."""
    buf = io.BytesIO()
    if fmt_ == "jpeg":
        fig.savefig(buf, format="jpeg", dpi=100, pil_kwargs={"quality": 85})
    else:
        fig.savefig(buf, format="png", dpi=100)
    return f"image/{fmt_}", base64.b64encode(buf.getvalue()).decode("ascii")


def png_base64(fig: Figure) -> str:
    return encode_figure(fig)[1]


# ----------------------------------------------------------------------------- helpers
def _log_y(ax) -> None:
    """Log y axis with labels on the decades only (minor labels cost most of the drawing)."""
    ax.set_yscale("log")
    ax.yaxis.set_minor_formatter(NullFormatter())


def _legend(ax, **kw) -> None:
    """Legend outside the plot, on its right (never over the curves or the limit lines)."""
    if not ax.get_legend_handles_labels()[0]:
        return
    ax.legend(fontsize=7, loc="upper left", bbox_to_anchor=(1.005, 1.0), borderaxespad=0,
              **kw)


def _halt_marks(ax, metrics: dict) -> None:
    """A red line and the reason at each halt; a green line where the run converged."""
    for halt in metrics["halts"]:
        ax.axvline(halt["t_s"], color="#c62828", lw=1.2)
        ax.annotate(f"halt: {halt['reason'] or '?'}", (halt["t_s"], 0.0), xycoords=("data",
                    "axes fraction"), xytext=(3, 4), textcoords="offset points",
                    fontsize=8, color="#c62828",
                    bbox=dict(boxstyle="square,pad=0.1", fc="w", ec="none", alpha=0.8))


def _acted_rug(ax, run: RunData, names: tuple, label: str | None = None) -> None:
    """Tick marks along the top of ``ax`` at the status records where any of ``names`` acted."""
    acted = [i for i, a in enumerate(run.status["limits_acted"]) if set(a or ()) & set(names)]
    if acted:
        ax.plot(run.status_t[acted], np.ones(len(acted)), "|", color="#c62828", ms=8,
                transform=ax.get_xaxis_transform(), label=label or "limit acted")


def reference_points(run: RunData) -> np.ndarray | None:
    """Reference (goal) pixels (N, 2) as s - e per cycle (e = s - s*, Chaumette & Hutchinson
    2006, eq. 1), median over the cycles where both were recorded."""
    f, e = run.features, run.feature_error
    if f is None or e is None or f.values.shape[1] != e.values.shape[1]:
        return None
    idx = np.clip(np.searchsorted(e.t, f.t), 0, len(e.t) - 1)
    goal = f.values - e.values[idx]
    if not np.any(np.isfinite(goal)):
        return None
    return np.nanmedian(goal, axis=0).reshape(-1, 2)


def _features_at(run: RunData, t: float, within: float = 0.25):
    """(features (N, 2), errors (N, 2)) px recorded nearest to t (within ``within`` s)."""
    f, e = run.features, run.feature_error
    if f is None or not len(f.t):
        return None, None
    i = int(np.argmin(np.abs(f.t - t)))
    if abs(f.t[i] - t) > within:
        return None, None
    uv = f.values[i].reshape(-1, 2)
    err = None
    if e is not None and len(e.t):
        j = int(np.argmin(np.abs(e.t - f.t[i])))
        if e.values.shape[1] == f.values.shape[1] and abs(e.t[j] - f.t[i]) <= within:
            err = e.values[j].reshape(-1, 2)
    return uv, err


def _nice_scale(largest_px: float, wanted_px: float = 40.0) -> float:
    """1, 2 or 5 x 10^k so that the largest error vector is drawn about ``wanted_px`` long
    (never shrunk)."""
    if not largest_px > 0 or largest_px >= wanted_px:
        return 1.0
    raw = wanted_px / largest_px
    k = 10 ** math.floor(math.log10(raw))
    return float(max(m * k for m in (1, 2, 5) if m * k <= raw))


def taught_view(run: RunData):
    """(RGB image, taught pixels (N, 2)) of the reference copied into the record, or None: a
    record without one, a reference written before references kept their image, or a copy
    that does not read (``vision.reference.load_reference`` checks it, image size included)."""
    if run.reference_path is None:
        return None
    from vservo_node.vision.reference import load_reference
    try:
        reference = load_reference(run.reference_path)
    except (ValueError, OSError):
        return None
    image = reference.image
    if image is None:
        return None
    if image.dtype != np.uint8:      # 16-bit mono: shown scaled to 8 bits
        image = (image / max(float(image.max()), 1.0) * 255).astype(np.uint8)
    rgb = np.repeat(image[..., None], 3, axis=2) if image.ndim == 2 else image[..., ::-1]
    return rgb, reference.pixels


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
    n = len(motion.joint_names)
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


# ----------------------------------------------------------------------------- tables, page
def _value(v) -> str:
    if isinstance(v, bool) or v is None:
        return "n/a" if v is None else str(v)
    if isinstance(v, float):
        return f"{v:.4g}"
    if isinstance(v, dict):
        return ", ".join(f"{k}: {_value(n)}" for k, n in v.items()) or "none"
    if isinstance(v, list):
        return "; ".join(f"{h['reason'] or '(no reason)'} at {h['t_s']:.2f} s ({h['state']})"
                         + (f": {h['detail']}" if h.get("detail") else "")
                         for h in v) or "none"
    return str(v)


def metrics_table(metrics: dict) -> str:
    rows = "".join(
        f"<tr><th>{html.escape(k)}</th><td>{html.escape(_value(v))}</td>"
        f"<td class='def'>{html.escape(DEFINITIONS.get(k, ''))}</td></tr>"
        for k, v in metrics.items())
    return f"<table class='metrics'>{rows}</table>"


def _same(a, b) -> bool:
    if isinstance(a, (int, float)) and isinstance(b, (int, float)) and not isinstance(a, bool):
        return math.isclose(float(a), float(b), rel_tol=1e-9, abs_tol=1e-12)
    if isinstance(a, (list, tuple)) and isinstance(b, (list, tuple)):
        return len(a) == len(b) and all(_same(x, y) for x, y in zip(a, b))
    return a == b


def _param_text(value) -> str:
    if isinstance(value, float):
        return f"{value:.6g}"
    if isinstance(value, (list, tuple)):
        return "[" + ", ".join(_param_text(v) for v in value) + "]"
    if isinstance(value, str):
        return repr(value)
    return str(value)


def params_table(run: RunData) -> str:
    """The parameters the run used: first those that differ from the schema defaults (with the
    default beside), then the rest; names outside the schema (ROS's own) last."""
    used = run_params(run)
    if not used:
        return "<p>No params.yaml in the record: the parameters are unknown.</p>"
    defaults = schema.defaults()
    changed, same, other = [], [], []
    for name in sorted(used):
        value = used[name]
        if name not in schema.BY_NAME:
            other.append(name)
        elif _same(value, defaults[name]):
            same.append(name)
        else:
            changed.append(name)

    def row(name, show_default):
        p = schema.BY_NAME.get(name)
        value = used[name]
        unit = "" if p is None else p.unit
        cells = [f"<code>{html.escape(name)}</code>", html.escape(_param_text(value)),
                 html.escape(unit)]
        if show_default:
            cells.insert(2, html.escape(_param_text(defaults[name]) if p else ""))
        return "<tr>" + "".join(f"<td>{c}</td>" for c in cells) + "</tr>"

    out = [f"<p>{len(changed)} of {len(used)} parameters differ from the defaults of "
           f"<code>vservo_node/params.py</code>.</p>"]
    if changed:
        out.append("<table class='params'><tr><th>parameter</th><th>value used</th>"
                   "<th>default</th><th>unit</th></tr>"
                   + "".join(row(n, True) for n in changed) + "</table>")
    rest = "".join(row(n, False) for n in same + other)
    out.append(f"<details><summary>the other {len(same) + len(other)} parameters (defaults, "
               f"and ROS's own)</summary><table class='params'><tr><th>parameter</th>"
               f"<th>value</th><th>unit</th></tr>{rest}</table></details>")
    return "".join(out)


def verdict_html(metrics: dict, run: RunData) -> str:
    """The banner: verdict, cause, what to check, and the headline figures."""
    verdict = metrics["verdict"]
    background, colour = VERDICT_COLOURS[verdict]
    lines = []
    reason = metrics["reason"]
    if run.piece is not None and verdict == "incomplete":
        big = (f"PART OF A RUN: file {run.piece.index + 1} of {run.piece.count} "
               f"({run.piece.file}), {run.piece.t0_s:.2f} to {run.piece.t1_s:.2f} s of the bag")
        lines.append("This file does not hold the end of the run; the run's verdict is in "
                     "the report of the whole bag folder. The figures below cover this file's "
                     "time span only.")
    elif verdict == "converged":
        big = "CONVERGED" + headline(metrics)[0][1][len("converged"):]
    elif verdict == "halted":
        big = "HALTED" + headline(metrics)[0][1][len("halted"):]
        cause = metrics["detail"] or halts.describe(reason)
        if cause:
            lines.append(f"<b>Cause:</b> {html.escape(cause)}")
        g = halts.guidance(reason)
        if g is not None:
            if not metrics["detail"]:   # the node's own detail says more than the table
                lines.append(f"<b>Likely:</b> {_md_code(g.cause)}")
            lines.append(f"<b>What to check:</b> {_md_code(g.check)}")
    else:
        big = "NO VERDICT: the record holds no end of the run"
        lines.append("The run had not ended when the recording stopped (no run result and no "
                     "converged or halted state).")
    if verdict == "converged" and metrics["n_halts"]:
        lines.append(f"{metrics['n_halts']} halt(s) recorded before: see the supervisor states.")
    tiles = "".join(f"<div class='tile'><div class='label'>{html.escape(label)}</div>"
                    f"<div class='value'>{html.escape(text)}</div></div>"
                    for label, text in headline(metrics)[1:]
                    if label != "what fired")   # said as the cause above
    limits = metrics["limit_activations"]
    if limits:
        acted = ", ".join(f"{k} ({n})" for k, n in sorted(limits.items(), key=lambda x: -x[1]))
        tiles += (f"<div class='tile'><div class='label'>limits that acted (status records)"
                  f"</div><div class='value'>{html.escape(acted)}</div></div>")
    body = "".join(f"<p>{line}</p>" for line in lines)
    return (f"<div class='verdict' style='background:{background};border-color:{colour}'>"
            f"<div class='big' style='color:{colour}'>{html.escape(big)}</div>{body}"
            f"<div class='tiles'>{tiles}</div></div>")


def _md_code(text: str) -> str:
    """Escape, then `name` -> <code>name</code> (the guidance table's markup)."""
    parts = html.escape(text).split("`")
    return "".join(f"<code>{p}</code>" if i % 2 else p for i, p in enumerate(parts))


STYLE = ("body{font-family:sans-serif;max-width:1120px;margin:1em auto;color:#222}"
         "h1{margin-bottom:0.1em}h2{margin-top:1.4em;border-bottom:1px solid #ddd}"
         ".sub{color:#666;font-size:90%}"
         "table{border-collapse:collapse}th,td{border:1px solid #ccc;padding:2px 8px;"
         "text-align:left;font-size:88%;vertical-align:top}td.def{color:#555}"
         "img{max-width:100%}figure{margin:0.6em 0}figcaption{color:#555;font-size:90%}"
         ".verdict{border:2px solid;border-radius:6px;padding:0.6em 1em;margin:0.8em 0}"
         ".verdict .big{font-size:170%;font-weight:bold}.verdict p{margin:0.3em 0}"
         ".tiles{display:flex;flex-wrap:wrap;gap:8px;margin-top:0.6em}"
         ".tile{background:#fff;border:1px solid #ccc;border-radius:4px;padding:4px 10px;"
         "min-width:12em}.tile .label{font-size:75%;color:#666;text-transform:uppercase}"
         ".tile .value{font-size:110%}code{background:#f3f3f3;padding:0 2px}")


def html_page(title: str, body: str, subtitle: str = "") -> str:
    sub = f"<div class='sub'>{html.escape(subtitle)}</div>" if subtitle else ""
    return (f"<!DOCTYPE html><html><head><meta charset='utf-8'><title>{html.escape(title)}"
            f"</title><style>{STYLE}</style></head><body><h1>{html.escape(title)}</h1>{sub}"
            f"{body}</body></html>\n")


def figure_html(caption: str, fig: Figure, fmt_: str = "png") -> str:
    mime, data = encode_figure(fig, fmt_)
    return (f"<figure><img alt='{html.escape(caption)}' src='data:{mime};base64,{data}'>"
            f"<figcaption>{html.escape(caption)}</figcaption></figure>")


def write_report(bag: str | Path, out_dir: str | Path | None = None,
                 tolerance_px: float | None = None) -> tuple[Path, dict]:
    """Write report.html and metrics.json for one bag; returns (html path, metrics).

    out_dir defaults to ``<bag folder>/report`` (``<bag folder>/report_<file stem>`` for one
    split file of a bag).
    """
    run = load_run(bag)
    bag = Path(bag)
    if out_dir:
        out = Path(out_dir)
    elif bag.is_dir():
        out = bag / "report"
    else:
        out = bag.parent / f"report_{bag.stem}"
    out.mkdir(parents=True, exist_ok=True)
    arm = arm_of_run(run)
    motion = motion_of_run(run, arm)
    command = command_of_run(run, motion.joint_names) if motion is not None else None
    metrics = compute_metrics(run, tolerance_px, motion, command)
    path, estimate = goal_path(run, motion), pose_estimate_series(run)
    taught = taught_view(run)
    (out / "metrics.json").write_text(json.dumps(metrics, indent=2) + "\n", encoding="utf8")
    sections = [
        ("Camera view at the start and at the end", [
            (("Camera frames with the detected features (green, numbered), their reference "
              "marks (blue) and error vectors (yellow, toward the mark); white: the feature "
              "paths" if run.features is not None else
              "Camera frames (the record holds no detected features to mark on them)")
             + ("; right: the taught view from the reference copied into the record, its "
                "features numbered in the reference's order" if taught is not None else ""),
             fig_frames(run, metrics, taught), "jpeg")]),
        ("Image error", [("RMS image error against the ideal exponential decay for the "
                          "recorded gain, and the error of each feature", fig_error(run, metrics),
                          "png")]),
        ("Camera path to the goal", [("Position and orientation error of the camera from its "
                                      "goal over time", fig_camera_path(run, motion, metrics,
                                                                        path), "png")]
         + ([] if estimate is None else [   # only when the node estimated its pose error
             ("The node's pose-error estimate of each frame (from the features: PnP of the "
              "target model or the plane homography) against the measured error to the goal, "
              "position and orientation", fig_pose_estimate(run, metrics, path, estimate),
              "png")])),
        ("Limits against their bounds", [
            ("Joint speed, acceleration and position against their limits (red ticks: "
             "records where the limit acted)",
             None if motion is None else fig_joint_limits(run, motion, command, metrics), "png"),
            ("Tool-point, camera and angular speed against their limits",
             None if motion is None else fig_cartesian_limits(run, motion, metrics), "png"),
            ("Tool motion from its start pose against the motion envelope",
             None if motion is None else fig_envelope(run, motion, metrics), "png")]),
        ("Supervisor", [("Supervisor states and halt reasons", fig_timeline(run, metrics), "png"),
                        ("Cycle compute times", fig_cycle_times(run), "png")]),
    ]
    body = [verdict_html(metrics, run)]
    missing = []
    for heading, figures in sections:
        drawn = [(c, f, k) for c, f, k in figures if f is not None]
        missing += [c for c, f, _ in figures if f is None]
        if drawn:
            body.append(f"<h2>{html.escape(heading)}</h2>")
            body += [figure_html(c, f, k) for c, f, k in drawn]
    if missing:
        body.append(f"<p class='sub'>Not drawn (data not in the record): "
                    f"{html.escape('; '.join(missing))}</p>")
    from vservo_node.calib.run_report import section_html   # hand-eye check, loop delay
    body.append(section_html(run))
    body.append(f"<h2>Parameters used</h2>{params_table(run)}")
    body.append(f"<h2>All figures (metrics.json)</h2>{metrics_table(metrics)}")
    topics = "".join(f"<tr><td>{html.escape(name)}</td><td>{html.escape(kind)}</td>"
                     f"<td>{count}</td></tr>" for name, (kind, count) in sorted(run.topics.items()))
    body.append(f"<details><summary>Topics in the record</summary><table><tr><th>topic</th>"
                f"<th>type</th><th>messages</th></tr>{topics}</table></details>")
    reference = (f"; taught reference: {run.reference_path.name}" if run.reference_path
                 else "")
    subtitle = f"record {bag}; run id {metrics['run_id'] or 'n/a'}{reference}"
    page = out / "report.html"
    page.write_text(html_page(f"Run {metrics['run']}", "".join(body), subtitle),
                    encoding="utf8")
    return page, metrics
