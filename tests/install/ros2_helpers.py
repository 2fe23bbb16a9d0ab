"""Helpers of tests/install: the package checked the way a ROS 2 install uses it.

ROS 2's launch, launch_ros and ros2cli are not on the package registries; ../shared/ros2-tools
(beside the repository, as CI lays it out; VSERVO_ROS2_TOOLS overrides) holds them as wheels
with rosdep snapshots and the package.xml schema (its README). Where that folder is absent
every test here is skipped with that reason. Otherwise `make venv-ros2` (called by `make test`,
and by the ``ros2`` fixture of conftest.py when the venv is missing) builds .venv-ros2: the project's
requirements, colcon and rosdep from PyPI, and the Kilted wheels of the folder.

Every tool runs in a scrubbed environment (``Ros2.env``): .venv-ros2's bin first on PATH, the
folder's stubs on PYTHONPATH, no variables of the pytest process's own ROS set-up (its wheel
bootstrap and library path, its DDS profile, any sourced workspace), ROS_HOME in a scratch
folder. Processes that start ROS contexts inherit the network namespace of `make test`
(tools/isolated); those tests refuse to run outside it.
"""
from __future__ import annotations

import os
import shutil
import signal
import subprocess
import time
from dataclasses import dataclass
from pathlib import Path

import pytest

ROOT = Path(__file__).resolve().parents[2]
TOOLS = Path(os.environ.get("VSERVO_ROS2_TOOLS") or ROOT.parent / "shared" / "ros2-tools")
VENV = ROOT / ".venv-ros2"                # Kilted's stack: the project's pinned wheels
VENV_JAZZY = ROOT / ".venv-ros2-jazzy"    # Jazzy's: ros-jazzy-rclpy 7.1.6, Fast DDS 2.14
# Variables of the calling process's own ROS set-up that must not leak into the tools.
SCRUBBED = ("_ROS_WHEELS_BOOTSTRAP_COMPLETE", "LD_LIBRARY_PATH", "PYTHONPATH", "PYTHONHOME",
            "VIRTUAL_ENV", "AMENT_PREFIX_PATH", "COLCON_PREFIX_PATH", "CMAKE_PREFIX_PATH",
            "ROS_DISTRO", "ROS_VERSION", "ROS_PYTHON_VERSION",
            "FASTDDS_DEFAULT_PROFILES_FILE", "FASTRTPS_DEFAULT_PROFILES_FILE")


def tools_missing_reason(distro: str = "kilted") -> str | None:
    if not (TOOLS / "wheels" / distro).is_dir():
        return (f"ROS 2 tool wheels not found at {TOOLS} (../shared/ros2-tools beside the "
                "repository, or VSERVO_ROS2_TOOLS): colcon/rosdep/ros2 launch checks skipped")
    return None


@dataclass
class Ros2:
    """The tool venv and a scratch folder; runs commands the way a ROS 2 user would."""
    venv: Path
    tools: Path
    scratch: Path

    def env(self, **extra: str) -> dict[str, str]:
        env = {k: v for k, v in os.environ.items() if k not in SCRUBBED}
        env["PATH"] = f"{self.venv / 'bin'}{os.pathsep}{env.get('PATH', '')}"
        env["PYTHONPATH"] = str(self.tools / "stubs")
        env["PYTHONUNBUFFERED"] = "1"
        env["ROS_HOME"] = str(self.scratch / "ros_home")
        env.update(extra)
        return env

    @staticmethod
    def sourced(workspace: Path, *command: str) -> list[str]:
        """``command`` run after ``source <workspace>/install/setup.bash``, as a user runs it."""
        return ["bash", "-c", 'source "$0/install/setup.bash" && exec "$@"', str(workspace),
                *command]

    def run(self, command, cwd=None, timeout=300.0, check=True, **env) -> subprocess.CompletedProcess:
        proc = subprocess.run(list(command), cwd=cwd, env=self.env(**env), capture_output=True,
                              text=True, timeout=timeout)
        if check and proc.returncode != 0:
            raise AssertionError(f"{' '.join(map(str, command))} exited {proc.returncode}\n"
                                 f"--- stdout\n{proc.stdout[-4000:]}\n--- stderr\n"
                                 f"{proc.stderr[-4000:]}")
        return proc

    def python(self) -> str:
        return str(self.venv / "bin" / "python")


def make_workspace(folder: Path) -> Path:
    """A colcon workspace with this checkout's files (tracked and new, not ignored) as
    src/vservo_node, as a user's clone would be."""
    src = folder / "src" / "vservo_node"
    src.mkdir(parents=True)
    listing = subprocess.run(["git", "ls-files", "-co", "--exclude-standard", "-z"], cwd=ROOT,
                             capture_output=True, check=True).stdout.decode()
    for rel in filter(None, listing.split("\0")):
        source = ROOT / rel
        if source.is_file():
            target = src / rel
            target.parent.mkdir(parents=True, exist_ok=True)
            shutil.copy2(source, target)
    return folder


def require_isolation():
    if os.environ.get("VSERVO_ISOLATION") not in ("netns", "localhost"):
        pytest.fail("ROS processes must run network-isolated: run through tools/isolated "
                    "(make test / make test-install)")


class Launch:
    """`ros2 launch ...` in a session of its own (setsid), so that a group SIGINT stops it the
    way Ctrl-C in a terminal does; output captured to a file."""

    def __init__(self, ros2: Ros2, workspace: Path, args: list[str], log: Path, **env: str):
        require_isolation()
        self.log = log
        self._out = open(log, "w")
        self.popen = subprocess.Popen(
            Ros2.sourced(workspace, "ros2", "launch", "vservo_node", *args),
            env=ros2.env(**env), stdout=self._out, stderr=subprocess.STDOUT,
            start_new_session=True)

    def output(self) -> str:
        return self.log.read_text()

    def wait_for(self, text: str, timeout: float) -> None:
        """Wait until ``text`` appears in the launch's output (TimeoutError with the output)."""
        end = time.monotonic() + timeout
        while text not in self.output():
            if self.popen.poll() is not None or time.monotonic() > end:
                raise TimeoutError(f"{text!r} not in the launch output after {timeout} s "
                                   f"(exit code {self.popen.poll()}):\n{self.output()[-6000:]}")
            time.sleep(0.2)

    def interrupt(self, timeout: float = 60.0) -> int:
        """SIGINT to the whole process group, then wait; returns the launch's exit code."""
        try:
            os.killpg(self.popen.pid, signal.SIGINT)
        except ProcessLookupError:
            pass
        try:
            return self.popen.wait(timeout)
        finally:
            self.kill()

    def kill(self) -> None:
        """Make sure nothing of this launch is left (SIGKILL to the group)."""
        try:
            os.killpg(self.popen.pid, signal.SIGKILL)
        except ProcessLookupError:
            pass
        if self.popen.poll() is None:
            self.popen.wait(10)
        self._out.close()


def probe(ros2: Ros2, node: str, *, params=(), publishes=(), subscribes=(), message=None,
          state=None, timeout=90.0) -> dict:
    """tests/install/graph_probe.py against a running node (from the tool venv)."""
    import json
    command = [ros2.python(), str(Path(__file__).with_name("graph_probe.py")), node,
               "--timeout", str(timeout)]
    if params:
        command += ["--params", *params]
    if publishes:
        command += ["--publishes", *publishes]
    if subscribes:
        command += ["--subscribes", *subscribes]
    if message:
        command += ["--message", message]
    if state:
        command += ["--state", state]
    proc = ros2.run(command, timeout=timeout + 30)
    return json.loads(proc.stdout.strip().splitlines()[-1])
