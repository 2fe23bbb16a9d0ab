"""How accurate the stop is: headless episodes of the shipped scenarios with the shipped
controller parameters (config/vservo_sim.yaml states 0.5 mm / 0.1 deg), the true final pose
error (the simulator's ground truth) beside the servo's own estimate (mean over the dwell, its
single-frame spread) and the time to converge.

Run: .venv/bin/python benchmarks/arrival_accuracy.py [--seeds N] [--sensing image|projected]
     [--noise-px SIGMA] [--scenario NAME ...] [--set NAME=VALUE ...]

Projected sensing by default (the detectors' measured jitter, seeded per run; ~10x faster than
rendering and perceiving the images). --set overrides controller parameters, e.g.
--set control.tolerance_px=0.1 --set control.tolerance_mm=0 --set control.tolerance_deg=0
for the pixel-only stop.
"""
from __future__ import annotations

import argparse
import time

import numpy as np
import yaml

from vservo_node import paths
from vservo_node.episode import run_scenario_episode
from vservo_node.interface import SENSING_MODES


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__.split("\n")[0])
    ap.add_argument("--seeds", type=int, default=2)
    ap.add_argument("--sensing", choices=SENSING_MODES, default="projected")
    ap.add_argument("--noise-px", type=float, default=None)
    ap.add_argument("--scenario", nargs="*", default=None)
    ap.add_argument("--set", nargs="*", default=[], metavar="NAME=VALUE")
    args = ap.parse_args()
    names = args.scenario or sorted(p.stem for p in (paths.config_dir() / "scenarios")
                                    .glob("*.yaml"))
    overrides = {k: yaml.safe_load(v) for k, v in (item.split("=", 1) for item in args.set)}
    print(f"{'scenario':20s} {'seed':>4s} {'result':>12s} {'time s':>6s} {'true mm':>8s} "
          f"{'true deg':>8s} {'est mm':>7s} {'est deg':>7s} {'spread mm':>9s} {'spread deg':>10s}")
    worst = {}
    for name in names:
        for seed in range(args.seeds):
            t0 = time.perf_counter()
            r = run_scenario_episode(name, overrides, seed=seed, sensing=args.sensing,
                                     noise_px=args.noise_px if args.sensing == "projected"
                                     else None)
            print(f"{name:20s} {seed:4d} {r.reason or 'converged':>12s} {r.time_s:6.2f} "
                  f"{r.pose_error_mm:8.3f} {r.pose_error_deg:8.4f} "
                  f"{r.estimated_pose_error_mm:7.3f} {r.estimated_pose_error_deg:7.4f} "
                  f"{r.estimated_pose_error_spread_mm:9.3f} "
                  f"{r.estimated_pose_error_spread_deg:10.4f}   "
                  f"({time.perf_counter() - t0:.1f} s)", flush=True)
            w = worst.setdefault(name, [0.0, 0.0, 0, 0])
            w[0], w[1] = max(w[0], r.pose_error_mm), max(w[1], r.pose_error_deg)
            w[2] += r.converged
            w[3] += 1
    print("\nworst true pose error per scenario:")
    for name, (mm, deg, ok, n) in worst.items():
        print(f"  {name:20s} {mm:.3f} mm  {deg:.4f} deg  ({ok}/{n} converged)")
    all_mm = np.array([w[0] for w in worst.values()])
    all_deg = np.array([w[1] for w in worst.values()])
    print(f"all: {all_mm.max():.3f} mm, {all_deg.max():.4f} deg")


if __name__ == "__main__":
    main()
