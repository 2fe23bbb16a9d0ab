"""Fixtures of the end-to-end tests: one simulated cell (vservo_sim + vservo_node processes)
per test module, restarted only when a test needs another configuration.

Network-isolated like tests/ros (DEVELOPERS.md): run
`cd /work/main && tools/isolated .venv/bin/python -m pytest tests/e2e -q` (add -s for the
figures). Outside isolation the fixtures fail loudly rather than skip.
"""
import pytest
import rclpy

from e2e_helpers import Cell
from vservo_node.ros import dds, harness


@pytest.fixture(scope="module")
def cell(tmp_path_factory):
    """The module's Cell (call ``cell.use(spec)`` first); stopped after the module."""
    harness.require_isolation()
    dds.use_shm_profile()
    rclpy.init()
    c = Cell(tmp_path_factory.mktemp("e2e"))
    try:
        yield c
    finally:
        c.close()
        rclpy.shutdown()


@pytest.fixture(scope="module")
def figures():
    """Lines of measured figures, printed at the end of the module (visible with -s)."""
    lines: list[str] = []
    yield lines
    print("\n" + "\n".join(lines))
