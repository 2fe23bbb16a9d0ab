"""`vservo demo`: the simulated cell and the controller as separate processes over real DDS.

What an operator would do, scripted:
1. teach: render the scenario's taught view and capture the reference from it (the same
   `Perception.capture` the node's `servo/capture_reference` service runs);
2. start `vservo_sim` (scenario), the controller as a managed node (`vservo_managed`:
   config/vservo_sim.yaml plus the taught reference and the scenario's ``controller_belief``:
   believed hand-eye as ``robot.hand_eye`` (a fixed camera: ``robot.camera_mount`` fixed, the
   believed stand and target poses), believed depth scale on the taught depths) and, when
   present, `vservo_recorder`, as child processes;
3. configure and activate the controller (lifecycle_msgs ChangeState), enable motion, wait
   until the recorder is ready (so its bag holds the whole run and the
   controller's parameters), start the run, follow status and the run result;
4. print the summary (and write it as JSON), stop the processes.

Must run network-isolated (tools/isolated, as `make demo` does).
"""
from __future__ import annotations

import dataclasses
import json
import shutil
import time
from datetime import datetime, timezone
from pathlib import Path

import numpy as np
import rclpy
from lifecycle_msgs.msg import Transition
from lifecycle_msgs.srv import ChangeState
from rclpy.node import Node
from sensor_msgs.msg import JointState
from std_msgs.msg import Bool, String
from std_srvs.srv import SetBool, Trigger

from vservo_node import interface
from vservo_node.control import frames
from vservo_node.paths import config_dir
from vservo_node.perception import Perception
from vservo_node.ros import harness, qos
from vservo_node.sim import SimCell, load_scenario
from vservo_node.vision.image_io import to_bgr_or_mono
from vservo_node.vision.reference import save_reference, with_joints
from vservo_node.yaml_files import dump_yaml

# The summary's figures, by their names and definitions in vservo_node.record.metrics: read
# from the recorded run's metrics.json, so the demo prints what the report shows.
SUMMARY_KEYS = ("verdict", "converged", "reason", "detail", "time_to_converge_s",
                "time_to_halt_s", "final_rms_px", "tolerance_px", "final_pose_error_mm",
                "final_pose_error_deg", "estimated_pose_error_mm", "estimated_pose_error_deg",
                "peak_joint_speed_ratio", "peak_joint_speed_joint", "peak_tool_speed_m_s",
                "peak_tool_speed_ratio")
RECORDER_READY_TIMEOUT_S = 20.0   # generous: the recorder imports and discovers on a busy machine
REPORT_TIMEOUT_S = 60.0          # the recorder writes the report first; a loaded machine takes long


def teach(scenario, folder: Path) -> Path:
    """Capture the reference at the scenario's taught pose; returns the reference file. The
    taught depths (m, what ``depth.source: taught`` uses) are multiplied by the scenario's
    believed depth scale (``controller_belief.depth_scale``)."""
    cell = SimCell(scenario, q0=scenario.q_taught)
    rgb = cell.render_at(scenario.q_taught, 0.0)   # what the camera topic carries (rgb8)
    h, w = rgb.shape[:2]
    image = to_bgr_or_mono(rgb, "rgb8", w, h)       # as the node decodes it
    perception = Perception(scenario.target, scenario.camera)
    reference = with_joints(perception.capture(image, f"{scenario.name}_station"),
                            cell.arm_model.joint_names, scenario.q_taught)  # the arm as taught
    if reference.depths is not None and scenario.depth_scale_belief != 1.0:
        reference = dataclasses.replace(reference,
                                        depths=reference.depths * scenario.depth_scale_belief)
    return save_reference(reference, folder / f"{scenario.name}_station.yaml")


def scenario_controller_params(scenario) -> dict:
    """The controller parameters a scenario fixes, nested like a parameter file: arm (URDF and
    frames), target, camera rate, the believed hand-eye when it differs from the URDF's, and the
    scenario's own ``controller`` entries.
    Used by ``controller_overrides`` and by launch/sim_cell.launch.py."""
    values = {
        "robot": {"urdf_path": str(scenario.urdf_path), "base_frame": scenario.base_frame,
                  "tool_frame": scenario.tool_frame, "camera_frame": scenario.camera_frame},
        "target": {"file": str(scenario.target.source) if getattr(scenario.target, "source", None)
                   else scenario.target.name},
        "io": {"camera_rate_hz": float(scenario.fps)},
    }
    T_belief = scenario.T_tool_camera_belief
    fixed = scenario.mount("belief")
    if fixed is not None:     # a camera on a stand: its believed pose and the target's on the tool
        values["robot"].update(camera_mount="fixed", fixed_camera_pose=_pose7(fixed.T_base_camera),
                               target_on_tool=_pose7(fixed.T_tool_target))
    elif not np.allclose(T_belief, scenario.arm_model("urdf").T_tool_camera, atol=1e-12):
        values["robot"]["hand_eye"] = _pose7(T_belief)
    for name, value in scenario.controller.items():   # the scenario's own settings
        if "." in name:
            section, leaf = name.split(".", 1)
            values.setdefault(section, {})[leaf] = value
        else:
            values[name] = value
    return values


def _pose7(T) -> list:
    """[x, y, z, qx, qy, qz, qw] of a 4x4 transform (the robot.* pose parameters' format)."""
    return [*map(float, T[:3, 3]), *map(float, frames.matrix_to_quat(T[:3, :3]))]


def controller_overrides(scenario, reference_file: Path, folder: Path,
                         extra: dict | None = None) -> Path:
    """A parameter file layered over config/vservo_sim.yaml for this scenario
    (``scenario_controller_params``) and the taught reference, then ``extra`` (nested like the
    file: ``{"control": {"gain_near": 1.0}}``) over those. Keyed ``/**/vservo`` like the
    shipped file, so rcl merges the two sections in file order and these values win."""
    values = scenario_controller_params(scenario)
    values["reference"] = {"file": str(reference_file)}
    for section, entries in (extra or {}).items():
        values.setdefault(section, {}).update(entries)
    path = folder / "controller_overrides.yaml"
    path.write_text(dump_yaml({"/**/vservo": {"ros__parameters": values}}))
    return path


class Watcher(Node):
    """Client side of the demo: services, status, result, joint states."""

    def __init__(self, arm):
        super().__init__("vservo_demo")
        self.arm = arm
        self.result = None
        self.last_bag = None
        self.status = None
        self.q = None
        self.create_subscription(String, interface.TOPIC_RUN_RESULT, self._on_result,
                                 qos.LATCHED)
        self.create_subscription(String, interface.TOPIC_LAST_BAG, self._on_bag, qos.LATCHED)
        self.create_subscription(String, interface.TOPIC_STATUS, self._on_status,
                                 qos.STATE)
        self.create_subscription(JointState, interface.TOPIC_JOINT_STATES, self._on_joints,
                                 qos.STATE)
        self.settled_services = set()
        self.change_state = self.create_client(
            ChangeState, f"/{interface.CONTROLLER_NODE}/change_state")
        self.enable = self.create_client(SetBool, interface.SRV_ENABLE_MOTION)
        self.start = self.create_client(Trigger, interface.SRV_START)

    def _on_result(self, msg):
        self.result = json.loads(msg.data)

    def _on_bag(self, msg):
        self.last_bag = msg.data

    def _on_joints(self, msg):
        index = {n: i for i, n in enumerate(msg.name)}
        if all(n in index for n in self.arm.joint_names):
            self.q = np.array([msg.position[index[n]] for n in self.arm.joint_names])

    def _on_status(self, msg):
        status = json.loads(msg.data)
        self.status = status


def _call(node, client, request, processes, timeout=10.0):
    harness.spin_until(node, client.service_is_ready, timeout, f"service {client.srv_name}",
                       processes)
    if client.srv_name not in node.settled_services:   # see harness.DISCOVERY_SETTLE_S
        settle = time.monotonic() + harness.DISCOVERY_SETTLE_S
        harness.spin_until(node, lambda: time.monotonic() >= settle, timeout,
                           f"discovery of {client.srv_name}", processes)
        node.settled_services.add(client.srv_name)
    return harness.call_service(node, client, request, timeout, processes)


def start_sim(scenario_ref, ros_args=()) -> harness.NodeProcess:
    """``vservo_sim`` on config/sim_cell.yaml with ``scenario_ref`` (name or path), then
    ``ros_args`` (e.g. ``-p name:=value``, ``-r from:=to``)."""
    return harness.start_module("vservo_node.ros.sim_node", ros_args=[
        "--params-file", str(config_dir() / "sim_cell.yaml"), "-p",
        f"scenario:={scenario_ref}", *ros_args], name="vservo_sim")


def start_controller(overrides: Path, managed: bool = False) -> harness.NodeProcess:
    """``vservo_node`` on config/vservo_sim.yaml with the ``overrides`` file layered over it;
    ``managed``: ``vservo_managed``, left unconfigured (``activate_controller`` brings it up)."""
    module = "vservo_node.ros." + ("controller_managed" if managed else "controller_node")
    return harness.start_module(module, ros_args=[
        "--params-file", str(config_dir() / "vservo_sim.yaml"), "--params-file",
        str(overrides)], name="vservo_node")


def activate_controller(node: Watcher, processes) -> None:
    """Configure, then activate the managed controller over its lifecycle services;
    RuntimeError naming the transition that failed."""
    for name, transition in (("configure", Transition.TRANSITION_CONFIGURE),
                             ("activate", Transition.TRANSITION_ACTIVATE)):
        reply = _call(node, node.change_state,
                      ChangeState.Request(transition=Transition(id=transition)), processes,
                      timeout=30.0)
        if not reply.success:
            raise RuntimeError(f"controller {name} failed (see its log)")


def enable_motion(node: Watcher, processes, deadline: float) -> str:
    """Call enable_motion until it is accepted (inputs need a moment to become fresh) or the
    monotonic ``deadline`` passes (RuntimeError with the last refusal); returns the reply."""
    reply = None
    while time.monotonic() < deadline:
        reply = _call(node, node.enable, SetBool.Request(data=True), processes)
        if reply.success:
            return reply.message
        end = time.monotonic() + 0.5
        while time.monotonic() < end:
            rclpy.spin_once(node, timeout_sec=0.05)
    raise RuntimeError(f"enable_motion refused: {reply.message if reply else '?'}")


def start_run(node: Watcher, processes) -> str:
    """Call start; RuntimeError with the refusal; returns the reply."""
    reply = _call(node, node.start, Trigger.Request(), processes)
    if not reply.success:
        raise RuntimeError(f"start refused: {reply.message}")
    return reply.message


def run_cell_demo(args) -> int:
    harness.require_isolation()
    scenario = load_scenario(args.scenario)
    stamp = datetime.now(timezone.utc).strftime("%Y%m%dT%H%M%SZ")
    folder = Path(args.runs_dir) / f"{stamp}_{scenario.name}_demo"
    folder.mkdir(parents=True, exist_ok=True)
    reference_file = teach(scenario, folder)
    overrides = controller_overrides(scenario, reference_file, folder)
    print(f"scenario {scenario.name}: {scenario.description.strip()}")
    print(f"taught reference: {reference_file}")

    t_wall = time.monotonic()
    processes = [start_sim(scenario.source or scenario.name),
                 start_controller(overrides, managed=True)]
    recorder = _start_recorder(scenario, args)
    if recorder:
        processes.append(recorder)
    rclpy.init()
    node = Watcher(scenario.arm_model("belief"))
    summary = {k: None for k in SUMMARY_KEYS}
    try:
        deadline = t_wall + args.timeout
        activate_controller(node, processes)
        print("controller: configured and active")
        print(f"enable_motion: {enable_motion(node, processes, deadline)}")
        if recorder:
            _wait_for_recorder(node, processes)
        print(f"start: {start_run(node, processes)}")
        harness.spin_until(node, lambda: node.result is not None,
                           max(1.0, deadline - time.monotonic()), "the run result", processes)
        if recorder:   # the recorder names the bag once the bag and its report are written
            try:
                harness.spin_until(node, lambda: node.last_bag is not None, REPORT_TIMEOUT_S,
                                   "the recorder's bag and report", processes)
            except TimeoutError as exc:
                print(f"warning: no report: {exc}".splitlines()[0])
    finally:
        node.destroy_node()
        rclpy.shutdown()
        for proc in reversed(processes):
            proc.stop()
            shutil.move(proc.log_path, folder / f"{proc.name}.log")   # keep logs with the run
    wall = time.monotonic() - t_wall
    bag = node.last_bag
    metrics = _run_metrics(bag, node.result)
    summary.update({k: metrics.get(k) for k in SUMMARY_KEYS})
    _print_summary(scenario.name, metrics, wall, recorded=bool(bag))
    if bag:
        print(f"run recorded in:     {bag}")
        for page in sorted(Path(bag).glob("report/*.html")):
            print(f"report of the run:   {page}")
    print(f"node logs:           {folder}")
    if args.json:
        Path(args.json).write_text(json.dumps(summary, indent=2))
    return 0 if summary["converged"] else 1


def _wait_for_recorder(node, processes):
    """Wait for True on recorder/ready. A run started earlier is recorded from wherever the
    recorder joined it (it starts slower than the cell), maybe without params.yaml."""
    from vservo_node.ros.recorder_node import TOPIC_READY
    try:
        harness.wait_for_message(node, TOPIC_READY, Bool, qos.LATCHED, RECORDER_READY_TIMEOUT_S,
                                 lambda msg: msg.data, processes)
    except TimeoutError as exc:
        print(f"warning: starting anyway, the bag may miss the start: {exc}".splitlines()[0])


def _start_recorder(scenario, args):
    try:
        import vservo_node.ros.recorder_node  # noqa: F401  (present once recording lands)
    except ImportError:
        return None
    return harness.start_module("vservo_node.ros.recorder_node", ros_args=[
        "-p", f"scenario:={scenario.name}", "-p", f"output_dir:={args.runs_dir}"],
        name="vservo_recorder")


def _run_metrics(bag, result) -> dict:
    """The run's figures as the report computed them (<bag>/report/metrics.json; recomputed
    from the bag when the report is missing); without a bag, the run result alone."""
    from vservo_node.record.metrics import compute_metrics, result_metrics

    if bag:
        path = Path(bag) / "report" / "metrics.json"
        if path.is_file():
            return json.loads(path.read_text())
        from vservo_node.record.bag import load_run
        return compute_metrics(load_run(bag))
    return result_metrics(result)


def _print_summary(name, metrics, wall, recorded: bool):
    from vservo_node.record.metrics import headline

    print(f"\n== vservo demo: {name} (wall time {wall:.1f} s) ==")
    for label, text in headline(metrics):
        print(f"{label:28s} {text}")
    if not recorded:
        print("(no record of the run: speeds are not known; the figures are the run result's)")
