"""The simulated drives: lag, limits, latency, timeout braking, trajectories, state history.

Outside references: the velocity loop is checked against SciPy's ODE integrator (solve_ivp) on
``tau dq' = r - dq`` (Ogata, Modern Control Engineering, 5th ed. 2010, sec. 5.2); braking
against uniformly decelerated motion (v = v0 - a t, distance v0^2 / (2a); any mechanics
textbook, e.g. Halliday, Resnick & Walker, Fundamentals of Physics, ch. 2).
"""
from __future__ import annotations

import functools

import numpy as np
import pytest
from scipy.integrate import solve_ivp

from vservo_node.control.kinematics import load_robot
from vservo_node.sim.arm import ArmDynamics, SimArm

TAU = 0.03


@functools.cache
def robot():
    return load_robot("vs6_bench")


def make_arm(**dynamics):
    r = robot()
    return SimArm(r.arm, r.home, ArmDynamics(**{"velocity_lag_s": TAU, **dynamics}))


def run(arm, seconds, dt=0.01, command=None):
    """Step ``seconds`` in steps of ``dt``, re-sending ``command`` (if given) before each step;
    returns times and true (q, dq) after each step."""
    times, qs, dqs = [], [], []
    for _ in range(int(round(seconds / dt))):
        if command is not None:
            arm.command_velocity(command, arm.t)
        arm.step(dt)
        q, dq = arm.true_state()
        times.append(arm.t)
        qs.append(q)
        dqs.append(dq)
    return np.array(times), np.array(qs), np.array(dqs)


def test_velocity_step_follows_first_order_lag():
    arm = make_arm(command_timeout_s=10.0)
    q0 = arm.true_state()[0]
    r = np.array([0.4, -0.3, 0.2, 0.5, -0.6, 1.0])
    arm.command_velocity(r, 0.0)
    times, qs, dqs = run(arm, 0.3)

    def rhs(_, y):  # y = [q, dq]
        return np.concatenate([y[6:], (r - y[6:]) / TAU])

    ref = solve_ivp(rhs, (0.0, times[-1]), np.concatenate([q0, np.zeros(6)]), t_eval=times,
                    rtol=1e-10, atol=1e-12)
    assert np.allclose(qs, ref.y[:6].T, atol=1e-8)
    assert np.allclose(dqs, ref.y[6:].T, atol=1e-8)


def test_velocity_commands_are_clamped_to_urdf_limits():
    arm = make_arm()
    vmax = robot().arm.velocity_limits
    _, _, dqs = run(arm, 0.25, command=3.0 * vmax * np.array([1, -1, 1, -1, 1, -1]))
    assert np.all(np.abs(dqs) <= vmax + 1e-12)
    assert np.allclose(np.abs(dqs[-1]), vmax, rtol=1e-3)  # and it does reach them


def test_joint_stops_at_its_position_limit():
    arm = make_arm()
    r = robot()
    command = np.zeros(6)
    command[1] = r.arm.velocity_limits[1]  # j2 towards its upper limit
    _, qs, dqs = run(arm, 2.0, command=command)
    assert np.all(qs[:, 1] <= r.arm.upper[1])
    assert qs[-1, 1] == pytest.approx(r.arm.upper[1])
    assert dqs[-1, 1] == 0.0
    assert np.allclose(qs[:, [0, 2, 3, 4, 5]], r.home[[0, 2, 3, 4, 5]])


def test_command_latency_delays_the_response():
    arm = make_arm(command_latency_s=0.05)
    arm.command_velocity(np.full(6, 0.5), 0.0)
    times, _, dqs = run(arm, 0.1, dt=0.001)
    assert np.all(dqs[times <= 0.05 + 1e-9] == 0.0)
    assert np.all(dqs[times >= 0.052][:, 0] > 0.0)


def test_command_timeout_brakes_to_zero_within_the_deceleration_limit():
    decel = 2.0
    arm = make_arm(command_timeout_s=0.1, decel_limit=decel)
    command = np.array([0.5, -0.3, 0.2, 0.0, 0.1, 1.2])
    run(arm, 0.5, dt=0.002, command=command)   # steady: dq = command
    last_command = arm.t - 0.002
    q_before, dq_before = arm.true_state()
    times, qs, dqs = run(arm, 1.2, dt=0.002)  # the controller died: no more commands
    # Nothing changes until the timeout (the lag has settled: dq = command).
    waiting = times < last_command + 0.1 - 1e-9
    assert np.allclose(dqs[waiting], dq_before, atol=1e-6)
    # Then a synchronised linear ramp to exactly zero: the fastest joint (1.2 rad/s) sets
    # the duration 1.2 / decel = 0.6 s.
    t_brake = last_command + 0.1
    duration = 1.2 / decel
    accel = np.diff(dqs, axis=0) / np.diff(times)[:, None]
    assert np.all(np.abs(accel) <= decel * (1 + 1e-9))
    stopped = times >= t_brake + duration - 1e-9
    assert stopped.any() and np.all(dqs[stopped] == 0.0)
    assert np.all(np.abs(dqs[~stopped & ~waiting, 5]) > 0)
    # Distance covered while braking: v0^2 / (2 a_j), with a_j = v0_j / duration.
    q_brake = q_before + dq_before * (t_brake - arm.t + 1.2)  # constant speed until the brake
    expected = q_brake + dq_before * duration / 2
    assert np.allclose(qs[-1], expected, atol=1e-9)


def test_brake_keeps_the_direction_of_motion():
    """All joints stop together, so the joint-space path of the stop is a straight line."""
    arm = make_arm(command_timeout_s=0.05, decel_limit=(2.0, 2.0, 2.0, 2.0, 2.0, 0.5))
    command = np.array([0.5, -0.3, 0.2, 0.0, 0.1, 0.4])
    run(arm, 0.3, dt=0.002, command=command)
    _, _, dqs = run(arm, 1.5, dt=0.002)
    moving = np.linalg.norm(dqs, axis=1) > 1e-9
    directions = dqs[moving] / np.linalg.norm(dqs[moving], axis=1)[:, None]
    assert np.allclose(directions, command / np.linalg.norm(command), atol=1e-6)
    assert not moving[-1]


def test_position_command_reaches_the_goal_within_velocity_limits():
    r = robot()
    arm = make_arm()
    goal = r.home + np.array([0.3, -0.2, 0.25, 0.4, -0.3, 1.0])
    arm.command_position(goal, 0.0, duration=1.0)
    times, qs, dqs = run(arm, 1.5, dt=0.005)
    assert np.all(np.abs(dqs) <= r.arm.velocity_limits + 1e-12)
    assert np.allclose(qs[-1], goal, atol=1e-4)
    assert np.allclose(dqs[-1], 0.0, atol=1e-3)
    # The move takes about the asked duration: not there half-way through.
    assert np.abs(qs[times <= 0.5][-1] - goal).max() > 0.1


def test_position_command_is_never_faster_than_the_limits_allow():
    r = robot()
    arm = make_arm()
    goal = np.clip(r.home + 2.0, r.arm.lower, r.arm.upper)
    arm.command_position(goal, 0.0, duration=0.01)  # far too short: stretched
    _, qs, dqs = run(arm, 3.0, dt=0.005)
    assert np.all(np.abs(dqs) <= r.arm.velocity_limits + 1e-12)
    assert np.allclose(qs[-1], goal, atol=1e-4)


def test_stepping_in_different_chunks_gives_the_same_motion():
    states = []
    for dt in (0.001, 0.0037, 0.02, 0.25):
        arm = make_arm(command_latency_s=0.004, command_timeout_s=0.1)
        arm.command_velocity(np.array([0.4, -0.3, 0.2, 0.5, -0.6, 1.0]), 0.0)
        arm.command_position(robot().home, 0.3)
        while arm.t < 1.0 - 1e-12:
            arm.step(min(dt, 1.0 - arm.t))
        states.append(np.concatenate(arm.true_state()))
    assert np.allclose(states, states[0], atol=1e-12)


def test_past_states_stay_as_they_were_reported():
    arm = make_arm(command_timeout_s=0.1)  # the record spans motion, braking and rest
    arm.command_velocity(np.array([0.4, -0.3, 0.2, 0.5, -0.6, 1.0]), 0.0)
    reported = {}
    for _ in range(40):
        arm.step(0.0073)  # ends mid-cycle: the state comes from the cycle not yet run
        reported[arm.t] = np.concatenate(arm.true_state())
    for t, state in reported.items():
        assert np.allclose(np.concatenate(arm.true_state(t)), state, atol=1e-12)
    with pytest.raises(ValueError, match="after the simulation time"):
        arm.true_state(arm.t + 0.1)


def test_joint_state_noise_is_seeded_by_time():
    arm = make_arm(joint_noise_std=1e-3, seed=5)
    arm.step(0.5)
    q_true = arm.true_state()[0]
    a, b = arm.state(0.25)[0], arm.state(0.25)[0]
    assert np.array_equal(a, b)                      # same time, same noise
    assert not np.array_equal(a, arm.state(0.26)[0])  # another time, other noise
    samples = np.array([arm.state(t)[0] - q_true for t in np.linspace(0.3, 0.5, 200)])
    assert samples.std() == pytest.approx(1e-3, rel=0.15)


def test_refuses_malformed_commands():
    arm = make_arm()
    with pytest.raises(ValueError, match="6 finite values"):
        arm.command_velocity([0.1, 0.2], 0.0)
    with pytest.raises(ValueError, match="6 finite values"):
        arm.command_position([np.nan] * 6, 0.0)
    with pytest.raises(ValueError, match="dt must be >= 0"):
        arm.step(-0.1)
