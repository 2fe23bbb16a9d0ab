"""Headless scenario episodes: speed against real time, and the wall time of a sweep.

Run: .venv/bin/python benchmarks/episode_bench.py [--episodes N] [--workers W] [--scale S]
    [--sensing image|projected|both]

1. One core (this process pinned to one CPU, one OpenCV thread): ``run_scenario_episode`` at
   640x480 on tray_offset and on tray_twist (envelope raised to 180 deg so it runs to the end),
   simulated seconds per wall second, best of 3. Beside it the camera half of one frame
   (render, rgb8 -> BGR, Perception.process) along the path from start to taught pose, and the
   share of the episode it explains; the rest is servo, drives and bookkeeping at 125 Hz.
   The same episodes with projected sensing (sim/projected.py: no images, no detection).
2. A sweep of N episodes (default 200: the ranges and settings of config/sweeps/quick.yaml,
   drawn N times, images at ``--scale`` of 640x480, default the quick file's 0.5) on W local
   worker processes (default 2): wall time.
Goals (from the project brief): >= 50x real time at 640x480 on one core; 200 episodes <= 60 s
on 2 cores.
"""
from __future__ import annotations

import argparse
import dataclasses
import os
import time

import cv2
import numpy as np

from vservo_node.episode import run_scenario_episode
from vservo_node.perception import Perception
from vservo_node.record.sweep import load_sweep, run_sweep
from vservo_node.sim import SimCell, load_scenario
from vservo_node.vision import image_io

CASES = (("tray_offset", None), ("tray_twist", {"limits.max_rotation_deg": 180.0}))


def episode_speed(name, overrides, repeats=3, sensing="image"):
    """(simulated s, best wall s) of one scenario episode."""
    walls = []
    for _ in range(repeats):
        t0 = time.perf_counter()
        r = run_scenario_episode(name, overrides, sensing=sensing)
        walls.append(time.perf_counter() - t0)
    assert r.converged, f"{name}: {r.reason}"
    return r.time_s, min(walls)


def camera_ms_per_frame(name, frames=90):
    """Render + convert + perceive one 640x480 frame, ms (median), along start -> taught."""
    scenario = load_scenario(name)
    cell = SimCell(scenario)
    w, h = scenario.camera.width, scenario.camera.height
    to_bgr = lambda rgb: image_io.to_bgr_or_mono(rgb, "rgb8", w, h)  # noqa: E731
    perception = Perception(scenario.target, scenario.camera)
    perception.set_reference(perception.capture(to_bgr(cell.render_at(scenario.q_taught, -1.0)),
                                                "bench"))
    path = np.linspace(scenario.q_start, scenario.q_taught, frames)
    times = []
    for k, q in enumerate(path):
        t0 = time.perf_counter()
        obs, _ = perception.process(to_bgr(cell.render_at(q, k / scenario.fps)), k / scenario.fps)
        times.append(time.perf_counter() - t0)
        assert obs is not None
    return 1e3 * float(np.median(times)), scenario.fps


def one_core() -> None:
    print("1. one core, 640x480, 30 fps camera, 125 Hz output:")
    for name, overrides in CASES:
        sim_s, wall_s = episode_speed(name, overrides)
        ms, fps = camera_ms_per_frame(name)
        camera_share = ms * 1e-3 * fps * sim_s / wall_s
        print(f"   {name:12s} {sim_s:5.2f} s simulated in {wall_s:5.2f} s wall: "
              f"{sim_s / wall_s:5.1f}x real time (goal >= 50x); camera half {ms:4.2f} ms/frame "
              f"= {100 * camera_share:3.0f}% of the wall time")
    for name, overrides in CASES:
        sim_s, wall_s = episode_speed(name, overrides, sensing="projected")
        print(f"   {name:12s} {sim_s:5.2f} s simulated in {wall_s:5.2f} s wall: "
              f"{sim_s / wall_s:5.1f}x real time with projected sensing (no images)")


def sweep_time(episodes: int, workers: int, scale: float, sensing: str) -> None:
    quick = load_sweep("quick")
    spec = dataclasses.replace(quick, episodes=episodes, sensing=sensing,
                               fixed={**quick.fixed, "image.scale": scale}, name="bench")
    run = run_sweep(spec, workers=workers, progress=False)
    s = run.summary
    size = f"{round(640 * scale)}x{round(480 * scale)}"
    simulated = sum(r["time_s"] for r in run.rows if r["time_s"] is not None)
    print(f"2. sweep of {episodes} episodes (quick ranges, {size}, {sensing} sensing) on "
          f"{workers} processes: "
          f"{run.wall_s:.1f} s wall (goal <= 60 s for 200 on 2), {simulated:.0f} s simulated, "
          f"{s['successes']}/{s['ran']} succeeded, {s['errors']} errors")


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--episodes", type=int, default=200)
    parser.add_argument("--workers", type=int, default=2)
    parser.add_argument("--scale", type=float, default=load_sweep("quick").fixed["image.scale"])
    parser.add_argument("--sensing", choices=("image", "projected", "both"), default="both",
                        help="sensing of the sweep's episodes (default: both, one after the other)")
    args = parser.parse_args()
    cpus = os.sched_getaffinity(0)
    cv2.setNumThreads(1)
    os.sched_setaffinity(0, {min(cpus)})
    try:
        one_core()
    finally:
        os.sched_setaffinity(0, cpus)      # the sweep's workers get every core again
    for sensing in (("image", "projected") if args.sensing == "both" else (args.sensing,)):
        sweep_time(args.episodes, args.workers, args.scale, sensing)


if __name__ == "__main__":
    main()
