"""The simulated-cell node (vservo_sim) as a separate process, over DDS, network-isolated.

Free-running cell (real time, wall-clock stamps): rates, stamp consistency, velocity and
trajectory commands, command timeout, refusals, the go_to_*_pose moves and their refusals,
the publish_clock default, the skip ahead after a stall (lock-step mode:
test_sim_node_lock_step.py).
Tolerances on rates are common practice for a loaded 2-core machine (no source).
"""
import os
import signal
import time

import numpy as np
import pytest
from geometry_msgs.msg import PoseStamped
from rosgraph_msgs.msg import Clock
from scipy.spatial.transform import Rotation
from sensor_msgs.msg import JointState
from std_msgs.msg import Float64MultiArray, String
from std_srvs.srv import Trigger
from trajectory_msgs.msg import JointTrajectory

from sim_helpers import (COMMAND_TIMEOUT, JOINT_STATE_RATE, Collector, config_scenario,
                         start_sim, stamp_ns, stop_sim)
from vservo_node import interface
from vservo_node.ros import convert, harness, qos

@pytest.fixture(scope="module")
def scenario():
    return config_scenario()


@pytest.fixture(scope="module")
def free_sim(ros_node):
    proc = start_sim(ros_node)
    collector = Collector(ros_node)
    harness.spin_until(ros_node, lambda: len(collector.joints) > 0, 20.0,
                       "a first joint state", [proc])
    yield proc, collector
    collector.close()
    stop_sim(proc)


def _names(collector):
    return list(collector.joints[-1][1].name)


def _publish_for(node, publisher, msg, seconds, rate, collector, proc):
    """Publish ``msg`` at ``rate`` Hz for ``seconds`` while spinning the collector."""
    end = time.monotonic() + seconds
    while time.monotonic() < end:
        publisher.publish(msg)
        collector.spin_for(1.0 / rate, [proc])


# ----------------------------------------------------------------------------- free-running
def test_rates_stamps_and_frames(free_sim, scenario, ros_node):
    proc, col = free_sim
    col.spin_for(0.5, [proc])  # drain what queued up while nobody spun
    col.clear()
    col.spin_for(2.0, [proc])
    camera_rate = scenario.fps
    for label, got, want in (("joint states", col.joints, JOINT_STATE_RATE),
                             ("images", col.images, camera_rate),
                             ("camera infos", col.infos, camera_rate)):
        rate = (len(got) - 1) / (got[-1][0] - got[0][0])  # by arrival time
        assert abs(rate - want) <= 0.2 * want, f"{label}: {rate:.1f} Hz, expected {want:g} " \
                                               "Hz +- 20 %"
    # Joint states sit on the 1/250 s tick grid; each image stamp (exposure time) equals the
    # stamp of its camera info and of a joint state (the tick it was exposed on).
    joint_stamps = {stamp_ns(m) for _, m in col.joints}
    info_by_stamp = {stamp_ns(m): m for _, m in col.infos}
    ticks = np.diff(sorted(joint_stamps))
    assert np.all(ticks % round(1e9 / JOINT_STATE_RATE) == 0)
    inside = [meta["stamp_ns"] for _, meta in col.images
              if min(joint_stamps) <= meta["stamp_ns"] <= max(joint_stamps)]
    assert len(inside) >= len(col.images) - 2
    assert set(inside) <= joint_stamps, "an image without the joint state of its instant"
    for _, meta in col.images:
        info = info_by_stamp.get(meta["stamp_ns"])
        if info is None:
            continue
        assert meta["frame_id"] == info.header.frame_id != ""
        assert meta["encoding"] == "rgb8"
        assert meta["shape"] == (info.height, info.width, 3)
        assert meta["mean"] > 0  # something was rendered
    # Frames are exposed on the tick nearest each camera period: each interval is within one
    # tick of the period, and the mean interval is the period.
    # A frame lost on the way (best effort) or skipped by a cell too busy for real time leaves
    # a gap of whole periods, still on the grid; such gaps stay rare (common practice, no
    # source).
    frame_s = np.array([meta["stamp_ns"] for _, meta in col.images]) * 1e-9
    periods = np.round(np.diff(frame_s) * camera_rate)
    assert np.all(periods >= 1)
    assert np.all(np.abs(np.diff(frame_s) - periods / camera_rate) <= 1 / JOINT_STATE_RATE
                  + 1e-9)
    assert np.mean(periods == 1) >= 0.8, f"{np.sum(periods > 1)} gaps in {len(periods)}"
    mean_period = (frame_s[-1] - frame_s[0]) / periods.sum()
    assert abs(mean_period - 1 / camera_rate) <= 1 / JOINT_STATE_RATE / periods.sum()


def test_latched_description_and_taught_pose(free_sim, ros_node):
    proc, _ = free_sim
    urdf = harness.wait_for_message(ros_node, interface.TOPIC_ROBOT_DESCRIPTION, String,
                                    qos.LATCHED, 10.0, processes=[proc])
    assert "<robot" in urdf.data
    taught = harness.wait_for_message(ros_node, interface.TOPIC_SIM_TAUGHT_POSE, PoseStamped,
                                      qos.LATCHED, 10.0, processes=[proc])
    T = convert.pose_to_matrix(taught)
    np.testing.assert_allclose(T[:3, :3] @ T[:3, :3].T, np.eye(3), atol=1e-9)
    truth = harness.wait_for_message(ros_node, interface.TOPIC_SIM_CAMERA_POSE_TRUTH,
                                     PoseStamped, qos.STATE, 10.0, processes=[proc])
    assert truth.header.frame_id == taught.header.frame_id != ""


def test_follows_velocity_then_brakes_on_timeout(free_sim, ros_node):
    proc, col = free_sim
    names = _names(col)
    dq = np.linspace(0.08, -0.08, len(names))  # rad/s (or m/s), small and safe
    pub = ros_node.create_publisher(Float64MultiArray, interface.TOPIC_JOINT_VELOCITY_CMD,
                                    qos.COMMANDS)
    harness.wait_for_subscriber(ros_node, interface.TOPIC_JOINT_VELOCITY_CMD, 10.0, [proc])
    col.clear()
    _publish_for(ros_node, pub, convert.joint_array(dq, names), 1.2, 50.0, col, proc)
    # Steady part: the last 0.6 s of commanding. Reported velocity equals the command and
    # positions advance by dq * elapsed simulated time (stamps).
    steady = [m for t, m in col.joints if t > col.joints[-1][0] - 0.6]
    q_a, v_a = convert.joint_state_to_arrays(steady[0], names)
    q_b, v_b = convert.joint_state_to_arrays(steady[-1], names)
    elapsed = (stamp_ns(steady[-1]) - stamp_ns(steady[0])) * 1e-9
    assert elapsed > 0.4
    np.testing.assert_allclose(v_b, dq, atol=1e-3)
    np.testing.assert_allclose(q_b - q_a, dq * elapsed, atol=0.03 * np.abs(dq).max() * elapsed
                               + 1e-4)
    # Stop commanding: after the timeout the cell brakes to rest.
    col.clear()
    col.spin_for(COMMAND_TIMEOUT + 0.6, [proc])
    _, v_end = convert.joint_state_to_arrays(col.joints[-1][1], names)
    np.testing.assert_allclose(v_end, 0.0, atol=1e-6)
    ros_node.destroy_publisher(pub)


def test_follows_single_point_trajectory(free_sim, ros_node):
    proc, col = free_sim
    names = _names(col)
    q0, _ = col.last_q(names)
    target = q0 + np.where(np.arange(len(names)) % 2 == 0, 0.03, -0.03)
    pub = ros_node.create_publisher(JointTrajectory,
                                    interface.TOPIC_JOINT_TRAJECTORY_CMD, qos.COMMANDS)
    harness.wait_for_subscriber(ros_node, interface.TOPIC_JOINT_TRAJECTORY_CMD, 10.0, [proc])
    shuffled = names[::-1]  # joints by name: the order in the message must not matter
    msg = convert.trajectory_point(shuffled, positions=target[::-1])
    _publish_for(ros_node, pub, msg, 1.5, 20.0, col, proc)
    q1, _ = col.last_q(names)
    np.testing.assert_allclose(q1, target, atol=1e-3)
    ros_node.destroy_publisher(pub)


def test_refused_command_is_logged_and_ignored(free_sim, ros_node):
    proc, col = free_sim
    names = _names(col)
    q0, _ = col.last_q(names)
    pub = ros_node.create_publisher(Float64MultiArray, interface.TOPIC_JOINT_VELOCITY_CMD,
                                    qos.COMMANDS)
    harness.wait_for_subscriber(ros_node, interface.TOPIC_JOINT_VELOCITY_CMD, 10.0, [proc])
    wrong = Float64MultiArray(data=[0.2] * (len(names) + 1))
    _publish_for(ros_node, pub, wrong, 0.3, 20.0, col, proc)
    harness.wait_until(lambda: "velocity command refused" in proc.output(), 5.0,
                       "the refusal in the node's log", [proc])
    assert f"expected {len(names)}" in proc.output()
    q1, _ = col.last_q(names)
    np.testing.assert_allclose(q1, q0, atol=1e-3)  # 0.2 rad/s for 0.3 s would move 0.06
    ros_node.destroy_publisher(pub)


@pytest.mark.parametrize("overrides,reason", [
    (["lock_step:=true"], "needs publish_clock: true"),
    (["scenario:=no_such_cell"], "no scenarios entry named 'no_such_cell'; available:"),
    (["joint_state_rate:=5000.0"], "joint_state_rate"),
    (["command_joint_order:=[vs7_j1, vs7_j2]"], "must name each arm joint once"),
])
def test_bad_parameters_refuse_to_start_with_reason(overrides, reason):
    harness.require_isolation()
    params = [item for o in overrides for item in ("-p", o)]
    proc = harness.start_module("vservo_node.ros.sim_node", ros_args=params, name="vservo_sim")
    try:
        code = proc.popen.wait(30.0)
        output = proc.output()
    finally:
        proc.stop()
        proc.remove_log()
    assert code == 2 and "vservo_sim: cannot start:" in output and reason in output, output


# ----------------------------------------------------------------------------- moves
def _move(node, proc, name, timeout=60.0):
    client = harness.ready_client(node, Trigger, name, 20.0, [proc])
    return harness.call_service(node, client, Trigger.Request(), timeout, [proc])


def _wait_rest(col, names, proc, seconds=3.0):
    """Spin until the reported joint speeds are ~0 (a braked or holding arm)."""
    harness.spin_until(col.node, lambda: bool(col.joints) and np.max(np.abs(
        col.last_q(names)[1])) < 1e-6, seconds, "the arm at rest", [proc])


def test_go_to_taught_and_start_pose_at_bounded_speed(free_sim, scenario, ros_node):
    """The move services bring the arm to the scenario's taught / start joints, at rest, at no
    more than move_speed_scale (0.25, config/sim_cell.yaml) of the URDF velocity limits; the
    true camera pose then equals the taught camera pose the node publishes."""
    proc, col = free_sim
    names = _names(col)
    _wait_rest(col, names, proc)
    vmax = np.asarray(scenario.arm_model("true").velocity_limits, float)
    truth = []
    sub = ros_node.create_subscription(PoseStamped, interface.TOPIC_SIM_CAMERA_POSE_TRUTH,
                                       lambda m: truth.append(convert.pose_to_matrix(m)),
                                       qos.STATE)
    taught = convert.pose_to_matrix(harness.wait_for_message(
        ros_node, interface.TOPIC_SIM_TAUGHT_POSE, PoseStamped, qos.LATCHED, 10.0,
        processes=[proc]))
    try:
        for service, goal, label in ((interface.SRV_SIM_GO_TO_TAUGHT, scenario.q_taught,
                                      "taught"),
                                     (interface.SRV_SIM_GO_TO_START, scenario.q_start, "start")):
            col.clear()
            reply = _move(ros_node, proc, service)
            assert reply.success, reply.message
            assert f"at the {label} pose" in reply.message
            col.spin_for(0.5, [proc])   # what queued up during the move
            peak = max(float(np.max(np.abs(convert.joint_state_to_arrays(m, names)[1]) / vmax))
                       for _, m in col.joints)
            # The cubic peaks at exactly the scale on the joint that needs longest; the drive's
            # lag and position feedback add a few per cent (common practice, no source). A
            # jump would show no speed at all (the lower bound is loose: a starved test process
            # may lose the middle of the move from its 200-deep queue).
            assert 0.05 <= peak <= 0.25 * 1.06, f"peak joint speed {peak:.3f} of the URDF limit"
            col.clear()
            col.spin_for(0.3, [proc])
            assert len(col.joints) > 10
            for _, msg in col.joints:   # the arm rests at the goal after the answer
                q, dq = convert.joint_state_to_arrays(msg, names)
                # Reported joints carry the scenario's noise (joint_noise_std 1e-5 rad).
                np.testing.assert_allclose(q, goal, atol=1e-4)
                np.testing.assert_allclose(dq, 0.0, atol=1e-5)
            if label == "taught":   # pose difference by NumPy and SciPy's rotation angle
                T = truth[-1]
                error_m = float(np.linalg.norm(T[:3, 3] - taught[:3, 3]))
                error_rad = Rotation.from_matrix(taught[:3, :3].T @ T[:3, :3]).magnitude()
                assert error_m < 1e-5 and error_rad < 1e-5, (error_m, error_rad)
    finally:
        ros_node.destroy_subscription(sub)


def test_move_refused_while_the_controller_commands(free_sim, ros_node):
    proc, col = free_sim
    names = _names(col)
    pub = ros_node.create_publisher(Float64MultiArray, interface.TOPIC_JOINT_VELOCITY_CMD,
                                    qos.COMMANDS)
    harness.wait_for_subscriber(ros_node, interface.TOPIC_JOINT_VELOCITY_CMD, 10.0, [proc])
    client = harness.ready_client(ros_node, Trigger, interface.SRV_SIM_GO_TO_START, 20.0, [proc])
    slow = convert.joint_array(np.full(len(names), 0.02), names)
    _publish_for(ros_node, pub, slow, 0.3, 50.0, col, proc)
    future = client.call_async(Trigger.Request())
    while not future.done():  # keep commanding until the answer
        _publish_for(ros_node, pub, slow, 0.02, 50.0, col, proc)
    reply = future.result()
    assert not reply.success
    assert "go_to_start_pose refused: the arm is following controller commands" in reply.message
    assert "stop the run first" in reply.message
    ros_node.destroy_publisher(pub)
    _wait_rest(col, names, proc)


def test_controller_command_interrupts_a_move(free_sim, scenario, ros_node):
    proc, col = free_sim
    names = _names(col)
    _wait_rest(col, names, proc)
    pub = ros_node.create_publisher(Float64MultiArray, interface.TOPIC_JOINT_VELOCITY_CMD,
                                    qos.COMMANDS)
    harness.wait_for_subscriber(ros_node, interface.TOPIC_JOINT_VELOCITY_CMD, 10.0, [proc])
    q0, _ = col.last_q(names)
    # Wherever the arm is, one of the two poses is at least some way off.
    far = (interface.SRV_SIM_GO_TO_TAUGHT
           if np.max(np.abs(q0 - scenario.q_taught)) > np.max(np.abs(q0 - scenario.q_start))
           else interface.SRV_SIM_GO_TO_START)
    client = harness.ready_client(ros_node, Trigger, far, 20.0, [proc])
    future = client.call_async(Trigger.Request())
    harness.spin_until(ros_node, lambda: np.max(np.abs(col.last_q(names)[1])) > 0.01, 10.0,
                       "the move under way", [proc])
    # Until the answer: one message could go out before the node matched our new publisher.
    zero = convert.joint_array(np.zeros(len(names)), names)
    end = time.monotonic() + 10.0
    while not future.done() and time.monotonic() < end:
        _publish_for(ros_node, pub, zero, 0.02, 50.0, col, proc)
    assert future.done(), "no answer from the interrupted move"
    reply = future.result()
    assert not reply.success
    assert "interrupted" in reply.message and "command from the controller" in reply.message
    ros_node.destroy_publisher(pub)
    _wait_rest(col, names, proc)


def test_publish_clock_follows_use_sim_time(ros_node, free_sim):
    """Without publish_clock in its parameters the node publishes /clock exactly when its own
    use_sim_time is true (free_sim: false, none heard)."""
    proc_free, col = free_sim
    col.clear()
    col.spin_for(0.3, [proc_free])
    assert col.joints and not col.clock, "publish_clock defaulted to true without use_sim_time"
    proc = start_sim(ros_node, "use_sim_time:=true")
    try:
        harness.wait_for_publisher(ros_node, "/clock", 20.0, [proc])
        clock = harness.wait_for_message(ros_node, "/clock", Clock, qos.CLOCK, 10.0,
                                         processes=[proc])
        # Simulated time from 0: far below any wall-clock stamp.
        assert clock.clock.sec < 3600
    finally:
        stop_sim(proc)


def test_wall_clock_stamps_skip_ahead_when_the_cell_cannot_keep_up(free_sim, ros_node):
    """A sim that gets 10 % of the wall time (SIGSTOP/SIGCONT, as on a machine too busy for
    real time) does not fall ever further behind with its wall-clock stamps: it skips ahead
    to the wall clock and says so in its log."""
    import threading
    proc, col = free_sim
    lags = []
    sub = ros_node.create_subscription(
        JointState, interface.TOPIC_JOINT_STATES,
        lambda m: lags.append(time.time() - stamp_ns(m) * 1e-9), qos.STATE)
    pid, done = proc.popen.pid, threading.Event()

    def throttle():
        end = time.monotonic() + 4.0
        try:
            while time.monotonic() < end:
                os.kill(pid, signal.SIGCONT)
                time.sleep(0.01)
                os.kill(pid, signal.SIGSTOP)
                time.sleep(0.09)
        finally:
            os.kill(pid, signal.SIGCONT)
            done.set()

    try:
        thread = threading.Thread(target=throttle, daemon=True)
        thread.start()
        col.spin_for(3.0, [proc])
        lags.clear()
        harness.spin_until(ros_node, done.is_set, 10.0, "the end of the throttling", [proc])
        # Messages of the last second of throttling: the least delayed one shows where the
        # stamps are. Without the skip they lag by ~3 s by then (10 % of real time).
        assert lags and min(lags) < 0.5, f"stamps {min(lags):.3f} s behind the wall clock"
        harness.wait_until(lambda: "behind the wall clock" in proc.output(), 5.0,
                           "the skip in the node's log", [proc])
    finally:
        done.wait(10.0)
        ros_node.destroy_subscription(sub)
