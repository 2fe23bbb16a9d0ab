"""Fixtures of tests/install (ROS 2 tool checks): see ros2_helpers.py for what and why."""
import subprocess
from pathlib import Path

import pytest

from ros2_helpers import (ROOT, TOOLS, VENV, VENV_JAZZY, Ros2, make_workspace,
                          tools_missing_reason)


def _tool_venv(venv: Path, target: str, distro: str, scratch: Path) -> Ros2:
    reason = tools_missing_reason(distro)
    if reason:
        pytest.skip(reason)
    if not (venv / ".installed").is_file():
        subprocess.run(["make", "--no-print-directory", target, f"ROS2_TOOLS={TOOLS}"],
                       cwd=ROOT, check=True)
    return Ros2(venv, TOOLS, scratch)


@pytest.fixture(scope="session")
def ros2(tmp_path_factory) -> Ros2:
    """The Kilted tool venv (.venv-ros2: the project's pinned wheels)."""
    return _tool_venv(VENV, "venv-ros2", "kilted", tmp_path_factory.mktemp("ros2"))


@pytest.fixture(scope="session")
def ros2_jazzy(tmp_path_factory) -> Ros2:
    """The Jazzy tool venv (.venv-ros2-jazzy: ros-jazzy-rclpy 7.1.6 and its stack)."""
    return _tool_venv(VENV_JAZZY, "venv-ros2-jazzy", "jazzy",
                      tmp_path_factory.mktemp("ros2_jazzy"))


@pytest.fixture(scope="session")
def workspace(ros2, tmp_path_factory) -> Path:
    """A workspace built with plain `colcon build` (shared by the launch tests)."""
    ws = make_workspace(tmp_path_factory.mktemp("ws_plain"))
    ros2.run(["colcon", "build", "--packages-select", "vservo_node"], cwd=ws)
    return ws


@pytest.fixture(scope="session")
def workspace_jazzy(ros2_jazzy, tmp_path_factory) -> Path:
    """The same, built by the Jazzy venv's colcon."""
    ws = make_workspace(tmp_path_factory.mktemp("ws_jazzy"))
    ros2_jazzy.run(["colcon", "build", "--packages-select", "vservo_node"], cwd=ws)
    return ws


@pytest.fixture(params=["kilted", "jazzy"])
def stack(request) -> tuple[Ros2, Path]:
    """(tool venv, built workspace) of each ROS 2 distribution's Python stack."""
    if request.param == "kilted":
        return request.getfixturevalue("ros2"), request.getfixturevalue("workspace")
    return request.getfixturevalue("ros2_jazzy"), request.getfixturevalue("workspace_jazzy")
