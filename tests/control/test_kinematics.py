"""ArmModel (vservo_node/control/kinematics.py) against outside references:

- finite differences of forward kinematics (definition of the geometric and body Jacobians:
  Siciliano, Sciavicco, Villani, Oriolo, "Robotics: Modelling, Planning and Control", Springer
  2009, sec. 3.1; Lynch & Park, "Modern Robotics", 2017, sec. 5.1),
- the closed-form Jacobian of the three-link planar arm (Siciliano et al. 2009, sec. 3.1),
- pinocchio's own frame Jacobians and SE3 actions on the full, unreduced model (reference
  library), with SciPy's Rotation for rotation vectors.
"""
import importlib.util
import xml.etree.ElementTree as ET
from pathlib import Path

import numpy as np
import pinocchio as pin
import pytest
from scipy.spatial.transform import Rotation

from vservo_node.control.kinematics import ArmModel, load_robot
from vservo_node.paths import config_dir

DATA = Path(__file__).resolve().parent / "data"
ROBOTS = config_dir() / "robots"
H = 1e-6      # central-difference step (rad or m)
FD_TOL = 1e-6  # brief: Jacobians match finite differences to 1e-6


def _vs6():
    return ArmModel.from_urdf_file(ROBOTS / "vs6_bench.urdf", "base_link", "tool0",
                                   "camera_optical_frame")


def _vs7():
    return ArmModel.from_urdf_file(ROBOTS / "vs7_bench.urdf", "base_link", "tool0",
                                   "camera_optical_frame")


def _mobile():
    return ArmModel.from_urdf_file(DATA / "mobile_arm.urdf", "arm_base", "flange", "wrist_camera")


ARMS = {"vs6": _vs6, "vs7": _vs7, "mobile": _mobile}


def _random_q(arm, rng):
    """Random q inside the limits (continuous joints anywhere in [-2 pi, 2 pi])."""
    lo = np.where(arm.continuous, -2 * np.pi, arm.lower)
    hi = np.where(arm.continuous, 2 * np.pi, arm.upper)
    return rng.uniform(lo, hi)


def _fd_base(fk, q):
    """6 x n central differences of T_base_frame(q): [dp/dq; w] with [w]x = dR/dq R^T
    (Siciliano et al. 2009, sec. 3.1.1, angular velocity from the derivative of R)."""
    J = np.empty((6, q.size))
    for i in range(q.size):
        dq = np.zeros(q.size)
        dq[i] = H
        Tp, Tm = fk(q + dq), fk(q - dq)
        J[:3, i] = (Tp[:3, 3] - Tm[:3, 3]) / (2 * H)
        J[3:, i] = Rotation.from_matrix(Tp[:3, :3] @ Tm[:3, :3].T).as_rotvec() / (2 * H)
    return J


def _fd_body(fk, q):
    """6 x n central differences of the body twist T^-1 dT/dq, [v; w] in the moving frame's
    own axes (Lynch & Park 2017, sec. 3.3.2 body twist, sec. 5.1.3 body Jacobian)."""
    J = np.empty((6, q.size))
    T = fk(q)
    for i in range(q.size):
        dq = np.zeros(q.size)
        dq[i] = H
        Tp, Tm = fk(q + dq), fk(q - dq)
        J[:3, i] = T[:3, :3].T @ (Tp[:3, 3] - Tm[:3, 3]) / (2 * H)
        J[3:, i] = Rotation.from_matrix(Tm[:3, :3].T @ Tp[:3, :3]).as_rotvec() / (2 * H)
    return J


def _full_model(urdf_path):
    return pin.buildModelFromXML(Path(urdf_path).read_text())


def _full_q(model, arm, q, rng):
    """A configuration of the full pinocchio model: chain joints from q, every other joint
    (platform, head, fingers) random, to show they do not leak into base-relative results."""
    q_full = pin.randomConfiguration(model, np.maximum(model.lowerPositionLimit, -3.0),
                                     np.minimum(model.upperPositionLimit, 3.0))
    for name, value in zip(arm.joint_names, q):
        joint = model.joints[model.getJointId(name)]
        if joint.nq == 2:  # continuous: (cos, sin)
            q_full[joint.idx_q:joint.idx_q + 2] = np.cos(value), np.sin(value)
        else:
            q_full[joint.idx_q] = value
    return q_full


def _chain_columns(model, arm):
    return [model.joints[model.getJointId(name)].idx_v for name in arm.joint_names]


def _pin_frame_jacobian(model, q_full, frame, reference):
    data = model.createData()
    pin.computeJointJacobians(model, data, q_full)
    pin.updateFramePlacements(model, data)
    fid = model.getFrameId(frame)
    return pin.getFrameJacobian(model, data, fid, reference), data


# ------------------------------------------------------------------ finite differences
@pytest.mark.parametrize("name", sorted(ARMS))
def test_jacobians_match_finite_differences_of_fk(name):
    # Definition of the geometric Jacobian (Siciliano et al. 2009, sec. 3.1) and of the body
    # Jacobian (Lynch & Park 2017, sec. 5.1.3), checked by central differences of our own FK.
    arm = ARMS[name]()
    rng = np.random.default_rng(7)
    for _ in range(3):
        q = _random_q(arm, rng)
        np.testing.assert_allclose(arm.jacobian_base(q), _fd_base(arm.fk, q), atol=FD_TOL)
        np.testing.assert_allclose(arm.jacobian_tool(q), _fd_body(arm.fk, q), atol=FD_TOL)


def test_point_and_frame_jacobians_match_finite_differences():
    # v_p = v + w x r for a point fixed in a body (Siciliano et al. 2009, sec. 3.1.1); checked
    # by central differences of the point's position, for a link, the tcp and the camera alias
    # with an overridden hand-eye (so the alias offset path is used).
    arm = _vs7()
    arm.set_hand_eye(pin.SE3(pin.rpy.rpyToMatrix(0.3, -0.7, 1.1),
                             np.array([0.05, -0.03, 0.08])).homogeneous)
    rng = np.random.default_rng(11)
    offset = np.array([0.03, -0.02, 0.07])
    for frame in ("vs7_link5", "tcp", "camera"):
        q = _random_q(arm, rng)

        def point(qq, frame=frame):
            return (arm.fk(qq, frame) @ np.append(offset, 1.0))[:3]

        fd = np.column_stack([(point(q + H * e) - point(q - H * e)) / (2 * H)
                              for e in np.eye(arm.n)])
        np.testing.assert_allclose(arm.point_jacobian_base(q, frame, offset), fd, atol=FD_TOL)
        np.testing.assert_allclose(arm.frame_jacobian_base(q, frame),
                                   _fd_base(lambda qq, f=frame: arm.fk(qq, f), q), atol=FD_TOL)


def test_cartesian_jacobians_match_finite_differences_and_the_single_queries():
    # The limiter's three Jacobians from one call: the tool point's and the camera origin's
    # linear velocity (v_p = v + w x r, Siciliano et al. 2009, sec. 3.1.1) and the tool's
    # angular velocity, checked by central differences of FK (points; the angular part via
    # _fd_base) and against the single queries they replace (equal values, same expressions).
    rng = np.random.default_rng(13)
    tool_point = np.array([0.01, -0.02, 0.12])
    for arm in (_vs6(), _vs7(), _mobile()):
        arm.set_hand_eye(pin.SE3(pin.rpy.rpyToMatrix(-0.4, 0.2, 0.9),
                                 np.array([0.04, 0.02, -0.06])).homogeneous)
        for _ in range(3):
            q = _random_q(arm, rng)
            J_tool, J_camera, J_angular = arm.cartesian_jacobians(q, tool_point)
            for J, frame, offset in ((J_tool, "tool", tool_point), (J_camera, "camera", None)):
                def point(qq, frame=frame, offset=offset):
                    T = arm.fk(qq, frame)  # noqa: B023 - called within this iteration
                    return T[:3, 3] if offset is None else (T @ np.append(offset, 1.0))[:3]

                fd = np.column_stack([(point(q + H * e) - point(q - H * e)) / (2 * H)
                                      for e in np.eye(arm.n)])
                np.testing.assert_allclose(J, fd, atol=FD_TOL)
            np.testing.assert_allclose(J_angular, _fd_base(arm.fk, q)[3:], atol=FD_TOL)
            np.testing.assert_array_equal(J_tool, arm.point_jacobian_base(q, "tool", tool_point))
            np.testing.assert_array_equal(J_camera,
                                          arm.point_jacobian_base(q, "camera", np.zeros(3)))
            np.testing.assert_array_equal(J_angular, arm.jacobian_base(q)[3:])
    with pytest.raises(ValueError, match="tool_point must have shape"):
        arm.cartesian_jacobians(q, [0.0, 0.1])


# ------------------------------------------------------------------ closed form
def test_planar_three_link_closed_form():
    # Siciliano et al. 2009, sec. 3.1 (Jacobian computation, three-link planar arm example),
    # rows [v; w] (from memory; also confirmed here by finite differences of FK below):
    #   J = [[-a1 s1 - a2 s12 - a3 s123, -a2 s12 - a3 s123, -a3 s123],
    #        [ a1 c1 + a2 c12 + a3 c123,  a2 c12 + a3 c123,  a3 c123],
    #        [0, 0, 0], [0, 0, 0], [0, 0, 0], [1, 1, 1]]
    # and the direct kinematics p = (a1 c1 + a2 c12 + a3 c123, a1 s1 + a2 s12 + a3 s123, 0)
    # (same book, sec. 2.9.1).
    a1, a2, a3 = 0.5, 0.4, 0.25  # as written in data/planar3.urdf
    arm = ArmModel.from_urdf_file(DATA / "planar3.urdf", "base_link", "ee", min_joints=3)
    assert arm.joint_names == ["p_j1", "p_j2", "p_j3"]
    rng = np.random.default_rng(3)
    for _ in range(5):
        q = _random_q(arm, rng)
        t1, t12, t123 = np.cumsum(q)
        s1, s12, s123 = np.sin([t1, t12, t123])
        c1, c12, c123 = np.cos([t1, t12, t123])
        J = np.zeros((6, 3))
        J[0] = [-a1 * s1 - a2 * s12 - a3 * s123, -a2 * s12 - a3 * s123, -a3 * s123]
        J[1] = [a1 * c1 + a2 * c12 + a3 * c123, a2 * c12 + a3 * c123, a3 * c123]
        J[5] = [1.0, 1.0, 1.0]
        np.testing.assert_allclose(arm.jacobian_base(q), J, atol=1e-12)
        np.testing.assert_allclose(arm.jacobian_base(q), _fd_base(arm.fk, q), atol=FD_TOL)
        p = [a1 * c1 + a2 * c12 + a3 * c123, a1 * s1 + a2 * s12 + a3 * s123, 0.0]
        np.testing.assert_allclose(arm.fk(q)[:3, 3], p, atol=1e-12)
        np.testing.assert_allclose(arm.fk(q)[:3, :3],
                                   Rotation.from_euler("z", t123).as_matrix(), atol=1e-12)


def test_planar_arm_refused_without_explicit_min_joints():
    with pytest.raises(ValueError, match=r"base_link -> ee has 3 joint\(s\).*min_joints=3"):
        ArmModel.from_urdf_file(DATA / "planar3.urdf", "base_link", "ee")


# ------------------------------------------------------------------ pinocchio as reference
@pytest.mark.parametrize("name,urdf", [("vs6", ROBOTS / "vs6_bench.urdf"),
                                       ("vs7", ROBOTS / "vs7_bench.urdf"),
                                       ("mobile", DATA / "mobile_arm.urdf")])
def test_tool_and_base_jacobians_match_pinocchio_full_model(name, urdf):
    # Reference library: pinocchio's getFrameJacobian on the full (unreduced) model, with the
    # platform, head and finger joints at random values. LOCAL is the tool-axes (body)
    # Jacobian; LOCAL_WORLD_ALIGNED re-expressed in base axes is the base Jacobian.
    arm = ARMS[name]()
    model = _full_model(urdf)
    cols = _chain_columns(model, arm)
    rng = np.random.default_rng(5)
    for _ in range(3):
        q = _random_q(arm, rng)
        q_full = _full_q(model, arm, q, rng)
        J_local, data = _pin_frame_jacobian(model, q_full, arm.tool_frame, pin.LOCAL)
        np.testing.assert_allclose(arm.jacobian_tool(q), J_local[:, cols], atol=1e-12)
        J_lwa, _ = _pin_frame_jacobian(model, q_full, arm.tool_frame, pin.LOCAL_WORLD_ALIGNED)
        R_world_base = data.oMf[model.getFrameId(arm.base_frame)].rotation
        np.testing.assert_allclose(arm.jacobian_base(q), np.kron(np.eye(2), R_world_base.T)
                                   @ J_lwa[:, cols], atol=1e-12)
        T_base_tool = (data.oMf[model.getFrameId(arm.base_frame)].inverse()
                       * data.oMf[model.getFrameId(arm.tool_frame)]).homogeneous
        np.testing.assert_allclose(arm.fk(q), T_base_tool, atol=1e-12)


@pytest.mark.parametrize("name,urdf", [("vs6", ROBOTS / "vs6_bench.urdf"),
                                       ("mobile", DATA / "mobile_arm.urdf")])
def test_camera_twist_matches_pinocchio_and_finite_differences(name, urdf):
    # V_camera = camera_from_tool() @ J_tool dq against (1) pinocchio's LOCAL Jacobian of the
    # URDF camera frame on the full model and (2) central differences of camera poses (body
    # twist, Lynch & Park 2017, sec. 3.3.2).
    arm = ARMS[name]()
    model = _full_model(urdf)
    cols = _chain_columns(model, arm)
    rng = np.random.default_rng(9)
    q = _random_q(arm, rng)
    dq = rng.normal(size=arm.n)
    V_camera = arm.camera_from_tool() @ arm.jacobian_tool(q) @ dq
    J_cam, _ = _pin_frame_jacobian(model, _full_q(model, arm, q, rng), arm.camera_frame,
                                   pin.LOCAL)
    np.testing.assert_allclose(V_camera, J_cam[:, cols] @ dq, atol=1e-12)
    np.testing.assert_allclose(V_camera, _fd_body(arm.camera_pose, q) @ dq, atol=FD_TOL)
    np.testing.assert_allclose(arm.camera_pose(q), arm.fk(q, arm.camera_frame), atol=1e-12)


def test_hand_eye_override_matches_pinocchio_frame():
    # An asymmetric rotation (rpy 0.3, -0.7, 1.1) and an offset, so that a transposed or
    # inverted hand-eye transform gives a different result (asserted below). Reference:
    # pinocchio, with the same hand-eye added as an extra frame on the tool's joint, and its
    # SE3 action matrix ([v; w] order in pinocchio) for the twist transform.
    arm = _vs6()
    M_tool_camera = pin.SE3(pin.rpy.rpyToMatrix(0.3, -0.7, 1.1), np.array([0.05, -0.03, 0.08]))
    arm.set_hand_eye(M_tool_camera.homogeneous)
    expected = M_tool_camera.inverse().action
    np.testing.assert_allclose(arm.camera_from_tool(), expected, atol=1e-12)
    for wrong in (M_tool_camera.action, pin.SE3(M_tool_camera.rotation.T,
                                                 M_tool_camera.translation).inverse().action):
        assert np.abs(wrong - expected).max() > 0.1  # the check below can tell them apart

    model = _full_model(ROBOTS / "vs6_bench.urdf")
    tool = model.frames[model.getFrameId("tool0")]
    model.addFrame(pin.Frame("calibrated_camera", tool.parentJoint,
                             tool.placement * M_tool_camera, pin.FrameType.OP_FRAME))
    rng = np.random.default_rng(13)
    q = _random_q(arm, rng)
    dq = rng.normal(size=arm.n)
    J_cam, data = _pin_frame_jacobian(model, _full_q(model, arm, q, rng), "calibrated_camera",
                                      pin.LOCAL)
    cols = _chain_columns(model, arm)
    np.testing.assert_allclose(arm.camera_from_tool() @ arm.jacobian_tool(q) @ dq,
                               J_cam[:, cols] @ dq, atol=1e-12)
    np.testing.assert_allclose(arm.camera_pose(q),
                               data.oMf[model.getFrameId("calibrated_camera")].homogeneous,
                               atol=1e-12)  # base_link coincides with the world here
    np.testing.assert_allclose(arm.fk(q, "camera"), arm.camera_pose(q), atol=0)


def test_set_hand_eye_refuses_non_rigid_transform():
    arm = _vs6()
    scaled = np.eye(4)
    scaled[:3, :3] *= 1.1
    with pytest.raises(ValueError, match="rigid transform"):
        arm.set_hand_eye(scaled)
    with pytest.raises(ValueError, match="4x4"):
        arm.set_hand_eye(np.eye(3))


def test_no_camera_until_hand_eye_given():
    arm = ArmModel.from_urdf_file(ROBOTS / "vs6_bench.urdf", "base_link", "tool0")
    q = np.zeros(arm.n)
    with pytest.raises(ValueError, match="no camera"):
        arm.camera_pose(q)
    arm.set_hand_eye(np.eye(4))
    np.testing.assert_allclose(arm.camera_pose(q), arm.fk(q), atol=0)


# ------------------------------------------------------------------ reduction and refusals
def _urdf_joints(path):
    return {j.get("name"): j for j in ET.parse(path).getroot().iter("joint")}


def test_gripper_fingers_are_not_in_the_chain():
    for make, urdf, fingers in ((_vs6, "vs6_bench.urdf", 2), (_vs7, "vs7_bench.urdf", 2)):
        arm = make()
        joints = _urdf_joints(ROBOTS / urdf)
        prismatic = [n for n, j in joints.items() if j.get("type") == "prismatic"]
        assert len(prismatic) == fingers
        assert not set(prismatic) & set(arm.joint_names)
        movable = [n for n, j in joints.items() if j.get("type") != "fixed"]
        assert arm.joint_names == [n for n in movable if n not in prismatic]


def test_limits_come_from_the_urdf():
    # Independent parse of the URDF text with ElementTree.
    for make, urdf in ((_vs6, "vs6_bench.urdf"), (_vs7, "vs7_bench.urdf"),
                       (_mobile, DATA / "mobile_arm.urdf")):
        arm = make()
        joints = _urdf_joints(ROBOTS / urdf)
        for i, name in enumerate(arm.joint_names):
            limit = joints[name].find("limit")
            assert arm.velocity_limits[i] == float(limit.get("velocity"))
            if joints[name].get("type") == "continuous":
                assert arm.continuous[i]
                assert arm.lower[i] == -np.inf and arm.upper[i] == np.inf
            else:
                assert not arm.continuous[i]
                assert (arm.lower[i], arm.upper[i]) == (float(limit.get("lower")),
                                                        float(limit.get("upper")))


def test_continuous_joint_round_trips_and_is_periodic():
    arm = _vs6()
    assert arm.continuous.tolist() == [False] * 5 + [True]
    rng = np.random.default_rng(17)
    q = _random_q(arm, rng)
    q[5] = 2.5
    q_pin = arm.to_pinocchio_q(q)
    assert q_pin.shape == (7,)  # five scalars and (cos, sin) of the continuous joint
    np.testing.assert_allclose(q_pin[5:], [np.cos(2.5), np.sin(2.5)], atol=1e-15)
    np.testing.assert_allclose(arm.from_pinocchio_q(q_pin), q, atol=1e-12)
    turned = q.copy()
    turned[5] -= 2 * np.pi
    np.testing.assert_allclose(arm.from_pinocchio_q(arm.to_pinocchio_q(turned)), q, atol=1e-12)
    np.testing.assert_allclose(arm.fk(turned), arm.fk(q), atol=1e-12)
    np.testing.assert_allclose(arm.jacobian_base(turned), arm.jacobian_base(q), atol=1e-12)
    assert not np.allclose(arm.fk(q + [0, 0, 0, 0, 0, 1.0]), arm.fk(q), atol=1e-3)


def test_base_frame_below_a_mobile_platform():
    # Base-relative results must not depend on the platform joints (cart, turret) nor on the
    # head; checked with pinocchio on the full model at several platform configurations in
    # test_tool_and_base_jacobians_match_pinocchio_full_model; here the chain itself.
    arm = _mobile()
    assert arm.joint_names == ["m_a1", "m_a2", "m_a3", "m_a4", "m_a5", "m_a6"]
    assert arm.continuous.tolist() == [False, False, False, True, False, False]
    np.testing.assert_allclose(arm.fk(np.zeros(6), "arm_base"), np.eye(4), atol=1e-15)


def test_cache_follows_in_place_changes_of_q():
    arm = _vs6()
    q = np.full(arm.n, 0.3)
    before = arm.fk(q).copy()
    q[1] += 0.2
    assert not np.allclose(arm.fk(q), before, atol=1e-3)
    np.testing.assert_allclose(arm.fk(q), _vs6().fk(q), atol=0)


@pytest.mark.parametrize("kwargs,message", [
    (dict(base_frame="base_link", tool_frame="vs6_link3"),
     r"base_link -> vs6_link3 has 3 joint\(s\) \(vs6_j1, vs6_j2, vs6_j3\)"),
    (dict(base_frame="base_link", tool_frame="flange_typo"),
     r"tool frame 'flange_typo' is not a frame.*available links: .*tool0"),
    (dict(base_frame="tool0", tool_frame="base_link"), "not upstream of tool frame"),
    (dict(base_frame="base_link", tool_frame="tool0", camera_frame="vs6_finger_left"),
     "not rigidly attached.*vs6_finger_left_joint"),
    (dict(base_frame="base_link", tool_frame="tool0", camera_frame="vs6_link5"),
     "not rigidly attached.*vs6_j6"),
])
def test_refusals_say_what_was_wrong(kwargs, message):
    with pytest.raises(ValueError, match=message):
        ArmModel.from_urdf_file(ROBOTS / "vs6_bench.urdf", **kwargs)


def test_head_camera_on_another_branch_is_refused():
    with pytest.raises(ValueError, match="not rigidly attached.*m_head_pan"):
        ArmModel.from_urdf_file(DATA / "mobile_arm.urdf", "arm_base", "flange", "head_camera")


@pytest.mark.parametrize("kind", ["floating", "planar"])
def test_unsupported_joint_type_in_chain_is_refused(kind):
    text = (DATA / "planar3.urdf").read_text().replace(
        '<joint name="p_j2" type="revolute">', f'<joint name="p_j2" type="{kind}">')
    with pytest.raises(ValueError, match="joint 'p_j2' on the chain base_link -> ee"):
        ArmModel.from_urdf(text, "base_link", "ee", min_joints=1)


def test_unknown_frame_in_queries_lists_links():
    arm = _vs6()
    with pytest.raises(ValueError, match="available links: .*camera_optical_frame"):
        arm.fk(np.zeros(arm.n), "no_such_link")


def test_bad_inputs_are_refused():
    arm = _vs6()
    with pytest.raises(ValueError, match=r"shape \(6,\).*vs6_j1, vs6_j2"):
        arm.fk(np.zeros(7))
    with pytest.raises(ValueError, match="finite"):
        arm.jacobian_base([0, 0, np.nan, 0, 0, 0])
    with pytest.raises(ValueError, match="could not parse the URDF"):
        ArmModel.from_urdf("<robot name='x'><link name='a'/>", "a", "a")
    with pytest.raises(ValueError, match="missing for chain joint.*vs6_j6"):
        arm.q_from_mapping({f"vs6_j{i}": 0.0 for i in range(1, 6)})
    named = {f"vs6_j{i}": 0.1 * i for i in range(6, 0, -1)} | {"vs6_finger_left_joint": 0.02}
    np.testing.assert_allclose(arm.q_from_mapping(named), 0.1 * np.arange(1, 7))


# ------------------------------------------------------------------ demo arms
def _find_home_module():
    spec = importlib.util.spec_from_file_location("find_home", ROBOTS / "find_home.py")
    module = importlib.util.module_from_spec(spec)
    spec.loader.exec_module(module)
    return module


@pytest.mark.parametrize("name", ["vs6_bench", "vs7_bench"])
def test_demo_arm_home_looks_down_at_the_tray(name):
    robot = load_robot(name)
    arm, home = robot.arm, robot.home
    T = arm.camera_pose(home)
    z_optical = T[:3, 2]
    # Brief: optical axis within 2 deg of straight down.
    assert np.degrees(np.arccos(-z_optical[2])) < 2.0
    # Brief: camera 0.35-0.5 m above the table (z = 0) and looking at the target near
    # (0.5, 0, 0): the optical ray meets the table within 3 cm of it.
    assert 0.35 <= T[2, 3] <= 0.5
    hit = T[:3, 3] + z_optical * (-T[2, 3] / z_optical[2])
    assert np.linalg.norm(hit[:2] - [0.5, 0.0]) < 0.03
    # Joints well inside their limits: 0.3 rad margin (common practice, no source).
    assert np.all(home - arm.lower > 0.3) and np.all(arm.upper - home > 0.3)
    # Away from singularities at home: smallest singular value of the base Jacobian above 0.05
    # (common practice, no source).
    assert np.linalg.svd(arm.jacobian_base(home), compute_uv=False).min() > 0.05


@pytest.mark.parametrize("name", ["vs6_bench", "vs7_bench"])
def test_demo_arm_design_requirements(name):
    robot = load_robot(name)
    arm = robot.arm
    assert arm.n == (7 if name == "vs7_bench" else 6)
    assert np.all((arm.velocity_limits >= 1.5) & (arm.velocity_limits <= 2.5))
    # Camera mounted off the flange axis (tool z) by at least 5 cm, looking along it.
    p = arm.T_tool_camera[:3, 3]
    assert np.hypot(p[0], p[1]) >= 0.05
    assert arm.T_tool_camera[2, 2] > np.cos(np.radians(15))
    # tcp beyond the flange along its approach axis.
    assert arm.fk(robot.home, "tcp")[:3, 3] @ arm.fk(robot.home)[:3, 2] > \
        arm.fk(robot.home)[:3, 3] @ arm.fk(robot.home)[:3, 2] + 0.1


@pytest.mark.parametrize("name", ["vs6_bench", "vs7_bench"])
def test_home_is_reproduced_by_the_documented_solver(name):
    import yaml
    spec = yaml.safe_load((ROBOTS / f"{name}.yaml").read_text())
    robot = load_robot(name)
    find_home = _find_home_module()
    goal = pin.SE3(pin.rpy.rpyToMatrix(*spec["home_goal"]["camera_rpy"]),
                   np.array(spec["home_goal"]["camera_xyz"])).homogeneous
    q = find_home.solve_home(robot.arm, goal, robot.arm.q_from_mapping(spec["home_seed"]))
    np.testing.assert_allclose(q, robot.home, atol=2e-3)
