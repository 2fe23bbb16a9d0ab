"""Middleware set-up that must happen before ``rclpy.init``: the Fast DDS shared-memory profile.

``config/fastdds_shm.xml`` enlarges Fast DDS's shared-memory segment so a camera frame fits
in it (see the comment in the file; ``benchmarks/image_latency_bench.py`` measures the effect).

Fast DDS reads the profile file from a variable whose name changed with its major version:
FASTRTPS_DEFAULT_PROFILES_FILE for Fast DDS 2 (2.14 in ROS 2 Jazzy reads only this one) and
FASTDDS_DEFAULT_PROFILES_FILE for Fast DDS 3 (ROS 2 Kilted; its rmw_fastrtps still reads the
old name but logs a deprecation warning at every node start). So the profile goes into the
variable(s) the running Fast DDS reads (``fast_dds_major``): both for 2 or when the version
cannot be told, only the new one for 3. It is used only when the user has not chosen a
profile: when either variable is set (non-empty), both are left as they are (the user's file is
their choice for whichever Fast DDS runs), and so is the environment under a non-Fast-DDS
RMW_IMPLEMENTATION.
"""
from __future__ import annotations

import os
from collections.abc import Mapping, MutableMapping
from importlib import metadata
from pathlib import Path

from vservo_node.paths import config_dir

PROFILE_FILE = "fastdds_shm.xml"
PROFILE_VARIABLES = ("FASTDDS_DEFAULT_PROFILES_FILE", "FASTRTPS_DEFAULT_PROFILES_FILE")
_FASTDDS_RMWS = ("rmw_fastrtps_cpp", "rmw_fastrtps_dynamic_cpp")
# ROS 2 distributions that ship Fast DDS 2 (REP 2000 platform tables, from memory); later
# ones ship Fast DDS 3.
_FAST_DDS_2_DISTROS = ("humble", "iron", "jazzy")


def shm_profile_path() -> Path:
    """Path of the shipped shared-memory profile."""
    return config_dir() / PROFILE_FILE


def fast_dds_major(environ: Mapping[str, str] | None = None) -> int | None:
    """Major version of the Fast DDS this Python would load, or None when it cannot be told.

    ROS 2 from PyPI wheels: the installed distribution ``ros-fastdds`` (3.x, Kilted's stack) or
    ``ros-fastrtps`` (2.x, Jazzy's). A sourced ROS 2 install: ROS_DISTRO.
    """
    environ = os.environ if environ is None else environ
    for name in ("ros-fastdds", "ros-fastrtps"):
        try:
            return int(metadata.version(name).split(".")[0])
        except (metadata.PackageNotFoundError, ValueError):
            continue
    distro = environ.get("ROS_DISTRO", "").strip().lower()
    if not distro:
        return None
    return 2 if distro in _FAST_DDS_2_DISTROS else 3


def use_shm_profile(environ: MutableMapping[str, str] | None = None,
                    major: int | None = -1) -> Path | None:
    """Point Fast DDS at the shared-memory profile in ``environ`` (default ``os.environ``).

    Call before ``rclpy.init`` (or pass a child process's environment). ``major``: the Fast DDS
    major version to set it up for (default: ``fast_dds_major(environ)``; None: unknown, set
    both variables). Returns the profile path it set, or None when it left the environment
    alone: the user set a profile file, or RMW_IMPLEMENTATION names another middleware (an
    unset one means Fast DDS, ROS 2's default).
    """
    environ = os.environ if environ is None else environ
    if any(environ.get(name) for name in PROFILE_VARIABLES):
        return None
    if environ.get("RMW_IMPLEMENTATION", "rmw_fastrtps_cpp") not in _FASTDDS_RMWS:
        return None
    if major == -1:
        major = fast_dds_major(environ)
    path = shm_profile_path()
    environ["FASTDDS_DEFAULT_PROFILES_FILE"] = str(path)
    if major is None or major < 3:
        environ["FASTRTPS_DEFAULT_PROFILES_FILE"] = str(path)
    else:
        environ.pop("FASTRTPS_DEFAULT_PROFILES_FILE", None)   # set but empty: drop it
    return path
