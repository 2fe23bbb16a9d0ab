"""Hand-eye calibration: the camera's pose on the tool (or in the cell) from pose samples.

A **sample** is one arm pose with the target in view: ``T_base_tool`` from forward kinematics of
the reported joints (URDF chain, control/kinematics.py), ``T_camera_target`` from PnP of the
target model on the undistorted image points (control/pose_error.py), and those points (for the
reprojection error).

Two mountings (``MOUNTINGS``):

- ``hand`` (eye-in-hand): the camera rides on the tool, the target is fixed in the cell. The
  unknown is ``X = T_tool_camera`` (the node's ``robot.hand_eye``); the by-product is
  ``W = T_base_target``, and ``T_base_tool_i @ X @ T_camera_target_i = W`` for every sample.
- ``fixed`` (eye-to-hand): the camera is fixed in the cell, the target rides on the tool. The
  unknown is ``X = T_base_camera``; the by-product ``W = T_tool_target``, and
  ``inv(T_base_tool_i) @ X @ T_camera_target_i = W``.

Solvers, each reported with its residuals (``evaluate``):

- OpenCV's ``cv2.calibrateHandEye`` with all five methods: Tsai & Lenz, "A new technique for
  fully autonomous and efficient 3D robotics hand/eye calibration", IEEE T-RA 5(3), 1989;
  Park & Martin, "Robot sensor calibration: solving AX = XB on the Euclidean group", IEEE T-RA
  10(5), 1994; Horaud & Dornaika, "Hand-eye calibration", IJRR 14(3), 1995; Andreff, Horaud &
  Espiau, "On-line hand-eye calibration", 3DIM 1999; Daniilidis, "Hand-eye calibration using dual
  quaternions", IJRR 18(3), 1999. For the fixed camera the same solvers take the inverted arm
  poses (``T_tool_base``): the camera is then "on" the base as seen from the tool, and the
  result is ``T_base_camera`` (the usual eye-to-hand use of an AX = XB solver).
- OpenCV's ``cv2.calibrateRobotWorldHandEye`` (AX = ZB, both unknowns at once): Shah, "Solving
  the robot-world/hand-eye calibration problem using the Kronecker product", J. Mech. Robot.
  5(3), 2013; Li, Wang & Wu, "Simultaneous robot-world and hand-eye calibration using
  dual-quaternions and Kronecker product", Int. J. Phys. Sci. 5(10), 2010.
- An independent least-squares solve (``refine``): ``X`` and ``W`` together minimising the
  reprojection error of every target point in every sample (SciPy ``least_squares``, trust
  region reflective), started from the OpenCV solution with the smallest reprojection error;
  its covariance ``s^2 (J^T J)^-1`` at the optimum (Hartley & Zisserman, Multiple View Geometry,
  2nd ed. 2003, ch. 5, covariance of a least-squares estimate; from memory) gives the standard
  deviations reported as ``std_mm`` / ``std_deg``.

Residuals of a solution: ``consistency_mm`` / ``_deg``, the RMS spread of the ``W`` each sample
implies around their mean (a perfect ``X`` makes them all one), and ``reprojection_px``, the
RMS distance between the observed points and the target model put through ``W``, ``X`` and the
arm pose (normalized units times the focal length).

Sample spread (``spread``): the rotation part of AX = XB has a unique solution only when the
relative motions include two with non-parallel rotation axes (Tsai & Lenz 1989, sec. III; from
memory, and checked by ``tests/calib/test_handeye.py`` where parallel axes leave the
translation along the axis unobservable), and the error shrinks as the angles between the axes
and the relative rotation angles grow (Tsai & Lenz 1989, observations of sec. IV; from memory).
The thresholds below are common practice, no source.
"""
from __future__ import annotations

import math
from dataclasses import dataclass, field

import cv2
import numpy as np
from scipy.optimize import least_squares
from scipy.spatial.transform import Rotation

from vservo_node.control import frames

MOUNTINGS = ("hand", "fixed")
# fewest samples any solver accepts: two relative motions with non-parallel axes need three
# poses (Tsai & Lenz 1989, sec. III; from memory)
MIN_SAMPLES = 3
# fewer samples than this: warned (common practice, no source)
RECOMMENDED_SAMPLES = 10
# the largest angle between the rotation axes of two relative motions below this: warned as
# "rotation axes nearly parallel" (common practice, no source)
MIN_AXIS_SPREAD_DEG = 20.0
# the largest relative rotation between two samples below this: warned (common practice)
MIN_ROTATION_DEG = 15.0
# relative motions turning less than this have no meaningful axis (common practice)
AXIS_MIN_ANGLE_DEG = 2.0

HAND_EYE_METHODS = {
    "tsai_lenz_1989": cv2.CALIB_HAND_EYE_TSAI,
    "park_martin_1994": cv2.CALIB_HAND_EYE_PARK,
    "horaud_dornaika_1995": cv2.CALIB_HAND_EYE_HORAUD,
    "andreff_1999": cv2.CALIB_HAND_EYE_ANDREFF,
    "daniilidis_1999": cv2.CALIB_HAND_EYE_DANIILIDIS,
}
ROBOT_WORLD_METHODS = {
    "shah_2013": cv2.CALIB_ROBOT_WORLD_HAND_EYE_SHAH,
    "li_2010": cv2.CALIB_ROBOT_WORLD_HAND_EYE_LI,
}
LEAST_SQUARES = "least_squares"


@dataclass(frozen=True)
class Sample:
    """One arm pose with the target in view (see the module doc).

    ``T_base_tool`` 4x4 (m); ``T_camera_target`` 4x4 from PnP; ``xy`` (N, 2) the observed
    undistorted normalized points; ``model`` (N, 3) the same points in the target frame, m;
    ``q`` the joints (rad, chain order) and ``t`` the time (s) it was taken at, for the record.
    """

    T_base_tool: np.ndarray
    T_camera_target: np.ndarray
    xy: np.ndarray
    model: np.ndarray
    q: tuple = ()
    t: float = math.nan


@dataclass
class Solution:
    """One solver's answer and its residuals. ``X``: ``T_tool_camera`` (hand) or
    ``T_base_camera`` (fixed); ``W``: ``T_base_target`` (hand) or ``T_tool_target`` (fixed).
    ``std_mm`` / ``std_deg``: one standard deviation of X's translation / rotation (least
    squares only, NaN otherwise)."""

    method: str
    X: np.ndarray
    W: np.ndarray
    reprojection_px: float
    consistency_mm: float
    consistency_deg: float
    std_mm: float = math.nan
    std_deg: float = math.nan
    error: str = ""

    def as_dict(self) -> dict:
        return {"method": self.method, "xyz_m": self.X[:3, 3].tolist(),
                "quat_xyzw": frames.matrix_to_quat(self.X[:3, :3]).tolist(),
                "reprojection_px": self.reprojection_px, "consistency_mm": self.consistency_mm,
                "consistency_deg": self.consistency_deg, "std_mm": self.std_mm,
                "std_deg": self.std_deg, "error": self.error}


@dataclass
class Spread:
    """How well the samples constrain the solve: counts, the largest relative rotation between
    two samples and the largest angle between the rotation axes of two relative motions."""

    n_samples: int
    max_rotation_deg: float
    axis_spread_deg: float
    warnings: list = field(default_factory=list)


@dataclass
class Calibration:
    """Every solver's answer (``solutions``), the chosen one (``best``: the least-squares
    solve) and the spread of the samples with its warnings."""

    mounting: str
    focal_px: float
    solutions: list
    best: Solution
    spread: Spread

    @property
    def warnings(self) -> list:
        return list(self.spread.warnings)


# ----------------------------------------------------------------------------- geometry
def check_mounting(mounting: str) -> str:
    if mounting not in MOUNTINGS:
        raise ValueError(f"mounting must be one of {MOUNTINGS} (hand: camera on the tool; "
                         f"fixed: camera in the cell, target on the tool), got {mounting!r}")
    return mounting


def predicted_camera_target(X, W, T_base_tool, mounting: str) -> np.ndarray:
    """``T_camera_target`` that ``X``, ``W`` and the arm pose imply (module doc)."""
    if mounting == "hand":
        return frames.invert(T_base_tool @ X) @ W
    return frames.invert(X) @ T_base_tool @ W


def implied_W(X, sample: Sample, mounting: str) -> np.ndarray:
    """The ``W`` one sample implies for a given ``X``."""
    if mounting == "hand":
        return sample.T_base_tool @ X @ sample.T_camera_target
    return frames.invert(sample.T_base_tool) @ X @ sample.T_camera_target


def mean_transform(Ts) -> np.ndarray:
    """Mean of rigid transforms: translations averaged, rotations by their chordal L2 mean
    (SciPy ``Rotation.mean``; Markley et al., "Averaging quaternions", JGCD 30(4), 2007)."""
    Ts = np.asarray(Ts, dtype=float)
    R = Rotation.from_matrix(Ts[:, :3, :3]).mean().as_matrix()
    return frames.transform(R, Ts[:, :3, 3].mean(axis=0))


def _project(T_camera_target, model) -> np.ndarray:
    p = model @ T_camera_target[:3, :3].T + T_camera_target[:3, 3]
    return p[:, :2] / p[:, 2:3]


def evaluate(method: str, X, samples, mounting: str, focal_px: float, W=None) -> Solution:
    """Residuals of ``X`` (and ``W``; default the mean of the implied ones) over ``samples``."""
    Ws = np.array([implied_W(X, s, mounting) for s in samples])
    W = mean_transform(Ws) if W is None else np.asarray(W, dtype=float)
    d_mm = np.linalg.norm(Ws[:, :3, 3] - W[:3, 3], axis=1) * 1e3
    d_deg = np.degrees(
        (Rotation.from_matrix(W[:3, :3]).inv() * Rotation.from_matrix(Ws[:, :3, :3])).magnitude())
    residuals = np.concatenate([
        (_project(predicted_camera_target(X, W, s.T_base_tool, mounting), s.model) - s.xy).ravel()
        for s in samples])
    return Solution(method, np.asarray(X, dtype=float), W,
                    float(np.sqrt(np.mean(residuals ** 2) * 2.0) * focal_px),
                    float(np.sqrt(np.mean(d_mm ** 2))), float(np.sqrt(np.mean(d_deg ** 2))))


# ----------------------------------------------------------------------------- solvers
def _rt(Ts):
    Ts = np.asarray(Ts, dtype=float)
    return [T[:3, :3].copy() for T in Ts], [T[:3, 3].reshape(3, 1).copy() for T in Ts]


def opencv_solutions(samples, mounting: str, focal_px: float) -> list[Solution]:
    """Every OpenCV solver's answer, evaluated; a solver that fails gives a Solution with
    ``error`` set and NaN residuals, never an exception."""
    mounting = check_mounting(mounting)
    tool = np.array([s.T_base_tool for s in samples])
    cam = np.array([s.T_camera_target for s in samples])
    inv_tool = np.array([frames.invert(T) for T in tool])
    out = []
    # AX = XB: gripper2base = T_base_tool (hand) or T_tool_base (fixed); target2cam =
    # T_camera_target; the answer cam2gripper is X
    R_g, t_g = _rt(tool if mounting == "hand" else inv_tool)
    R_c, t_c = _rt(cam)
    for name, flag in HAND_EYE_METHODS.items():
        out.append(_guarded(name, lambda flag=flag: _from_rt(
            *cv2.calibrateHandEye(R_g, t_g, R_c, t_c, method=flag)), samples, mounting, focal_px))
    # AX = ZB: world2cam_i = gripper2cam @ base2gripper_i @ world2base. Hand: world = target,
    # so world2cam = T_camera_target, base2gripper = T_tool_base, gripper2cam = inv(X).
    # Fixed: the roles turn round: "cam" = target, "world" = camera, "gripper" = tool, so
    # world2cam = T_target_camera, base2gripper = T_tool_base, base2world = T_camera_base.
    R_w, t_w = _rt(cam if mounting == "hand" else [frames.invert(T) for T in cam])
    R_b, t_b = _rt(inv_tool)
    for name, flag in ROBOT_WORLD_METHODS.items():
        def solve(flag=flag):
            R_bw, t_bw, R_gc, t_gc = cv2.calibrateRobotWorldHandEye(R_w, t_w, R_b, t_b,
                                                                    method=flag)
            if mounting == "hand":
                return frames.invert(_from_rt(R_gc, t_gc))
            return frames.invert(_from_rt(R_bw, t_bw))
        out.append(_guarded(name, solve, samples, mounting, focal_px))
    return out


def _from_rt(R, t) -> np.ndarray:
    R = np.asarray(R, dtype=float)
    # re-orthonormalise (the solvers' rotations are orthonormal to ~1e-9)
    U, _, Vt = np.linalg.svd(R)
    R = U @ np.diag([1.0, 1.0, np.linalg.det(U @ Vt)]) @ Vt
    return frames.transform(R, np.asarray(t, dtype=float).ravel())


def _guarded(name, solve, samples, mounting, focal_px) -> Solution:
    try:
        X = solve()
        if not np.isfinite(X).all():
            raise ValueError("non-finite result")
        return evaluate(name, X, samples, mounting, focal_px)
    except (cv2.error, ValueError, np.linalg.LinAlgError) as exc:
        nan = math.nan
        return Solution(name, np.full((4, 4), nan), np.full((4, 4), nan), nan, nan, nan,
                        error=str(exc).strip().splitlines()[-1][:200])


def refine(samples, mounting: str, X0, W0, focal_px: float) -> Solution:
    """The least-squares solve of ``X`` and ``W`` over the reprojection error (module doc),
    from the start ``X0``, ``W0``; ``std_mm`` / ``std_deg`` from its covariance."""
    mounting = check_mounting(mounting)
    X0, W0 = np.asarray(X0, dtype=float), np.asarray(W0, dtype=float)
    xy = np.concatenate([s.xy for s in samples])

    def unpack(p):
        # local perturbations of the start: X = X0 @ exp(p[:3]) with translation X0.t + p[3:6]
        X = frames.transform(X0[:3, :3] @ Rotation.from_rotvec(p[0:3]).as_matrix(),
                             X0[:3, 3] + p[3:6])
        W = frames.transform(W0[:3, :3] @ Rotation.from_rotvec(p[6:9]).as_matrix(),
                             W0[:3, 3] + p[9:12])
        return X, W

    def residuals(p):
        X, W = unpack(p)
        return np.concatenate([
            (_project(predicted_camera_target(X, W, s.T_base_tool, mounting), s.model)
             - s.xy).ravel() for s in samples]) * focal_px

    fit = least_squares(residuals, np.zeros(12), method="trf", x_scale=1.0, xtol=1e-12,
                        ftol=1e-12, gtol=1e-12, max_nfev=200)
    X, W = unpack(fit.x)
    solution = evaluate(LEAST_SQUARES, X, samples, mounting, focal_px, W=W)
    dof = max(xy.size - 12, 1)
    s2 = float(fit.fun @ fit.fun) / dof
    try:
        cov = np.linalg.inv(fit.jac.T @ fit.jac) * s2
        solution.std_deg = math.degrees(math.sqrt(max(np.trace(cov[0:3, 0:3]), 0.0)))
        solution.std_mm = 1e3 * math.sqrt(max(np.trace(cov[3:6, 3:6]), 0.0))
    except np.linalg.LinAlgError:
        solution.error = "singular normal matrix: the samples do not fix every parameter"
    return solution


# ----------------------------------------------------------------------------- spread
def spread(samples, mounting: str = "hand") -> Spread:
    """Counts and angles of the samples' relative tool motions, with warnings (module doc)."""
    n = len(samples)
    tool = [s.T_base_tool for s in samples]
    rotvecs = []
    for i in range(n):
        for j in range(i + 1, n):
            A = frames.invert(tool[i]) @ tool[j]
            rotvecs.append(Rotation.from_matrix(A[:3, :3]).as_rotvec())
    rotvecs = np.array(rotvecs).reshape(-1, 3)
    angles = np.degrees(np.linalg.norm(rotvecs, axis=1)) if len(rotvecs) else np.zeros(0)
    max_rotation = float(angles.max()) if angles.size else 0.0
    axes = rotvecs[angles > AXIS_MIN_ANGLE_DEG]
    axes = axes / np.linalg.norm(axes, axis=1, keepdims=True) if len(axes) else axes
    axis_spread = 0.0
    if len(axes) >= 2:
        cos = np.clip(np.abs(axes @ axes.T), 0.0, 1.0)    # an axis and its reverse are parallel
        axis_spread = float(np.degrees(np.arccos(cos.min())))
    warnings = []
    if n < MIN_SAMPLES:
        warnings.append(f"{n} samples: a hand-eye needs at least {MIN_SAMPLES} (two relative "
                        "motions with non-parallel rotation axes)")
    elif n < RECOMMENDED_SAMPLES:
        warnings.append(f"only {n} samples; take {RECOMMENDED_SAMPLES} or more (common practice,"
                        " no source)")
    if n >= 2 and axis_spread < MIN_AXIS_SPREAD_DEG:
        warnings.append(f"rotation axes nearly parallel: the relative motions' axes differ by "
                        f"{axis_spread:.1f} deg at most (expected >= {MIN_AXIS_SPREAD_DEG:g} deg; "
                        "tilt the tool about two or three different axes between samples)")
    if n >= 2 and max_rotation < MIN_ROTATION_DEG:
        warnings.append(f"small rotations: the tool turns {max_rotation:.1f} deg at most between "
                        f"samples (expected >= {MIN_ROTATION_DEG:g} deg)")
    return Spread(n, max_rotation, axis_spread, warnings)


# ----------------------------------------------------------------------------- calibrate
def calibrate(samples, mounting: str, focal_px: float) -> Calibration:
    """Every solver, then the least-squares solve from the best OpenCV answer (module doc).

    ``focal_px``: the camera's focal length in pixels (mean of fx and fy), for pixel residuals.
    ValueError when there are too few samples or no solver gives an answer."""
    mounting = check_mounting(mounting)
    samples = list(samples)
    if len(samples) < MIN_SAMPLES:
        raise ValueError(f"{len(samples)} samples; a hand-eye needs at least {MIN_SAMPLES} "
                         "poses with the target in view, turned about different axes")
    if not focal_px > 0:
        raise ValueError(f"focal_px must be > 0, got {focal_px!r}")
    solutions = opencv_solutions(samples, mounting, focal_px)
    good = [s for s in solutions if not s.error and math.isfinite(s.reprojection_px)]
    if not good:
        raise ValueError("no solver found a hand-eye: " + "; ".join(
            f"{s.method}: {s.error}" for s in solutions))
    start = min(good, key=lambda s: s.reprojection_px)
    best = refine(samples, mounting, start.X, start.W, focal_px)
    solutions.append(best)
    return Calibration(mounting, float(focal_px), solutions, best, spread(samples, mounting))


# ----------------------------------------------------------------------------- output
def xyz_quat(T) -> list[float]:
    """``[x, y, z, qx, qy, qz, qw]`` of a transform (the ``robot.hand_eye`` layout)."""
    return [*map(float, T[:3, 3]), *map(float, frames.matrix_to_quat(T[:3, :3]))]


def matrix_to_rpy(R) -> np.ndarray:
    """URDF roll-pitch-yaw (rad) of a rotation: the inverse of ``frames.rpy_to_matrix``."""
    return Rotation.from_matrix(np.asarray(R, dtype=float)).as_euler("xyz")


def params_snippet(cal: Calibration, node: str = "vservo") -> str:
    """The result as a parameter file (ROS 2 layout, ``/**/<node>`` like config/vservo_sim.yaml)
    in the schema's layout (vservo_node/params.py): hand: ``robot.hand_eye``; fixed:
    ``robot.camera_mount: fixed``, ``robot.fixed_camera_pose`` (the camera in the base frame)
    and ``robot.target_on_tool`` (the target on the tool, solved with it)."""
    def seven(T):
        return ", ".join(f"{v:.6f}" for v in xyz_quat(T))

    head = (f"# hand-eye from {cal.spread.n_samples} samples ({cal.mounting} mounting): "
            f"reprojection {cal.best.reprojection_px:.3f} px RMS, +-{cal.best.std_mm:.3f} mm, "
            f"+-{cal.best.std_deg:.4f} deg (1 sigma)\n"
            f"/**/{node}:\n  ros__parameters:\n    robot:\n")
    if cal.mounting == "hand":
        return (head + f"      hand_eye: [{seven(cal.best.X)}]   # x, y, z (m), qx, qy, qz, qw "
                "of T_tool_camera\n")
    return (head + "      camera_mount: fixed\n"
            f"      fixed_camera_pose: [{seven(cal.best.X)}]   # T_base_camera\n"
            f"      target_on_tool: [{seven(cal.best.W)}]   # T_tool_target\n")


def urdf_snippet(cal: Calibration, parent: str, child: str,
                 name: str = "camera_optical_joint") -> str:
    """A URDF fixed joint placing ``child`` (the camera optical frame) on ``parent`` (the tool
    frame for the hand mounting, the base frame for the fixed one)."""
    xyz = " ".join(f"{v:.6f}" for v in cal.best.X[:3, 3])
    rpy = " ".join(f"{v:.6f}" for v in matrix_to_rpy(cal.best.X[:3, :3]))
    return (f'<joint name="{name}" type="fixed">\n  <parent link="{parent}"/>\n'
            f'  <child link="{child}"/>\n  <origin xyz="{xyz}" rpy="{rpy}"/>\n</joint>\n')


def pose_difference(T_a, T_b) -> tuple[float, float]:
    """(mm, deg) between two transforms."""
    m, r = frames.pose_error(T_a, T_b)
    return m * 1e3, math.degrees(r)


def format_table(cal: Calibration, truth=None) -> str:
    """One line per solver: its X, residuals and (with ``truth``) its distance from it."""
    lines = [f"{'method':22s} {'x':>9s} {'y':>9s} {'z':>9s} {'rx':>8s} {'ry':>8s} {'rz':>8s} "
             f"{'reproj px':>9s} {'cons mm':>8s} {'cons deg':>8s}"
             + ("   vs truth mm/deg" if truth is not None else "")]
    for s in cal.solutions:
        if s.error:
            lines.append(f"{s.method:22s} failed: {s.error}")
            continue
        rv = np.degrees(Rotation.from_matrix(s.X[:3, :3]).as_rotvec())
        line = (f"{s.method:22s} {s.X[0, 3]:9.5f} {s.X[1, 3]:9.5f} {s.X[2, 3]:9.5f} "
                f"{rv[0]:8.3f} {rv[1]:8.3f} {rv[2]:8.3f} {s.reprojection_px:9.3f} "
                f"{s.consistency_mm:8.3f} {s.consistency_deg:8.4f}")
        if truth is not None:
            mm, deg = pose_difference(truth, s.X)
            line += f"   {mm:.3f} / {deg:.4f}"
        lines.append(line)
    lines.append("(x y z in m; rx ry rz: rotation vector, deg; consistency: RMS spread of the "
                 "target pose each sample implies)")
    return "\n".join(lines)
