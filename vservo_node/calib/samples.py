"""Hand-eye samples: from one image and the joints, from a recorded bag, from the simulated
cell; a samples file; and well-spread views to propose.

A sample (calib/handeye.py ``Sample``) pairs ``T_base_tool`` (forward kinematics of the joints
through the URDF chain, ``ArmModel.fk(q, "tool")``) with ``T_camera_target``: the target's
features are detected and identified from the target file alone (the detector of
vision/features.py, ``reference.identify``; no taught view needed), undistorted to normalized
coordinates with the camera model (``CameraModel.pixels_to_normalized``) and fitted to the
target model by PnP (``pose_error.pose_from_model``: IPPE for a planar board, refined by
Levenberg-Marquardt).

From a bag (``samples_from_bag``): any rosbag2 bag with joint states and camera images
(``ros2 bag record`` of the cell while someone moves the arm between poses and holds it still
at each). Only frames taken while the arm rests count (joints moved less than ``REST_RAD``
over ``REST_WINDOW_S`` either side of the frame: an image and a joint state of a moving arm
stamped apart would give a wrong pair), and one sample per rest (the next sample needs the
joints ``NEW_POSE_RAD`` away from the last). Thresholds: common practice, no source.

Proposed views (``propose_views``): camera poses orbiting the target's centre at about the
given distance, tilted about two image axes and turned about the optical axis, so the relative
motions turn about well-spread axes (calib/handeye.py, sample spread). Only the simulated
cell drives to them by itself; on a real arm they are printed for the user to move to.
"""
from __future__ import annotations

import math
from pathlib import Path

import numpy as np
from scipy.spatial.transform import Rotation

from vservo_node.calib.handeye import Sample
from vservo_node.control import frames
from vservo_node.control.pose_error import pose_from_model
from vservo_node.yaml_files import YamlFileError, dump_yaml, load_yaml

SAMPLES_FORMAT = "vservo_handeye_samples/1"
REST_RAD = 2e-4          # joints moving less than this over the window count as at rest
REST_WINDOW_S = 0.15
NEW_POSE_RAD = 0.01      # a new sample needs some joint this far from the last sample's
MIN_POINTS = 4


class NoTargetPose(ValueError):
    """An image gave no target pose; the message says why."""


def target_pose(image_bgr, target, camera):
    """``(xy (N, 2) normalized, model (N, 3) m, T_camera_target, rms_px)`` of the target in one
    BGR (or mono) image; NoTargetPose says why not (too few features, ambiguous, no fit)."""
    from vservo_node.vision.features import make_detector
    from vservo_node.vision.reference import identify

    detection = make_detector(target).detect(image_bgr)
    match = identify(target, detection, camera)
    if not match.ok or len(match) < MIN_POINTS:
        raise NoTargetPose(f"{len(match)} of {len(target.keys())} features of "
                           f"{target.name!r} identified; expected {MIN_POINTS} or more")
    if match.quality.get("ambiguous"):
        raise NoTargetPose(f"the features of {target.name!r} could be assigned in more than "
                           "one way")
    xy = camera.pixels_to_normalized(np.asarray(match.points, dtype=float))
    model = target.model_points(match.keys)
    try:
        T, rms = pose_from_model(xy, model)
    except ValueError as exc:
        raise NoTargetPose(str(exc)) from None
    focal = 0.5 * (camera.K[0, 0] + camera.K[1, 1])
    return xy, model, T, rms * focal


def make_sample(arm, q, image_bgr, target, camera, t: float = math.nan) -> Sample:
    """One sample from joints ``q`` (chain order, rad) and the image taken there."""
    xy, model, T_camera_target, _ = target_pose(image_bgr, target, camera)
    q = np.asarray(q, dtype=float)
    return Sample(arm.fk(q, "tool"), T_camera_target, xy, model, tuple(map(float, q)), float(t))


# ----------------------------------------------------------------------------- views
def propose_views(T_base_camera, distance: float, n: int, seed: int = 0,
                  tilt_deg: float = 20.0, twist_deg: float = 45.0,
                  shift_m: float = 0.02) -> list[np.ndarray]:
    """``n`` camera poses (base frame) around the view ``T_base_camera`` whose optical axis meets
    the target ``distance`` m ahead: each orbits that point by a tilt about the image x and y
    axes (up to ``tilt_deg``), turns about the optical axis (up to ``twist_deg``), and shifts
    by up to ``shift_m``. Tilts alternate in sign and axis so the relative motions turn about
    different axes. Invented view pattern, common practice, no source."""
    rng = np.random.default_rng(seed)
    centre = frames.transform(np.eye(3), [0.0, 0.0, distance])
    views = []
    for k in range(n):
        angle = 2.0 * math.pi * k / max(n, 1)
        tilt = np.radians(tilt_deg) * np.array([math.cos(angle), math.sin(angle), 0.0])
        tilt *= rng.uniform(0.6, 1.0)
        twist = np.radians(twist_deg) * rng.uniform(-1.0, 1.0)
        R = Rotation.from_rotvec(tilt).as_matrix() @ Rotation.from_rotvec([0, 0, twist]).as_matrix()
        offset = frames.transform(R, np.zeros(3))
        back = frames.transform(np.eye(3), [*rng.uniform(-shift_m, shift_m, 2),
                                            -distance + rng.uniform(-shift_m, shift_m)])
        views.append(T_base_camera @ centre @ offset @ back)
    return views


def samples_from_sim(scenario, n: int = 12, seed: int = 0, hand_eye: str = "belief",
                     tilt_deg: float = 20.0, twist_deg: float = 45.0) -> tuple[list, dict]:
    """Samples of the simulated cell, headless: the arm is put at joints that bring the view
    to each of ``propose_views`` around the taught view as the controller believes the
    geometry (``hand_eye``: ``belief`` or ``true``); the true camera renders, the image is
    perceived. A wrist camera moves with the tool to the proposed camera poses; with a fixed
    camera (scenario ``mount``) the tool carries the target to where a wrist camera at those
    poses would have seen it. Returns (samples, info) with the views that gave no sample and
    why, and ``mounting`` (hand or fixed). ``scenario``: a name, path or ``sim.Scenario``."""
    from vservo_node.sim import Scenario, SimCell, load_scenario
    from vservo_node.sim.ik import solve_camera_pose
    from vservo_node.vision import image_io

    sc = scenario if isinstance(scenario, Scenario) else load_scenario(scenario)
    cell = SimCell(sc)
    fixed = sc.mount(hand_eye)
    believed = sc.arm_model(hand_eye if fixed is None else "urdf")
    if fixed is None:
        T_view = believed.camera_pose(sc.q_taught)                 # the taught camera
        T_ct = frames.invert(T_view) @ sc.T_base_target
    else:
        T_view = np.eye(4)                          # views relative to the taught camera
        T_ct = fixed.T_camera_target(believed, sc.q_taught)
        believed.set_hand_eye(np.eye(4))            # IK on the tool frame itself
    distance = float(np.linalg.norm(T_ct[:3, 3]))
    samples, skipped = [], []
    for k, view in enumerate(propose_views(T_view, distance, n, seed, tilt_deg, twist_deg)):
        goal = view if fixed is None else (
            fixed.T_base_camera @ frames.invert(view) @ T_ct
            @ frames.invert(fixed.T_tool_target))
        try:
            q = solve_camera_pose(believed, goal, sc.q_taught, sc.q_taught)
        except (ValueError, RuntimeError) as exc:
            skipped.append((k, f"no joint solution: {exc}"))
            continue
        if np.any(q < believed.lower) or np.any(q > believed.upper):
            skipped.append((k, "joint solution outside the limits"))
            continue
        t = float(k)
        rgb = cell.render_at(q, t)
        bgr = image_io.to_bgr_or_mono(rgb, "rgb8", sc.camera.width, sc.camera.height)
        reported = q + (cell.arm.dynamics.joint_noise_std
                        * np.random.default_rng([seed, k]).normal(size=q.shape))
        try:
            samples.append(make_sample(believed, reported, bgr, sc.target, sc.camera, t))
        except NoTargetPose as exc:
            skipped.append((k, str(exc)))
    return samples, {"skipped": skipped, "views": n,
                     "mounting": "hand" if fixed is None else "fixed"}


# ----------------------------------------------------------------------------- bag
def samples_from_bag(bag, arm, target, camera=None, *, rest_rad: float = REST_RAD,
                     window_s: float = REST_WINDOW_S, new_pose_rad: float = NEW_POSE_RAD
                     ) -> tuple[list, dict]:
    """Samples from a bag's joint states and camera frames, one per rest of the arm (module
    doc). ``camera``: a CameraModel, default from the bag's camera_info. Returns (samples,
    info) with counts of frames read, at rest, and those without a target pose (and why)."""
    from rosbags.highlevel import AnyReader

    from vservo_node import interface as itf
    from vservo_node.record.bag import (
        COMPRESSED_IMAGE,
        IMAGE,
        default_typestore,
        image_to_rgb,
        match_topic,
    )
    from vservo_node.vision.camera import CameraModel

    path = Path(bag)
    joints_t, joints_q, frames_raw = [], [], []
    info_msg = None
    with AnyReader([path], default_typestore=default_typestore()) as reader:
        types = {c.topic: c.msgtype for c in reader.connections}
        t_joint = match_topic(types, itf.TOPIC_JOINT_STATES, "sensor_msgs/msg/JointState")
        t_image = (match_topic(types, itf.TOPIC_IMAGE, IMAGE)
                   or match_topic(types, itf.TOPIC_IMAGE_COMPRESSED, COMPRESSED_IMAGE))
        t_info = match_topic(types, itf.TOPIC_CAMERA_INFO, "sensor_msgs/msg/CameraInfo")
        missing = [name for name, topic in (("joint states", t_joint), ("camera images",
                                                                          t_image))
                   if topic is None]
        if missing:
            raise ValueError(f"bag {path}: no {' and no '.join(missing)} (expected topics "
                             f"ending in {itf.TOPIC_JOINT_STATES} and {itf.TOPIC_IMAGE} or "
                             f"{itf.TOPIC_IMAGE_COMPRESSED})")
        wanted = [c for c in reader.connections if c.topic in (t_joint, t_image, t_info)]
        for conn, stamp, raw in reader.messages(connections=wanted):
            if conn.topic == t_joint:
                msg = reader.deserialize(raw, conn.msgtype)
                by_name = dict(zip(msg.name, msg.position))
                if all(n in by_name for n in arm.joint_names):
                    joints_t.append(stamp * 1e-9)
                    joints_q.append([by_name[n] for n in arm.joint_names])
            elif conn.topic == t_image:
                frames_raw.append((stamp * 1e-9, conn.msgtype, raw))
            elif info_msg is None:
                info_msg = reader.deserialize(raw, conn.msgtype)
        if camera is None:
            if info_msg is None:
                raise ValueError(f"bag {path}: no camera_info; give the camera model")
            camera = CameraModel.from_camera_info(
                info_msg.width, info_msg.height, info_msg.distortion_model, info_msg.d,
                info_msg.k, info_msg.r, info_msg.p)
        if not joints_t:
            raise ValueError(f"bag {path}: no joint state names every joint of the chain "
                             f"{arm.joint_names}")
        jt, jq = np.asarray(joints_t), np.asarray(joints_q, dtype=float)
        order = np.argsort(jt, kind="stable")
        jt, jq = jt[order], jq[order]
        samples, rejected, at_rest = [], [], 0
        last_q = None
        for t, msgtype, raw in sorted(frames_raw, key=lambda f: f[0]):
            near = (jt >= t - window_s) & (jt <= t + window_s)
            if near.sum() < 2 or jt[near][0] > t or jt[near][-1] < t:
                continue        # the frame is not bracketed by joint states
            span = jq[near].max(axis=0) - jq[near].min(axis=0)
            if span.max() > rest_rad:
                continue
            at_rest += 1
            q = np.array([np.interp(t, jt, jq[:, j]) for j in range(jq.shape[1])])
            if last_q is not None and np.abs(q - last_q).max() < new_pose_rad:
                continue
            rgb = image_to_rgb(msgtype, reader.deserialize(raw, msgtype))
            if rgb is None:
                rejected.append((t, "image not decoded"))
                continue
            try:
                samples.append(make_sample(arm, q, np.ascontiguousarray(rgb[..., ::-1]),
                                           target, camera, t - jt[0]))
                last_q = q
            except NoTargetPose as exc:
                rejected.append((t, str(exc)))
    return samples, {"frames": len(frames_raw), "at_rest": at_rest, "rejected": rejected,
                     "camera": camera}


# ----------------------------------------------------------------------------- files
def save_samples(path, samples, joint_names, *, camera=None, mounting: str = "hand",
                 notes: dict | None = None) -> Path:
    """Write samples as YAML (``SAMPLES_FORMAT``, our own): per sample the time, joints,
    ``T_base_tool`` and ``T_camera_target`` as [x, y, z, qx, qy, qz, qw], the normalized
    points and their model points."""
    from vservo_node.calib.handeye import xyz_quat

    data = {"format": SAMPLES_FORMAT, "mounting": mounting, "joint_names": list(joint_names),
            "focal_px": (None if camera is None
                         else float(0.5 * (camera.K[0, 0] + camera.K[1, 1]))),
            "notes": notes or {},
            "samples": [{"t": float(s.t), "q": [float(v) for v in s.q],
                         "T_base_tool": xyz_quat(s.T_base_tool),
                         "T_camera_target": xyz_quat(s.T_camera_target),
                         "xy": np.asarray(s.xy, float).tolist(),
                         "model": np.asarray(s.model, float).tolist()} for s in samples]}
    path = Path(path)
    path.write_text(dump_yaml(data, sort_keys=False, default_flow_style=None))
    return path


def load_samples(path) -> tuple[list, dict]:
    """(samples, header) of a samples file; YamlFileError naming the file and the entry."""
    data = load_yaml(path, prefix="hand-eye samples ")
    if not isinstance(data, dict) or data.get("format") != SAMPLES_FORMAT:
        raise YamlFileError(f"hand-eye samples {path}: expected format {SAMPLES_FORMAT}")
    out = []
    for i, s in enumerate(data.get("samples") or []):
        try:
            xy = np.asarray(s["xy"], dtype=float).reshape(-1, 2)
            model = np.asarray(s["model"], dtype=float).reshape(-1, 3)
            if len(xy) != len(model) or len(xy) < MIN_POINTS:
                raise ValueError(f"{len(xy)} points and {len(model)} model points; expected "
                                 f"the same number, {MIN_POINTS} or more")
            out.append(Sample(
                frames.transform_from_xyz_quat(s["T_base_tool"][:3], s["T_base_tool"][3:]),
                frames.transform_from_xyz_quat(s["T_camera_target"][:3],
                                               s["T_camera_target"][3:]),
                xy, model, tuple(s.get("q") or ()), float(s.get("t", math.nan))))
        except (KeyError, TypeError, ValueError) as exc:
            raise YamlFileError(f"hand-eye samples {path}: samples[{i}]: {exc}") from None
    header = {k: v for k, v in data.items() if k != "samples"}
    return out, header


def urdf_from_bag(bag) -> str | None:
    """The URDF text of a bag's robot_description topic (the last message), or None."""
    from rosbags.highlevel import AnyReader

    from vservo_node import interface as itf
    from vservo_node.record.bag import default_typestore, match_topic

    with AnyReader([Path(bag)], default_typestore=default_typestore()) as reader:
        types = {c.topic: c.msgtype for c in reader.connections}
        topic = match_topic(types, itf.TOPIC_ROBOT_DESCRIPTION, "std_msgs/msg/String")
        text = None
        for conn, _, raw in reader.messages(
                connections=[c for c in reader.connections if c.topic == topic]):
            text = reader.deserialize(raw, conn.msgtype).data
    return text
