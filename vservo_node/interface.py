"""Names and record layouts shared by the nodes, the recorder and the report tools.

Pure constants (no rclpy), so the functional core and the offline tools agree with the nodes.
Topic names are relative so that users remap them; `~/` names live under the node's name.
"""
from __future__ import annotations

import math

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
TOPIC_FEATURE_ERROR = "servo/feature_error"       # std_msgs/Float64MultiArray, pixels [du1, dv1, ...]
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

# Supervisor states, in the order a normal run visits them.
SUPERVISOR_STATES = (
    "disabled",   # motion not enabled: never commands anything but zero
    "armed",      # motion enabled, waiting for start
    "servoing",   # closing the loop
    "settling",   # error below tolerance, waiting out the dwell time
    "converged",  # run ended: goal reached, explicit zero sent
    "braking",    # a halt reason arrived: ramping the command to zero
    "halted",     # run ended on a halt reason: explicit zero sent
)

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
