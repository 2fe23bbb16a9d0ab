"""What the recorder node (vservo_recorder) keeps of a camera and joint-state stream, and at what
CPU cost, for each image_format.

This process publishes 640x480 bgr8 images at --rate Hz (sensor-data QoS, a smooth synthetic
scene: gradients and a few filled shapes) and joint states of 6 joints at --joint-rate Hz
(reliable) for --seconds; a recorder process records them (record_continuously, no report).
Printed per image_format: images and joint states sent and found in the bag (read back with
rosbags' AnyReader), the recorder's CPU time over the publishing window (user + system, all its
threads, from /proc/<pid>/stat) as a percentage of one core, and the bag's size.

    .venv/bin/python benchmarks/recorder_node_bench.py [--seconds 5] [--rate 30]

Re-runs itself through tools/isolated when not already isolated (it starts ROS contexts).
"""
from __future__ import annotations

import argparse
import os
import sys
import tempfile
import time
from pathlib import Path

import numpy as np

ROOT = Path(__file__).resolve().parent.parent
sys.path.insert(0, str(ROOT))

JOINTS = [f"j{i}" for i in range(1, 7)]


def scene(height=480, width=640) -> np.ndarray:
    """bgr8 test scene: two gradients and a few filled shapes (compresses like a real view
    more than noise would)."""
    import cv2

    v, u = np.mgrid[0:height, 0:width]
    img = np.dstack([(u * 255 // width), (v * 255 // height), ((u + v) % 256)]).astype(np.uint8)
    cv2.circle(img, (200, 180), 60, (20, 20, 20), -1)
    cv2.rectangle(img, (380, 250), (520, 400), (240, 240, 240), -1)
    cv2.circle(img, (320, 360), 25, (0, 0, 200), -1)
    return img


def cpu_seconds(pid: int) -> float:
    """User + system CPU time of a process (all threads), seconds."""
    fields = Path(f"/proc/{pid}/stat").read_text().rsplit(")", 1)[1].split()
    return (int(fields[11]) + int(fields[12])) / os.sysconf("SC_CLK_TCK")


def run_once(node, image_format: str, args) -> dict:
    from rosbags.highlevel import AnyReader
    from sensor_msgs.msg import Image, JointState

    from vservo_node import interface as itf
    from vservo_node.record.bag import default_typestore
    from vservo_node.ros import convert, harness, qos

    out = Path(tempfile.mkdtemp(prefix="recorder_bench_"))
    proc = harness.start_module("vservo_node.ros.recorder_node", name="recorder", ros_args=[
        "-p", f"output_dir:={out}", "-p", "record_continuously:=true",
        "-p", "make_report:=false", "-p", f"image_format:={image_format}"])
    pub_image = node.create_publisher(Image, itf.TOPIC_IMAGE, qos.SENSOR_DATA)
    pub_joints = node.create_publisher(JointState, itf.TOPIC_JOINT_STATES, qos.STATE)
    try:
        for topic in (itf.TOPIC_IMAGE, itf.TOPIC_JOINT_STATES):
            harness.wait_for_subscriber(node, topic, 30.0, [proc])
        time.sleep(1.0)   # let the readers match fully before the first message
        frame = scene()
        sent_images = sent_joints = 0
        cpu0, t0 = cpu_seconds(proc.popen.pid), time.monotonic()
        while (t := time.monotonic() - t0) < args.seconds:
            if sent_images <= t * args.rate:
                pub_image.publish(convert.numpy_to_image(frame, "bgr8", t))
                sent_images += 1
            pub_joints.publish(convert.joint_state(JOINTS, np.full(6, t), np.zeros(6), t))
            sent_joints += 1
            time.sleep(max(0.0, sent_joints / args.joint_rate - (time.monotonic() - t0)))
        time.sleep(1.0)   # the writer catches up
        cpu = (cpu_seconds(proc.popen.pid) - cpu0) / (time.monotonic() - t0)
        code = proc.stop(timeout=30.0)
        if code != 0:
            raise harness.ProcessFailed(proc.describe())
    finally:
        proc.stop()
        proc.remove_log()
        node.destroy_publisher(pub_image)
        node.destroy_publisher(pub_joints)
    (bag,) = out.iterdir()
    counts = {}
    with AnyReader([bag], default_typestore=default_typestore()) as reader:
        for conn in reader.connections:
            counts[conn.topic] = counts.get(conn.topic, 0) + conn.msgcount
    size = sum(f.stat().st_size for f in bag.iterdir() if f.is_file())
    image_topic = "/camera/image" + ("/compressed" if image_format != "raw" else "")
    return {"images": (counts.get(image_topic, 0), sent_images),
            "joints": (counts.get("/joint_states", 0), sent_joints),
            "cpu_pct": 100.0 * cpu, "mb": size / 2**20}


def main():
    parser = argparse.ArgumentParser(description=__doc__.split("\n\n")[0])
    parser.add_argument("--seconds", type=float, default=5.0)
    parser.add_argument("--rate", type=float, default=30.0, help="images per second")
    parser.add_argument("--joint-rate", type=float, default=250.0)
    args = parser.parse_args()
    if not os.environ.get("VSERVO_ISOLATION"):
        os.execv(str(ROOT / "tools" / "isolated"), [str(ROOT / "tools" / "isolated"),
                                                    sys.executable, *sys.argv])
    import rclpy

    from vservo_node.ros import dds

    dds.use_shm_profile()
    rclpy.init()
    node = rclpy.create_node("recorder_bench")
    print(f"recorder node, 640x480 bgr8 at {args.rate:g} Hz + joint states at "
          f"{args.joint_rate:g} Hz for {args.seconds:g} s; os.cpu_count()={os.cpu_count()}")
    print(f"{'image_format':>12} {'images kept/sent':>17} {'joints kept/sent':>17} "
          f"{'recorder CPU':>13} {'bag MB':>7}")
    try:
        for image_format in ("raw", "png", "jpeg"):
            r = run_once(node, image_format, args)
            print(f"{image_format:>12} {r['images'][0]:>8}/{r['images'][1]:<8} "
                  f"{r['joints'][0]:>8}/{r['joints'][1]:<8} {r['cpu_pct']:>12.0f}% "
                  f"{r['mb']:>7.1f}")
    finally:
        node.destroy_node()
        rclpy.shutdown()


if __name__ == "__main__":
    main()
