"""The control half of a headless episode: what one output tick costs, by part.

Run: taskset -c 0 .venv/bin/python benchmarks/tick_bench.py [--scenario NAME] [--repeats R]

Runs ``run_scenario_episode`` (default tray_offset, 640x480, 125 Hz output, 30 fps camera)
with timers wrapped around the parts the loop calls, and prints for the best of R episodes
(default 3; best = least CPU time) the microseconds per call and per output tick of:
``Servo.command`` (and within it ``Limiter.step``; ``ArmModel.cartesian_jacobians`` is
also called by the meter), ``Servo.observe``, ``SimArm.step`` (the simulated drives, 1 kHz cycles),
``SimArm.state`` (reported joints with noise), ``SimArm.true_state``, ``_Meter.add`` (the
episode's own bookkeeping), and the camera half (``SimCell.render`` + ``Perception.process``)
for comparison. The parts are timed in CPU time of this process (``time.process_time``), so
other processes sharing the core do not count; each timer adds about a microsecond per call.
"""
from __future__ import annotations

import argparse
import os
import time

import cv2

from vservo_node import episode
from vservo_node.control.kinematics import ArmModel
from vservo_node.control.safety import Limiter
from vservo_node.perception import Perception
from vservo_node.servo import Servo
from vservo_node.sim.arm import SimArm
from vservo_node.sim.cell import SimCell

PARTS = (("Servo.command", Servo, "command"), ("  Limiter.step", Limiter, "step"),
         ("  cartesian_jacobians", ArmModel, "cartesian_jacobians"),
         ("Servo.observe", Servo, "observe"),
         ("SimArm.step", SimArm, "step"), ("SimArm.state", SimArm, "state"),
         ("SimArm.true_state", SimArm, "true_state"), ("_Meter.add", episode._Meter, "add"),
         ("SimCell.render", SimCell, "render"), ("Perception.process", Perception, "process"))


def instrument():
    """Wrap every part with a timer; returns {name: [calls, seconds]} (reset between runs)."""
    totals = {}
    for name, cls, attr in PARTS:
        original = getattr(cls, attr, None)
        if original is None:       # an older tree without this part (comparisons)
            continue
        acc = totals[name] = [0, 0.0]

        def timed(*args, _original=original, _acc=acc, **kwargs):
            t0 = time.process_time()
            try:
                return _original(*args, **kwargs)
            finally:
                _acc[0] += 1
                _acc[1] += time.process_time() - t0
        setattr(cls, attr, timed)
    return totals


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--scenario", default="tray_offset")
    parser.add_argument("--repeats", type=int, default=3)
    args = parser.parse_args()
    cv2.setNumThreads(1)
    totals = instrument()
    best = None
    for _ in range(args.repeats):
        for acc in totals.values():
            acc[:] = [0, 0.0]
        t0, c0 = time.perf_counter(), time.process_time()
        result = episode.run_scenario_episode(args.scenario)
        wall, cpu = time.perf_counter() - t0, time.process_time() - c0
        if best is None or cpu < best[1]:
            best = (wall, cpu, result, {k: tuple(v) for k, v in totals.items()})
    wall, cpu, result, parts = best
    ticks = parts["Servo.command"][0]
    print(f"{args.scenario}: {result.time_s:.2f} s simulated in {cpu:.3f} s CPU "
          f"({result.time_s / cpu:.1f}x real time; {wall:.3f} s wall), {ticks} output ticks, "
          f"pid {os.getpid()} on cpus {sorted(os.sched_getaffinity(0))}")
    control = 0.0
    for name in parts:
        calls, seconds = parts[name]
        if not name.startswith(" ") and name not in ("SimCell.render", "Perception.process",
                                                     "Servo.observe"):
            control += seconds
        print(f"   {name:20s} {calls:6d} calls {1e6 * seconds / max(calls, 1):8.1f} us/call "
              f"{1e6 * seconds / ticks:8.1f} us/tick {100 * seconds / cpu:5.1f}% of CPU")
    print(f"   per-tick control work (command, drives, states, meter): {1e6 * control / ticks:.0f}"
          f" us/tick, {100 * control / cpu:.0f}% of the episode's CPU time")


if __name__ == "__main__":
    main()
