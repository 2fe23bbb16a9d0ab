"""`vservo report BAG [--out DIR]`: HTML report and metrics.json of one recorded run."""
from __future__ import annotations


def register(subparsers) -> None:
    parser = subparsers.add_parser(
        "report", help="HTML report and metrics.json of one recorded run (rosbag2 bag)",
        description="Reads a rosbag2 bag (ours or ros2 bag record's; mcap or sqlite3) and writes "
                    "report.html (figures inlined) and metrics.json.")
    parser.add_argument("bag", help="bag folder (or a single .mcap / .db3 file)")
    parser.add_argument("--out", help="output folder (default: <bag folder>/report)")
    parser.add_argument("--tol", type=float, help="tolerance in px (default: "
                        "control.tolerance_px of the bag's params.yaml)")
    parser.set_defaults(func=_run)


def _run(args) -> int:
    import sys

    from vservo_node.record.report import write_report

    try:
        page, metrics = write_report(args.bag, args.out, args.tol)
    except (OSError, ValueError) as exc:    # YamlFileError of a bag's params or metadata
        print(f"vservo report: {exc}", file=sys.stderr)
        return 1
    converged = {True: "converged", False: "did not converge"}[metrics["converged"]]
    ttt, final = metrics["time_to_tolerance_s"], metrics["final_rms_px"]
    print(f"{metrics['run']}: {converged}; final RMS "
          f"{'n/a' if final is None else f'{final:.3g} px'}; "
          f"time to tolerance {'n/a' if ttt is None else f'{ttt:.2f} s'}; "
          f"halts {metrics['n_halts']}")
    print(f"report: {page}")
    return 0
