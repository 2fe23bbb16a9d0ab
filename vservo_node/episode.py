"""Headless closed-loop episodes: the Servo against a kinematic arm, no ROS, no clocks.

One loop serves the core tests, the demo's core part and the sweeps. Each period it senses
(features of the true camera pose), lets the Servo observe and command, and integrates the
joints with the command (an ideal velocity-controlled arm; sim/ adds lag, latency and noise).

Sensing is a callable ``sense(q, t) -> Observation | None`` so ideal projected points (this
module's :class:`PointScene`) and rendered-and-detected images (sim/) plug in alike.
"""
from __future__ import annotations

import math
import time
from dataclasses import dataclass, field
from typing import Callable

import numpy as np

from vservo_node.control import frames
from vservo_node.control.mounting import mount_from_params
from vservo_node.interface import SENSING_MODES
from vservo_node.servo import Observation, Servo, ServoSettings, TaughtView
from vservo_node.settings import Settings, depth_settings, servo_config
from vservo_node.settings import limits_for  # noqa: F401 - re-exported: callers import it here


@dataclass
class PointScene:
    """Target points fixed in the base frame, seen by a camera on the arm.

    ``points_base`` (N, 3) m; ``camera`` a CameraModel; ``arm_true`` the arm as it really is
    (its T_tool_camera is the true hand-eye, which may differ from what the servo believes).
    """

    points_base: np.ndarray
    camera: object
    arm_true: object
    keys: tuple = ()

    def __post_init__(self) -> None:
        self.points_base = np.asarray(self.points_base, dtype=float)
        if not self.keys:
            self.keys = tuple(range(len(self.points_base)))

    def view(self, q) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
        """(xy (N,2) normalized, uv (N,2) px, Z (N,) m) of the points at joint position q."""
        T_camera_base = frames.invert(self.arm_true.camera_pose(q))
        p = (T_camera_base[:3, :3] @ self.points_base.T).T + T_camera_base[:3, 3]
        xy = p[:, :2] / p[:, 2:3]
        return xy, self.camera.normalized_to_pixels(xy), p[:, 2]

    def taught_view(self, q_taught, depth_scale: float = 1.0) -> TaughtView:
        """The view at q_taught; its model points are the points in the base frame (fixed to
        the target as much as the target frame is)."""
        xy, uv, z = self.view(q_taught)
        return TaughtView(self.keys, xy, uv, z * depth_scale,
                          image_size=(self.camera.width, self.camera.height),
                          model=self.points_base)

    def sense(self, depth: str = "true", depth_scale: float = 1.0
              ) -> Callable[[np.ndarray, float], Observation | None]:
        """A sensing callable: ideal features, with true depths scaled by depth_scale
        (depth='true') or none (depth='none': the servo's depth source decides)."""
        def _sense(q, t):
            xy, uv, z = self.view(q)
            if np.any(z <= 0):
                return None
            return Observation(self.keys, uv, xy, z * depth_scale if depth == "true" else None)
        return _sense


@dataclass
class EpisodeResult:
    converged: bool
    reason: str
    time_s: float
    final_rms_px: float
    pose_error_mm: float
    pose_error_deg: float
    peak_joint_speed_ratio: float       # max over time and joints of |dq| / URDF limit
    peak_tool_speed: float              # m/s, tool point
    peak_camera_speed: float            # m/s
    peak_angular_speed: float           # rad/s
    min_limit_margin: float             # rad, closest approach to a URDF position limit
    initial_rms_px: float
    camera_depth_change_max: float      # m, largest motion along the taught optical axis
    # the servo's own estimate at the end (control.pose_error, mean over the last dwell_s; NaN
    # without one) and its single-frame spread
    estimated_pose_error_mm: float = math.nan
    estimated_pose_error_deg: float = math.nan
    estimated_pose_error_spread_mm: float = math.nan
    estimated_pose_error_spread_deg: float = math.nan
    statuses: list = field(default_factory=list, repr=False)
    q_trace: np.ndarray | None = field(default=None, repr=False)
    camera_trace: np.ndarray | None = field(default=None, repr=False)
    # with record=True, one entry per camera frame: (t s, keys, uv (M, 2) px, uv_ref (M, 2) px)
    # of the features seen that the taught view holds, in the order seen (what the node
    # publishes on servo/features and servo/feature_error); empty arrays for a frame without
    feature_trace: list = field(default_factory=list, repr=False)
    # with record=True and image sensing: the taught reference (vision.reference.Reference:
    # its image and joints), which the episode's run record keeps as the node's record does
    reference: object | None = field(default=None, repr=False)

    def summary(self) -> dict:
        keys = ("converged", "reason", "time_s", "final_rms_px", "pose_error_mm",
                "pose_error_deg", "peak_joint_speed_ratio", "peak_tool_speed",
                "peak_camera_speed", "peak_angular_speed", "min_limit_margin", "initial_rms_px",
                "estimated_pose_error_mm", "estimated_pose_error_deg",
                "estimated_pose_error_spread_mm", "estimated_pose_error_spread_deg")
        return {k: getattr(self, k) for k in keys}


def _start(servo: Servo, q0, t: float) -> None:
    """Enable and start ``servo`` at joints q0 (rad) and time t (s); RuntimeError if refused."""
    servo.enable(True, t)
    ok, why = servo.start(q0, t)
    if not ok:
        raise RuntimeError(f"servo refused to start: {why}")


class _Meter:
    """What an episode measures at its output ticks: peaks and margins of the true arm motion,
    the first finite RMS error and, with ``record``, the statuses, joints (rad) and camera
    positions (m, base frame). With a fixed camera (``mount``, control.mounting) the judged
    pose is the tool's: the goal, the depth change and the trace are the tool's, and the
    "camera" speed is the target origin's (the point the limiter bounds in its place)."""

    def __init__(self, arm_true, T_base_camera_goal, q0, tool_point, record: bool = False,
                 mount=None):
        self.arm = arm_true
        self.mount = mount
        self.tool_point = np.asarray(tool_point, dtype=float)
        self.T_goal = T_base_camera_goal
        self.axis = T_base_camera_goal[:3, 2]
        self.depth0 = float(self.axis @ self.judged_pose(q0)[:3, 3])
        self.finite = np.isfinite(arm_true.lower)
        self.lower_finite = arm_true.lower[self.finite]
        self.upper_finite = arm_true.upper[self.finite]
        self.peaks = dict(joint=0.0, tool=0.0, camera=0.0, angular=0.0)
        self.margin = math.inf
        self.depth_dev = 0.0
        self.initial_rms = math.nan
        self.record = record
        self.statuses, self.qs, self.cams, self.features = [], [], [], []
        self.cycle_ms = math.nan   # compute time of the frame since the last tick, ms
        self.reference = None      # the taught Reference, kept with record

    def frame(self, t: float, obs, reference, compute_s: float = math.nan) -> None:
        """With ``record``: the features of the frame at ``t`` (s) that the taught view
        ``reference`` (a TaughtView, or None) holds, and their taught pixels; ``compute_s``:
        the frame's perception and servo time, the next status record's ``cycle_ms`` (the
        node's: perception + servo time of the image; NaN on ticks without a frame)."""
        if not self.record:
            return
        self.cycle_ms = 1e3 * compute_s
        keys, uv, uv_ref = [], [], []
        index = reference.index() if reference is not None else {}
        for i, key in enumerate(obs.keys if obs is not None else ()):
            if key in index:
                keys.append(key)
                uv.append(np.asarray(obs.uv[i], float))
                uv_ref.append(np.asarray(reference.uv[index[key]], float))
        self.features.append((float(t), tuple(keys), np.reshape(uv, (-1, 2)),
                              np.reshape(uv_ref, (-1, 2))))

    def add(self, q, dq, status: dict) -> None:
        """Account for the true state (q rad, dq rad/s) and the servo's status at this tick."""
        arm, p = self.arm, self.peaks
        p["joint"] = max(p["joint"], float(np.max(np.abs(dq) / arm.velocity_limits)))
        # one kinematics update for the three speeds (the values of point_jacobian_base and
        # jacobian_base); |v| as np.linalg.norm computes it for a vector, sqrt(v . v)
        J_tool, J_camera, J_angular = (
            arm.cartesian_jacobians(q, self.tool_point) if self.mount is None
            else self.mount.cartesian_jacobians(arm, q, self.tool_point))
        for name, J in (("tool", J_tool), ("camera", J_camera), ("angular", J_angular)):
            v = J @ dq
            p[name] = max(p[name], math.sqrt(v @ v))
        q_finite = q[self.finite]
        self.margin = min(self.margin, float((q_finite - self.lower_finite).min()),
                          float((self.upper_finite - q_finite).min()))
        T_cam = self.judged_pose(q)
        self.depth_dev = max(self.depth_dev, abs(float(self.axis @ T_cam[:3, 3]) - self.depth0))
        if math.isnan(self.initial_rms) and not math.isnan(status["rms_px"]):
            self.initial_rms = status["rms_px"]
        if self.record:
            self.statuses.append({**status, "cycle_ms": self.cycle_ms})
            self.cycle_ms = math.nan
            self.qs.append(np.array(q, dtype=float))
            self.cams.append(T_cam[:3, 3].copy())

    def judged_pose(self, q) -> np.ndarray:
        return self.arm.camera_pose(q) if self.mount is None else self.arm.fk(q)

    def result(self, servo: Servo, status: dict, t: float, T_base_camera_end) -> EpisodeResult:
        """The episode's result: the servo's run result (``episode_timeout`` when the run did
        not end by time t, s), what was measured, and the pose error of the true camera pose
        at the end against the true taught one."""
        moved_m, turned = frames.pose_error(self.T_goal, T_base_camera_end)
        result = servo.result or {"converged": False, "reason": "episode_timeout",
                                  "final_rms_px": status["rms_px"], "time_s": t}
        return EpisodeResult(
            converged=bool(result["converged"]), reason=result["reason"] or "",
            time_s=float(result["time_s"]), final_rms_px=float(result["final_rms_px"]),
            pose_error_mm=moved_m * 1e3, pose_error_deg=math.degrees(turned),
            peak_joint_speed_ratio=self.peaks["joint"], peak_tool_speed=self.peaks["tool"],
            peak_camera_speed=self.peaks["camera"], peak_angular_speed=self.peaks["angular"],
            min_limit_margin=self.margin, initial_rms_px=self.initial_rms,
            camera_depth_change_max=self.depth_dev, statuses=self.statuses,
            q_trace=np.array(self.qs) if self.record else None,
            camera_trace=np.array(self.cams) if self.record else None,
            feature_trace=self.features, reference=self.reference if self.record else None,
            **_estimated_pose_error(servo))


def _estimated_pose_error(servo: Servo) -> dict:
    """The servo's pose-error estimate over its last dwell (control.pose_error) at the end of
    an episode, whether or not the run ended."""
    summary = servo.pose_summary()
    if summary is None:
        return {}
    return {"estimated_pose_error_mm": summary.mm, "estimated_pose_error_deg": summary.deg,
            "estimated_pose_error_spread_mm": summary.spread_mm,
            "estimated_pose_error_spread_deg": summary.spread_deg}


def run_episode(servo: Servo, sense, q0, T_base_camera_goal, arm_true, *, rate_hz: float = 100.0,
                duration_s: float = 15.0, tool_point=(0.0, 0.0, 0.0),
                record: bool = False) -> EpisodeResult:
    """Enable and start ``servo`` at q0, loop until the run ends or duration_s, and measure.

    ``T_base_camera_goal``: the true taught camera pose, for the pose error; ``arm_true``
    measures speeds and poses as they really are.
    """
    dt = 1.0 / rate_hz
    q = np.array(q0, dtype=float)
    _start(servo, q, 0.0)
    meter = _Meter(arm_true, T_base_camera_goal, q, tool_point, record)
    t = 0.0
    steps = int(round(duration_s * rate_hz))
    for k in range(steps + 1):
        t = k * dt
        t0 = time.perf_counter()
        obs = sense(q, t)
        cmd, status = servo.step(obs, q, t, dt)
        meter.frame(t, obs, servo.reference, time.perf_counter() - t0)
        meter.add(q, cmd, status)
        if servo.state in ("converged", "halted"):
            break
        q = q + cmd * dt
    return meter.result(servo, status, t, arm_true.camera_pose(q))


@dataclass(frozen=True)
class PointCase:
    """A core closed-loop case: the camera starts offset from its taught pose above four points.

    Offsets are in the taught camera frame: ``rotation_deg`` about the optical axis (z),
    ``tilt_deg`` about x, ``translation_m`` (x, y, z). The target is a centred square of
    half-side ``half_side_m`` at ``depth_m`` in front of the taught camera. Invented demo data.
    """

    robot: str = "vs7_bench"
    rotation_deg: float = 0.0
    translation_m: tuple = (0.0, 0.0, 0.0)
    tilt_deg: float = 0.0
    estimate: str = "blended"
    depth: str = "true"        # true: true per-point depth each image; taught: goal depths
    half_side_m: float = 0.05
    depth_m: float = 0.40
    tolerance_px: float = 0.05
    tolerance_mm: float = 0.0          # control.tolerance_mm / _deg (0 = not used)
    tolerance_deg: float = 0.0
    max_run_s: float | None = None     # default: duration_s
    duration_s: float = 15.0
    rate_hz: float = 100.0
    # what the servo believes of the hand-eye: the true one times this rotation (rpy, deg) about
    # the camera frame (calibration error; (0, 0, 180) is a camera mounted the other way round)
    hand_eye_error_rpy_deg: tuple = (0.0, 0.0, 0.0)


def run_point_case(case: PointCase, record: bool = False) -> EpisodeResult:
    """Build arm, camera and scene for ``case``, solve the start pose by IK, run the episode."""
    from vservo_node.control.kinematics import load_robot
    from vservo_node.sim.ik import solve_camera_pose
    from vservo_node.vision.camera import CameraModel

    robot = load_robot(case.robot)
    arm = robot.arm
    camera = CameraModel.pinhole(640, 480, 600.0, 600.0, 319.5, 239.5)
    T_goal = arm.camera_pose(robot.home)
    h = case.half_side_m
    square = np.array([[-h, -h], [h, -h], [h, h], [-h, h]])
    points_cam = np.column_stack([square, np.full(4, case.depth_m)])
    points_base = (T_goal[:3, :3] @ points_cam.T).T + T_goal[:3, 3]
    scene = PointScene(points_base, camera, arm)
    offset = frames.transform(
        frames.rpy_to_matrix([math.radians(case.tilt_deg), 0.0,
                              math.radians(case.rotation_deg)]), case.translation_m)
    q0 = solve_camera_pose(arm, T_goal @ offset, robot.home, robot.home)
    settings = ServoSettings(interaction_estimate=case.estimate,
                             tolerance_px=case.tolerance_px, tolerance_mm=case.tolerance_mm,
                             tolerance_deg=case.tolerance_deg, dwell_s=0.2,
                             max_run_s=(case.duration_s if case.max_run_s is None
                                        else case.max_run_s),
                             depth_source="observed" if case.depth == "true" else "taught")
    belief = arm
    if any(case.hand_eye_error_rpy_deg):
        belief = load_robot(case.robot).arm
        error = frames.transform(frames.rpy_to_matrix(np.radians(case.hand_eye_error_rpy_deg)),
                                 np.zeros(3))
        belief.set_hand_eye(arm.T_tool_camera @ error)
    servo = Servo(belief, settings, limits_for(belief))
    servo.set_reference(scene.taught_view(robot.home))
    return run_episode(servo, scene.sense(depth="true" if case.depth == "true" else "none"),
                       q0, T_goal, arm, rate_hz=case.rate_hz, duration_s=case.duration_s,
                       record=record)


# ----------------------------------------------------------------------------- scenario episodes
# The controller's shipped parameter file for the simulated bench cell (config/): the base of
# every headless scenario episode, as it is the node's when it runs against vservo_sim.
EPISODE_PARAMS_FILE = "vservo_sim.yaml"
# The reference is taught from an image exposed this long before the run starts (s), so its
# image noise is drawn for another instant than the first frame's.
TEACH_TIME_S = -1.0


def episode_params(overrides: dict | None = None, camera_rate_hz: float | None = None) -> dict:
    """Validated controller parameters (vservo_node.params names) for a headless episode: those
    of :data:`EPISODE_PARAMS_FILE` over the schema defaults, ``io.camera_rate_hz`` =
    ``camera_rate_hz`` (the simulated camera's rate) when given, then ``overrides``.
    ValueError lists what the schema refuses."""
    from vservo_node import params, paths

    base = params.load_params_file(paths.config_dir() / EPISODE_PARAMS_FILE)
    if camera_rate_hz is not None:
        base["io.camera_rate_hz"] = float(camera_rate_hz)
    checked = params.validate({**base, **(overrides or {})})
    if not checked.ok:
        raise ValueError("episode parameters refused: " + "; ".join(checked.errors))
    return checked.values


def servo_from_params(arm, values: dict, mount=None) -> Servo:
    """A Servo for ``arm`` (the hand-eye it believes) from validated parameter values;
    ``mount`` (control.mounting) default: the values' robot.camera_mount."""
    settings, limits = servo_config(Settings.from_values(values), arm)
    if mount is None:
        mount = mount_from_params(values, arm)
    return Servo(arm, settings, limits, values["robot.tool_point"], mount=mount)


def focal_scaled(camera, scale: float):
    """``camera`` (a CameraModel) with focal lengths fx, fy (in K and P) times ``scale``: the
    intrinsics a controller with a focal-length calibration error believes."""
    from vservo_node.vision.camera import CameraModel

    data = camera.to_dict()
    for key, (i, j) in (("k", (0, 4)), ("p", (0, 5))):
        data[key][i] *= scale
        data[key][j] *= scale
    return CameraModel.from_dict(data)


def _reseeded(scenario, seed: int):
    """``scenario`` with its image and joint-state noise seeded by (scenario seed, ``seed``)."""
    import dataclasses

    mixed = int(np.random.SeedSequence([scenario.seed, int(seed)]).generate_state(1)[0])
    return dataclasses.replace(
        scenario, seed=mixed,
        arm_dynamics=dataclasses.replace(scenario.arm_dynamics, seed=mixed))


def _depth_scaled(view_or_obs, scale: float):
    """A TaughtView / Observation whose depths (when it has any) are ``scale`` times its own."""
    import dataclasses

    if scale == 1.0 or view_or_obs is None or view_or_obs.depth is None:
        return view_or_obs
    return dataclasses.replace(view_or_obs, depth=np.asarray(view_or_obs.depth) * scale)


SENSING = SENSING_MODES


def teach_reference(scenario, cell, camera, depth, folder, name: str = "episode"):
    """Teach reference ``name`` on the simulated ``cell`` as the node's capture service does
    and save it into ``folder`` (returns the file): the image rendered at the scenario's
    taught joints (at :data:`TEACH_TIME_S`, rgb8 read as the node reads it), captured through
    a ``Perception`` on ``camera`` with ``depth`` settings, with the simulated arm's joints at
    that image; the taught image is saved beside the file."""
    from vservo_node.perception import Perception
    from vservo_node.vision import image_io
    from vservo_node.vision.reference import save_reference, with_joints

    rgb = cell.render_at(scenario.q_taught, TEACH_TIME_S)
    image = image_io.to_bgr_or_mono(rgb, "rgb8", camera.width, camera.height)
    reference = with_joints(Perception(scenario.target, camera, None, depth).capture(image, name),
                            cell.arm_model.joint_names, scenario.q_taught)
    return save_reference(reference, f"{folder}/{name}.yaml")


def run_scenario_episode(scenario, overrides: dict | None = None, seed: int = 0,
                         record: bool = False, *, focal_scale: float = 1.0,
                         sensing: str = "image", noise_px: float | None = None,
                         trace=None) -> EpisodeResult:
    """One run of a scenario through the node's code path, without ROS or clocks.

    ``scenario``: a shipped name, a path or a loaded ``sim.Scenario``. ``overrides``: controller
    parameters by their schema names (vservo_node.params) over :func:`episode_params` and the
    scenario's own ``controller`` entries; the
    arm, camera and target are the scenario's (``robot.*`` other than ``robot.tool_point``,
    ``target.file`` and ``reference.*`` do not apply).
    ``seed``: mixed with the scenario's seed for the image and joint-state noise.
    ``focal_scale``: the controller believes focal lengths ``focal_scale`` times the true ones
    (the scenario format has no entry for it).
    ``trace``: called as ``trace("frame", t, observation, reported q)`` after each frame and
    ``trace("command", t, command, reported q)`` after each output period (e.g.
    ``calib.trace.TraceRecorder``, for the hand-eye check and the delay estimate).
    ``sensing``: ``image`` (render each frame and perceive it, as below) or ``projected``
    (``sim.projected.ProjectedSensor``: the features projected through the true camera with
    ``noise_px`` of pixel noise, default by target kind; no images, no detection; teaching
    likewise), much faster, for sweeps that study the servo rather than the detectors.

    The SimCell drives the true arm (true hand-eye, the scenario's lag, latency and joint
    noise) and renders the true camera. The controller side is built as the node builds it:
    an ArmModel with the scenario's *believed* hand-eye, a Perception on the believed camera
    model, and a reference taught by ``Perception.capture`` from an image of the taught pose
    (:data:`TEACH_TIME_S`); the believed depth scale multiplies every depth the servo gets
    (taught and observed). The run starts at rest at the scenario's start pose. Then, on one
    time line: each camera frame (scenario fps) is rendered, converted from rgb8 as the node
    converts images, turned into an Observation (an empty one when nothing matched, as the
    node does) and observed with the reported joints at the frame time; every output period
    (``io.output_rate_hz``) the servo commands from the latest reported joints and the
    command goes to the drives. The run ends when the servo converges or halts, or after the
    scenario's ``duration_s`` (reason ``episode_timeout``).

    Speeds, margins and the pose error (mm, deg) are of the true arm: ``peak_*`` from the true
    joint velocities at the output ticks, the pose error between the true camera pose at the
    end and the true taught camera pose (with a fixed camera: the tool's poses, and the
    controller gets the scenario's believed ``FixedCamera``).
    """
    import tempfile

    from vservo_node.perception import Perception, taught_view
    from vservo_node.sim import Scenario, SimCell, load_scenario
    from vservo_node.vision import image_io
    from vservo_node.vision.reference import load_reference

    if sensing not in SENSING:
        raise ValueError(f"sensing must be one of {SENSING}, got {sensing!r}")
    sc = scenario if isinstance(scenario, Scenario) else load_scenario(scenario)
    sc = _reseeded(sc, seed)
    values = episode_params({**sc.controller, **(overrides or {})}, camera_rate_hz=sc.fps)
    cell = SimCell(sc)
    camera = focal_scaled(sc.camera, focal_scale) if focal_scale != 1.0 else sc.camera
    servo = servo_from_params(sc.arm_model("belief"), values, mount=sc.mount("belief"))
    depth = depth_settings(Settings.from_values(values))
    width, height = camera.width, camera.height

    def bgr(rgb):  # the node reads the sim's rgb8 images this way
        return image_io.to_bgr_or_mono(rgb, "rgb8", width, height)

    if sensing == "projected":
        from vservo_node.sim.projected import ProjectedSensor

        sensor = ProjectedSensor(sc, camera, depth.source, noise_px)
        servo.set_reference(_depth_scaled(sensor.taught_view(sc.q_taught, TEACH_TIME_S),
                                          sc.depth_scale_belief))

        def grab(t_frame):
            return cell.arm.true_state(t_frame)[0]

        def observe(q_true, t_frame):
            return sensor.observe(q_true, t_frame)
    else:
        # teach: capture, save and load the reference, then rebuild perception with it (the
        # node's capture_reference service followed by its reference.file update)
        with tempfile.TemporaryDirectory() as folder:
            reference = load_reference(teach_reference(sc, cell, camera, depth, folder),
                                       sc.target)
        perception = Perception(sc.target, camera, reference, depth)
        servo.set_reference(_depth_scaled(taught_view(reference, camera, sc.target),
                                          sc.depth_scale_belief))

        def grab(t_frame):
            return bgr(cell.render(t_frame))

        def observe(image, t_frame):
            return perception.process(image, t_frame)[0]

    meter = _Meter(cell.arm_model, cell.taught_judged_pose, sc.q_start,
                   values["robot.tool_point"], record, mount=cell.mount)
    meter.reference = None if sensing == "projected" else reference
    period = 1.0 / values["io.output_rate_hz"]
    frame_period = 1.0 / sc.fps
    no_features = Observation((), np.zeros((0, 2)), np.zeros((0, 2)))
    _start(servo, cell.joint_state(0.0)[0], 0.0)
    frame = 0
    t = 0.0
    for k in range(int(math.floor(sc.duration_s / period)) + 1):
        t = k * period
        while frame * frame_period <= t + 1e-12:
            t_frame = frame * frame_period
            cell.step(max(t_frame - cell.t, 0.0))   # frame and tick times may differ by rounding
            grabbed = grab(t_frame)
            t0 = time.perf_counter()   # perception + servo, as the node's cycle_ms
            obs = observe(grabbed, t_frame)
            q_frame = cell.joint_state(t_frame)[0]
            servo.observe(_depth_scaled(obs, sc.depth_scale_belief) or no_features,
                          q_frame, t_frame)
            meter.frame(t_frame, obs, servo.reference, time.perf_counter() - t0)
            if trace is not None:
                trace("frame", t_frame, obs, q_frame)
            frame += 1
        cell.step(max(t - cell.t, 0.0))
        q_tick = cell.joint_state(t)[0]
        cmd, status = servo.command(q_tick, t, period)
        cell.command_velocity(cmd, t)
        if trace is not None:
            trace("command", t, cmd, q_tick)
        meter.add(*cell.arm.true_state(t), status)
        if servo.state in ("converged", "halted"):
            break
    return meter.result(servo, status, t, cell.judged_pose(t))
