"""Tests of vservo_node.control.law: DLS, gain schedule, soft start, null-space task."""
import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st
from scipy.integrate import solve_ivp
from scipy.linalg import null_space

from vservo_node.control.law import (ControlLaw, DampingSchedule, GainSchedule, LawConfig,
                                     check_delay_bound, dls_solve, joint_limit_cost)

FAST = settings(max_examples=200, deadline=None)


def orthonormal(rng, k):
    Q, R = np.linalg.qr(rng.standard_normal((k, k)))
    return Q * np.sign(np.diag(R))


def with_singular_values(rng, m, n, sigmas):
    """An m x n matrix with the given singular values (descending) and random singular vectors."""
    S = np.zeros((m, n))
    S[np.arange(len(sigmas)), np.arange(len(sigmas))] = sigmas
    return orthonormal(rng, m) @ S @ orthonormal(rng, n).T


def image_jacobian_like(rng, points, joints, sigmas6):
    """2N x n of rank <= 6, as L (2N x 6) @ (6 x n): the shape of a real image Jacobian."""
    return with_singular_values(rng, 2 * points, joints, sigmas6)


# ---------------------------------------------------------------------------------- DLS ------
def test_damping_schedule_zero_above_threshold_full_at_singularity_continuous():
    sched = DampingSchedule(epsilon=0.1, mu_max=0.05)
    assert sched.mu(0.1) == 0.0 and sched.mu(1.0) == 0.0
    assert sched.mu(0.0) == pytest.approx(0.05)
    assert sched.mu(0.1 - 1e-9) == pytest.approx(0.0, abs=1e-5)        # continuous at epsilon
    values = [sched.mu(s) for s in np.linspace(0, 0.1, 50)]
    assert np.all(np.diff(values) <= 0)                                  # rises toward sigma=0


@FAST
@given(seed=st.integers(0, 2**32 - 1), judge_ratio=st.floats(0.0, 0.999),
       points=st.integers(3, 8), joints=st.integers(6, 7))
def test_dls_norm_never_exceeds_rhs_over_two_mu(seed, judge_ratio, points, joints):
    # Wampler 1986; Nakamura & Hanafusa 1986: each DLS gain sigma/(sigma^2 + mu^2) <= 1/(2 mu),
    # so ||dq|| <= ||rhs|| / (2 mu) whenever damping mu > 0 is applied.
    rng = np.random.default_rng(seed)
    sched = DampingSchedule(epsilon=0.1, mu_max=0.1)
    sigma6 = judge_ratio * sched.epsilon
    mu = sched.mu(sigma6)
    # singular values near mu (where the bound is tight) and above it; sigma6 stays the 6th
    near_mu = np.maximum(mu * rng.uniform(0.5, 1.5, 3), sigma6)
    sigmas = np.sort(np.concatenate([[sigma6], near_mu, rng.uniform(0.1, 3.0, 2)]))[::-1]
    J = image_jacobian_like(rng, points, joints, sigmas)
    rhs = rng.standard_normal(2 * points)
    dq, info = dls_solve(J, rhs, sched)
    assert info.damping == pytest.approx(mu) and mu > 0
    assert np.linalg.norm(dq) <= np.linalg.norm(rhs) / (2 * mu) * (1 + 1e-12)
    # the same solution from the normal-equation form J^T (J J^T + mu^2 I)^-1 rhs (Wampler 1986)
    direct = J.T @ np.linalg.solve(J @ J.T + mu * mu * np.eye(2 * points), rhs)
    np.testing.assert_allclose(dq, direct, atol=1e-9 * np.linalg.norm(direct) + 1e-12)


def test_dls_bound_is_attained_at_sigma_equal_mu():
    # The bound sigma/(sigma^2+mu^2) = 1/(2 mu) holds with equality at sigma = mu
    # (Wampler 1986; Nakamura & Hanafusa 1986), so the solve must reach it along that direction.
    rng = np.random.default_rng(3)
    sched = DampingSchedule(epsilon=0.1, mu_max=0.1)
    sigma6 = 0.05
    mu = sched.mu(sigma6)                                 # 0.1 * sqrt(0.75) ~ 0.0866 > sigma6
    U = orthonormal(rng, 8)
    V = orthonormal(rng, 7)
    sigmas = np.array([2.0, 1.0, 0.5, 0.3, mu, sigma6])
    J = U[:, :6] @ np.diag(sigmas) @ V[:, :6].T
    dq, info = dls_solve(J, U[:, 4], sched)
    assert info.damping == pytest.approx(mu)
    assert np.linalg.norm(dq) == pytest.approx(1 / (2 * mu), rel=1e-12)


@FAST
@given(seed=st.integers(0, 2**32 - 1), points=st.integers(3, 10), joints=st.integers(6, 7))
def test_dls_equals_pseudo_inverse_far_from_singularity(seed, points, joints):
    # No damping above epsilon: the solve is the Moore-Penrose pseudo-inverse (numpy pinv).
    rng = np.random.default_rng(seed)
    J = image_jacobian_like(rng, points, joints, rng.uniform(0.2, 3.0, 6))
    rhs = rng.standard_normal(2 * points)
    dq, info = dls_solve(J, rhs, DampingSchedule(epsilon=0.1, mu_max=0.1))
    assert info.damping == 0.0
    np.testing.assert_allclose(dq, np.linalg.pinv(J) @ rhs, rtol=1e-9, atol=1e-12)


def test_judges_sixth_singular_value_of_a_redundant_arm():
    # A 2N x 7 image Jacobian has rank <= 6: its 7th singular value (round-off) is not judged.
    rng = np.random.default_rng(0)
    J = image_jacobian_like(rng, 5, 7, [3, 2, 1.5, 1, 0.8, 0.5])
    dq, info = dls_solve(J, rng.standard_normal(10), DampingSchedule())
    assert info.judge_index == 5 and info.sigma_judge == pytest.approx(0.5)
    assert info.singular_values[6] < 1e-12 and info.damping == 0.0
    assert info.condition == pytest.approx(6.0)
    # two points: 4 x 7, rank <= 4, the 4th singular value is judged
    J2 = image_jacobian_like(rng, 2, 7, [2, 1, 0.5, 0.01])
    _, info2 = dls_solve(J2, np.ones(4), DampingSchedule(epsilon=0.05, mu_max=0.05))
    assert info2.judge_index == 3 and info2.damping > 0


def test_caller_may_judge_on_its_own_singular_value():
    rng = np.random.default_rng(1)
    J = image_jacobian_like(rng, 4, 6, [3, 2, 1.5, 1, 0.8, 0.5])
    sched = DampingSchedule(epsilon=0.1, mu_max=0.1)
    _, info = dls_solve(J, np.ones(8), sched, sigma_judge=0.02)
    assert info.sigma_judge == 0.02 and info.damping == pytest.approx(sched.mu(0.02))
    with pytest.raises(ValueError, match="sigma_judge"):
        dls_solve(J, np.ones(8), sched, sigma_judge=float("nan"))


# ------------------------------------------------------------------------------- gain -------
@FAST
@given(near=st.floats(0.05, 5), far=st.floats(0.05, 5), half=st.floats(1, 200),
       e1=st.floats(0, 1e4), e2=st.floats(0, 1e4))
def test_gain_schedule_limits_midpoint_and_monotone(near, far, half, e1, e2):
    g = GainSchedule(near, far, half)
    assert g(0.0) == pytest.approx(near)
    assert g(half) == pytest.approx(0.5 * (near + far))
    assert g(1e12) == pytest.approx(far, rel=1e-6)
    lo, hi = min(e1, e2), max(e1, e2)
    # monotone from gain_near toward gain_far, and always between them
    assert (g(hi) - g(lo)) * (far - near) >= -1e-12
    assert min(near, far) - 1e-12 <= g(e1) <= max(near, far) + 1e-12


def test_gain_schedule_rejects_bad_values_with_message():
    with pytest.raises(ValueError, match="half_error_px = 0.*expected a finite value > 0"):
        GainSchedule(0.5, 0.2, 0.0)


def test_delay_bound():
    # gain x (loop delay + cycle) < 0.3: common practice, no source.
    ok, product, message = check_delay_bound(1.0, 0.1, 0.05)
    assert ok and product == pytest.approx(0.15) and "< 0.3" in message
    ok, product, message = check_delay_bound(4.0, 0.05, 0.033)
    assert not ok and product == pytest.approx(0.332) and "expected < 0.3" in message
    assert "3.61" in message                       # the largest gain that would pass: 0.3/0.083


# ------------------------------------------------------------------------- soft start -------
def square_task(seed=5):
    rng = np.random.default_rng(seed)
    return with_singular_values(rng, 6, 6, np.linspace(2.0, 0.5, 6))


def make_law(tau, null_gain=0.0, gain=(0.7, 0.7, 10.0), n=6, damping=DampingSchedule()):
    config = LawConfig(gain=GainSchedule(*gain), damping=damping, soft_start_tau=tau,
                       null_space_gain=null_gain)
    return ControlLaw(config, -np.full(n, 2.0), np.full(n, 2.0))


def test_soft_start_first_command_is_zero_and_restarts():
    J = square_task()
    law = make_law(tau=0.4, gain=(1.0, 0.3, 20.0))
    e = np.array([0.1, -0.05, 0.2, 0.0, 0.03, -0.1])
    dq, info = law.compute(J, e, 40.0, np.zeros(6), t=3.0, null_space_enabled=False)
    assert np.linalg.norm(dq) < 1e-15 and info.soft_start_weight == 1.0
    dq, _ = law.compute(J, e, 40.0, np.zeros(6), t=3.1, null_space_enabled=False)
    assert np.linalg.norm(dq) > 0
    law.restart(0.5 * e, 3.2)                           # the matched feature set changed
    dq, _ = law.compute(J, 0.5 * e, 40.0, np.zeros(6), t=3.2, null_space_enabled=False)
    assert np.linalg.norm(dq) < 1e-15
    # a feature vector of another length restarts by itself
    J8 = np.vstack([J, J[:2]])
    dq, _ = law.compute(J8, np.ones(8), 40.0, np.zeros(6), t=3.3, null_space_enabled=False)
    assert np.linalg.norm(dq) < 1e-15


def test_soft_start_converges_to_plain_law():
    # After many time constants the command is the classical IBVS law dq = -lambda J^+ e
    # (Chaumette & Hutchinson 2006, IBVS section) checked against numpy pinv.
    J, e = square_task(), np.array([0.1, -0.05, 0.2, 0.0, 0.03, -0.1])
    law = make_law(tau=0.2, gain=(1.0, 0.3, 20.0))
    law.compute(J, 2 * e, 40.0, np.zeros(6), t=0.0, null_space_enabled=False)
    dq, info = law.compute(J, e, 40.0, np.zeros(6), t=8.0, null_space_enabled=False)
    plain = -GainSchedule(1.0, 0.3, 20.0)(40.0) * np.linalg.pinv(J) @ e
    np.testing.assert_allclose(dq, plain, atol=1e-12 + 2 * np.exp(-40) * np.abs(plain).max())


def closed_loop_error(law, J, e0, t_end):
    """Integrate e_dot = J dq with the law in the loop (SciPy solve_ivp, tight tolerances)."""
    def rhs(t, e):
        dq, _ = law.compute(J, e, 0.0, np.zeros(J.shape[1]), t, null_space_enabled=False)
        return J @ dq
    law.restart(e0, 0.0)
    return solve_ivp(rhs, (0.0, t_end), e0, rtol=1e-10, atol=1e-12, dense_output=True).sol


@pytest.mark.parametrize("tau", [0.0, 0.25])
def test_closed_loop_error_matches_analytic_solution(tau):
    # Without soft start: e(t) = e0 exp(-lambda t) (Chaumette & Hutchinson 2006, exponential
    # decrease). With it, e_dot = -lambda (e - e0 exp(-t/tau)) (Mansard & Chaumette 2007) has the
    # solution e0 (lambda exp(-t/tau) - exp(-lambda t)/tau) / (lambda - 1/tau) (solved by hand:
    # linear first-order ODE; checked at t = 0 where it gives e0 with e_dot = 0).
    lam, J = 0.7, square_task()
    e0 = np.array([0.1, -0.05, 0.2, 0.0, 0.03, -0.1])
    sol = closed_loop_error(make_law(tau=tau, gain=(lam, lam, 10.0)), J, e0, 6.0)
    for t in (0.0, 0.3, 1.0, 3.0, 6.0):
        if tau == 0.0:
            expected = e0 * np.exp(-lam * t)
        else:
            a = 1.0 / tau
            expected = e0 * (lam * np.exp(-a * t) - a * np.exp(-lam * t)) / (lam - a)
        np.testing.assert_allclose(sol(t), expected, atol=1e-8)


# ------------------------------------------------------------------------- null space -------
def redundant_task(seed=11):
    rng = np.random.default_rng(seed)
    return image_jacobian_like(rng, 4, 7, np.linspace(2.0, 0.5, 6))


def test_joint_limit_cost_gradient_matches_finite_differences():
    lower, upper = np.array([-1.0, -2.0, -np.inf]), np.array([2.0, 1.0, np.inf])
    q = np.array([1.5, -1.2, 7.0])
    H, grad = joint_limit_cost(q, lower, upper)
    assert H == pytest.approx((1.0 / 3) ** 2 + (0.7 / 3) ** 2)
    h = 1e-6
    fd = [(joint_limit_cost(q + h * d, lower, upper)[0] - joint_limit_cost(q - h * d, lower,
                                                                           upper)[0]) / (2 * h)
          for d in np.eye(3)]
    np.testing.assert_allclose(grad, fd, atol=1e-8)
    assert grad[2] == 0.0                                  # continuous joint: no limit, no cost


def test_secondary_task_leaves_image_motion_unchanged():
    # Gradient projection onto the null space (Liegeois 1977): J (I - J^+ J) z = 0, so the
    # secondary motion does not change J dq (no damping applied here).
    J = redundant_task()
    e = np.random.default_rng(2).standard_normal(8) * 0.05
    q = np.array([1.9, -1.5, 0.3, 1.0, -1.8, 0.0, 1.2])
    on, off = make_law(tau=0.0, null_gain=0.5, n=7), make_law(tau=0.0, null_gain=0.5, n=7)
    dq_on, info = on.compute(J, e, 5.0, q, 0.0, null_space_enabled=True)
    dq_off, info_off = off.compute(J, e, 5.0, q, 0.0, null_space_enabled=False)
    assert info.dls.damping == 0.0 and info.null_space_active and not info_off.null_space_active
    assert np.linalg.norm(dq_on - dq_off) > 1e-3           # the secondary task does move joints
    np.testing.assert_allclose(J @ dq_on, J @ dq_off, atol=1e-9)


def test_secondary_task_moves_joints_away_from_limits():
    # Liegeois 1977: descending the projected gradient lowers H while the task is held. With a
    # constant J the self-motion is the line q0 + t n (n spans the null space, from SciPy) and
    # H is quadratic along it, so the motion must settle at its minimizer t* (solved by hand).
    J = redundant_task()
    law = make_law(tau=0.0, null_gain=20.0, n=7)
    q0 = np.array([1.9, -1.5, 0.3, 1.0, -1.8, 0.0, 1.2])            # limits are +-2
    q, dt, costs = q0.copy(), 0.02, []
    for k in range(300):
        dq, info = law.compute(J, np.zeros(8), 0.0, q, k * dt, null_space_enabled=True)
        assert np.linalg.norm(J @ dq) < 1e-9
        costs.append(info.limit_cost)
        q = q + dq * dt
    assert np.all(np.diff(costs) <= 0) and costs[-1] < costs[0]
    n = null_space(J)[:, 0]
    t_star = -(n @ q0) / (n @ n)                 # equal spans, mid = 0: minimize sum (q0+t n)^2
    np.testing.assert_allclose(q, q0 + t_star * n, atol=1e-6)
    # the joint closest to a limit ends farther from it
    assert np.min(2.0 - np.abs(q)) > np.min(2.0 - np.abs(q0))


def test_law_rejects_bad_config_and_inputs_with_messages():
    with pytest.raises(ValueError, match="soft_start_tau = -1.*expected"):
        LawConfig(soft_start_tau=-1.0)
    with pytest.raises(ValueError, match="lower < upper"):
        ControlLaw(LawConfig(), [0.0, 1.0], [1.0, 0.5])
    law = make_law(tau=0.3)
    with pytest.raises(ValueError, match=r"error has shape \(5,\); expected \(6,\)"):
        law.compute(square_task(), np.zeros(5), 0.0, np.zeros(6), 0.0, False)
    J = square_task()
    J[2, 3] = np.nan
    dq, info = law.compute(J, np.ones(6), 0.0, np.zeros(6), 0.0, False)
    assert np.all(dq == 0) and "J_img" in info.fault
