"""Headless closed-loop episodes: the Servo against a kinematic arm, no ROS, no clocks.

One loop serves the core tests, the demo's core part and the sweeps. Each period it senses
(features of the true camera pose), lets the Servo observe and command, and integrates the
joints with the command (an ideal velocity-controlled arm; sim/ adds lag, latency and noise).

Sensing is a callable ``sense(q, t) -> Observation | None`` so ideal projected points (this
module's :class:`PointScene`) and rendered-and-detected images (sim/) plug in alike.
"""
from __future__ import annotations

import math
from dataclasses import dataclass, field
from typing import Callable

import numpy as np

from vservo_node.control import frames
from vservo_node.control.safety import LimitSet
from vservo_node.servo import Observation, Servo, ServoSettings, TaughtView


@dataclass
class PointScene:
    """Target points fixed in the base frame, seen by a camera on the arm.

    ``points_base`` (N, 3) m; ``camera`` a CameraModel; ``arm_true`` the arm as it really is
    (its T_tool_camera is the true hand-eye, which may differ from what the servo believes).
    """

    points_base: np.ndarray
    camera: object
    arm_true: object
    keys: tuple = ()

    def __post_init__(self) -> None:
        self.points_base = np.asarray(self.points_base, dtype=float)
        if not self.keys:
            self.keys = tuple(range(len(self.points_base)))

    def view(self, q) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
        """(xy (N,2) normalized, uv (N,2) px, Z (N,) m) of the points at joint position q."""
        T_camera_base = frames.invert(self.arm_true.camera_pose(q))
        p = (T_camera_base[:3, :3] @ self.points_base.T).T + T_camera_base[:3, 3]
        xy = p[:, :2] / p[:, 2:3]
        return xy, self.camera.normalized_to_pixels(xy), p[:, 2]

    def taught_view(self, q_taught, depth_scale: float = 1.0) -> TaughtView:
        xy, uv, z = self.view(q_taught)
        return TaughtView(self.keys, xy, uv, z * depth_scale)

    def sense(self, depth: str = "true", depth_scale: float = 1.0
              ) -> Callable[[np.ndarray, float], Observation | None]:
        """A sensing callable: ideal features, with true depths scaled by depth_scale
        (depth='true') or none (depth='none': the servo's depth source decides)."""
        def _sense(q, t):
            xy, uv, z = self.view(q)
            if np.any(z <= 0):
                return None
            return Observation(self.keys, uv, xy, z * depth_scale if depth == "true" else None)
        return _sense


@dataclass
class EpisodeResult:
    converged: bool
    reason: str
    time_s: float
    final_rms_px: float
    pose_error_mm: float
    pose_error_deg: float
    peak_joint_speed_ratio: float       # max over time and joints of |dq| / URDF limit
    peak_tool_speed: float              # m/s, tool point
    peak_camera_speed: float            # m/s
    peak_angular_speed: float           # rad/s
    min_limit_margin: float             # rad, closest approach to a URDF position limit
    initial_rms_px: float
    camera_depth_change_max: float      # m, largest motion along the taught optical axis
    statuses: list = field(default_factory=list, repr=False)
    q_trace: np.ndarray | None = field(default=None, repr=False)
    camera_trace: np.ndarray | None = field(default=None, repr=False)

    def summary(self) -> dict:
        keys = ("converged", "reason", "time_s", "final_rms_px", "pose_error_mm",
                "pose_error_deg", "peak_joint_speed_ratio", "peak_tool_speed",
                "peak_camera_speed", "peak_angular_speed", "min_limit_margin", "initial_rms_px")
        return {k: getattr(self, k) for k in keys}


def run_episode(servo: Servo, sense, q0, T_base_camera_goal, arm_true, *, rate_hz: float = 100.0,
                duration_s: float = 15.0, tool_point=(0.0, 0.0, 0.0),
                record: bool = False) -> EpisodeResult:
    """Enable and start ``servo`` at q0, loop until the run ends or duration_s, and measure.

    ``T_base_camera_goal``: the true taught camera pose, for the pose error; ``arm_true``
    measures speeds and poses as they really are.
    """
    dt = 1.0 / rate_hz
    q = np.array(q0, dtype=float)
    servo.enable(True, 0.0)
    ok, why = servo.start(q, 0.0)
    if not ok:
        raise RuntimeError(f"servo refused to start: {why}")
    peaks = dict(joint=0.0, tool=0.0, camera=0.0, angular=0.0)
    margin = math.inf
    statuses, qs, cams = [], [], []
    axis = T_base_camera_goal[:3, 2]
    depth0 = float(axis @ arm_true.camera_pose(q)[:3, 3])
    depth_dev = 0.0
    initial_rms = math.nan
    t = 0.0
    steps = int(round(duration_s * rate_hz))
    for k in range(steps + 1):
        t = k * dt
        obs = sense(q, t)
        cmd, status = servo.step(obs, q, t, dt)
        if math.isnan(initial_rms) and not math.isnan(status["rms_px"]):
            initial_rms = status["rms_px"]
        peaks["joint"] = max(peaks["joint"], float(np.max(np.abs(cmd) /
                                                          arm_true.velocity_limits)))
        peaks["tool"] = max(peaks["tool"], float(np.linalg.norm(
            arm_true.point_jacobian_base(q, "tool", np.asarray(tool_point, float)) @ cmd)))
        peaks["camera"] = max(peaks["camera"], float(np.linalg.norm(
            arm_true.point_jacobian_base(q, "camera", np.zeros(3)) @ cmd)))
        peaks["angular"] = max(peaks["angular"], float(np.linalg.norm(
            arm_true.jacobian_base(q)[3:] @ cmd)))
        if record:
            statuses.append(status)
            qs.append(q.copy())
        T_cam = arm_true.camera_pose(q)
        depth_dev = max(depth_dev, abs(float(axis @ T_cam[:3, 3]) - depth0))
        if record:
            cams.append(T_cam[:3, 3].copy())
        if servo.state in ("converged", "halted"):
            break
        q = q + cmd * dt
        finite = np.isfinite(arm_true.lower)
        margin = min(margin, float(np.min(np.concatenate([
            (q - arm_true.lower)[finite], (arm_true.upper - q)[finite]]))))
    moved_m, turned = frames.pose_error(T_base_camera_goal, arm_true.camera_pose(q))
    result = servo.result or {"converged": False, "reason": "episode_timeout",
                              "final_rms_px": status["rms_px"], "time_s": t}
    return EpisodeResult(
        converged=bool(result["converged"]), reason=result["reason"] or "",
        time_s=float(result["time_s"]), final_rms_px=float(result["final_rms_px"]),
        pose_error_mm=moved_m * 1e3, pose_error_deg=math.degrees(turned),
        peak_joint_speed_ratio=peaks["joint"], peak_tool_speed=peaks["tool"],
        peak_camera_speed=peaks["camera"], peak_angular_speed=peaks["angular"],
        min_limit_margin=margin, initial_rms_px=initial_rms, camera_depth_change_max=depth_dev,
        statuses=statuses, q_trace=np.array(qs) if record else None,
        camera_trace=np.array(cams) if record else None)


def limits_for(arm, *, velocity_scale: float = 0.5, acceleration=2.0, position_margin=0.03,
               tool_linear_max=0.10, camera_linear_max=0.10, angular_max=0.6) -> LimitSet:
    """A LimitSet for ``arm`` from URDF velocity/position limits and the given settings."""
    accel = np.broadcast_to(np.asarray(acceleration, dtype=float), (arm.n,)).copy()
    return LimitSet(velocity=arm.velocity_limits.copy(), acceleration=accel,
                    lower=arm.lower + position_margin, upper=arm.upper - position_margin,
                    velocity_scale=velocity_scale, tool_linear_max=tool_linear_max,
                    camera_linear_max=camera_linear_max, angular_max=angular_max)


@dataclass(frozen=True)
class PointCase:
    """A core closed-loop case: the camera starts offset from its taught pose above four points.

    Offsets are in the taught camera frame: ``rotation_deg`` about the optical axis (z),
    ``tilt_deg`` about x, ``translation_m`` (x, y, z). The target is a centred square of
    half-side ``half_side_m`` at ``depth_m`` in front of the taught camera. Invented demo data.
    """

    robot: str = "vs7_bench"
    rotation_deg: float = 0.0
    translation_m: tuple = (0.0, 0.0, 0.0)
    tilt_deg: float = 0.0
    estimate: str = "blended"
    depth: str = "true"        # true: true per-point depth each image; taught: goal depths
    half_side_m: float = 0.05
    depth_m: float = 0.40
    tolerance_px: float = 0.05
    duration_s: float = 15.0
    rate_hz: float = 100.0


def run_point_case(case: PointCase, record: bool = False) -> EpisodeResult:
    """Build arm, camera and scene for ``case``, solve the start pose by IK, run the episode."""
    from vservo_node.control.kinematics import load_robot
    from vservo_node.sim.ik import solve_camera_pose
    from vservo_node.vision.camera import CameraModel

    robot = load_robot(case.robot)
    arm = robot.arm
    camera = CameraModel.pinhole(640, 480, 600.0, 600.0, 319.5, 239.5)
    T_goal = arm.camera_pose(robot.home)
    h = case.half_side_m
    square = np.array([[-h, -h], [h, -h], [h, h], [-h, h]])
    points_cam = np.column_stack([square, np.full(4, case.depth_m)])
    points_base = (T_goal[:3, :3] @ points_cam.T).T + T_goal[:3, 3]
    scene = PointScene(points_base, camera, arm)
    offset = frames.transform(
        frames.rpy_to_matrix([math.radians(case.tilt_deg), 0.0,
                              math.radians(case.rotation_deg)]), case.translation_m)
    q0 = solve_camera_pose(arm, T_goal @ offset, robot.home, robot.home)
    settings = ServoSettings(interaction_estimate=case.estimate,
                             tolerance_px=case.tolerance_px, dwell_s=0.2,
                             max_run_s=case.duration_s,
                             depth_source="observed" if case.depth == "true" else "taught")
    servo = Servo(arm, settings, limits_for(arm))
    servo.set_reference(scene.taught_view(robot.home))
    return run_episode(servo, scene.sense(depth="true" if case.depth == "true" else "none"),
                       q0, T_goal, arm, rate_hz=case.rate_hz, duration_s=case.duration_s,
                       record=record)
