"""`vservo check PARAMS.yaml`: validate a controller parameter file offline.

Checks every value against the parameter schema (type, range, choices), reports unknown names
(with the closest known one), missing required values, and the loop-delay bound
gain x (loop delay + camera period) < 0.3 (common practice, no source).
Exit code 0 when the file is usable, 1 otherwise.
"""
from __future__ import annotations

import sys

from vservo_node import params


def run(args) -> int:
    try:
        values = params.load_params_file(args.file, node_name=args.node)
    except (OSError, ValueError) as exc:
        print(f"error: {exc}", file=sys.stderr)
        return 1
    result = params.validate(values)
    for error in result.errors:
        print(f"error: {error}")
    for warning in result.warnings:
        print(f"warning: {warning}")
    if result.ok:
        v = result.values
        product = max(v["control.gain_near"], v["control.gain_far"]) * (
            v["control.loop_delay_s"] + 1.0 / v["io.camera_rate_hz"])
        print(f"ok: {len(values)} parameters set, the rest default; "
              f"gain x (delay + camera period) = {product:.3f} < {params.DELAY_GAIN_BOUND}")
    return 0 if result.ok else 1


def register(sub) -> None:
    p = sub.add_parser("check", help="validate a controller parameter file",
                       description=__doc__)
    p.add_argument("file", help="ROS 2 parameter file (YAML with ros__parameters)")
    p.add_argument("--node", default="vservo", help="node name whose section to read")
    p.set_defaults(func=run)
