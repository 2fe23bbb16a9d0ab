"""The simulated-cell node in lock-step mode (simulated clock, as fast as possible), as a
separate process over DDS: one camera frame per command, every tick published in order,
/clock, and a command joint order other than the chain order."""
import numpy as np
import pytest
from std_msgs.msg import Float64MultiArray

from sim_helpers import JOINT_STATE_RATE, Collector, config_scenario, start_sim, stamp_ns, stop_sim
from vservo_node import interface
from vservo_node.ros import convert, harness, qos


@pytest.fixture(scope="module")
def scenario():
    return config_scenario()


@pytest.fixture(scope="module")
def lock_sim(ros_node, scenario):
    names = list(scenario.joint_names)
    order = names[::-1]
    proc = start_sim(ros_node, "lock_step:=true", "publish_clock:=true",
                     "real_time_factor:=0.0", "lock_step_resend:=1.0",
                     f"command_joint_order:=[{', '.join(order)}]")
    collector = Collector(ros_node)
    yield proc, collector, names, order
    collector.close()
    stop_sim(proc)


def _synced_frame(col):
    """Stamp (ns) of the newest image whose joint state has arrived, or None."""
    joint_stamps = {stamp_ns(m) for _, m in col.joints}
    synced = [meta["stamp_ns"] for _, meta in col.images if meta["stamp_ns"] in joint_stamps]
    return synced[-1] if synced else None


def test_lock_step_advances_one_frame_per_command(lock_sim, scenario, ros_node):
    proc, col, names, order = lock_sim
    pub = ros_node.create_publisher(Float64MultiArray, interface.TOPIC_JOINT_VELOCITY_CMD,
                                    qos.COMMANDS)
    harness.wait_for_subscriber(ros_node, interface.TOPIC_JOINT_VELOCITY_CMD, 10.0, [proc])
    # The first frame may have gone out before our subscriptions matched: the node sends an
    # unanswered tick again after lock_step_resend (1 s).
    harness.spin_until(ros_node, lambda: _synced_frame(col) is not None, 10.0,
                       "a first frame with its joint state", [proc])
    first = _synced_frame(col)
    col.spin_for(0.3, [proc])
    assert {meta["stamp_ns"] for _, meta in col.images} == {first}, \
        "a lock-step cell must not advance without a command"
    q_start, _ = convert.joint_state_to_arrays(
        next(m for _, m in col.joints if stamp_ns(m) == first), names)
    # Command only the first chain joint; it is the last value in the reversed order.
    v = 0.2
    cmd = convert.joint_array([0.0] * (len(names) - 1) + [v], order)
    n0, n_frames = len(col.images), 5
    for k in range(1, n_frames + 1):
        pub.publish(cmd)
        harness.spin_until(ros_node, lambda: len(col.images) >= n0 + k,  # noqa: B023 - now
                           10.0,
                           f"frame {k} after command {k}", [proc])
    col.spin_for(0.3, [proc])
    new = [meta["stamp_ns"] - first for _, meta in col.images[n0:]]
    tick_ns = round(1e9 / JOINT_STATE_RATE)
    frame_tick = [round(k * JOINT_STATE_RATE / scenario.fps) for k in range(n_frames + 1)]
    # Frame k is exposed on tick round(k * 250 / fps) counted from the first frame's tick
    # (the first frame is frame 0 of the run: tick 0).
    assert first == 0, "with publish_clock the run starts at simulated time 0"
    assert new == [frame_tick[k] * tick_ns for k in range(1, n_frames + 1)], \
        "exactly one new frame per command, one camera period apart"
    last = first + new[-1]
    # Every tick between the frames was published, in order. /clock (keep-last 1: only the
    # newest time matters) moves forward on the tick grid and reaches the last tick.
    joint_stamps = [stamp_ns(m) for _, m in col.joints]
    assert joint_stamps == sorted(joint_stamps)
    assert sorted(set(joint_stamps)) == list(range(first, last + 1, tick_ns))
    clock_ns = [c.sec * 1_000_000_000 + c.nanosec for c in col.clock]
    assert clock_ns == sorted(clock_ns) and clock_ns[-1] == last
    assert all(c % tick_ns == 0 for c in clock_ns)
    q_end, _ = convert.joint_state_to_arrays(col.joints[-1][1], names)
    # Velocity step through the drive's latency and first-order lag: the ramp-up loses
    # tau * (1 - exp(-T / tau)) of travel (Ogata, Modern Control Engineering, 5th ed. 2010,
    # sec. 5.2, first-order step response, integrated).
    dyn = scenario.arm_dynamics
    moving = (last - first) * 1e-9 - dyn.command_latency_s
    travel = v * (moving - dyn.velocity_lag_s * (1 - np.exp(-moving / dyn.velocity_lag_s)))
    np.testing.assert_allclose(q_end[0] - q_start[0], travel, rtol=0.02)
    np.testing.assert_allclose(q_end[1:], q_start[1:], atol=10 * dyn.joint_noise_std + 1e-9)
    ros_node.destroy_publisher(pub)


def test_lock_step_cell_moves_to_the_taught_pose_by_itself(lock_sim, scenario, ros_node):
    """A go_to_taught_pose move advances the lock-stepped cell without controller commands;
    afterwards the cell waits for commands again (no new frame but the resent one)."""
    from std_srvs.srv import Trigger
    proc, col, names, _ = lock_sim
    client = harness.ready_client(ros_node, Trigger, interface.SRV_SIM_GO_TO_TAUGHT, 20.0,
                                  [proc])
    col.clear()
    reply = harness.call_service(ros_node, client, Trigger.Request(), 60.0, [proc])
    assert reply.success, reply.message
    harness.spin_until(ros_node, lambda: bool(col.joints) and np.allclose(
        col.last_q(names)[0], scenario.q_taught, atol=1e-4), 10.0, "the taught joints", [proc])
    assert len({meta["stamp_ns"] for _, meta in col.images}) > 10, "the cell did not advance"
    col.spin_for(0.5, [proc])   # drain
    col.clear()
    col.spin_for(0.6, [proc])   # lock_step_resend is 1 s: at most one resent frame
    assert len({meta["stamp_ns"] for _, meta in col.images}) <= 1
