"""Scenario episodes: one run of a shipped scenario on the simulated cell (vservo_node.sim)
through the node's code path (perception, the servo built from the node's parameters), without
ROS or clocks. The loop, its meter and the parameter helpers are vservo_node.episode's."""
from __future__ import annotations

import math
import time

import numpy as np

from vservo_node.episode import (TEACH_TIME_S, EpisodeResult, _Meter, _start, episode_params,
                                 servo_from_params)
from vservo_node.interface import ENDED_STATES, SENSING_MODES
from vservo_node.servo import Observation
from vservo_node.settings import Settings, depth_settings


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
        q_true, dq_true = cell.arm.true_state(t)
        meter.add(q_true, dq_true, status)
        if servo.state in ENDED_STATES:
            break
    return meter.result(servo, status, t, cell.judged_pose(t))
