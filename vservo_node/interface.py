"""Names and record layouts shared by the nodes, the recorder and the report tools.

Pure constants (no rclpy), so the functional core and the offline tools agree with the nodes.
Topic names are relative so that users remap them; `~/` names live under the node's name.
"""
from __future__ import annotations

import math
from enum import StrEnum

# --- controller node (executable `vservo_node`, default node name `vservo`) -----------------
CONTROLLER_NODE = "vservo"
# inputs
TOPIC_IMAGE = "camera/image"                      # sensor_msgs/Image
TOPIC_IMAGE_COMPRESSED = "camera/image/compressed"  # sensor_msgs/CompressedImage
TOPIC_CAMERA_INFO = "camera/camera_info"          # sensor_msgs/CameraInfo
TOPIC_DEPTH = "camera/depth"                      # sensor_msgs/Image (16UC1 mm or 32FC1 m), aligned
TOPIC_JOINT_STATES = "joint_states"               # sensor_msgs/JointState
TOPIC_ROBOT_DESCRIPTION = "robot_description"     # std_msgs/String, transient local
TOPIC_SPEED_SCALE = "cell/speed_scale"            # std_msgs/Float64 in [0, 1]
TOPIC_MOTION_PERMIT = "cell/motion_permit"        # std_msgs/Bool heartbeat; stale or False -> halt
# command outputs (reliable QoS)
TOPIC_JOINT_VELOCITY_CMD = "servo/joint_velocity_cmd"   # std_msgs/Float64MultiArray
TOPIC_JOINT_TRAJECTORY_CMD = "servo/joint_trajectory_cmd"  # trajectory_msgs/JointTrajectory
TOPIC_TWIST_CMD = "servo/twist_cmd"               # geometry_msgs/TwistStamped
# status outputs
TOPIC_STATUS = "servo/status"                     # std_msgs/String, JSON: see STATUS_FIELDS
TOPIC_FEATURE_ERROR = "servo/feature_error"       # std_msgs/Float64MultiArray, px [du1, dv1, ...]
TOPIC_ERROR_RMS = "servo/error_rms"               # std_msgs/Float64, pixels
TOPIC_CAMERA_TWIST = "servo/camera_twist"         # geometry_msgs/TwistStamped, camera optical frame
TOPIC_FEATURES = "servo/features"                 # std_msgs/Float64MultiArray, pixels [u1, v1, ...]
TOPIC_RUN_RESULT = "servo/run_result"             # std_msgs/String JSON, transient local
TOPIC_OVERLAY = "servo/overlay"                   # sensor_msgs/Image, optional
TOPIC_DIAGNOSTICS = "/diagnostics"                # diagnostic_msgs/DiagnosticArray
# services (std_srvs)
SRV_CAPTURE_REFERENCE = "servo/capture_reference"  # Trigger: current view -> reference file
SRV_ENABLE_MOTION = "servo/enable_motion"          # SetBool
SRV_START = "servo/start"                          # Trigger
SRV_STOP = "servo/stop"                            # Trigger

# --- simulated cell node (executable `vservo_sim`) ------------------------------------------
SIM_NODE = "vservo_sim"
TOPIC_SIM_CAMERA_POSE_TRUTH = "sim/camera_pose_truth"   # geometry_msgs/PoseStamped, base frame
TOPIC_SIM_TARGET_POSE_TRUTH = "sim/target_pose_truth"   # geometry_msgs/PoseStamped, base frame
TOPIC_SIM_TAUGHT_POSE = "sim/taught_camera_pose"        # geometry_msgs/PoseStamped, latched
# services (std_srvs/Trigger): move the simulated arm itself, at bounded speed, to the
# scenario's taught pose or back to its start pose; answered once the arm rests there
SRV_SIM_GO_TO_TAUGHT = "sim/go_to_taught_pose"
SRV_SIM_GO_TO_START = "sim/go_to_start_pose"

# --- run recorder node (executable `vservo_recorder`) --------------------------------------
RECORDER_NODE = "vservo_recorder"
TOPIC_LAST_BAG = "recorder/last_bag"      # std_msgs/String, transient local: last closed bag
TOPIC_RECORDER_READY = "recorder/ready"   # std_msgs/Bool, transient local: True once recording

# --- status record ---------------------------------------------------------------------------
# One JSON object per servo cycle on TOPIC_STATUS (and one row per cycle in headless runs).
STATUS_FIELDS = (
    "t",             # float, seconds (stamp of the image the cycle used)
    "run_id",        # str
    "state",         # str, one of SUPERVISOR_STATES
    "reason",        # str, '' or the halt/refusal reason
    "detail",        # str, '' or what the check that fired saw, with its figures
    "rms_px",        # float, RMS feature error in pixels
    "pose_error_mm",   # float, camera translation from the taught pose estimated from this
                       # frame's features (control.pose_error), mm; NaN when not estimated
    "pose_error_deg",  # float, ... and rotation, deg
    "n_matched",     # int
    "gain",          # float, 1/s, the scheduled gain used
    "sigma_min",     # float, judged singular value of the image Jacobian
    "damping",       # float, DLS damping applied
    "speed_scale",   # float in [0,1], supervisor speed scale
    "limits_acted",  # list[str], limits that shaped this cycle's command
    "limit_counts",  # dict[str, int], cumulative activations this run
    "cycle_ms",      # float, compute time of the cycle
    "dq",            # list[float], commanded joint velocities (rad/s or m/s) in joint order
)

# Result of a run on TOPIC_RUN_RESULT and in run records.
# final_pose_error_*: the camera's true pose against the true taught pose, from a simulator's
# ground truth (None on a real cell); estimated_pose_error_*: the servo's own estimate from the
# features, averaged over the last control.dwell_s (the arrival criterion in mm / deg), with the
# single-frame spread, the number of frames, the method (pnp or homography) and the
# disagreement with the first-order estimate (pose_estimate_check_*).
RESULT_FIELDS = (
    "run_id", "converged", "reason", "detail", "time_s", "final_rms_px",
    "final_pose_error_mm", "final_pose_error_deg",
    "estimated_pose_error_mm", "estimated_pose_error_deg",
    "estimated_pose_error_spread_mm", "estimated_pose_error_spread_deg",
    "estimated_pose_error_frames", "pose_estimate", "pose_estimate_check_mm",
    "pose_estimate_check_deg",
)

class State(StrEnum):
    """Supervisor states, in the order a normal run visits them. str-valued: a member equals
    its string and is published as it (``servo/status``, run results, bags)."""

    DISABLED = "disabled"     # motion not enabled: never commands anything but zero
    ARMED = "armed"           # motion enabled, waiting for start
    SERVOING = "servoing"     # closing the loop
    SETTLING = "settling"     # error below tolerance, waiting out the dwell time
    CONVERGED = "converged"   # run ended: goal reached, explicit zero sent
    BRAKING = "braking"       # a halt reason arrived: ramping the command to zero
    HALTED = "halted"         # run ended on a halt reason: explicit zero sent


#: The state names as plain strings, in the order a normal run visits them.
SUPERVISOR_STATES = tuple(state.value for state in State)
#: A run is in progress and its loop closed: stop and disable brake it.
RUN_STATES = (State.SERVOING, State.SETTLING)
#: The arm may move (a run in progress, or braking from one).
MOVING_STATES = (State.SERVOING, State.SETTLING, State.BRAKING)
#: A halt is under way or done (braking to zero, or halted).
HALT_STATES = (State.BRAKING, State.HALTED)
#: A run ended (goal reached or halted, explicit zero sent).
ENDED_STATES = (State.CONVERGED, State.HALTED)
#: A run may start from these (motion enabled, no run moving).
STARTABLE_STATES = (State.ARMED, State.CONVERGED, State.HALTED)


class HaltReason(StrEnum):
    """Why a run halted (published as the string in ``reason``); HALT_REASONS says each in
    words, vservo_node.record.halts.GUIDANCE gives causes and checks."""

    STOP_REQUESTED = "stop_requested"
    TOO_FEW_FEATURES = "too_few_features"
    IMAGE_STALE = "image_stale"
    JOINTS_STALE = "joints_stale"
    PERMIT_WITHDRAWN = "permit_withdrawn"
    CAMERA_INFO_INVALID = "camera_info_invalid"
    JOINT_LIMIT_ENVELOPE = "joint_limit_envelope"
    MOTION_ENVELOPE = "motion_envelope"
    TOO_CLOSE = "too_close"
    WRONG_DIRECTION = "wrong_direction"
    NOT_FOLLOWING = "not_following"
    DIVERGING = "diverging"
    INITIAL_ERROR_TOO_LARGE = "initial_error_too_large"
    RUN_TIMEOUT = "run_timeout"
    NUMERICAL_FAULT = "numerical_fault"
    MOTION_DISABLED = "motion_disabled"
    INTERNAL_ERROR = "internal_error"
    FRAMES_UNPAIRED = "frames_unpaired"
    IMAGE_JACOBIAN_SINGULAR = "image_jacobian_singular"
    SHUTDOWN = "shutdown"
    POSE_ESTIMATE_FAILED = "pose_estimate_failed"


# Halt reasons in words (published and logged once each), in HaltReason's order.
HALT_REASONS: dict[str, str] = {
    HaltReason.STOP_REQUESTED: "stop was requested",
    HaltReason.TOO_FEW_FEATURES: "fewer matched features than the minimum",
    HaltReason.IMAGE_STALE: "no fresh image",
    HaltReason.JOINTS_STALE: "no fresh joint state",
    HaltReason.PERMIT_WITHDRAWN: "the cell withdrew the motion permit",
    HaltReason.CAMERA_INFO_INVALID: "camera_info missing or inconsistent with the image",
    HaltReason.JOINT_LIMIT_ENVELOPE: "a joint reached its braking envelope",
    HaltReason.MOTION_ENVELOPE: "the tool left its motion envelope",
    HaltReason.TOO_CLOSE: "a feature came closer than the minimum camera distance",
    HaltReason.WRONG_DIRECTION: "features move against the motion the image Jacobian "
                                "predicts, or the joints against their command",
    HaltReason.NOT_FOLLOWING: "the arm is not following its command",
    HaltReason.DIVERGING: "the image error grows",
    HaltReason.INITIAL_ERROR_TOO_LARGE: "the first image error is above "
                                        "control.max_initial_error_px",
    HaltReason.RUN_TIMEOUT: "the run exceeded its maximum duration",
    HaltReason.NUMERICAL_FAULT: "a non-finite value reached the control law or the limiter",
    HaltReason.MOTION_DISABLED: "motion was disabled",
    HaltReason.INTERNAL_ERROR: "an unexpected error in the node (see its log)",
    HaltReason.FRAMES_UNPAIRED: "images arrive but none can be paired with a joint state "
                                "(their stamps and the joint states' do not overlap)",
    HaltReason.IMAGE_JACOBIAN_SINGULAR: "the image Jacobian stayed nearly singular: the "
                                        "features no longer determine the camera motion",
    HaltReason.SHUTDOWN: "the node was asked to shut down (signal or lifecycle) during a run",
    HaltReason.POSE_ESTIMATE_FAILED: "the decoupled scheme found no pose of the taught points "
                                     "in the current view",
}

# How a headless episode senses the target: render and perceive each image, or project the
# target's points with pixel noise (vservo_node/sim/projected.py).
SENSING_MODES = ("image", "projected")


def json_safe(value):
    """JSON-ready copy of a status record or run result: numpy scalars and arrays to Python,
    non-finite floats to None (JSON has no NaN), keys to text."""
    if isinstance(value, dict):
        return {str(k): json_safe(v) for k, v in value.items()}
    if hasattr(value, "tolist") and not isinstance(value, (bool, int, float, str)):
        value = value.tolist()       # numpy arrays and scalars
    if isinstance(value, (list, tuple)):
        return [json_safe(v) for v in value]
    if isinstance(value, float):
        return value if math.isfinite(value) else None
    return value
