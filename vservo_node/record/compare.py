"""Comparison of several recorded runs: RMS error curves overlaid (time from each run's start)
and their metrics side by side, as a printed table, compare.csv and compare.html."""
from __future__ import annotations

import csv
import html
from pathlib import Path

import numpy as np

from vservo_node.record.bag import load_run
from vservo_node.record.metrics import compute_metrics, start_index
from vservo_node.record.report import figure_html, html_page, new_figure

# metrics shown per run, in column order
COLUMNS = ("run", "converged", "time_to_tolerance_s", "final_rms_px", "initial_rms_px",
           "overshoot_pct", "peak_joint_speed_ratio", "peak_tool_speed_ratio", "n_halts",
           "halt_reasons", "limit_activations", "cycle_ms_p95")


def _cell(metrics: dict, column: str) -> str:
    if column == "halt_reasons":
        return ";".join(h["reason"] or "(none)" for h in metrics["halts"])
    value = metrics[column]
    if column == "limit_activations":
        return ";".join(f"{k}:{n}" for k, n in sorted(value.items()))
    if isinstance(value, float):
        return f"{value:.4g}"
    return "" if value is None else str(value)


def text_table(rows: list[list[str]]) -> str:
    """Rows of cells (first row the header) as aligned plain text."""
    widths = [max(len(r[i]) for r in rows) for i in range(len(rows[0]))]
    return "\n".join("  ".join(c.ljust(w) for c, w in zip(r, widths)).rstrip() for r in rows)


def compare_runs(bags: list, out_dir: str | Path, tolerance_px: float | None = None
                 ) -> tuple[str, list[dict]]:
    """Write compare.csv and compare.html into out_dir; returns (text table, metrics per run)."""
    out = Path(out_dir)
    out.mkdir(parents=True, exist_ok=True)
    fig = new_figure(8.0, 4.0)
    ax = fig.add_subplot()
    all_metrics = []
    for bag in bags:
        run = load_run(bag)
        metrics = compute_metrics(run, tolerance_px)
        all_metrics.append(metrics)
        k0 = start_index(run)
        rms = run.status["rms_px"]
        if k0 is not None and np.any(np.isfinite(rms[k0:]) & (rms[k0:] > 0)):
            ax.semilogy(run.status_t[k0:] - run.status_t[k0], rms[k0:], label=metrics["run"])
    tolerances = {m["tolerance_px"] for m in all_metrics if m["tolerance_px"]}
    for tol in sorted(tolerances):
        ax.axhline(tol, color="g", ls=":", lw=0.8)
    ax.set(xlabel="time since run start (s)", ylabel="RMS image error (px)",
           title="Image error of each run (tolerances dotted)")
    if ax.lines:
        ax.legend(fontsize=8)
    rows = [list(COLUMNS)] + [[_cell(m, c) for c in COLUMNS] for m in all_metrics]
    with open(out / "compare.csv", "w", newline="", encoding="utf8") as f:
        csv.writer(f).writerows(rows)
    head = "".join(f"<th>{html.escape(c)}</th>" for c in rows[0])
    body = "".join("<tr>" + "".join(f"<td>{html.escape(c)}</td>" for c in r) + "</tr>"
                   for r in rows[1:])
    page = (f"<table><tr>{head}</tr>{body}</table>"
            + figure_html("RMS image error of each run from its start", fig))
    (out / "compare.html").write_text(html_page(f"Comparison of {len(bags)} runs", page),
                                      encoding="utf8")
    return text_table(rows), all_metrics
