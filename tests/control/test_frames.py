"""frames.py against pinocchio, transforms3d, SciPy and finite differences of poses."""

import math

import numpy as np
import pinocchio as pin
import pytest
from scipy.linalg import expm
from scipy.spatial.transform import Rotation
from transforms3d import axangles, euler, quaternions

from vservo_node.control import frames

# An asymmetric pose: every axis rotates, so a transposed R or a swapped sign cannot hide.
XYZ = np.array([0.4, -0.25, 0.9])
RPY = np.array([0.3, -0.7, 1.1])


def _pose():
    return frames.transform_from_xyz_rpy(XYZ, RPY)


def _hat(V):
    """4x4 matrix of a [v; w] twist, written out (Lynch & Park 2017, Modern Robotics, eq. 3.86,
    re-ordered to [v; w])."""
    v, w = V[:3], V[3:]
    return np.array([[0.0, -w[2], w[1], v[0]], [w[2], 0.0, -w[0], v[1]],
                     [-w[1], w[0], 0.0, v[2]], [0.0, 0.0, 0.0, 0.0]])


def test_skew_is_the_cross_product():
    # Source: definition of the cross product (NumPy np.cross as the reference).
    a, b = np.array([0.3, -1.2, 2.0]), np.array([-0.7, 0.4, 1.5])
    np.testing.assert_allclose(frames.skew(a) @ b, np.cross(a, b), atol=1e-15)


def test_rpy_follows_urdf_and_matches_pinocchio_and_transforms3d():
    # Source: URDF specification <origin rpy>: fixed-axis roll about x, pitch about y, yaw about
    # z, i.e. R = Rz(yaw) Ry(pitch) Rx(roll). Checked against the product of elementary rotations
    # written out here, pinocchio.rpy.rpyToMatrix and transforms3d euler2mat(..., "sxyz").
    r, p, y = RPY
    Rx = np.array([[1, 0, 0], [0, np.cos(r), -np.sin(r)], [0, np.sin(r), np.cos(r)]])
    Ry = np.array([[np.cos(p), 0, np.sin(p)], [0, 1, 0], [-np.sin(p), 0, np.cos(p)]])
    Rz = np.array([[np.cos(y), -np.sin(y), 0], [np.sin(y), np.cos(y), 0], [0, 0, 1]])
    T = _pose()
    np.testing.assert_allclose(T[:3, :3], Rz @ Ry @ Rx, atol=1e-15)
    np.testing.assert_allclose(T[:3, :3], pin.rpy.rpyToMatrix(r, p, y), atol=1e-15)
    np.testing.assert_allclose(T[:3, :3], euler.euler2mat(r, p, y, "sxyz"), atol=1e-15)
    np.testing.assert_allclose(T[:3, 3], XYZ)
    np.testing.assert_allclose(T[3], [0, 0, 0, 1])


def test_quaternion_order_is_xyzw():
    # Source: Hamilton unit quaternion of a rotation by theta about axis n is
    # (n sin(theta/2), cos(theta/2)); 90 deg about z maps x onto y. transforms3d stores
    # (w, x, y, z): reordered it must agree.
    s = np.sin(np.pi / 4)
    R90z = np.array([[0.0, -1.0, 0.0], [1.0, 0.0, 0.0], [0.0, 0.0, 1.0]])
    np.testing.assert_allclose(frames.matrix_to_quat(R90z), [0.0, 0.0, s, s], atol=1e-15)
    np.testing.assert_allclose(frames.quat_to_matrix([0.0, 0.0, s, s]), R90z, atol=1e-15)
    w, x, y, z = quaternions.mat2quat(R90z)
    np.testing.assert_allclose([x, y, z, w], [0.0, 0.0, s, s], atol=1e-15)


def test_quaternions_match_transforms3d_for_an_asymmetric_rotation():
    # Source: transforms3d.quaternions (w, x, y, z order), reordered to (x, y, z, w).
    R = _pose()[:3, :3]
    w, x, y, z = quaternions.mat2quat(R)
    q = np.sign(w) * np.array([x, y, z, w])
    np.testing.assert_allclose(frames.matrix_to_quat(R), q, atol=1e-14)
    q_raw = np.array([0.2, -0.5, 0.7, 0.4])  # not unit: quat_to_matrix normalises
    expected = quaternions.quat2mat(np.roll(q_raw, 1) / np.linalg.norm(q_raw))
    np.testing.assert_allclose(frames.quat_to_matrix(q_raw), expected, atol=1e-14)
    T = frames.transform_from_xyz_quat(XYZ, frames.matrix_to_quat(R))
    np.testing.assert_allclose(T, _pose(), atol=1e-14)


def test_invert_matches_the_matrix_inverse():
    # Source: NumPy np.linalg.inv as the reference.
    T = _pose()
    np.testing.assert_allclose(frames.invert(T), np.linalg.inv(T), atol=1e-14)


def test_twist_transform_matches_pinocchio_se3_action():
    # Source: pinocchio SE3.action (6x6 adjoint) and SE3.act(Motion). pinocchio's Motion vector
    # is [linear; angular], checked here from Motion(linear, angular).vector, so its action is
    # in our [v; w] order with no reordering.
    T = _pose()
    M = pin.SE3(T[:3, :3], T[:3, 3])
    v, w = np.array([0.1, -0.3, 0.25]), np.array([0.7, 0.2, -0.4])
    motion = pin.Motion(v, w)
    np.testing.assert_array_equal(motion.vector, np.concatenate([v, w]))
    X = frames.twist_transform(T)
    np.testing.assert_allclose(X, M.action, atol=1e-14)
    np.testing.assert_allclose(X @ motion.vector, M.act(motion).vector, atol=1e-14)


def test_twist_transform_matches_finite_differences_of_poses():
    # Source: definition of a twist (Lynch & Park 2017, Modern Robotics, sec. 3.3.2): the body
    # moves as T_a_b(t) = T_a_b expm(t [V_b]); a point fixed to the body then has, in frame a,
    # velocity v_a + w_a x p_a with V_a = [v_a; w_a]. Central differences of body points.
    T = _pose()
    V_b = np.array([0.1, -0.3, 0.25, 0.7, 0.2, -0.4])
    body_points = np.array([[0.0, 0.0, 0.0, 1.0], [0.3, -0.1, 0.2, 1.0], [-0.2, 0.5, 0.1, 1.0]])
    h = 1e-6
    p_plus = (T @ expm(h * _hat(V_b)) @ body_points.T).T[:, :3]
    p_minus = (T @ expm(-h * _hat(V_b)) @ body_points.T).T[:, :3]
    velocity_fd = (p_plus - p_minus) / (2 * h)
    V_a = frames.twist_transform(T) @ V_b
    p_a = (T @ body_points.T).T[:, :3]
    velocity = V_a[:3] + np.cross(V_a[3:], p_a)
    np.testing.assert_allclose(velocity, velocity_fd, rtol=1e-8, atol=1e-9)


def test_twist_transform_composes_and_inverts():
    # Group property of the adjoint (Lynch & Park 2017, prop. 3.20): Ad(T1 T2) = Ad(T1) Ad(T2),
    # Ad(T^-1) = Ad(T)^-1.
    T1 = _pose()
    T2 = frames.transform_from_xyz_rpy([-0.1, 0.2, 0.05], [-1.0, 0.4, 2.2])
    np.testing.assert_allclose(frames.twist_transform(T1 @ T2),
                               frames.twist_transform(T1) @ frames.twist_transform(T2), atol=1e-14)
    np.testing.assert_allclose(frames.twist_transform(frames.invert(T1)),
                               np.linalg.inv(frames.twist_transform(T1)), atol=1e-13)


def test_rotation_block_is_the_twist_transform_of_a_pure_rotation():
    # pinocchio SE3.action with zero translation (reference library).
    R = _pose()[:3, :3]
    np.testing.assert_allclose(frames.rotation_block(R), pin.SE3(R, np.zeros(3)).action, atol=1e-15)


def test_pose_error_in_metres_and_radians():
    # Source: transforms3d.axangles.mat2axangle gives the angle of the relative rotation.
    T1 = _pose()
    T2 = T1 @ frames.transform_from_xyz_rpy([0.003, -0.004, 0.0], [0.02, -0.01, 0.03])
    translation, rotation = frames.pose_error(T1, T2)
    assert translation == pytest.approx(0.005, abs=1e-12)  # 3-4-5 triangle, in T1's axes
    _, angle = axangles.mat2axangle(T1[:3, :3].T @ T2[:3, :3])
    assert rotation == pytest.approx(abs(angle), abs=1e-12)
    assert frames.pose_error(T1, T1) == pytest.approx((0.0, 0.0), abs=1e-7)


@pytest.mark.parametrize("call, message", [
    (lambda: frames.skew([1.0, 2.0]), r"v must have shape \(3,\)"),
    (lambda: frames.transform(np.eye(4), [0, 0, 0]), "3x3 rotation"),
    (lambda: frames.invert(np.eye(3)), "4x4 homogeneous"),
    (lambda: frames.quat_to_matrix([0.0, 0.0, 1.0]), "4 components"),
    (lambda: frames.quat_to_matrix([0.0, 0.0, 0.0, 0.0]), "non-zero"),
    (lambda: frames.twist_transform(np.eye(3)), "T_a_b must be a 4x4"),
])
def test_bad_inputs_are_refused_with_a_reason(call, message):
    with pytest.raises(ValueError, match=message):
        call()


@pytest.mark.parametrize("angle", [1e-9, 1e-4, 0.5, 2.0, math.pi - 1e-6, math.pi])
def test_pose_error_angle_over_the_whole_range(angle):
    # Source: SciPy Rotation.magnitude (reference library), near zero, mid-range and near pi.
    axis = np.array([0.3, -0.5, 0.8]) / np.linalg.norm([0.3, -0.5, 0.8])
    R = Rotation.from_rotvec(axis * angle).as_matrix()
    T1 = _pose()
    T2 = T1 @ frames.transform(R, np.zeros(3))
    _, rotation = frames.pose_error(T1, T2)
    expected = Rotation.from_matrix(T1[:3, :3].T @ T2[:3, :3]).magnitude()
    assert rotation == pytest.approx(expected, abs=1e-9)
