"""What a sweep adds up to: statistics, the success map with Wilson intervals, the best
parameters, the summary and the episode table."""
from __future__ import annotations

import csv
import dataclasses
import math
from collections import Counter, defaultdict
from pathlib import Path

import numpy as np

from vservo_node import params
from vservo_node.record.sweep_spec import Axis, SweepRun, SweepSpec


# ----------------------------------------------------------------------------- results
def _stats(values) -> dict | None:
    if not values:
        return None
    v = np.asarray(values, dtype=float)
    return {"n": int(v.size), "mean": float(v.mean()), "min": float(v.min()),
            "p10": float(np.percentile(v, 10)), "median": float(np.median(v)),
            "p90": float(np.percentile(v, 90)), "max": float(v.max())}


def _map_bins(spec: SweepSpec, axis: Axis):
    """``(labels, index_of(value))`` of one success-map axis: its values as categories when it
    has a fixed set of them, else ``map_bins`` equal bins over its range."""
    if axis.values or spec.mode == "grid":
        categories = list(dict.fromkeys(axis.grid()))
        return [f"{c:.3g}" if isinstance(c, float) else str(c) for c in categories], \
            categories.index
    low, high = axis.bounds
    edges = np.linspace(low, high, spec.map_bins + 1)
    tiny = 1e-9 * max(abs(high - low), 1e-300)   # linspace round-off, not values

    def num(v):
        return f"{0.0 if abs(v) < tiny else v:.3g}"
    labels = [f"{num(a)} to {num(b)}" for a, b in zip(edges[:-1], edges[1:])]
    return labels, lambda v: int(np.clip(np.searchsorted(edges, v, "right") - 1, 0,
                                         spec.map_bins - 1))


# units of the scene quantities, for axis labels (controller parameters: params.SCHEMA's unit)
SCENE_UNITS = {"start.rotation_deg": "deg", "start.lateral_m": "m", "start.tilt_deg": "deg",
               "start.depth_m": "m", "calib.hand_eye_deg": "deg", "calib.hand_eye_m": "m",
               "calib.focal": "relative error", "calib.depth": "relative error",
               "image.noise_std": "grey levels", "image.scale": "fraction",
               "sensing.noise_px": "px", "arm.joint_noise_std": "rad",
               "arm.velocity_lag_s": "s", "arm.command_latency_s": "s"}


def axis_label(name: str) -> str:
    """``name (unit)`` of a swept quantity; ``(choice)`` for text parameters."""
    param = params.BY_NAME.get(name)
    unit = (param.unit or ("choice" if param.type is str else "-")) if param is not None \
        else SCENE_UNITS.get(name, "-")
    return f"{name} ({unit})"


def success_map(spec: SweepSpec, rows: list) -> dict:
    """Success rate of the episodes that ran, by the map axes: ``{axes, labels, n, successes,
    rate}`` with nested lists indexed [first axis][second axis] (rate None where empty)."""
    axes = [next(a for a in spec.axes if a.name == n) for n in spec.map_axes]
    binned = [_map_bins(spec, a) for a in axes]
    shape = tuple(len(labels) for labels, _ in binned)
    n, ok = np.zeros(shape, int), np.zeros(shape, int)
    for row in rows:
        if row["status"] == "ok":
            cell = tuple(index(row[a.name]) for a, (_, index) in zip(axes, binned))
            n[cell] += 1
            ok[cell] += bool(row["success"])
    rate = np.where(n > 0, ok / np.maximum(n, 1), None)  # type: ignore[call-overload]
    return {"axes": list(spec.map_axes), "labels": [labels for labels, _ in binned],
            "n": n.tolist(), "successes": ok.tolist(), "rate": rate.tolist()}


def wilson_interval(successes: int, n: int, z: float = 1.959963984540054) -> tuple:
    """The Wilson score interval of a success rate (Wilson 1927, "Probable inference, the law
    of succession, and statistical inference", J. Am. Stat. Assoc. 22: 209-212), 95 % by
    default: unlike k/n it tells 2 of 2 (0.34..1) from 20 of 20 (0.84..1)."""
    if n <= 0:
        return 0.0, 1.0
    p = successes / n
    centre = (p + z * z / (2 * n)) / (1 + z * z / n)
    half = z / (1 + z * z / n) * math.sqrt(p * (1 - p) / n + z * z / (4 * n * n))
    return max(0.0, centre - half), min(1.0, centre + half)


def best_params(spec: SweepSpec, rows: list) -> dict | None:
    """The swept controller parameters' values to use, and every group's figures; None when
    no controller parameter was swept.

    Rule (``spec.best``, stated in the result): groups of fewer than ``min_episodes`` are not
    chosen; the rest rank by the lower end of the 95 % Wilson interval of their success rate
    (ties: the shorter median time to converge); the choice must be *robust*: on each numeric
    swept parameter, the groups at the neighbouring values (the others equal) reach a lower
    end within ``margin`` of the choice's (a value at the edge of the swept range has one
    neighbour). The first group in rank order that passes is ``best``; ``None`` when none
    does (then ``reason`` says why)."""
    names = [a.name for a in spec.axes if a.name in params.BY_NAME]
    if not names:
        return None
    rule = spec.best
    groups = defaultdict(list)
    for row in rows:
        if row["status"] == "ok":
            groups[tuple(row[n] for n in names)].append(row)
    table = {}
    for key, members in groups.items():
        wins = sum(bool(r["success"]) for r in members)
        times = [r["time_to_converge_s"] for r in members if r["success"]]
        low, high = wilson_interval(wins, len(members))
        table[key] = {"values": dict(zip(names, key)), "episodes": len(members),
                      "successes": wins, "success_rate": wins / len(members),
                      "rate_low": low, "rate_high": high,
                      "median_time_s": float(np.median(times)) if times else None}
    numeric = [i for i, n in enumerate(names)
               if all(isinstance(k[i], (int, float)) and not isinstance(k[i], bool)
                      for k in table)]
    axis_values = {i: sorted({k[i] for k in table}) for i in numeric}

    def neighbours(key):
        for i in numeric:
            values = axis_values[i]
            j = values.index(key[i])
            for jj in (j - 1, j + 1):
                if 0 <= jj < len(values):
                    other = key[:i] + (values[jj],) + key[i + 1:]
                    yield names[i], other

    for key, g in table.items():
        weak = [f"{name}={other[names.index(name)]} ({table[other]['successes']}/"
                f"{table[other]['episodes']})"
                for name, other in neighbours(key) if other in table
                and table[other]["rate_low"] < g["rate_low"] - rule.margin]
        g["enough_episodes"] = g["episodes"] >= rule.min_episodes
        g["weak_neighbours"] = weak
    ranked = sorted(table.values(), key=lambda g: (
        -g["rate_low"], g["median_time_s"] if g["median_time_s"] is not None else math.inf))
    best = next((g for g in ranked if g["enough_episodes"] and not g["weak_neighbours"]), None)
    reason = ""
    if best is None:
        reason = ("no group has " + str(rule.min_episodes) + " episodes"
                  if not any(g["enough_episodes"] for g in ranked)
                  else "every group with enough episodes has a neighbour that fails more "
                       f"(beyond the margin {rule.margin})")
    return {"parameters": names, "best": best, "reason": reason,
            "rule": {"min_episodes": rule.min_episodes, "margin": rule.margin,
                     "rank": "lower end of the 95 % Wilson interval of the success rate, "
                             "then the shorter median time to converge",
                     "robust": "neighbouring values on each numeric swept parameter reach a "
                               "lower end within the margin"},
            "groups": ranked}


def summarize(run: SweepRun) -> dict:
    """Figures of a finished sweep (JSON-ready)."""
    spec, rows = run.spec, run.rows
    ran = [r for r in rows if r["status"] == "ok"]
    wins = [r for r in ran if r["success"]]
    return {
        "format": "vservo_sweep_summary/1", "name": spec.name, "description": spec.description,
        "scenario": spec.scenario, "mode": spec.mode, "sensing": spec.sensing, "seed": spec.seed,
        "fixed": spec.fixed, "axes": [a.name for a in spec.axes],
        "success_criteria": dataclasses.asdict(spec.success),
        "episodes": len(rows), "ran": len(ran),
        "skipped": sum(r["status"] == "skipped" for r in rows),
        "errors": sum(r["status"] == "error" for r in rows),
        "successes": len(wins),
        "success_rate": len(wins) / len(ran) if ran else None,
        "time_to_converge_s": _stats([r["time_to_converge_s"] for r in wins]),
        "params_file": spec.params_source or None,
        "failure_reasons": dict(Counter(r["failure"] for r in rows if not r["success"])
                                .most_common()),
        "success_map": success_map(spec, rows),
        "best_params": best_params(spec, rows),
        "wall_s": run.wall_s, "workers": run.workers,
    }


def _cell(value) -> str:
    if value is None:
        return ""
    if isinstance(value, (bool, np.bool_)):
        return "true" if value else "false"
    return repr(float(value)) if isinstance(value, (float, np.floating)) else str(value)


def write_table(rows: list, path: Path) -> Path:
    """One CSV row per episode, full-precision numbers (the same sweep writes the same file)."""
    columns = list(dict.fromkeys(k for row in rows for k in row))
    with open(path, "w", newline="") as f:
        writer = csv.writer(f)
        writer.writerow(columns)
        for row in rows:
            writer.writerow([_cell(row.get(c)) for c in columns])
    return path
