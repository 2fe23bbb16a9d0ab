"""A steady-clock periodic loop on its own thread: the controller's output tick.

Why not an rclpy timer: the executor that runs timers also runs every subscription callback
(joint states at 250 Hz or more, frames, parameters, services), one at a time, so a timer
waits behind whatever is queued. Under the 10-minute soak (three node processes on two cores)
4.1 % of the output periods came more than one period late with the timer on the
single-threaded executor. This loop sleeps to absolute deadlines (start + k * period) on
``time.monotonic`` and only competes with the other threads for the interpreter lock.

An overrun does not queue ticks up: when a tick ends after the next deadline, the missed
deadlines are skipped (counted) and the loop waits for the next one in the future, so a stall
never turns into a burst of commands. No rclpy here: the callback does the publishing.
"""
from __future__ import annotations

import collections
import math
import os
import threading
import time
from typing import Callable


# Timing trace for diagnosis (DEVELOPERS.md, "Timing"): with VSERVO_TICK_TRACE=<prefix> set,
# every tick's (deadline, start, end, thread CPU s) is kept (the last ~1 h at 125 Hz) and
# saved at exit to <prefix>.<pid>.npy.
_TRACE = os.environ.get("VSERVO_TICK_TRACE", "")
_TRACE_ROWS: collections.deque[tuple[float, float, float, float]] = collections.deque(
    maxlen=450_000)
if _TRACE:
    import atexit

    def _dump() -> None:
        import numpy as np
        if _TRACE_ROWS:
            np.save(f"{_TRACE}.{os.getpid()}.npy", np.array(_TRACE_ROWS))
    atexit.register(_dump)


def lower_thread_priority(steps: int) -> bool:
    """Lower the calling thread's scheduling priority by ``steps`` nice steps (Linux: nice is
    per thread; raising it needs no privilege). True when done; False where the platform has
    no per-thread nice (the thread then runs at the process's priority, as before)."""
    try:
        tid = threading.get_native_id()
        now = os.getpriority(os.PRIO_PROCESS, tid)
        os.setpriority(os.PRIO_PROCESS, tid, min(19, now + int(steps)))
        return True
    except (AttributeError, OSError):
        return False


class OutputLoop:
    """Call ``tick()`` every ``period_s`` seconds of the steady clock on a daemon thread until
    ``stop()``. ``tick`` must not raise (the controller's does not); if it does anyway, the
    exception is handed to ``on_error`` and the loop goes on."""

    def __init__(self, period_s: float, tick: Callable[[], None],
                 on_error: Callable[[BaseException], None] | None = None,
                 name: str = "output", clock: Callable[[], float] = time.monotonic,
                 wait: Callable[[float], bool] | None = None) -> None:
        if not (math.isfinite(period_s) and period_s > 0.0):
            raise ValueError(f"output period must be a positive number of seconds, got {period_s}")
        self.period_s = float(period_s)
        self._tick = tick
        self._on_error = on_error
        self._stop = threading.Event()
        self._clock = clock                               # injectable for tests
        self._wait = wait if wait is not None else self._stop.wait
        self._thread = threading.Thread(target=self._run, name=name, daemon=True)
        self.skipped = 0          # deadlines skipped because a tick overran

    def start(self) -> None:
        self._thread.start()

    def run_here(self) -> None:
        """Run the loop on the calling thread until stopped (tests with an injected clock)."""
        self._run()

    @property
    def running(self) -> bool:
        return self._thread.is_alive()

    def stop(self, timeout_s: float = 2.0) -> bool:
        """Ask the loop to end and wait (bounded) until its current tick finished; True when
        the thread has ended (so no tick runs after this returns True)."""
        self._stop.set()
        if self._thread.is_alive() and threading.current_thread() is not self._thread:
            self._thread.join(timeout=timeout_s)
        return not self._thread.is_alive()

    def _run(self) -> None:
        period = self.period_s
        next_deadline = self._clock() + period
        while not self._stop.is_set():
            delay = next_deadline - self._clock()
            if delay > 0.0 and self._wait(delay):
                return
            start, cpu0 = self._clock(), time.thread_time()
            try:
                self._tick()
            except BaseException as exc:  # noqa: BLE001 - the loop must outlive a bad tick
                if self._on_error is not None:
                    try:
                        self._on_error(exc)
                    except Exception:  # noqa: BLE001, S110 - nothing left to report to
                        pass
            now = self._clock()
            if _TRACE:
                _TRACE_ROWS.append((next_deadline, start, now, time.thread_time() - cpu0))
            next_deadline += period
            if now >= next_deadline:   # overran: skip the missed deadlines, never burst
                missed = int((now - next_deadline) // period) + 1
                self.skipped += missed
                next_deadline += missed * period
