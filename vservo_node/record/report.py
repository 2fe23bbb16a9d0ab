"""Report of one recorded run: a self-contained HTML page (figures inlined as base64 PNG) and
metrics.json, drawn with matplotlib's Agg canvas (no display needed).

Figures (each left out when its data is not in the bag):
error RMS on a log scale with the ideal exponential decay for the recorded gains; feature
trajectories in the image with their reference points; joint positions and speeds against
their limits; tool-point speed against its limit; camera path in 3D (forward kinematics of the
recorded joints, and the simulator's ground truth); supervisor states and halt reasons on a
timeline; histogram of cycle compute times.
"""
from __future__ import annotations

import base64
import html
import io
import json
from pathlib import Path

import numpy as np
from matplotlib.backends.backend_agg import FigureCanvasAgg
from matplotlib.figure import Figure

from vservo_node.interface import SUPERVISOR_STATES
from vservo_node.record.bag import RunData, load_run
from vservo_node.record.metrics import (Motion, arm_of_run, compute_metrics,
                                        ideal_decay, motion_of_run, start_index)

STATE_COLOURS = dict(zip(SUPERVISOR_STATES, ("#9e9e9e", "#90caf9", "#1e88e5", "#26a69a",
                                             "#43a047", "#fb8c00", "#e53935")))


def new_figure(width: float = 7.0, height: float = 3.6) -> Figure:
    """A figure on an Agg canvas (inches)."""
    fig = Figure(figsize=(width, height), layout="constrained")
    FigureCanvasAgg(fig)
    return fig


def png_base64(fig: Figure) -> str:
    buf = io.BytesIO()
    fig.savefig(buf, format="png", dpi=100)
    return base64.b64encode(buf.getvalue()).decode("ascii")


def fig_error(run: RunData, metrics: dict) -> Figure | None:
    """RMS image error (px, log scale) over time and the ideal decay from the run start."""
    rms = run.status["rms_px"]
    if not np.any(np.isfinite(rms) & (rms > 0)):
        return None
    fig = new_figure()
    ax = fig.add_subplot()
    ax.semilogy(run.status_t, rms, label="recorded RMS error")
    k0 = start_index(run)
    if k0 is not None and metrics["initial_rms_px"]:
        t = run.status_t[k0:]
        ax.semilogy(t, ideal_decay(t, run.status["gain"][k0:], metrics["initial_rms_px"]), "--",
                    label="ideal exp(-\u222b\u03bb dt) for the recorded gain")
        ax.axvline(t[0], color="0.6", lw=0.8)
    if metrics["tolerance_px"]:
        ax.axhline(metrics["tolerance_px"], color="g", ls=":", label="tolerance")
    ax.set(xlabel="time (s)", ylabel="RMS image error (px)", title="Image error")
    ax.legend(fontsize=8)
    return fig


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


def fig_image(run: RunData) -> Figure | None:
    """Feature trajectories (u right, v down) from start (circle) to end (dot), goals (cross)."""
    if run.features is None or run.features.values.shape[1] < 2:
        return None
    uv = run.features.values.reshape(len(run.features.t), -1, 2)
    fig = new_figure(6.0, 4.8)
    ax = fig.add_subplot()
    for i in range(uv.shape[1]):
        path = uv[:, i][np.all(np.isfinite(uv[:, i]), axis=1)]
        if len(path):
            line, = ax.plot(path[:, 0], path[:, 1], lw=1)
            ax.plot(*path[0], "o", mfc="none", color=line.get_color())
            ax.plot(*path[-1], ".", color=line.get_color())
    goal = reference_points(run)
    if goal is not None:
        ax.plot(goal[:, 0], goal[:, 1], "kx", ms=8, label="reference points")
        ax.legend(fontsize=8)
    if run.camera_info:
        ax.set(xlim=(-0.5, run.camera_info["width"] - 0.5),
               ylim=(run.camera_info["height"] - 0.5, -0.5))
    else:
        ax.invert_yaxis()
    ax.set_aspect("equal")
    ax.set(xlabel="u (px)", ylabel="v (px)", title="Feature trajectories (o start, . end)")
    return fig


def fig_joints(motion: Motion) -> Figure:
    """Per joint: position within [lower, upper]; speed within +-limit."""
    n = len(motion.joint_names)
    fig = new_figure(8.0, 1.5 * n + 0.6)
    axes = fig.subplots(n, 2, sharex=True, squeeze=False)
    for j, name in enumerate(motion.joint_names):
        ax_q, ax_v = axes[j]
        ax_q.plot(motion.t, motion.q[:, j])
        for bound in (motion.lower[j], motion.upper[j]):
            if np.isfinite(bound):
                ax_q.axhline(bound, color="r", ls="--", lw=0.8)
        ax_q.set_ylabel(name, fontsize=8)
        ax_v.plot(motion.t, motion.qdot[:, j])
        if np.isfinite(motion.qdot_max[j]):
            for sign in (-1, 1):
                ax_v.axhline(sign * motion.qdot_max[j], color="r", ls="--", lw=0.8)
    axes[0, 0].set_title("position (rad or m), limits dashed")
    axes[0, 1].set_title("speed (rad/s or m/s), limits dashed")
    axes[-1, 0].set_xlabel("time (s)")
    axes[-1, 1].set_xlabel("time (s)")
    return fig


def fig_tool_speed(motion: Motion) -> Figure:
    fig = new_figure(7.0, 3.0)
    ax = fig.add_subplot()
    ax.plot(motion.t, motion.tool_speed * 1000, label="tool point speed")
    if motion.tool_speed_max:
        ax.axhline(motion.tool_speed_max * 1000, color="r", ls="--", label="limit")
    ax.set(xlabel="time (s)", ylabel="speed (mm/s)", title="Tool point linear speed")
    ax.legend(fontsize=8)
    return fig


def fig_camera_path(run: RunData, motion: Motion | None) -> Figure | None:
    """Camera origin in the base frame (mm): from FK and from the simulator's ground truth."""
    paths = []
    if motion is not None:
        paths.append(("forward kinematics", motion.camera_xyz))
    if run.camera_truth is not None:
        paths.append(("ground truth", run.camera_truth.values[:, :3]))
    if not paths:
        return None
    fig = new_figure(6.0, 5.0)
    ax = fig.add_subplot(projection="3d")
    for label, xyz in paths:
        mm = xyz * 1000
        line, = ax.plot(mm[:, 0], mm[:, 1], mm[:, 2], label=label)
        ax.scatter(*mm[0], marker="o", color=line.get_color())
    if run.taught_pose is not None:
        ax.scatter(*(run.taught_pose.values[-1, :3] * 1000), marker="*", s=80, color="k",
                   label="taught pose")
    ax.set_aspect("equal")
    ax.set(xlabel="x (mm)", ylabel="y (mm)", zlabel="z (mm)", title="Camera path (base frame)")
    ax.legend(fontsize=8)
    return fig


def fig_timeline(run: RunData, metrics: dict) -> Figure | None:
    """Supervisor state over time, one row per state; halt reasons written at their entry."""
    t, states = run.status_t, run.status["state"]
    if t.size == 0:
        return None
    fig = new_figure(8.0, 2.8)
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
    ax.set(xlabel="time (s)", title="Supervisor states")
    return fig


def fig_cycle_times(run: RunData) -> Figure | None:
    cycle = run.status["cycle_ms"][np.isfinite(run.status["cycle_ms"])]
    if cycle.size == 0:
        return None
    fig = new_figure(6.0, 3.0)
    ax = fig.add_subplot()
    ax.hist(cycle, bins=min(40, max(5, cycle.size // 5)))
    ax.set(xlabel="cycle compute time (ms)", ylabel="cycles", title="Cycle time")
    return fig


def _value(v) -> str:
    if isinstance(v, float):
        return f"{v:.4g}"
    if isinstance(v, dict):
        return ", ".join(f"{k}: {n}" for k, n in v.items()) or "none"
    if isinstance(v, list):
        return "; ".join(f"{h['reason'] or '(no reason)'} at {h['t_s']:.2f} s ({h['state']})"
                         for h in v) or "none"
    return "n/a" if v is None else str(v)


def metrics_table(metrics: dict) -> str:
    rows = "".join(f"<tr><th>{html.escape(k)}</th><td>{html.escape(_value(v))}</td></tr>"
                   for k, v in metrics.items())
    return f"<table>{rows}</table>"


def html_page(title: str, body: str) -> str:
    style = ("body{font-family:sans-serif;max-width:60em;margin:1em auto}"
             "table{border-collapse:collapse}th,td{border:1px solid #ccc;padding:2px 8px;"
             "text-align:left;font-size:90%}img{max-width:100%}")
    return (f"<!DOCTYPE html><html><head><meta charset='utf-8'><title>{html.escape(title)}"
            f"</title><style>{style}</style></head><body><h1>{html.escape(title)}</h1>"
            f"{body}</body></html>\n")


def figure_html(caption: str, fig: Figure) -> str:
    return (f"<figure><img alt='{html.escape(caption)}' src='data:image/png;base64,"
            f"{png_base64(fig)}'><figcaption>{html.escape(caption)}</figcaption></figure>")


def write_report(bag: str | Path, out_dir: str | Path | None = None,
                 tolerance_px: float | None = None) -> tuple[Path, dict]:
    """Write report.html and metrics.json for one bag; returns (html path, metrics).

    out_dir defaults to ``<bag folder>/report``.
    """
    run = load_run(bag)
    bag = Path(bag)
    out = Path(out_dir) if out_dir else (bag if bag.is_dir() else bag.parent) / "report"
    out.mkdir(parents=True, exist_ok=True)
    motion = motion_of_run(run, arm_of_run(run))
    metrics = compute_metrics(run, tolerance_px, motion)
    (out / "metrics.json").write_text(json.dumps(metrics, indent=2) + "\n", encoding="utf8")
    figures = [("Image error RMS and the ideal exponential decay", fig_error(run, metrics)),
               ("Feature trajectories in the image", fig_image(run)),
               ("Joint positions and speeds against their limits",
                None if motion is None else fig_joints(motion)),
               ("Tool point speed against its limit",
                None if motion is None else fig_tool_speed(motion)),
               ("Camera path", fig_camera_path(run, motion)),
               ("Supervisor states and halt reasons", fig_timeline(run, metrics)),
               ("Cycle compute times", fig_cycle_times(run))]
    missing = [caption for caption, fig in figures if fig is None]
    topics = "".join(f"<tr><td>{html.escape(name)}</td><td>{html.escape(kind)}</td>"
                     f"<td>{count}</td></tr>" for name, (kind, count) in sorted(run.topics.items()))
    body = (f"<p>Bag: {html.escape(str(bag))}</p><h2>Metrics</h2>{metrics_table(metrics)}"
            + "".join(figure_html(c, f) for c, f in figures if f is not None)
            + (f"<p>Not drawn (data not in the bag): {html.escape(', '.join(missing))}</p>"
               if missing else "")
            + f"<h2>Topics</h2><table><tr><th>topic</th><th>type</th><th>messages</th></tr>"
              f"{topics}</table>")
    page = out / "report.html"
    page.write_text(html_page(f"Run {metrics['run']}", body), encoding="utf8")
    return page, metrics
