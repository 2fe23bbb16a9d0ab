"""What the hand-eye check and the delay estimate read from a run: a ``Trace``.

Per camera frame: the time, the seen features (normalized, one fixed set of keys) and their
depths, and the reported joints at that time; per output period: the commanded joint
velocities. Two sources:

- a recorded run (``trace_from_run``, a ``record.bag.RunData``): ``servo/features`` (pixels of
  the matched features), joint states and ``servo/joint_velocity_cmd``, all on the bag's log
  clock. Frames that matched every feature of the copied reference are kept (their order is
  then the reference's); pixels are undistorted with the bag's camera_info; depths per frame
  by PnP of the target model (target file from the run's ``target.file``), else the taught
  depths of the reference.
- a headless episode (``TraceRecorder``, passed as ``run_scenario_episode(..., trace=...)``).
"""
from __future__ import annotations

import math
from dataclasses import dataclass

import numpy as np

from vservo_node.control import frames
from vservo_node.control.pose_error import pose_from_model


@dataclass
class Trace:
    """``t`` (F,) s; ``xy`` (F, N, 2) normalized; ``depth`` (F, N) m (NaN unknown); ``q``
    (F, n) reported joints at the frame times, chain order; ``t_cmd`` (C,) s and ``dq_cmd``
    (C, n) rad/s, each held until the next; ``focal_px``; ``arm``: ArmModel with the hand-eye
    the controller believed. ``joint_t`` (J,), ``joint_q`` (J, n): the joint states as
    recorded (a bag), for :func:`aligned`; None when ``q`` is already at the frames' capture
    times (a headless episode). ``perception_s``: how long after capture each frame's
    features were published (a bag whose status records carry the image stamps), else None."""

    t: np.ndarray
    xy: np.ndarray
    depth: np.ndarray
    q: np.ndarray
    t_cmd: np.ndarray
    dq_cmd: np.ndarray
    focal_px: float
    arm: object
    source: str = ""
    joint_t: np.ndarray | None = None
    joint_q: np.ndarray | None = None
    perception_s: np.ndarray | None = None   # per frame: capture -> features published, s
    fixed: object = None    # control.mounting.FixedCamera the controller believed, or None

    def camera_jacobian(self, q) -> np.ndarray:
        """6 x n: joint rates -> the camera twist that moves the features as the arm does,
        through the believed geometry. Wrist camera: ``Ad(inv(X^)) J_tool`` (the camera's own
        twist). Fixed camera: ``-Ad(T_camera_tool) J_tool``, the tool's twist seen from the
        still camera with the opposite sign (control/mounting.py), which moves the points as
        a camera with that twist would. Either way a geometry error ``E`` in the camera axes
        (true = believed @ E) turns it into ``Ad(inv(E))`` times it (calib/check.py)."""
        J = self.arm.jacobian_tool(q)
        if self.fixed is None:
            return self.arm.camera_from_tool() @ J
        T_camera_tool = frames.invert(self.fixed.T_base_camera) @ self.arm.fk(q, "tool")
        return -frames.twist_transform(T_camera_tool) @ J

    @property
    def n_frames(self) -> int:
        return len(self.t)


class TraceRecorder:
    """A ``trace`` callable for ``episode.run_scenario_episode``: keeps every frame whose
    features are the first full frame's keys, and every command. Frames without depths get
    them by PnP of ``target``'s model (when given)."""

    def __init__(self, arm, camera, target=None, fixed=None):
        self.arm, self.camera, self.target, self.fixed = arm, camera, target, fixed
        self.model = None
        self.keys = None
        self.frames, self.commands = [], []

    def __call__(self, kind: str, t: float, value, q) -> None:
        if kind == "command":
            self.commands.append((float(t), np.array(value, dtype=float)))
            return
        obs = value
        if obs is None or len(obs.keys) < 4:
            return
        if self.keys is None:
            self.keys = tuple(obs.keys)
            if self.target is not None and self.target.has_geometry:
                self.model = self.target.model_points(self.keys)
        if tuple(obs.keys) != self.keys:
            index = {k: i for i, k in enumerate(obs.keys)}
            if not all(k in index for k in self.keys):
                return
            sel = [index[k] for k in self.keys]
            xy = np.asarray(obs.xy)[sel]
            depth = None if obs.depth is None else np.asarray(obs.depth)[sel]
        else:
            xy, depth = np.asarray(obs.xy), obs.depth
        if depth is None and self.model is not None:
            try:
                T, _ = pose_from_model(xy, self.model, planar=True)
                depth = (self.model @ T[:3, :3].T + T[:3, 3])[:, 2]
            except ValueError:
                depth = None
        depth = np.full(len(xy), np.nan) if depth is None else np.asarray(depth, dtype=float)
        self.frames.append((float(t), np.array(xy, dtype=float), depth, np.array(q, float)))

    def trace(self) -> Trace:
        if not self.frames or not self.commands:
            raise ValueError("the episode gave no frames with features or no commands")
        f = self.frames
        c = self.commands
        return Trace(np.array([x[0] for x in f]), np.array([x[1] for x in f]),
                     np.array([x[2] for x in f]), np.array([x[3] for x in f]),
                     np.array([x[0] for x in c]), np.array([x[1] for x in c]),
                     float(0.5 * (self.camera.K[0, 0] + self.camera.K[1, 1])), self.arm,
                     "episode", fixed=self.fixed)


def trace_from_run(run, arm=None, camera=None, target=None) -> Trace:
    """The Trace of a recorded run (module doc). ``arm`` default: the run's (URDF and believed
    hand-eye from its params, ``record.metrics.arm_of_run``); ``camera`` default: its
    camera_info; ``target`` default: the run's ``target.file``. ValueError says what the run
    lacks."""
    from vservo_node.record.metrics import arm_of_run, run_params
    from vservo_node.vision.camera import CameraModel
    from vservo_node.vision.targets import load_target

    if arm is None:
        arm = arm_of_run(run)
        if arm is None:
            raise ValueError("the run holds no URDF (robot_description or robot.urdf_path)")
    if camera is None:
        info = run.camera_info
        if info is None:
            raise ValueError("the run holds no camera_info")
        camera = CameraModel(info["width"], info["height"], info["K"], info["D"],
                             info["distortion_model"] or "none")
    if run.features is None or len(run.features.t) < 3:
        raise ValueError("the run holds no servo/features (the matched pixels per frame)")
    if run.joint_cmd is None or len(run.joint_cmd.t) < 3:
        raise ValueError("the run holds no servo/joint_velocity_cmd")
    if len(run.joint_t) < 2:
        raise ValueError("the run holds no joint states")
    reference = run.reference or {}
    features = reference.get("features") or []
    keys = [tuple(f["key"]) for f in features]
    n_ref = len(keys)
    values = run.features.values
    width = values.shape[1]
    counts = np.sum(np.isfinite(values), axis=1)
    full = n_ref * 2 if n_ref else width
    keep = counts == full
    if keep.sum() < 3:
        raise ValueError(f"fewer than 3 frames matched every feature ({full // 2}) of the "
                         "reference")
    captured = capture_times(run)
    t = captured[keep]
    perception = (run.features.t - captured)[keep]
    uv = values[keep][:, :full].reshape(-1, full // 2, 2)
    xy = np.array([camera.pixels_to_normalized(p) for p in uv])
    depth = np.full(xy.shape[:2], np.nan)
    p = run_params(run)
    if target is None and p.get("target.file"):
        try:
            target = load_target(p["target.file"])
        except (OSError, ValueError):
            target = None
    model = None
    if target is not None and keys and target.has_geometry:
        try:
            model = target.model_points(keys)
        except ValueError:
            model = None
    if model is not None:
        for i in range(len(t)):
            try:
                T, _ = pose_from_model(xy[i], model, planar=True)
                depth[i] = (model @ T[:3, :3].T + T[:3, 3])[:, 2]
            except ValueError:
                pass
    taught = np.array([f.get("depth") or math.nan for f in features], dtype=float)
    if taught.size == depth.shape[1]:
        depth = np.where(np.isfinite(depth), depth, taught[None, :])
    names = list(arm.joint_names)
    missing = [n for n in names if n not in run.joint_names]
    if missing:
        raise ValueError(f"the run's joint states lack {missing}")
    cols = [run.joint_names.index(n) for n in names]
    jq = run.joint_position[:, cols]
    ok = np.isfinite(jq).all(axis=1)
    q = np.column_stack([np.interp(t, run.joint_t[ok], jq[ok, j]) for j in range(len(names))])
    dq_cmd = run.joint_cmd.values
    order = list(p.get("io.command_joint_order") or [])
    if order:   # the command went out in the downstream controller's order
        if sorted(order) != sorted(names) or dq_cmd.shape[1] < len(order):
            raise ValueError(f"io.command_joint_order {order} does not name the chain {names}")
        dq_cmd = dq_cmd[:, [order.index(n) for n in names]]
    fixed = None
    if p.get("robot.camera_mount") == "fixed":
        from vservo_node.control.mounting import mount_from_params

        fixed = mount_from_params(p, arm)
    return Trace(t, xy, depth, q, run.joint_cmd.t, dq_cmd[:, :len(names)],
                 float(0.5 * (camera.K[0, 0] + camera.K[1, 1])), arm, str(run.path),
                 run.joint_t[ok], jq[ok],
                 perception if np.any(np.abs(perception) > 1e-9) else None, fixed)


# a features message and the status record of its frame are published within this of each
# other (the next output tick, 8 ms at 125 Hz, plus transport); common practice, no source
STATUS_MATCH_S = 0.015


def capture_times(run) -> np.ndarray:
    """The capture time of each ``servo/features`` message on the record's clock.

    Features are logged when published, after perception, whose duration varies with the
    load (measured: 18-168 ms after capture on a loaded 2-core machine). The node's status
    record of each frame carries the image's stamp (``t``) and is published at the next
    output tick: for each features message the status record logged nearest to it (within
    ``STATUS_MATCH_S``) with a newer stamp gives its capture time. The other messages
    keep their log time less the median lag of the matched ones; when too few match (another
    recorder, a clock other than the log's), :func:`regular_times` of the log times."""
    L = np.asarray(run.features.t, dtype=float)
    t_status = run.status.get("t") if run.status else None
    if t_status is None or len(run.status_t) == 0 or len(L) == 0:
        return regular_times(L)
    stamps = np.asarray(t_status, dtype=float) - run.start_ns * 1e-9
    logs = np.asarray(run.status_t, dtype=float)
    # the node sets a frame's status and publishes its features; its output thread publishes
    # the status at its next tick, before or after the features: each features message takes
    # the status record logged nearest to it whose stamp is newer than the last one taken
    out = np.full(len(L), np.nan)
    last = -np.inf
    for k, Lk in enumerate(L):
        near = np.flatnonzero((np.abs(logs - Lk) <= STATUS_MATCH_S) & (stamps > last)
                              & (stamps < Lk) & (Lk - stamps < 0.5))
        if len(near):
            i = near[np.argmin(np.abs(logs[near] - Lk))]
            out[k] = last = float(stamps[i])
    ok = np.isfinite(out)
    if ok.sum() < 0.5 * len(L):
        return regular_times(L)
    out = np.where(ok, out, L - float(np.median(L[ok] - out[ok])))
    # a frame's stamp cannot come before the previous frame's: keep the order
    return np.maximum.accumulate(out)


def regular_times(t) -> np.ndarray:
    """Frame times without the jitter of when each was published: a camera takes frames at a
    steady rate, so the recorded times (publication after perception, whose duration varies
    by milliseconds) are replaced by the straight line ``a + b k`` fitted over the frame
    numbers ``k`` (frames dropped leave gaps in ``k``). Kept as recorded when they do not fit
    a steady rate (residuals beyond a quarter period). Common practice, no source."""
    t = np.asarray(t, dtype=float)
    if len(t) < 10:
        return t
    period = float(np.median(np.diff(t)))
    if not period > 0:
        return t
    k = np.round((t - t[0]) / period)
    A = np.column_stack([np.ones_like(k), k])
    coef, *_ = np.linalg.lstsq(A, t, rcond=None)
    fitted = A @ coef
    if np.abs(fitted - t).max() > 0.25 * period or len(np.unique(k)) != len(k):
        return t
    return fitted


# how far the image features may lag (or lead) the joint states in a record, s
LAG_SEARCH_S = (-0.05, 0.2)


def image_lag(trace, correction=None) -> tuple[float, float]:
    """``(lag s, correlation)``: how long after the joint motion the recorded features show it.

    In a record the features carry the time they were published (after the image was
    captured, transported and perceived) while the joint states carry theirs; pairing them as
    recorded compares feature motion with a later joint motion. The lag is the shift of the
    joint states that best correlates the feature motion they predict (URDF chain, believed
    hand-eye, interaction matrix) with the motion seen, on a 1 ms grid refined by a parabola
    (as calib/delay.py). ``correction``: 6 x 6, applied to the believed camera twist (the
    hand-eye error found so far; default none); a hand-eye error turns the predicted motion, which
    biases the lag a little, so the check alternates the two estimates."""
    from vservo_node.calib.delay import GRID_S, _search, frame_pair_motion

    if trace.joint_t is None:
        return 0.0, math.nan
    correction = np.eye(6) if correction is None else np.asarray(correction, dtype=float)
    Ms, ds, ta, tb, _ = frame_pair_motion(trace, correction)

    def joints(t):
        return np.column_stack([np.interp(t, trace.joint_t, trace.joint_q[:, j])
                                for j in range(trace.joint_q.shape[1])])

    def predicted(lag):
        return np.einsum("kij,kj->ki", Ms, joints(tb - lag) - joints(ta - lag))

    taus = np.arange(LAG_SEARCH_S[0], LAG_SEARCH_S[1] + GRID_S / 2, GRID_S)
    return _search(ds, predicted, taus)


def aligned(trace, correction=None):
    """``(trace, lag s)``: the trace with its joints re-sampled ``lag`` earlier than each frame's
    recorded time (:func:`image_lag`), so each frame meets the joints of its capture."""
    import dataclasses

    lag, _ = image_lag(trace, correction)
    if trace.joint_t is None or lag == 0.0:
        return trace, lag
    q = np.column_stack([np.interp(trace.t - lag, trace.joint_t, trace.joint_q[:, j])
                         for j in range(trace.joint_q.shape[1])])
    return dataclasses.replace(trace, q=q), lag
