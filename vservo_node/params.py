"""The controller's parameter schema: one table drives everything parameters touch.

Declaration in the node (with descriptors and ranges), validation of parameter files and of live
updates, the offline ``vservo check PARAMS.yaml`` command and the README parameter table all read
``SCHEMA``. No rclpy here: the node converts entries to ParameterDescriptors itself.

Live updates: a value outside its range or choices is refused with the reason and the old value
is kept. While motion is enabled, entries marked ``tighten`` may only move in the safe direction
("down" = only decrease, e.g. speed limits); loosening them needs motion disabled first.
"""
from __future__ import annotations

import math
import re
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

from vservo_node.control.decoupled import SCHEMES
from vservo_node.control.interaction import INTERACTION_ESTIMATES
from vservo_node.yaml_files import YamlFileError, brief, load_yaml

COMMAND_INTERFACES = ("joint_velocity", "joint_trajectory", "tool_twist", "camera_twist")
DEPTH_SOURCES = ("constant", "taught", "target_model", "depth_image")
# gain x (loop delay + cycle time) must stay below this (common practice, no source).
DELAY_GAIN_BOUND = 0.3


@dataclass(frozen=True)
class Param:
    name: str
    type: type          # bool, int, float, str, list (of float or str: see item)
    default: Any
    description: str
    unit: str = ""
    low: float | None = None
    high: float | None = None
    choices: tuple[str, ...] = ()
    item: type | None = None   # element type of list parameters
    length: tuple[int, ...] = ()  # allowed list lengths (empty = any)
    tighten: str = ""   # "down": while enabled may only decrease; "up": only increase
    required: bool = False  # must be given (no safe default exists)

    def type_name(self) -> str:
        if self.type is list:
            return f"{self.item.__name__}[]"
        return self.type.__name__


def _p(name, type_, default, description, **kw) -> Param:
    return Param(name, type_, default, description, **kw)


SCHEMA: tuple[Param, ...] = (
    # --- robot model ------------------------------------------------------------------------
    _p("robot.urdf_path", str, "", "URDF file; empty: the robot_description parameter, else the "
       "robot_description topic (transient local)"),
    _p("robot_description", str, "", "URDF XML text, as robot_state_publisher takes it; used "
       "when robot.urdf_path is empty"),
    _p("robot.base_frame", str, "base_link", "frame the arm Jacobian is expressed in"),
    _p("robot.tool_frame", str, "tool0", "end of the servo chain (flange or tool frame)"),
    _p("robot.camera_frame", str, "camera_optical_frame",
       "camera optical frame (z forward, x right, y down); must be rigid to the tool frame"),
    _p("robot.hand_eye", list, [], "pose of the camera optical frame in the tool frame "
       "[x, y, z, qx, qy, qz, qw] (m, quaternion x,y,z,w); empty: from the URDF chain",
       item=float, length=(0, 7)),
    _p("robot.camera_mount", str, "wrist", "where the camera is: wrist (on the tool; "
       "robot.camera_frame / robot.hand_eye) or fixed (in the cell, watching the target carried "
       "by the tool; robot.fixed_camera_pose or robot.fixed_camera_frame, and "
       "robot.target_on_tool): README, Fixed camera", choices=("wrist", "fixed")),
    _p("robot.fixed_camera_pose", list, [], "fixed camera: pose of its optical frame in "
       "robot.base_frame [x, y, z, qx, qy, qz, qw] (m, quaternion x,y,z,w); empty: "
       "robot.fixed_camera_frame", item=float, length=(0, 7)),
    _p("robot.fixed_camera_frame", str, "", "fixed camera: its optical frame in the URDF (rigid "
       "to the base, e.g. on a stand); used when robot.fixed_camera_pose is empty"),
    _p("robot.target_on_tool", list, [], "fixed camera: pose of the target's frame (the target "
       "file's) in the tool frame [x, y, z, qx, qy, qz, qw] (m, quaternion x,y,z,w)",
       item=float, length=(0, 7)),
    _p("robot.tool_point", list, [0.0, 0.0, 0.0], "point whose linear speed is limited, in the "
       "tool frame (e.g. the TCP)", unit="m", item=float, length=(3,)),
    _p("robot.min_joints", int, 6, "fewest joints accepted in the servo chain (IBVS of a 6-dof "
       "camera motion needs 6)", low=1, high=20),
    # --- target, reference, depth -------------------------------------------------------------
    _p("target.file", str, "tray_dots", "target file: shipped name or path"),
    _p("reference.file", str, "", "taught reference file to servo to (YAML); required to start"),
    _p("reference.directory", str, "references", "where capture_reference writes reference files"),
    _p("reference.name", str, "station_1", "name of the reference capture_reference writes"),
    _p("depth.source", str, "taught", "where per-point depth comes from", choices=DEPTH_SOURCES),
    _p("depth.constant_m", float, 0.4, "depth used by depth.source=constant", unit="m",
       low=0.02, high=10.0),
    # --- control law ---------------------------------------------------------------------------
    _p("control.interaction_estimate", str, "blended", "which features the interaction matrix "
       "is evaluated at: current_view, taught_view, or blended (their mean)",
       choices=INTERACTION_ESTIMATES),
    _p("control.scheme", str, "point", "control law: point (IBVS on the image points) or "
       "decoupled (straight camera path to the taught pose with the target's centre kept in "
       "view; any turn about the optical axis up to 180 deg; needs taught depths and 4 points: "
       "vservo_node/control/decoupled.py)", choices=SCHEMES),
    _p("control.gain_near", float, 1.0, "gain at zero image error", unit="1/s", low=0.01,
       high=10.0, tighten="down"),
    _p("control.gain_far", float, 0.5, "gain for large image errors", unit="1/s", low=0.01,
       high=10.0, tighten="down"),
    _p("control.gain_half_error_px", float, 60.0, "RMS error at which the gain is halfway "
       "between near and far", unit="px", low=0.1, high=5000.0),
    _p("control.soft_start_s", float, 0.5, "time constant of the soft start (first command "
       "zero); restarted when the matched feature set changes", unit="s", low=0.0, high=10.0),
    _p("control.singular_threshold", float, 0.003, "judged singular value below which damping "
       "rises (normalized image units per rad)", low=1e-6, high=10.0),
    _p("control.max_damping", float, 0.003, "damping at a singularity", low=1e-6, high=10.0),
    _p("control.null_space_gain", float, 0.5, "gain of the joint-limit avoidance task in the "
       "null space (redundant arms; 0 = off)", unit="1/s", low=0.0, high=10.0),
    _p("control.tolerance_px", float, 0.5, "RMS image error that counts as arrived (0 = not "
       "used; with tolerance_mm/_deg both must hold)", unit="px", low=0.0, high=50.0),
    _p("control.tolerance_mm", float, 0.0, "arrived when the camera's distance from the taught "
       "pose, estimated from the features and averaged over control.dwell_s, is within this "
       "(0 = not used)", unit="mm", low=0.0, high=100.0),
    _p("control.tolerance_deg", float, 0.0, "arrived when the camera's rotation from the taught "
       "pose, estimated likewise, is within this (0 = not used)", unit="deg", low=0.0,
       high=45.0),
    _p("control.dwell_s", float, 0.3, "time the error must stay below tolerance", unit="s",
       low=0.0, high=10.0),
    _p("control.settled_joint_speed", float, 0.01, "joint speeds below this count as stopped",
       unit="rad/s", low=1e-5, high=1.0),
    _p("control.min_features", int, 4, "fewest matched points to servo on (three give several "
       "global minima)", low=3, high=1000, tighten="up"),
    _p("control.max_run_s", float, 60.0, "longest run before a halt", unit="s", low=0.1,
       high=3600.0, tighten="down"),
    _p("control.max_initial_error_px", float, 400.0, "refuse to start above this RMS error",
       unit="px", low=0.0, high=1e5, tighten="down"),
    _p("control.direction_probe_px", float, 6.0, "start nod: at the start of a run the camera "
       "tilts about its own centre by up to this feature shift and back, so a wrong hand-eye or "
       "optical frame, or a command order that swaps the joints the nod moves, halts "
       "(wrong_direction) within the nod; 0 = no nod",
       unit="px", low=0.0, high=50.0, tighten="up"),
    _p("control.direction_probe_s", float, 0.3, "duration of the start nod", unit="s",
       low=0.05, high=5.0),
    _p("control.predict_between_frames", bool, False, "at each output tick, re-run the law on "
       "the features predicted from the joint travel since the last image (first order); helps "
       "slow cameras"),
    _p("control.loop_delay_s", float, 0.03, "expected image-to-command delay (checked against "
       "the gain)", unit="s", low=0.0, high=2.0),
    # --- limits --------------------------------------------------------------------------------
    _p("limits.joint_velocity_scale", float, 0.5, "fraction of the URDF joint velocity limits",
       low=0.01, high=1.0, tighten="down"),
    _p("limits.joint_acceleration", list, [], "per-joint acceleration limits in chain order, or "
       "one value for all (the URDF has none)", unit="rad/s^2", item=float, required=True,
       tighten="down", low=1e-3, high=100.0),
    _p("limits.position_margin", float, 0.03, "keep joints this far inside their URDF limits",
       unit="rad", low=0.0, high=1.0, tighten="up"),
    _p("limits.tool_linear_speed", float, 0.10, "linear speed limit of robot.tool_point",
       unit="m/s", low=0.001, high=0.25, tighten="down"),
    _p("limits.camera_linear_speed", float, 0.10, "linear speed limit of the camera", unit="m/s",
       low=0.001, high=0.25, tighten="down"),
    _p("limits.angular_speed", float, 0.6, "angular speed limit of the tool", unit="rad/s",
       low=0.001, high=3.0, tighten="down"),
    _p("limits.max_translation_m", float, 0.30, "motion envelope: largest tool translation from "
       "the start pose", unit="m", low=0.0, high=2.0, tighten="down"),
    _p("limits.max_rotation_deg", float, 180.0, "motion envelope: largest tool rotation from the "
       "start pose", unit="deg", low=0.0, high=360.0, tighten="down"),
    _p("limits.min_camera_distance_m", float, 0.08, "halt when a feature comes closer than this",
       unit="m", low=0.0, high=5.0, tighten="up"),
    # --- inputs, outputs, timing ---------------------------------------------------------------
    _p("io.command_interface", str, "joint_velocity", "what the node publishes",
       choices=COMMAND_INTERFACES),
    _p("io.command_joint_order", list, [], "joint order of the downstream controller's command "
       "array; empty: servo chain order", item=str),
    _p("io.camera_rate_hz", float, 30.0, "expected camera frame rate (the servo loop's cycle; "
       "checked against the gain)", unit="Hz", low=0.5, high=1000.0),
    _p("io.output_rate_hz", float, 125.0, "command output rate, independent of the camera",
       unit="Hz", low=10.0, high=1000.0),
    _p("io.image_timeout_s", float, 0.25, "halt when no image arrived for this long", unit="s",
       low=0.01, high=5.0, tighten="down"),
    _p("io.joint_state_timeout_s", float, 0.1, "halt when no joint state arrived for this long",
       unit="s", low=0.005, high=5.0, tighten="down"),
    _p("io.require_permit", bool, False, "require a fresh True on cell/motion_permit to move",
       tighten="up"),
    _p("io.permit_timeout_s", float, 0.5, "a permit older than this counts as withdrawn",
       unit="s", low=0.01, high=10.0, tighten="down"),
    _p("io.stamp_tolerance_s", float, 2.0, "images and joint states stamped further than this "
       "from the node's clock (future or past) are refused and counted: a stamp far off (a "
       "clock out of step, a corrupt message) must not evict good joint history or pair a "
       "frame with the wrong joints", unit="s", low=0.01, high=60.0, tighten="down"),
    _p("io.camera_time_offset_s", float, 0.0, "added to image stamps (cameras whose stamps lag "
       "the shutter use a negative value)", unit="s", low=-1.0, high=1.0),
    _p("io.image_rectified", bool, False, "the image topic carries rectified images "
       "(image_rect): use camera_info's P and no distortion, never undistort twice"),
    _p("io.compressed_image", bool, False, "subscribe to sensor_msgs/CompressedImage"),
    _p("io.sim_truth", bool, False, "subscribe to a simulated cell's ground truth (sim/"
       "camera_pose_truth, sim/taught_camera_pose) for the true pose error in the run result; "
       "simulated cells only"),
    _p("io.publish_overlay", bool, False, "publish an overlay image of detections and errors"),
)

BY_NAME = {p.name: p for p in SCHEMA}


@dataclass
class CheckResult:
    values: dict[str, Any]
    errors: list[str] = field(default_factory=list)
    warnings: list[str] = field(default_factory=list)

    @property
    def ok(self) -> bool:
        return not self.errors


def defaults() -> dict[str, Any]:
    return {p.name: (list(p.default) if isinstance(p.default, list) else p.default)
            for p in SCHEMA}


def check_value(param: Param, value: Any) -> tuple[Any, str | None]:
    """Coerce and range-check one value. Returns (value, None) or (None, reason)."""
    expected = f"expected {param.type_name()}"
    if param.type is bool:
        if not isinstance(value, bool):
            return None, f"{param.name}: {value!r} is not a bool ({expected})"
        return value, None
    if param.type is list:
        if not isinstance(value, (list, tuple)):
            return None, f"{param.name}: {value!r} is not a list ({expected})"
        items = []
        for v in value:
            if param.item is float and isinstance(v, (int, float)) and not isinstance(v, bool):
                if not math.isfinite(v):
                    return None, f"{param.name}: {v!r} is not finite"
                items.append(float(v))
            elif param.item is str and isinstance(v, str):
                items.append(v)
            else:
                return None, f"{param.name}: element {v!r} is not a {param.item.__name__}"
        if param.length and len(items) not in param.length:
            return None, (f"{param.name}: has {len(items)} elements, expected "
                          f"{' or '.join(map(str, param.length))}")
        if param.item is float and param.low is not None:
            outside = [v for v in items if not param.low <= v <= param.high]
            if outside:
                return None, (f"{param.name}: {outside} outside [{param.low}, {param.high}]"
                              f"{' ' + param.unit if param.unit else ''}")
        return items, None
    if param.type is float:
        if isinstance(value, bool) or not isinstance(value, (int, float)):
            return None, f"{param.name}: {value!r} is not a number ({expected})"
        value = float(value)
        if not math.isfinite(value):
            return None, f"{param.name}: {value!r} is not finite"
    elif param.type is int:
        if isinstance(value, bool) or not isinstance(value, int):
            return None, f"{param.name}: {value!r} is not an integer ({expected})"
    elif param.type is str:
        if not isinstance(value, str):
            return None, f"{param.name}: {value!r} is not a string ({expected})"
        if param.choices and value not in param.choices:
            return None, (f"{param.name}: '{value}' is not one of "
                          f"{', '.join(param.choices)}")
        return value, None
    if param.low is not None and value < param.low or param.high is not None and value > param.high:
        return None, (f"{param.name}: {value} is outside [{param.low}, {param.high}]"
                      f"{' ' + param.unit if param.unit else ''}")
    return value, None


def check_change(name: str, old: Any, new: Any, motion_enabled: bool) -> str | None:
    """Reason to refuse a live update of one parameter, or None when it may be applied."""
    param = BY_NAME.get(name)
    if param is None:
        return f"unknown parameter {name}"
    value, reason = check_value(param, new)
    if reason:
        return reason
    if motion_enabled and param.tighten:
        loosens = _loosens(param, old, value)
        if loosens:
            verbs = ("switched off", "switched on") if param.type is bool else ("lowered",
                                                                                "raised")
            return (f"{name}: may only be {verbs[param.tighten == 'up']} "
                    f"while motion is enabled ({old} -> {value}); disable motion first")
    return None


def _loosens(param: Param, old: Any, new: Any) -> bool:
    if isinstance(new, list):
        if not old:
            return False
        if len(new) != len(old):
            return True
        return any(_loosens(param, o, n) for o, n in zip(old, new))
    return new > old if param.tighten == "down" else new < old


def unknown_name_message(name: str) -> str:
    """'<name>: unknown parameter', with the nearest schema name when one is close (a typo in
    the section or in the leaf: difflib's ratio over whole names and over leaves)."""
    import difflib

    names = [p.name for p in SCHEMA]
    close = difflib.get_close_matches(str(name), names, n=1, cutoff=0.6)
    if not close:
        leaf = str(name).split(".")[-1]
        by_leaf = {p.name.split(".")[-1]: p.name for p in SCHEMA}
        leaves = difflib.get_close_matches(leaf, list(by_leaf), n=1, cutoff=0.7)
        close = [by_leaf[leaves[0]]] if leaves else []
    return f"{name}: unknown parameter" + (f" (did you mean {close[0]}?)" if close else "")


def validate(values: dict[str, Any]) -> CheckResult:
    """Merge values over the defaults and check each; unknown names are errors."""
    merged = defaults()
    result = CheckResult(merged)
    for name, value in values.items():
        param = BY_NAME.get(name)
        if param is None:
            result.errors.append(unknown_name_message(name))
            continue
        clean, reason = check_value(param, value)
        if reason:
            result.errors.append(reason)
        else:
            merged[name] = clean
    for param in SCHEMA:
        if param.required and not merged[param.name]:
            result.errors.append(f"{param.name}: required ({param.description})")
    product = max(merged["control.gain_near"], merged["control.gain_far"]) * (
        merged["control.loop_delay_s"] + 1.0 / merged["io.camera_rate_hz"])
    if product >= DELAY_GAIN_BOUND:
        result.errors.append(
            f"gain x (loop delay + cycle) = {product:.3f} >= {DELAY_GAIN_BOUND} (common practice, "
            "no source): lower control.gain_near/gain_far or the delay")
    if merged["control.scheme"] == "decoupled" and merged["control.min_features"] < 4:
        result.errors.append(
            f"control.scheme decoupled estimates a pose by PnP, which needs 4 points or more: "
            f"control.min_features = {merged['control.min_features']}; expected >= 4")
    result.errors.extend(_mount_errors(merged))
    if (merged["control.tolerance_px"] <= 0 and merged["control.tolerance_mm"] <= 0
            and merged["control.tolerance_deg"] <= 0):
        result.errors.append("no arrival criterion: control.tolerance_px, tolerance_mm and "
                             "tolerance_deg are all 0; set at least one above 0")
    if merged["control.gain_near"] < merged["control.gain_far"]:
        result.warnings.append("control.gain_near < control.gain_far: the gain falls near the goal,"
                               " which slows the final approach")
    return result


def _mount_errors(merged: dict[str, Any]) -> list[str]:
    """What a fixed camera mounting lacks (robot.camera_mount fixed)."""
    if merged["robot.camera_mount"] != "fixed":
        return []
    errors = []
    if len(merged["robot.target_on_tool"]) != 7:
        errors.append("robot.camera_mount fixed needs robot.target_on_tool: the target's pose "
                      "in the tool frame [x, y, z, qx, qy, qz, qw]")
    if not merged["robot.fixed_camera_pose"] and not merged["robot.fixed_camera_frame"]:
        errors.append("robot.camera_mount fixed needs the camera's pose: robot.fixed_camera_pose"
                      " [x, y, z, qx, qy, qz, qw] in the base frame, or robot.fixed_camera_frame"
                      " (a URDF frame rigid to the base)")
    if merged["io.command_interface"] == "camera_twist":
        errors.append("io.command_interface camera_twist commands the camera's motion; with "
                      "robot.camera_mount fixed the camera stands still: use joint_velocity, "
                      "joint_trajectory or tool_twist")
    for name in ("robot.target_on_tool", "robot.fixed_camera_pose"):
        pose = merged[name]
        if len(pose) == 7 and math.sqrt(sum(v * v for v in pose[3:])) < 1e-6:
            errors.append(f"{name}: quaternion {pose[3:]} has (near) zero norm; expected a "
                          "rotation (qx, qy, qz, qw)")
    return errors


def flatten(tree: dict[str, Any], prefix: str = "") -> dict[str, Any]:
    """{'a': {'b': 1}} -> {'a.b': 1} (ROS 2 parameter files nest dotted names)."""
    flat: dict[str, Any] = {}
    for key, value in tree.items():
        name = f"{prefix}{key}"
        if isinstance(value, dict):
            flat.update(flatten(value, name + "."))
        else:
            flat[name] = value
    return flat


def _flatten_checked(tree: dict, path, where: str, prefix: str = "") -> dict[str, Any]:
    """``flatten`` for a parameter file: each leaf must be a value or a list of values (what a
    ROS 2 parameter can hold); YamlFileError naming the key otherwise."""
    flat: dict[str, Any] = {}
    for key, value in tree.items():
        name = f"{prefix}{key}"
        if isinstance(value, dict):
            flat.update(_flatten_checked(value, path, where, name + "."))
        elif isinstance(value, list) and any(isinstance(v, (dict, list)) for v in value):
            raise YamlFileError(f"{path}: {where}.{name}: a list of mappings or lists; expected "
                                f"a value or a list of values, got {brief(value)}")
        else:
            flat[name] = value
    return flat


def _node_key_regex(key: str) -> re.Pattern:
    """The fully qualified node names a parameter file's node key applies to, as rcl matches
    them: a key without a leading '/' starts at the root ('vservo' is '/vservo'), '/**' stands
    for any number of namespace tokens (none included), '/*' for exactly one token (ROS 2
    documentation, "Understanding parameters", parameter file wildcards; from memory, and
    tests/install checks that a node under a namespace takes a '/**/vservo' file's values)."""
    key = key if key.startswith("/") else "/" + key
    parts = re.split(r"(/\*\*|/\*)", key)
    body = "".join({"/**": "(?:/[^/]+)*", "/*": "/[^/]+"}.get(part, re.escape(part))
                   for part in parts)
    return re.compile(body + r"\Z")


def _namespace(key: str) -> str:
    """Namespace part of a node key without wildcards: 'vservo' -> '/', '/a/vservo' -> '/a'."""
    return "/" + key.strip("/").rpartition("/")[0]


def load_params_file(path: str | Path, node_name: str = "vservo") -> dict[str, Any]:
    """Read the ros__parameters a node would take from a ROS 2 parameter file.

    ``node_name``: a fully qualified name ('/cell1/vservo') takes every section whose key
    applies to exactly that node ('/**', '/**/vservo', '/cell1/*', '/cell1/vservo'); a plain
    name ('vservo', the default) takes the sections that apply to a node of that name in some
    namespace ('/**', '/**/vservo', 'vservo', '/vservo', '/cell1/vservo', '/cell1/*'), and
    refuses a file whose exact sections name several namespaces (ambiguous: give the full
    name). Matching sections apply in file order, a later one overriding an earlier one, as
    rclpy applies them (measured with rclpy 9.1.2: '/cell1/vservo' then '/**/vservo' leaves
    the second's values).

    YamlFileError (a ValueError) naming the file and the key for anything but
    ``{node: {ros__parameters: {name: value, ...}}}`` in a matching section (see
    ``yaml_files.load_yaml``: size cap, no anchors/aliases or tags).
    """
    data = load_yaml(path)
    if data is None:
        return {}
    if not isinstance(data, dict):
        raise YamlFileError(f"{path}: top level: expected a mapping of node names to "
                            f"ros__parameters, got {brief(data)}")
    short = node_name.rstrip("/").rpartition("/")[2]
    matched = []
    for key, section in data.items():
        key = str(key)
        if node_name.startswith("/"):
            hit = _node_key_regex(key).match(node_name) is not None
        else:
            hit = key.rstrip("/").rpartition("/")[2] in (short, "*", "**")
        if not hit:
            continue
        if not isinstance(section, dict) or not isinstance(section.get("ros__parameters"), dict):
            raise YamlFileError(f"{path}: {key}: expected a mapping with 'ros__parameters' (a "
                                f"mapping of parameter names to values), got {brief(section)}")
        matched.append(key)
    exact = [k for k in matched if "*" not in k]
    namespaces = sorted({_namespace(k) for k in exact})
    if len(namespaces) > 1:
        raise YamlFileError(f"{path}: sections for node '{node_name}' in several namespaces "
                            f"({', '.join(exact)}): give the node's full name, e.g. "
                            f"{namespaces[-1].rstrip('/')}/{short}")
    values: dict[str, Any] = {}
    for key in matched:
        values.update(_flatten_checked(data[key]["ros__parameters"], path,
                                       f"{key}.ros__parameters"))
    if not values and data:
        raise YamlFileError(f"{path}: no ros__parameters for node '{node_name}' (keys such as "
                            f"/**/{short}, /**, {short}; found: {brief(', '.join(map(str, data)))})")
    return values


def markdown_table() -> str:
    rows = ["| parameter | type | default | range / choices | unit | description |",
            "|---|---|---|---|---|---|"]
    for p in SCHEMA:
        if p.choices:
            rng = ", ".join(p.choices)
        elif p.low is not None or p.high is not None:
            rng = f"{p.low} .. {p.high}"
        else:
            rng = ""
        default = "(required)" if p.required else f"`{p.default!r}`"
        note = {"down": " Only lowered while enabled.", "up": " Only raised while enabled."}
        rows.append(f"| `{p.name}` | {p.type_name()} | {default} | {rng} | {p.unit} | "
                    f"{p.description}.{note.get(p.tighten, '')} |")
    return "\n".join(rows)
