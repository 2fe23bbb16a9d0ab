"""Several recorded runs as a repeatability study: how well and how alike they arrived.

``compare_runs`` reads each run (vservo_node.record.metrics gives every figure, by the same
definitions as the report), then writes into one folder:

- ``compare.html``: the repeatability table (n, mean, sample SD, min, max and range of the
  final pose error, ground truth and the node's estimate, final image error, time to converge,
  peak joint speed and each final joint position, over the runs that converged), one row per
  run (verdict, reason, figures), the parameters that differ between the runs, the RMS error
  curves overlaid and the final camera positions in the goal camera's axes;
- ``repeatability.csv``: the repeatability table; ``runs.csv``: every metric of every run;
- ``series.csv``: the time series of every run in long form (run, time since its start, RMS
  error, camera position and orientation error to its goal where known, source ``camera``;
  the node's own per-frame estimate of them, source ``estimate``).

Without ground truth (a real cell) the pose rows of the study are the node's estimate
(result ``estimated_pose_error_*``, the mean over the last dwell; else the last status value).

Runs are labelled #1, #2, ... in the order given; the tables name each label's record.
"""
from __future__ import annotations

import csv
import html
import math
from pathlib import Path

import numpy as np

from vservo_node.record.bag import load_run
from vservo_node.record.metrics import (GOAL_FROM_FINAL_POSE, arm_of_run, command_of_run,
                                        compute_metrics, fmt, goal_path, motion_of_run,
                                        pose_estimate_series, run_params, start_index)
from vservo_node.record.report import _legend, _log_y, figure_html, html_page, new_figure

# figures of the repeatability table: (metrics key, label, unit, scale)
STUDY = (("final_pose_error_mm", "final position error (ground truth)", "mm", 1.0),
         ("final_pose_error_deg", "final orientation error (ground truth)", "deg", 1.0),
         ("estimated_pose_error_mm", "final position error (node's estimate)", "mm", 1.0),
         ("estimated_pose_error_deg", "final orientation error (node's estimate)", "deg", 1.0),
         ("final_rms_px", "final image error (RMS)", "px", 1.0),
         ("time_to_converge_s", "time to converge", "s", 1.0),
         ("peak_joint_speed_ratio", "peak joint speed / limit in use", "%", 100.0),
         ("overshoot_pct", "overshoot (RMS rebound)", "%", 1.0))
# per-run table: (metrics key, header, format, scale)
RUN_COLUMNS = (("verdict", "verdict", "s", 1), ("reason", "reason", "s", 1),
               ("time_to_converge_s", "converge s", ".2f", 1),
               ("final_rms_px", "final px", ".3f", 1),
               ("final_pose_error_mm", "pose mm", ".3f", 1),
               ("final_pose_error_deg", "pose deg", ".3f", 1),
               ("estimated_pose_error_mm", "est. mm", ".3f", 1),
               ("estimated_pose_error_deg", "est. deg", ".3f", 1),
               ("peak_joint_speed_ratio", "joint speed %", ".0f", 100),
               ("n_halts", "halts", "d", 1))


def stats(values) -> dict | None:
    """n, mean, sample SD (n - 1 in the denominator; None for one value), min, max, range of
    the finite values; None when there are none."""
    v = np.asarray([x for x in values if x is not None and math.isfinite(x)], float)
    if v.size == 0:
        return None
    return {"n": int(v.size), "mean": float(v.mean()),
            "sd": float(v.std(ddof=1)) if v.size > 1 else None,
            "min": float(v.min()), "max": float(v.max()), "range": float(v.max() - v.min())}


def text_table(rows: list[list[str]]) -> str:
    """Rows of cells (first row the header) as aligned plain text."""
    widths = [max(len(r[i]) for r in rows) for i in range(len(rows[0]))]
    return "\n".join("  ".join(c.ljust(w) for c, w in zip(r, widths)).rstrip() for r in rows)


def _differing_params(params: list[dict]) -> list[str]:
    names = sorted({n for p in params for n in p})
    return [n for n in names if len({repr(p.get(n)) for p in params}) > 1]


def _short(value) -> str:
    if isinstance(value, float):
        return f"{value:.4g}"
    if isinstance(value, list):
        return "[" + ", ".join(_short(v) for v in value) + "]"
    return "(unset)" if value is None else str(value)


def study_rows(all_metrics: list[dict]) -> list[dict]:
    """The repeatability table over the runs that converged (the spread of where runs that
    stopped early ended says nothing about repeatability): one row per figure, then one per
    final joint position."""
    done = [m for m in all_metrics if m["verdict"] == "converged"]
    rows = []
    for key, label, unit, scale in STUDY:
        s = stats([None if m.get(key) is None else scale * m[key] for m in done])
        if s is not None:
            rows.append({"figure": label, "unit": unit, **s})
    joints = [m["final_joints"] for m in done if m.get("final_joints")]
    for name in (joints[0] if joints else {}):
        s = stats([j.get(name) for j in joints])
        if s is not None:
            rows.append({"figure": f"final {name}", "unit": "rad", **s})
    return rows


def _cell(value, spec=".4g") -> str:
    if value is None:
        return "n/a"
    if isinstance(value, str):
        return value
    return format(value, spec)


def compare_runs(bags: list, out_dir: str | Path, tolerance_px: float | None = None
                 ) -> tuple[str, list[dict]]:
    """Write the study into out_dir (see the module doc); returns (printed text, metrics per
    run)."""
    out = Path(out_dir)
    out.mkdir(parents=True, exist_ok=True)
    runs, all_metrics, paths, params = [], [], [], []
    for bag in bags:
        run = load_run(bag)
        arm = arm_of_run(run)
        motion = motion_of_run(run, arm)
        command = command_of_run(run, motion.joint_names) if motion is not None else None
        metrics = compute_metrics(run, tolerance_px, motion, command)
        runs.append(run)
        all_metrics.append(metrics)
        paths.append(goal_path(run, motion))
        params.append(run_params(run))
    labels = [f"#{i + 1}" for i in range(len(runs))]
    study = study_rows(all_metrics)
    differing = _differing_params(params)

    # --- files
    with open(out / "repeatability.csv", "w", newline="", encoding="utf8") as f:
        writer = csv.writer(f)
        writer.writerow(["figure", "unit", "n", "mean", "sd", "min", "max", "range"])
        for r in study:
            writer.writerow([r["figure"], r["unit"], r["n"]] + [
                "" if r[k] is None else repr(r[k]) for k in ("mean", "sd", "min", "max",
                                                             "range")])
    keys = list(dict.fromkeys(k for m in all_metrics for k in m
                              if not isinstance(m[k], (dict, list))))
    with open(out / "runs.csv", "w", newline="", encoding="utf8") as f:
        writer = csv.writer(f)
        writer.writerow(["label", *keys, "halt_reasons", "limit_activations",
                         *[f"final_{n}" for n in (all_metrics[0].get("final_joints") or {})],
                         *differing])
        for label, m, p in zip(labels, all_metrics, params):
            writer.writerow([label, *["" if m.get(k) is None else m[k] for k in keys],
                             ";".join(h["reason"] or "(none)" for h in m["halts"]),
                             ";".join(f"{k}:{n}" for k, n in sorted(m["limit_activations"]
                                                                     .items())),
                             *(m.get("final_joints") or {}).values(),
                             *[_short(p.get(n)) for n in differing]])
    with open(out / "series.csv", "w", newline="", encoding="utf8") as f:
        writer = csv.writer(f)
        writer.writerow(["label", "run", "source", "t_s", "rms_px", "position_error_mm",
                         "orientation_error_deg"])
        for label, run, m, path in zip(labels, runs, all_metrics, paths):
            k0 = start_index(run)
            t0 = run.status_t[k0] if k0 is not None else 0.0
            for t, rms in zip(run.status_t, run.status["rms_px"]):
                writer.writerow([label, m["run"], "status", repr(float(t - t0)),
                                 "" if not np.isfinite(rms) else repr(float(rms)), "", ""])
            if path is not None:
                for t, mm, deg in zip(path[0], path[1], path[2]):
                    writer.writerow([label, m["run"], "camera", repr(float(t - t0)), "",
                                     repr(float(mm)), repr(float(deg))])
            estimate = pose_estimate_series(run)
            for t, mm, deg in zip(*(estimate or ((), (), ()))):
                writer.writerow([label, m["run"], "estimate", repr(float(t - t0)), "",
                                 repr(float(mm)), repr(float(deg))])

    # --- page
    body = [f"<p>{len(runs)} runs; {sum(m['verdict'] == 'converged' for m in all_metrics)} "
            f"converged. Spread over the converged runs (SD: sample standard deviation, n - 1)."
            f"</p>"]
    head = "".join(f"<th>{h}</th>" for h in ("figure", "unit", "n", "mean", "SD", "min", "max",
                                              "range"))
    body.append(f"<h2>Repeatability</h2><table class='study'><tr>{head}</tr>" + "".join(
        f"<tr><td>{html.escape(r['figure'])}</td><td>{r['unit']}</td><td>{r['n']}</td>"
        + "".join(f"<td>{_cell(r[k])}</td>" for k in ("mean", "sd", "min", "max", "range"))
        + "</tr>" for r in study) + "</table>")
    head = "".join(f"<th>{h}</th>" for h in ["run", *[c[1] for c in RUN_COLUMNS]])
    rows = []
    for label, m in zip(labels, all_metrics):
        cells = [label] + [_cell(None if m.get(k) is None else (m[k] * sc if sc != 1 else m[k]),
                                 spec) if spec != "s" else html.escape(str(m.get(k) or "-"))
                           for k, _, spec, sc in RUN_COLUMNS]
        rows.append("<tr>" + "".join(f"<td>{c}</td>" for c in cells) + "</tr>")
    body.append(f"<h2>Runs</h2><table class='runs'><tr>{head}</tr>{''.join(rows)}</table>")
    body.append("<h2>Records</h2><table><tr><th>run</th><th>record</th><th>parameters that "
                "differ between the runs</th></tr>" + "".join(
                    f"<tr><td>{label}</td><td>{html.escape(str(m['run']))}</td><td>"
                    + html.escape(", ".join(f"{n} = {_short(p.get(n))}" for n in differing)
                                  or "-") + "</td></tr>"
                    for label, m, p in zip(labels, all_metrics, params)) + "</table>")
    body.append(figure_html("RMS image error of each run from its start", _fig_errors(
        runs, labels, all_metrics)))
    spread = _fig_final_positions(paths, labels, all_metrics)
    if spread is not None:
        body.append(figure_html("Final camera position of each run in the goal camera's axes",
                                spread))
    (out / "compare.html").write_text(html_page(f"Repeatability of {len(runs)} runs",
                                                "".join(body)), encoding="utf8")

    # --- printed
    text = [text_table([["figure", "unit", "n", "mean", "SD", "min", "max", "range"]]
                       + [[r["figure"], r["unit"], str(r["n"])]
                          + [_cell(r[k]) for k in ("mean", "sd", "min", "max", "range")]
                          for r in study]) if study else "no run converged: no spread to show",
            "",
            text_table([["run", *[c[1] for c in RUN_COLUMNS]]] + [
                [label] + [(str(m.get(k) or "-") if spec == "s" else
                            _cell(None if m.get(k) is None else m[k] * sc, spec))
                           for k, _, spec, sc in RUN_COLUMNS]
                for label, m in zip(labels, all_metrics)]),
            ""]
    text += [f"{label}: {m['run']}" for label, m in zip(labels, all_metrics)]
    if differing:
        text.append("parameters that differ: " + ", ".join(differing))
    return "\n".join(text), all_metrics


def _fig_errors(runs, labels, all_metrics):
    fig = new_figure(11.0, 3.8)
    ax = fig.add_subplot()
    _log_y(ax)
    for k, (run, label) in enumerate(zip(runs, labels)):
        k0 = start_index(run)
        rms = run.status["rms_px"]
        if k0 is not None and np.any(np.isfinite(rms[k0:]) & (rms[k0:] > 0)):
            ax.plot(run.status_t[k0:] - run.status_t[k0], rms[k0:], lw=1, color=f"C{k % 10}",
                    label=label)
    for tol in sorted({m["tolerance_px"] for m in all_metrics if m["tolerance_px"]}):
        ax.axhline(tol, color="g", ls=":", lw=0.8)
    ax.set(xlabel="time since the run start (s)", ylabel="RMS image error (px)",
           title="Image error of each run (tolerances dotted)")
    if ax.lines:
        _legend(ax, ncol=1 + len(labels) // 16)
    return fig


def _fig_final_positions(paths, labels, all_metrics):
    """x-y and x-z of each run's final camera position in the goal camera's axes (mm)."""
    points = [(k, label, p[3][-1]) for k, (label, p, m) in enumerate(zip(labels, paths,
                                                                       all_metrics))
              if p is not None and p[4] != GOAL_FROM_FINAL_POSE   # against itself: always 0
              and m["verdict"] == "converged"]
    if not points:
        return None
    fig = new_figure(11.0, 4.4, right=0.3, wspace=0.3)
    axes = fig.subplots(1, 2)
    for ax, (i, j) in zip(axes, ((0, 1), (0, 2))):
        for k, label, xyz in points:
            ax.plot(xyz[i], xyz[j], "o", ms=6, color=f"C{k % 10}", label=label)  # as above
            ax.annotate(label, (xyz[i], xyz[j]), xytext=(4, 4), textcoords="offset points",
                        fontsize=8)
        ax.plot(0, 0, "k+", ms=14, label="goal")
        ax.set(xlabel=f"{'xyz'[i]} (mm)", ylabel=f"{'xyz'[j]} (mm)")
        ax.set_aspect("equal", adjustable="datalim")
        ax.grid(alpha=0.3)
    axes[0].set_title("converged runs: final camera position, goal camera axes: x right, "
                      "y down", fontsize=10)
    axes[1].set_title("x right, z forward", fontsize=10)
    return fig


__all__ = ["compare_runs", "stats", "study_rows", "text_table", "fmt"]
