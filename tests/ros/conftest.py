"""Fixtures for tests that start ROS contexts and node processes.

Such tests must run network-isolated (DEVELOPERS.md): `make test`, or
`tools/isolated .venv/bin/python -m pytest tests/ros`. Outside isolation they fail loudly
rather than skip, so an un-isolated run is never mistaken for a passing one.
"""
import pytest
import rclpy

from vservo_node.ros import dds, harness


@pytest.fixture(scope="module")
def ros_node(request):
    """A node in the default rclpy context for the test module, with the same DDS profile the
    node processes get (isolation checked first)."""
    harness.require_isolation()
    dds.use_shm_profile()
    rclpy.init()
    node = rclpy.create_node(f"test_{request.module.__name__.split('.')[-1]}")
    yield node
    node.destroy_node()
    rclpy.shutdown()
