"""SYNTHETIC TEST DATA: a plausible servo run made up from closed-form signals, no simulator.

The image error decays exactly as the ideal IBVS loop e_dot = -lambda e does (Chaumette &
Hutchinson 2006, Part I, sec. II), and the joints move as q(t) = q_home + a exp(-lambda t'),
so the tests know the true time to tolerance and peak joint speed in closed form. The arm is the
project's invented demo arm config/robots/vs6_bench (its joint states also carry the gripper
fingers, to exercise joint selection by name). Nothing here comes from a real robot.
"""
from __future__ import annotations

import json
import math
import xml.etree.ElementTree as ET
from dataclasses import dataclass, field
from pathlib import Path

import numpy as np
from rosbags.typesys import Stores, get_typestore

from vservo_node import interface as itf
from vservo_node.control import frames
from vservo_node.control.kinematics import load_robot
from vservo_node.paths import config_dir

TS = get_typestore(Stores.ROS2_JAZZY)
T = TS.types
T0_NS = 1_764_670_000 * 10**9          # bag start, ns since the epoch (an arbitrary 2025 date)
ROBOT = "vs6_bench"
URDF_PATH = config_dir() / "robots" / f"{ROBOT}.urdf"
FINGERS = ("vs6_finger_left_joint", "vs6_finger_right_joint")


@dataclass
class Spec:
    """What the synthetic run does; the tests compare metrics against these numbers."""
    gain: float = 1.5                 # lambda, 1/s
    t_start: float = 0.3              # s, armed -> servoing
    tolerance_px: float = 0.5
    dwell_s: float = 0.3
    status_hz: float = 30.0
    joint_hz: float = 100.0
    image_hz: float = 10.0
    joint_offset: tuple = (0.10, -0.08, 0.12, 0.05, -0.15, 0.20)   # a, rad
    velocity_scale: float = 0.5        # limits.joint_velocity_scale
    tool_speed_limit: float = 0.10     # limits.tool_linear_speed, m/s
    halt_at: float | None = None       # s after start: braking (image_stale), halted 0.2 s later
    # the node's pose-error estimate: None records none (an older node); else status records
    # carry pose_error_mm / _deg = (1 + estimate_bias) x the true camera error to the goal and
    # the result the last of them as estimated_pose_error_*
    estimate_bias: float | None = None
    truth: bool = True                 # record the simulator's truth topics
    acted: dict = field(default_factory=lambda: {"joint_velocity": 10, "joint_acceleration": 3})
    width: int = 64
    height: int = 48
    fx: float = 80.0
    seed: int = 7

    @property
    def goal_uv(self) -> np.ndarray:
        c = np.array([self.width / 2, self.height / 2])
        return c + np.array([[-12.0, -9.0], [12.0, -9.0], [12.0, 9.0], [-12.0, 9.0]])

    @property
    def start_uv(self) -> np.ndarray:
        return self.goal_uv + np.array([[20.0, 25.0], [-30.0, 28.0], [-34.0, -20.0], [18.0, -24.0]])

    @property
    def rms0(self) -> float:
        """RMS over points of the pixel distance to the goal, as servo.py defines rms_px."""
        return float(np.sqrt(np.mean(np.sum((self.start_uv - self.goal_uv) ** 2, axis=1))))

    @property
    def time_to_tolerance(self) -> float:
        """Closed form of rms0 exp(-lambda t) = tol."""
        return math.log(self.rms0 / self.tolerance_px) / self.gain

    def params(self) -> dict:
        return {"robot.urdf_path": str(URDF_PATH), "robot.base_frame": "base_link",
                "robot.tool_frame": "tool0", "robot.camera_frame": "camera_optical_frame",
                "control.tolerance_px": self.tolerance_px, "control.dwell_s": self.dwell_s,
                "limits.joint_velocity_scale": self.velocity_scale,
                "limits.tool_linear_speed": self.tool_speed_limit}


def urdf_velocity_limits() -> dict[str, float]:
    """<limit velocity> of every joint of the demo URDF, read with ElementTree (independent of
    pinocchio and of ArmModel)."""
    root = ET.parse(URDF_PATH).getroot()
    return {j.get("name"): float(j.find("limit").get("velocity"))
            for j in root.iter("joint") if j.find("limit") is not None}


def _header(t_ns: int, frame: str = ""):
    return T["std_msgs/msg/Header"](
        stamp=T["builtin_interfaces/msg/Time"](sec=t_ns // 10**9, nanosec=t_ns % 10**9),
        frame_id=frame)


def _array(values) -> object:
    layout = T["std_msgs/msg/MultiArrayLayout"](dim=[], data_offset=0)
    return T["std_msgs/msg/Float64MultiArray"](layout=layout, data=np.asarray(values, float))


def _vec(cls, v):
    return T[cls](x=float(v[0]), y=float(v[1]), z=float(v[2]))


def _twist(t_ns, v6, frame):
    tw = T["geometry_msgs/msg/Twist"](linear=_vec("geometry_msgs/msg/Vector3", v6[:3]),
                                      angular=_vec("geometry_msgs/msg/Vector3", v6[3:]))
    return T["geometry_msgs/msg/TwistStamped"](header=_header(t_ns, frame), twist=tw)


def _pose(t_ns, T_base_x):
    from scipy.spatial.transform import Rotation
    qx, qy, qz, qw = Rotation.from_matrix(T_base_x[:3, :3]).as_quat()
    pose = T["geometry_msgs/msg/Pose"](
        position=_vec("geometry_msgs/msg/Point", T_base_x[:3, 3]),
        orientation=T["geometry_msgs/msg/Quaternion"](x=qx, y=qy, z=qz, w=qw))
    return T["geometry_msgs/msg/PoseStamped"](header=_header(t_ns, "base_link"), pose=pose)


def _string(text: str):
    return T["std_msgs/msg/String"](data=text)


def _image(t_ns, spec: Spec, uv):
    img = np.zeros((spec.height, spec.width, 3), np.uint8)
    img[..., 1] = 40
    for u, v in np.round(uv).astype(int):
        img[max(v - 1, 0):v + 2, max(u - 1, 0):u + 2] = (255, 40, 40)
    return T["sensor_msgs/msg/Image"](header=_header(t_ns, "camera_optical_frame"),
                                      height=spec.height, width=spec.width, encoding="rgb8",
                                      is_bigendian=0, step=spec.width * 3, data=img.ravel())


def _camera_info(t_ns, spec: Spec):
    cx, cy = spec.width / 2 - 0.5, spec.height / 2 - 0.5
    k = np.array([spec.fx, 0, cx, 0, spec.fx, cy, 0, 0, 1], float)
    p = np.array([spec.fx, 0, cx, 0, 0, spec.fx, cy, 0, 0, 0, 1, 0], float)
    roi = T["sensor_msgs/msg/RegionOfInterest"](x_offset=0, y_offset=0, height=0, width=0,
                                                do_rectify=False)
    return T["sensor_msgs/msg/CameraInfo"](
        header=_header(t_ns, "camera_optical_frame"), height=spec.height, width=spec.width,
        distortion_model="plumb_bob", d=np.zeros(5), k=k, r=np.eye(3).ravel(), p=p,
        binning_x=0, binning_y=0, roi=roi)


def messages(spec: Spec, ns: str = "", robot_description: bool = False):
    """Every message of the run as (topic, type, rosbags message, log time ns), time ordered.

    ``ns`` prefixes every topic (e.g. '/cell1'); ``robot_description`` also records the URDF on
    the robot_description topic (as a ros2 bag record of the cell would).
    """
    robot = load_robot(ROBOT)
    arm, home = robot.arm, robot.home
    a = np.asarray(spec.joint_offset)
    lam, ts = spec.gain, spec.t_start
    end_converged = ts + spec.time_to_tolerance + spec.dwell_s
    t_end = (ts + spec.halt_at + 0.3) if spec.halt_at is not None else end_converged + 0.1
    rng = np.random.default_rng(spec.seed)
    out = []

    def topic(name):
        return f"{ns}/{name.lstrip('/')}"

    def q_at(t):
        decay = math.exp(-lam * max(t - ts, 0.0))
        qdot = -lam * a * decay if t >= ts else np.zeros_like(a)
        return home + a * decay, qdot

    def add(name, msgtype, msg, t):
        out.append((topic(name), msgtype, msg, T0_NS + int(round(t * 1e9))))

    add(itf.TOPIC_CAMERA_INFO, "sensor_msgs/msg/CameraInfo", _camera_info(T0_NS, spec), 0.0)
    if robot_description:
        add(itf.TOPIC_ROBOT_DESCRIPTION, "std_msgs/msg/String", _string(URDF_PATH.read_text()), 0.0)
    if spec.truth:
        add(itf.TOPIC_SIM_TAUGHT_POSE, "geometry_msgs/msg/PoseStamped",
            _pose(T0_NS, arm.camera_pose(home)), 0.0)
    estimate = None
    names = list(arm.joint_names) + list(FINGERS)
    for i in range(int(t_end * spec.joint_hz) + 1):
        t = i / spec.joint_hz
        q, qdot = q_at(t)
        msg = T["sensor_msgs/msg/JointState"](
            header=_header(T0_NS + int(round(t * 1e9))), name=names[::-1],
            position=np.concatenate([q, [0.01, 0.01]])[::-1].copy(),
            velocity=np.concatenate([qdot, [0.0, 0.0]])[::-1].copy(), effort=np.zeros(0))
        add(itf.TOPIC_JOINT_STATES, "sensor_msgs/msg/JointState", msg, t)
    counts: dict[str, int] = {}
    state, servo_cycles, settle_since = "armed", 0, None
    for i in range(int(t_end * spec.status_hz) + 1):
        t = i / spec.status_hz
        t_ns = T0_NS + int(round(t * 1e9))
        decay = math.exp(-lam * max(t - ts, 0.0))
        uv = spec.goal_uv + (spec.start_uv - spec.goal_uv) * decay
        err = uv - spec.goal_uv
        rms = float(np.sqrt(np.mean(np.sum(err ** 2, axis=1))))
        q, qdot = q_at(t)
        reason, acted = "", []
        if t >= ts:
            halt_t = None if spec.halt_at is None else ts + spec.halt_at
            if halt_t is not None and t >= halt_t:
                state, reason = ("braking" if t < halt_t + 0.2 else "halted"), "image_stale"
            elif rms <= spec.tolerance_px:
                settle_since = t if settle_since is None else settle_since
                state = "converged" if t - settle_since >= spec.dwell_s else "settling"
            else:
                state = "servoing"
            acted = [name for name, n in spec.acted.items() if servo_cycles < n]
            servo_cycles += 1
        for name in acted:
            counts[name] = counts.get(name, 0) + 1
        record = {"t": t_ns * 1e-9, "run_id": "synthetic-1", "state": state, "reason": reason,
                  "rms_px": rms, "n_matched": 4, "gain": lam, "sigma_min": 0.2,
                  "damping": 0.0, "speed_scale": 1.0, "limits_acted": acted,
                  "limit_counts": dict(counts), "cycle_ms": float(rng.uniform(2.0, 6.0)),
                  "dq": list(qdot)}
        if spec.estimate_bias is not None:
            moved, turned = frames.pose_error(arm.camera_pose(home), arm.camera_pose(q))
            estimate = ((1 + spec.estimate_bias) * 1e3 * moved,
                        (1 + spec.estimate_bias) * math.degrees(turned))
            record.update(pose_error_mm=estimate[0], pose_error_deg=estimate[1])
        add(itf.TOPIC_STATUS, "std_msgs/msg/String", _string(json.dumps(record)), t)
        if t >= ts:
            add(itf.TOPIC_FEATURE_ERROR, "std_msgs/msg/Float64MultiArray", _array(err.ravel()), t)
            add(itf.TOPIC_FEATURES, "std_msgs/msg/Float64MultiArray", _array(uv.ravel()), t)
            add(itf.TOPIC_ERROR_RMS, "std_msgs/msg/Float64", T["std_msgs/msg/Float64"](data=rms), t)
            v_cam = np.r_[0.02 * decay, -0.01 * decay, 0.03 * decay, 0.0, 0.0, 0.1 * decay]
            add(itf.TOPIC_CAMERA_TWIST, "geometry_msgs/msg/TwistStamped",
                _twist(t_ns, v_cam, "camera_optical_frame"), t)
            add(itf.TOPIC_JOINT_VELOCITY_CMD, "std_msgs/msg/Float64MultiArray", _array(qdot), t)
        if spec.truth:
            add(itf.TOPIC_SIM_CAMERA_POSE_TRUTH, "geometry_msgs/msg/PoseStamped",
                _pose(t_ns, arm.camera_pose(q)), t)
        if i % round(spec.status_hz / spec.image_hz) == 0:
            add(itf.TOPIC_IMAGE, "sensor_msgs/msg/Image", _image(t_ns, spec, uv), t)
    result = {"run_id": "synthetic-1", "converged": spec.halt_at is None,
              "reason": "" if spec.halt_at is None else "image_stale", "time_s": t_end - ts,
              "final_rms_px": rms, "final_pose_error_mm": None, "final_pose_error_deg": None}
    if estimate is not None:
        result.update(estimated_pose_error_mm=estimate[0], estimated_pose_error_deg=estimate[1])
    add(itf.TOPIC_RUN_RESULT, "std_msgs/msg/String", _string(json.dumps(result)), t_end)
    out.sort(key=lambda m: m[3])
    return out, result


def record_with(recorder, spec: Spec) -> dict:
    """Feed the run to a RunRecorder as CDR bytes (as the rclpy node will); returns the result."""
    msgs, result = messages(spec)
    for name, msgtype, msg, t_ns in msgs:
        recorder.write(name, msgtype, TS.serialize_cdr(msg, msgtype), t_ns)
    recorder.set_result(result)
    return result


def write_plain_bag(path: Path, spec: Spec, storage, ns: str = "") -> None:
    """The run as ``ros2 bag record`` would leave it: rosbags' plain Writer, one file, closed
    normally, robot_description on its topic, no params.yaml nor result.json."""
    from rosbags.rosbag2 import Writer
    msgs, _ = messages(spec, ns=ns, robot_description=True)
    with Writer(path, version=9, storage_plugin=storage) as writer:
        conns = {}
        for name, msgtype, msg, t_ns in msgs:
            if name not in conns:
                conns[name] = writer.add_connection(name, msgtype, typestore=TS)
            writer.write(conns[name], t_ns, TS.serialize_cdr(msg, msgtype))
