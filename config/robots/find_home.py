"""Find the `home` joint vector of a demo robot numerically and print it as YAML.

    .venv/bin/python config/robots/find_home.py config/robots/vs6_bench.yaml

Reads the robot YAML (urdf, frames, `home_goal`: camera position and URDF rpy in the base frame,
`home_seed`: a start configuration in the wanted posture branch, e.g. elbow up), then solves

    minimise   sum_i ((q_i - mid_i) / range_i)^2          (stay near the middle of the limits)
    subject to camera_pose(q) == home_goal               (position and orientation, 6 equations)
               lower + 0.1 rad <= q <= upper - 0.1 rad

with SciPy's SLSQP; the orientation error is the rotation vector of R_goal^T R_camera. For a
6-joint arm the constraint fixes q up to the posture branch, so the objective only picks the
branch-local solution; for the 7-joint arm it picks the self-motion point nearest mid-range.
Continuous joints count with a range of 2 pi around 0. Paste the printed `home:` block into the
YAML; tests/control/test_kinematics.py checks the stored pose.
"""
import sys
from pathlib import Path

import numpy as np
import yaml
from scipy.optimize import minimize
from scipy.spatial.transform import Rotation

from vservo_node.control.frames import transform_from_xyz_rpy
from vservo_node.control.kinematics import ArmModel

MARGIN = 0.1  # rad kept from each limit during the search


def solve_home(arm: ArmModel, T_base_goal: np.ndarray, seed: np.ndarray) -> np.ndarray:
    lower = np.where(arm.continuous, -np.pi, arm.lower)
    upper = np.where(arm.continuous, np.pi, arm.upper)
    mid, half_range = (lower + upper) / 2, (upper - lower) / 2

    def pose_residual(q):
        T = arm.camera_pose(q)
        rot = Rotation.from_matrix(T_base_goal[:3, :3].T @ T[:3, :3]).as_rotvec()
        return np.concatenate([T[:3, 3] - T_base_goal[:3, 3], rot])

    result = minimize(lambda q: np.sum(((q - mid) / half_range) ** 2), seed, method="SLSQP",
                      bounds=list(zip(lower + MARGIN, upper - MARGIN)),
                      constraints=[{"type": "eq", "fun": pose_residual}],
                      options={"ftol": 1e-12, "maxiter": 500})
    residual = np.abs(pose_residual(result.x)).max()
    if not result.success or residual > 1e-6:
        raise RuntimeError(f"no home pose found: {result.message}, residual {residual:.2e}")
    return result.x


def main(path: str) -> int:
    spec = yaml.safe_load(Path(path).read_text())
    arm = ArmModel.from_urdf_file(Path(path).parent / spec["urdf"], spec["base_frame"],
                                  spec["tool_frame"], spec["camera_frame"])
    goal = spec["home_goal"]
    T_base_goal = transform_from_xyz_rpy(goal["camera_xyz"], goal["camera_rpy"])
    q = solve_home(arm, T_base_goal, arm.q_from_mapping(spec["home_seed"]))
    print("home:")
    for name, value in zip(arm.joint_names, q):
        print(f"  {name}: {round(value, 4) + 0.0:.4f}")  # + 0.0: no "-0.0000"
    return 0


if __name__ == "__main__":
    sys.exit(main(sys.argv[1]))
