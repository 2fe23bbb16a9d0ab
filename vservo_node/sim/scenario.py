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
from scipy.spatial.transform import Rotation

from vservo_node import paths
from vservo_node.control.frames import invert, transform, transform_from_xyz_rpy
from vservo_node.control.mounting import FixedCamera
from vservo_node.control.kinematics import URDF_MAX_BYTES, ArmModel
from vservo_node.sim.arm import ArmDynamics
from vservo_node.sim.camera_sim import Occluder, Photometric
from vservo_node.sim.ik import solve_camera_pose
from vservo_node.vision.camera import CameraModel
from vservo_node.vision.targets import load_target
from vservo_node.yaml_entries import EntryReader
from vservo_node.yaml_files import YamlFileError, brief, load_yaml, read_bounded

FORMAT = "vservo_scenario/1"
# the image frame id of a fixed camera (no URDF frame: its pose is mount.camera_pose)
FIXED_CAMERA_FRAME = "fixed_camera_optical_frame"

_TOP = {"format", "name", "description", "robot", "camera", "target", "taught", "start", "arm",
        "image", "true_hand_eye", "controller_belief", "controller", "duration_s", "seed",
        "mount"}
_TOP_REQUIRED = {"name", "robot", "camera", "target", "taught", "start"}
_ROBOT = {"urdf", "base_frame", "tool_frame", "camera_frame", "home"}
_CAMERA = {"width", "height", "fps", "intrinsics", "distortion_model", "d"}
_INTRINSICS = {"fx", "fy", "cx", "cy"}
_TARGET = {"file", "pose", "hide"}
_POSE = {"xyz", "rpy_rad"}
_ABOVE = {"distance", "about_axis_deg", "offset_xy"}
_OFFSET = {"about_axis_deg", "translation", "tilt_deg"}
_ARM = {"velocity_lag_s", "command_latency_s", "command_timeout_s", "decel_limit",
        "joint_noise_std", "velocity_noise_std"}
_IMAGE = {"noise_std", "blur_sigma_px", "gain", "table_rgb", "table_texture", "occlusions"}
_OCCLUSION = {"rect_px", "colour", "from_s", "until_s"}
_PERTURBATION = {"translation", "rotation_deg"}
_BELIEF = {"hand_eye_error", "depth_scale", "target_error"}
_MOUNT = {"camera", "camera_pose", "target_on_tool"}
_HIDEABLE = {"dot": "dots", "tag": "markers"}
# Upper bounds of the image entries (grey levels, pixels, factor): beyond them a picture says
# nothing and the blur kernel grows without bound (common practice, no source).
_IMAGE_MAX = {"noise_std": 255.0, "blur_sigma_px": 100.0, "gain": 100.0, "table_texture": 255.0}


# Largest camera image side (pixels): the simulator renders every frame at this size.
MAX_IMAGE_SIDE = 8192


class ScenarioError(YamlFileError):
    """A scenario file that cannot be used; the message names the file and the entry."""


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


# ----------------------------------------------------------------------------- parsing helpers
class _Reader(EntryReader):
    """Checks one scenario file's entries; every error names the file and the entry."""

    kind = "scenario"
    error = ScenarioError

    def path(self, value, entry):
        path = Path(self.text(value, entry))
        if not path.is_absolute():
            path = paths.config_dir() / path
        try:
            found = path.is_file()
        except (OSError, ValueError):    # a name too long for the file system, a NUL byte
            found = False
        if not found:
            self.fail(entry, f"file not found: {brief(str(path))}")
        return path


def _perturbation(r: _Reader, value, entry) -> np.ndarray:
    """``[R(rotation vector) | translation]`` of a hand-eye perturbation entry."""
    value = r.mapping(value, entry, _PERTURBATION)
    t = r.vector(value.get("translation", [0, 0, 0]), f"{entry}.translation", 3)
    rv = r.vector(value.get("rotation_deg", [0, 0, 0]), f"{entry}.rotation_deg", 3)
    return transform(Rotation.from_rotvec(np.radians(rv)).as_matrix(), t)


def _joints(r: _Reader, value, entry, arm: ArmModel) -> np.ndarray:
    if not isinstance(value, dict):
        r.fail(entry, f"expected a mapping joint name -> position, got {brief(value)}")
    extra = sorted(set(value) - set(arm.joint_names), key=str)
    if extra:
        r.fail(entry, f"joint(s) {brief(extra)} are not on the chain {arm.joint_names}")
    positions = {k: r.number(v, f"{entry}.{k}") for k, v in value.items()}
    try:
        q = arm.q_from_mapping(positions)
    except ValueError as exc:
        r.fail(entry, str(exc))
    outside = [f"{n}={v:g} not in [{lo:g}, {hi:g}]"
               for n, v, lo, hi in zip(arm.joint_names, q, arm.lower, arm.upper)
               if not lo <= v <= hi]
    if outside:
        r.fail(entry, f"outside the URDF joint limits (rad): {'; '.join(outside)}")
    return q


def _home(r: _Reader, robot, urdf: Path, arm: ArmModel) -> np.ndarray:
    home = robot.get("home")
    if home is None or isinstance(home, str):
        path = urdf.with_suffix(".yaml") if home is None else r.path(home, "robot.home")
        if not path.is_file():
            r.fail("robot.home", f"not given and {path} does not exist")
        data = load_yaml(path, error=ScenarioError, prefix=f"{r.where}: robot.home: ")
        home = data.get("home") if isinstance(data, dict) else None
        if home is None:
            r.fail("robot.home", f"{path} has no 'home' mapping")
    return _joints(r, home, "robot.home", arm)


def _camera(r: _Reader, value):
    value = r.mapping(value, "camera", _CAMERA, {"width", "height", "fps", "intrinsics"})
    intr = r.mapping(value["intrinsics"], "camera.intrinsics", _INTRINSICS, _INTRINSICS)
    fx, fy, cx, cy = (r.number(intr[k], f"camera.intrinsics.{k}") for k in ("fx", "fy", "cx",
                                                                            "cy"))
    K = [[fx, 0.0, cx], [0.0, fy, cy], [0.0, 0.0, 1.0]]
    for key in ("width", "height"):
        if (isinstance(value[key], bool) or not isinstance(value[key], int)
                or not 0 < value[key] <= MAX_IMAGE_SIDE):
            r.fail(f"camera.{key}", f"expected a positive integer (pixels) up to "
                                    f"{MAX_IMAGE_SIDE}, got {brief(value[key])}")
    d = value.get("d", [])
    if not isinstance(d, (list, tuple)):
        r.fail("camera.d", f"expected a list of distortion coefficients, got {brief(d)}")
    d = [r.number(v, f"camera.d[{i}]") for i, v in enumerate(d)]
    model = r.text(value.get("distortion_model", "none"), "camera.distortion_model")
    try:
        camera = CameraModel(value["width"], value["height"], K, d, model)
    except ValueError as exc:
        r.fail("camera", str(exc))
    return camera, r.number(value["fps"], "camera.fps", positive=True)


def _target(r: _Reader, value, fixed: bool = False):
    value = r.mapping(value, "target", _TARGET, {"file"} if fixed else {"file", "pose"})
    if fixed and "pose" in value:
        r.fail("target.pose", "a fixed camera's target rides on the tool: give its pose as "
                              "mount.target_on_tool, not target.pose")
    path = r.path(value["file"], "target.file")
    try:
        target = load_target(path)
    except ValueError as exc:
        r.fail("target.file", str(exc))
    if not target.has_geometry:
        r.fail("target.file", f"target {target.name!r} gives no feature positions: the "
                              "simulator needs them to draw it")
    T = None if fixed else _pose(r, value["pose"], "target.pose")
    hidden = []
    hide = value.get("hide") or []
    if not isinstance(hide, list):
        r.fail("target.hide", f"expected a list of [dot, id] or [tag, id], got {brief(hide)}")
    for i, item in enumerate(hide):
        entry = f"target.hide[{i}]"
        if (not isinstance(item, (list, tuple)) or len(item) != 2
                or not isinstance(item[0], str) or item[0] not in _HIDEABLE
                or isinstance(item[1], bool) or not isinstance(item[1], int)):
            r.fail(entry, f"expected [dot, id] or [tag, id], got {brief(item)}")
        kind, ident = item
        if _HIDEABLE[kind] != target.kind:
            r.fail(entry, f"a {target.kind} target has no {kind} features")
        ids = [f.id for f in (target.dots if kind == "dot" else target.markers)]
        if ident not in ids:
            r.fail(entry, f"target {target.name!r} has no {kind} {ident}; ids: {brief(ids)}")
        hidden.append((kind, ident))
    return target, T, tuple(hidden)


def _pose(r: _Reader, value, entry) -> np.ndarray:
    pose = r.mapping(value, entry, _POSE, _POSE)
    return transform_from_xyz_rpy(r.vector(pose["xyz"], f"{entry}.xyz", 3),
                                  r.vector(pose["rpy_rad"], f"{entry}.rpy_rad", 3))


def _mount(r: _Reader, value) -> FixedCamera | None:
    """The ``mount`` entry: None for a wrist camera, else the true FixedCamera."""
    if value is None:
        return None
    value = r.mapping(value, "mount", _MOUNT, {"camera"})
    kind = r.text(value["camera"], "mount.camera")
    if kind == "wrist":
        extra = sorted(set(value) - {"camera"})
        if extra:
            r.fail("mount", f"{', '.join(extra)} apply to a fixed camera only")
        return None
    if kind != "fixed":
        r.fail("mount.camera", f"{brief(kind)}: expected wrist or fixed")
    for key in ("camera_pose", "target_on_tool"):
        if key not in value:
            r.fail("mount", f"a fixed camera needs mount.{key}")
    return FixedCamera(_pose(r, value["camera_pose"], "mount.camera_pose"),
                       _pose(r, value["target_on_tool"], "mount.target_on_tool"))


def _taught_pose(r: _Reader, value, T_base_target) -> np.ndarray:
    above = r.mapping(value, "taught.above_target", _ABOVE, {"distance"})
    d = r.number(above["distance"], "taught.above_target.distance", positive=True)
    a = np.radians(r.number(above.get("about_axis_deg", 0.0), "taught.above_target."
                                                                "about_axis_deg"))
    ox, oy = r.vector(above.get("offset_xy", [0, 0]), "taught.above_target.offset_xy", 2)
    R = Rotation.from_euler("z", a).as_matrix()
    return T_base_target @ transform(R, [ox, oy, -d])


def _start_offset(r: _Reader, value) -> np.ndarray:
    offset = r.mapping(value, "start.offset", _OFFSET)
    a = np.radians(r.number(offset.get("about_axis_deg", 0.0), "start.offset.about_axis_deg"))
    t = r.vector(offset.get("translation", [0, 0, 0]), "start.offset.translation", 3)
    tilt = np.radians(r.vector(offset.get("tilt_deg", [0, 0]), "start.offset.tilt_deg", 2))
    R = Rotation.from_rotvec([tilt[0], tilt[1], 0.0]).as_matrix() @ \
        Rotation.from_euler("z", a).as_matrix()
    return transform(R, t)


def _one_of(r: _Reader, value, entry, choices):
    value = r.mapping(value, entry, choices)
    if len(value) != 1:
        r.fail(entry, f"give exactly one of {sorted(choices)}")
    return next(iter(value.items()))


def _solve(r: _Reader, arm, T_goal, q_seed, q_rest, entry):
    try:
        return solve_camera_pose(arm, T_goal, q_seed, q_rest)
    except ValueError as exc:
        r.fail(entry, f"camera pose unreachable: {exc}")


def _image(r: _Reader, value) -> Photometric:
    value = r.mapping(value, "image", _IMAGE)
    occluders = []
    occlusions = value.get("occlusions") or []
    if not isinstance(occlusions, list):
        r.fail("image.occlusions", f"expected a list of occluders, got {brief(occlusions)}")
    for i, occ in enumerate(occlusions):
        entry = f"image.occlusions[{i}]"
        occ = r.mapping(occ, entry, _OCCLUSION, {"rect_px"})
        rect = r.vector(occ["rect_px"], f"{entry}.rect_px", 4)
        if rect[2] <= rect[0] or rect[3] <= rect[1]:
            r.fail(f"{entry}.rect_px", f"expected [x0, y0, x1, y1] with x1 > x0 and y1 > y0, "
                                       f"got {rect.tolist()}")
        fields = {"rect_px": tuple(rect)}
        if "colour" in occ:
            fields["colour"] = tuple(int(c) for c in r.vector(occ["colour"], f"{entry}.colour",
                                                              3))
        for key in ("from_s", "until_s"):
            if key in occ:
                fields[key] = r.number(occ[key], f"{entry}.{key}", minimum=0.0, allow_inf=True)
        occluders.append(Occluder(**fields))
    fields = {k: r.number(value[k], f"image.{k}") for k in
              ("noise_std", "blur_sigma_px", "gain", "table_texture") if k in value}
    for key, top in _IMAGE_MAX.items():
        if fields.get(key, 0.0) > top:
            r.fail(f"image.{key}", f"expected at most {top}, got {fields[key]!r}")
    if "table_rgb" in value:
        fields["table_rgb"] = tuple(int(c) for c in r.vector(value["table_rgb"],
                                                             "image.table_rgb", 3))
    try:
        return Photometric(**fields, occluders=tuple(occluders))
    except ValueError as exc:
        r.fail("image", str(exc))


def _controller(r: _Reader, value) -> dict:
    """The ``controller`` entry: parameter name -> value, checked against the schema."""
    from vservo_node import params   # the schema is above sim; imported only when used

    out = {}
    for name, given in r.mapping(value, "controller").items():
        param = params.BY_NAME.get(name) if isinstance(name, str) else None
        if param is None:
            r.fail("controller", params.unknown_name_message(name) if isinstance(name, str)
                   and len(name) <= 100 else f"{brief(name)}: unknown parameter")
        out[name], reason = params.check_value(param, given)
        if reason:
            r.fail("controller", reason if len(reason) <= 300 else reason[:300] + " ...")
    return out


def _dynamics(r: _Reader, value, seed) -> ArmDynamics:
    value = r.mapping(value, "arm", _ARM)
    fields = {k: r.number(v, f"arm.{k}") for k, v in value.items() if k != "decel_limit"}
    if "decel_limit" in value:
        d = value["decel_limit"]
        fields["decel_limit"] = (tuple(r.vector(d, "arm.decel_limit", len(d)))
                                 if isinstance(d, (list, tuple))
                                 else r.number(d, "arm.decel_limit"))
    try:
        return ArmDynamics(**fields, seed=seed)
    except ValueError as exc:
        r.fail("arm", str(exc))


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
