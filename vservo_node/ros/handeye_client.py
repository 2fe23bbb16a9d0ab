"""The live side of `vservo handeye collect --live`: listen to a running cell and take a
hand-eye sample each time the user asks. It only subscribes (joint states, camera image and
camera_info, robot_description); it publishes nothing and calls no service, so it never moves
the arm: the user moves it (teach pendant, jog, or the cell's own motion) and holds it still.

A sample is taken from the newest image stamped after the joints came to rest: the joints
must have moved less than ``calib.samples.REST_RAD`` over the last ``REST_WINDOW_S`` (image and
joint stamps of a moving arm apart would pair the wrong pose); otherwise the request is
refused with the joint motion measured. The image is perceived and fitted as in
calib/samples.py. rclpy installs no signal handlers: Ctrl-C ends the collection (the samples
taken so far are kept).
"""
from __future__ import annotations

import threading
import time
from collections import deque
from pathlib import Path

import numpy as np
import rclpy
from rclpy.executors import SingleThreadedExecutor
from rclpy.signals import SignalHandlerOptions
from sensor_msgs.msg import CameraInfo, CompressedImage, Image, JointState
from std_msgs.msg import String

from vservo_node import interface as itf
from vservo_node.calib import handeye as he
from vservo_node.calib import samples as cs
from vservo_node.control.kinematics import ArmModel
from vservo_node.ros import convert, dds, qos
from vservo_node.vision import image_io

REST_WINDOW_S = 0.3
WAIT_S = 10.0   # for the URDF, camera_info and a first image


class LiveCollector:
    """Subscriptions and the latest data of a running cell (see the module doc)."""

    def __init__(self, node, target, urdf_text=None, base_frame="base_link",
                 tool_frame="tool0"):
        self.node, self.target = node, target
        self.base_frame, self.tool_frame = base_frame, tool_frame
        self.lock = threading.Lock()
        self.joints = deque(maxlen=2000)      # (stamp s, {name: position})
        self.image = None                     # (stamp s, bgr)
        self.camera = None
        self.arm = None
        if urdf_text:
            self._set_arm(urdf_text)
        node.create_subscription(JointState, itf.TOPIC_JOINT_STATES, self._on_joints,
                                 qos.STATE_IN)
        node.create_subscription(Image, itf.TOPIC_IMAGE, self._on_image, qos.SENSOR_DATA)
        node.create_subscription(CompressedImage, itf.TOPIC_IMAGE_COMPRESSED,
                                 self._on_compressed, qos.SENSOR_DATA)
        node.create_subscription(CameraInfo, itf.TOPIC_CAMERA_INFO, self._on_info,
                                 qos.SENSOR_DATA)
        node.create_subscription(String, itf.TOPIC_ROBOT_DESCRIPTION, self._on_urdf,
                                 qos.LATCHED)

    def _set_arm(self, text):
        self.arm = ArmModel.from_urdf(text, self.base_frame, self.tool_frame, None, 1)

    def _on_urdf(self, msg):
        if self.arm is None:
            try:
                self._set_arm(msg.data)
            except ValueError as exc:
                self.node.get_logger().error(f"robot_description refused: {exc}")

    def _on_joints(self, msg):
        stamp = convert.time_to_sec(msg.header.stamp)
        with self.lock:
            self.joints.append((stamp, dict(zip(msg.name, msg.position))))

    def _on_image(self, msg):
        try:
            bgr = image_io.to_bgr_or_mono(convert.image_to_numpy(msg), msg.encoding,
                                          msg.width, msg.height)
        except ValueError:
            return
        with self.lock:
            self.image = (convert.time_to_sec(msg.header.stamp), np.array(bgr))

    def _on_compressed(self, msg):
        import cv2

        _, data = convert.compressed_image_bytes(msg)
        bgr = cv2.imdecode(np.asarray(data, np.uint8), cv2.IMREAD_COLOR)
        if bgr is not None:
            with self.lock:
                self.image = (convert.time_to_sec(msg.header.stamp), bgr)

    def _on_info(self, msg):
        if self.camera is None:
            try:
                self.camera = convert.camera_info_to_model(msg)
            except ValueError as exc:
                self.node.get_logger().error(f"camera_info refused: {exc}")

    def ready(self) -> str:
        """'' when a sample can be taken, else what is missing."""
        missing = [what for what, ok in (("robot_description (or --urdf)", self.arm),
                                         ("camera_info", self.camera),
                                         ("a camera image", self.image),
                                         ("joint states", self.joints)) if not ok]
        return ", ".join(missing)

    def take(self):
        """One sample at rest, or ValueError saying why not."""
        with self.lock:
            joints, image = list(self.joints), self.image
        if self.ready():
            raise ValueError(f"waiting for {self.ready()}")
        names = self.arm.joint_names
        rows = [(t, [p[n] for n in names]) for t, p in joints if all(n in p for n in names)]
        if not rows:
            raise ValueError(f"no joint state names every joint of {names}")
        t_last = rows[-1][0]
        recent = np.array([q for t, q in rows if t >= t_last - REST_WINDOW_S])
        moved = float((recent.max(axis=0) - recent.min(axis=0)).max()) if len(recent) else 0.0
        if len(recent) < 2 or moved > cs.REST_RAD:
            raise ValueError(f"the arm is not at rest: joints moved {moved:.2e} rad over the "
                             f"last {REST_WINDOW_S} s (expected below {cs.REST_RAD:g}); hold it "
                             "still and ask again")
        t_image, bgr = image
        if t_image < t_last - REST_WINDOW_S:
            raise ValueError("no image since the arm came to rest; wait for the next frame")
        q = np.asarray(rows[-1][1], dtype=float)
        try:
            return cs.make_sample(self.arm, q, bgr, self.target, self.camera, t_image)
        except cs.NoTargetPose as exc:
            raise ValueError(f"no target pose in the image: {exc}") from None


def collect_live(args, target, lines=None, out=print):
    """Run the prompt loop; returns (samples, arm, camera). ``lines``: an iterator of input
    lines (default: stdin), for tests."""
    import sys

    owns_context = not rclpy.ok()    # a test may hold the context already
    if owns_context:
        dds.use_shm_profile()
        rclpy.init(args=[], signal_handler_options=SignalHandlerOptions.NO)
    node = rclpy.create_node(f"vservo_handeye_{int(time.time() * 1000) % 100000}",
                             namespace=args.namespace or "/")
    urdf = Path(args.urdf).read_text(encoding="utf8") if args.urdf else None
    collector = LiveCollector(node, target, urdf, args.base_frame, args.tool_frame)
    executor = SingleThreadedExecutor()
    executor.add_node(node)
    stop = threading.Event()

    def spin():
        while not stop.is_set():
            executor.spin_once(timeout_sec=0.05)
    thread = threading.Thread(target=spin, daemon=True)
    thread.start()
    samples = []
    try:
        end = time.monotonic() + WAIT_S
        while collector.ready() and time.monotonic() < end:
            time.sleep(0.05)
        if collector.ready():
            raise RuntimeError(f"no {collector.ready()} within {WAIT_S:g} s: is the cell "
                               "running, in this namespace?")
        out("Move the arm to a pose with the target in view, hold it still, press Enter to "
            "take a sample; q + Enter ends. Tilt the tool about different axes between "
            "samples (10 or more).")
        source = lines if lines is not None else iter(sys.stdin.readline, "")
        for line in source:
            if line.strip().lower() in ("q", "quit"):
                break
            try:
                sample = collector.take()
            except ValueError as exc:
                out(f"  not taken: {exc}")
                continue
            samples.append(sample)
            sp = he.spread(samples)
            out(f"  sample {len(samples)}: {len(sample.xy)} points, target at "
                f"{1e3 * np.linalg.norm(sample.T_camera_target[:3, 3]):.0f} mm; rotations up to "
                f"{sp.max_rotation_deg:.1f} deg, axes up to {sp.axis_spread_deg:.1f} deg apart")
    except KeyboardInterrupt:
        out("interrupted; keeping the samples taken")
    finally:
        stop.set()
        thread.join(timeout=2.0)
        executor.shutdown()
        node.destroy_node()
        if owns_context:
            rclpy.try_shutdown()
    if not samples:
        raise RuntimeError("no samples taken")
    return samples, collector.arm, collector.camera
