"""Check a configured hand-eye against a recorded run: predicted against observed feature motion.

Between two frames the joints moved by ``dq``; through the URDF chain that is a tool twist
``V_tool = J_tool(q) dq`` (displacement over the interval, first order), and through the
believed hand-eye ``X^`` (``robot.hand_eye`` or the URDF) a camera twist
``V^ = Ad(inv(X^)) V_tool``. The features then move by ``ds = L(x, y, Z) V`` (point interaction
matrix: Chaumette & Hutchinson, "Visual servo control, Part I: Basic approaches", IEEE RAM
13(4), 2006, eq. 11), with ``V`` the *true* camera twist. If the true hand-eye is
``X = X^ @ E`` (``E``: the error, expressed in the believed camera frame, the convention of the
scenario files' ``hand_eye_error``), then ``V = Ad(inv(E)) V^`` (the adjoint of a rigid
transform: Lynch & Park, Modern Robotics, 2017, sec. 3.3.2; ``frames.twist_transform``).
With a fixed camera (``robot.camera_mount: fixed``) ``V^ = -Ad(inv(Y^) T_base_tool) V_tool``
with the believed camera pose ``Y^`` (``robot.fixed_camera_pose``; the eye-to-hand Jacobian of
control/mounting.py), and a camera pose error ``Y = Y^ @ E`` gives the same ``V = Ad(inv(E))
V^``: the check and its correction then concern ``robot.fixed_camera_pose``
(``Trace.camera_jacobian``).

``E`` is the least-squares fit (SciPy ``least_squares``) of the observed ``ds`` of every frame
pair of the run, the start nod included, to ``L Ad(inv(E)) V^``, summed over the frames of a
pair; the pairs lie back to back (no frame in two), each the shortest span whose predicted
motion reaches ``MIN_FLOW_PX``, so the joint and feature noise of nearly still frames does not
dominate. The standard deviations come from the covariance ``s^2 (J^T J)^-1`` at the optimum
(Hartley & Zisserman, Multiple View Geometry, 2nd ed. 2003, ch. 5; from memory), the pairs
treated as independent (neighbours share their end frame, so the figure is somewhat
optimistic). The rotation of ``E`` shows in every motion and is always observable; its
translation only through the camera's rotation (the twist transform's ``[t]x R`` block), so it
is reported only when its standard deviation is below ``TRANSLATION_OBSERVABLE_MM``. Depths:
per frame from the trace (PnP of the target model, or the taught depths); they only weigh the
translational flow.

A rotation error of ``LARGE_ERROR_DEG`` or more is named as the likely cause of a
``wrong_direction`` halt or a slow convergence: measured on the simulated cell (tray_offset,
headless, projected sensing), a believed hand-eye 10 deg / 20 mm off converged as fast as the
true one, one 20 deg / 30 mm off halted ``wrong_direction`` after 2.0 s (README, "Hand-eye
calibration").
"""
from __future__ import annotations

import math
from dataclasses import dataclass

import numpy as np
from scipy.optimize import least_squares
from scipy.spatial.transform import Rotation

from vservo_node.calib.trace import aligned
from vservo_node.control import frames
from vservo_node.control.interaction import point_interaction_matrix

LARGE_ERROR_DEG = 10.0
TRANSLATION_OBSERVABLE_MM = 10.0
# frame pairs whose predicted feature motion (RMS over the features) is below this carry more
# noise than direction: joint-state noise in the regressor biases a least-squares fit (errors
# in variables), measured here as a 1 deg / 100 mm bias on a converging run when every pair
# was used. Common practice, no source.
MIN_FLOW_PX = 0.5
MAX_SPAN_S = 0.5
ALIGN_ROUNDS = 3


@dataclass
class HandEyeCheck:
    """The hand-eye error ``E`` (true = believed @ E) estimated from a run: its rotation
    vector (deg, believed camera axes) and angle with one standard deviation, its translation
    (mm) with one standard deviation and whether it is observable; the RMS residual before and
    after the fit (px per feature coordinate per frame pair); the corrected hand-eye (the
    translation corrected only when observable)."""

    rotation_deg: float
    rotation_std_deg: float
    rotvec_deg: np.ndarray
    translation_mm: float
    translation_std_mm: float
    translation_observable: bool
    E: np.ndarray
    corrected: np.ndarray
    n_pairs: int
    residual_before_px: float
    residual_after_px: float
    image_lag_s: float = 0.0
    parameter: str = "robot.hand_eye"     # what ``corrected`` is a value of

    @property
    def large(self) -> bool:
        return self.rotation_deg - 2.0 * self.rotation_std_deg >= LARGE_ERROR_DEG

    def verdict(self) -> str:
        what = "hand-eye" if self.parameter == "robot.hand_eye" else "fixed camera pose"
        rot = (f"{what} rotation error {self.rotation_deg:.2f} +- {self.rotation_std_deg:.2f}"
               f" deg (1 sigma; axis {np.round(self.rotvec_deg, 2).tolist()} deg in the camera)")
        trans = (f"translation error {self.translation_mm:.1f} +- {self.translation_std_mm:.1f} "
                 "mm" if self.translation_observable else
                 f"translation not observable in this run (+- {self.translation_std_mm:.0f} mm)")
        text = f"{rot}; {trans}; from {self.n_pairs} frame pairs"
        if self.image_lag_s:
            text += f" (features {1e3 * self.image_lag_s:.1f} ms after the joints, aligned)"
        if self.large:
            text += (f". An error this large (>= {LARGE_ERROR_DEG:g} deg) is the likely cause of "
                     "a wrong_direction halt or a slow convergence: calibrate the hand-eye "
                     "(vservo handeye)")
        elif self.rotation_deg + 2.0 * self.rotation_std_deg < LARGE_ERROR_DEG:
            text += f". Below {LARGE_ERROR_DEG:g} deg: not a likely cause of a halt"
        return text

    def as_dict(self) -> dict:
        return {"rotation_deg": self.rotation_deg, "rotation_std_deg": self.rotation_std_deg,
                "rotvec_deg": np.asarray(self.rotvec_deg).tolist(),
                "translation_mm": self.translation_mm,
                "translation_std_mm": self.translation_std_mm,
                "translation_observable": self.translation_observable,
                "parameter": self.parameter,
                "corrected": [*map(float, self.corrected[:3, 3]),
                              *map(float, frames.matrix_to_quat(self.corrected[:3, :3]))],
                "n_pairs": self.n_pairs, "image_lag_s": self.image_lag_s,
                "residual_before_px": self.residual_before_px,
                "residual_after_px": self.residual_after_px, "large": self.large,
                "verdict": self.verdict()}


def frame_pairs(trace, min_flow_px: float = MIN_FLOW_PX, max_span_s: float = MAX_SPAN_S):
    """Frame pairs ``(a, b)`` of the run, back to back, each spanning the fewest frames whose
    predicted feature motion reaches ``min_flow_px`` (RMS over the features; at most
    ``max_span_s``): ``(ds (K, 2N), L (S, 2N, 6), V^ (S, 6), group (S,))``, the observed
    motion of each pair and the per-frame steps that make it up (``group`` numbers the pair)."""
    steps_L, steps_V, steps_g, ds = [], [], [], []
    pending_L, pending_V, flow, a = [], [], None, None
    for k in range(trace.n_frames - 1):
        dq = trace.q[k + 1] - trace.q[k]
        xy_mid = 0.5 * (trace.xy[k] + trace.xy[k + 1])
        Z = 0.5 * (trace.depth[k] + trace.depth[k + 1])
        if not (np.isfinite(dq).all() and np.isfinite(xy_mid).all() and np.isfinite(Z).all()
                and np.all(Z > 0)):
            pending_L, pending_V, flow, a = [], [], None, None   # a gap ends the pair
            continue
        if a is None:
            a, flow = k, 0.0
        q_mid = 0.5 * (trace.q[k] + trace.q[k + 1])
        V = trace.camera_jacobian(q_mid) @ dq       # believed camera twist
        L = point_interaction_matrix(xy_mid, Z)
        pending_L.append(L)
        pending_V.append(V)
        flow = flow + L @ V
        if trace.t[k + 1] - trace.t[a] > max_span_s:       # too slow: start afresh
            pending_L, pending_V, flow, a = [], [], None, None
            continue
        if math.sqrt(float(flow @ flow) * 2.0 / len(flow)) * trace.focal_px >= min_flow_px:
            g = len(ds)
            ds.append((trace.xy[k + 1] - trace.xy[a]).ravel())
            steps_L += pending_L
            steps_V += pending_V
            steps_g += [g] * len(pending_L)
            pending_L, pending_V, flow, a = [], [], None, None
    if len(ds) < 3:
        raise ValueError(f"{len(ds)} frame pairs with all features and a predicted motion of "
                         f"{min_flow_px:g} px or more within {max_span_s:g} s; expected 3 or "
                         "more (a run that moved, its features and depths recorded)")
    return np.array(ds), np.array(steps_L), np.array(steps_V), np.array(steps_g)


def check_hand_eye(trace, min_flow_px: float = MIN_FLOW_PX) -> HandEyeCheck:
    """Estimate the hand-eye error from a run's trace (module doc). A recorded trace is first
    aligned in time (``trace.aligned``: features are published after capture); the lag and
    the error are then estimated in turn (``ALIGN_ROUNDS``), each with the other's latest."""
    correction = None
    for _ in range(ALIGN_ROUNDS if trace.joint_t is not None else 1):
        current, lag = aligned(trace, correction)
        fit, ds, cov, r0 = _fit(current, min_flow_px)
        correction = frames.twist_transform(frames.invert(_E_of(fit.x)))
    E = _E_of(fit.x)
    rot_std = math.degrees(math.sqrt(max(np.trace(cov[:3, :3]), 0.0)))
    trans_std = 1e3 * math.sqrt(max(np.trace(cov[3:, 3:]), 0.0))
    X_hat = trace.arm.T_tool_camera if trace.fixed is None else trace.fixed.T_base_camera
    observable = trans_std < TRANSLATION_OBSERVABLE_MM
    # the correction applies the translation only where the run showed it
    applied = E if observable else frames.transform(E[:3, :3], np.zeros(3))
    return HandEyeCheck(
        rotation_deg=math.degrees(float(np.linalg.norm(fit.x[:3]))), rotation_std_deg=rot_std,
        rotvec_deg=np.degrees(fit.x[:3]), translation_mm=1e3 * float(np.linalg.norm(fit.x[3:])),
        translation_std_mm=trans_std, translation_observable=observable, E=E,
        corrected=X_hat @ applied, n_pairs=len(ds),
        residual_before_px=float(np.sqrt(np.mean(r0 ** 2))),
        residual_after_px=float(np.sqrt(np.mean(fit.fun ** 2))), image_lag_s=float(lag),
        parameter="robot.hand_eye" if trace.fixed is None else "robot.fixed_camera_pose")


def _E_of(p):
    return frames.transform(Rotation.from_rotvec(p[:3]).as_matrix(), p[3:])


def _fit(trace, min_flow_px):
    """(least-squares fit of E's 6 parameters, observed pair motions, covariance, residuals
    at E = I)."""
    ds, Ls, V_hat, group = frame_pairs(trace, min_flow_px)    # V_hat: believed camera twists
    f = trace.focal_px
    starts = np.flatnonzero(np.r_[True, group[1:] != group[:-1]])

    def residuals(p):
        A = frames.twist_transform(frames.invert(_E_of(p)))
        pred = np.add.reduceat(np.einsum("kij,kj->ki", Ls, V_hat @ A.T), starts, axis=0)
        return (pred - ds).ravel() * f

    r0 = residuals(np.zeros(6))
    fit = least_squares(residuals, np.zeros(6), method="trf", x_scale=[1, 1, 1, 0.01, 0.01, 0.01])
    dof = max(fit.fun.size - 6, 1)
    s2 = float(fit.fun @ fit.fun) / dof
    cov = np.linalg.pinv(fit.jac.T @ fit.jac) * s2
    return fit, ds, cov, r0
