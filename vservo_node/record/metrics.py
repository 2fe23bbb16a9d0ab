"""Figures of merit of one recorded run, computed from `RunData` alone: ONE definition of each
figure, shared by `vservo demo` (which prints its recorded run's metrics.json), `vservo report`,
`vservo compare` and `vservo sweep` (whose headless episodes map onto the same definitions in
:func:`episode_figures`). :data:`DEFINITIONS` states each definition in words; the report shows
them beside the figures.

Times are seconds on the record's clock (the log times of the bag, see `bag.load_run`); the
*run start* is the first status record in a moving state (servoing, settling, braking) and
durations are measured from it. The node's own run time (result ``time_s``) is kept beside as
``node_run_time_s``: it is measured on image stamps, which lag the node's clock by the camera's
delay, so the two differ by that delay (by seconds when a camera's stamps fall behind).

Parameters are read from the run's params.yaml under the names of vservo_node.params.SCHEMA
(flat dotted names, nested mappings, or a ROS 2 parameter file with ``ros__parameters``).
When a value is absent, the figure that needs it is None rather than a guess; joint limits
then come from the URDF alone.
"""
from __future__ import annotations

import math
from collections import Counter
from dataclasses import dataclass
from pathlib import Path

import numpy as np

from vservo_node.control import frames
from vservo_node.control.frames import transform_from_xyz_quat
from vservo_node.control.kinematics import URDF_MAX_BYTES, ArmModel
from vservo_node.params import flatten
from vservo_node.record.bag import RunData
from vservo_node.yaml_files import read_bounded

HALT_STATES = ("braking", "halted")
MOVING_STATES = ("servoing", "settling", "braking")

DEFINITIONS = {
    "time_to_converge_s": "converged runs only: from the run start to the end of the dwell "
                          "(the first status record in state converged), on the record's clock",
    "time_to_halt_s": "halted runs only: from the run start until the arm stood still after "
                      "braking (the first status record in state halted), on the record's "
                      "clock",
    "node_run_time_s": "the run time the node reported (result time_s), on the node's clock",
    "duration_s": "from the run start to the last status record",
    "initial_rms_px": "RMS feature error of the first frame of the run",
    "final_rms_px": "RMS feature error of the last frame the servo judged",
    "time_to_tolerance_s": "from the run start until the RMS error enters the tolerance for "
                           "good (stays there to the end)",
    "overshoot_pct": "converged runs only: the largest rise of the RMS error above its lowest "
                     "value so far, in % of the initial RMS error (0 for a monotone decrease)",
    "final_pose_error_mm": "ground truth (simulated cell): distance between the camera's final "
                           "and taught positions",
    "final_pose_error_deg": "ground truth (simulated cell): angle between the camera's final "
                            "and taught orientations",
    "estimated_pose_error_mm": "the node's estimate of the final camera position error",
    "estimated_pose_error_deg": "the node's estimate of the final camera orientation error",
    "tolerance_mm": "control.tolerance_mm of the run (0 or None: arrival not judged in mm)",
    "tolerance_deg": "control.tolerance_deg of the run (0 or None: arrival not judged in deg)",
    "peak_joint_speed_ratio": "largest measured |joint speed| over its limit in use (URDF "
                              "velocity x limits.joint_velocity_scale); 1 = at the limit",
    "peak_joint_accel_ratio": "largest commanded |joint acceleration| (command change per "
                              "output period) over limits.joint_acceleration",
    "peak_tool_speed_ratio": "largest tool-point linear speed over limits.tool_linear_speed",
    "peak_camera_speed_ratio": "largest camera linear speed over limits.camera_linear_speed",
    "peak_angular_speed_ratio": "largest tool angular speed over limits.angular_speed",
    "peak_translation_ratio": "largest tool translation from the start pose over "
                              "limits.max_translation_m",
    "peak_rotation_ratio": "largest tool rotation from the start pose over "
                           "limits.max_rotation_deg",
    "min_joint_limit_margin": "closest approach of any joint to its URDF position limit, rad "
                              "(m for prismatic joints)",
}


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


def ideal_decay(t: np.ndarray, gain: np.ndarray, rms0: float) -> np.ndarray:
    """RMS error of the ideal closed loop e_dot = -lambda(t) e from rms0 at t[0]:
    rms0 exp(-integral of lambda dt) (Chaumette & Hutchinson 2006, Part I, sec. II: exponential
    decoupled decrease), the integral by the trapezoid rule over the recorded gains."""
    lam = np.nan_to_num(np.asarray(gain, float))
    integral = np.concatenate(([0.0], np.cumsum(0.5 * (lam[1:] + lam[:-1]) * np.diff(t))))
    return rms0 * np.exp(-integral)


def time_to_tolerance(t: np.ndarray, rms: np.ndarray, tol: float) -> float | None:
    """Time from t[0] until the RMS error enters [0, tol] for good (it stays there for the rest
    of the records): the settling-time idea of a step response. None if it ends above tol."""
    ok = np.isfinite(rms)
    t, rms = t[ok], rms[ok]
    if rms.size == 0 or rms[-1] > tol:
        return None
    above = np.flatnonzero(rms > tol)
    k = above[-1] + 1 if above.size else 0
    return float(t[k] - t[0])


def rebound(rms: np.ndarray) -> float:
    """Largest rise of a non-negative error signal above its lowest value so far (same unit):
    0 for a monotone decrease. For a scalar error that passes zero it is the classic overshoot
    (the excursion past the goal), so ``100 * rebound / initial`` is the overshoot in %."""
    r = np.asarray(rms, float)
    r = r[np.isfinite(r)]
    if r.size == 0:
        return 0.0
    return float(np.max(r - np.minimum.accumulate(r)))


def overshoot_px(error: np.ndarray) -> float:
    """Largest excursion (px) of any feature-error component past zero, to the side opposite
    its first finite value, error (T, 2N). Meaningful for straight approaches only (a turn
    about the optical axis moves points on arcs, whose components cross zero by design); the
    run's headline overshoot is :func:`rebound` of the RMS error."""
    worst = 0.0
    for column in np.asarray(error, float).T:
        finite = column[np.isfinite(column)]
        if finite.size and finite[0] != 0:
            worst = max(worst, float(np.max(-np.sign(finite[0]) * finite)))
    return worst


def halt_events(t: np.ndarray, states: np.ndarray, reasons: np.ndarray,
                details: np.ndarray | None = None) -> list[dict]:
    """Entries into braking/halted from any other state: [{t_s, state, reason, detail}]."""
    events, previous = [], None
    details = details if details is not None else [None] * len(t)
    for ti, state, reason, detail in zip(t, states, reasons, details):
        if state in HALT_STATES and previous not in HALT_STATES:
            events.append({"t_s": float(ti), "state": str(state), "reason": reason or "",
                           "detail": detail or ""})
        previous = state
    return events


def limit_activations(limits_acted: np.ndarray) -> dict[str, int]:
    """Number of status records in which each limit shaped the command."""
    return dict(Counter(name for acted in limits_acted for name in (acted or [])))


def _num(x) -> float | None:
    """JSON-friendly float: None for NaN/inf/None."""
    if x is None:
        return None
    x = float(x)
    return x if math.isfinite(x) else None


def ratio(peak, limit) -> float | None:
    """peak / limit; None when either is unknown or the limit is not positive."""
    if peak is None or limit is None or not limit > 0:
        return None
    return _num(peak / limit)


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


def compute_metrics(run: RunData, tolerance_px: float | None = None,
                    motion: Motion | None = None, command: Command | None = None) -> dict:
    """Metrics of one run (JSON-ready; None where the record does not tell). See DEFINITIONS.

    tolerance_px: overrides control.tolerance_px of params.yaml. motion, command: from
    `motion_of_run` and `command_of_run` (computed here when None).
    """
    st, t = run.status, run.status_t
    k0 = start_index(run)
    p = run_params(run)
    result = run.result or {}
    tol = tolerance_px if tolerance_px is not None else p.get("control.tolerance_px")
    out: dict = {"run": _run_name(run), "run_id": result.get("run_id"), "piece": None,
                 "verdict": "incomplete", "converged": None, "reason": "", "detail": "",
                 "n_cycles": int(t.size), "t_start_s": None, "duration_s": None,
                 "time_to_converge_s": None, "time_to_halt_s": None,
                 "node_run_time_s": _num(result.get("time_s")),
                 "initial_rms_px": None, "final_rms_px": None, "tolerance_px": _num(tol),
                 "time_to_tolerance_s": None, "overshoot_pct": None}
    if run.piece is not None:
        out["piece"] = {"file": run.piece.file, "index": run.piece.index,
                        "count": run.piece.count, "t0_s": run.piece.t0_s,
                        "t1_s": run.piece.t1_s}
    # --- verdict: the run result when the record holds it, else the last status record
    states = st["state"].astype(str) if t.size else np.array([], str)
    ended = [i for i, s in enumerate(states) if s in ("converged", "halted")]
    if "converged" in result:
        out["converged"] = bool(result["converged"])
    elif ended:
        out["converged"] = states[ended[-1]] == "converged"
    if out["converged"] is not None:
        out["verdict"] = "converged" if out["converged"] else "halted"
    halts = halt_events(t, states, st["reason"], st.get("detail"))
    last_reason = next((r for r in st["reason"][::-1] if r), "") if t.size else ""
    out["reason"] = (result.get("reason") or (halts[-1]["reason"] if halts else "")
                     or ("" if out["converged"] else last_reason) or "")
    out["detail"] = result.get("detail") or (halts[-1]["detail"] if halts else "") or ""
    if k0 is not None:
        ts, rms = t[k0:], st["rms_px"][k0:]
        finite = np.flatnonzero(np.isfinite(rms))
        out.update(run_id=out["run_id"] or st["run_id"][k0], t_start_s=float(ts[0]),
                   duration_s=float(ts[-1] - ts[0]))
        if finite.size:
            out.update(initial_rms_px=float(rms[finite[0]]), final_rms_px=float(rms[finite[-1]]))
        if tol is not None:
            out["time_to_tolerance_s"] = time_to_tolerance(ts, rms, float(tol))
        if out["converged"] is not None:
            final = "converged" if out["converged"] else "halted"
            end = next((i for i in ended if states[i] == final and i >= k0), None)
            key = "time_to_converge_s" if out["converged"] else "time_to_halt_s"
            # the record's clock; the node's own time only when the end was not recorded
            out[key] = (float(t[end] - t[k0]) if end is not None
                        else out["node_run_time_s"] if run.piece is None else None)
        if out["converged"] and out["initial_rms_px"]:
            out["overshoot_pct"] = 100.0 * rebound(rms) / out["initial_rms_px"]
    if result.get("final_rms_px") is not None:
        out["final_rms_px"] = _num(result["final_rms_px"])
    out.update(_pose_errors(run, result))
    out.update(tolerance_mm=_num(p.get("control.tolerance_mm")),
               tolerance_deg=_num(p.get("control.tolerance_deg")))
    cycle = st["cycle_ms"][np.isfinite(st["cycle_ms"])]
    out.update(
        n_halts=len(halts), halts=halts, limit_activations=limit_activations(st["limits_acted"]),
        cycle_ms_mean=_num(cycle.mean()) if cycle.size else None,
        cycle_ms_p95=_num(np.percentile(cycle, 95)) if cycle.size else None,
        cycle_ms_max=_num(cycle.max()) if cycle.size else None)
    arm = None
    if motion is None:
        arm = arm_of_run(run)
        motion = motion_of_run(run, arm)
    out.update(_motion_figures(run, motion, command, p))
    return out


def _run_name(run: RunData) -> str:
    path = Path(run.path)
    return path.name if path.is_dir() or run.piece is None else f"{path.parent.name}/{path.name}"


def _pose_errors(run: RunData, result: dict) -> dict:
    """Ground truth (result, else the truth topics' last samples) and the node's estimate
    (result estimated_* fields, else the last status pose_error_*)."""
    out = {"final_pose_error_mm": _num(result.get("final_pose_error_mm")),
           "final_pose_error_deg": _num(result.get("final_pose_error_deg")),
           "estimated_pose_error_mm": None, "estimated_pose_error_deg": None}
    if out["final_pose_error_mm"] is None and run.camera_truth is not None \
            and run.taught_pose is not None and len(run.camera_truth.t):
        moved, turned = frames.pose_error(pose_of(run.taught_pose.values[-1]),
                                          pose_of(run.camera_truth.values[-1]))
        out.update(final_pose_error_mm=1e3 * moved, final_pose_error_deg=math.degrees(turned))
    for key, value in result.items():
        if key.startswith("estimated_pose_error"):
            out[key] = _num(value) if isinstance(value, (int, float)) else value
    for unit in ("mm", "deg"):
        column = run.status.get(f"pose_error_{unit}")
        key = f"estimated_pose_error_{unit}"
        if out[key] is None and column is not None and column.dtype == float:
            finite = column[np.isfinite(column)]
            out[key] = float(finite[-1]) if finite.size else None
    return out


def _motion_figures(run: RunData, motion: Motion | None, command: Command | None,
                    p: dict) -> dict:
    out = dict(peak_joint_speed_ratio=None, peak_joint_speed_joint=None,
               peak_joint_accel_ratio=None, peak_joint_accel_joint=None,
               peak_tool_speed_m_s=None, tool_speed_limit_m_s=None, peak_tool_speed_ratio=None,
               peak_camera_speed_m_s=None, camera_speed_limit_m_s=None,
               peak_camera_speed_ratio=None, peak_angular_speed_rad_s=None,
               angular_speed_limit_rad_s=None, peak_angular_speed_ratio=None,
               peak_translation_m=None, peak_translation_ratio=None, peak_rotation_deg=None,
               peak_rotation_ratio=None, min_joint_limit_margin=None, final_joints=None)
    if motion is None:
        return out
    speed_ratio = np.abs(motion.qdot) / motion.qdot_max
    if np.any(np.isfinite(speed_ratio)):
        j = int(np.nanargmax(np.nanmax(speed_ratio, axis=0)))
        out.update(peak_joint_speed_ratio=_num(np.nanmax(speed_ratio)),
                   peak_joint_speed_joint=motion.joint_names[j])
    command = command if command is not None else command_of_run(run, motion.joint_names)
    if command is not None and motion.qddot_max is not None and len(command.accel):
        accel_ratio = np.abs(command.accel) / motion.qddot_max
        if np.any(np.isfinite(accel_ratio)):
            j = int(np.nanargmax(np.nanmax(accel_ratio, axis=0)))
            out.update(peak_joint_accel_ratio=_num(np.nanmax(accel_ratio)),
                       peak_joint_accel_joint=motion.joint_names[j])
    margin = np.minimum(motion.q - motion.lower, motion.upper - motion.q)
    out["min_joint_limit_margin"] = _num(np.min(margin))
    for name, series, limit in (("tool_speed", motion.tool_speed, motion.tool_speed_max),
                                ("camera_speed", motion.camera_speed, motion.camera_speed_max),
                                ("angular_speed", motion.angular_speed,
                                 motion.angular_speed_max)):
        unit = "rad_s" if name == "angular_speed" else "m_s"
        peak = _num(series.max()) if series is not None and series.size else None
        out[f"peak_{name}_{unit}"] = peak
        out[f"{name}_limit_{unit}"] = limit
        out[f"peak_{name}_ratio"] = ratio(peak, limit)
    moved, turned = envelope_path(run, motion)
    if moved is not None:
        out["peak_translation_m"] = _num(moved.max())
        out["peak_rotation_deg"] = _num(turned.max())
        out["peak_translation_ratio"] = ratio(out["peak_translation_m"],
                                              p.get("limits.max_translation_m"))
        out["peak_rotation_ratio"] = ratio(out["peak_rotation_deg"],
                                           p.get("limits.max_rotation_deg"))
    out["final_joints"] = {n: float(v) for n, v in zip(motion.joint_names, motion.q[-1])}
    return out


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


def episode_figures(result, values: dict) -> dict:
    """A headless episode's result (vservo_node.episode.EpisodeResult) in the names and
    definitions of :func:`compute_metrics`, for the sweep's table. ``values``: the episode's
    validated controller parameters. Speeds there are of the true arm, as a record's are of
    the measured joints."""
    converged = bool(result.converged)
    limits = {"joint": float(values["limits.joint_velocity_scale"]),
              "tool": float(values["limits.tool_linear_speed"]),
              "camera": float(values["limits.camera_linear_speed"]),
              "angular": float(values["limits.angular_speed"])}
    initial = _num(result.initial_rms_px)
    return {
        "verdict": "converged" if converged else "halted", "converged": converged,
        "reason": result.reason or "",
        "time_to_converge_s": _num(result.time_s) if converged else None,
        "time_to_halt_s": None if converged else _num(result.time_s),
        "initial_rms_px": initial, "final_rms_px": _num(result.final_rms_px),
        "final_pose_error_mm": _num(result.pose_error_mm),
        "final_pose_error_deg": _num(result.pose_error_deg),
        # EpisodeResult's ratio is of the URDF limit; ours of the limit in use
        "peak_joint_speed_ratio": ratio(result.peak_joint_speed_ratio, limits["joint"]),
        "peak_tool_speed_m_s": _num(result.peak_tool_speed),
        "peak_tool_speed_ratio": ratio(result.peak_tool_speed, limits["tool"]),
        "peak_camera_speed_m_s": _num(result.peak_camera_speed),
        "peak_camera_speed_ratio": ratio(result.peak_camera_speed, limits["camera"]),
        "peak_angular_speed_rad_s": _num(result.peak_angular_speed),
        "peak_angular_speed_ratio": ratio(result.peak_angular_speed, limits["angular"]),
        "min_joint_limit_margin": _num(result.min_limit_margin),
        "camera_depth_change_max_m": _num(result.camera_depth_change_max),
    }


def result_metrics(result: dict | None) -> dict:
    """What a run result alone (interface.RESULT_FIELDS) says, in compute_metrics' names: for
    a run without a record. Figures that need the record are None."""
    result = result or {}
    converged = result.get("converged")
    out = {k: None for k in ("run", "run_id", "time_to_converge_s", "time_to_halt_s",
                             "final_rms_px", "tolerance_px", "final_pose_error_mm",
                             "final_pose_error_deg", "estimated_pose_error_mm",
                             "estimated_pose_error_deg", "peak_joint_speed_ratio",
                             "peak_joint_speed_joint", "peak_tool_speed_m_s",
                             "peak_tool_speed_ratio")}
    out.update(run_id=result.get("run_id"), converged=None if converged is None else
               bool(converged), reason=result.get("reason") or "",
               detail=result.get("detail") or "", halts=[], n_halts=0,
               verdict="incomplete" if converged is None else
               ("converged" if converged else "halted"))
    # the node's run time is on its own clock (image stamps against the start command): kept
    # apart, since the record clock's figures are unknown here
    out["node_run_time_s"] = _num(result.get("time_s"))
    for name in ("final_rms_px", "final_pose_error_mm", "final_pose_error_deg"):
        out[name] = _num(result.get(name))
    for name, value in result.items():
        if name.startswith("estimated_pose_error"):
            out[name] = _num(value) if isinstance(value, (int, float)) else value
    return out


# --- one line per headline figure: what demo, report and compare print --------------------------
def fmt(value, spec: str = ".3g", unit: str = "") -> str:
    """A number with its unit, or 'n/a'."""
    if value is None or (isinstance(value, float) and not math.isfinite(value)):
        return "n/a"
    return f"{format(value, spec)}{' ' + unit if unit else ''}"


def headline(m: dict) -> list[tuple[str, str]]:
    """(label, text) of the figures a user reads first, in order; the demo prints them, the
    report's verdict banner shows them, `vservo report` prints them."""
    rows = []
    node_time = ("" if m.get("node_run_time_s") is None
                 else f" (the node's own run time: {m['node_run_time_s']:.2f} s)")
    if m["verdict"] == "converged" and m.get("time_to_converge_s") is None:
        rows.append(("verdict", "converged" + node_time))
    elif m["verdict"] == "converged":
        rows.append(("verdict", f"converged in {fmt(m['time_to_converge_s'], '.2f', 's')}"))
    elif m["verdict"] == "halted":
        halts = m.get("halts") or []
        detected = (halts[-1]["t_s"] - m["t_start_s"]
                    if halts and m.get("t_start_s") is not None else None)
        rows.append(("verdict", f"halted: {m['reason'] or '(no reason)'}"
                     + (f", detected at {detected:.2f} s" if detected is not None else "")
                     + (f", stopped at {fmt(m['time_to_halt_s'], '.2f', 's')}"
                        if m.get("time_to_halt_s") is not None else node_time)))
    else:
        rows.append(("verdict", "no end of the run in this record"))
    if m.get("detail"):
        rows.append(("what fired", m["detail"]))
    rows.append(("final image error", f"{fmt(m['final_rms_px'], '.3f', 'px')} RMS " + (
        f"(tolerance {fmt(m['tolerance_px'], '.3g', 'px')})" if m.get("tolerance_px")
        else "(no pixel tolerance)" if m.get("tolerance_px") == 0 else "(tolerance n/a)")))
    if m.get("final_pose_error_mm") is not None:
        rows.append(("pose error (ground truth)",
                     f"{fmt(m['final_pose_error_mm'], '.3f', 'mm')}, "
                     f"{fmt(m['final_pose_error_deg'], '.3f', 'deg')}"))
    if m.get("estimated_pose_error_mm") is not None:
        tol = ((m.get("tolerance_mm") or 0) > 0 or (m.get("tolerance_deg") or 0) > 0)
        rows.append(("pose error (node's estimate)",
                     f"{fmt(m['estimated_pose_error_mm'], '.3f', 'mm')}, "
                     f"{fmt(m.get('estimated_pose_error_deg'), '.3f', 'deg')}"
                     + (f" (tolerance {fmt(m.get('tolerance_mm'), '.3g', 'mm')}, "
                        f"{fmt(m.get('tolerance_deg'), '.3g', 'deg')})" if tol else "")))
    if m.get("peak_joint_speed_ratio") is not None:
        rows.append(("peak joint speed", f"{fmt(100 * m['peak_joint_speed_ratio'], '.0f')} % "
                                         f"of its limit in use ({m['peak_joint_speed_joint']})"))
    if m.get("peak_tool_speed_m_s") is not None:
        rows.append(("peak tool speed", f"{fmt(1e3 * m['peak_tool_speed_m_s'], '.1f', 'mm/s')}"
                     + (f" ({fmt(100 * m['peak_tool_speed_ratio'], '.0f')} % of its limit)"
                        if m.get("peak_tool_speed_ratio") is not None else "")))
    return rows
