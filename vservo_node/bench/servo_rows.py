"""Servo.observe and Servo.command timed on a closed loop with N ideal points (no ROS).

N points on a square grid 0.4 m in front of the taught camera pose (invented cell), the arm
starting 2 cm / 5 deg off; each output tick times ``Servo.observe`` (a new frame every tick)
and ``Servo.command`` separately in CPU time of this thread (``time.thread_time``: other
processes sharing the core do not count) while the run servos and settles.
Pose tolerance set, so the arrival estimate (control/pose_error.py) runs every frame as in a
run with control.tolerance_mm.
"""
from __future__ import annotations

import math
import time

import numpy as np

from vservo_node.control import frames
from vservo_node.control.kinematics import load_robot
from vservo_node.episode import PointScene, limits_for
from vservo_node.servo import Servo, ServoSettings
from vservo_node.sim.ik import solve_camera_pose
from vservo_node.vision.camera import CameraModel

ROBOTS = {6: "vs6_bench", 7: "vs7_bench"}


def grid(n: int, half_m: float = 0.06, depth_m: float = 0.4) -> np.ndarray:
    """n points (a perfect square number or not) on a square grid, camera frame, metres."""
    side = int(math.ceil(math.sqrt(n)))
    u = np.linspace(-half_m, half_m, side)
    xy = np.array([(a, b) for b in u for a in u])[:n]
    # a slight tilt of the plane so the cell is not a degenerate fronto-parallel special case
    z = depth_m + 0.1 * xy[:, 0]
    return np.column_stack([xy, z])


def time_servo(joints: int, n_points: int, ticks: int = 300, rate_hz: float = 60.0):
    """(observe_ms, command_ms) arrays over ``ticks`` output ticks of one run."""
    robot = load_robot(ROBOTS[joints])
    arm = robot.arm
    camera = CameraModel.pinhole(640, 480, 600.0, 600.0, 319.5, 239.5)
    T_goal = arm.camera_pose(robot.home)
    points = grid(n_points)
    scene = PointScene((T_goal[:3, :3] @ points.T).T + T_goal[:3, 3], camera, arm)
    offset = frames.transform(frames.rpy_to_matrix([0.0, 0.0, math.radians(5.0)]),
                              [0.02, -0.01, 0.01])
    q = solve_camera_pose(arm, T_goal @ offset, robot.home, robot.home)
    settings = ServoSettings(tolerance_px=0.3, tolerance_mm=0.5, tolerance_deg=0.1,
                             dwell_s=0.5, max_run_s=60.0, depth_source="observed",
                             min_features=4)
    servo = Servo(arm, settings, limits_for(arm))
    servo.set_reference(scene.taught_view(robot.home))
    sense = scene.sense(depth="true")
    dt = 1.0 / rate_hz
    servo.enable(True, 0.0)
    ok, why = servo.start(q, 0.0)
    if not ok:
        raise RuntimeError(f"the bench run did not start: {why}")
    observe, command = [], []
    for k in range(ticks):
        t = k * dt
        obs = sense(q, t)
        t0 = time.thread_time()
        servo.observe(obs, q, t)
        t1 = time.thread_time()
        cmd, _ = servo.command(q, t, dt)
        t2 = time.thread_time()
        observe.append(1e3 * (t1 - t0))
        command.append(1e3 * (t2 - t1))
        if servo.state in ("converged", "halted"):
            if servo.state == "halted":
                raise RuntimeError(f"the bench run halted: {servo.reason} {servo.detail}")
            ok, why = servo.start(q, t)      # keep timing: a new run from where it stands
        q = q + cmd * dt
    return np.array(observe), np.array(command)

