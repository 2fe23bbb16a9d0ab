"""States and halt reasons are enumerations that publish the same strings as before they were
(bags, status records and run results already recorded must still read)."""
import json

from vservo_node import interface
from vservo_node.interface import HALT_REASONS, HaltReason, State

# The published strings, as recorded before the enumerations existed.
RECORDED_STATES = ("disabled", "armed", "servoing", "settling", "converged", "braking", "halted")
RECORDED_REASONS = (
    "stop_requested", "too_few_features", "image_stale", "joints_stale", "permit_withdrawn",
    "camera_info_invalid", "joint_limit_envelope", "motion_envelope", "too_close",
    "wrong_direction", "not_following", "diverging", "initial_error_too_large", "run_timeout",
    "numerical_fault", "motion_disabled", "internal_error", "frames_unpaired",
    "image_jacobian_singular", "shutdown", "pose_estimate_failed")


def test_states_publish_the_recorded_strings_in_order():
    assert interface.SUPERVISOR_STATES == RECORDED_STATES
    assert all(type(s) is str for s in interface.SUPERVISOR_STATES)
    assert tuple(State) == RECORDED_STATES          # str-valued: members equal their strings
    assert json.dumps([State.BRAKING, f"{State.HALTED}"]) == '["braking", "halted"]'
    assert set(interface.MOVING_STATES) == {"servoing", "settling", "braking"}
    assert set(interface.RUN_STATES) == {"servoing", "settling"}


def test_halt_reasons_publish_the_recorded_strings_each_with_words():
    assert tuple(HaltReason) == RECORDED_REASONS
    assert tuple(HALT_REASONS) == RECORDED_REASONS
    assert all(len(words) > 10 for words in HALT_REASONS.values())
    assert HALT_REASONS["too_close"] == HALT_REASONS[HaltReason.TOO_CLOSE]


def test_status_record_and_result_carry_plain_strings(square_rig):
    """What goes into json/yaml (status topic, bags, run records) is a plain str, not a member."""
    import numpy as np

    from vservo_node.episode import limits_for
    from vservo_node.servo import Observation, Servo, ServoSettings

    robot, _, scene = square_rig
    servo = Servo(robot.arm, ServoSettings(), limits_for(robot.arm))
    servo.set_reference(scene.taught_view(robot.home))
    q = robot.home + 0.01
    servo.enable(True, 0.0)
    assert servo.start(q, 0.0)[0]
    xy, uv, _ = scene.view(q)
    servo.observe(Observation(scene.keys, uv, xy), q, 0.0)
    servo.stop(0.01)
    status = {}
    for k in range(200):
        _, status = servo.command(q, 0.01 + 0.008 * k, 0.008)
        if status["state"] == "halted":
            break
    assert type(status["state"]) is str and status["state"] == "halted"
    assert type(status["reason"]) is str and status["reason"] == "stop_requested"
    assert type(servo.result["reason"]) is str
    assert np.all(np.asarray(status["dq"]) == 0.0)
