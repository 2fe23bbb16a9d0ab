"""Which executor the nodes spin on (node_main.default_executor)."""
import pytest

pytest.importorskip("rclpy")

import rclpy  # noqa: E402
from rclpy.executors import SingleThreadedExecutor  # noqa: E402

from vservo_node.ros import node_main  # noqa: E402


@pytest.fixture
def context():
    rclpy.init()
    yield
    rclpy.try_shutdown()


def test_events_executor_by_default_where_rclpy_has_it(context, monkeypatch):
    monkeypatch.delenv(node_main.EXECUTOR_ENV, raising=False)
    executor = node_main.default_executor()     # both wheel stacks ship the events executor
    try:
        assert not isinstance(executor, SingleThreadedExecutor)
        assert type(executor).__name__ == "EventsExecutor"
    finally:
        executor.shutdown()


@pytest.mark.parametrize("value", ["single", " SINGLE "])
def test_environment_switches_back_to_the_classic_executor(context, monkeypatch, value):
    monkeypatch.setenv(node_main.EXECUTOR_ENV, value)
    executor = node_main.default_executor()
    try:
        assert isinstance(executor, SingleThreadedExecutor)
    finally:
        executor.shutdown()
