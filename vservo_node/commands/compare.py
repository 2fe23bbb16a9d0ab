"""`vservo compare BAG... [--out DIR]`: several runs as a repeatability study."""
from __future__ import annotations

import sys


def register(subparsers) -> None:
    parser = subparsers.add_parser(
        "compare", help="repeatability of several runs: spread of final pose, joints, times",
        description="Prints the repeatability table (n, mean, SD, min, max, range of the final "
                    "pose error, final image error, time to converge, peak joint speed and "
                    "final joints over the runs that converged) and one row per run, and "
                    "writes compare.html, repeatability.csv, runs.csv and series.csv (the time "
                    "series of every run).")
    parser.add_argument("bags", nargs="+", help="bag folders (or single .mcap / .db3 files)")
    parser.add_argument("--out", default="compare", help="output folder (default: ./compare)")
    parser.add_argument("--tol", type=float, help="tolerance in px for every run (default: "
                        "each bag's control.tolerance_px)")
    parser.set_defaults(func=_run)


def _run(args) -> int:
    from pathlib import Path

    from vservo_node.record.compare import compare_runs

    try:
        table, _ = compare_runs(args.bags, args.out, args.tol)
    except (OSError, ValueError) as exc:    # YamlFileError of a bag's params or metadata
        print(f"vservo compare: {exc}", file=sys.stderr)
        return 1
    print(table)
    out = Path(args.out)
    print(f"written: {out / 'compare.html'}, {out / 'repeatability.csv'}, {out / 'runs.csv'}, "
          f"{out / 'series.csv'}")
    return 0
