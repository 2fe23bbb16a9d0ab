"""Names in a controller parameter file that are not the schema's: ROS's own, and typos.

A parameter file of the node as ROS writes it (``ros2 param dump``, our recorder's params.yaml)
also holds the parameters every rclpy node declares itself (``use_sim_time``,
``start_type_description_service``, ``qos_overrides.<topic>.<policy>``); they are not ours to
check and not errors. Any other unknown name is a typo until shown otherwise: :func:`nearest`
suggests the schema name closest to it, comparing full dotted names and their last parts
(``tolerence_px`` -> ``control.tolerance_px``, ``contrl.gain_near`` -> ``control.gain_near``).
"""
from __future__ import annotations

import difflib

from vservo_node import params

# Declared by rclpy itself on every node: the first two are in the params.yaml our recorder
# fetched from a running controller (tests/test_check.py reads one); qos_overrides.* are the
# QoS override parameters rclpy declares for publishers and subscriptions that allow them (from
# memory of the ROS 2 QoS overrides design).
ROS_OWN = ("use_sim_time", "start_type_description_service")
ROS_OWN_PREFIXES = ("qos_overrides.",)
CUTOFF = 0.6   # difflib ratio below which no suggestion is made (difflib's default)


def is_ros_own(name: str) -> bool:
    return name in ROS_OWN or name.startswith(ROS_OWN_PREFIXES)


def nearest(name: str, names=None) -> str | None:
    """The known name closest to ``name`` (difflib's ratio over full names and over their last
    dotted parts, the better of the two), or None when nothing is at least CUTOFF alike."""
    names = list(names if names is not None else params.BY_NAME)
    leaf = name.rsplit(".", 1)[-1]
    best, best_score = None, CUTOFF
    for candidate in names:
        full = difflib.SequenceMatcher(None, name, candidate).ratio()
        part = difflib.SequenceMatcher(None, leaf, candidate.rsplit(".", 1)[-1]).ratio()
        # a matching section breaks ties between equal leaves (gain_near vs ...gain_near)
        same_section = "." in name and name.split(".")[0] == candidate.split(".")[0]
        score = max(full, part) + (0.01 if same_section else 0.0)
        if score > best_score:
            best, best_score = candidate, score
    return best


def split(values: dict) -> tuple[dict, list[str], dict[str, str | None]]:
    """``(schema values, ROS's own names, {unknown name: suggestion or None})``."""
    known, own, unknown = {}, [], {}
    for name, value in values.items():
        if name in params.BY_NAME:
            known[name] = value
        elif is_ros_own(name):
            own.append(name)
        else:
            unknown[name] = nearest(name)
    return known, own, unknown
