"""What a run record holds, as the metrics read it: its parameters, the arm it ran on, the
joint motion and the commands, the run start, the camera's path to its goal and the node's
pose-error estimate (the definitions: vservo_node.record.metrics)."""
from __future__ import annotations

import math
from dataclasses import dataclass
from pathlib import Path

import numpy as np

from vservo_node.control import frames
from vservo_node.control.frames import transform_from_xyz_quat
from vservo_node.control.kinematics import URDF_MAX_BYTES, ArmModel
from vservo_node.interface import MOVING_STATES
from vservo_node.params import flatten
from vservo_node.record.bag import RunData
from vservo_node.yaml_files import read_bounded


def run_params(run: RunData) -> dict:
    """The run's parameters as flat dotted names (``control.tolerance_px``...)."""
    return params_of_tree(run.params)


def params_of_tree(tree: dict) -> dict:
    """Flat dotted parameter names of a parameter tree (ROS 2 file with ros__parameters, a
    nested mapping or flat names)."""
    sections = [v["ros__parameters"] for v in tree.values()
                if isinstance(v, dict) and isinstance(v.get("ros__parameters"), dict)]
    flat = {}
    for section in sections or [tree]:
        flat.update(flatten(section))
    return flat


def arm_of_run(run: RunData) -> ArmModel | None:
    """The arm model of the run: URDF from params (robot_description text or robot.urdf_path,
    relative paths against the bag folder) or from the recorded robot_description topic;
    frames from robot.*; the camera frame is left out if the URDF lacks it. None without URDF."""
    p = run_params(run)
    urdf = p.get("robot_description") or run.robot_description
    if not urdf and p.get("robot.urdf_path"):
        path = Path(p["robot.urdf_path"])
        folder = Path(run.path) if Path(run.path).is_dir() else Path(run.path).parent
        path = path if path.is_absolute() else folder / path
        # bounded and regular files only: the path comes from the bag (a hostile /dev/zero)
        urdf = (read_bounded(path, URDF_MAX_BYTES, prefix="robot.urdf_path of the bag: ")
                .decode("utf-8", "replace") if path.exists() else None)
    if not urdf:
        return None
    frame_names = (p.get("robot.base_frame", "base_link"), p.get("robot.tool_frame", "tool0"))
    min_joints = int(p.get("robot.min_joints", 1))
    try:
        arm = ArmModel.from_urdf(urdf, *frame_names, p.get("robot.camera_frame"), min_joints)
    except ValueError:
        arm = ArmModel.from_urdf(urdf, *frame_names, None, min_joints)
    hand_eye = p.get("robot.hand_eye") or []
    target = p.get("robot.target_on_tool") or []
    if p.get("robot.camera_mount") == "fixed" and len(target) == 7:
        # a fixed camera: the point limits.camera_linear_speed bounds is the target's origin
        # on the tool (control.mounting), so the "camera" figures are that point's
        arm.set_hand_eye(transform_from_xyz_quat(target[:3], target[3:]))
    elif len(hand_eye) == 7:
        arm.set_hand_eye(transform_from_xyz_quat(hand_eye[:3], hand_eye[3:]))
    return arm


def _accelerations(p: dict, n: int) -> np.ndarray | None:
    a = p.get("limits.joint_acceleration")
    if not a:
        return None
    a = np.asarray(a, float)
    return np.full(n, a[0]) if a.size == 1 else (a if a.size == n else None)


@dataclass
class Motion:
    """Arm motion along the run from joint states and the URDF, chain order.

    t (T,) s; q (T, n) rad/m; qdot (T, n) rad/s or m/s (recorded velocities, or the gradient of
    positions where a message has none); lower/upper (n,) position limits; qdot_max (n,)
    velocity limits in use (URDF x limits.joint_velocity_scale); qddot_max (n,) rad/s^2 or
    None; tool_speed, camera_speed (T,) m/s of robot.tool_point and of the camera origin;
    angular_speed (T,) rad/s of the tool; *_max their limits or None; camera_xyz (T, 3) m,
    base frame (the tool origin when the camera frame is unknown); tool_T, camera_T (T, 4, 4)
    poses in the base frame."""
    joint_names: list
    t: np.ndarray
    q: np.ndarray
    qdot: np.ndarray
    lower: np.ndarray
    upper: np.ndarray
    qdot_max: np.ndarray
    tool_speed: np.ndarray
    tool_speed_max: float | None
    camera_xyz: np.ndarray
    camera_speed: np.ndarray | None = None
    camera_speed_max: float | None = None
    angular_speed: np.ndarray | None = None
    angular_speed_max: float | None = None
    qddot_max: np.ndarray | None = None
    tool_T: np.ndarray | None = None
    camera_T: np.ndarray | None = None
    position_margin: float = 0.0


def motion_of_run(run: RunData, arm: ArmModel | None) -> Motion | None:
    """Joint and Cartesian motion; None without an arm model or joint states for its chain."""
    if arm is None or len(run.joint_t) < 2 or not set(arm.joint_names) <= set(run.joint_names):
        return None
    cols = [run.joint_names.index(n) for n in arm.joint_names]
    q = run.joint_position[:, cols]
    keep = np.all(np.isfinite(q), axis=1)
    t, q = run.joint_t[keep], q[keep]
    if len(t) < 2:
        return None
    qdot = run.joint_velocity[keep][:, cols]
    missing = ~np.isfinite(qdot)
    qdot[missing] = np.gradient(q, t, axis=0)[missing]
    p = run_params(run)
    offset = np.asarray(p.get("robot.tool_point", [0.0, 0.0, 0.0]), float)
    has_camera = arm.T_tool_camera is not None
    tool_speed, camera_speed, angular_speed = (np.empty(len(t)) for _ in range(3))
    for k, (qi, vi) in enumerate(zip(q, qdot)):
        if has_camera:
            J_tool, J_camera, J_angular = arm.cartesian_jacobians(qi, offset)
            camera_speed[k] = np.linalg.norm(J_camera @ vi)
        else:   # no camera frame known: the tool point and the angular speed only
            J_tool = arm.point_jacobian_base(qi, "tool", offset)
            J_angular = arm.jacobian_base(qi)[3:]
        tool_speed[k] = np.linalg.norm(J_tool @ vi)
        angular_speed[k] = np.linalg.norm(J_angular @ vi)
    if not has_camera:
        camera_speed = None
    tool_T = np.array([arm.fk(qi, "tool") for qi in q])
    camera_T = (np.array([arm.fk(qi, "camera") for qi in q]) if arm.T_tool_camera is not None
                else tool_T)

    def limit(name):
        value = p.get(name)
        return None if value is None else float(value)

    return Motion(list(arm.joint_names), t, q, qdot, arm.lower, arm.upper,
                  arm.velocity_limits * float(p.get("limits.joint_velocity_scale", 1.0)),
                  tool_speed, limit("limits.tool_linear_speed"), camera_T[:, :3, 3].copy(),
                  camera_speed, limit("limits.camera_linear_speed"), angular_speed,
                  limit("limits.angular_speed"), _accelerations(p, arm.n), tool_T, camera_T,
                  float(p.get("limits.position_margin", 0.0)))


@dataclass
class Command:
    """The limited joint command the node sent, chain order: ``t`` (T,) s on the bag clock,
    ``dq`` (T, n) rad/s, ``period`` s between commands (the limiter's dt) and ``accel``
    (T-1, n) rad/s^2 = the change per period, at ``t[1:]``."""
    t: np.ndarray
    dq: np.ndarray
    period: float
    accel: np.ndarray


def command_of_run(run: RunData, joint_names: list) -> Command | None:
    """The command from servo/joint_velocity_cmd (reordered from io.command_joint_order); else
    the status records' ``dq``. None when neither was recorded.

    Acceleration: the change between consecutive recorded commands over the longer of the
    nominal output period 1/io.output_rate_hz (the dt the node's limiter uses) and the time
    between them. A command lost on the way to the recorder (keep-last QoS under load) then
    spreads its step over the gap instead of showing as a jump several bounds high; a real
    excess in that gap is understated in the same proportion."""
    p = run_params(run)
    n = len(joint_names)
    order = list(p.get("io.command_joint_order") or joint_names)
    cmd = run.joint_cmd
    if cmd is not None and len(cmd.t) > 1 and cmd.values.shape[1] == len(order) \
            and set(joint_names) <= set(order):
        dq = cmd.values[:, [order.index(name) for name in joint_names]]
        period = 1.0 / float(p.get("io.output_rate_hz", 125.0))
        steps = np.maximum(np.diff(cmd.t), period)
        return Command(cmd.t, dq, period, np.diff(dq, axis=0) / steps[:, None])
    dq, t_node = run.status["dq"], run.status["t"]
    rows = np.flatnonzero(np.all(np.isfinite(dq), axis=1)) if dq.ndim == 2 and dq.shape[1] == n \
        else np.zeros(0, int)
    if rows.size < 2:
        return None
    steps = np.diff(t_node[rows])
    steps[~(steps > 0)] = np.nan
    return Command(run.status_t[rows], dq[rows], float(np.nanmedian(steps)),
                   np.diff(dq[rows], axis=0) / steps[:, None])


def start_index(run: RunData) -> int | None:
    """Index of the first status record in a moving state; None if the run never moved."""
    hits = np.flatnonzero(np.isin(run.status["state"].astype(str), MOVING_STATES))
    return int(hits[0]) if hits.size else None


def pose_of(row: np.ndarray) -> np.ndarray:
    """[x, y, z, qx, qy, qz, qw] -> 4x4."""
    return transform_from_xyz_quat(row[:3], row[3:7])


# goal_path's source when the record tells no goal: the path is then to where the camera stopped
GOAL_FROM_FINAL_POSE = ("forward kinematics: camera against its final pose (no taught pose "
                        "recorded)")


def goal_path(run: RunData, motion: Motion | None):
    """The camera's position (mm) and orientation (deg) error from its goal over time:
    ``(t, mm, deg, xyz_goal_mm (T, 3) in the goal camera's axes, source)`` or None.

    Source, best first: the simulator's ground truth (camera and taught poses); forward
    kinematics against the joint positions the copied reference was taught at
    (``joint_positions`` in the reference file); forward kinematics against the final pose
    (then the curve says how far the camera still had to go to where it stopped, which reads
    the same for a halted run)."""
    if run.camera_truth is not None and run.taught_pose is not None and len(run.camera_truth.t):
        goal = pose_of(run.taught_pose.values[-1])
        poses = [pose_of(r) for r in run.camera_truth.values]
        source = "ground truth: true camera pose against the true taught pose"
        t = run.camera_truth.t
    elif motion is not None and motion.camera_T is not None:
        poses, t = list(motion.camera_T), motion.t
        q_taught = _taught_joints(run, motion.joint_names)
        if q_taught is not None:
            goal = _fk_camera(run, q_taught)
            source = "forward kinematics: camera against the joints the reference was taught at"
        else:
            goal = poses[-1]
            source = GOAL_FROM_FINAL_POSE
        if goal is None:
            return None
    else:
        return None
    goal_inv = frames.invert(goal)
    mm, deg, local = [], [], []
    for T in poses:
        moved, turned = frames.pose_error(goal, T)
        mm.append(1e3 * moved)
        deg.append(math.degrees(turned))
        local.append(1e3 * (goal_inv @ T)[:3, 3])
    return np.asarray(t), np.array(mm), np.array(deg), np.array(local), source


def pose_estimate_series(run: RunData):
    """The node's own pose-error estimate over time: ``(t, mm, deg)`` over the status records
    where it was estimated (``pose_error_mm`` / ``pose_error_deg``, control.pose_error: PnP of
    the target model or the plane homography from the features of that frame); None when no
    record holds one (an older node, or a run the node could not estimate: no target model
    and no taught depths)."""
    mm, deg = run.status.get("pose_error_mm"), run.status.get("pose_error_deg")
    if mm is None or deg is None:
        return None
    mm = np.array([v if isinstance(v, (int, float)) else np.nan for v in mm], float)
    deg = np.array([v if isinstance(v, (int, float)) else np.nan for v in deg], float)
    ok = np.isfinite(mm) & np.isfinite(deg)
    return (run.status_t[ok], mm[ok], deg[ok]) if ok.any() else None


def _taught_joints(run: RunData, names: list) -> np.ndarray | None:
    joints = (run.reference or {}).get("joint_positions")
    if isinstance(joints, dict) and all(n in joints for n in names):
        return np.array([float(joints[n]) for n in names])
    return None


def _fk_camera(run: RunData, q) -> np.ndarray | None:
    arm = arm_of_run(run)
    if arm is None:
        return None
    return arm.fk(q, "camera" if arm.T_tool_camera is not None else "tool")


def envelope_path(run: RunData, motion: Motion) -> tuple[np.ndarray | None, np.ndarray | None]:
    """Tool translation (m) and rotation (deg) from its pose at the run start, per joint
    sample (the supervisor's motion envelope, servo.Servo._envelope_used); (None, None)
    without a run start or tool poses."""
    k0 = start_index(run)
    if k0 is None or motion.tool_T is None:
        return None, None
    i0 = int(np.clip(np.searchsorted(motion.t, run.status_t[k0]), 0, len(motion.t) - 1))
    start = motion.tool_T[i0]
    moved, turned = np.zeros(len(motion.t)), np.zeros(len(motion.t))
    for i in range(i0, len(motion.t)):
        m, r = frames.pose_error(start, motion.tool_T[i])
        moved[i], turned[i] = m, math.degrees(r)
    return moved, turned
