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

import html
import json
import math
from pathlib import Path

from matplotlib.figure import Figure

from vservo_node import params as schema
from vservo_node.record import halts
from vservo_node.record.bag import RunData, load_run
from vservo_node.record.metrics import (DEFINITIONS, arm_of_run, command_of_run, compute_metrics,
                                        goal_path, headline, motion_of_run, pose_estimate_series,
                                        run_params)
from vservo_node.record.report_plots import (_legend, _log_y, encode_figure, new_figure, png_base64,
                                             reference_points, STATE_COLOURS, taught_view, WIDTH_IN)
from vservo_node.record.report_figures import (fig_camera_path, fig_cartesian_limits,
                                               fig_cycle_times, fig_envelope, fig_error, fig_frames,
                                               fig_joint_limits, fig_pose_estimate, fig_timeline)


# Split along its concerns: figure basics and helpers (report_plots), the figures
# (report_figures); their names keep this import path.
__all__ = ["_legend", "_log_y", "encode_figure", "fig_camera_path", "fig_cartesian_limits",
           "fig_cycle_times", "fig_envelope", "fig_error", "fig_frames", "fig_joint_limits",
           "fig_pose_estimate", "fig_timeline", "figure_html", "html_page", "metrics_table",
           "new_figure", "params_table", "png_base64", "reference_points", "STATE_COLOURS",
           "STYLE", "taught_view", "VERDICT_COLOURS", "verdict_html", "WIDTH_IN",
           "write_report"]

VERDICT_COLOURS = {"converged": ("#e8f5e9", "#2e7d32"), "halted": ("#ffebee", "#c62828"),
                   "incomplete": ("#fff8e1", "#f57f17")}


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
