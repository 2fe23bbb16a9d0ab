"""`make soak`: repeated runs on the simulated cell for a while, then a verdict.

The product as `vservo demo` runs it (vservo_sim, vservo_node and vservo_recorder as separate
processes over DDS, network-isolated): teach once, then run after run from the scenario's
start pose, putting the arm back with a position trajectory to the simulator between runs.
What it checks at the end (our acceptance figures, common practice, no source):
- memory: the controller's resident set after the last run is < 5 % above the one after
  the warm-up runs (the first WARMUP runs allocate caches and DDS buffers);
- timing: < 1 % of the controller's output periods came more than one period late (its
  ``output_ticks`` / ``output_ticks_late`` diagnostics);
- records: every run was recorded, and every bag reads back (``load_run``) with its result;
- every run converged (a soak that halts is a finding to look at).

    tools/isolated .venv/bin/python tools/soak.py --minutes 10 [--scenario tray_offset]

Prints one line per run and the figures; exit 0 when every check passes, 1 otherwise.
"""
from __future__ import annotations

import argparse
import json
import shutil
import sys
import tempfile
import time
from pathlib import Path

import numpy as np
import rclpy
from diagnostic_msgs.msg import DiagnosticArray
from trajectory_msgs.msg import JointTrajectory

from vservo_node import interface as itf
from vservo_node.record.bag import load_run
from vservo_node.ros import convert, demo_run, harness, qos
from vservo_node.sim import load_scenario

WARMUP = 3                 # runs before the memory baseline
MEMORY_GROWTH_MAX = 0.05   # fraction
LATE_MAX = 0.01            # fraction of output periods


class SoakWatcher(demo_run.Watcher):
    """The demo's watcher, plus a trajectory publisher to the simulator and the controller's
    diagnostics."""

    def __init__(self, arm):
        super().__init__(arm)
        self.diagnostics: dict[str, str] = {}
        self._trajectory = self.create_publisher(JointTrajectory, itf.TOPIC_JOINT_TRAJECTORY_CMD,
                                                 qos.COMMANDS)
        self.create_subscription(DiagnosticArray, itf.TOPIC_DIAGNOSTICS, self._on_diagnostics,
                                 qos.STATE)

    def _on_diagnostics(self, msg):
        for status in msg.status:
            if status.name.startswith(f"/{itf.CONTROLLER_NODE}:"):
                self.diagnostics = {kv.key: kv.value for kv in status.values}

    def return_to(self, q, duration_s: float, processes) -> None:
        harness.spin_until(self, lambda: self._trajectory.get_subscription_count() > 0, 10.0,
                           "the simulator's trajectory input", processes)
        self._trajectory.publish(convert.trajectory_point(self.arm.joint_names, q,
                                                          np.zeros(len(q)), duration_s))
        harness.spin_until(self, lambda: self.q is not None and np.max(np.abs(self.q - q)) < 1e-3,
                           duration_s + 10.0, "the arm back at its start", processes)
        end = time.monotonic() + 0.4            # fresh images of the start pose
        harness.spin_until(self, lambda: time.monotonic() > end, 5.0, "time", processes)


def rss_kib(pid: int) -> int:
    for line in Path(f"/proc/{pid}/status").read_text().splitlines():
        if line.startswith("VmRSS:"):
            return int(line.split()[1])
    return 0


def main(argv=None) -> int:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--minutes", type=float, default=10.0)
    parser.add_argument("--scenario", default="tray_offset")
    parser.add_argument("--keep", help="folder to keep the runs in (default: a temporary one)")
    args = parser.parse_args(argv)
    harness.require_isolation()
    scenario = load_scenario(args.scenario)
    folder = Path(args.keep or tempfile.mkdtemp(prefix="vservo-soak-"))
    folder.mkdir(parents=True, exist_ok=True)
    reference = demo_run.teach(scenario, folder)
    overrides = demo_run.controller_overrides(scenario, reference, folder)
    runs_dir = folder / "runs"
    controller = demo_run.start_controller(overrides)
    processes = [demo_run.start_sim(scenario.source or scenario.name), controller,
                 harness.start_module("vservo_node.ros.recorder_node", ros_args=[
                     "-p", f"scenario:={scenario.name}", "-p", f"output_dir:={runs_dir}"],
                     name="vservo_recorder")]
    rclpy.init()
    node = SoakWatcher(scenario.arm_model("belief"))
    rows, bags, rss = [], [], []
    failures = []
    t_end = time.monotonic() + 60.0 * args.minutes
    try:
        demo_run.enable_motion(node, processes, time.monotonic() + 60.0)
        demo_run._wait_for_recorder(node, processes)
        while time.monotonic() < t_end:
            node.result, node.last_bag = None, None
            message = demo_run.start_run(node, processes)
            run_id = message.split()[1]
            harness.spin_until(node, lambda: node.result is not None
                               and node.result["run_id"] == run_id,  # noqa: B023 - this run
                               60.0, "the run result",
                               processes)
            harness.spin_until(node, lambda: node.last_bag is not None, 30.0,
                               "the recorder's bag", processes)
            result = dict(node.result)
            bags.append((run_id, node.last_bag))
            rss.append(rss_kib(controller.popen.pid))
            rows.append(result)
            verdict = ("converged" if result["converged"]
                       else "halted " + str(result["reason"]))
            pose_mm = result.get("final_pose_error_mm") or float("nan")
            print(f"run {len(rows):3d} {run_id}: {verdict} "
                  f"in {result['time_s']:.2f} s, {pose_mm:.3f} mm; "
                  f"controller RSS {rss[-1] / 1024:.1f} MiB", flush=True)
            node.return_to(scenario.q_start, 1.0, processes)
        end = time.monotonic() + 1.5                      # one more diagnostics message
        harness.spin_until(node, lambda: time.monotonic() > end, 5.0, "time", processes)
    finally:
        diagnostics = dict(node.diagnostics)
        node.destroy_node()
        rclpy.shutdown()
        for proc in reversed(processes):
            proc.stop()
            shutil.move(proc.log_path, folder / f"{proc.name}.log")

    n = len(rows)
    converged = sum(1 for r in rows if r["converged"])
    if converged != n:
        failures.append(f"{n - converged} of {n} runs did not converge")
    unreadable = []
    for _run_id, bag in bags:
        try:
            data = load_run(bag)
            if not getattr(data, "result", None):
                unreadable.append(f"{bag}: no result")
        except Exception as exc:  # noqa: BLE001 - a finding to report, not to crash on
            unreadable.append(f"{bag}: {type(exc).__name__}: {exc}")
    if unreadable or len(bags) != n:
        failures.append(f"records: {len(bags)} bags for {n} runs; unreadable: {unreadable}")
    growth = (rss[-1] / rss[WARMUP - 1] - 1.0) if n > WARMUP else float("nan")
    if not n > WARMUP:
        failures.append(f"only {n} runs: too few to judge memory (> {WARMUP} needed)")
    elif growth >= MEMORY_GROWTH_MAX:
        failures.append(f"controller memory grew {100 * growth:.1f} % (limit "
                        f"{100 * MEMORY_GROWTH_MAX:.0f} %)")
    ticks = int(diagnostics.get("output_ticks", 0))
    late = int(diagnostics.get("output_ticks_late", 0))
    late_fraction = late / ticks if ticks else float("nan")
    if not ticks or late_fraction >= LATE_MAX:
        failures.append(f"{late} of {ticks} output periods late by more than one period")
    figures = {"runs": n, "converged": converged, "minutes": args.minutes,
               "rss_after_warmup_mib": rss[WARMUP - 1] / 1024 if n > WARMUP else None,
               "rss_last_mib": rss[-1] / 1024 if rss else None,
               "memory_growth_pct": 100 * growth, "output_ticks": ticks, "late_ticks": late,
               "late_pct": 100 * late_fraction, "bags_read": len(bags) - len(unreadable),
               "time_s_mean": float(np.mean([r["time_s"] for r in rows])) if rows else None,
               "folder": str(folder)}
    print(json.dumps(figures, indent=2))
    for failure in failures:
        print(f"FAILED: {failure}")
    print("soak: " + ("passed" if not failures else "failed"))
    return 0 if not failures else 1


if __name__ == "__main__":
    sys.exit(main())
