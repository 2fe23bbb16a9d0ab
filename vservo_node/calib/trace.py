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

from vservo_node.control.pose_error import pose_from_model


@dataclass
class Trace:
    """``t`` (F,) s; ``xy`` (F, N, 2) normalized; ``depth`` (F, N) m (NaN unknown); ``q``
    (F, n) reported joints at the frame times, chain order; ``t_cmd`` (C,) s and ``dq_cmd``
    (C, n) rad/s, each held until the next; ``focal_px``; ``arm``: ArmModel with the hand-eye
    the controller believed."""

    t: np.ndarray
    xy: np.ndarray
    depth: np.ndarray
    q: np.ndarray
    t_cmd: np.ndarray
    dq_cmd: np.ndarray
    focal_px: float
    arm: object
    source: str = ""

    @property
    def n_frames(self) -> int:
        return len(self.t)


class TraceRecorder:
    """A ``trace`` callable for ``episode.run_scenario_episode``: keeps every frame whose
    features are the first full frame's keys, and every command. Frames without depths get
    them by PnP of ``target``'s model (when given)."""

    def __init__(self, arm, camera, target=None):
        self.arm, self.camera, self.target = arm, camera, target
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
                     "episode")


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
    t = run.features.t[keep]
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
    return Trace(t, xy, depth, q, run.joint_cmd.t, dq_cmd[:, :len(names)],
                 float(0.5 * (camera.K[0, 0] + camera.K[1, 1])), arm, str(run.path))
