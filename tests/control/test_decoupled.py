"""The decoupled scheme (vservo_node.control.decoupled) on a free-flying camera, against the
published behaviour of point IBVS at a half turn and against the properties the scheme is
chosen for.

The free-flying camera is a test instrument written here, not part of the package: the camera
(not the target) moves by a twist ``[v; w]`` expressed in its own optical frame, held for one
step and applied exactly (``T <- T expm(dt [V])``, Lynch & Park 2017, Modern Robotics,
sec. 3.3.3), and the points are projected by ``x = X/Z, y = Y/Z`` in the moved frame. The
world frame is the taught camera frame.
"""
from __future__ import annotations

import math

import numpy as np
import pytest
from scipy.linalg import expm
from scipy.spatial.transform import Rotation

from vservo_node.control import decoupled
from vservo_node.control.interaction import point_interaction_matrix

# Invented demo target: the five dots of config/targets/tray_dots.yaml on a plane 0.30 m in
# front of the taught camera (the shipped scenarios' taught distance).
DOTS = np.array([[-0.04, -0.04], [0.04, -0.04], [0.04, 0.04], [-0.04, 0.04], [0.012, -0.006]])
DEPTH = 0.30


def _board(offset=(0.0, 0.0), depth=DEPTH):
    return np.column_stack([DOTS + np.asarray(offset), np.full(len(DOTS), depth)])


def _hat(V):
    """4x4 matrix of a [v; w] twist (Lynch & Park 2017, Modern Robotics, eq. 3.86, [v; w])."""
    v, w = V[:3], V[3:]
    return np.array([[0.0, -w[2], w[1], v[0]], [w[2], 0.0, -w[0], v[1]],
                     [-w[1], w[0], 0.0, v[2]], [0.0, 0.0, 0.0, 0.0]])


def _exp(V, dt):
    """exp(dt [V]) in closed form (Lynch & Park 2017, Modern Robotics, Prop. 3.25, with the
    twist order [v; w]); scipy.linalg.expm gives the same (test_the_closed_form_exponential)
    but is ~100x slower here."""
    v, w = np.asarray(V[:3], float) * dt, np.asarray(V[3:], float) * dt
    theta = float(np.linalg.norm(w))
    T = np.eye(4)
    if theta < 1e-12:
        T[:3, 3] = v
        return T
    K = _hat(np.concatenate([np.zeros(3), w / theta]))[:3, :3]
    T[:3, :3] = np.eye(3) + math.sin(theta) * K + (1.0 - math.cos(theta)) * K @ K
    G = np.eye(3) * theta + (1.0 - math.cos(theta)) * K + (theta - math.sin(theta)) * K @ K
    T[:3, 3] = G @ (v / theta)
    return T


def test_the_closed_form_exponential():
    rng = np.random.default_rng(1)
    for _ in range(10):
        V = rng.normal(size=6)
        np.testing.assert_allclose(_exp(V, 0.3), expm(0.3 * _hat(V)), atol=1e-12)


def _seen(points_w, T_w_c):
    """(xy normalized, Z) of world points seen by the camera whose pose is T_w_c."""
    T_c_w = np.linalg.inv(T_w_c)
    p = points_w @ T_c_w[:3, :3].T + T_c_w[:3, 3]
    return p[:, :2] / p[:, 2:], p[:, 2]


def _pose(rotvec_deg=(0.0, 0.0, 0.0), translation=(0.0, 0.0, 0.0)):
    T = np.eye(4)
    T[:3, :3] = Rotation.from_rotvec(np.radians(rotvec_deg)).as_matrix()
    T[:3, 3] = translation
    return T


def _turn(deg, tilt_deg=(0.0, 0.0), translation=(0.0, 0.0, 0.0)):
    """Start pose: tilt (about x, y, deg) after a turn about the optical axis, then offset."""
    R = (Rotation.from_rotvec(np.radians([tilt_deg[0], tilt_deg[1], 0.0]))
         * Rotation.from_euler("z", deg, degrees=True)).as_matrix()
    T = np.eye(4)
    T[:3, :3], T[:3, 3] = R, translation
    return T


def _fly(law, points_w, T0, dt, steps):
    """Run ``law(xy, Z, state) -> (V, state)``; returns poses (steps+1, 4, 4), twists, xys."""
    poses, twists, images = [T0], [], []
    T, state = T0, None
    for _ in range(steps):
        xy, Z = _seen(points_w, T)
        V, state = law(xy, Z, state)
        images.append(xy)
        twists.append(V)
        T = T @ _exp(V, dt)
        poses.append(T)
    return np.array(poses), np.array(twists), np.array(images)


def _decoupled_law(points_w, gain=1.0):
    xy_taught, z_taught = _seen(points_w, np.eye(4))

    def law(xy, Z, previous):
        task = decoupled.task(xy, xy_taught, z_taught, previous)
        return decoupled.camera_twist(task, gain), task.theta_u
    return law


def _path_deviation(poses):
    """Largest distance (m) of the camera origin from the straight segment start -> goal."""
    p = poses[:, :3, 3]
    a, b = p[0], np.zeros(3)
    d = b - a
    if d @ d == 0.0:
        return float(np.max(np.linalg.norm(p - a, axis=1)))
    s = np.clip((p - a) @ d / (d @ d), 0.0, 1.0)
    return float(np.max(np.linalg.norm(p - (a + s[:, None] * d), axis=1)))


def _pose_error(T):
    return float(np.linalg.norm(T[:3, 3])), float(Rotation.from_matrix(T[:3, :3]).magnitude())


# ------------------------------------------------------------------- point IBVS at a half turn
def test_point_ibvs_at_a_half_turn_retreats_to_infinity_without_turning():
    """Chaumette 1998, "Potential problems of stability and convergence in image-based and
    position-based visual servoing" (LNCIS 237), sec. on IBVS: for a 180 deg rotation about the
    optical axis, the law with the current interaction matrix only moves the camera backward
    along the optical axis, to infinity (the published behaviour, from memory). Confirmed here
    by an independent closed form derived from Chaumette & Hutchinson 2006, eq. 11: with the
    board fronto-parallel at Z0 and the camera turned by pi, s = -s* Z0/Z, so
    e = s - s* = Z (1 + Z/Z0) (s/Z) lies along the v_z column s/Z of L; v = -lambda L^+ e is
    v_z = -lambda Z (1 + Z/Z0) and nothing else, and dZ/dt = -v_z integrates to
    Z(t) = Z0 / (2 exp(-lambda t) - 1): the camera reaches infinity at t = ln 2 / lambda."""
    gain, dt = 1.0, 1e-3
    board = _board()

    def law(xy, Z, _):
        e = (xy - _seen(board, np.eye(4))[0]).ravel()
        return -gain * np.linalg.pinv(point_interaction_matrix(xy, Z)) @ e, None

    t_blowup = math.log(2.0) / gain
    steps = int(0.95 * t_blowup / dt)          # up to Z = 0.3 / (2 e^-0.658 - 1) ~ 9.7 Z0
    poses, twists, images = _fly(law, board, _turn(180.0), dt, steps)
    depth = DEPTH - poses[:, 2, 3]             # camera to board plane along the optical axis
    t = dt * np.arange(len(poses))
    expected = DEPTH / (2.0 * np.exp(-gain * t) - 1.0)
    # the held step (Euler) lags the blow-up: 1.2 % at 0.8 t_blowup with 1 ms steps
    early = t <= 0.8 * t_blowup
    np.testing.assert_allclose(depth[early], expected[early], rtol=0.02)
    assert depth[-1] > 8.0 * DEPTH
    # no turn, no sideways motion: round-off only
    assert np.all(np.abs(twists[:, [0, 1, 3, 4, 5]]) < 1e-8 * np.abs(twists[:, 2:3]))
    assert np.all(twists[:, 2] < 0.0) and np.all(np.diff(twists[:, 2]) < 0.0)  # ever faster back
    s_star = _seen(board, np.eye(4))[0]
    errors = np.linalg.norm(images - s_star, axis=(1, 2))
    assert np.all(errors > np.linalg.norm(s_star))            # never nearer than |s*|
    assert np.all(np.diff(errors) < 0.0)                      # ... though it keeps "improving"


def test_blended_point_ibvs_cannot_turn_at_a_half_turn():
    """Chaumette & Hutchinson 2006, eq. 11: the w_z column of a point's matrix is (y, -x); at a
    half turn the current points are the taught ones negated, so the mean of the two matrices
    (the default 'blended' estimate) has a zero w_z column: no command can turn the camera."""
    board = _board()
    xy_taught, z = _seen(board, np.eye(4))
    xy_now, _ = _seen(board, _turn(180.0))
    L = 0.5 * (point_interaction_matrix(xy_now, z) + point_interaction_matrix(xy_taught, z))
    assert np.max(np.abs(L[:, 5])) < 1e-12 and np.max(np.abs(L[:, 2])) < 1e-12


# ------------------------------------------------------------------------ the decoupled scheme
@pytest.mark.parametrize("start", [
    dict(deg=180.0),
    dict(deg=-180.0, tilt_deg=(6.0, -4.0), translation=(0.05, -0.03, -0.06)),
], ids=["half_turn", "half_turn_offset_tilted"])
def test_decoupled_converges_from_a_half_turn_with_bounded_speed(start):
    """Converges from 180 deg; the camera speed is bounded by the start error: the linear
    speed is |lambda c*t_c| = lambda |c*t_c(0)| exp(-lambda t) (e_dot = -lambda e with the
    first block of L a rotation; Chaumette & Hutchinson 2006, Part I, sec. "Basic components"
    for the exponential decrease), the turn about the optical axis decays as
    theta_z(0) exp(-lambda t), and the reference point moves on a straight image segment."""
    gain, dt, seconds = 1.0, 0.01, 14.0
    board = _board()
    poses, twists, _ = _fly(_decoupled_law(board, gain), board, _turn(**start), dt,
                            int(seconds / dt))
    moved, turned = _pose_error(poses[-1])
    assert moved < 1e-5 and turned < 1e-5                     # 14 time constants: e^-14 ~ 1e-6
    t = dt * np.arange(len(twists))
    start_position = np.linalg.norm(poses[0][:3, 3])
    speed = np.linalg.norm(twists[:, :3], axis=1)
    # held steps: e_{k+1} = (1 - lambda dt) e_k, the discrete exp(-lambda t)
    np.testing.assert_allclose(speed, gain * start_position * (1.0 - gain * dt) ** (t / dt),
                               rtol=0.01, atol=1e-9)
    # the turn: lambda |theta_z| <= lambda pi about the axis, plus what keeps the reference
    # point on its line (a few percent here)
    assert np.max(np.linalg.norm(twists[:, 3:], axis=1)) <= gain * math.pi * 1.05
    assert _path_deviation(poses) < 1e-3


@pytest.mark.parametrize("start", [
    dict(deg=125.0),
    dict(deg=125.0, tilt_deg=(0.0, -10.0), translation=(0.08, 0.0, -0.05)),
    dict(deg=-125.0, tilt_deg=(8.0, 0.0), translation=(0.05, 0.05, 0.10)),
    dict(deg=125.0, tilt_deg=(0.0, 15.0), translation=(-0.10, 0.05, -0.10)),
], ids=["pure", "offset_tilted", "closer", "farther"])
def test_decoupled_at_125_deg_stays_on_the_straight_path(start):
    """Goal of issue 11: at 125 deg the camera stays within 20 mm of the straight path to the
    goal. Expected from the first block of L (a rotation: d c*t_c/dt = c*R_c v, Chaumette &
    Hutchinson 2006, Part I, sec. PBVS): c*t_c decays along a fixed direction, so the path is
    the straight segment up to the held-step discretization (well under a millimetre)."""
    board = _board()
    poses, _, images = _fly(_decoupled_law(board), board, _turn(**start), 0.01, 1200)
    assert _path_deviation(poses) < 0.020
    assert _path_deviation(poses) < 1e-3
    assert max(_pose_error(poses[-1])) < 1e-4


def test_the_reference_point_moves_on_a_straight_image_segment():
    """Kyrki, Kragic & Christensen 2004 (from memory) keep one image point on a straight line;
    here: the centroid of the board, projected with the true pose, stays within 0.5 % of the
    segment's length of the straight image segment between where it starts and where it was
    taught, from a start with a turn, a tilt and an offset. (The rest is the held steps: 0.33 %
    with 10 ms steps, halving with the step; measured.)"""
    board = _board()
    poses, _, _ = _fly(_decoupled_law(board), board, _turn(150.0, (5.0, 8.0), (0.04, -0.05,
                                                                              -0.04)),
                       0.01, 1000)
    centroid = board.mean(axis=0, keepdims=True)
    track = np.array([_seen(centroid, T)[0][0] for T in poses])
    a, b = track[0], track[-1]
    d = (b - a) / np.linalg.norm(b - a)
    off_line = np.abs((track - a) @ np.array([-d[1], d[0]]))
    assert np.max(off_line) < 0.005 * np.linalg.norm(b - a)
    np.testing.assert_allclose(b, centroid[0, :2] / centroid[0, 2], atol=1e-4)  # e^-10 left


def _alternative(kind):
    """The laws the scheme was chosen against, as ``make(board) -> law`` for :func:`_fly`:
    - "2.5D": Malis, Chaumette & Boudet 1999 ("2 1/2 D visual servoing", IEEE T-RA 15(2)),
      features (x_r, y_r, log Z_r/Z_r*, theta u) of the same reference point,
      w = -lambda theta u, v = -L_v^-1 (lambda e_v + L_vw w) (written from the paper's
      equations; L_v, L_vw: the point's rows of Chaumette & Hutchinson 2006, eq. 11, and
      d log Z / dt = -v_z / Z - y w_x + x w_y);
    - "PBVS": (c*t_c, theta u), v = -lambda c*R_c^T c*t_c, w = -lambda theta u (Chaumette &
      Hutchinson 2006, Part I, sec. PBVS, from memory)."""
    def make(board):
        model = decoupled.taught_model(*_seen(board, np.eye(4)))
        reference = model.mean(axis=0)

        def law(xy, Z, previous):
            T = decoupled.relative_pose(xy, model).T_now_taught
            T_taught_now = np.linalg.inv(T)
            tu = decoupled.theta_u(T_taught_now[:3, :3], previous)
            if kind == "PBVS":
                return np.concatenate([-T_taught_now[:3, :3].T @ T_taught_now[:3, 3], -tu]), tu
            now = T[:3, :3] @ reference + T[:3, 3]
            x, y = now[:2] / now[2]
            L_point = point_interaction_matrix([[x, y]], now[2])
            L_v = np.vstack([L_point[:, :3], [0.0, 0.0, -1.0 / now[2]]])
            L_vw = np.vstack([L_point[:, 3:], [-y, x, 0.0]])
            e_v = np.array([x - reference[0] / reference[2], y - reference[1] / reference[2],
                            math.log(now[2] / reference[2])])
            return np.concatenate([-np.linalg.solve(L_v, e_v - L_vw @ tu), -tu]), tu
        return law
    return make


# a 480 px high image at 615 px focal length (the shipped scenarios' camera) holds |y| <= this
HALF_HEIGHT = 240.0 / 615.0


def test_alternatives_considered():
    """The claims behind the choice in the module docstring (our measurements): 2.5D leaves the
    straight path by more than 20 mm at 125 deg with an offset and a tilt, where the chosen
    scheme stays on it; PBVS keeps the path but, with the board taught off-centre, sweeps
    points out of a 4:3 image under a half turn, where the chosen scheme does not."""
    board = _board()
    start = _turn(125.0, (0.0, -10.0), (0.08, 0.0, -0.05))
    for make, off_path in ((_alternative("2.5D"), True), (_decoupled_law, False)):
        poses, _, _ = _fly(make(board), board, start, 0.01, 1000)
        assert max(_pose_error(poses[-1])) < 1e-3           # both converge ...
        assert (_path_deviation(poses) > 0.020) == off_path  # ... on or off the straight path

    off_centre = _board(offset=(0.08, 0.05))
    for make, leaves in ((_alternative("PBVS"), True), (_decoupled_law, False)):
        poses, _, images = _fly(make(off_centre), off_centre, _turn(180.0), 0.01, 1000)
        assert max(_pose_error(poses[-1])) < 1e-3
        assert (np.max(np.abs(images[..., 1])) > HALF_HEIGHT) == leaves


def test_near_the_goal_the_scheme_and_point_ibvs_command_the_same_twist():
    """Why the servo does not hand over to point IBVS for the last fraction of a millimetre
    (module docstring): both laws invert a full-rank linearization of the same pose error
    (e ~ L delta for their features; Chaumette & Hutchinson 2006, eq. 1-5), so
    -lambda L^+ e ~ -lambda delta for both, and their twists differ only at second order:
    relative difference < 1 % at ~0.3 mm / 0.06 deg, and shrinking in proportion."""
    board = _board()
    xy_taught, z_taught = _seen(board, np.eye(4))
    rng = np.random.default_rng(6)

    def worst(scale):
        out = 0.0
        for _ in range(30):
            d = rng.normal(size=6) * np.r_[0.3 * scale * np.ones(3), scale * np.ones(3)]
            xy, Z = _seen(board, _exp(d, 1.0))
            point = -np.linalg.pinv(point_interaction_matrix(xy, Z)) @ (xy - xy_taught).ravel()
            ours = decoupled.camera_twist(decoupled.task(xy, xy_taught, z_taught), 1.0)
            out = max(out, np.linalg.norm(point - ours) / np.linalg.norm(ours))
        return out

    near, nearer = worst(1e-3), worst(1e-4)
    assert near < 0.01
    assert nearer < 0.2 * near


def test_predicted_task_is_the_task_at_the_moved_pose():
    """decoupled.predicted against the task recomputed from the images after the camera moved
    by a small displacement (first order: the difference is second order in the step)."""
    board = _board()
    xy_taught, z_taught = _seen(board, np.eye(4))
    T0 = _turn(140.0, (4.0, -6.0), (0.03, -0.02, 0.05))
    start = decoupled.task(_seen(board, T0)[0], xy_taught, z_taught)
    rng = np.random.default_rng(7)
    for h in (1e-2, 1e-3):
        d = rng.normal(size=6) * h
        again = decoupled.task(_seen(board, T0 @ _exp(d, 1.0))[0], xy_taught, z_taught,
                               start.theta_u)
        guess = decoupled.predicted(start, d)
        change = np.linalg.norm(again.error - start.error)
        assert np.linalg.norm(guess.error - again.error) < 0.05 * change
        assert np.linalg.norm(guess.L - again.L) < 0.05 * np.linalg.norm(again.L - start.L)


# -------------------------------------------------------------------- pieces, against outside
def test_relative_pose_recovers_the_true_pose_including_a_half_turn():
    """Against the simulated truth: PnP of the taught model in views from known poses returns
    the pose of the taught frame in the current one. Includes the exact half turn of a
    fronto-parallel board, where OpenCV's IPPE alone returns the identity (measured with
    OpenCV 4.13: the reason for the SQPnP fallback)."""
    import cv2

    board = _board()
    model = decoupled.taught_model(*_seen(board, np.eye(4)))
    xy_half, _ = _seen(board, _turn(180.0))
    _, rvec, _ = cv2.solvePnP(model, xy_half, np.eye(3), None, flags=cv2.SOLVEPNP_IPPE)
    ippe_alone = Rotation.from_rotvec(rvec.ravel()).magnitude()
    assert ippe_alone < 1e-3, "IPPE now solves the half turn: RETRY_RESIDUAL may be revisited"
    rng = np.random.default_rng(3)
    starts = [_turn(180.0), _turn(-179.9)] + [
        _turn(rng.uniform(-180, 180), rng.uniform(-15, 15, 2), rng.uniform(-0.08, 0.08, 3))
        for _ in range(30)]
    for T_w_c in starts:
        pose = decoupled.relative_pose(_seen(board, T_w_c)[0], model)
        expected = np.linalg.inv(T_w_c)
        np.testing.assert_allclose(pose.T_now_taught, expected, atol=1e-7)
        assert pose.residual < 1e-9


def test_task_matrix_matches_a_numerical_derivative_of_its_features():
    """e_dot = L v_c (the definition), checked by moving the camera by small twists in its
    own frame, recomputing the features from the images and differencing centrally."""
    board = _board()
    xy_taught, z_taught = _seen(board, np.eye(4))
    rng = np.random.default_rng(4)
    h = 1e-6
    for T0 in (_turn(150.0, (5.0, -7.0), (0.03, 0.02, -0.04)), _turn(-60.0, (0.0, 12.0))):
        task = decoupled.task(_seen(board, T0)[0], xy_taught, z_taught)
        for _ in range(6):
            V = rng.normal(size=6) * [0.1, 0.1, 0.1, 1, 1, 1]
            plus = decoupled.task(_seen(board, T0 @ expm(h * _hat(V)))[0], xy_taught, z_taught)
            minus = decoupled.task(_seen(board, T0 @ expm(-h * _hat(V)))[0], xy_taught,
                                   z_taught)
            rate = (plus.error - minus.error) / (2 * h)
            assert np.linalg.norm(task.L @ V - rate) <= 1e-5 * np.linalg.norm(rate)


def test_theta_u_keeps_its_turning_direction_through_a_half_turn():
    """Near 180 deg theta u and -(2 pi - theta) u are the same rotation (Rodrigues); with the
    previous value the representation does not flip between images, beyond pi up to
    MAX_ANGLE, and falls back to the short way beyond it."""
    previous = np.array([0.0, 0.0, math.radians(179.0)])
    past_half = Rotation.from_euler("z", 181.0, degrees=True).as_matrix()
    np.testing.assert_allclose(decoupled.theta_u(past_half), [0, 0, -math.radians(179.0)],
                               atol=1e-12)
    np.testing.assert_allclose(decoupled.theta_u(past_half, previous),
                               [0, 0, math.radians(181.0)], atol=1e-12)
    far = Rotation.from_euler("z", 210.0, degrees=True).as_matrix()
    np.testing.assert_allclose(decoupled.theta_u(far, [0, 0, math.radians(205.0)]),
                               [0, 0, -math.radians(150.0)], atol=1e-12)
    # L_w theta u = theta u (Malis, Chaumette & Boudet 1999), also beyond pi
    for tu in ([0.1, -0.2, 3.0], [0.0, 0.0, math.radians(181.0)], [0.3, 0.2, -0.5]):
        np.testing.assert_allclose(decoupled.rotation_interaction(tu) @ tu, tu, atol=1e-12)


def test_rotation_interaction_matches_a_numerical_derivative():
    """d(theta u)/dt = L_w w for R(t) = R exp(t [w]) (w in the rotated, current frame),
    differenced centrally with SciPy's rotation vectors."""
    rng = np.random.default_rng(5)
    h = 1e-6
    for _ in range(20):
        R, w = Rotation.from_rotvec(rng.normal(size=3)), rng.normal(size=3)
        rate = ((R * Rotation.from_rotvec(h * w)).as_rotvec()
                - (R * Rotation.from_rotvec(-h * w)).as_rotvec()) / (2 * h)
        np.testing.assert_allclose(decoupled.rotation_interaction(R.as_rotvec()) @ w, rate,
                                   atol=1e-6)


@pytest.mark.parametrize("xy_now, xy_taught, z, message", [
    (DOTS[:3] / DEPTH, DOTS[:3] / DEPTH, DEPTH, ">= 4 points"),
    (np.array([[0.0, 0.0], [0.1, 0.1], [0.2, 0.2], [0.3, 0.3]]),
     np.array([[0.0, 0.0], [0.1, 0.1], [0.2, 0.2], [0.3, 0.3]]), DEPTH, "collinear"),
    (np.full((5, 2), np.nan), DOTS / DEPTH, DEPTH, "non-finite"),
    (DOTS / DEPTH, DOTS / DEPTH, -1.0, "finite and > 0"),
])
def test_bad_inputs_are_refused_with_a_reason(xy_now, xy_taught, z, message):
    with pytest.raises(ValueError, match=message):
        decoupled.task(xy_now, xy_taught, z)


def _figures():
    """The table of the module docstring of vservo_node.control.decoupled."""
    cases = [("125 deg about the axis", dict(deg=125.0), (0, 0)),
             ("180 deg about the axis", dict(deg=180.0), (0, 0)),
             ("125 deg + offset/tilt A", dict(deg=125.0, tilt_deg=(0.0, -10.0),
                                              translation=(0.08, 0.0, -0.05)), (0, 0)),
             ("-125 deg + offset/tilt B", dict(deg=-125.0, tilt_deg=(8.0, 0.0),
                                               translation=(0.05, 0.05, 0.10)), (0, 0)),
             ("125 deg + offset/tilt C", dict(deg=125.0, tilt_deg=(0.0, 15.0),
                                              translation=(-0.10, 0.05, -0.10)), (0, 0)),
             ("125 deg, board off-centre", dict(deg=125.0), (0.08, 0.05)),
             ("180 deg, board off-centre", dict(deg=180.0), (0.08, 0.05))]
    laws = (("chosen", _decoupled_law), ("2.5D", _alternative("2.5D")),
            ("PBVS", _alternative("PBVS")))
    print("start | " + " | ".join(f"{n}: path mm, max |y|" for n, _ in laws))
    for name, start, offset in cases:
        board = _board(offset=offset)
        cells = []
        for _, make in laws:
            poses, _, images = _fly(make(board), board, _turn(**start), 0.01, 1200)
            cells.append(f"{1e3 * _path_deviation(poses):5.1f}, "
                         f"{np.max(np.abs(images[..., 1])):.2f}")
        print(f"{name} | " + " | ".join(cells))


if __name__ == "__main__":
    _figures()
