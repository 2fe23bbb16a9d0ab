"""Middleware set-up that must happen before ``rclpy.init``: the Fast DDS shared-memory profile.

``config/fastdds_shm.xml`` enlarges Fast DDS's shared-memory segment so a camera frame fits
in it (see the comment in the file; ``benchmarks/image_latency_bench.py`` measures the effect).
The profile is used only when the user has not chosen one: an existing
FASTDDS_DEFAULT_PROFILES_FILE (Fast DDS 3) or FASTRTPS_DEFAULT_PROFILES_FILE (Fast DDS 2) is
left alone, and so is a non-Fast-DDS RMW_IMPLEMENTATION.
"""
from __future__ import annotations

import os
from collections.abc import MutableMapping
from pathlib import Path

from vservo_node.paths import config_dir

PROFILE_FILE = "fastdds_shm.xml"
PROFILE_VARIABLES = ("FASTDDS_DEFAULT_PROFILES_FILE", "FASTRTPS_DEFAULT_PROFILES_FILE")
_FASTDDS_RMWS = ("rmw_fastrtps_cpp", "rmw_fastrtps_dynamic_cpp")


def shm_profile_path() -> Path:
    """Path of the shipped shared-memory profile."""
    return config_dir() / PROFILE_FILE


def use_shm_profile(environ: MutableMapping[str, str] | None = None) -> Path | None:
    """Point Fast DDS at the shared-memory profile in ``environ`` (default ``os.environ``).

    Call before ``rclpy.init`` (or pass a child process's environment). Returns the profile
    path it set, or None when it left the environment alone: the user set a profile file, or
    RMW_IMPLEMENTATION names another middleware (an unset one means Fast DDS, ROS 2's default).
    """
    environ = os.environ if environ is None else environ
    if any(environ.get(name) for name in PROFILE_VARIABLES):
        return None
    if environ.get("RMW_IMPLEMENTATION", "rmw_fastrtps_cpp") not in _FASTDDS_RMWS:
        return None
    path = shm_profile_path()
    environ["FASTDDS_DEFAULT_PROFILES_FILE"] = str(path)
    return path
