"""What a halt reason means, why it usually happens and what to check: one table shared by the
report's verdict, the sweep's failure summary and the README (``## Halt reasons``, generated
from :data:`GUIDANCE` by :func:`markdown_table`; a test keeps them in step).

Every reason the supervisor can give (``vservo_node.servo.HALT_REASONS``) has an entry; a few
more cover reasons the node is about to gain and the headless episodes' own end. The causes and
checks are what we met in the simulated cell and common practice, no source.
"""
from __future__ import annotations

from dataclasses import dataclass


@dataclass(frozen=True)
class Guidance:
    """``cause``: the likely causes, most frequent first; ``check``: what to look at, in order."""
    cause: str
    check: str


GUIDANCE: dict[str, Guidance] = {
    "stop_requested": Guidance(
        "someone called `servo/stop` (an operator, a cell program or a tool)",
        "who called the service (their log); nothing is wrong with the servo"),
    "too_few_features": Guidance(
        "the target left the view, was covered, or is lit so differently that fewer than "
        "`control.min_features` features matched",
        "the end frame of the report (what was visible); `vservo detect` on a recorded frame; "
        "`target.file`; lighting and exposure; a start pose closer to the taught one"),
    "image_stale": Guidance(
        "no image for `io.image_timeout_s`: the camera driver stalled, its QoS does not match "
        "(reliable vs best effort), the topic is remapped wrongly, or the CPU is overloaded",
        "`ros2 topic hz` on the image topic; the QoS of both ends; `io.image_timeout_s` "
        "against the frame period; the node's log"),
    "joints_stale": Guidance(
        "no joint state for `io.joint_state_timeout_s`: the joint state broadcaster stopped or "
        "publishes too slowly",
        "`ros2 topic hz joint_states`; `io.joint_state_timeout_s` against its period"),
    "permit_withdrawn": Guidance(
        "the cell's motion permit turned False or stopped arriving (`io.require_permit`)",
        "the cell's safety interlock or PLC; the heartbeat rate against `io.permit_timeout_s`"),
    "camera_info_invalid": Guidance(
        "camera_info is missing, changed during the run, or its size differs from the images",
        "the camera_info topic and remap; the image resolution; `io.image_rectified`"),
    "joint_limit_envelope": Guidance(
        "a joint reached the braking envelope before its URDF limit (less "
        "`limits.position_margin`): the way to the taught view needs more travel than that "
        "joint has (large turns with `current_view`, a start near a limit)",
        "the joint plot (which joint); `control.interaction_estimate` (`blended`); a start "
        "closer to the taught pose; `control.null_space_gain` on redundant arms"),
    "motion_envelope": Guidance(
        "the tool moved farther than `limits.max_translation_m` or turned more than "
        "`limits.max_rotation_deg` from its start pose: a far start, the reference of another "
        "station, or the camera retreating on a large turn",
        "the envelope plot; that the reference belongs to this station; the limits, if the "
        "move is meant to be that large"),
    "too_close": Guidance(
        "a feature came closer than `limits.min_camera_distance_m`: the taught view is close "
        "to the target, or the depths the law uses are wrong",
        "`depth.source` and its values; the taught distance; `limits.min_camera_distance_m`"),
    "wrong_direction": Guidance(
        "the features moved against what the image Jacobian predicts (image check), or the "
        "joints against their command (follow check): a wrong hand-eye or a camera frame that "
        "is not the optical frame (z forward, x right, y down), or a command in another joint "
        "order or with other signs than the controller expects",
        "the detail (which check fired, which joints); image check: `robot.hand_eye` or the "
        "URDF's camera frame, and that `robot.camera_frame` is the optical frame; follow "
        "check: `io.command_joint_order` and the downstream controller's joints and signs"),
    "not_following": Guidance(
        "the arm travelled much less than commanded: the downstream controller is inactive or "
        "claims other joints, the robot is in a protective stop or its speed override is 0, or "
        "the command topic reaches another controller",
        "the detail (which joints, how far); the controller manager's active controllers; the "
        "robot's mode and pendant; the command topic's remap"),
    "diverging": Guidance(
        "the image error grew well past its best value: wrong depths, a bad calibration "
        "(focal length, hand-eye), a wrong correspondence, a moving target, or a gain too "
        "high for the loop delay",
        "the error per feature (one feature jumping: a mismatch); `depth.source`; the camera "
        "calibration; gain x (loop delay + frame period)"),
    "initial_error_too_large": Guidance(
        "the first image error is above `control.max_initial_error_px`: the start is far from "
        "the taught view, or the reference is another station's",
        "the start frame of the report; the reference file; a start closer to the taught pose"),
    "run_timeout": Guidance(
        "the run took longer than `control.max_run_s`: a gain or speed limits too low, or a "
        "tolerance below the image noise so the dwell never completes",
        "the error plots: stuck just above a tolerance (raise the one not met above its noise "
        "floor: `control.tolerance_px` on the image error, `control.tolerance_mm` / `_deg` on "
        "the pose estimate's spread) or a slow decay (gains, speed limits, the speed scale)"),
    "numerical_fault": Guidance(
        "a non-finite value reached the law or the limiter: bad camera_info (zero focal "
        "length), NaN joint states or zero depths",
        "the node's log; camera_info; joint states; depths"),
    "motion_disabled": Guidance(
        "`servo/enable_motion` false during the run",
        "who disabled motion (their log)"),
    "internal_error": Guidance(
        "an unexpected exception in the node",
        "the node's log (traceback); report it with the run's record"),
    # announced by the node's next version (the table covers them already)
    "image_jacobian_singular": Guidance(
        "the image Jacobian lost rank: features nearly collinear or too close together, the "
        "target seen edge-on, or the arm near a singular configuration",
        "the feature layout in the frames; the target's spread in the image; the arm's "
        "configuration (wrist or elbow stretched)"),
    "frames_unpaired": Guidance(
        "images and joint states could not be paired in time: clocks or stamps disagree",
        "`use_sim_time` on every node; `io.camera_time_offset_s`; the camera's stamps"),
    "shutdown": Guidance(
        "the node was shut down (SIGINT or SIGTERM) during the run",
        "who stopped the node or its launch file"),
    "pose_estimate_failed": Guidance(
        "with `control.scheme: decoupled`, no pose of the taught points could be estimated "
        "from the current view: too few matched features (at least 4), features nearly "
        "collinear, or taught depths missing",
        "`control.min_features` (>= 4); the taught reference has depths (`depth.source`); "
        "the feature layout in the frames; `control.scheme: point` for such targets"),
    # headless episodes (vservo_node.episode) only
    "episode_timeout": Guidance(
        "the headless episode ended before the servo ended its run (the episode is shorter "
        "than `control.max_run_s` plus braking)",
        "the sweep's `control.max_run_s` and the scenario's `duration_s`"),
}


def guidance(reason: str) -> Guidance | None:
    """The entry of ``reason``; None for '' (no halt) and for reasons not in the table."""
    return GUIDANCE.get(reason) if reason else None


def describe(reason: str) -> str:
    """What the reason means, as the supervisor defines it (servo.HALT_REASONS), else ''."""
    from vservo_node.servo import HALT_REASONS

    return HALT_REASONS.get(reason, "")


def markdown_table() -> str:
    """The README's halt table: every reason of servo.HALT_REASONS, in its order."""
    from vservo_node.servo import HALT_REASONS

    rows = ["| reason | what happened | likely causes | what to check |", "|---|---|---|---|"]
    for reason, meaning in HALT_REASONS.items():
        g = GUIDANCE[reason]
        rows.append(f"| `{reason}` | {meaning} | {g.cause} | {g.check} |")
    return "\n".join(rows)
