"""The product end to end: `vservo_sim` and `vservo_node` as separate processes over DDS,
driven the way `vservo demo` drives them (vservo_node/ros/demo_run.py: teach, controller
overrides, enable, start, wait for servo/run_result), observed from this test process.

Everything here runs in real time: the simulated cell free-running at real-time factor 1 and
the controller on the wall clock, as `vservo demo` runs them. The sim's lock-step mode does not
fit this controller: its output timer runs on the steady clock and passes one output period
(1 / io.output_rate_hz = 8 ms) to the limiter per command, while a lock-stepped cell applies
each command for one camera period (33 ms of simulated time), so in simulated time the arm
would speed up and brake about 4x more slowly (and brake over about 4x the distance) than the
limiter plans, and the watchdogs (steady clock) would not match the motion.

Figures come from the simulator's ground truth, independently of the controller's own report:
the true camera pose (sim/camera_pose_truth) against the taught one (sim/taught_camera_pose)
once the arm is at rest, angles by SciPy's rotation magnitude; the true image error by
projecting the target's feature points with OpenCV's cv2.projectPoints through the scenario's
camera model at both poses.
"""
from __future__ import annotations

import math
import time
from dataclasses import dataclass
from pathlib import Path

import cv2
import numpy as np
import yaml
from geometry_msgs.msg import PoseStamped
from rclpy.serialization import deserialize_message
from scipy.spatial.transform import Rotation
from sensor_msgs.msg import Image
from std_msgs.msg import Float64MultiArray
from trajectory_msgs.msg import JointTrajectory

from vservo_node import interface as itf
from vservo_node.control import frames
from vservo_node.paths import config_dir
from vservo_node.ros import convert, demo_run, harness, qos
from vservo_node.sim import load_scenario

RELAY_IN = "/e2e/camera/image_from_sim"   # where a relayed sim publishes its images
SETTLE_S = 0.3                             # wait after a run's end before reading the truth


def controller_values(extra: dict | None = None) -> dict:
    """The controller's parameter values by schema name: config/vservo_sim.yaml with
    ``extra`` (nested like the file) over it; what the tests read limits and timeouts from."""
    doc = yaml.safe_load((config_dir() / "vservo_sim.yaml").read_text())
    nested = doc["/**/vservo"]["ros__parameters"]
    for section, entries in (extra or {}).items():
        nested.setdefault(section, {}).update(entries)
    return {f"{s}.{k}": v for s, entries in nested.items() for k, v in entries.items()}


@dataclass(frozen=True)
class CellSpec:
    """One simulated cell and its controller.

    ``scenario``: what vservo_sim runs (shipped name or YAML path). ``controller_scenario``:
    the scenario the controller is taught and configured from (its ``controller_belief`` goes
    to the controller); default: the same. ``relay``: the sim's images reach the controller
    only through this test process, which can pause or occlude them. ``extra``: controller
    parameter overrides as ``((section, name, value), ...)``.
    """

    scenario: str
    controller_scenario: str | None = None
    relay: bool = False
    extra: tuple = ()

    def sim_key(self):
        return (self.scenario, self.relay)

    def extra_dict(self) -> dict:
        out: dict = {}
        for section, name, value in self.extra:
            out.setdefault(section, {})[name] = value
        return out


@dataclass
class Outcome:
    """One run: the controller's result and the test's own ground-truth figures."""

    result: dict
    pose_mm: float          # true camera position error at rest, mm
    pose_deg: float         # true camera orientation error at rest, deg
    truth_rms_px: float     # RMS distance of the true projections of the target points, px

    @property
    def converged(self) -> bool:
        return bool(self.result.get("converged"))

    @property
    def reason(self) -> str:
        return self.result.get("reason") or ""

    def line(self, name: str) -> str:
        r = self.result
        return (f"{name:22s} {'converged' if self.converged else 'halted ' + self.reason:22s} "
                f"t {r['time_s']:6.2f} s  rms {_num(r['final_rms_px']):7.3f} px (truth "
                f"{self.truth_rms_px:6.3f})  pose {self.pose_mm:6.3f} mm {self.pose_deg:6.3f} deg")


def _num(value) -> float:
    return math.nan if value is None else float(value)


class Observer(demo_run.Watcher):
    """The demo's watcher plus what the tests measure: every status, command and joint state
    with its arrival time (monotonic s), the latest matched features (px), the ground truth,
    and an optional image relay."""

    def __init__(self, arm, relay: bool):
        super().__init__(arm)
        self.statuses: list[tuple[float, dict]] = []
        self.commands: list[tuple[float, np.ndarray]] = []
        self.joints: list[tuple[float, np.ndarray]] = []
        self.truth = {"camera": None, "target": None, "taught": None}
        self.features = None
        self.create_subscription(Float64MultiArray, itf.TOPIC_JOINT_VELOCITY_CMD,
                                 self._on_command, qos.COMMANDS)
        self.create_subscription(Float64MultiArray, itf.TOPIC_FEATURES, self._on_features,
                                 qos.STATE)
        for key, topic, profile in (("camera", itf.TOPIC_SIM_CAMERA_POSE_TRUTH, qos.STATE),
                                    ("target", itf.TOPIC_SIM_TARGET_POSE_TRUTH, qos.STATE),
                                    ("taught", itf.TOPIC_SIM_TAUGHT_POSE, qos.LATCHED)):
            self.create_subscription(PoseStamped, topic,
                                     lambda m, k=key: self.truth.__setitem__(
                                         k, convert.pose_to_matrix(m)), profile)
        self._trajectory = self.create_publisher(JointTrajectory, itf.TOPIC_JOINT_TRAJECTORY_CMD,
                                                 qos.COMMANDS)
        # relay: None (not relaying), "pass", "pause" or a rectangle (x0, y0, x1, y1) px
        self.relay_mode = "pass" if relay else None
        self.relayed: list[tuple[float, bool]] = []   # (publish time, occluded)
        if relay:
            self._relay_out = self.create_publisher(Image, itf.TOPIC_IMAGE, qos.SENSOR_DATA)
            self.create_subscription(Image, RELAY_IN, self._on_sim_image, qos.SENSOR_DATA,
                                     raw=True)

    def _on_status(self, msg):
        super()._on_status(msg)
        self.statuses.append((time.monotonic(), self.status))

    def _on_command(self, msg):
        self.commands.append((time.monotonic(), np.array(msg.data)))

    def _on_features(self, msg):
        self.features = np.array(msg.data).reshape(-1, 2)

    def _on_joints(self, msg):
        super()._on_joints(msg)
        if self.q is not None:
            self.joints.append((time.monotonic(), self.q))

    def _on_sim_image(self, data: bytes):
        mode = self.relay_mode
        if mode == "pause":
            return
        if mode == "pass":
            self._relay_out.publish(data)
        else:
            msg = deserialize_message(data, Image)
            pixels = convert.image_to_numpy(msg).copy()
            x0, y0, x1, y1 = mode
            pixels[y0:y1, x0:x1] = (60, 60, 65)   # a dark grey object in front of the lens
            self._relay_out.publish(convert.numpy_to_image(pixels, msg.encoding,
                                                           msg.header.stamp,
                                                           msg.header.frame_id))
        self.relayed.append((time.monotonic(), mode != "pass"))

    def trajectory_listeners(self) -> int:
        return self._trajectory.get_subscription_count()

    def command_joints(self, q, duration_s: float) -> None:
        """A single-point position trajectory to the sim (not through the controller)."""
        self._trajectory.publish(convert.trajectory_point(self.arm.joint_names, q,
                                                          np.zeros(len(q)), duration_s))


class Cell:
    """A running sim + controller for a CellSpec, and this test's Observer node."""

    def __init__(self, folder: Path):
        self.folder = folder
        self.spec: CellSpec | None = None
        self.sim = self.controller = self.node = None
        self.scenario = self.values = self.reference = None
        self.configurations = 0

    @property
    def processes(self):
        return [p for p in (self.sim, self.controller) if p is not None]

    def use(self, spec: CellSpec) -> "Cell":
        """Make this cell run ``spec``: restart only the processes whose configuration changed.
        A relayed cell starts passing images again (a failed test may have left it paused)."""
        if spec == self.spec:
            if self.node is not None and spec.relay:
                self.node.relay_mode = "pass"
            return self
        sim_changed = self.spec is None or spec.sim_key() != self.spec.sim_key()
        self._stop_node()
        if self.controller is not None:
            _stop(self.controller)
            self.controller = None
        if sim_changed and self.sim is not None:
            _stop(self.sim)
            self.sim = None
        self.spec = spec
        self.scenario = load_scenario(spec.controller_scenario or spec.scenario)
        folder = self.folder / f"cell{self.configurations}"
        folder.mkdir(parents=True, exist_ok=True)
        self.configurations += 1
        reference = self.reference = demo_run.teach(self.scenario, folder)
        overrides = demo_run.controller_overrides(self.scenario, reference, folder,
                                                  spec.extra_dict())
        self.values = controller_values(yaml.safe_load(overrides.read_text())["/**/vservo"]
                                        ["ros__parameters"])
        if self.sim is None:
            remap = ["-r", f"{itf.TOPIC_IMAGE}:={RELAY_IN}"] if spec.relay else []
            self.sim = demo_run.start_sim(spec.scenario, remap)
        self.controller = demo_run.start_controller(overrides)
        self.node = Observer(self.scenario.arm_model("belief"), spec.relay)
        return self

    def _stop_node(self):
        if self.node is not None:
            self.node.destroy_node()
            self.node = None

    def close(self):
        self._stop_node()
        for proc in (self.controller, self.sim):
            if proc is not None:
                _stop(proc)
        self.sim = self.controller = None
        self.spec = None

    # ------------------------------------------------------------------ driving
    def spin(self, seconds: float) -> None:
        end = time.monotonic() + seconds
        harness.spin_until(self.node, lambda: time.monotonic() > end, seconds + 10.0,
                           "time to pass", self.processes)

    def spin_until(self, condition, timeout: float, what: str) -> None:
        harness.spin_until(self.node, condition, timeout, what, self.processes)

    def begin(self, timeout: float = 60.0) -> str:
        """Enable motion (retried until the inputs are fresh) and start a run; returns the
        run id."""
        node = self.node
        node.result = None
        demo_run.enable_motion(node, self.processes, time.monotonic() + timeout)
        message = demo_run.start_run(node, self.processes)
        return message.split()[1]   # "run <id> started"

    def finish(self, run_id: str, timeout: float = 40.0) -> Outcome:
        """Wait for the run's result, let the arm come to rest, measure the truth."""
        node = self.node
        self.spin_until(lambda: node.result is not None and node.result["run_id"] == run_id,
                        timeout, f"the result of run {run_id}")
        self.spin(SETTLE_S)
        return Outcome(dict(node.result), *self.truth_errors())

    def run(self, timeout: float = 40.0) -> Outcome:
        return self.finish(self.begin(), timeout)

    def return_to_start(self, duration_s: float = 1.0, tol_rad: float = 1e-3) -> None:
        """Drive the arm back to the scenario's start joints with a position command to the
        sim (the controller is not moving it), and wait until it is there at rest."""
        q0 = self.scenario.q_start
        self.spin_until(lambda: self.node.trajectory_listeners() > 0, 10.0,
                        f"the sim on {itf.TOPIC_JOINT_TRAJECTORY_CMD}")
        self.node.command_joints(q0, duration_s)
        self.spin_until(lambda: self.node.q is not None and
                        np.max(np.abs(self.node.q - q0)) < tol_rad, duration_s + 10.0,
                        "the arm back at its start joints")
        self.spin(0.3)   # a fresh image of the start pose for the start checks

    # ------------------------------------------------------------------ ground truth
    def truth_errors(self) -> tuple[float, float, float]:
        """(mm, deg, px): true camera pose now against the taught pose, and the RMS distance
        between the target's feature points projected at both poses. With a fixed camera the
        simulator's truth topics carry the tool's pose (sim_node): the pose error is the
        tool's, and the target is projected from the stand at its current and taught poses."""
        truth = self.node.truth
        T_now, T_goal, T_target = truth["camera"], truth["taught"], truth["target"]
        mm = 1e3 * float(np.linalg.norm(T_now[:3, 3] - T_goal[:3, 3]))
        deg = math.degrees(Rotation.from_matrix(T_goal[:3, :3].T @ T_now[:3, :3]).magnitude())
        points = self.scenario.target.model_points()
        cam = self.scenario.camera
        fixed = self.scenario.mount("true")
        if fixed is None:
            uv = [_project(points, frames.invert(T) @ T_target, cam) for T in (T_now, T_goal)]
        else:
            T_camera_base = frames.invert(fixed.T_base_camera)
            uv = [_project(points, T_camera_base @ T, cam)
                  for T in (T_target, T_goal @ fixed.T_tool_target)]
        px = float(np.sqrt(np.mean(np.sum((uv[0] - uv[1]) ** 2, axis=1))))
        return mm, deg, px


def _stop(proc) -> None:
    """Stop a node process and remove its output file (failures quote it before this)."""
    proc.stop()
    proc.remove_log()


def _project(points, T_camera_target, camera) -> np.ndarray:
    """OpenCV's projection of target points (N, 3) through the camera model, (N, 2) px."""
    rvec, _ = cv2.Rodrigues(T_camera_target[:3, :3])
    uv, _ = cv2.projectPoints(points.reshape(-1, 1, 3), rvec, T_camera_target[:3, 3],
                              camera.K, np.asarray(camera.D, dtype=float))
    return uv.reshape(-1, 2)


def write_scenario(folder: Path, base: str, name: str, changes: dict) -> Path:
    """A variant of the shipped scenario ``base``: its YAML with ``changes`` (top-level
    entries replaced) and ``name``; relative paths inside still resolve against config/."""
    data = yaml.safe_load((config_dir() / "scenarios" / f"{base}.yaml").read_text())
    data.update(changes, name=name)
    path = folder / f"{name}.yaml"
    path.write_text(yaml.safe_dump(data, sort_keys=False))
    return path


def speeds(commands) -> np.ndarray:
    """Largest joint speed (rad/s) of each command."""
    return np.array([float(np.max(np.abs(c))) for _, c in commands])
