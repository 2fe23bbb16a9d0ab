"""Launch files: imported and built where launch_ros exists (a ROS 2 install); here, where it does
not (ROS 2 from PyPI wheels has no launch packages), checked statically: every executable they
start is a console script in setup.py whose target function exists, and every package file they
name is shipped (installed under share/ by setup.py)."""
import ast
import importlib
import importlib.util
import re
from pathlib import Path

import pytest

ROOT = Path(__file__).resolve().parent.parent
LAUNCH_FILES = sorted((ROOT / "launch").glob("*.launch.py"))


def _console_scripts():
    tree = ast.parse((ROOT / "setup.py").read_text())
    scripts = {}
    for node in ast.walk(tree):
        if isinstance(node, ast.Constant) and isinstance(node.value, str) and " = " in node.value \
                and ":" in node.value:
            name, target = (part.strip() for part in node.value.split("=", 1))
            scripts[name] = target
    return scripts


def _string_args(path, keyword):
    tree = ast.parse(path.read_text())
    for node in ast.walk(tree):
        if isinstance(node, ast.Call):
            for kw in node.keywords:
                if kw.arg == keyword and isinstance(kw.value, ast.Constant):
                    yield kw.value.value


def test_there_are_launch_files():
    names = {p.name for p in LAUNCH_FILES}
    assert {"sim_cell.launch.py", "arm.launch.py"} <= names


@pytest.mark.parametrize("path", LAUNCH_FILES, ids=lambda p: p.name)
def test_executables_exist_as_console_scripts(path):
    scripts = _console_scripts()
    executables = set(_string_args(path, "executable"))
    if "managed_controller(" in path.read_text():   # the controller, started by the helper
        executables |= set(_string_args(ROOT / "vservo_node" / "ros" / "launch_support.py",
                                        "executable"))
    assert executables, f"{path.name} starts no node"
    for exe in executables:
        assert exe in scripts, f"{path.name}: executable '{exe}' is not a console script"
        module, func = scripts[exe].split(":")
        assert importlib.util.find_spec(module) is not None, f"{module} missing"
        source = Path(importlib.util.find_spec(module).origin).read_text()
        assert re.search(rf"^def {func}\(", source, re.M), f"{module} has no {func}()"
    for package in _string_args(path, "package"):
        assert package == "vservo_node"


@pytest.mark.parametrize("path", LAUNCH_FILES, ids=lambda p: p.name)
def test_named_config_files_are_shipped(path):
    text = path.read_text()
    named = re.findall(r'os\.path\.join\((?:share, "config"|config), "([^"]+)"\)', text)
    assert named, f"{path.name} names no config file"
    for name in named:
        assert (ROOT / "config" / name).is_file(), f"{path.name}: config/{name} does not exist"
    setup = (ROOT / "setup.py").read_text()
    assert 'data_tree("config")' in setup and 'glob("launch/*.py")' in setup


@pytest.mark.skipif(importlib.util.find_spec("launch_ros") is None,
                    reason="launch_ros not installed (ROS 2 from PyPI wheels); checked statically")
@pytest.mark.parametrize("path", LAUNCH_FILES, ids=lambda p: p.name)
def test_launch_description_builds(path):  # pragma: no cover - needs a ROS 2 install
    spec = importlib.util.spec_from_file_location(path.stem.replace(".", "_"), path)
    module = importlib.util.module_from_spec(spec)
    spec.loader.exec_module(module)
    description = module.generate_launch_description()
    assert description.entities


def test_command_remap_follows_the_selected_interface(tmp_path):
    """arm.launch.py remaps `command:=` onto the topic of the interface the controller will
    use: the launch argument, else the parameter file's value for the node in that namespace
    (a `/**/vservo` key applies in any), else the parameter's default. The graph itself is
    checked in tests/install (ros2 launch)."""
    from vservo_node import interface, params
    from vservo_node.ros.launch_support import COMMAND_TOPICS, command_interface
    path = tmp_path / "arm.yaml"
    path.write_text("/**/vservo:\n  ros__parameters:\n    io: {command_interface: tool_twist}\n"
                    "/cell2/vservo:\n  ros__parameters:\n    io: {command_interface: joint_trajectory}\n")
    assert command_interface(str(path), "") == "tool_twist"
    assert command_interface(str(path), "cell1") == "tool_twist"
    assert command_interface(str(path), "/cell2") == "joint_trajectory"
    assert command_interface(str(path), "cell2", "camera_twist") == "camera_twist"
    assert command_interface(str(tmp_path / "missing.yaml"), "") == \
        params.BY_NAME["io.command_interface"].default
    with pytest.raises(ValueError, match="expected one of"):
        command_interface(str(path), "", "joint_effort")
    assert set(COMMAND_TOPICS) == set(params.BY_NAME["io.command_interface"].choices)
    assert COMMAND_TOPICS["joint_trajectory"] == interface.TOPIC_JOINT_TRAJECTORY_CMD
