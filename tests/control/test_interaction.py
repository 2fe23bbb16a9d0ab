"""Interaction matrices against the published formula, numerical derivatives of the projection,
and the published behaviour of a free-flying camera under IBVS.

The free-flying camera simulation lives here: it is a test instrument, not part of the package.
It moves the camera (not the target) with a twist expressed in the camera optical frame, the
convention of Chaumette & Hutchinson 2006 (v_c = [v; w], s_dot = L v_c).
"""

import numpy as np
import pytest
from scipy.linalg import expm

from vservo_node.control.interaction import (INTERACTION_ESTIMATES, interaction_matrix,
                                             point_interaction_matrix)


def _hat(V):
    """4x4 matrix of a [v; w] twist (Lynch & Park 2017, Modern Robotics, eq. 3.86, [v; w])."""
    v, w = V[:3], V[3:]
    return np.array([[0.0, -w[2], w[1], v[0]], [w[2], 0.0, -w[0], v[1]],
                     [-w[1], w[0], 0.0, v[2]], [0.0, 0.0, 0.0, 0.0]])


def _in_camera(points_w, T_w_c):
    """Points (N, 3) of the world expressed in the camera frame whose pose is T_w_c."""
    T_c_w = np.linalg.inv(T_w_c)
    return points_w @ T_c_w[:3, :3].T + T_c_w[:3, 3]


def _normalized(points_c):
    return points_c[:, :2] / points_c[:, 2:]


def _rot_z(theta):
    c, s = np.cos(theta), np.sin(theta)
    T = np.eye(4)
    T[:2, :2] = [[c, -s], [s, c]]
    return T


class FreeFlyingCamera:
    """IBVS of a camera that moves freely (no arm), true depths, v_c = -lambda L^+ e.

    The world frame is the taught camera pose; ``points_w`` are the target points in it.
    Each step computes the command from the current image and moves the camera by
    ``expm(dt [v_c])`` (a constant twist held for dt, the Euler step of the pose).
    """

    def __init__(self, points_w, estimate, gain):
        self.points_w = np.asarray(points_w, dtype=float)
        self.estimate, self.gain = estimate, gain
        self.s_taught = _normalized(self.points_w)
        self.Z_taught = self.points_w[:, 2]

    def error_and_command(self, T_w_c):
        p_c = _in_camera(self.points_w, T_w_c)
        xy = _normalized(p_c)
        e = (xy - self.s_taught).ravel()
        L = interaction_matrix(self.estimate, xy, p_c[:, 2], self.s_taught, self.Z_taught)
        return e, -self.gain * np.linalg.pinv(L) @ e

    def run(self, T_w_c, dt, steps):
        """Yield (T_w_c, e, v_c) before each step."""
        for _ in range(steps):
            e, v_c = self.error_and_command(T_w_c)
            yield T_w_c, e, v_c
            T_w_c = T_w_c @ expm(dt * _hat(v_c))


# ------------------------------------------------------------------ the formula itself
def _published_rows(x, y, Z):
    """Chaumette & Hutchinson, "Visual servo control, Part I: Basic approaches", IEEE Robotics &
    Automation Magazine 13(4), 2006, eq. (11), written out term by term."""
    return [[-1.0 / Z, 0.0, x / Z, x * y, -(1.0 + x * x), y],
            [0.0, -1.0 / Z, y / Z, 1.0 + y * y, -x * y, -x]]


def test_point_matrix_equals_the_published_formula():
    rng = np.random.default_rng(10)
    xy = rng.uniform(-0.6, 0.6, (7, 2))
    Z = rng.uniform(0.2, 2.0, 7)
    expected = np.array([row for (x, y), z in zip(xy, Z) for row in _published_rows(x, y, z)])
    np.testing.assert_allclose(point_interaction_matrix(xy, Z), expected, rtol=1e-15)
    np.testing.assert_allclose(point_interaction_matrix(xy, 0.7),
                               point_interaction_matrix(xy, np.full(7, 0.7)))


def test_point_matrix_matches_a_numerical_derivative_of_the_projection():
    # Source: definition s_dot = L v_c (Chaumette & Hutchinson 2006, eq. 1-2) checked by moving
    # the camera by a small twist in its own frame, re-projecting and differencing centrally.
    rng = np.random.default_rng(11)
    points = np.column_stack([rng.uniform(-0.4, 0.4, (6, 2)), rng.uniform(0.3, 2.0, 6)])
    L = point_interaction_matrix(_normalized(points), points[:, 2])
    h = 1e-6
    for _ in range(20):
        V = rng.normal(size=6)
        s_plus = _normalized(_in_camera(points, expm(h * _hat(V))))
        s_minus = _normalized(_in_camera(points, expm(-h * _hat(V))))
        s_dot = ((s_plus - s_minus) / (2 * h)).ravel()
        assert np.linalg.norm(L @ V - s_dot) <= 1e-6 * np.linalg.norm(s_dot)


def test_estimates_pick_current_taught_or_their_mean():
    # Source: Chaumette & Hutchinson 2006, sec. "IBVS": L_e, L_e* and 1/2 (L_e + L_e*).
    rng = np.random.default_rng(12)
    xy_now, xy_taught = rng.uniform(-0.3, 0.3, (2, 4, 2))
    Z_now, Z_taught = rng.uniform(0.3, 1.0, (2, 4))
    L_now = point_interaction_matrix(xy_now, Z_now)
    L_taught = point_interaction_matrix(xy_taught, Z_taught)
    got = {name: interaction_matrix(name, xy_now, Z_now, xy_taught, Z_taught)
           for name in INTERACTION_ESTIMATES}
    np.testing.assert_array_equal(got["current_view"], L_now)
    np.testing.assert_array_equal(got["taught_view"], L_taught)
    np.testing.assert_allclose(got["blended"], 0.5 * (L_now + L_taught))


@pytest.mark.parametrize("call, message", [
    (lambda: point_interaction_matrix([[0.1, 0.2]], 0.0), "finite and > 0"),
    (lambda: point_interaction_matrix([[0.1, 0.2]], [-0.5]), "finite and > 0"),
    (lambda: point_interaction_matrix([[0.1, 0.2]], np.nan), "finite and > 0"),
    (lambda: point_interaction_matrix([0.1, 0.2], 1.0), r"xy must have shape \(N, 2\)"),
    (lambda: point_interaction_matrix([[0.1, 0.2]], [1.0, 2.0]), r"shape \(1,\)"),
    (lambda: interaction_matrix("blended", [[0, 0]], 1.0, [[0, 0], [1, 1]], 1.0),
     "differ in point count: 1 vs 2"),
    (lambda: interaction_matrix("mean", [[0, 0]], 1.0, [[0, 0]], 1.0),
     r"unknown interaction estimate 'mean'; expected one of \['current_view', 'taught_view', "
     r"'blended'\]"),
])
def test_bad_inputs_are_refused_with_a_reason(call, message):
    with pytest.raises(ValueError, match=message):
        call()


# ------------------------------------------------------------------ free-flying camera
# Four points in a centred square, half-side 0.1 m, at depth 0.5 m in the taught camera frame.
HALF_SIDE, DEPTH = 0.1, 0.5
SQUARE = np.array([[-HALF_SIDE, -HALF_SIDE, DEPTH], [HALF_SIDE, -HALF_SIDE, DEPTH],
                   [HALF_SIDE, HALF_SIDE, DEPTH], [-HALF_SIDE, HALF_SIDE, DEPTH]])
GAIN = 1.0


def _expected_first_command(estimate, theta):
    """(v_z, w_z) of the first command when the CAMERA is rotated by +theta about its own
    optical axis (+z, right-handed) from the taught pose; the points then appear rotated by
    -theta in the image, s = R(-theta) s*.

    Derived from Chaumette & Hutchinson 2006, eq. (11): at a point s the v_z column of L is s/Z
    and the w_z column is (y, -x) = -J s, with J the +90 deg rotation of the image plane.
    - current_view (L at s):  e = s - R(theta) s = (1 - cos th) Z (s/Z) + sin th (-J s),
      so L^+ e = (1 - cos th) Z e_vz + sin th e_wz.
    - taught_view (L at s*): e = R(-theta) s* - s* = -(1 - cos th) Z (s*/Z) + sin th (-J s*).
    - blended: with m = s + s*, e = s - s* = -tan(th/2) J m = 2 tan(th/2) (-J m / 2), the
      blended w_z column; the blended v_z column m/(2Z) is orthogonal to e.
    Exact because e lies in the span of the full-rank L, so L^+ e gives those coefficients.
    v_c = -lambda L^+ e. The current and taught forms were also stated qualitatively by
    Chaumette 1998 ("Potential problems of stability and convergence...", LNCIS 237): the
    camera retreats with the current form and advances with the desired (taught) one.
    """
    lam, Z = GAIN, DEPTH
    if estimate == "current_view":
        return -lam * Z * (1 - np.cos(theta)), -lam * np.sin(theta)
    if estimate == "taught_view":
        return lam * Z * (1 - np.cos(theta)), -lam * np.sin(theta)
    return 0.0, -2 * lam * np.tan(theta / 2)


@pytest.mark.parametrize("theta_deg", [30, 90, 125])
@pytest.mark.parametrize("estimate", INTERACTION_ESTIMATES)
def test_first_command_for_a_rotation_about_the_optical_axis(estimate, theta_deg):
    theta = np.radians(theta_deg)
    _, v_c = FreeFlyingCamera(SQUARE, estimate, GAIN).error_and_command(_rot_z(theta))
    v_z, w_z = _expected_first_command(estimate, theta)
    np.testing.assert_allclose(v_c, [0.0, 0.0, v_z, 0.0, 0.0, w_z], atol=1e-12)


@pytest.mark.parametrize("estimate", INTERACTION_ESTIMATES)
def test_camera_depth_over_a_whole_run(estimate):
    # Source: Chaumette 1998, "Potential problems of stability and convergence in image-based
    # and position-based visual servoing", LNCIS 237, and Chaumette & Hutchinson 2006: for a
    # rotation about the optical axis the camera retreats with the current form, advances with
    # the desired (taught) form, and does not translate along the axis with the mean form.
    # 90 deg, lambda = 1, Euler step 0.01 s, 10 s, true depths recomputed at every step.
    sim = FreeFlyingCamera(SQUARE, estimate, GAIN)
    log = list(sim.run(_rot_z(np.radians(90)), dt=0.01, steps=1000))
    depth = np.array([DEPTH - T_w_c[2, 3] for T_w_c, _, _ in log])  # distance to target plane
    errors = np.array([np.linalg.norm(e) for _, e, _ in log])
    if estimate == "current_view":
        assert depth.max() > DEPTH + 0.1 and depth.min() >= DEPTH - 1e-3
    elif estimate == "taught_view":
        assert depth.min() < DEPTH - 0.1 and depth.max() <= DEPTH + 1e-3
    else:
        assert np.abs(depth - DEPTH).max() < 1e-3
    assert errors[-1] < 1e-3 * errors[0]  # and every form converges at this angle
    assert abs(log[-1][0][2, 3]) < 1e-3  # back at the taught depth


def test_error_decreases_geometrically_under_euler_steps():
    # Source: Chaumette & Hutchinson 2006, sec. "Basic components": with L exact, e_dot =
    # -lambda e, so e decreases exponentially; under a held command for a step T, e_{k+1} =
    # (1 - lambda T) e_k to first order, a per-step log slope of ln(1 - lambda T) / T.
    # lambda T = 0.2 so that slope (-5.58 /s) differs by 11% from -lambda (-5 /s): a 2%
    # tolerance tells them apart. Small displacement (sub-millimetre, sub-0.1 deg) so the
    # second-order terms stay well under 2%. Non-planar points of our own choosing.
    lam, T = 5.0, 0.04
    points = np.array([[-0.1, -0.08, 0.5], [0.12, -0.1, 0.55], [0.09, 0.11, 0.45],
                       [-0.1, 0.1, 0.6], [0.0, 0.02, 0.52]])
    start = expm(_hat(np.array([4e-4, -3e-4, 6e-4, 1e-3, -8e-4, 1.5e-3])))
    log = list(FreeFlyingCamera(points, "current_view", lam).run(start, dt=T, steps=6))
    errors = np.array([np.linalg.norm(e) for _, e, _ in log])
    slopes = np.diff(np.log(errors)) / T
    np.testing.assert_allclose(slopes, np.log(1 - lam * T) / T, rtol=0.02)
