"""Fail-safe behaviour of the servo core (vservo_node/servo.py, control/safety.py, params.py),
without ROS: every input or fault ends in a braked, explained stop, and the motion-bounding
checks run on the output tick whether or not a frame could be used.

The braking bound used throughout: from a command dq the speed is non-increasing and reaches
zero within max_i(|dq_i| / a_i) + one output period, a_i the acceleration limit (our design
rule for the limiter, module docstring of control/safety.py; common practice, no source).
Each test asserts the command over time, not only the final state.
"""
from __future__ import annotations

import math

import numpy as np
import pytest
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st

from vservo_node import params
from vservo_node.control.kinematics import load_robot
from vservo_node.control.safety import LimitSet, limit_command
from vservo_node.episode import PointScene, limits_for
from vservo_node.settings import Settings, servo_config
from vservo_node.servo import Observation, Servo, ServoSettings
from vservo_node.vision.camera import CameraModel

DT = 0.008
ACCEL = 0.3      # rad/s^2: low, so that braking takes many output periods


@pytest.fixture
def rig(square_rig):
    return square_rig


def _moving_servo(rig, **settings):
    """A servo in a run, commanding motion toward the goal from a small offset, and the
    joints it runs at. The start nod is off so the law commands at once."""
    robot, camera, scene = rig
    arm = robot.arm
    settings.setdefault("direction_probe_px", 0.0)
    settings.setdefault("soft_start_s", 0.0)
    servo = Servo(arm, ServoSettings(**settings), limits_for(arm, acceleration=ACCEL))
    servo.set_reference(scene.taught_view(robot.home))
    servo.enable(True, 0.0)
    q = robot.home + 0.02
    assert servo.start(q, 0.0)[0]
    t = 0.0
    for _ in range(60):                       # 0.48 s: the command ramps up; an ideal arm
        xy, uv, _ = scene.view(q)
        servo.observe(Observation(scene.keys, uv, xy), q, t)
        cmd, _ = servo.command(q, t, DT)
        q = q + cmd * DT
        t += DT
    assert servo.state == "servoing" and np.max(np.abs(cmd)) > 0.01, (servo.reason, cmd)
    return servo, q, t, cmd


def _following(servo, q):
    """q of an ideal arm that follows the servo's commands from q (one tick behind)."""
    state = {"q": np.array(q, dtype=float)}

    def q_of_t(_t):
        state["q"] = state["q"] + servo._last_cmd * DT
        return state["q"]
    return q_of_t


def _brake_profile(servo, q_of_t, t, n=400):
    """Commands and statuses of the next n output ticks (q from q_of_t(t))."""
    out = []
    for _ in range(n):
        cmd, status = servo.command(q_of_t(t), t, DT)
        out.append((t, cmd.copy(), status))
        t += DT
        if servo.state == "halted":
            break
    return out


def _assert_braked(profile, dq0, accel, reason):
    speeds = np.array([np.max(np.abs(c)) for _, c, _ in profile])
    assert np.all(np.diff(speeds) <= 1e-12), speeds
    assert profile[-1][2]["state"] == "halted" and profile[-1][2]["reason"] == reason
    assert not np.any(profile[-1][1]), "the last command is an explicit zero"
    bound = float(np.max(np.abs(dq0)) / accel) + DT
    t_zero = profile[-1][0] - profile[0][0]
    assert t_zero <= bound + 1e-9, (t_zero, bound)
    assert profile[-1][2]["detail"], "the halt says what the check saw"


def test_non_finite_joints_brake_numerical_fault_without_raising(rig):
    servo, q, t, cmd = _moving_servo(rig)
    bad = q.copy()
    bad[2] = math.nan
    profile = _brake_profile(servo, lambda _t: bad, t)
    _assert_braked(profile, cmd, ACCEL, "numerical_fault")
    assert "joint_3" in profile[-1][2]["detail"] or "non-finite" in profile[-1][2]["detail"]


def test_an_error_inside_the_output_cycle_brakes_internal_error(rig, monkeypatch):
    servo, q, t, cmd = _moving_servo(rig)

    def broken(*args):
        raise RuntimeError("kinematics broke")
    monkeypatch.setattr(servo, "_cartesian_jacobians", broken)
    profile = _brake_profile(servo, _following(servo, q), t)
    _assert_braked(profile, cmd, ACCEL, "internal_error")
    assert "kinematics broke" in profile[-1][2]["detail"]


def test_no_observation_halts_image_stale_on_the_tick(rig):
    """No frame reaches observe (none could be paired): the tick halts after the observation
    timeout; before this change nothing halted and the last command stood."""
    servo, q, t, cmd = _moving_servo(rig, observation_timeout_s=0.25)
    profile = _brake_profile(servo, _following(servo, q), t)
    first_brake = next(tt for tt, _, s in profile if s["reason"])
    assert 0.25 - 2 * DT <= first_brake - (t - DT) <= 0.25 + 2 * DT
    braking = [p for p in profile if p[0] >= first_brake]
    _assert_braked(braking, cmd, ACCEL, "image_stale")


def test_run_timeout_is_judged_without_frames(rig):
    servo, q, t, cmd = _moving_servo(rig, observation_timeout_s=1e9, max_run_s=0.5)
    profile = _brake_profile(servo, _following(servo, q), t)
    first_brake = next(tt for tt, _, s in profile if s["reason"])
    assert first_brake == pytest.approx(0.5, abs=2 * DT)
    assert profile[-1][2]["reason"] == "run_timeout"


def test_motion_envelope_is_judged_without_frames(rig):
    """The arm drifts (the command is held: no frames) until the tool leaves its envelope;
    the tick halts on it from the latest joints."""
    import dataclasses

    from vservo_node.control import frames
    servo, q, t, cmd = _moving_servo(rig, observation_timeout_s=1e9)
    moved, _ = frames.pose_error(servo._run.T_base_tool_start, servo.arm.fk(q))
    servo.reconfigure(dataclasses.replace(servo.settings, max_translation_m=moved + 0.002),
                      servo.limits)
    profile = _brake_profile(servo, _following(servo, q), t)
    assert profile[-1][2]["reason"] == "motion_envelope"
    assert "mm" in profile[-1][2]["detail"]


def test_start_is_refused_with_a_joint_outside_its_limits(rig):
    robot, camera, scene = rig
    arm = robot.arm
    servo = Servo(arm, ServoSettings(), limits_for(arm))
    servo.set_reference(scene.taught_view(robot.home))
    servo.enable(True, 0.0)
    q = robot.home.copy()
    q[1] = arm.upper[1] + 0.05
    ok, message = servo.start(q, 0.0)
    assert not ok and arm.joint_names[1] in message and f"{q[1]:.4f}" in message
    assert servo.state == "armed"


def test_a_limit_is_reported_as_acting_only_when_it_changed_the_command():
    """Far inside the envelope but asked for 100x the velocity limit: the velocity limit
    sets the command; the envelope (which the scaled command meets) did not act. Before the
    fix both were reported, and the servo halted joint_limit_envelope with every joint far
    from its limits."""
    n = 3
    limits = LimitSet(velocity=np.full(n, 1.0), acceleration=np.full(n, 100.0),
                      lower=np.full(n, -1.0), upper=np.full(n, 1.0))
    zero_jac = np.zeros((3, n))
    desired = np.array([100.0, 0.0, 0.0])          # 100 rad/s toward the upper limit
    q = np.array([0.5, 0.0, 0.0])                  # 0.5 rad from it: braking speed ~10 rad/s
    command, report = limit_command(desired, np.array([1.0, 0.0, 0.0]), q, 0.008, limits,
                                    zero_jac, zero_jac, zero_jac)
    assert report.acted == ("joint_velocity",), report.acted
    assert command[0] == pytest.approx(1.0)
    # at the envelope it does act, and wins (the ramp toward the limit must not be hidden)
    q_near = np.array([1.0 - 1e-4, 0.0, 0.0])
    _, report = limit_command(desired, np.zeros(n), q_near, 0.008, limits, zero_jac,
                              zero_jac, zero_jac)
    assert "position_envelope" in report.acted


# --------------------------------------------------------------------- parameter schema
def _in_range(param: params.Param):
    """Hypothesis strategy of values the schema accepts for one parameter."""
    if param.type is bool:
        return st.booleans()
    if param.choices:
        return st.sampled_from(param.choices)
    if param.type is float:
        return st.floats(param.low, param.high, allow_nan=False)
    if param.type is int:
        return st.integers(int(param.low), int(param.high))
    if param.type is list and param.item is float and param.low is not None:
        return st.lists(st.floats(param.low, param.high, allow_nan=False), min_size=1,
                        max_size=1)
    return None


SERVO_SECTIONS = ("control", "limits", "depth", "io")
SWEPT = [p for p in params.SCHEMA if p.name.split(".")[0] in SERVO_SECTIONS and _in_range(p) is not None
         and p.name not in ("io.command_interface",)]


@settings(max_examples=300, deadline=None, derandomize=True,
          suppress_health_check=[HealthCheck.function_scoped_fixture])
@given(data=st.data())
def test_every_in_range_value_applies_without_raising(rig, data):
    """Every value the live check accepts (params.check_change then params.validate) builds
    and applies (Servo.check_config, Servo.reconfigure) and the servo steps with it: the
    finding was gains, damping and thresholds of 0.0 passing the check and then raising in
    the node's post-set callback."""
    robot, camera, scene = rig
    arm = robot.arm
    values = params.defaults()
    values["limits.joint_acceleration"] = [2.0]
    servo = Servo(arm, *servo_config(Settings.from_values(values), arm), values["robot.tool_point"])
    chosen = data.draw(st.lists(st.sampled_from(SWEPT), min_size=1, max_size=4,
                                     unique_by=lambda p: p.name))
    for param in chosen:
        value = data.draw(_in_range(param))
        assert params.check_change(param.name, values[param.name], value, False) is None
        values[param.name] = params.check_value(param, value)[0]
    if not params.validate(values).ok:
        return            # refused as a whole (e.g. gain x delay bound): nothing is applied
    settings_, limits = servo_config(Settings.from_values(values), arm)
    Servo.check_config(arm, settings_, limits)
    servo.reconfigure(settings_, limits)
    servo.set_reference(scene.taught_view(robot.home))
    servo.enable(True, 0.0)
    q = robot.home + 0.01
    assert servo.start(q, 0.0)[0]
    xy, uv, _ = scene.view(q)
    servo.observe(Observation(scene.keys, uv, xy), q, 0.0)
    cmd, status = servo.command(q, 0.0, 1.0 / values["io.output_rate_hz"])
    assert np.all(np.isfinite(cmd)) and status["reason"] != "internal_error", status


def test_every_limit_and_tightening_switch_has_an_upper_bound():
    for p in params.SCHEMA:
        if p.type in (int, float) or p.name == "limits.joint_acceleration":
            assert p.high is not None and math.isfinite(p.high), p.name
    for name, direction in (("control.direction_probe_px", "up"),
                            ("control.min_features", "up"),
                            ("limits.position_margin", "up"),
                            ("io.image_timeout_s", "down"), ("io.joint_state_timeout_s", "down"),
                            ("io.stamp_tolerance_s", "down")):
        assert params.BY_NAME[name].tighten == direction, name
    reason = params.check_change("control.direction_probe_px", 6.0, 0.0, True)
    assert reason and "may only be raised" in reason
    assert params.check_value(params.BY_NAME["limits.joint_acceleration"], [1e308])[1]


# --------------------------------------------------------------------- supervisor fuzz
@settings(max_examples=60, deadline=None, derandomize=True,
          suppress_health_check=[HealthCheck.function_scoped_fixture])
@given(actions=st.lists(st.sampled_from(["enable", "disable", "start", "stop", "halt",
                                         "frame", "no_frame", "nan_joints", "bad_frame"]),
                        min_size=5, max_size=60))
def test_random_supervisor_sequences_never_command_outside_a_run(rig, actions):
    """Random sequences of the services' calls (enable, disable, start, stop), halts, good,
    missing, hostile frames and NaN joints, with output ticks in between: no command unless a
    run moves (servoing, settling, braking); braking never speeds up; a run that ends ends
    with a zero command; nothing raises."""
    robot, camera, scene = rig
    arm = robot.arm
    servo = Servo(arm, ServoSettings(direction_probe_px=0.0, soft_start_s=0.0),
                  limits_for(arm, acceleration=ACCEL))
    servo.set_reference(scene.taught_view(robot.home))
    q, t = robot.home + 0.02, 0.0
    previous_state, previous_speed = servo.state, 0.0
    for action in actions:
        if action == "enable":
            servo.enable(True, t)
        elif action == "disable":
            servo.enable(False, t)
        elif action == "start":
            servo.start(q, t)
        elif action == "stop":
            servo.stop(t)
        elif action == "halt":
            servo.halt("stop_requested", t, "fuzz")
        elif action in ("frame", "bad_frame"):
            xy, uv, _ = scene.view(q)
            if action == "bad_frame":
                xy = xy.copy()
                xy[0] = math.nan
            servo.observe(Observation(scene.keys, uv, xy), q, t)
        q_tick = np.full(arm.n, math.nan) if action == "nan_joints" else q
        for _ in range(5):
            cmd, status = servo.command(q_tick, t, DT)
            speed = float(np.max(np.abs(cmd)))
            assert np.all(np.isfinite(cmd))
            if status["state"] not in ("servoing", "settling", "braking"):
                assert speed == 0.0, status
            if previous_state == "braking" and status["state"] in ("braking", "halted"):
                assert speed <= previous_speed + 1e-12
            if previous_state in ("servoing", "settling", "braking") and \
                    status["state"] in ("halted", "converged"):
                assert speed == 0.0
            previous_state, previous_speed = status["state"], speed
            q = q + cmd * DT
            t += DT
