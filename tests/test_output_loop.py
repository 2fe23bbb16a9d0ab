"""The controller's output loop (vservo_node/ros/output_loop.py): ticks on absolute deadlines,
skips deadlines a slow tick overran instead of bursting commands, survives a raising tick and
stops promptly. A fake clock makes it deterministic (no timing in the assertions)."""
import threading

import pytest

from vservo_node.ros.output_loop import OutputLoop


class FakeTime:
    def __init__(self):
        self.t = 100.0
        self.stop_after = None

    def clock(self):
        return self.t

    def wait(self, delay):
        self.t += delay
        return False


def run(period, ticks_wanted, tick_cost=lambda k: 0.0, raise_at=()):
    fake = FakeTime()
    stamps, errors = [], []
    loop = None

    def tick():
        k = len(stamps)
        stamps.append(fake.t)
        fake.t += tick_cost(k)
        if len(stamps) >= ticks_wanted:
            loop._stop.set()
        if k in raise_at:
            raise RuntimeError(f"tick {k}")

    loop = OutputLoop(period, tick, on_error=errors.append, clock=fake.clock, wait=fake.wait)
    loop.run_here()
    return stamps, errors, loop


def test_ticks_on_absolute_deadlines_without_drift():
    # a tick that costs 30 % of the period must not shift later deadlines (absolute schedule)
    stamps, _, loop = run(0.008, 50, tick_cost=lambda k: 0.3 * 0.008)
    assert stamps == pytest.approx([100.0 + 0.008 * (k + 1) for k in range(50)], abs=1e-9)
    assert loop.skipped == 0


def test_an_overrun_skips_deadlines_instead_of_bursting():
    # tick 5 takes 3.5 periods: the next tick comes at the next deadline in the future, and no
    # two ticks are ever closer than one period (a stall never turns into a burst of commands)
    period = 0.01
    stamps, _, loop = run(period, 20, tick_cost=lambda k: 3.5 * period if k == 5 else 0.0)
    gaps = [b - a for a, b in zip(stamps, stamps[1:])]
    assert min(gaps) >= period - 1e-12
    assert gaps[5] == pytest.approx(4 * period)
    assert loop.skipped == 3


def test_a_raising_tick_is_reported_and_the_loop_goes_on():
    stamps, errors, _ = run(0.01, 10, raise_at=(2, 3))
    assert len(stamps) == 10
    assert [str(e) for e in errors] == ["tick 2", "tick 3"]


def test_stop_ends_the_thread_and_no_tick_runs_after():
    ran = threading.Event()
    count = [0]

    def tick():
        count[0] += 1
        ran.set()

    loop = OutputLoop(0.002, tick)
    loop.start()
    assert ran.wait(5.0)
    assert loop.stop(timeout_s=5.0)
    after = count[0]
    assert not loop.running
    threading.Event().wait(0.02)
    assert count[0] == after


@pytest.mark.parametrize("period", [0.0, -1.0, float("nan"), float("inf")])
def test_refuses_a_period_that_is_not_a_positive_number(period):
    with pytest.raises(ValueError, match="positive"):
        OutputLoop(period, lambda: None)


def test_lower_thread_priority_lowers_only_the_calling_thread():
    import os
    import sys
    from vservo_node.ros.output_loop import lower_thread_priority

    if not sys.platform.startswith("linux"):
        pytest.skip("per-thread nice values are a Linux feature")
    seen = {}

    def worker():
        tid = threading.get_native_id()
        before = os.getpriority(os.PRIO_PROCESS, tid)
        seen["done"] = lower_thread_priority(3)
        seen["delta"] = os.getpriority(os.PRIO_PROCESS, tid) - before

    main_before = os.getpriority(os.PRIO_PROCESS, threading.get_native_id())
    t = threading.Thread(target=worker)
    t.start()
    t.join()
    assert seen["done"] is True
    assert seen["delta"] == min(3, 19 - (main_before))   # capped at nice 19
    assert os.getpriority(os.PRIO_PROCESS, threading.get_native_id()) == main_before
