"""The operator commands (`vservo teach/enable/disable/start/stop/status/watch`) as separate
processes driving the simulated cell (`vservo_sim`, tray_offset) and the controller
(`vservo_node`, config/vservo_sim.yaml with no reference) over DDS, as a user of
`ros2 launch vservo_node sim_cell.launch.py` would drive them. Network-isolated like the rest
of tests/ros.

The tests share one cell and run in file order: refusals before teaching, teach --sim,
enable, start --wait to convergence (checked against the simulator's ground truth), then
refusals during a run and Ctrl-C of `start --wait` (which stops the run).
Run: tools/isolated .venv/bin/python -m pytest tests/ros/test_operator_commands.py -q
"""
from __future__ import annotations

import json
import re
import signal
import subprocess
import sys
import threading
import time

import numpy as np
import pytest
from geometry_msgs.msg import PoseStamped
from scipy.spatial.transform import Rotation
from std_msgs.msg import Float64, String
from std_srvs.srv import Trigger

from vservo_node import interface as itf
from vservo_node.ros import convert, demo_run, harness, qos

SCENARIO = "tray_offset"
CLI_TIMEOUT_S = 180.0      # wall-clock guard of one command process (the machine is shared)


class Cli:
    """One `vservo` command as a child process; its output read by a thread as it comes."""

    def __init__(self, *args: str):
        self.args = args
        self.popen = subprocess.Popen([sys.executable, "-m", "vservo_node.cli", *args],
                                      stdout=subprocess.PIPE, stderr=subprocess.PIPE,
                                      text=True, env=harness.child_environment())
        self.lines: list[str] = []
        self.err = ""
        self._reader = threading.Thread(target=self._read, daemon=True)
        self._reader.start()

    def _read(self):
        for line in self.popen.stdout:
            self.lines.append(line.rstrip("\n"))

    def wait(self, timeout: float = CLI_TIMEOUT_S) -> int:
        try:
            code = self.popen.wait(timeout)
        except subprocess.TimeoutExpired:
            self.popen.kill()
            raise AssertionError(f"vservo {' '.join(self.args)} still running after "
                                 f"{timeout:g} s; output so far: {self.lines}") from None
        self._reader.join(5.0)
        self.err = self.popen.stderr.read()
        return code

    def interrupt(self) -> int:
        self.popen.send_signal(signal.SIGINT)
        return self.wait(30.0)

    @property
    def out(self) -> str:
        return "\n".join(self.lines)

    def describe(self) -> str:
        return (f"vservo {' '.join(self.args)} -> {self.popen.returncode}\nstdout:\n{self.out}"
                f"\nstderr:\n{self.err}")


def vservo(*args: str) -> Cli:
    """Run a command to its end."""
    cli = Cli(*args)
    cli.wait()
    return cli


@pytest.fixture(scope="module")
def cell(ros_node, tmp_path_factory):
    """vservo_sim + vservo_node, the controller's reference folder in a temporary directory;
    ready once the controller publishes status (robot model loaded, images flowing)."""
    folder = tmp_path_factory.mktemp("operator")
    overrides = folder / "overrides.yaml"
    # max_run_s and the input timeouts: room for the held run of the last test on a busy
    # machine (these tests are about the commands, not the watchdogs: tests/e2e).
    overrides.write_text(f"vservo:\n  ros__parameters:\n    reference:\n"
                         f"      directory: {folder}\n    control:\n      max_run_s: 300.0\n"
                         f"    io:\n      image_timeout_s: 2.0\n"
                         f"      joint_state_timeout_s: 1.0\n")
    processes = [demo_run.start_sim(SCENARIO), demo_run.start_controller(overrides)]
    try:
        harness.wait_for_message(ros_node, itf.TOPIC_STATUS, String, qos.STATE, 90.0,
                                 processes=processes)
        yield processes, folder
    finally:
        codes = [p.stop() for p in reversed(processes)]
        outputs = [p.output() for p in processes]
        for p in processes:
            p.remove_log()
        assert codes == [0, 0], "\n".join(o[-3000:] for o in outputs)


def _no_traceback(cli: Cli) -> None:
    assert "Traceback" not in cli.err and "Traceback" not in cli.out, cli.describe()


def test_refusals_before_teaching_print_the_reason(cell):
    start = vservo("start")
    assert start.popen.returncode == 1, start.describe()
    assert "start refused: state: motion is not enabled" in start.err, start.describe()
    # Inputs need a moment after start-up; retried, only the missing reference remains.
    enable = vservo("enable", "--retry", "20")
    assert enable.popen.returncode == 1, enable.describe()
    assert enable.err.strip().startswith("enable refused:"), enable.describe()
    assert "reference: none loaded" in enable.err, enable.describe()
    assert enable.out == ""
    _no_traceback(enable)


def test_wrong_namespace_times_out_with_a_hint(cell):
    cli = vservo("enable", "--namespace", "/elsewhere", "--timeout", "3")
    assert cli.popen.returncode == 3, cli.describe()
    assert f"no service /elsewhere/{itf.SRV_ENABLE_MOTION}" in cli.err, cli.describe()
    assert "it exists under / (use --namespace)" in cli.err, cli.describe()
    bad = vservo("status", "--node", "/a/vservo", "--namespace", "/b", "--once")
    assert bad.popen.returncode == 2 and "give one of them" in bad.err, bad.describe()


def test_teach_in_the_sim_then_enable_and_start_converges(cell, ros_node):
    status = Cli("status")     # follows every state change from here on
    try:
        teach = vservo("teach", "--sim")
        assert teach.popen.returncode == 0, teach.describe()
        assert len(teach.lines) == 3, teach.describe()
        assert teach.lines[0].startswith("at the taught pose"), teach.describe()
        assert re.match(r"reference 'tray_dots_station' taught \(5 features\) and saved to "
                        r".*tray_dots_station\.yaml; loaded", teach.lines[1]), teach.describe()
        assert teach.lines[2].startswith("at the start pose"), teach.describe()
        enable = vservo("enable", "--retry", "20")
        assert enable.popen.returncode == 0, enable.describe()
        assert enable.out.startswith("motion enabled: state armed"), enable.describe()
        run = vservo("start", "--wait")
        assert run.popen.returncode == 0, run.describe()
        run_id = re.match(r"run (\S+) started$", run.lines[0]).group(1)
        assert re.match(rf"converged after [\d.]+ s, final RMS error [\d.]+ px, .*\(run "
                        rf"{re.escape(run_id)}\)$", run.lines[1]), run.describe()
        # The view taught at the taught pose: the camera is back there (simulator truth:
        # sim/camera_pose_truth against sim/taught_camera_pose, angle by SciPy). A reference
        # taught at the start pose would leave it ~95 mm away.
        taught = convert.pose_to_matrix(harness.wait_for_message(
            ros_node, itf.TOPIC_SIM_TAUGHT_POSE, PoseStamped, qos.LATCHED, 10.0,
            processes=cell[0]))
        now = convert.pose_to_matrix(harness.wait_for_message(
            ros_node, itf.TOPIC_SIM_CAMERA_POSE_TRUTH, PoseStamped, qos.STATE, 10.0,
            processes=cell[0]))
        error_mm = 1e3 * float(np.linalg.norm(now[:3, 3] - taught[:3, 3]))
        error_deg = np.degrees(Rotation.from_matrix(taught[:3, :3].T @ now[:3, :3]).magnitude())
        # e2e figures: ~0.1 mm, ~0.04 deg; bounds with margin (common practice, no source)
        assert error_mm < 1.0 and error_deg < 0.2, (error_mm, error_deg)
        harness.wait_until(lambda: any("state=converged" in line for line in status.lines),
                           20.0, "the converged line of vservo status", cell[0])
    finally:
        code = status.interrupt()
    assert code == 130, status.describe()
    assert status.err == "", status.describe()    # quiet: no traceback, nothing on stderr
    states = [re.search(r"state=(\S+)", line).group(1) for line in status.lines]
    runs = [re.search(r"run=(\S+)", line).group(1) for line in status.lines]
    # One line per change (no repeats): armed (enable), then the run's states, converged last.
    assert all(a != b or ra != rb for a, b, ra, rb in zip(states, states[1:], runs, runs[1:]))
    assert "armed" in states and "servoing" in states, status.describe()
    assert states.index("armed") < states.index("servoing") < len(states) - 1
    assert states[-1] == "converged" and runs[-1] == run_id, status.describe()
    once = vservo("status", "--once")
    assert once.popen.returncode == 0, once.describe()
    assert len(once.lines) == 1 and "state=converged" in once.out and run_id in once.out


def test_refusals_during_a_run_and_ctrl_c_stops_it(cell, ros_node):
    processes = cell[0]
    # A run held in servoing: speed scale 0 (cell/speed_scale) makes every command zero, so
    # the run neither moves nor ends however long the commands below take, while the
    # controller still commands the arm.
    scale = ros_node.create_publisher(Float64, itf.TOPIC_SPEED_SCALE, qos.STATE)
    harness.wait_for_subscriber(ros_node, itf.TOPIC_SPEED_SCALE, 10.0, processes)
    go_start = harness.ready_client(ros_node, Trigger, itf.SRV_SIM_GO_TO_START, 20.0, processes)
    watch = Cli("watch", "--period", "0.2")
    try:
        for _ in range(5):
            scale.publish(Float64(data=0.0))
            time.sleep(0.05)
        assert harness.call_service(ros_node, go_start, Trigger.Request(), 60.0,
                                    processes).success
        run = Cli("start", "--wait")
        harness.wait_until(lambda: bool(run.lines) or run.popen.poll() is not None, 60.0,
                           "the start reply", processes)
        if run.popen.poll() is not None:
            run.wait()
        assert run.lines and run.lines[0].endswith("started"), run.describe()
        teach_sim = vservo("teach", "--sim")
        assert teach_sim.popen.returncode == 1, teach_sim.describe()
        assert "go_to_taught_pose refused: the arm is following controller commands" in \
            teach_sim.err, teach_sim.describe()
        teach = vservo("teach")
        assert teach.popen.returncode == 1, teach.describe()
        assert "capture_reference refused: state: cannot teach while a run moves" in teach.err
        assert run.popen.poll() is None, "the held run ended early: " + run.describe()
        code = run.interrupt()
        assert code == 130, run.describe()
        _no_traceback(run)
        assert "asking the controller to stop the run" in run.err
        assert "stopping: braking to zero" in run.err, run.describe()
        harness.wait_until(lambda: any("halted" in line and "stop_requested" in line
                                       for line in watch.lines), 20.0,
                           "the halted line of vservo watch", processes)
    finally:
        for _ in range(5):
            scale.publish(Float64(data=1.0))
            time.sleep(0.05)
        ros_node.destroy_publisher(scale)
        watch_code = watch.interrupt()
    assert watch_code == 130 and watch.err == "", watch.describe()
    # Without a terminal: time-stamped lines of state, error and the acting limits.
    moving = [line for line in watch.lines if " servoing " in line]
    assert moving and all(re.match(r"\d\d:\d\d:\d\d\.\d{3} servoing +rms +[\d.-]+ px", line)
                          for line in moving), watch.describe()
    result = json.loads(harness.wait_for_message(
        ros_node, itf.TOPIC_RUN_RESULT, String, qos.LATCHED, 10.0, processes=processes).data)
    assert result["converged"] is False and result["reason"] == "stop_requested"
    disable = vservo("disable")
    assert disable.popen.returncode == 0 and disable.out == "motion disabled", \
        disable.describe()
