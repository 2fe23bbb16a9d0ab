"""The controller as a managed node, driven over DDS through the lifecycle_msgs services
(``/vservo/change_state``, ``/vservo/get_state``) against the stub cell of
tests/ros/test_controller_node.py.

Checked against the node's documented lifecycle (vservo_node/ros/controller/node.py) and the
ROS 2 managed-node state machine (primary states unconfigured / inactive / active /
finalized and their transitions: ROS 2 design article "Managed nodes", design.ros2.org,
from memory; the transition ids come from lifecycle_msgs/Transition itself):

- the managed entry point starts unconfigured, with no supervisor services and no command
  publisher; configure makes them, and enable is refused until the node is active;
- deactivate during a moving run: the command stream brakes (speeds non-increasing, each step
  within the deceleration limit), ends in one explicit zero and then stays silent; the run
  ends ``stop_requested`` and motion is disabled (start refused after re-activation until
  enable);
- cleanup returns to unconfigured (services and publisher gone), configure + activate serve
  again, and shutdown from active during a moving run brakes to the explicit zero as well and
  ends finalized.
"""
from __future__ import annotations

import sys
import time
from pathlib import Path

import numpy as np
import pytest
from lifecycle_msgs.msg import Transition
from lifecycle_msgs.srv import ChangeState, GetState

from test_controller_node import (HALT_ACCELERATION, LARGE_OFFSET, OUTPUT_RATE, Rig,
                                  _begin_run, _commands_since, _write_params,
                                  controller_parameters, expect)
from vservo_node import interface as itf
from vservo_node.ros import harness

STUB = str(Path(__file__).with_name("test_controller_node.py"))
PERIOD = 1.0 / OUTPUT_RATE
NODE = "/" + itf.CONTROLLER_NODE


@pytest.fixture(scope="module")
def setup(ros_node, tmp_path_factory):
    harness.require_isolation()
    tmp = tmp_path_factory.mktemp("lifecycle")
    values = controller_parameters(tmp / "references")
    values["limits"]["joint_acceleration"] = [HALT_ACCELERATION]
    params_file = _write_params(tmp / "vservo.yaml", values)
    procs = {
        "controller": harness.start_module("vservo_node.ros.controller_managed",
                                           ros_args=["--params-file", str(params_file)],
                                           name="managed_controller"),
        "stub": harness.NodeProcess([sys.executable, STUB, "--stub"], "stub_cell"),
    }
    try:
        yield Rig(ros_node, procs)
    finally:
        for proc in procs.values():
            proc.stop()


def _state(rig) -> str:
    return rig.call(GetState, f"{NODE}/get_state").current_state.label


def _transition(rig, transition_id: int) -> bool:
    return rig.call(ChangeState, f"{NODE}/change_state",
                    ChangeState.Request(transition=Transition(id=transition_id))).success


def _service_names(rig) -> set[str]:
    """The controller's services (by node: a client alone also puts a name in the graph)."""
    return {name for name, _ in rig.node.get_service_names_and_types_by_node(
        itf.CONTROLLER_NODE, "/")}


def _publishes_command(rig) -> bool:
    return any(info.node_name == itf.CONTROLLER_NODE for info in
               rig.node.get_publishers_info_by_topic("/" + itf.TOPIC_JOINT_VELOCITY_CMD))


def _moving_run(rig) -> tuple[float, int]:
    """A run that moves, commands recorded; returns (time it was seen moving, status count)."""
    _begin_run(rig, LARGE_OFFSET)
    rig.spin(0.8)             # past the start nod and the soft start: the law commands
    harness.spin_until(rig.node, lambda: rig.commands and np.max(np.abs(rig.commands[-1][1]))
                       > 0.03, 10.0, "the run to move", rig.procs)
    return time.monotonic(), len(rig.status)


def _assert_braked_to_one_zero(rig, since: tuple[float, int], reason: str):
    """From the first braking command (the dq of the first ``braking`` status with
    ``reason``) the commands brake to one explicit zero, then nothing (module docstring)."""
    t0, n_status = since
    rig.spin(0.5)
    braking = next((s for s in rig.status[n_status:]
                    if s["state"] == "braking" and s["reason"] == reason), None)
    assert braking is not None, f"no braking status with reason {reason}: " + str(
        [(s["state"], s["reason"]) for s in rig.status[n_status:]][:10])
    commands = _commands_since(rig, t0)
    first = next(i for i, c in enumerate(commands) if c.tolist() == braking["dq"])
    ramp = np.array(commands[first:])
    # braking from a moving command: no jump to zero (the per-step bound below), however
    # fast the run was when the transition landed
    speeds = np.max(np.abs(ramp), axis=1)
    assert len(ramp) >= 2 and speeds[0] > 0.0, speeds
    assert np.all(np.diff(speeds) <= 1e-12), speeds
    assert np.max(np.abs(np.diff(ramp, axis=0))) <= HALT_ACCELERATION * PERIOD + 1e-9
    assert np.all(ramp[-1] == 0.0)
    assert np.count_nonzero(np.all(ramp == 0.0, axis=1)) == 1, "one explicit zero, then quiet"
    n = len(rig.commands)
    rig.spin(0.5)
    assert len(rig.commands) == n, "commands after the explicit zero"


def test_starts_unconfigured_and_configure_makes_the_services(setup):
    rig = setup
    harness.ready_client(rig.node, GetState, f"{NODE}/get_state", 20.0, rig.procs)
    assert _state(rig) == "unconfigured"
    assert "/" + itf.SRV_ENABLE_MOTION not in _service_names(rig)
    assert not _publishes_command(rig)
    assert _transition(rig, Transition.TRANSITION_CONFIGURE)
    assert _state(rig) == "inactive"
    expect(rig.enable(True), False, "node: not active (lifecycle state inactive)")
    assert _publishes_command(rig)


def test_activate_then_deactivate_during_a_moving_run_brakes_to_one_zero(setup):
    rig = setup
    assert _transition(rig, Transition.TRANSITION_ACTIVATE)
    assert _state(rig) == "active"
    rig.start_stub()
    expect(rig.capture(), True, "loaded")
    expect(rig.enable(True), True, "motion enabled")
    rig.listen_commands()
    n_results = len(rig.results)
    since = _moving_run(rig)
    assert _transition(rig, Transition.TRANSITION_DEACTIVATE)
    assert _state(rig) == "inactive"
    _assert_braked_to_one_zero(rig, since, "stop_requested")
    harness.spin_until(rig.node, lambda: len(rig.results) > n_results, 5.0, "a run result",
                       rig.procs)
    assert rig.results[-1]["reason"] == "stop_requested"
    assert "deactivated" in rig.results[-1]["detail"]
    assert "halt: stop_requested" in rig.controller.output()
    expect(rig.enable(True), False, "node: not active (lifecycle state inactive)")


def test_reactivated_node_needs_enable_again(setup):
    rig = setup
    assert _transition(rig, Transition.TRANSITION_ACTIVATE)
    rig.spin(0.5)
    expect(rig.trigger(itf.SRV_START), False, "state: motion is not enabled")
    end = time.monotonic() + 10.0
    while not (reply := rig.enable(True)).success and time.monotonic() < end:
        rig.spin(0.3)    # the inputs need a moment to be fresh again after re-subscribing
    expect(reply, True, "motion enabled")


def test_cleanup_unconfigures_and_configure_serves_again(setup):
    rig = setup
    assert _transition(rig, Transition.TRANSITION_DEACTIVATE)
    assert _transition(rig, Transition.TRANSITION_CLEANUP)
    assert _state(rig) == "unconfigured"
    harness.spin_until(rig.node, lambda: not _publishes_command(rig)
                       and "/" + itf.SRV_ENABLE_MOTION not in _service_names(rig), 10.0,
                       "the command publisher and the services to go", rig.procs)
    assert _transition(rig, Transition.TRANSITION_CONFIGURE)
    assert _transition(rig, Transition.TRANSITION_ACTIVATE)
    assert _state(rig) == "active"
    rig.clients.clear()     # the services were made anew
    rig.spin(0.5)
    end = time.monotonic() + 10.0
    while not (reply := rig.capture()).success and time.monotonic() < end:
        rig.spin(0.3)
    expect(reply, True, "loaded")
    while not (reply := rig.enable(True)).success and time.monotonic() < end:
        rig.spin(0.3)
    expect(reply, True, "motion enabled")


def test_shutdown_during_a_moving_run_brakes_to_one_zero_and_finalizes(setup):
    rig = setup
    since = _moving_run(rig)
    assert _transition(rig, Transition.TRANSITION_ACTIVE_SHUTDOWN)
    assert _state(rig) == "finalized"
    _assert_braked_to_one_zero(rig, since, "shutdown")
    assert rig.controller.alive()    # finalized, not dead: the process ends on a signal


def test_a_transition_that_raises_ends_unconfigured_through_on_error(ros_node):
    """A transition callback that raises goes to error processing (ROS 2 managed-node state
    machine, from memory; rclpy's LifecycleNode implements it); on_error brings the node to
    rest, drops what configure made and returns it to unconfigured. In-process node, its own
    namespace (not the managed process's)."""
    from rclpy.lifecycle import TransitionCallbackReturn
    from rclpy.parameter import Parameter

    from test_controller_node import URDF
    from vservo_node.ros.controller.node import ControllerNode

    node = ControllerNode(namespace="/on_error", parameter_overrides=[
        Parameter("robot.urdf_path", value=str(URDF)),
        Parameter("limits.joint_acceleration", value=[HALT_ACCELERATION])])
    try:
        assert node.trigger_configure() == TransitionCallbackReturn.SUCCESS
        assert node._lifecycle_label() == "inactive" and node._publishers_made
        assert node.servo is not None

        def broken():
            raise RuntimeError("subscription failed (test)")
        node._make_subscriptions = broken
        assert node.trigger_activate() == TransitionCallbackReturn.ERROR
        assert node._lifecycle_label() == "unconfigured"
        assert node.servo is None and not node._publishers_made and not node._services_made
        assert node._output_loop is None or not node._output_loop.running
        del node._make_subscriptions             # configure and activate work again
        assert node.trigger_configure() == TransitionCallbackReturn.SUCCESS
        assert node.trigger_activate() == TransitionCallbackReturn.SUCCESS
        assert node._output_loop is not None and node._output_loop.running
        assert node.trigger_shutdown() == TransitionCallbackReturn.SUCCESS
        assert node._lifecycle_label() == "finalized"
        assert not node._output_loop.running
    finally:
        node.destroy_node()
