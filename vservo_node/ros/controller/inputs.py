"""The controller's inputs and their history: joint states by stamp (``JointHistory``), the
one-frame mailbox to the perception thread (``FrameSlot``), and the subscription callbacks
(``InputCallbacks``): camera_info, images (decoded and perceived on the perception thread),
depth, joint states, speed scale, permit, simulated ground truth.

Every input is checked at the edge (stamp against the node clock, finite values, image size
against camera_info) and refused, counted and logged (throttled) if it fails; receipt times on
the steady clock (``self._rx``) feed the watchdogs of the output cycle. The subscriptions exist
while the node is active (``_make_subscriptions`` on activate, ``_destroy_subscriptions`` on
deactivate).
"""
from __future__ import annotations

import bisect
import functools
import math
import threading
import time

import numpy as np
from geometry_msgs.msg import PoseStamped
from sensor_msgs.msg import CameraInfo, CompressedImage, Image, JointState
from std_msgs.msg import Bool, Float64

from vservo_node import interface as itf
from vservo_node.perception import DepthImage
from vservo_node.ros import convert, qos
from vservo_node.ros.frame_loss import cdr_stamp
from vservo_node.ros.controller.guards import guarded
from vservo_node.ros.controller import ACTIVE_RUN
from vservo_node.servo import MOVING_STATES, Observation
from vservo_node.vision import image_io
from vservo_node.ros.controller.state import ControllerState

JOINT_HISTORY_S = 1.0      # joint states kept for evaluation at image times
DEPTH_FRAMES = 4           # depth frames kept for pairing with images


class JointHistory:
    """Joint positions (chain order) by stamp over the last ``span_s`` seconds.

    ``at(t)`` interpolates linearly between the two states around ``t`` (the shorter way round
    for ``continuous`` joints), returns the newest state for a ``t`` after it (no
    extrapolation) and None for a ``t`` before the oldest kept state.
    """

    def __init__(self, continuous: np.ndarray, span_s: float = JOINT_HISTORY_S):
        self.continuous = np.asarray(continuous, dtype=bool)
        self.span_s = span_s
        self._t: list[float] = []
        self._q: list[np.ndarray] = []

    def add(self, t: float, q: np.ndarray) -> None:
        """Add the state at time ``t`` (s); an older or equal stamp replaces nothing but the
        newest state of the same stamp."""
        if self._t and t <= self._t[-1]:
            if t == self._t[-1]:
                self._q[-1] = q
            return
        self._t.append(t)
        self._q.append(q)
        drop = bisect.bisect_left(self._t, t - self.span_s)
        if drop:
            del self._t[:drop], self._q[:drop]

    def latest(self) -> np.ndarray | None:
        return self._q[-1] if self._q else None

    def span(self) -> tuple[float, float] | None:
        """(oldest, newest) stamp kept, or None."""
        return (self._t[0], self._t[-1]) if self._t else None

    def at(self, t: float) -> np.ndarray | None:
        if not self._t or t < self._t[0]:
            return None
        if t >= self._t[-1]:
            return self._q[-1]
        i = bisect.bisect_right(self._t, t)
        t0, t1, q0, q1 = self._t[i - 1], self._t[i], self._q[i - 1], self._q[i]
        step = q1 - q0
        step[self.continuous] = (step[self.continuous] + np.pi) % (2 * np.pi) - np.pi
        return q0 + (t - t0) / (t1 - t0) * step


class FrameSlot:
    """A one-frame mailbox between the executor and the perception thread: ``put`` replaces
    a frame not yet taken (the newest frame wins; ``dropped`` counts the replaced ones),
    ``take`` blocks until a frame or ``close`` (then returns None)."""

    def __init__(self):
        self._cond = threading.Condition()
        self._item = None
        self._closed = False
        self.dropped = 0

    def put(self, item) -> None:
        with self._cond:
            self.dropped += self._item is not None
            self._item = item
            self._cond.notify()

    def take(self):
        with self._cond:
            self._cond.wait_for(lambda: self._item is not None or self._closed)
            item, self._item = self._item, None
            return None if self._closed else item

    def close(self) -> None:
        with self._cond:
            self._closed = True
            self._cond.notify_all()


def no_features() -> Observation:
    """The observation of an image in which nothing matched (the servo halts on it)."""
    return Observation((), np.zeros((0, 2)), np.zeros((0, 2)))


class InputCallbacks(ControllerState):
    """Mixin of ControllerNode: the input subscriptions and the perception thread."""

    # ------------------------------------------------------------------------ subscriptions
    def _make_subscriptions(self) -> None:
        s = self.settings
        subs: list = []
        self._subscriptions_active = subs   # filled as made: a failure part-way leaves them listed
        if s.io.compressed_image:
            image = self.create_subscription(CompressedImage, itf.TOPIC_IMAGE_COMPRESSED,
                                             self._on_compressed_image, qos.SENSOR_DATA)
        else:
            image = self.create_subscription(Image, itf.TOPIC_IMAGE, self._on_raw_image,
                                             qos.SENSOR_DATA, raw=True)
        subs.append(image)
        self._image_topic = image.topic_name
        if s.depth.source == "depth_image":
            subs.append(self.create_subscription(Image, itf.TOPIC_DEPTH, self._on_depth,
                                                 qos.SENSOR_DATA))
        subs += [
            self.create_subscription(CameraInfo, itf.TOPIC_CAMERA_INFO, self._on_camera_info,
                                     qos.SENSOR_DATA),
            self.create_subscription(JointState, itf.TOPIC_JOINT_STATES, self._on_joint_state,
                                     qos.STATE_IN),
            self.create_subscription(Float64, itf.TOPIC_SPEED_SCALE, self._on_speed_scale,
                                     qos.STATE_IN),
            self.create_subscription(Bool, itf.TOPIC_MOTION_PERMIT, self._on_permit,
                                     qos.STATE_IN)]
        if s.io.sim_truth:   # a simulated cell's ground truth, never on a real arm
            subs += [self.create_subscription(PoseStamped, itf.TOPIC_SIM_CAMERA_POSE_TRUTH,
                                              functools.partial(self._on_truth, "camera"),
                                              qos.STATE),
                     self.create_subscription(PoseStamped, itf.TOPIC_SIM_TAUGHT_POSE,
                                              functools.partial(self._on_truth, "taught"),
                                              qos.LATCHED)]
        self._frames = FrameSlot()
        self._worker = threading.Thread(target=self._perception_loop, args=(self._frames,),
                                        name="perception", daemon=True)
        self._worker.start()

    def _destroy_subscriptions(self) -> None:
        """No input after this; the perception thread ends (bounded wait)."""
        for sub in self._subscriptions_active:
            self.destroy_subscription(sub)
        self._subscriptions_active = []
        self._frames.close()
        if self._worker is not None and self._worker is not threading.current_thread():
            self._worker.join(timeout=2.0)

    # ------------------------------------------------------------------------ camera + images
    @guarded
    def _on_camera_info(self, msg: CameraInfo) -> None:
        key = (msg.width, msg.height, msg.distortion_model, tuple(msg.d), tuple(msg.k),
               tuple(msg.r), tuple(msg.p))
        with self._lock:
            rx = self._rx["camera_info"] = time.monotonic()
            self._frame_loss.info(convert.time_to_sec(msg.header.stamp), rx)
            if key == self._camera_key:
                return
            first = self._camera_key is None
            self._camera_key = key
            try:
                camera = convert.camera_info_to_model(msg, self.settings.io.image_rectified)
            except ValueError as exc:
                self._camera = None
                self._camera_problem = f"camera_info refused: {exc}"
                self.get_logger().error(self._camera_problem)
                self._halt("camera_info_invalid")
                return
            if not first and self.servo is not None and self.servo.state in MOVING_STATES:
                self._camera_problem = "camera_info changed during a run"
                self._halt("camera_info_invalid")
            self._camera = camera
            self.get_logger().info(f"camera model: {camera}")
            self._rebuild_vision()

    def _image_problem(self, image) -> str:
        if self._camera is None:
            return self._camera_problem
        h, w = image.shape[:2]
        if (w, h) != (self._camera.width, self._camera.height):
            return (f"images are {w}x{h} but camera_info says "
                    f"{self._camera.width}x{self._camera.height}")
        return ""

    def _on_raw_image(self, data: bytes) -> None:
        """Hand the serialized image to the perception thread (newest frame wins)."""
        rx = time.monotonic()
        self._frame_loss.image(cdr_stamp(data), rx)
        self._frames.put((rx, data))

    def _on_compressed_image(self, msg: CompressedImage) -> None:
        rx = time.monotonic()
        self._frame_loss.image(convert.time_to_sec(msg.header.stamp), rx)
        self._frames.put((rx, msg))

    def _perception_loop(self, frames: FrameSlot) -> None:
        """The perception thread: decode, perceive and observe the newest frame."""
        while True:
            item = frames.take()
            if item is None:
                return
            self._on_frame(*item)

    @guarded
    def _on_frame(self, rx: float, payload) -> None:
        try:
            if isinstance(payload, CompressedImage):
                header = payload.header
                fmt, data = convert.compressed_image_bytes(payload)
                image = image_io.to_bgr_or_mono(data, fmt)
            else:
                raw = convert.image_from_cdr(payload)  # pixels stay a view of the bytes
                header = raw.header
                image = image_io.to_bgr_or_mono(raw.data, raw.encoding, raw.width, raw.height,
                                                raw.step, bool(raw.is_bigendian))
        except ValueError as exc:
            with self._lock:
                self._frame_refused(f"image refused: {exc}")
            return
        self._on_image(image, header, rx)

    def _stamp(self, header) -> float:
        """Image time (s): header stamp (node time if unstamped) + io.camera_time_offset_s."""
        t = convert.time_to_sec(header.stamp) or self._now()
        return t + self.settings.io.camera_time_offset_s

    def _stamp_problem(self, what: str, t: float) -> str:
        """Why a message stamped ``t`` (s) is refused, or "": further than
        io.stamp_tolerance_s from the node's clock, either way."""
        now, tolerance = self._now(), self.settings.io.stamp_tolerance_s
        skew = t - now
        if abs(skew) <= tolerance:
            return ""
        hint = (" (use_sim_time is set but no /clock arrives?)" if now == 0.0 else
                " (clocks of the camera/driver and this node out of step?)")
        return (f"{what} stamped {skew:+.3f} s from this node's clock (io.stamp_tolerance_s = "
                f"{tolerance} s){hint}")

    def _refuse_input(self, kind: str, problem: str) -> None:
        """Count and (throttled) log a refused input."""
        self._refused[kind] = self._refused.get(kind, 0) + 1
        self._warn(f"refused:{kind}", f"{problem}; refused ({self._refused[kind]} so far)")

    def _pair(self, t: float):
        """Joints at image time ``t`` and "" or None and why they cannot be had: the image
        is older than the kept history or newer than the newest joint state by more than
        io.joint_state_timeout_s (joints that lag the image cannot stand in for it)."""
        if self._joints is None:
            return None, "no robot model yet"
        span = self._joints.span()
        if span is None:
            return None, "no joint state received yet"
        oldest, newest = span
        if t > newest + self.settings.io.joint_state_timeout_s:
            return None, (f"image stamped {t - newest:.3f} s after the newest joint state: "
                          "cannot pair frames with joint states")
        q = self._joints.at(t)
        if q is None:
            return None, (f"image stamped {newest - t:.3f} s before the newest joint state "
                          f"(only {JOINT_HISTORY_S} s kept): cannot pair frames with joint "
                          "states")
        return q, ""

    def _frame_refused(self, problem: str) -> None:
        self._frame_problem = problem
        self._refuse_input("image", problem)

    def _on_image(self, image: np.ndarray, header, rx: float) -> None:
        t0 = time.perf_counter()
        t = self._stamp(header)
        with self._lock:
            self._rx["image"] = rx
            stamp_problem = self._stamp_problem("image", t)
            if stamp_problem:
                self._frame_refused(stamp_problem)
                return
            self._last_image = (image, t, header.frame_id)
            problem = self._image_problem(image)
            if problem:
                self._camera_problem = problem
                self._halt("camera_info_invalid", problem)
                return
            self._camera_problem = ""
            self._rx["frame"], self._frame_problem = rx, ""
            q, self._pair_problem = self._pair(t)
            if self._pair_problem:
                self._refuse_input("unpaired", self._pair_problem)
            else:
                self._rx["paired"] = rx
            perception = self.perception
            depth = self._depth_near(t)
        if perception is None:
            return
        try:
            obs, info = perception.process(image, t, depth)
        except ValueError as exc:
            self._warn("perception", f"perception failed: {exc}")
            return
        with self._lock:
            if perception is not self.perception:
                return  # rebuilt meanwhile: this frame used the old reference or camera
            self._last_obs = (obs, info, rx)
            servo = self.servo
            if q is not None and servo is not None and servo.state in ACTIVE_RUN:
                servo.observe(obs or no_features(), q, rx)
            if servo is not None:
                self._frame_status = (t, 1e3 * (time.perf_counter() - t0))
        if self._shutting_down:
            return   # the node is being destroyed: publish nothing from this thread
        self._publish_features(obs, info)
        if self.settings.io.publish_overlay and self._pub_overlay.get_subscription_count():
            self._publish_overlay(image, info, t, header.frame_id)

    @guarded
    def _on_depth(self, msg: Image) -> None:
        if msg.encoding not in image_io.DEPTH_ENCODINGS:
            self._warn("depth", f"depth image refused: encoding {msg.encoding!r}, expected one "
                       f"of {', '.join(image_io.DEPTH_ENCODINGS)}")
            return
        pixels = convert.image_to_numpy(msg)  # a view; the message stays alive with it
        with self._lock:
            self._depth_frames.append((self._stamp(msg.header),
                                       DepthImage(pixels, msg.encoding)))

    def _depth_near(self, t: float) -> DepthImage | None:
        """The kept depth frame nearest to ``t`` within one camera period, else None."""
        frames_ = list(self._depth_frames)
        if not frames_:
            return None
        t_d, depth = min(frames_, key=lambda f: abs(f[0] - t))
        return depth if abs(t_d - t) <= 1.0 / self.settings.io.camera_rate_hz else None

    # ------------------------------------------------------------------------ other inputs
    @guarded
    def _on_joint_state(self, msg: JointState) -> None:
        rx = time.monotonic()
        with self._lock:
            joints = self._joints
            if self.arm is None or joints is None:
                return
            names = set(msg.name)
            if not names & set(self.arm.joint_names):
                return  # another group's joints (e.g. a gripper) on the same topic
            try:
                q, _ = convert.joint_state_to_arrays(msg, self.arm.joint_names)
            except ValueError as exc:
                self._joint_problem = f"joint state refused: {exc}"
                self._refuse_input("joints", self._joint_problem)
                return
            if not np.all(np.isfinite(q)):
                bad = [n for n, v in zip(self.arm.joint_names, q) if not math.isfinite(v)]
                self._joint_problem = f"joint state with non-finite position(s) {bad}"
                self._refuse_input("joints", self._joint_problem)
                self._halt("numerical_fault", self._joint_problem)
                return
            t = convert.time_to_sec(msg.header.stamp) or self._now()
            stamp_problem = self._stamp_problem("joint state", t)
            if stamp_problem:
                self._joint_problem = stamp_problem
                self._refuse_input("joints", stamp_problem)
                return
            joints.add(t, q)
            self._rx["joints"] = rx
            self._joint_problem = ""

    @guarded
    def _on_speed_scale(self, msg: Float64) -> None:
        value = msg.data
        clipped = min(max(value, 0.0), 1.0) if math.isfinite(value) else 0.0
        if clipped != value:
            self._warn("speed_scale", f"speed scale {value} outside [0, 1]; using {clipped}")
        with self._lock:
            if self.servo is not None:
                self.servo.external_scale = clipped

    @guarded
    def _on_permit(self, msg: Bool) -> None:
        with self._lock:
            self._permit = bool(msg.data)
            self._rx["permit"] = time.monotonic()

    @guarded
    def _on_truth(self, which: str, msg: PoseStamped) -> None:
        self._truth[which] = convert.pose_to_matrix(msg)

    # ------------------------------------------------------------------------ input health
    def _age(self, what: str) -> float:
        rx = self._rx[what]
        return math.inf if rx is None else time.monotonic() - rx

    def _permit_ok(self) -> bool:
        return self._permit and self._age("permit") <= self.settings.io.permit_timeout_s
