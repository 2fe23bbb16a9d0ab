"""Publisher-to-callback latency of camera images between two processes, with Fast DDS's default
transports and with the shared-memory profile (config/fastdds_shm.xml).

One publisher process stamps each frame with the wall clock just before publishing; one
subscriber process takes the wall clock on entering its callback (after deserialization, as a
node sees it) and after viewing the pixels as a NumPy array. Sensor-data QoS (best effort,
keep last 2) as the nodes use, and reliable keep-last-10 ("state") for comparison. Prints
median and 95th percentile per configuration and the number of frames received (best effort
drops frames that do not get through).

    .venv/bin/python benchmarks/image_latency_bench.py [--frames 100] [--rate 30]

Re-runs itself through tools/isolated when not already isolated (it starts ROS contexts).
"""
from __future__ import annotations

import argparse
import json
import os
import sys
import tempfile
import time
from pathlib import Path

import numpy as np

ROOT = Path(__file__).resolve().parent.parent
sys.path.insert(0, str(ROOT))

TOPIC = "bench/image"
SIZES = {"640x480": (480, 640), "1920x1080": (1080, 1920)}


def _publisher(args):
    import rclpy
    from sensor_msgs.msg import Image
    from vservo_node.ros import convert, harness, qos

    rclpy.init()
    node = rclpy.create_node("image_bench_pub")
    pub = node.create_publisher(Image, TOPIC, qos.profile(args.qos))
    h, w = SIZES[args.size]
    frame = np.random.default_rng(0).integers(0, 255, (h, w, 3), dtype=np.uint8)
    harness.wait_for_subscriber(node, TOPIC, timeout=20.0)
    time.sleep(1.0)  # let the subscriber's reader match fully before the first frame
    period = 1.0 / args.rate
    next_t = time.monotonic()
    for _ in range(args.frames):
        msg = convert.numpy_to_image(frame, "rgb8", frame_id="bench")
        msg.header.stamp = convert.sec_to_time(time.time())
        pub.publish(msg)
        next_t += period
        time.sleep(max(0.0, next_t - time.monotonic()))
    time.sleep(0.5)
    node.destroy_node()
    rclpy.shutdown()


def _subscriber(args):
    import rclpy
    from sensor_msgs.msg import Image
    from vservo_node.ros import convert, qos

    rclpy.init()
    node = rclpy.create_node("image_bench_sub")
    callback_ms, view_ms = [], []

    def on_image(msg):
        t_cb = time.time()
        image = convert.image_from_cdr(msg) if args.raw else msg
        sent = convert.time_to_sec(image.header.stamp)
        pixels = convert.image_to_numpy(image)
        t_view = time.time()
        assert pixels.shape[2] == 3
        callback_ms.append((t_cb - sent) * 1e3)
        view_ms.append((t_view - sent) * 1e3)

    node.create_subscription(Image, TOPIC, on_image, qos.profile(args.qos), raw=args.raw)
    deadline = time.monotonic() + args.frames / args.rate + 25.0
    publisher_seen = False
    while len(callback_ms) < args.frames and time.monotonic() < deadline:
        rclpy.spin_once(node, timeout_sec=0.1)
        publishers = node.count_publishers(TOPIC)
        if publisher_seen and publishers == 0:
            break  # the publisher sent everything and left
        publisher_seen |= publishers > 0
    Path(args.out).write_text(json.dumps({"callback_ms": callback_ms, "view_ms": view_ms}))
    node.destroy_node()
    rclpy.shutdown()


def _run_pair(size, config, qos_name, raw, frames, rate):
    from vservo_node.ros import harness

    env = harness.child_environment()
    if config == "default":
        for name in ("FASTDDS_DEFAULT_PROFILES_FILE", "FASTRTPS_DEFAULT_PROFILES_FILE"):
            env.pop(name, None)
        env["SKIP_DEFAULT_XML_FILE"] = "1"
    out = Path(tempfile.mkstemp(suffix=".json")[1])
    common = ["--size", size, "--frames", str(frames), "--rate", str(rate), "--qos", qos_name]
    script = [sys.executable, str(Path(__file__).resolve())]
    sub = harness.NodeProcess(script + ["--role", "sub", "--out", str(out)] + common
                              + (["--raw"] if raw else []), "bench-sub", env)
    pub = harness.NodeProcess(script + ["--role", "pub"] + common, "bench-pub", env)
    try:
        if sub.popen.wait(frames / rate + 60.0) != 0:
            raise harness.ProcessFailed(sub.describe() + "\n" + pub.describe())
        result = json.loads(out.read_text())
    finally:
        for proc in (pub, sub):
            proc.stop()
            proc.remove_log()
        out.unlink(missing_ok=True)
    return result


def _orchestrate(args):
    from vservo_node.ros import dds

    print(f"image latency, {args.frames} frames at {args.rate} Hz per row, "
          f"isolation={os.environ.get('VSERVO_ISOLATION')}, profile={dds.shm_profile_path()}")
    print(f"{'size':>10} {'transport':>12} {'qos':>12} {'subscription':>12} {'received':>9} "
          f"{'cb median':>10} {'cb p95':>8} {'view p95':>9}   (ms)")
    rows = (("default", "sensor_data", False), ("default", "state", False),
            ("shm_profile", "sensor_data", False), ("shm_profile", "sensor_data", True),
            ("shm_profile", "state", False))
    for size in args.sizes:
        for config, qos_name, raw in rows:
            r = _run_pair(size, config, qos_name, raw, args.frames, args.rate)
            cb, view = np.array(r["callback_ms"]), np.array(r["view_ms"])
            head = (f"{size:>10} {config:>12} {qos_name:>12} {'raw' if raw else 'typed':>12} "
                    f"{cb.size:>5}/{args.frames:<3}")
            if cb.size == 0:
                print(head, "(no frame arrived)")
                continue
            print(f"{head} {np.median(cb):>10.2f} {np.percentile(cb, 95):>8.2f} "
                  f"{np.percentile(view, 95):>9.2f}")


def main():
    parser = argparse.ArgumentParser(description=__doc__.split("\n\n")[0])
    parser.add_argument("--role", choices=("orchestrate", "pub", "sub"), default="orchestrate")
    parser.add_argument("--size", choices=sorted(SIZES), default="640x480")
    parser.add_argument("--sizes", nargs="+", choices=sorted(SIZES),
                        default=["640x480", "1920x1080"])
    parser.add_argument("--frames", type=int, default=100)
    parser.add_argument("--rate", type=float, default=30.0)
    parser.add_argument("--raw", action="store_true")
    parser.add_argument("--qos", choices=("sensor_data", "state"), default="sensor_data")
    parser.add_argument("--out")
    args = parser.parse_args()
    if not os.environ.get("VSERVO_ISOLATION"):
        os.execv(str(ROOT / "tools" / "isolated"), [str(ROOT / "tools" / "isolated"),
                                                    sys.executable, *sys.argv])
    {"orchestrate": _orchestrate, "pub": _publisher, "sub": _subscriber}[args.role](args)


if __name__ == "__main__":
    main()
