"""A sweep's figures (success map, times) and the files of its results."""
from __future__ import annotations

import itertools
import json
from pathlib import Path

import numpy as np

from vservo_node.record.sweep_results import _cell, axis_label, summarize, write_table
from vservo_node.record.sweep_spec import SweepRun


def _plot_map(summary: dict, path: Path) -> Path:
    import matplotlib
    matplotlib.use("Agg")
    import matplotlib.pyplot as plt

    m = summary["success_map"]
    fig, ax = plt.subplots(figsize=(6.4, 4.8))
    n, rate = np.array(m["n"]), np.array(m["rate"], dtype=float)   # None -> NaN
    if n.ndim == 1:
        xs = np.arange(len(rate))
        ax.bar(xs, np.nan_to_num(rate), color="tab:green")
        for x, k, r in zip(xs, n, rate):
            ax.text(float(x), (0 if np.isnan(r) else r) + 0.02, f"n={k}", ha="center",
                    fontsize=8)
        ax.set_xticks(xs, m["labels"][0])
        ax.set_xlabel(axis_label(m["axes"][0]))
        ax.set_ylabel("success rate (fraction)")
        ax.set_ylim(0, 1.1)
    else:
        cmap = matplotlib.colormaps["RdYlGn"].with_extremes(bad="lightgrey")  # grey: no episode
        image = ax.imshow(rate.T, origin="lower", cmap=cmap, vmin=0, vmax=1, aspect="auto")
        for i, j in itertools.product(range(n.shape[0]), range(n.shape[1])):
            if n[i, j]:
                ax.text(i, j, f"{m['successes'][i][j]}/{n[i, j]}", ha="center", va="center",
                        fontsize=8)
        ax.set_xticks(range(n.shape[0]), m["labels"][0])
        ax.set_yticks(range(n.shape[1]), m["labels"][1])
        ax.set_xlabel(axis_label(m["axes"][0]))
        ax.set_ylabel(axis_label(m["axes"][1]))
        fig.colorbar(image, ax=ax, label="success rate (fraction; grey: no episode)")
    ax.set_title(f"{summary['name']}: success by {' and '.join(m['axes'])}", fontsize=10)
    fig.tight_layout()
    fig.savefig(path, dpi=100)
    plt.close(fig)
    return path


def _plot_times(rows: list, summary: dict, path: Path) -> Path:
    import matplotlib
    matplotlib.use("Agg")
    import matplotlib.pyplot as plt
    from matplotlib.ticker import MaxNLocator

    times = [r["time_to_converge_s"] for r in rows if r["success"]]
    fig, ax = plt.subplots(figsize=(6.4, 4.0))
    if times:
        ax.hist(times, bins=min(20, max(5, len(times) // 3)), color="tab:blue")
        ax.yaxis.set_major_locator(MaxNLocator(integer=True))
    else:
        ax.text(0.5, 0.5, "no successful episode", ha="center", transform=ax.transAxes)
    ax.set_xlabel("time to converge (s)")
    ax.set_ylabel("episodes (count)")
    ax.set_title(f"{summary['name']}: {len(times)} successful episodes")
    fig.tight_layout()
    fig.savefig(path, dpi=100)
    plt.close(fig)
    return path


def write_results(run: SweepRun, out_dir) -> list[Path]:
    """episodes.csv, summary.json, success_map.csv/.png, time_to_converge.png and, when
    controller parameters were swept, params.csv in ``out_dir``; returns the paths."""
    out = Path(out_dir)
    out.mkdir(parents=True, exist_ok=True)
    summary = run.summary or summarize(run)
    written = [write_table(run.rows, out / "episodes.csv")]
    (out / "summary.json").write_text(json.dumps(summary, indent=2, default=_cell) + "\n")
    written.append(out / "summary.json")
    m = summary["success_map"]
    n, wins, rate = (np.array(m[k], dtype=object) for k in ("n", "successes", "rate"))
    map_rows = [{**{axis: m["labels"][k][i] for k, (axis, i) in enumerate(zip(m["axes"], cell))},
                 "episodes": n[cell], "successes": wins[cell], "success_rate": rate[cell]}
                for cell in np.ndindex(n.shape)]
    written.append(write_table(map_rows, out / "success_map.csv"))
    written.append(_plot_map(summary, out / "success_map.png"))
    written.append(_plot_times(run.rows, summary, out / "time_to_converge.png"))
    if summary["best_params"]:
        groups = [{**g["values"], "episodes": g["episodes"], "successes": g["successes"],
                   "success_rate": g["success_rate"], "rate_low_95": g["rate_low"],
                   "median_time_s": g["median_time_s"],
                   "enough_episodes": g["enough_episodes"],
                   "weak_neighbours": "; ".join(g["weak_neighbours"])}
                  for g in summary["best_params"]["groups"]]
        written.append(write_table(groups, out / "params.csv"))
    return written
