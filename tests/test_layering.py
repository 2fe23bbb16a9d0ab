"""The functional core never imports rclpy (DEVELOPERS.md: functional core, thin ROS shell)."""
import ast
from pathlib import Path

PACKAGE = Path(__file__).resolve().parent.parent / "vservo_node"
CORE = ["vision", "control", "sim", "record", "calib", "servo.py", "episode.py", "params.py",
        "perception.py", "yaml_entries.py", "yaml_files.py",
        "interface.py", "paths.py", "settings.py"]


def _imports(path: Path):
    tree = ast.parse(path.read_text(), filename=str(path))
    for node in ast.walk(tree):
        if isinstance(node, ast.Import):
            yield from (alias.name for alias in node.names)
        elif isinstance(node, ast.ImportFrom) and node.module:
            yield node.module


def _core_files():
    for entry in CORE:
        target = PACKAGE / entry
        if target.is_file():
            yield target
        elif target.is_dir():
            yield from sorted(target.rglob("*.py"))


def test_core_imports_no_ros():
    files = list(_core_files())
    assert files, "no core files found: the layout changed, update this test"
    offenders = [f"{path.relative_to(PACKAGE)} imports {name}"
                 for path in files for name in _imports(path)
                 if name.split(".")[0] in {"rclpy", "launch", "launch_ros"}
                 or name.startswith("vservo_node.ros")]
    assert not offenders, "core modules must stay free of ROS:\n" + "\n".join(offenders)


def test_vision_and_control_import_nothing_above_them():
    above = ("vservo_node.sim", "vservo_node.record", "vservo_node.servo", "vservo_node.cli",
             "vservo_node.commands", "vservo_node.ros")
    offenders = [f"{path.relative_to(PACKAGE)} imports {name}"
                 for sub in ("vision", "control")
                 for path in sorted((PACKAGE / sub).rglob("*.py"))
                 for name in _imports(path) if name.startswith(above)]
    assert not offenders, "imports must flow one way:\n" + "\n".join(offenders)
