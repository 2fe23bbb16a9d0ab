"""A headless episode (vservo_node.episode, run with ``record=True``) written as a run record:
the same rosbag2 layout and topics the recorder node writes, so ``vservo report`` and
``vservo compare`` open it like a run of the cell.

What the record holds, on the episode's own clock (its ``t``, seconds, as log times):
``servo/status`` (one record per output tick, as the node publishes it), the command
``servo/joint_velocity_cmd`` (the status records' ``dq``, chain order), ``joint_states`` (the
true joint positions at the ticks; no velocities: the report differentiates the positions),
the simulator's truth ``sim/camera_pose_truth`` and ``sim/taught_camera_pose`` (true arm),
``robot_description`` (the scenario's URDF), ``camera/camera_info`` and two camera frames
(JPEG, rendered by the simulated camera at the first and the last tick's joints);
``params.yaml`` (the episode's controller parameters with the scenario's robot frames and the
believed hand-eye), ``result.json`` (the servo's result, its own pose-error estimate and the
true pose error) and ``episode.json`` (where the episode came from); per camera frame with a
match, as the node publishes them, the features seen ``servo/features`` [u1, v1, ...], their
errors from the taught view ``servo/feature_error`` [du1, dv1, ...] and ``servo/error_rms``
(px), so the report marks the start and end frames and plots the error of each feature as for
a run of the cell. The status records' ``cycle_ms`` is the measured perception + servo time
of the frame before them (NaN on output ticks without a frame). With image sensing the taught
reference (its image and the taught joints) is kept in ``reference/`` as the recorder copies
it; a projected-sensing episode has no taught image to keep.
"""
from __future__ import annotations

import json
import math
from datetime import datetime, timezone
from pathlib import Path

import cv2
import numpy as np

from vservo_node import interface as itf
from vservo_node.control import frames
from vservo_node.record.bag import COMPRESSED_IMAGE, REFERENCE_DIR, RunRecorder

T0_NS = 10**9   # log time of t = 0 (rosbag2 readers dislike a zero start)


_json_safe = itf.json_safe


def write_record(root: Path, name: str, scenario, values: dict, result, notes: dict | None = None
                 ) -> Path:
    """Write ``result`` (an EpisodeResult with statuses and q_trace) of ``scenario`` run with
    controller parameters ``values`` as ``root/<name>/``; returns the folder."""
    if not result.statuses or result.q_trace is None:
        raise ValueError("the episode was run without record=True: nothing to write")
    from vservo_node.sim import SimCell

    ts = None
    arm_true = scenario.arm_model("true")
    names = list(arm_true.joint_names)
    T_belief = scenario.T_tool_camera_belief
    p = {**values, "robot.urdf_path": str(scenario.urdf_path),
         "robot.base_frame": scenario.base_frame, "robot.tool_frame": scenario.tool_frame,
         "robot.camera_frame": scenario.camera_frame,
         "robot.hand_eye": [*map(float, T_belief[:3, 3]),
                            *map(float, frames.matrix_to_quat(T_belief[:3, :3]))]}
    recorder = RunRecorder(root, name, params={"/vservo": {"ros__parameters": _json_safe(p)}},
                           started=datetime(2000, 1, 1, tzinfo=timezone.utc),
                           folder_name=name)
    with recorder as rec:
        ts = rec.typestore
        T = ts.types
        stamps = [float(s["t"]) for s in result.statuses]

        def ns(t):
            return T0_NS + int(round(t * 1e9))

        def header(t, frame=""):
            n = ns(t)
            return T["std_msgs/msg/Header"](
                stamp=T["builtin_interfaces/msg/Time"](sec=n // 10**9, nanosec=n % 10**9),
                frame_id=frame)

        def pose(t, T_base_x):
            qx, qy, qz, qw = frames.matrix_to_quat(T_base_x[:3, :3])
            x, y, z = T_base_x[:3, 3]
            return T["geometry_msgs/msg/PoseStamped"](
                header=header(t, scenario.base_frame), pose=T["geometry_msgs/msg/Pose"](
                    position=T["geometry_msgs/msg/Point"](x=float(x), y=float(y), z=float(z)),
                    orientation=T["geometry_msgs/msg/Quaternion"](
                        x=float(qx), y=float(qy), z=float(qz), w=float(qw))))

        rec.write(itf.TOPIC_ROBOT_DESCRIPTION, "std_msgs/msg/String",
                  T["std_msgs/msg/String"](data=Path(scenario.urdf_path).read_text()),
                  ns(stamps[0]))
        rec.write(itf.TOPIC_SIM_TAUGHT_POSE, "geometry_msgs/msg/PoseStamped",
                  pose(stamps[0], arm_true.camera_pose(scenario.q_taught)), ns(stamps[0]))
        layout = T["std_msgs/msg/MultiArrayLayout"](dim=[], data_offset=0)
        for t, status, q in zip(stamps, result.statuses, result.q_trace):
            rec.write(itf.TOPIC_STATUS, "std_msgs/msg/String",
                      T["std_msgs/msg/String"](data=json.dumps(_json_safe(status))), ns(t))
            rec.write(itf.TOPIC_JOINT_STATES, "sensor_msgs/msg/JointState",
                      T["sensor_msgs/msg/JointState"](
                          header=header(t), name=names, position=np.asarray(q, float),
                          velocity=np.zeros(0), effort=np.zeros(0)), ns(t))
            rec.write(itf.TOPIC_JOINT_VELOCITY_CMD, "std_msgs/msg/Float64MultiArray",
                      T["std_msgs/msg/Float64MultiArray"](
                          layout=layout, data=np.asarray(status["dq"], float)), ns(t))
            rec.write(itf.TOPIC_SIM_CAMERA_POSE_TRUTH, "geometry_msgs/msg/PoseStamped",
                      pose(t, arm_true.camera_pose(q)), ns(t))
        for t, _keys, uv, uv_ref in result.feature_trace:
            if not len(uv):   # the node publishes features only for a frame with a match
                continue
            error = uv - uv_ref
            rec.write(itf.TOPIC_FEATURES, "std_msgs/msg/Float64MultiArray",
                      T["std_msgs/msg/Float64MultiArray"](layout=layout, data=uv.ravel()), ns(t))
            rec.write(itf.TOPIC_FEATURE_ERROR, "std_msgs/msg/Float64MultiArray",
                      T["std_msgs/msg/Float64MultiArray"](layout=layout, data=error.ravel()),
                      ns(t))
            rec.write(itf.TOPIC_ERROR_RMS, "std_msgs/msg/Float64", T["std_msgs/msg/Float64"](
                data=float(np.sqrt(np.mean(np.sum(error ** 2, axis=1))))), ns(t))
        cam = scenario.camera
        cell = SimCell(scenario, q0=result.q_trace[0])
        info = cam.to_dict()
        rec.write(itf.TOPIC_CAMERA_INFO, "sensor_msgs/msg/CameraInfo", T[
            "sensor_msgs/msg/CameraInfo"](
                header=header(stamps[0], scenario.camera_frame), height=cam.height,
                width=cam.width, distortion_model=info.get("distortion_model", "plumb_bob"),
                d=np.asarray(info.get("d", []), float), k=np.asarray(info["k"], float),
                r=np.eye(3).ravel(), p=np.asarray(info["p"], float), binning_x=0, binning_y=0,
                roi=T["sensor_msgs/msg/RegionOfInterest"](x_offset=0, y_offset=0, height=0,
                                                          width=0, do_rectify=False)),
            ns(stamps[0]))
        for t, q in ((stamps[0], result.q_trace[0]), (stamps[-1], result.q_trace[-1])):
            rgb = cell.render_at(q, t)
            ok, jpeg = cv2.imencode(".jpg", cv2.cvtColor(rgb, cv2.COLOR_RGB2BGR),
                                    [cv2.IMWRITE_JPEG_QUALITY, 90])
            if ok:
                rec.write(itf.TOPIC_IMAGE_COMPRESSED, COMPRESSED_IMAGE, T[COMPRESSED_IMAGE](
                    header=header(t, scenario.camera_frame), format="rgb8; jpeg compressed bgr8",
                    data=np.frombuffer(jpeg.tobytes(), np.uint8)), ns(t))
        rec.set_result(_json_safe({
            "run_id": name, "converged": bool(result.converged), "reason": result.reason,
            "time_s": result.time_s, "final_rms_px": result.final_rms_px,
            "final_pose_error_mm": result.pose_error_mm,
            "final_pose_error_deg": result.pose_error_deg,
            # the servo's own estimate over its last dwell, as the node's run result has it
            **{k: getattr(result, k) for k in (
                "estimated_pose_error_mm", "estimated_pose_error_deg",
                "estimated_pose_error_spread_mm", "estimated_pose_error_spread_deg")}}))
    if getattr(result, "reference", None) is not None:
        from vservo_node.vision.reference import save_reference
        save_reference(result.reference, recorder.bag_dir / REFERENCE_DIR / "episode.yaml")
    (recorder.bag_dir / "episode.json").write_text(json.dumps(_json_safe(notes or {}),
                                                              indent=2) + "\n")
    return recorder.bag_dir
