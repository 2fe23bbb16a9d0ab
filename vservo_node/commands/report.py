"""`vservo report BAG [--out DIR]`: HTML report and metrics.json of one recorded run."""
from __future__ import annotations

import sys


def register(subparsers) -> None:
    parser = subparsers.add_parser(
        "report", help="HTML report and metrics.json of one recorded run (rosbag2 bag)",
        description="Reads a rosbag2 bag (ours or ros2 bag record's; mcap or sqlite3) and writes "
                    "report.html (figures inlined) and metrics.json; prints the verdict and the "
                    "headline figures. One split file of a bag (a .mcap listed in its "
                    "metadata.yaml) is reported over its own time span.")
    parser.add_argument("bag", help="bag folder (or a single .mcap / .db3 file)")
    parser.add_argument("--out", help="output folder (default: <bag folder>/report, or "
                        "<bag folder>/report_<file> for one split file)")
    parser.add_argument("--tol", type=float, help="tolerance in px (default: "
                        "control.tolerance_px of the bag's params.yaml)")
    parser.set_defaults(func=_run)


def _run(args) -> int:
    from vservo_node.record.metrics import headline
    from vservo_node.record.report import write_report

    try:
        page, metrics = write_report(args.bag, args.out, args.tol)
    except (OSError, ValueError) as exc:    # YamlFileError of a bag's params or metadata
        print(f"vservo report: {exc}", file=sys.stderr)
        return 1
    print(metrics["run"])
    for label, text in headline(metrics):
        print(f"  {label:28s} {text}")
    print(f"report: {page}")
    return 0
