"""``vservo bench``: every row of the performance table, printed and as JSON.

Rows (each median and 95th percentile over its samples, with its goal where the project set
one: issue 15):

- vision: detection (full frame) and tracking (windows after the first frame) per target kind
  at 640x480, 1280x720, 1920x1080 (``bench.vision_rows``), CPU time of the calling thread;
- servo: ``Servo.observe`` and ``Servo.command`` for N = 4, 16, 64 points on the 6- and
  7-joint bench arms (``bench.servo_rows``), CPU time of the calling thread;
- dds: the controller node's CPU while watching and while servoing at 30 and 60 fps, and its
  image-to-command latency beside the transport-only baseline at 640x480 and 1920x1080, each
  also as a fraction of the frame period (``bench.ros_rows``, through ``tools/isolated``).

The machine is noted with the figures: CPU model, cores, load average before and after.
"""
from __future__ import annotations

import json
import os
import platform
import subprocess
import sys
import time
from pathlib import Path

import numpy as np

ROOT = Path(__file__).resolve().parents[2]

# goals of issue 15 (ms, or fraction of a core for CPU rows)
VISION_GOALS = {("markers", "track", (640, 480)): 2.0, ("markers", "track", (1920, 1080)): 3.0,
                ("textured", "track", (640, 480)): 5.0,
                ("textured", "track", (1920, 1080)): 8.0,
                ("dots", "track", (1920, 1080)): 1.5}
SERVO_GOALS = {("observe", 16): 0.15, ("command", 16): 0.05}
CPU_GOALS = {"watch": 0.10, "servo": 0.20}


def machine() -> dict:
    model = ""
    try:
        for line in Path("/proc/cpuinfo").read_text().splitlines():
            if line.startswith("model name"):
                model = line.split(":", 1)[1].strip()
                break
    except OSError:
        pass
    import cv2
    return {"cpu": model or platform.processor(), "cores": os.cpu_count(),
            "affinity": len(os.sched_getaffinity(0)) if hasattr(os, "sched_getaffinity")
            else None, "python": platform.python_version(), "opencv": cv2.__version__,
            "numpy": np.__version__, "kernel": platform.release(),
            "load_before": list(os.getloadavg())}


def _row(part, name, samples, unit="ms", goal=None, note=""):
    a = np.asarray(samples, dtype=float)
    a = a[np.isfinite(a)]
    row = {"part": part, "row": name, "unit": unit, "n": int(a.size),
           "median": float(np.median(a)) if a.size else None,
           "p95": float(np.percentile(a, 95)) if a.size else None,
           "goal": goal, "note": note}
    if goal is not None and row["median"] is not None:
        row["met"] = bool(row["median"] <= goal)
    return row


def vision_rows(frames: int) -> list:
    from vservo_node.bench.vision_rows import SIZES, TARGETS, time_vision
    rows = []
    for kind in TARGETS:
        for size in SIZES:
            r = time_vision(kind, size, frames)
            label = f"{kind} {size[0]}x{size[1]}"
            rows.append(_row("vision", f"{label} detect (full frame)", r["detect"],
                             note=f"{r['points']} points, CPU time"))
            rows.append(_row("vision", f"{label} track", r["track"],
                             goal=VISION_GOALS.get((kind, "track", size)),
                             note=f"{100 * r['windowed']:.0f} % of frames windowed, CPU time"))
    return rows


def servo_rows(ticks: int) -> list:
    from vservo_node.bench.servo_rows import time_servo
    rows = []
    for joints in (6, 7):
        medians = {"observe": [], "command": []}
        for n in POINT_COUNTS:
            observe, command = time_servo(joints, n, ticks)
            rows.append(_row("servo", f"Servo.observe {joints} joints N={n}", observe,
                             goal=SERVO_GOALS.get(("observe", n))))
            rows.append(_row("servo", f"Servo.command {joints} joints N={n}", command,
                             goal=SERVO_GOALS.get(("command", n))))
            medians["observe"].append(rows[-2]["median"])
            medians["command"].append(rows[-1]["median"])
        for part, values in medians.items():
            rows.append(_linear_fit_row(f"Servo.{part} {joints} joints", values))
    return rows


POINT_COUNTS = (4, 16, 64, 256)   # 256: the per-point cost stands out of the noise


def _linear_fit_row(name: str, medians: list) -> dict:
    """The medians over POINT_COUNTS fitted as a + b N (least squares): b in us per point as
    the row's figure, a and the largest residual in the note (linear growth: small residual)."""
    N = np.asarray(POINT_COUNTS, dtype=float)
    y = np.asarray(medians, dtype=float)
    b, a = np.polyfit(N, y, 1)
    residual = float(np.abs(y - (a + b * N)).max())
    row = _row("servo", f"{name}: cost per point (fit a + b N)", [1e3 * b], unit="us/pt",
               note=f"a = {a:.3f} ms, b = {1e3 * b:.2f} us/point, largest residual "
                    f"{1e3 * residual:.1f} us")
    row["p95"] = None
    return row


def dds_rows(watch_s: float, servo_s: float) -> tuple[list, list]:
    """(rows, raw configurations); run in this process when isolated, else through
    tools/isolated in a child."""
    if not os.environ.get("VSERVO_ISOLATION"):
        isolated = ROOT / "tools" / "isolated"
        if not isolated.exists():
            return [], [{"skipped": "tools/isolated not found beside the package"}]
        cmd = [str(isolated), sys.executable, "-m", "vservo_node.bench.suite", "--dds-child",
               str(watch_s), str(servo_s)]
        done = subprocess.run(cmd, capture_output=True, text=True, timeout=900)
        if done.returncode != 0:
            return [], [{"failed": done.stderr[-3000:]}]
        return json.loads(done.stdout.strip().splitlines()[-1])
    from vservo_node.bench.ros_rows import measure
    configs = []
    for width, height, fps in ((640, 480, 30.0), (640, 480, 60.0), (1920, 1080, 30.0)):
        try:
            configs.append(measure(width, height, fps, watch_s, servo_s))
        except Exception as exc:    # a failed configuration is reported, the others run
            configs.append({"width": width, "height": height, "fps": fps,
                            "failed": f"{type(exc).__name__}: {str(exc)[:2000]}"})
    rows = []
    for c in configs:
        label = f"{c['width']}x{c['height']} {c['fps']:.0f} fps"
        if "failed" in c:
            rows.append(_row("dds", f"{label}: failed", [], note=c["failed"][:200]))
            continue
        if c["width"] == 640:
            rows.append(_row("dds", f"node CPU watching {label}", [c["cpu_watch"]],
                             unit="core", goal=CPU_GOALS["watch"]))
            rows.append(_row("dds", f"node CPU servoing {label}", [c["cpu_servo"]],
                             unit="core", goal=CPU_GOALS["servo"],
                             note=f"{c['runs']} runs: {', '.join(sorted(set(c['run_ends'])))}"))
        period_ms = 1e3 / c["fps"]
        rows.append(_row("dds", f"image->command latency {label}", c["latency_ms"],
                         note=f"{len(c['latency_ms'])} frames"))
        rows.append(_row("dds", f"  transport-only baseline {label}", c["baseline_ms"],
                         note=f"{len(c['baseline_ms'])} frames"))
        rows.append(_row("dds", f"  latency / frame period {label}",
                         np.asarray(c["latency_ms"]) / period_ms, unit="period"))
        rows.append(_row("dds", f"  baseline / frame period {label}",
                         np.asarray(c["baseline_ms"]) / period_ms, unit="period"))
    return rows, configs


def format_table(result: dict) -> str:
    m = result["machine"]
    lines = [f"vservo bench: {m['cpu']}, {m['cores']} cores ({m['affinity']} usable), "
             f"Python {m['python']}, OpenCV {m['opencv']}; load average before "
             f"{'/'.join(f'{x:.2f}' for x in m['load_before'])}, after "
             f"{'/'.join(f'{x:.2f}' for x in m['load_after'])}; {result['seconds']:.0f} s",
             f"| {'part':6s} | {'row':48s} | {'median':>9s} | {'p95':>9s} | {'unit':6s} | "
             f"{'goal':>6s} | met | note |",
             f"|{'-' * 8}|{'-' * 50}|{'-' * 11}|{'-' * 11}|{'-' * 8}|{'-' * 8}|-----|------|"]
    for r in result["rows"]:
        med = "-" if r["median"] is None else f"{r['median']:.3f}"
        p95 = "-" if r["p95"] is None else f"{r['p95']:.3f}"
        goal = "" if r["goal"] is None else f"{r['goal']:g}"
        met = {True: "yes", False: "no"}.get(r.get("met"), "")
        lines.append(f"| {r['part']:6s} | {r['row']:48s} | {med:>9s} | {p95:>9s} | "
                     f"{r['unit']:6s} | {goal:>6s} | {met:3s} | {r['note']} |")
    return "\n".join(lines)


def run_suite(parts=("vision", "servo", "dds"), frames=30, ticks=300, watch_s=5.0,
              servo_s=8.0) -> dict:
    t0 = time.monotonic()
    result = {"machine": machine(), "rows": [], "dds_configs": []}
    if "vision" in parts:
        result["rows"] += vision_rows(frames)
    if "servo" in parts:
        result["rows"] += servo_rows(ticks)
    if "dds" in parts:
        rows, configs = dds_rows(watch_s, servo_s)
        result["rows"] += rows
        result["dds_configs"] = [{k: v for k, v in c.items()
                                  if k not in ("latency_ms", "baseline_ms")} for c in configs]
    result["machine"]["load_after"] = list(os.getloadavg())
    result["seconds"] = time.monotonic() - t0
    return result


if __name__ == "__main__":
    # the DDS part's child under tools/isolated: rows and configurations as one JSON line
    if len(sys.argv) == 4 and sys.argv[1] == "--dds-child":
        rows, configs = dds_rows(float(sys.argv[2]), float(sys.argv[3]))
        print(json.dumps([rows, [{k: v for k, v in c.items()
                                  if k not in ("latency_ms", "baseline_ms")}
                                 for c in configs]]))
