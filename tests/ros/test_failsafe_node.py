"""The controller node under hostile input, over DDS: every attack ends in a braked, explained
stop, or in a refusal with the old state kept; never in a held command, a silent node or a
crash.

The stub cell of tests/ros/test_controller_node.py (an ideal velocity-controlled vs7_bench arm
with a 320x240 camera) takes adversarial orders here: joint states or images stamped off the
node's clock, one joint state stamped far in the future, NaN joint positions. Parameters and
files are changed live through the parameter services; the last test signals the process
group as a terminal Ctrl-C under `ros2 launch` does (the signal reaches every process of the
group, and launch then signals its children again).

Every halt is judged on the command topic over time (our design rule, module docstring of
vservo_node/control/safety.py; common practice, no source): after the halt is decided the
joint speed is non-increasing, each step changes a joint by at most a dt (a =
limits.joint_acceleration, dt one output period), the command reaches zero within
max|dq|/a + dt (+ one DDS delivery), one explicit zero follows and then silence; the halt
reason is the expected one with a non-empty detail; the node is alive and needs a new start.
Run: tools/isolated .venv/bin/python -m pytest tests/ros/test_failsafe_node.py -q
"""
from __future__ import annotations

import os
import signal
import subprocess
import sys
import time
from pathlib import Path

import numpy as np
import pytest

from test_controller_node import (HALT_ACCELERATION, LARGE_OFFSET, OUTPUT_RATE, Rig,
                                  _begin_run, _commands_since, _write_params,
                                  controller_parameters, expect)
from vservo_node import interface as itf
from vservo_node.control.kinematics import load_robot
from vservo_node.ros import harness

STUB = str(Path(__file__).with_name("test_controller_node.py"))
PERIOD = 1.0 / OUTPUT_RATE


def _parameters(tmp: Path) -> dict:
    values = controller_parameters(tmp / "references")
    values["limits"]["joint_acceleration"] = [HALT_ACCELERATION]
    values["io"]["stamp_tolerance_s"] = 0.5
    return values


@pytest.fixture(scope="module")
def setup(ros_node, tmp_path_factory):
    harness.require_isolation()
    tmp = tmp_path_factory.mktemp("failsafe")
    params_file = _write_params(tmp / "vservo.yaml", _parameters(tmp))
    procs = {
        "controller": harness.start_module("vservo_node.ros.controller_node",
                                           ros_args=["--params-file", str(params_file)],
                                           name="controller"),
        "stub": harness.NodeProcess([sys.executable, STUB, "--stub"], "stub_cell"),
    }
    try:
        rig = Rig(ros_node, procs)
        rig.start_stub()
        expect(rig.capture(), True, "loaded")
        expect(rig.enable(True), True, "motion enabled")
        rig.listen_commands()
        yield rig, tmp, params_file
    finally:
        for proc in procs.values():
            proc.stop()


@pytest.fixture
def rig(setup):
    rig = setup[0]
    rig.stub(joint_stamp_offset=0.0, image_stamp_offset=0.0, nan_joint=False)
    rig.spin(0.3)
    if rig.state() not in ("armed", "halted", "converged"):
        rig.trigger(itf.SRV_STOP)
        harness.spin_until(rig.node, lambda: rig.state() in ("halted", "converged"), 10.0,
                           "the previous run to end", rig.procs)
    return rig


def _braked_halt(rig, attack, reason: str, *detail_phrases: str) -> dict:
    """Start a run, attack once it moves, and check the halt (module docstring)."""
    _begin_run(rig, LARGE_OFFSET)
    rig.spin(0.8)             # past the start nod and the soft start: the law commands
    harness.spin_until(rig.node, lambda: rig.commands and np.max(np.abs(rig.commands[-1][1]))
                       > 0.03, 10.0, "the run to move", rig.procs)
    t_attack = time.monotonic()
    n_status = len(rig.status)
    attack()
    halted = rig.wait_state("halted", reason=reason, timeout=10.0)
    rig.spin(0.4)
    commands = _commands_since(rig, t_attack)
    braking = next((s for s in rig.status[n_status:]
                    if s["state"] == "braking" and s["reason"] == reason), None)
    assert braking is not None, "the halt braked over several periods"
    first = next(i for i, c in enumerate(commands) if c.tolist() == braking["dq"])
    ramp = np.array(commands[first:])
    speeds = np.max(np.abs(ramp), axis=1)
    assert np.all(np.diff(speeds) <= 1e-12), speeds
    assert np.max(np.abs(np.diff(ramp, axis=0))) <= HALT_ACCELERATION * PERIOD + 1e-9
    assert np.all(ramp[-1] == 0.0)
    assert np.count_nonzero(np.all(ramp == 0.0, axis=1)) == 1, "one explicit zero, then quiet"
    # zero within max|dq|/a + one period, counted in output periods (commands are one period
    # apart at the node; arrival times here carry DDS and scheduling jitter)
    assert len(ramp) <= int(np.ceil(speeds[0] / (HALT_ACCELERATION * PERIOD))) + 2, len(ramp)
    for phrase in detail_phrases:
        assert phrase in halted["detail"], (phrase, halted["detail"])
    assert rig.controller.alive()
    return halted


def test_one_joint_state_stamped_far_ahead_is_refused_and_keeps_the_history(rig):
    """One joint state stamped +1000 s used to evict every kept state and make the node
    ignore all later ones: frames went unpaired and the last command stood (the tool
    travelled 344-351 mm). Now it is refused and counted; the run goes on."""
    _begin_run(rig, LARGE_OFFSET)
    rig.spin(0.3)
    rig.stub(spike_s=1000.0)
    rig.spin(1.0)
    assert rig.state() in ("servoing", "settling", "converged"), rig.status[-1]
    assert "joint state stamped +" in rig.controller.output()
    rig.trigger(itf.SRV_STOP)
    harness.spin_until(rig.node, lambda: rig.state() in ("halted", "converged"), 10.0,
                       "the run to end", rig.procs)


def test_images_stamped_behind_the_node_clock_halt_image_stale(rig):
    _braked_halt(rig, lambda: rig.stub(image_stamp_offset=-2.0), "image_stale",
                 "image stamped -2.0")


def test_images_ahead_of_every_joint_state_halt_frames_unpaired(rig):
    """Within the stamp tolerance (0.5 s) but 0.35 s after the newest joint state, beyond
    io.joint_state_timeout_s (0.2 s): no frame can be paired."""
    _braked_halt(rig, lambda: rig.stub(image_stamp_offset=0.35), "frames_unpaired",
                 "after the newest joint state")


def test_joint_states_from_a_skewed_clock_halt_joints_stale(rig):
    _braked_halt(rig, lambda: rig.stub(joint_stamp_offset=1000.0), "joints_stale",
                 "joint state stamped +")


def test_non_finite_joint_positions_halt_numerical_fault(rig):
    """NaN joints used to make every output cycle raise: no ramp, no zero, the last command
    held (62 mm of travel in a 1 s fault)."""
    _braked_halt(rig, lambda: rig.stub(nan_joint=True), "numerical_fault", "non-finite")


def test_camera_time_offset_cannot_change_during_a_run(rig):
    _begin_run(rig, LARGE_OFFSET)
    result, = rig.set_params(io__camera_time_offset_s=-1.0)
    assert not result.successful and "cannot change while a run moves" in result.reason
    rig.spin(0.3)
    assert rig.state() in ("servoing", "settling", "converged")
    rig.trigger(itf.SRV_STOP)


def test_values_the_check_accepts_apply_and_others_are_refused_in_words(rig, setup):
    for name, value, phrase in (("control__gain_near", 0.0, "0.01"),     # rclpy's range
                                ("control__max_damping", 0.0, "1e-06"),  # check words these
                                ("control__gain_near", "fast", "is not a number"),
                                ("control__gain_nera", 1.0, "did you mean control.gain_near"),
                                ("limits__joint_acceleration", [1e308], "outside"),
                                ("control__direction_probe_px", 0.0,
                                 "may only be raised while motion is enabled")):
        result, = rig.set_params(**{name: value})
        assert not result.successful and phrase in result.reason, (name, result.reason)
    # an integer for a float parameter means that number
    assert rig.set_params(control__gain_near=2)[0].successful
    assert rig.get_params("control.gain_near") == [2.0]
    assert rig.controller.alive()


def test_malformed_target_and_reference_files_are_refused_live(rig, setup):
    _, tmp, _ = setup
    bad = {"syntax.yaml": "reference: [unclosed\n", "tag.yaml": "!!python/object/apply:os.system"
           " ['true']\n", "list.yaml": "- 1\n- 2\n"}
    for name, text in bad.items():
        path = tmp / name
        path.write_text(text)
        for param in ("reference__file", "target__file"):
            result, = rig.set_params(**{param: str(path)})
            assert not result.successful and name in result.reason, (param, result.reason)
    assert rig.controller.alive()
    _begin_run(rig, LARGE_OFFSET)        # the old files still serve
    rig.trigger(itf.SRV_STOP)


def test_start_is_refused_while_a_joint_is_beyond_its_limit(rig):
    arm = load_robot("vs7_bench")
    offset = np.zeros(arm.arm.n)
    offset[0] = arm.arm.upper[0] + 0.05 - arm.home[0]
    rig.stub(offset=offset.tolist())
    rig.spin(0.5)
    response = rig.trigger(itf.SRV_START)
    expect(response, False, "joints: vs7_j1 =", "outside [-2.8000, 2.8000]")
    rig.stub(offset=[0.0] * arm.arm.n)
    rig.spin(0.5)


def test_random_service_sequences_never_command_outside_a_run(rig):
    """Random enable / disable / start / stop / capture calls (seeded): every call answers
    with a reason, the node stays alive, and whenever it rests outside a run (disabled,
    armed, halted, converged) for a while, nothing arrives on the command topic."""
    rng = np.random.default_rng(7)
    calls = ["enable", "disable", "start", "stop", "capture"]
    quiet_checked = 0
    for call in rng.choice(calls, size=40):
        if call in ("enable", "disable"):
            response = rig.enable(call == "enable")
        elif call == "capture":
            response = rig.trigger(itf.SRV_CAPTURE_REFERENCE)
        else:
            response = rig.trigger(itf.SRV_START if call == "start" else itf.SRV_STOP)
        assert response.message, call
        rig.spin(0.15)
        state = rig.state()
        if state in ("disabled", "armed", "halted", "converged"):
            t0, n0 = time.monotonic(), len(rig.status)
            rig.spin(0.25)
            if all(s["state"] == state for s in rig.status[n0:]):
                assert not _commands_since(rig, t0 + 0.05), (call, state)
                quiet_checked += 1
    assert rig.controller.alive() and quiet_checked >= 10
    rig.enable(True)


def test_group_sigint_twice_mid_run_brakes_sends_the_zero_and_exits_zero(setup):
    """As a terminal Ctrl-C under ros2 launch: SIGINT to the whole process group, then again
    (launch forwards it). Before: KeyboardInterrupt tracebacks, exit -2, the final zero
    reached an outside subscriber in 1 of 3 tries."""
    rig, tmp, params_file = setup
    rig.controller.stop()                      # one commander at a time on the topic
    log = (tmp / "sigint.log").open("w")
    proc = subprocess.Popen([sys.executable, "-m", "vservo_node.ros.controller_node",
                             "--ros-args", "--params-file", str(params_file)],
                            stdout=log, stderr=subprocess.STDOUT, stdin=subprocess.DEVNULL,
                            env=harness.child_environment(), start_new_session=True)
    node = harness.NodeProcess.__new__(harness.NodeProcess)
    node.name, node.command, node.popen, node.log_path = "sig", [], proc, tmp / "sigint.log"
    rig.procs = [p for p in rig.procs if p is not rig.controller] + [node]
    rig.controller = node
    rig.clients.clear()
    try:
        rig.spin(1.0)
        expect(rig.capture(), True, "loaded")
        expect(rig.enable(True), True, "motion enabled")
        _begin_run(rig, LARGE_OFFSET)
        harness.spin_until(
            rig.node, lambda: rig.commands and np.max(np.abs(rig.commands[-1][1])) > 0.03,
            10.0, "the run to move", [node])
        t_signal = time.monotonic()
        os.killpg(proc.pid, signal.SIGINT)
        time.sleep(0.05)
        os.killpg(proc.pid, signal.SIGINT)
        rig.procs = [p for p in rig.procs if p is not node]
        harness.spin_until(rig.node, lambda: proc.poll() is not None, 8.0,
                           "the controller to exit", rig.procs)
        rig.spin(0.3)
        log.close()
        output = (tmp / "sigint.log").read_text()
        assert proc.returncode == 0, (proc.returncode, output[-2000:])
        assert "Traceback" not in output, output[-2000:]
        ramp = np.array(_commands_since(rig, t_signal))
        speeds = np.max(np.abs(ramp), axis=1)
        assert len(ramp) >= 2 and np.all(np.diff(speeds) <= 1e-12), speeds
        assert np.all(ramp[-1] == 0.0), "the last command received is an explicit zero"
        assert "braking to zero" in output
    finally:   # a failure before the signals must not leave the controller running
        if proc.poll() is None:
            proc.kill()
            proc.wait()
