"""The start / spin / shut-down sequence shared by the console entry points of our nodes.

``vservo_node``, ``vservo_recorder`` and ``vservo_sim`` all set up the middleware, build one
node, spin it on an executor (single-threaded unless the node needs more) until SIGINT/SIGTERM
or an external shutdown, then stop the node's own work before destroying it and the context.

Signals (``own_signals``): a terminal Ctrl-C reaches every process of the group, and
``ros2 launch`` then signals its children again (SIGINT, then SIGTERM after its grace period).
So the first SIGINT or SIGTERM only *asks* for a stop, and every further one is counted and
ignored while stopping: the node keeps spinning through its ``finish`` phase (the controller
brakes a moving run and publishes its explicit zero) for at most ``finish_timeout_s``, then
``stop`` runs, and the process exits 0 with no traceback.
"""
from __future__ import annotations

import gc
import os
import signal
import sys
import time
from collections.abc import Callable
from typing import TypeVar

import rclpy
from rclpy.executors import Executor, ExternalShutdownException, SingleThreadedExecutor
from rclpy.node import Node
from rclpy.signals import SignalHandlerOptions

from vservo_node.ros import dds

N = TypeVar("N", bound=Node)

#: Signals received by this process (while stopping, they are only counted).
SIGNALS: list[int] = []


#: Environment switch back to rclpy's classic executor (``VSERVO_EXECUTOR=single``).
EXECUTOR_ENV = "VSERVO_EXECUTOR"


def default_executor() -> Executor:
    """The executor our single-threaded nodes spin on: rclpy's events executor where this
    rclpy has it (``rclpy.experimental.EventsExecutor``, in both the Jazzy and the Kilted
    wheels), else ``SingleThreadedExecutor``; ``VSERVO_EXECUTOR=single`` forces the latter.

    Why: the classic executor rebuilds a wait set and walks every entity in Python for each
    message. Measured with the three node processes and the soak driver on this 2-core
    machine (tools/soak.py, per-thread CPU from /proc): the controller's executor thread took
    32 % of a core with the classic executor and 9 % with this one, the recorder's 32 % and
    7 %; the controller's late output periods in the README's Reliability section.
    """
    if os.environ.get(EXECUTOR_ENV, "").strip().lower() != "single":
        try:
            from rclpy.experimental import EventsExecutor
        except ImportError:   # an rclpy without it: the classic executor
            pass
        else:
            return EventsExecutor()
    return SingleThreadedExecutor()


def _on_signal(signum, frame) -> None:
    SIGNALS.append(signum)


def install_signal_handlers() -> None:
    """SIGINT and SIGTERM only ask for a stop (see the module docstring); call as early as
    possible in ``main`` so that no signal can raise KeyboardInterrupt mid-start."""
    signal.signal(signal.SIGINT, _on_signal)
    signal.signal(signal.SIGTERM, _on_signal)


def run_node(program: str, make_node: Callable[[], N], stop: Callable[[N], None], args=None, *,
             start_errors: tuple[type[Exception], ...] = (),
             start: Callable[[N], None] | None = None,
             own_signals: bool = False,
             finish: Callable[[N], bool] | None = None,
             finish_timeout_s: float = 3.0,
             make_executor: Callable[[], Executor] = default_executor) -> N | None:
    """Build a node with ``make_node``, spin it until shutdown, then clean up.

    ``args`` are the command-line arguments for ``rclpy.init`` (``--ros-args``). An exception in
    ``start_errors`` raised while building the node is reported on stderr as
    ``<program>: cannot start: ...`` and gives None. ``start`` runs once the node is on the
    executor. When a stop is asked for, ``finish(node)`` is called and the node keeps spinning
    until ``finish(node)`` returns True or ``finish_timeout_s`` passes (the controller brakes
    there); then ``stop`` runs, before the executor and the node are destroyed.
    With ``own_signals`` rclpy installs no signal handlers and SIGINT/SIGTERM are handled as
    the module docstring says. ``make_executor`` builds the executor (``default_executor``;
    the simulated cell takes a multi-threaded one so its move services can wait while commands
    keep arriving). Returns the stopped, destroyed node (its attributes stay readable).
    """
    if own_signals:
        install_signal_handlers()
    dds.use_shm_profile()
    if own_signals:
        rclpy.init(args=args, signal_handler_options=SignalHandlerOptions.NO)
    else:
        rclpy.init(args=args)
    try:
        node = make_node()
    except start_errors as exc:
        print(f"{program}: cannot start: {exc}", file=sys.stderr)
        rclpy.try_shutdown()
        return None
    # Everything built so far (imports, models, the node) lives as long as the process: move it
    # out of the collector's reach, so full collections scan only what the work creates
    # (Python documentation, gc.freeze). Measured with gc callbacks over 2- and 5-minute soaks: the
    # simulated cell's full collections took 36-52 ms before, 0-36 ms after.
    gc.collect()
    gc.freeze()
    executor = make_executor()
    executor.add_node(node)
    if start is not None:
        start(node)
    try:
        while not SIGNALS and rclpy.ok():
            executor.spin_once(timeout_sec=0.1)
        if finish is not None and rclpy.ok():
            deadline = time.monotonic() + finish_timeout_s
            while not finish(node) and time.monotonic() < deadline and rclpy.ok():
                executor.spin_once(timeout_sec=0.01)
    except (KeyboardInterrupt, ExternalShutdownException):
        pass
    finally:
        stop(node)
        executor.shutdown(timeout_sec=1.0)
        node.destroy_node()
        # with our own handlers, rclpy must not "restore" any: Jazzy's rclpy put Python's
        # default SIGINT handler back here, and launch's second SIGINT then ended the
        # simulated cell with a KeyboardInterrupt (exit -2)
        try:
            rclpy.try_shutdown(uninstall_handlers=not own_signals)
        except TypeError:         # an rclpy without the argument: shut down
            rclpy.try_shutdown()
        if own_signals:
            # stopped: a late signal (a second Ctrl-C under ros2 launch) must not kill the
            # interpreter while it finalizes (Python resets a handler of its own to SIG_DFL
            # there: exit -2, reproduced with a second SIGINT 0.1-0.2 s after the first)
            signal.signal(signal.SIGINT, signal.SIG_IGN)
            signal.signal(signal.SIGTERM, signal.SIG_IGN)
    return node
