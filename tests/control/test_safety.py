"""Tests of vservo_node.control.safety: the convex command limiter.

The limits themselves are our specification (see the module docstring); the Cartesian checks
use the geometric Jacobian of a planar arm (Siciliano, Sciavicco, Villani, Oriolo 2009,
"Robotics: Modelling, Planning and Control", geometric Jacobian of revolute joints), confirmed
here against finite differences of its forward kinematics.
"""
import numpy as np
import pytest
from hypothesis import event, given, settings
from hypothesis import strategies as st

from vservo_node.control.safety import (ISO_REDUCED_SPEED, LIMITS, POSITION_ROUNDOFF,
                                        LimitSet, Limiter, limit_command, stopping_speed)

FAST = settings(max_examples=200, deadline=None)
TOL = 1e-9
ZERO_JACS = (np.zeros((3, 3)),) * 3


# ----------------------------------------------------------------------- independent checks --
def envelope_speed_continuous(distance, accel):
    """sqrt(2 a d): the braking envelope of the specification (0 at or past the limit)."""
    return np.sqrt(2 * accel * np.maximum(distance, 0.0))


def violations(x, q, dt, limits, jacs, speed_scale, tol=TOL):
    """Names of the static limits x breaks (beyond a relative and absolute tol), checked
    directly from their definitions: the sqrt(2 a d) envelope and the discrete one."""
    vmax = limits.velocity * limits.velocity_scale * speed_scale
    out = []
    if np.any(np.abs(x) > vmax * (1 + tol) + tol):
        out.append("joint_velocity")
    # the limiter keeps POSITION_ROUNDOFF free before each limit (its documented margin)
    up, down = limits.upper - q - POSITION_ROUNDOFF, q - limits.lower - POSITION_ROUNDOFF
    for envelope in (envelope_speed_continuous, lambda d, a: stopping_speed(d, a, dt)):
        if (np.any(x > envelope(up, limits.acceleration) * (1 + tol) + tol)
                or np.any(-x > envelope(down, limits.acceleration) * (1 + tol) + tol)):
            out.append("position_envelope")
            break
    radii = (limits.tool_linear_max, limits.camera_linear_max, limits.angular_max)
    for name, A, r in zip(LIMITS[2:5], jacs, radii):
        if np.linalg.norm(A @ x) > r * speed_scale * (1 + tol) + tol:
            out.append(name)
    return out


def accel_ok(out, prev, limits, dt, tol=TOL):
    return np.all(np.abs(out - prev) <= limits.acceleration * dt * (1 + tol) + tol)


# ------------------------------------------------------------------ stopping speed (envelope) --
@FAST
@given(d=st.floats(0.0, 3.0), a=st.floats(0.1, 50.0), dt=st.floats(1e-3, 0.1))
def test_stopping_speed_by_simulating_the_brake(d, a, dt):
    # Independent computation: hold v for dt, then v - a dt, ... and add up the distance.
    def distance_to_stop(v):
        total = 0.0
        while v > 0:
            total += v * dt
            v -= a * dt
        return total

    v = float(stopping_speed(d, a, dt))
    assert distance_to_stop(v) <= d * (1 + 1e-9) + 1e-12                  # stops in time
    assert distance_to_stop(v * (1 + 1e-6) + 1e-9) > d                     # and is the largest
    assert v <= envelope_speed_continuous(d, a) * (1 + 1e-12) + 1e-12       # within sqrt(2 a d)


def test_stopping_speed_edges():
    np.testing.assert_array_equal(stopping_speed(np.array([0.0, -1.0, np.inf]), 2.0, 0.01),
                                  [0.0, 0.0, np.inf])


# --------------------------------------------------------------------------- planar arm ------
LINKS = np.array([0.4, 0.3, 0.1])
CAMERA_OFFSET = np.array([-0.05, 0.08])       # camera origin in the last link's frame (m)


def planar_points(q):
    """Joint origins, tool point and camera point of a planar 3R arm (our own dimensions)."""
    angles = np.cumsum(q)
    steps = LINKS[:, None] * np.stack([np.cos(angles), np.sin(angles)], axis=1)
    joints = np.vstack([[0.0, 0.0], np.cumsum(steps, axis=0)])
    c, s = np.cos(angles[-1]), np.sin(angles[-1])
    camera = joints[-1] + np.array([[c, -s], [s, c]]) @ CAMERA_OFFSET
    return joints[:-1], joints[-1], camera


def planar_jacobians(q):
    """(tool linear, camera linear, angular), each 3 x 3: column i is z x (p - p_i) and z."""
    origins, tool, camera = planar_points(q)

    def linear(p):
        r = p - origins
        return np.vstack([-r[:, 1], r[:, 0], np.zeros(3)])

    return linear(tool), linear(camera), np.vstack([np.zeros(3), np.zeros(3), np.ones(3)])


def test_planar_jacobians_match_finite_differences():
    q, h = np.array([0.3, -0.7, 1.1]), 1e-6
    Jt, Jc, _ = planar_jacobians(q)
    for i in range(3):
        dp = [(planar_points(q + h * e)[k] - planar_points(q - h * e)[k]) / (2 * h)
              for k in (1, 2) for e in [np.eye(3)[i]]]
        np.testing.assert_allclose(Jt[:2, i], dp[0], atol=1e-8)
        np.testing.assert_allclose(Jc[:2, i], dp[1], atol=1e-8)


# ------------------------------------------------------------------ property-based checks ----
@st.composite
def limiter_cases(draw):
    n = draw(st.integers(1, 7))

    # Subnormal floats (< 2.2e-308) are no joint speeds, and a test's "a little more" step
    # underflows on them: leave them out.
    def floats(lo, hi):
        return st.lists(st.floats(lo, hi, allow_subnormal=False), min_size=n,
                        max_size=n).map(np.array)

    lower, upper = draw(floats(-3.0, -0.1)), draw(floats(0.1, 3.0))
    continuous = draw(st.lists(st.booleans(), min_size=n, max_size=n).map(np.array))
    lower, upper = np.where(continuous, -np.inf, lower), np.where(continuous, np.inf, upper)
    limits = LimitSet(velocity=draw(floats(0.1, 3.0)), acceleration=draw(floats(0.5, 20.0)),
                      lower=lower, upper=upper, velocity_scale=draw(st.floats(0.05, 1.0)),
                      tool_linear_max=draw(st.floats(0.01, ISO_REDUCED_SPEED)),
                      camera_linear_max=draw(st.floats(0.01, ISO_REDUCED_SPEED)),
                      angular_max=draw(st.floats(0.05, 2.0)))
    near = np.where(continuous, 0.0, draw(st.lists(st.sampled_from([-1, 1]), min_size=n,
                                                   max_size=n).map(np.array)))
    # q near, at or past its limits (or anywhere for continuous joints)
    q = np.where(near > 0, upper, lower)
    q = np.where(continuous, 0.0, q) + draw(floats(-0.2, 0.2))
    jacs = [draw(st.lists(st.floats(-1.0, 1.0), min_size=3 * n, max_size=3 * n)
                 .map(lambda v: np.reshape(v, (3, n)))) for _ in range(3)]
    previous = draw(floats(-4.0, 4.0)) * draw(st.sampled_from([0.0, 1e-3, 0.05, 1.0]))
    desired = draw(floats(-10.0, 10.0))
    dt = draw(st.floats(1e-3, 0.1))
    speed_scale = draw(st.floats(0.0, 1.0))
    # corrupt one input, or none
    target = draw(st.sampled_from(["none"] * 6 + ["desired", "previous", "q", "jac",
                                                  "speed_scale"]))
    bad = draw(st.sampled_from([np.nan, np.inf, -np.inf]))
    if target in ("desired", "previous", "q"):
        arr = {"desired": desired, "previous": previous, "q": q}[target]
        arr[draw(st.integers(0, n - 1))] = bad
    elif target == "jac":
        jacs[draw(st.integers(0, 2))][draw(st.integers(0, 2)), draw(st.integers(0, n - 1))] = bad
    elif target == "speed_scale":
        speed_scale = bad
    return dict(desired=desired, previous=previous, q=q, dt=dt, limits=limits, jacs=jacs,
                speed_scale=speed_scale, corrupted=target != "none")


def run_case(case):
    return limit_command(case["desired"], case["previous"], case["q"], case["dt"],
                         case["limits"], *case["jacs"], speed_scale=case["speed_scale"])


@FAST
@given(case=limiter_cases())
def test_limiter_output_meets_every_limit(case):
    out, report = run_case(case)
    event(f"mode {report.mode}, scale {'< 1' if report.scale < 1 else '1'}")
    prev, desired, limits, dt = case["previous"], case["desired"], case["limits"], case["dt"]
    assert np.all(np.isfinite(out))
    if case["corrupted"]:
        assert report.mode == "fault" and "non-finite" in report.fault
        if np.all(np.isfinite(prev)):
            # ramp down from the last valid command, along it, at the deceleration limit
            assert accel_ok(out, prev, limits, dt)
            np.testing.assert_allclose(out, report.base_scale * prev, atol=1e-15)
            assert 0.0 <= report.base_scale <= 1.0
        else:
            assert np.all(out == 0)
        return
    assert accel_ok(out, prev, limits, dt)
    args = (case["q"], dt, limits, case["jacs"], case["speed_scale"])
    if not violations(prev, *args, tol=0.0):
        # a feasible previous command is the base: the change keeps the requested direction
        assert report.mode == "track" and np.all(report.base == prev)
    else:
        assert report.mode == "recover" and set(report.acted) - {"joint_acceleration"}
        # the base slows every joint toward zero, none reverses or speeds up
        base = report.base
        assert np.all(base * prev >= 0) and np.all(np.abs(base) <= np.abs(prev))
    base = report.base
    assert accel_ok(base, prev, limits, dt)
    if violations(out, *args):
        # still infeasible: the base is the output, reached at the maximum deceleration
        assert report.mode == "recover" and np.all(out == base)
        assert np.any(np.isclose(np.abs(out - prev), limits.acceleration * dt, rtol=1e-9))
        return
    # the target is the desired command scaled into the speed limits (direction kept), and the
    # scale is the largest: a little more breaks a speed limit
    c = report.target_scale
    assert 0.0 <= c <= 1.0
    target = c * desired
    assert not violations(target, *args)
    more = (c + 1e-6) * desired
    if c < 1.0 and not np.array_equal(more, target):   # (equal: the step underflowed)
        assert violations(more, *args, tol=0.0)
    # out = base + s (target - base), s in [0, 1]
    assert 0.0 <= report.scale <= 1.0
    np.testing.assert_allclose(out - base, report.scale * (target - base), atol=1e-12)
    desired = target
    if report.scale < 1.0:
        # and s is the largest: a little more breaks a limit or the acceleration bound
        more = base + (report.scale + 1e-6) * (desired - base)
        if not np.array_equal(more, out):                # (equal: the step underflowed)
            assert violations(more, *args, tol=0.0) or not accel_ok(more, prev, limits, dt, 0.0)
        assert report.winner in report.acted


def test_direction_of_the_desired_command_kept_when_speed_limits_cut_it():
    limits = LimitSet(velocity=[1.0, 1.0, 1.0], acceleration=[20.0, 20.0, 20.0],
                      lower=[-3.0] * 3, upper=[3.0] * 3, velocity_scale=1.0)
    # desired (3, 0.5, -2) breaks the velocity box: scaled by 1/3 (joint 0) it fits; from prev
    # the acceleration bound (2.0 per joint per cycle) allows the whole step to that target
    prev, desired = np.array([0.2, -0.1, 0.0]), np.array([3.0, 0.5, -2.0])
    out, report = limit_command(desired, prev, np.zeros(3), 0.1, limits, *ZERO_JACS)
    np.testing.assert_allclose(out, desired / 3.0, atol=1e-12)
    assert report.winner == "joint_velocity" and report.winner_joint == 0
    assert report.target_scale == pytest.approx(1.0 / 3.0)


def test_binding_cartesian_limit_does_not_freeze_the_command():
    """At a binding norm limit the output must turn with the desired command. Stepping from
    the previous command toward an infeasible desired one would give s ~ 0 on the boundary."""
    limits = LimitSet(velocity=[5.0, 5.0, 5.0], acceleration=[100.0] * 3, lower=[-3.0] * 3,
                      upper=[3.0] * 3, angular_max=1.0)
    angular = np.vstack([np.eye(3)])
    jacs = (np.zeros((3, 3)), np.zeros((3, 3)), angular)
    prev = np.array([1.0, 0.0, 0.0])          # on the boundary of the angular ball
    desired = np.array([0.0, 4.0, 0.0])       # outside it, in another direction
    out, report = limit_command(desired, prev, np.zeros(3), 0.01, limits, *jacs)
    np.testing.assert_allclose(out, [0.0, 1.0, 0.0], atol=1e-12)
    assert report.winner == "angular_speed"


# ---------------------------------------------------------------- closed loops, one per limit --
def run_loop(limits, desired, steps, dt=0.01, q0=(0.2, -0.4, 0.9), jacobians=planar_jacobians,
             limiter=None):
    """Integrate q with the limited command; returns (qs, commands, reports, limiter)."""
    limiter = limiter or Limiter(limits)
    q = np.array(q0, dtype=float)
    qs, commands, reports = [], [], []
    for k in range(steps):
        want = desired(k) if callable(desired) else desired
        command, report = limiter.step(want, q, dt, *jacobians(q))
        qs.append(q.copy())
        commands.append(command)
        reports.append(report)
        q = q + command * dt
    return np.array(qs), np.array(commands), reports, limiter


def wide_limits(**overrides):
    base = dict(velocity=[1.0] * 3, acceleration=[4.0] * 3, lower=[-10.0] * 3,
                upper=[10.0] * 3, tool_linear_max=0.25, camera_linear_max=0.25, angular_max=3.0,
                velocity_scale=1.0)
    base.update(overrides)
    return LimitSet(**base)


def assert_binds(reports, limiter, name):
    assert limiter.counts[name] > 0
    assert any(r.winner == name for r in reports)


def test_joint_velocity_limit_binds_and_holds():
    limits = wide_limits(velocity=[0.5, 2.0, 2.0], velocity_scale=0.8)
    qs, cmds, reports, lim = run_loop(limits, np.array([3.0, 0.0, 0.0]), 100,
                                      jacobians=lambda q: ZERO_JACS)
    assert_binds(reports, lim, "joint_velocity")
    assert np.all(np.abs(cmds) <= limits.velocity * 0.8 + 1e-12)
    assert cmds[-1, 0] == pytest.approx(0.4)


def test_joint_acceleration_limit_binds_and_holds():
    limits = wide_limits(acceleration=[2.0, 1.0, 4.0])
    desired = np.array([0.4, -0.4, 0.2])
    qs, cmds, reports, lim = run_loop(limits, desired, 60, jacobians=lambda q: ZERO_JACS)
    assert_binds(reports, lim, "joint_acceleration")
    steps = np.abs(np.diff(np.vstack([np.zeros(3), cmds]), axis=0))
    assert np.all(steps <= limits.acceleration * 0.01 + 1e-12)
    # the slowest joint needs 0.4 / (1.0 * 0.01) = 40 cycles; then the command is the desired one
    assert not np.allclose(cmds[38], desired) and np.allclose(cmds[40], desired)


def test_position_envelope_stops_the_joint_before_its_limit():
    limits = wide_limits(upper=[0.3, 10.0, 10.0], acceleration=[2.0, 4.0, 4.0])
    qs, cmds, reports, lim = run_loop(limits, np.array([1.0, 0.0, 0.0]), 300, q0=(0.0, 0, 0),
                                      jacobians=lambda q: ZERO_JACS)
    assert_binds(reports, lim, "position_envelope")
    assert np.all(qs[:, 0] < 0.3) and qs[-1, 0] + cmds[-1, 0] * 0.01 < 0.3
    assert cmds[-1, 0] == 0.0 and qs[-1, 0] > 0.3 - 1e-6        # at rest, close to the limit
    assert np.all(np.abs(np.diff(cmds[:, 0])) <= 2.0 * 0.01 + 1e-12)
    # moving away from the limit is allowed at once
    out, report = lim.step([-1.0, 0.0, 0.0], qs[-1], 0.01, *ZERO_JACS)
    assert out[0] == pytest.approx(-0.02) and report.winner == "joint_acceleration"


def test_tool_linear_speed_binds_and_holds():
    limits = wide_limits(tool_linear_max=0.05)
    qs, cmds, reports, lim = run_loop(limits, np.array([0.5, 0.5, 0.5]), 150)
    assert_binds(reports, lim, "tool_linear_speed")
    speeds = [np.linalg.norm(planar_jacobians(q)[0] @ c) for q, c in zip(qs, cmds)]
    assert max(speeds) <= 0.05 * (1 + 1e-9) and max(speeds) > 0.049


def test_camera_linear_speed_binds_and_holds():
    limits = wide_limits(camera_linear_max=0.03)
    qs, cmds, reports, lim = run_loop(limits, np.array([0.0, 0.0, 0.8]), 150)
    assert_binds(reports, lim, "camera_linear_speed")
    speeds = [np.linalg.norm(planar_jacobians(q)[1] @ c) for q, c in zip(qs, cmds)]
    assert max(speeds) <= 0.03 * (1 + 1e-9) and max(speeds) > 0.029


def test_angular_speed_binds_and_holds():
    limits = wide_limits(angular_max=0.3)
    qs, cmds, reports, lim = run_loop(limits, np.array([0.4, 0.4, -0.1]), 150)
    assert_binds(reports, lim, "angular_speed")
    assert np.all(np.abs(cmds.sum(axis=1)) <= 0.3 * (1 + 1e-9))     # planar: w_z = sum dq


def test_lowered_limit_decelerates_at_the_maximum_rate_then_tracks():
    fast = wide_limits(acceleration=[2.0] * 3)
    desired = np.array([0.9, 0.3, 0.0])
    qs, cmds, _, lim = run_loop(fast, desired, 80, jacobians=lambda q: ZERO_JACS)
    assert np.allclose(cmds[-1], desired)
    lim.limits = wide_limits(acceleration=[2.0] * 3, velocity_scale=0.2)      # 1.0 -> 0.2 rad/s
    _, cmds2, reports, _ = run_loop(None, desired, 60, q0=qs[-1], jacobians=lambda q: ZERO_JACS,
                                    limiter=lim)
    modes = [r.mode for r in reports]
    # 0.9 -> 0.2 rad/s at 2 rad/s^2 and 0.01 s takes 35 cycles at the maximum rate, with the
    # direction of the command kept (joint 1 slows in proportion)
    assert modes[:35] == ["recover"] * 35 and modes[35:] == ["track"] * 25
    np.testing.assert_allclose(np.diff(np.r_[0.9, cmds2[:35, 0]]), -0.02, atol=1e-12)
    np.testing.assert_allclose(cmds2[:35, 1], cmds2[:35, 0] / 3, atol=1e-12)
    assert all(r.winner == "joint_velocity" for r in reports[:35])
    assert cmds2[-1, 0] == pytest.approx(0.2) and lim.counts["previous_infeasible"] == 35


def test_envelope_does_not_wait_for_a_slow_braking_joint():
    # Joint 0 brakes hard to its limit while joint 1 (weak deceleration) is moving fast: a
    # synchronized slow-down alone would carry joint 0 past its limit.
    limits = wide_limits(upper=[0.3, 10.0, 10.0], acceleration=[2.0, 0.2, 4.0])
    lim = Limiter(limits)
    lim.previous = np.array([0.6, 1.0, 0.0])
    qs, cmds, reports, _ = run_loop(None, np.array([0.6, 1.0, 0.0]), 200, q0=(0.2, 0, 0),
                                    jacobians=lambda q: ZERO_JACS, limiter=lim)
    assert np.all(qs[:, 0] <= 0.3) and cmds[-1, 0] == 0.0
    assert np.all(np.abs(np.diff(cmds, axis=0)) <= limits.acceleration * 0.01 + 1e-12)
    assert cmds[-1, 1] > 0.5                                   # joint 1 keeps moving


def test_halt_ramps_to_an_exact_zero_within_the_deceleration_limit():
    lim = Limiter(wide_limits(acceleration=[2.0, 3.0, 4.0]))
    lim.previous = np.array([0.5, -0.6, 0.1])
    _, cmds, _, _ = run_loop(None, np.zeros(3), 40, jacobians=lambda q: ZERO_JACS, limiter=lim)
    steps = np.abs(np.diff(np.vstack([[0.5, -0.6, 0.1], cmds]), axis=0))
    assert np.all(steps <= np.array([2.0, 3.0, 4.0]) * 0.01 + 1e-12)
    assert np.all(cmds[-1] == 0.0)


def test_speed_scale_zero_brings_the_arm_to_rest():
    lim = Limiter(wide_limits())
    lim.previous = np.array([0.5, 0.0, 0.0])
    for _ in range(20):
        out, report = lim.step([1.0, 0, 0], np.zeros(3), 0.01, *ZERO_JACS, speed_scale=0.0)
    assert np.all(out == 0) and report.mode == "track"


def test_nan_input_ramps_down_from_last_valid_command_and_counts_a_fault():
    lim = Limiter(wide_limits(acceleration=[2.0] * 3))
    lim.previous = np.array([0.3, -0.15, 0.0])
    out, report = lim.step([np.nan, 0, 0], np.zeros(3), 0.01, *ZERO_JACS)
    np.testing.assert_allclose(out, [0.28, -0.14, 0.0])
    assert report.mode == "fault" and "desired" in report.fault and report.counts["fault"] == 1


def test_limit_set_validation_messages():
    with pytest.raises(TypeError):
        LimitSet(velocity=[1.0], lower=[-1.0], upper=[1.0])       # acceleration has no default
    with pytest.raises(ValueError, match="tool_linear_max = 0.3 m/s exceeds the 0.25 m/s"):
        wide_limits(tool_linear_max=0.3)
    assert wide_limits(tool_linear_max=0.3, allow_above_reduced_speed=True).tool_linear_max == 0.3
    with pytest.raises(ValueError, match="acceleration = .*expected finite values > 0"):
        wide_limits(acceleration=[1.0, 0.0, 1.0])
    with pytest.raises(ValueError, match=r"previous has shape \(2,\); expected \(3,\)"):
        limit_command(np.zeros(3), np.zeros(2), np.zeros(3), 0.01, wide_limits(), *ZERO_JACS)
    with pytest.raises(ValueError, match="dt = 0.0; expected"):
        limit_command(np.zeros(3), np.zeros(3), np.zeros(3), 0.0, wide_limits(), *ZERO_JACS)

