"""Scenario files: one simulated cell run, described in YAML (format ``vservo_scenario/1``,
our own). The shipped scenarios (config/scenarios/) are invented data for an invented bench-top
sample-handling cell: an arm squares its wrist camera up over a tray before picking.

Layout (lengths in metres, angles in degrees unless a key says ``_rad``; relative file paths
are relative to the package's config folder)::

    format: vservo_scenario/1
    name: tray_twist
    description: free text
    robot:
      urdf: robots/vs7_bench.urdf
      base_frame: base_link
      tool_frame: tool0
      camera_frame: camera_optical_frame
      home: robots/vs7_bench.yaml    # a file with a `home` mapping, or the mapping itself;
                                     # default: the .yaml next to the URDF
    camera:
      width: 640
      height: 480
      fps: 30
      intrinsics: {fx: 615.0, fy: 615.0, cx: 319.5, cy: 239.5}
      distortion_model: plumb_bob    # or none
      d: [k1, k2, p1, p2, k3]
    target:
      file: targets/tray_dots.yaml
      pose: {xyz: [0.5, 0.0, 0.0], rpy_rad: [3.14159265, 0.0, -1.57079633]}  # T_base_target
      hide: [[dot, 4]]               # features painted over: [dot, id] or [tag, id]
    taught:                          # the reference camera pose; one of:
      above_target: {distance: 0.30, about_axis_deg: 0.0, offset_xy: [0.0, 0.0]}
      # joints: {joint name: rad, ...}
    start:                           # where the run starts; one of:
      offset: {about_axis_deg: -110, translation: [0, 0, 0], tilt_deg: [0, 0]}
      # joints: {joint name: rad, ...}
    arm: {velocity_lag_s: 0.02, command_latency_s: 0.0, command_timeout_s: 0.2,
          decel_limit: 3.0, joint_noise_std: 0.0, velocity_noise_std: 0.0}
    image: {noise_std: 2.0, blur_sigma_px: 0.0, gain: 1.0,   # grey levels, pixels
            table_rgb: [150, 136, 118], table_texture: 6.0,
            occlusions: [{rect_px: [x0, y0, x1, y1], colour: [60, 60, 65],
                          from_s: 0, until_s: 5}]}
    true_hand_eye: {translation: [dx, dy, dz], rotation_deg: [rx, ry, rz]}
    controller_belief:
      hand_eye_error: {translation: [dx, dy, dz], rotation_deg: [rx, ry, rz]}
      depth_scale: 1.0
    controller: {control.scheme: decoupled}   # parameters this cell is meant to be run with
    duration_s: 10.0
    seed: 1

Frames: ``above_target`` puts the camera on the printed side of the target (the target's z
axis points into the board, so at ``distance`` d the camera is at target z = -d) with its
optical axis along the target's z and its x axis along the target's x turned by
``about_axis_deg`` about the optical axis: ``T_target_camera = [Rz(a) | (ox, oy, -d)]``.
``offset`` moves the camera from the taught pose in the taught camera's axes:
``T_taught_start = [R_tilt Rz(a) | translation]``, ``R_tilt`` the rotation by the vector
``(tilt_x, tilt_y, 0)`` (an axis in the image plane; z forward, so a positive z translation
moves towards the target). A hand-eye perturbation ``{translation, rotation_deg}`` is applied
in the camera's own axes, ``T_tool_camera' = T_tool_camera @ [R(rotation vector) | t]``: the
true one moves the real camera, the belief one is what the controller is told. Start and taught
poses are those of the true camera.

Fixed camera (eye-to-hand): the optional ``mount`` entry puts the camera on a stand and the
target on the tool::

    mount:
      camera: fixed                  # default: wrist (the camera on the tool, robot.camera_frame)
      camera_pose: {xyz: [0.45, 0.0, 0.0], rpy_rad: [0.0, 0.0, 1.5708]}  # T_base_camera
      target_on_tool: {xyz: [0.0, 0.0, 0.02], rpy_rad: [3.14159265, 0.0, 0.0]}  # T_tool_target

Then ``target.pose`` and ``true_hand_eye`` are not given (the target rides on the tool; the
stand's true pose is ``camera_pose``), ``robot.camera_frame`` is optional, and the
camera-target geometry reads the same as for a wrist camera: ``above_target`` is the target's
pose seen from the camera (``T_camera_target = inv([Rz(a) | (ox, oy, -d)])``) and ``offset`` is
the apparent camera displacement, so the start view is the one a wrist camera moved by the
offset would see: the target starts at ``T_camera_target = inv(offset) @ T_camera_target_taught``
(the arm's joints solved for that target pose). ``controller_belief.hand_eye_error`` perturbs
the believed camera pose on its stand (``T_base_camera' = T_base_camera @ [R | t]``, camera
axes) and ``controller_belief.target_error`` (same form) the believed target pose on the tool,
``T_tool_target' = T_tool_target @ [R | t]``. Ground truth and the headless episodes' pose error
are then the tool's (``SimCell.judged_pose``).

``controller``: controller parameters (vservo_node.params names, flat) the cell is meant to be
run with, e.g. a control scheme or a wider motion envelope for a large start offset; headless
episodes (``episode.run_scenario_episode``) and ``vservo demo`` layer them over
config/vservo_sim.yaml (a caller's own overrides win). Checked against the parameter schema.
"""
from __future__ import annotations

from dataclasses import dataclass, field
from pathlib import Path

import numpy as np

from vservo_node import paths
from vservo_node.control.frames import invert
from vservo_node.control.mounting import FixedCamera
from vservo_node.control.kinematics import URDF_MAX_BYTES, ArmModel
from vservo_node.sim.arm import ArmDynamics
from vservo_node.sim.camera_sim import Photometric
from vservo_node.vision.camera import CameraModel
from vservo_node.yaml_files import brief, read_bounded
from vservo_node.sim.scenario_entries import (_BELIEF, _camera, _controller, _dynamics, _home,
                                              _image, _joints, _mount, _one_of, _perturbation,
                                              _Reader, _ROBOT, _solve, _start_offset, _target,
                                              _taught_pose, _TOP, _TOP_REQUIRED, ScenarioError)

FORMAT = "vservo_scenario/1"
# the image frame id of a fixed camera (no URDF frame: its pose is mount.camera_pose)
FIXED_CAMERA_FRAME = "fixed_camera_optical_frame"
__all__ = ["FIXED_CAMERA_FRAME", "FORMAT", "Scenario", "ScenarioError", "load_scenario",
           "scenario_from_dict"]


@dataclass(frozen=True)
class Scenario:
    """A loaded, validated scenario (see the module doc); joint vectors in ``joint_names``
    order, radians; poses 4x4 in metres."""

    name: str
    description: str
    source: Path | None
    urdf_path: Path
    base_frame: str
    tool_frame: str
    camera_frame: str
    joint_names: tuple
    q_home: np.ndarray
    camera: CameraModel
    fps: float
    target: object                  # vservo_node.vision.targets.Target
    T_base_target: np.ndarray | None       # None: a fixed camera's target rides on the tool
    hidden: tuple                   # ((kind, id), ...) features painted over
    q_taught: np.ndarray
    q_start: np.ndarray
    arm_dynamics: ArmDynamics
    photometric: Photometric
    T_tool_camera_true: np.ndarray | None  # None with a fixed camera
    T_tool_camera_belief: np.ndarray | None
    depth_scale_belief: float
    duration_s: float
    seed: int
    controller: dict = field(default_factory=dict)   # parameter name -> value (module doc)
    fixed: FixedCamera | None = None          # mount fixed: the true stand and target on tool
    fixed_belief: FixedCamera | None = None   # ... as the controller is told

    def mount(self, which: str = "true") -> FixedCamera | None:
        """None for a wrist camera; the ``"true"`` or ``"belief"`` FixedCamera otherwise."""
        if which not in ("true", "belief"):
            raise ValueError(f"which must be 'true' or 'belief', got {which!r}")
        return self.fixed if which == "true" else self.fixed_belief

    def camera_target(self, arm, q) -> np.ndarray:
        """True ``T_camera_target`` at joints q of ``arm`` (the scenario's true arm model)."""
        if self.fixed is not None:
            return self.fixed.T_camera_target(arm, q)
        return invert(arm.camera_pose(q)) @ self.T_base_target

    def judged_pose(self, arm, q) -> np.ndarray:
        """The true pose the arrival tolerances judge, base frame: the camera's (wrist) or the
        tool's (fixed camera)."""
        return arm.fk(q) if self.fixed is not None else arm.camera_pose(q)

    def arm_model(self, hand_eye: str = "true") -> ArmModel:
        """A fresh ArmModel of the scenario's robot with the ``"true"``, ``"belief"`` or
        ``"urdf"`` hand-eye transform."""
        arm = ArmModel.from_urdf_file(self.urdf_path, self.base_frame, self.tool_frame,
                                      None if self.fixed is not None else self.camera_frame)
        choice = {"true": self.T_tool_camera_true, "belief": self.T_tool_camera_belief,
                  "urdf": None}
        if hand_eye not in choice:
            raise ValueError(f"hand_eye must be one of {sorted(choice)}, got {hand_eye!r}")
        if choice[hand_eye] is not None:
            arm.set_hand_eye(choice[hand_eye])
        return arm


# ----------------------------------------------------------------------------- loading
def scenario_from_dict(data, source: Path | None = None) -> Scenario:
    """Build and validate a Scenario from the mapping of a scenario file; ScenarioError
    (a ValueError) naming the entry on anything malformed or unreachable."""
    r = _Reader(source)
    data = r.mapping(data, "top level", _TOP, _TOP_REQUIRED)
    if data.get("format", FORMAT) != FORMAT:
        r.fail("format", f"{brief(data['format'])} is not {FORMAT!r}")
    seed = data.get("seed", 0)
    if isinstance(seed, bool) or not isinstance(seed, int) or seed < 0:
        r.fail("seed", f"expected a non-negative integer, got {brief(seed)}")

    fixed = _mount(r, data.get("mount"))
    robot = r.mapping(data["robot"], "robot", _ROBOT,
                      {"urdf", "base_frame", "tool_frame"} | (set() if fixed else
                                                              {"camera_frame"}))
    urdf = r.path(robot["urdf"], "robot.urdf")
    frames = [r.text(robot[k], f"robot.{k}") for k in ("base_frame", "tool_frame")]
    frames.append("" if fixed else r.text(robot["camera_frame"], "robot.camera_frame"))
    text = read_bounded(urdf, URDF_MAX_BYTES, ScenarioError, prefix=f"{r.where}: robot.urdf: ")
    try:
        arm = ArmModel.from_urdf(text.decode("utf-8"), *frames[:2], frames[2] or None)
    except ValueError as exc:      # UnicodeDecodeError is one too
        r.fail("robot", str(exc))
    q_home = _home(r, robot, urdf, arm)

    camera, fps = _camera(r, data["camera"])
    target, T_base_target, hidden = _target(r, data["target"], fixed is not None)

    belief = r.mapping(data.get("controller_belief"), "controller_belief", _BELIEF)
    depth_scale = r.number(belief.get("depth_scale", 1.0), "controller_belief.depth_scale",
                           positive=True)
    camera_error = _perturbation(r, belief.get("hand_eye_error"),
                                 "controller_belief.hand_eye_error")
    fixed_belief = None
    if fixed is None:
        if "target_error" in belief:
            r.fail("controller_belief.target_error", "applies to a fixed camera only (mount)")
        T_urdf = arm.T_tool_camera
        T_true = T_urdf @ _perturbation(r, data.get("true_hand_eye"), "true_hand_eye")
        T_belief = T_urdf @ camera_error
        arm.set_hand_eye(T_true)
        placed = arm                      # the IK places the camera
    else:
        if "true_hand_eye" in data:
            r.fail("true_hand_eye", "a fixed camera's true pose is mount.camera_pose")
        T_true = T_belief = None
        fixed_belief = FixedCamera(
            fixed.T_base_camera @ camera_error,
            fixed.T_tool_target @ _perturbation(r, belief.get("target_error"),
                                                "controller_belief.target_error"))
        placed = ArmModel.from_urdf(text.decode("utf-8"), *frames[:2])
        placed.set_hand_eye(fixed.T_tool_target)   # the IK places the target

    kind, value = _one_of(r, data["taught"], "taught", {"above_target", "joints"})
    if kind == "joints":
        q_taught = _joints(r, value, "taught.joints", arm)
    elif fixed is None:
        q_taught = _solve(r, arm, _taught_pose(r, value, T_base_target), q_home, q_home,
                          "taught.above_target")
    else:   # the target in front of the still camera, as the wrist camera above it
        T_target_camera = _taught_pose(r, value, np.eye(4))
        q_taught = _solve(r, placed, fixed.T_base_camera @ invert(T_target_camera), q_home,
                          q_home, "taught.above_target")
    kind, value = _one_of(r, data["start"], "start", {"offset", "joints"})
    if kind == "joints":
        q_start = _joints(r, value, "start.joints", arm)
    elif fixed is None:
        T_start = arm.camera_pose(q_taught) @ _start_offset(r, value)
        q_start = _solve(r, arm, T_start, q_taught, q_home, "start.offset")
    else:   # the apparent camera displacement: the target moves by its inverse
        T_camera_target = invert(fixed.T_base_camera) @ placed.camera_pose(q_taught)
        T_goal = fixed.T_base_camera @ invert(_start_offset(r, value)) @ T_camera_target
        q_start = _solve(r, placed, T_goal, q_taught, q_home, "start.offset")

    return Scenario(
        name=r.text(data["name"], "name"), description=str(data.get("description", "")),
        source=source, urdf_path=urdf, base_frame=frames[0], tool_frame=frames[1],
        camera_frame=frames[2] or FIXED_CAMERA_FRAME, joint_names=tuple(arm.joint_names),
        q_home=q_home,
        camera=camera, fps=fps, target=target, T_base_target=T_base_target, hidden=hidden,
        q_taught=q_taught, q_start=q_start, arm_dynamics=_dynamics(r, data.get("arm"), seed),
        photometric=_image(r, data.get("image")), T_tool_camera_true=T_true,
        T_tool_camera_belief=T_belief, depth_scale_belief=depth_scale,
        duration_s=r.number(data.get("duration_s", 10.0), "duration_s", positive=True),
        seed=seed, controller=_controller(r, data.get("controller")), fixed=fixed,
        fixed_belief=fixed_belief)


def load_scenario(name_or_path) -> Scenario:
    """Load a scenario by short name (``"tray_twist"``, from config/scenarios) or path."""
    path = paths.shipped("scenarios", str(name_or_path))
    return scenario_from_dict(_Reader.read_yaml(path), source=Path(path))
