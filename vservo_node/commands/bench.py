"""`vservo bench`: the performance table (median and p95 per row, machine and load noted).

Detection and tracking per target kind at three image sizes, Servo.observe / Servo.command
for 4, 16 and 64 points on the 6- and 7-joint bench arms, and over DDS (through
tools/isolated, shared-memory Fast DDS profile) the controller node's CPU while watching and
servoing at 30 and 60 fps and its image-to-command latency beside a transport-only baseline
(vservo_node/bench/). Prints one table; ``--json FILE`` writes every row and the machine.
Takes a few minutes; on a shared machine rerun and compare before believing a figure.
"""
from __future__ import annotations

import json
import sys


def run(args) -> int:
    from vservo_node.bench.suite import format_table, run_suite

    parts = tuple(args.parts.split(",")) if args.parts else ("vision", "servo", "dds")
    unknown = set(parts) - {"vision", "servo", "dds"}
    if unknown:
        print(f"error: unknown part(s) {sorted(unknown)}; expected vision, servo, dds "
              "(comma-separated)", file=sys.stderr)
        return 2
    result = run_suite(parts, frames=args.frames, ticks=args.ticks, watch_s=args.watch_s,
                       servo_s=args.servo_s)
    print(format_table(result))
    for c in result["dds_configs"]:
        if "failed" in c or "skipped" in c:
            print(f"dds: {c}", file=sys.stderr)
    if args.json:
        with open(args.json, "w") as f:
            json.dump(result, f, indent=1)
        print(f"written: {args.json}")
    return 0


def register(sub) -> None:
    p = sub.add_parser("bench", help="print the performance table (a few minutes)",
                       description=__doc__)
    p.add_argument("--json", metavar="FILE", help="also write the rows and machine as JSON")
    p.add_argument("--parts", default="", help="comma-separated subset of vision,servo,dds")
    p.add_argument("--frames", type=int, default=30, help="frames per vision row")
    p.add_argument("--ticks", type=int, default=300, help="output ticks per servo row")
    p.add_argument("--watch-s", type=float, default=5.0, help="watching interval per DDS row")
    p.add_argument("--servo-s", type=float, default=8.0, help="servoing time per DDS row")
    p.set_defaults(func=run)
