"""The controller node (executable ``vservo_node``, node name ``vservo``): camera images and
joint states in, limited joint (or Cartesian) commands out, with a supervisor users drive
through four services. A thin shell: ``vservo_node.perception`` turns images into
observations and ``vservo_node.servo.Servo`` decides every command.

A managed (lifecycle) node: ``vservo_node.ros.controller.node`` says what configure,
activate, deactivate, cleanup and shutdown do; the code is split along that lifecycle in
``vservo_node/ros/controller/``. Entry points (parameters from ``--ros-args``, every entry
of ``vservo_node.params.SCHEMA``, usually from a file: ``--params-file
config/vservo_sim.yaml``):

- ``main_managed`` (console script ``vservo_managed``; ``python -m
  vservo_node.ros.controller_managed``): starts ``unconfigured`` and waits for a lifecycle
  manager (the launch files, ``ros2 lifecycle set``, ``vservo demo``) to configure and
  activate it over the lifecycle_msgs services (``vservo/change_state``).
- ``main`` (console script ``vservo_node``; ``python -m vservo_node.ros.controller_node``):
  the same node, configured and activated by itself at start, for users without lifecycle
  tooling.

Either way the node starts with motion disabled: motion needs ``servo/enable_motion`` and
``servo/start`` once it is active. Deactivating brakes a moving run and publishes its explicit
zero before the output thread stops; the supervisor services refuse enable, start and capture
while the node is not active.

Parameters
    Declared with descriptors (description, unit, range, choices, read-only). File values are
    checked with ``params.validate`` at start: every error is logged, an invalid value falls
    back to its default, and enabling motion is refused until the problems are gone (unknown
    names in the file count as problems: a typo must not silently drop a limit). Live changes
    go through ``params.check_change``: out-of-range values are refused with the reason and the
    old value is kept; while motion is enabled the limits marked "tighten" may only tighten
    (and ``io.require_permit`` may only be switched on); ``target.file``, ``reference.file`` and
    ``depth.source`` are refused while a run moves. Read-only (restart to change): ``robot.*``,
    ``robot_description``, ``io.command_interface``, ``io.command_joint_order``,
    ``io.output_rate_hz``, ``io.compressed_image``, ``io.image_rectified``. Accepted changes
    apply at once: servo settings and the LimitSet are rebuilt in place (the limiter keeps its
    previous command, so a lowered limit is reached through the deceleration limit).

Inputs (relative names, remap them; ``vservo_node.interface``)
    ``camera/image`` (sensor_msgs/Image, read as a view of the serialized bytes, no copy, for
    bgr8/mono8/mono16) or ``camera/image/compressed`` when ``io.compressed_image``; sensor-data
    QoS. ``camera/camera_info`` (sensor-data QoS). ``joint_states`` (joints matched by name;
    best-effort subscription, so reliable and best-effort publishers both match).
    ``camera/depth`` (aligned, 16UC1 mm or 32FC1 m) when ``depth.source`` is
    ``depth_image``. Robot model: the file ``robot.urdf_path``, else the ``robot_description``
    parameter, else the ``robot_description`` topic (std_msgs/String, transient local).
    ``cell/speed_scale`` (std_msgs/Float64, clipped to [0, 1]) scales every speed limit.
    ``cell/motion_permit`` (std_msgs/Bool heartbeat) when ``io.require_permit``.
    ``sim/camera_pose_truth`` and ``sim/taught_camera_pose`` (with ``io.sim_truth`` only) fill the
    pose error of the run result.
    Image time = header stamp + ``io.camera_time_offset_s``. The last second of joint states is
    kept and each image is evaluated at the joints interpolated at its time.
    At the edge: joint states and images stamped more than ``io.stamp_tolerance_s`` from the
    node's clock (either way), joint states with non-finite positions (these also halt a
    moving run ``numerical_fault``), undecodable or empty frames are refused, counted
    (``inputs_refused`` in the diagnostics) and logged (throttled); they never reach the
    servo and never replace good joint history. An image newer than the newest joint state
    by more than ``io.joint_state_timeout_s`` or older than the kept second cannot be paired.

Clocks
    The servo runs on one clock, the node's steady clock: run start, every output tick, frame
    receipt, and so every timeout and the run time. Stamps (ROS time, simulated with
    use_sim_time) only pair images with joint states and are checked against the node's ROS
    clock.

Cycle
    One executor thread runs every subscription, the diagnostics timer, the services and the
    lifecycle transitions; the image callback only hands the serialized image to a perception
    thread through a one-frame slot (the newest frame wins; replaced frames are counted in the
    diagnostics). That thread decodes it (a view of the bytes for bgr8/mono8/mono16), runs
    perception outside the servo lock, then ``servo.observe(obs, q(t_image), t_image)`` under
    it; feature topics are published for every processed image, moving or not. The output
    thread (``output_loop.OutputLoop``, steady clock, from activate to deactivate) ticks at
    ``io.output_rate_hz``: the watchdogs, then ``servo.command(q_latest, t, 1 /
    io.output_rate_hz)``; it publishes the command while a run moves (servoing, settling,
    braking). When a run ends (converged or halted) one explicit zero is published and nothing
    more until the next start: a velocity controller holds the last command it got, and a node
    that is disabled or armed never publishes on the command topic.

Commands (reliable QoS, ``io.command_interface``)
    ``joint_velocity``: std_msgs/Float64MultiArray on ``servo/joint_velocity_cmd``, rad/s (m/s
    for prismatic joints) in ``io.command_joint_order`` (default: chain order; names off the
    chain get 0). ``joint_trajectory``: trajectory_msgs/JointTrajectory on
    ``servo/joint_trajectory_cmd``, one point per cycle, header stamp zero (start now),
    positions integrated from the previous commanded position (the measured one only at the
    start of a run), velocities the command, time_from_start one output period; braking sends
    the decelerating points, the end a point at rest. ``tool_twist`` / ``camera_twist``:
    geometry_msgs/TwistStamped on ``servo/twist_cmd`` [v; w] of the tool origin in
    ``robot.base_frame`` axes / of the camera in its optical frame, computed from the limited
    joint command. With a Cartesian interface the downstream controller owns the joint
    velocity, acceleration and position limits and its own braking; this node still limits the
    joint command it derives the twist from, but cannot see what the arm does with it.

Watchdogs (steady clock, judged by receipt time, so they work while /clock stalls; they act
only while a run moves, through ``servo.halt``, and name what they saw in the halt detail):
no usable image (decoded, stamp sane, size matching camera_info) for ``io.image_timeout_s`` ->
``image_stale``; no usable joint state for ``io.joint_state_timeout_s`` -> ``joints_stale``;
usable images none of which could be paired with a joint state for ``io.image_timeout_s`` ->
``frames_unpaired`` (with the measured skew);
with ``io.require_permit`` no True on ``cell/motion_permit`` within ``io.permit_timeout_s`` (or
a False) -> ``permit_withdrawn``; camera_info missing, refused, changed during a run, or of
another size than the images -> ``camera_info_invalid``. An unexpected exception in a callback
is logged and halts a moving run with ``internal_error``; the output tick never raises (an
error inside it brakes blind from the last command, ``Servo.brake_blind``, and publishes the
zero). The servo itself judges the run timeout, the motion envelope, the follow checks and
"no observation for io.image_timeout_s" on every output tick, so none of them depends on a
frame being paired. Each halt reason is logged once per run, with its detail, and appears in
the status.

Shutdown
    SIGINT or SIGTERM (once or repeated, to the process or its group, as a terminal Ctrl-C
    under ``ros2 launch`` sends them) asks for a stop (``node_main.run_node``): the node keeps
    spinning while a moving run brakes (reason ``shutdown``) and its explicit zero goes out
    (at most 3 s), refuses enable and start meanwhile, waits up to 0.5 s for the arm's
    controller to acknowledge the last command, and exits 0 without a traceback.

Outputs
    ``servo/status`` (std_msgs/String, JSON object with ``interface.STATUS_FIELDS``) once per
    image while the servo exists (``t`` = image time, ``cycle_ms`` = perception + servo time)
    and on every state or reason change (``t`` = node time); non-finite numbers are null.
    ``servo/feature_error`` [du1, dv1, ...] px and ``servo/error_rms`` px (current minus taught
    pixels), ``servo/features`` [u1, v1, ...] px, per image with a match; ``servo/camera_twist``
    (TwistStamped, camera optical frame) per output cycle while moving; ``servo/run_result``
    (std_msgs/String JSON with ``interface.RESULT_FIELDS``, transient local) once per run end;
    ``/diagnostics`` at 1 Hz; ``servo/overlay`` (bgr8) when ``io.publish_overlay`` and someone
    subscribes.

Services (std_srvs; every refusal names the failing checks in ``message``, as
``check: detail``, and is logged)
    ``servo/enable_motion`` (SetBool). true: checks ``parameters`` (valid), ``robot_model``
    (loaded), ``servo`` (built from both), ``reference`` (loaded, with depths when
    ``depth.source`` is ``taught``), ``inputs`` (image, camera_info consistent, joint states
    fresh), ``command_topic`` (a subscriber, and no publisher but this node), ``permit`` (when
    required). false: always accepted.
    ``servo/start`` (Trigger): checks ``state`` (enabled, no run moving), the inputs, command
    topic and permit as above, ``reference``, ``features`` (at least ``control.min_features``
    matched in a fresh image) and ``initial_error`` (RMS <= ``control.max_initial_error_px``).
    ``servo/stop`` (Trigger): brakes a moving run (reason ``stop_requested``).
    ``servo/capture_reference`` (Trigger): the current view (a fresh image) is taught, written to
    ``reference.directory``/``reference.name``.yaml, and loaded (``reference.file`` is set to
    it); refused while a run moves.

State x service (states: ``interface.SUPERVISOR_STATES``; "checks": the checks above pass or
the call is refused naming them; "ok": accepted, state unchanged; every call answers at once):

=================  ===============  ===================  ===========  ================  ==========
state              enable true      enable false         start        stop              capture
=================  ===============  ===================  ===========  ================  ==========
disabled           checks, armed    ok                   refused      ok                checks,
                                                                                        loaded
armed              ok               disabled             checks,      ok                checks,
                                                         servoing                       loaded
servoing,          ok               braking              refused      braking           refused
settling                            (motion_disabled),                (stop_requested),
                                    halted, disabled                  halted
braking            ok               ok, ends halted,     refused      ok                refused
                                    then disabled
converged,         ok               disabled             checks,      ok                checks,
halted                                                   servoing                       loaded
=================  ===============  ===================  ===========  ================  ==========

Before the robot model and valid parameters exist there is no servo: enable and start are
refused (naming the missing piece), stop and enable false succeed doing nothing.
"""
from __future__ import annotations

import sys

from vservo_node.interface import json_safe  # noqa: F401 - kept here for callers of this module
from vservo_node.ros.controller.inputs import FrameSlot, JointHistory  # noqa: F401
from vservo_node.ros.controller.node import ControllerNode
from vservo_node.ros.controller.outputs import CommandOutput  # noqa: F401
from vservo_node.ros.controller.parameters import READ_ONLY, descriptor, ros_type  # noqa: F401
from vservo_node.ros.node_main import install_signal_handlers, run_node


def _run(program: str, autostart: bool, args=None) -> int:
    # Our own signal handling: the context must outlive SIGINT/SIGTERM long enough to send the
    # explicit zero of a run in progress.
    install_signal_handlers()
    run_node(program, ControllerNode, ControllerNode.shutdown, args, own_signals=True,
             start=ControllerNode.autostart if autostart else None,
             finish=ControllerNode.finish_for_shutdown)
    # stopped: run_node leaves SIGINT/SIGTERM ignored while the interpreter finalizes
    return 0


def main(args=None) -> int:
    """Console entry point of ``vservo_node``: the node, configured and activated at start."""
    return _run("vservo_node", True, args)


def main_managed(args=None) -> int:
    """Console entry point of ``vservo_managed``: the node, left unconfigured for a lifecycle
    manager."""
    return _run("vservo_managed", False, args)


if __name__ == "__main__":
    sys.exit(main())
