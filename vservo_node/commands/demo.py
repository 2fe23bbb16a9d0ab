"""`vservo demo`: the main job on the built-in simulated cell.

Default: the simulated cell node and the controller node as separate processes over real DDS
(run it through tools/isolated, as `make demo` does), then a summary. ``--core`` runs the
headless closed-loop cases instead (Servo + kinematic arm + ideal points, no images, no ROS).
"""
from __future__ import annotations

import json
import sys

CORE_CASES = (
    ("vs7 (a) 110 deg twist, blended, true depth", dict(rotation_deg=-110.0, estimate="blended")),
    ("vs7 (b) 8 cm + 5 cm + 10 deg, current_view", dict(translation_m=(0.08, 0.0, 0.05),
                                                        tilt_deg=10.0, estimate="current_view")),
    ("vs7 (c) 80 deg + offset (b), blended", dict(rotation_deg=-80.0,
                                                  translation_m=(0.08, 0.0, 0.05),
                                                  tilt_deg=10.0, estimate="blended")),
    ("vs6 (b) 8 cm + 5 cm + 10 deg, blended", dict(robot="vs6_bench", estimate="blended",
                                                   translation_m=(0.08, 0.0, 0.05), tilt_deg=10.0)),
    ("vs7 125 deg twist, blended (measured)", dict(rotation_deg=-125.0, estimate="blended")),
    ("vs7 125 deg twist, current_view (measured)", dict(rotation_deg=-125.0,
                                                        estimate="current_view")),
)


def run_core(json_path: str | None) -> int:
    from vservo_node.episode import PointCase, run_point_case

    rows = []
    header = (f"{'case':46s} {'conv':>5s} {'time s':>7s} {'rms px':>8s} {'pose mm':>8s} "
              f"{'pose deg':>8s} {'tool m/s':>8s} {'|dq|/lim':>8s}  halt")
    print("Headless closed loop (Servo + kinematic arm, 100 Hz, four ideal points):")
    print(header)
    for label, kw in CORE_CASES:
        r = run_point_case(PointCase(**kw))
        rows.append({"case": label, **r.summary()})
        print(f"{label:46s} {str(r.converged):>5s} {r.time_s:7.2f} {r.final_rms_px:8.3f} "
              f"{r.pose_error_mm:8.3f} {r.pose_error_deg:8.3f} {r.peak_tool_speed:8.3f} "
              f"{r.peak_joint_speed_ratio:8.2f}  {r.reason or '-'}")
    if json_path:
        with open(json_path, "w") as f:
            json.dump(rows, f, indent=2)
    required = rows[:4]
    return 0 if all(r["converged"] for r in required) else 1


def run(args) -> int:
    if args.core:
        return run_core(args.json)
    from vservo_node.ros.demo_run import run_cell_demo   # needs rclpy: imported only here
    return run_cell_demo(args)


def register(sub) -> None:
    p = sub.add_parser("demo", help="run the main job on the built-in simulated cell",
                       description=__doc__)
    p.add_argument("--scenario", default="tray_twist", help="scenario name or file")
    p.add_argument("--json", metavar="FILE", help="write the summary as JSON")
    p.add_argument("--core", action="store_true",
                   help="headless closed-loop cases only (no images, no ROS)")
    p.add_argument("--timeout", type=float, default=60.0, help="wall-clock limit, s")
    p.add_argument("--runs-dir", default="runs", help="where the run's bag and report go")
    p.set_defaults(func=run)


if __name__ == "__main__":
    sys.exit(run_core(None))
