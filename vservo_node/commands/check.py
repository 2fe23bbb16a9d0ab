"""`vservo check PARAMS.yaml`: validate a controller parameter file offline.

Checks every value against the parameter schema (type, range, choices), reports unknown names
with the closest known one (typos in any part of the name), missing required values, and the
loop-delay bound gain x (loop delay + camera period) < 0.3 (common practice, no source).
Parameters ROS declares on every node (``use_sim_time``, ``start_type_description_service``,
``qos_overrides.*``) are accepted as they are, so a ``ros2 param dump`` file or the recorder's
params.yaml checks clean. A file that is not valid YAML is reported with its line and column.
Exit code 0 when the file is usable, 1 otherwise.
"""
from __future__ import annotations

import sys

import yaml

from vservo_node import param_names, params


def yaml_problem(path, exc: Exception) -> str:
    """One line for a YAML syntax error: ``file:line:column: problem`` (1-based, as editors
    count)."""
    mark = getattr(exc, "problem_mark", None) or getattr(exc, "context_mark", None)
    problem = getattr(exc, "problem", None) or str(exc).splitlines()[0]
    if mark is None:
        return f"{path}: invalid YAML: {problem}"
    return f"{path}:{mark.line + 1}:{mark.column + 1}: invalid YAML: {problem}"


def run(args) -> int:
    try:
        values = params.load_params_file(args.file, node_name=args.node)
    except yaml.YAMLError as exc:
        print(f"error: {yaml_problem(args.file, exc)}", file=sys.stderr)
        return 1
    except (OSError, ValueError) as exc:   # file missing, wrong layout; named loader errors
        print(f"error: {exc}", file=sys.stderr)
        return 1
    known, ros_own, unknown = param_names.split(values)
    result = params.validate(known)
    errors = [f"{name}: unknown parameter"
              + (f" (did you mean {hint}?)" if hint else " (no parameter of that name or one "
                 "like it; see `vservo_node/params.py` or the README table)")
              for name, hint in unknown.items()] + result.errors
    for error in errors:
        print(f"error: {error}")
    for warning in result.warnings:
        print(f"warning: {warning}")
    if ros_own:
        print(f"note: {len(ros_own)} of ROS's own parameters accepted as they are "
              f"({', '.join(sorted(ros_own))})")
    if not errors:
        v = result.values
        product = max(v["control.gain_near"], v["control.gain_far"]) * (
            v["control.loop_delay_s"] + 1.0 / v["io.camera_rate_hz"])
        print(f"ok: {len(known)} parameters set, the rest default; "
              f"gain x (delay + camera period) = {product:.3f} < {params.DELAY_GAIN_BOUND}")
    return 0 if not errors else 1


def register(sub) -> None:
    p = sub.add_parser("check", help="validate a controller parameter file",
                       description=__doc__)
    p.add_argument("file", help="ROS 2 parameter file (YAML with ros__parameters)")
    p.add_argument("--node", default="vservo", help="node name whose section to read")
    p.set_defaults(func=run)
