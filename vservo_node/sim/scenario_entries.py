"""The entries of a scenario file (``vservo_scenario/1``, documented in
vservo_node.sim.scenario): their keys and bounds, each entry checked with a message that names
the file and the entry."""
from __future__ import annotations

from pathlib import Path

import numpy as np
from scipy.spatial.transform import Rotation

from vservo_node import paths
from vservo_node.control.frames import transform, transform_from_xyz_rpy
from vservo_node.control.mounting import FixedCamera
from vservo_node.control.kinematics import ArmModel
from vservo_node.sim.arm import ArmDynamics
from vservo_node.sim.camera_sim import Occluder, Photometric
from vservo_node.sim.ik import solve_camera_pose
from vservo_node.vision.camera import CameraModel
from vservo_node.vision.targets import load_target
from vservo_node.yaml_entries import EntryReader
from vservo_node.yaml_files import YamlFileError, brief, load_yaml

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
