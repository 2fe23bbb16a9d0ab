"""Run recorder and report timings: how much faster than real time a run is recorded, and how
long reading it back and reporting take.

A made-up 10 s run (SYNTHETIC, no robot): status JSON at 125 Hz, joint states (6 joints) at
125 Hz, a 640x480 rgb8 image at 30 Hz, recorded raw, as PNG and as JPEG.
Run: .venv/bin/python benchmarks/record_bench.py
"""
from __future__ import annotations

import json
import tempfile
import time
from pathlib import Path

import numpy as np

from vservo_node.record.bag import IMAGE, RunRecorder, default_typestore, load_run
from vservo_node.record.report import write_report

TS = default_typestore()
T = TS.types
DURATION_S, CONTROL_HZ, IMAGE_HZ = 10.0, 125.0, 30.0


def _header(t_ns: int):
    return T["std_msgs/msg/Header"](
        stamp=T["builtin_interfaces/msg/Time"](sec=t_ns // 10**9, nanosec=t_ns % 10**9),
        frame_id="")


def workload() -> list[tuple[str, str, bytes, int]]:
    """Serialized messages of the run, time ordered: what an rclpy recorder node would hand over."""
    rng = np.random.default_rng(0)
    yy, xx = np.mgrid[0:480, 0:640]
    base = np.dstack([(xx // 3) % 256, (yy // 2) % 256, ((xx + yy) // 4) % 256]).astype(np.uint8)
    out = []
    for i in range(int(DURATION_S * CONTROL_HZ)):
        t_ns = int(i * 1e9 / CONTROL_HZ)
        rms = 40.0 * np.exp(-1.5 * i / CONTROL_HZ)
        status = {"t": t_ns * 1e-9, "run_id": "bench", "state": "servoing", "reason": "",
                  "rms_px": rms, "n_matched": 4, "gain": 1.5, "sigma_min": 0.2, "damping": 0.0,
                  "speed_scale": 1.0, "limits_acted": [], "limit_counts": {},
                  "cycle_ms": float(rng.uniform(2, 6)), "dq": list(rng.normal(0, 0.1, 6))}
        out.append(("servo/status", "std_msgs/msg/String",
                    TS.serialize_cdr(T["std_msgs/msg/String"](data=json.dumps(status)),
                                     "std_msgs/msg/String"), t_ns))
        js = T["sensor_msgs/msg/JointState"](header=_header(t_ns), name=[f"j{k}" for k in range(6)],
                                             position=rng.normal(0, 1, 6), velocity=np.zeros(6),
                                             effort=np.zeros(0))
        out.append(("joint_states", "sensor_msgs/msg/JointState",
                    TS.serialize_cdr(js, "sensor_msgs/msg/JointState"), t_ns))
    for i in range(int(DURATION_S * IMAGE_HZ)):
        t_ns = int(i * 1e9 / IMAGE_HZ)
        frame = np.roll(base, i, axis=1)
        img = T[IMAGE](header=_header(t_ns), height=480, width=640, encoding="rgb8",
                       is_bigendian=0, step=640 * 3, data=frame.ravel())
        out.append(("camera/image", IMAGE, TS.serialize_cdr(img, IMAGE), t_ns))
    out.sort(key=lambda m: m[3])
    return out


def main() -> None:
    msgs = workload()
    raw_mb = sum(len(m[2]) for m in msgs) / 2**20
    print(f"workload: {len(msgs)} messages, {raw_mb:.1f} MiB serialized, {DURATION_S:.0f} s of run")
    with tempfile.TemporaryDirectory() as tmp:
        for fmt in (None, "png", "jpeg"):
            start = time.perf_counter()
            with RunRecorder(Path(tmp), f"bench_{fmt or 'raw'}", image_format=fmt) as rec:
                for topic, msgtype, data, t_ns in msgs:
                    rec.write(topic, msgtype, data, t_ns)
            wall = time.perf_counter() - start
            size = sum(p.stat().st_size for p in rec.bag_dir.glob("*.mcap")) / 2**20
            files = len(list(rec.bag_dir.glob("*.mcap")))
            print(f"record images={fmt or 'raw':5s}: {wall:6.2f} s wall = "
                  f"{DURATION_S / wall:6.1f} x real time, {size:7.1f} MiB in {files} split(s)")
        start = time.perf_counter()
        run = load_run(rec.bag_dir)
        loaded = time.perf_counter() - start
        start = time.perf_counter()
        write_report(rec.bag_dir, Path(tmp) / "report")
        print(f"load_run: {loaded:.2f} s ({len(run.status_t)} status records); "
              f"report: {time.perf_counter() - start:.2f} s")


if __name__ == "__main__":
    main()
