"""Start nodes as child processes and wait on the ROS graph: for tests, benchmarks and
``vservo demo``.

Children run the same interpreter (same venv) and inherit this process's environment, so a
parent started through ``tools/isolated`` keeps its children in the same network namespace and
ROS domain. Their stdout and stderr go to a temporary file that failure messages quote.
"""
from __future__ import annotations

import os
import signal
import subprocess
import sys
import tempfile
import time
from collections.abc import Callable, Iterable
from pathlib import Path

import rclpy
from rclpy.node import Node
from rclpy.qos import QoSProfile

from vservo_node.ros.dds import use_shm_profile

STDERR_TAIL_CHARS = 4000


class ProcessFailed(RuntimeError):
    """A child process died or could not be stopped; the message quotes its output."""


def require_isolation() -> str:
    """Raise unless running under tools/isolated; returns the isolation kind.

    Starting a ROS context outside it could send DDS traffic off this machine (DEVELOPERS.md).
    """
    kind = os.environ.get("VSERVO_ISOLATION")
    if not kind:
        raise RuntimeError("not network-isolated: run this through tools/isolated "
                           "(e.g. `tools/isolated .venv/bin/python -m pytest tests/ros` or "
                           "`make test`); ROS contexts must not start un-isolated")
    return kind


def child_environment(extra: dict[str, str] | None = None) -> dict[str, str]:
    """This process's environment plus the shared-memory DDS profile (unless the user chose
    one), unbuffered Python output, and ``extra``."""
    env = dict(os.environ)
    use_shm_profile(env)
    env["PYTHONUNBUFFERED"] = "1"
    env.update(extra or {})
    return env


class NodeProcess:
    """A child process running ``command``; stdout and stderr captured to a file."""

    def __init__(self, command: list[str], name: str, env: dict[str, str] | None = None):
        self.name = name
        self.command = list(command)
        self._log = tempfile.NamedTemporaryFile(prefix=f"{self.name.replace('/', '_')}-",
                                                suffix=".log", delete=False)
        self.log_path = Path(self._log.name)
        self.popen = subprocess.Popen(self.command, stdout=self._log, stderr=subprocess.STDOUT,
                                      stdin=subprocess.DEVNULL, env=env or child_environment())

    def alive(self) -> bool:
        return self.popen.poll() is None

    def output(self) -> str:
        """Everything the process printed so far (stdout and stderr)."""
        return self.log_path.read_text(errors="replace")

    def describe(self) -> str:
        """A failure message: command, exit state and the tail of the output."""
        code = self.popen.poll()
        state = "running" if code is None else f"exited with {code}"
        tail = self.output()[-STDERR_TAIL_CHARS:]
        return f"{self.name} ({' '.join(self.command)}) {state}; output:\n{tail}"

    def check_alive(self) -> None:
        if not self.alive():
            raise ProcessFailed(self.describe())

    def stop(self, timeout: float = 5.0) -> int:
        """SIGINT (a clean rclpy shutdown), then SIGKILL after ``timeout`` s; returns the exit
        code. The output file stays for ``output()``."""
        if self.alive():
            self.popen.send_signal(signal.SIGINT)
            try:
                self.popen.wait(timeout)
            except subprocess.TimeoutExpired:
                self.popen.kill()
                self.popen.wait()
        self._log.close()
        return self.popen.returncode

    def remove_log(self) -> None:
        self.log_path.unlink(missing_ok=True)


def start_module(module: str, args: Iterable[str] = (), ros_args: Iterable[str] = (),
                 env: dict[str, str] | None = None, name: str | None = None) -> NodeProcess:
    """Start ``python -m module args [--ros-args ros_args]`` as a child (see NodeProcess)."""
    args, ros_args = list(args), list(ros_args)
    if ros_args:
        args += ["--ros-args", *ros_args]
    return NodeProcess([sys.executable, "-m", module, *args], name or module, env)


def _wait(condition: Callable[[], bool], timeout: float, what: str,
          processes: Iterable[NodeProcess], step: Callable[[], None]) -> None:
    processes = list(processes)
    deadline = time.monotonic() + timeout
    while not condition():
        for proc in processes:
            proc.check_alive()
        if time.monotonic() > deadline:
            details = "".join("\n" + p.describe() for p in processes)
            raise TimeoutError(f"timed out after {timeout:.1f} s waiting for {what}{details}")
        step()


def wait_until(condition: Callable[[], bool], timeout: float, what: str,
               processes: Iterable[NodeProcess] = ()) -> None:
    """Poll ``condition()`` every 20 ms; TimeoutError naming ``what`` after ``timeout`` s,
    ProcessFailed as soon as one of ``processes`` dies."""
    _wait(condition, timeout, what, processes, lambda: time.sleep(0.02))


def wait_for_publisher(node: Node, topic: str, timeout: float = 10.0,
                       processes: Iterable[NodeProcess] = ()) -> None:
    """Wait until ``topic`` (resolved in ``node``'s namespace) has a publisher (as
    ``wait_until``)."""
    wait_until(lambda: node.count_publishers(topic) > 0, timeout, f"a publisher on {topic}",
               processes)


def wait_for_subscriber(node: Node, topic: str, timeout: float = 10.0,
                        processes: Iterable[NodeProcess] = ()) -> None:
    """Wait until ``topic`` has a subscriber (as ``wait_until``)."""
    wait_until(lambda: node.count_subscribers(topic) > 0, timeout, f"a subscriber on {topic}",
               processes)


def spin_until(node: Node, condition: Callable[[], bool], timeout: float, what: str,
               processes: Iterable[NodeProcess] = (), executor=None) -> None:
    """Spin ``node`` (or ``executor``) until ``condition()`` holds; TimeoutError naming
    ``what`` otherwise, ProcessFailed as soon as one of ``processes`` dies."""
    def step():
        if executor is None:
            rclpy.spin_once(node, timeout_sec=0.02)
        else:
            executor.spin_once(timeout_sec=0.02)
    _wait(condition, timeout, what, processes, step)


def wait_for_message(node: Node, topic: str, msg_type, qos: QoSProfile, timeout: float = 10.0,
                     predicate: Callable[[object], bool] | None = None,
                     processes: Iterable[NodeProcess] = ()):
    """The first message on ``topic`` (for which ``predicate`` holds, if given). Spins
    ``node`` through rclpy.spin_once; a temporary subscription is removed afterwards."""
    got = []

    def keep(msg):
        if not got and (predicate is None or predicate(msg)):
            got.append(msg)

    sub = node.create_subscription(msg_type, topic, keep, qos)
    try:
        spin_until(node, lambda: bool(got), timeout, f"a message on {topic}", processes)
    finally:
        node.destroy_subscription(sub)
    return got[0]


# After a service shows ready, the server may not yet have matched the client's *response*
# reader: a request sent at once can be answered into the void (seen here as a rare 10 s
# timeout on a loaded machine). Waiting this long after readiness lets discovery finish.
DISCOVERY_SETTLE_S = 0.3


def ready_client(node: Node, srv_type, name: str, timeout: float = 20.0,
                 processes: Iterable[NodeProcess] = ()):
    """A service client of ``node`` whose service is ready and discovered both ways."""
    client = node.create_client(srv_type, name)
    spin_until(node, client.service_is_ready, timeout, f"service {name}", processes)
    settle = time.monotonic() + DISCOVERY_SETTLE_S
    spin_until(node, lambda: time.monotonic() >= settle, DISCOVERY_SETTLE_S + 1.0,
               f"discovery of service {name}", processes)
    return client


def call_service(node: Node, client, request, timeout: float = 10.0,
                 processes: Iterable[NodeProcess] = ()):
    """Call ``client`` (from :func:`ready_client`) and spin ``node`` until the reply."""
    future = client.call_async(request)
    spin_until(node, future.done, timeout, f"a response from {client.srv_name}", processes)
    return future.result()
