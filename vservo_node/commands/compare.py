"""`vservo compare BAG... [--out DIR]`: several runs' error curves and metrics side by side."""
from __future__ import annotations


def register(subparsers) -> None:
    parser = subparsers.add_parser(
        "compare", help="overlay the error curves of several runs and tabulate their metrics",
        description="Prints a table of metrics and writes compare.csv and compare.html.")
    parser.add_argument("bags", nargs="+", help="bag folders (or single .mcap / .db3 files)")
    parser.add_argument("--out", default="compare", help="output folder (default: ./compare)")
    parser.add_argument("--tol", type=float, help="tolerance in px for every run (default: "
                        "each bag's control.tolerance_px)")
    parser.set_defaults(func=_run)


def _run(args) -> int:
    import sys
    from pathlib import Path

    from vservo_node.record.compare import compare_runs

    try:
        table, _ = compare_runs(args.bags, args.out, args.tol)
    except (OSError, ValueError) as exc:    # YamlFileError of a bag's params or metadata
        print(f"vservo compare: {exc}", file=sys.stderr)
        return 1
    print(table)
    print(f"written: {Path(args.out) / 'compare.csv'}, {Path(args.out) / 'compare.html'}")
    return 0
