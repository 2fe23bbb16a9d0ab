"""Fixtures of tests/install (ROS 2 tool checks): see ros2_helpers.py for what and why."""
import subprocess
from pathlib import Path

import pytest

from ros2_helpers import ROOT, TOOLS, VENV, Ros2, make_workspace, tools_missing_reason


@pytest.fixture(scope="session")
def ros2(tmp_path_factory) -> Ros2:
    reason = tools_missing_reason()
    if reason:
        pytest.skip(reason)
    if not (VENV / ".installed").is_file():
        subprocess.run(["make", "--no-print-directory", "venv-ros2", f"ROS2_TOOLS={TOOLS}"],
                       cwd=ROOT, check=True)
    return Ros2(VENV, TOOLS, tmp_path_factory.mktemp("ros2"))


@pytest.fixture(scope="session")
def workspace(ros2, tmp_path_factory) -> Path:
    """A workspace built with plain `colcon build` (shared by the launch tests)."""
    ws = make_workspace(tmp_path_factory.mktemp("ws_plain"))
    ros2.run(["colcon", "build", "--packages-select", "vservo_node"], cwd=ws)
    return ws
