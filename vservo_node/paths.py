"""Where the package's shipped files (config/: robots, targets, scenarios, parameters) live.

Order: $VSERVO_CONFIG_DIR; the source tree's config/ (pip install -e, or running from a clone);
the installed share/vservo_node/config of a colcon build (found through ament_index).
"""
from __future__ import annotations

import os
from pathlib import Path

_SOURCE_CONFIG = Path(__file__).resolve().parent.parent / "config"


def config_dir() -> Path:
    env = os.environ.get("VSERVO_CONFIG_DIR")
    if env:
        return Path(env)
    if _SOURCE_CONFIG.is_dir():
        return _SOURCE_CONFIG
    try:
        from ament_index_python.packages import get_package_share_directory
        return Path(get_package_share_directory("vservo_node")) / "config"
    except Exception as exc:  # not installed through colcon either
        raise FileNotFoundError(
            "vservo_node config folder not found: set VSERVO_CONFIG_DIR, run from a source "
            "clone, or install the package with colcon") from exc


def shipped(kind: str, name: str, suffix: str = ".yaml") -> Path:
    """Resolve a shipped file by short name (e.g. shipped('scenarios', 'tray_twist')) or path.

    A name containing a path separator or ending in the suffix is taken as a path as given.
    """
    candidate = Path(name)
    if candidate.suffix or os.sep in name:
        if candidate.exists():
            return candidate
        inside = config_dir() / kind / candidate.name
        if inside.exists():
            return inside
        what = kind[:-1] if kind.endswith("s") else kind
        raise FileNotFoundError(f"{what} file not found: {name}")
    path = config_dir() / kind / (name + suffix)
    if not path.exists():
        available = sorted(p.stem for p in (config_dir() / kind).glob("*" + suffix))
        raise FileNotFoundError(f"no {kind} entry named '{name}'; available: "
                                f"{', '.join(available)}")
    return path
