"""Supervisor speed-scale margins (our design; common practice, no source): each margin is 1
away from its hazard and ramps linearly down to margin_floor at it, and the servo slows by the
smallest of them and the cell's external scale."""
import pytest

from vservo_node.control import frames
from vservo_node.episode import limits_for
from vservo_node.servo import Observation, Servo, ServoSettings


@pytest.fixture
def rig(square_rig):
    return square_rig


def _speed_scale(robot, camera, scene, uv, q=None, **settings):
    arm = robot.arm
    servo = Servo(arm, ServoSettings(**settings), limits_for(arm))
    servo.set_reference(scene.taught_view(robot.home))
    servo.enable(True, 0.0)
    assert servo.start(robot.home, 0.0)[0]
    q = robot.home if q is None else q
    obs = Observation(scene.keys, uv, camera.pixels_to_normalized(uv))
    servo.observe(obs, q, 0.0)
    assert servo.state == "servoing", servo.reason
    return servo.command(q, 0.0, 0.008)[1]["speed_scale"]


def test_far_from_every_hazard_the_scale_is_one(rig):
    robot, camera, scene = rig
    uv = scene.taught_view(robot.home).uv + [15.0, 0.0]
    assert _speed_scale(robot, camera, scene, uv) == pytest.approx(1.0)


@pytest.mark.parametrize("room_px, expected", [(30.0, 1.0), (10.0, 0.5), (2.0, 0.2)])
def test_a_feature_near_the_image_border_slows_the_motion(rig, room_px, expected):
    robot, camera, scene = rig
    uv = scene.taught_view(robot.home).uv.copy()
    uv[:, 0] += (639.0 - room_px) - uv[:, 0].max()   # rightmost feature room_px from the edge
    assert _speed_scale(robot, camera, scene, uv) == pytest.approx(expected)


def test_a_joint_near_its_limit_slows_the_motion(rig):
    robot, camera, scene = rig
    arm = robot.arm
    q = robot.home.copy()
    q[0] = arm.upper[0] - 0.03 - 0.075     # limits_for keeps 0.03 rad; 0.075 of 0.15 zone left
    uv = scene.taught_view(robot.home).uv + [15.0, 0.0]
    # an envelope wide enough that this far-off pose is well inside it
    scale = _speed_scale(robot, camera, scene, uv, q=q, max_translation_m=2.0,
                         max_rotation_deg=360.0, max_initial_error_px=1e4)
    assert scale == pytest.approx(0.5, abs=1e-9)


def test_the_end_of_the_motion_envelope_slows_the_motion(rig):
    robot, camera, scene = rig
    arm = robot.arm
    q = robot.home.copy()
    q[0] += 0.1
    moved, _ = frames.pose_error(arm.fk(robot.home), arm.fk(q))
    # envelope such that 90 % of it is used: 0.1 of it left, half of the 0.2 zone
    uv = scene.taught_view(robot.home).uv + [15.0, 0.0]
    scale = _speed_scale(robot, camera, scene, uv, q=q, max_translation_m=moved / 0.9)
    assert scale == pytest.approx(0.5, rel=1e-6)
