"""`vservo sweep SWEEP.yaml [--workers N] [--out DIR] [--params FILE] [--scheduler ADDRESS]`:
many headless scenario episodes over ranges of start offsets, calibration errors, noise and
parameters (vservo_node/record/sweep.py), summarised as JSON, CSV and figures; failed episodes
kept as run records."""
from __future__ import annotations

import dataclasses
import os
import sys

from vservo_node.interface import SENSING_MODES


def register(subparsers) -> None:
    parser = subparsers.add_parser(
        "sweep", help="robustness sweep: many headless scenario episodes, success rate and map",
        description="Runs the episodes a sweep file describes (shipped name from config/sweeps, "
                    "or a path) and writes episodes.csv, summary.json, success_map.csv/.png, "
                    "time_to_converge.png and, when controller parameters vary, params.csv.")
    parser.add_argument("sweep", help="sweep file: shipped name (e.g. quick) or YAML path")
    parser.add_argument("--workers", type=int, default=os.cpu_count() or 1,
                        help="local worker processes (default: one per core)")
    parser.add_argument("--out", help="output folder (default: runs/sweep_<name>)")
    parser.add_argument("--scheduler", metavar="ADDRESS",
                        help="run on the Dask cluster whose scheduler listens here (e.g. "
                             "tcp://127.0.0.1:8786) instead of local processes")
    parser.add_argument("--sensing", choices=SENSING_MODES,
                        help="override the file's sensing: image (render and perceive every "
                             "frame) or projected (the target's points with pixel noise, no "
                             "images: ~3x faster, for studies of the servo, not the detectors)")
    parser.add_argument("--params", metavar="FILE",
                        help="start from your controller parameter file (ROS 2 parameter file "
                             "of the node) instead of config/vservo_sim.yaml's values; the "
                             "sweep's fixed and swept values go over it")
    parser.add_argument("--no-records", action="store_true",
                        help="do not keep failed episodes as run records (default: "
                             "<out>/records/, open them with vservo report)")
    parser.add_argument("--quiet", action="store_true", help="no progress bar")
    parser.set_defaults(func=_run)


def _run(args) -> int:
    from vservo_node.record.sweep import (SweepError, load_sweep, run_sweep, user_params,
                                          write_results)

    try:
        spec = load_sweep(args.sweep)
        if args.sensing:
            spec = dataclasses.replace(spec, sensing=args.sensing)
        if args.params:
            base, notes = user_params(args.params)
            spec = dataclasses.replace(spec, base_params=base, params_source=args.params)
            for note in notes:
                print(f"--params: {note}", file=sys.stderr)
        out = args.out or os.path.join("runs", f"sweep_{spec.name}")
        run = run_sweep(spec, workers=args.workers, scheduler=args.scheduler,
                        progress=not args.quiet,
                        records_dir=None if args.no_records else os.path.join(out, "records"))
    except (SweepError, OSError, ValueError) as exc:
        print(f"vservo sweep: {exc}", file=sys.stderr)
        return 2
    written = write_results(run, out)
    s = run.summary
    rate = "n/a" if s["success_rate"] is None else f"{100 * s['success_rate']:.0f}%"
    print(f"sweep {s['name']} on {s['scenario']} ({s['sensing']} sensing): "
          f"{s['successes']}/{s['ran']} succeeded "
          f"({rate}); {s['skipped']} skipped, {s['errors']} errors; "
          f"{run.wall_s:.1f} s wall on {run.workers}")
    times = s["time_to_converge_s"]
    if times:
        print(f"time to converge: median {times['median']:.2f} s, p90 {times['p90']:.2f} s, "
              f"max {times['max']:.2f} s")
    for reason, count in s["failure_reasons"].items():
        print(f"  {count:4d} x {reason}")
    chosen = s["best_params"]
    if chosen:
        best, rule = chosen["best"], chosen["rule"]
        if best:
            median = best["median_time_s"]
            print(f"best parameters: {best['values']}: {best['successes']}/{best['episodes']} "
                  f"succeeded (95 % interval {100 * best['rate_low']:.0f}-"
                  f"{100 * best['rate_high']:.0f} %), median time to converge "
                  + ("n/a" if median is None else f"{median:.2f} s"))
        else:
            print(f"best parameters: none chosen: {chosen['reason']}")
        print(f"  (rule: at least {rule['min_episodes']} episodes; ranked by {rule['rank']}; "
              f"{rule['robust']} (margin {rule['margin']}))")
    failed = [r for r in run.rows if r.get("record") and not str(r["record"]).startswith("error")]
    if failed:
        print(f"failed episodes kept as run records ({len(failed)}): "
              f"{os.path.dirname(failed[0]['record'])} (vservo report <record>)")
    print(f"results: {os.path.dirname(written[0])}")
    return 1 if s["errors"] else 0
