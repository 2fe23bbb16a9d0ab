"""The start / spin / shut-down sequence shared by the console entry points of our nodes.

``vservo_node``, ``vservo_recorder`` and ``vservo_sim`` all set up the middleware, build one
node, spin it on an executor (single-threaded unless the node needs more) until SIGINT/SIGTERM
or an external shutdown, then stop the node's own work before destroying it and the context.
"""
from __future__ import annotations

import signal
import sys
from collections.abc import Callable
from typing import TypeVar

import rclpy
from rclpy.executors import Executor, ExternalShutdownException, SingleThreadedExecutor
from rclpy.node import Node
from rclpy.signals import SignalHandlerOptions

from vservo_node.ros import dds

N = TypeVar("N", bound=Node)


def _interrupt(signum, frame):
    raise KeyboardInterrupt


def run_node(program: str, make_node: Callable[[], N], stop: Callable[[N], None], args=None, *,
             start_errors: tuple[type[Exception], ...] = (),
             start: Callable[[N], None] | None = None,
             own_signals: bool = False,
             make_executor: Callable[[], Executor] = SingleThreadedExecutor) -> N | None:
    """Build a node with ``make_node``, spin it until shutdown, then clean up.

    ``args`` are the command-line arguments for ``rclpy.init`` (``--ros-args``). An exception in
    ``start_errors`` raised while building the node is reported on stderr as
    ``<program>: cannot start: ...`` and gives None. ``start`` runs once the node is on the
    executor; ``stop`` runs when spinning ends, before the executor and the node are destroyed.
    With ``own_signals`` rclpy installs no signal handlers: SIGINT/SIGTERM raise
    KeyboardInterrupt in the spinning thread instead, so the context outlives them long enough
    for ``stop`` to publish (the controller's final zero twist, the recorder's bag closing).
    ``make_executor`` builds the executor (default single-threaded; the simulated cell takes a
    multi-threaded one so its move services can wait while commands keep arriving).
    Returns the stopped, destroyed node (its attributes stay readable).
    """
    dds.use_shm_profile()
    if own_signals:
        rclpy.init(args=args, signal_handler_options=SignalHandlerOptions.NO)
        signal.signal(signal.SIGINT, _interrupt)
        signal.signal(signal.SIGTERM, _interrupt)
    else:
        rclpy.init(args=args)
    try:
        node = make_node()
    except start_errors as exc:
        print(f"{program}: cannot start: {exc}", file=sys.stderr)
        rclpy.try_shutdown()
        return None
    executor = make_executor()
    executor.add_node(node)
    if start is not None:
        start(node)
    try:
        executor.spin()
    except (KeyboardInterrupt, ExternalShutdownException):
        pass
    finally:
        stop(node)
        executor.shutdown(timeout_sec=1.0)
        node.destroy_node()
        rclpy.try_shutdown()
    return node
