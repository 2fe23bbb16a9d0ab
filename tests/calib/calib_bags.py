"""Bags of the SIMULATED bench cell for the calib tests (invented data), written with the
project's RunRecorder in the topics the cell and the controller publish:

- ``write_calibration_bag``: what ``ros2 bag record`` of a cell gives while someone moves the
  arm between poses and holds it still at each: joint states at 100 Hz, raw rgb8 camera
  frames at 10 Hz (during the moves too), camera_info and robot_description.
- ``write_run_bag``: a servo run as the recorder node keeps it, from a headless episode's
  trace: joint states and ``servo/features`` (pixels) at the frame times,
  ``servo/joint_velocity_cmd`` at the output ticks, camera_info, params.yaml and the taught
  reference's keys and depths.
"""
from __future__ import annotations

import json
from datetime import UTC, datetime
from pathlib import Path

import numpy as np

from vservo_node import interface as itf
from vservo_node.calib.handeye import xyz_quat
from vservo_node.record.bag import IMAGE, RunRecorder
from vservo_node.yaml_files import dump_yaml

T0_NS = 10**9


def _ns(t):
    return T0_NS + round(t * 1e9)


def _header(T, t, frame=""):
    n = _ns(t)
    return T["std_msgs/msg/Header"](
        stamp=T["builtin_interfaces/msg/Time"](sec=n // 10**9, nanosec=n % 10**9), frame_id=frame)


def _camera_info(T, cam, t):
    info = cam.to_dict()
    return T["sensor_msgs/msg/CameraInfo"](
        header=_header(T, t, "camera_optical_frame"), height=cam.height, width=cam.width,
        distortion_model=info.get("distortion_model", "plumb_bob"),
        d=np.asarray(info.get("d", []), float), k=np.asarray(info["k"], float),
        r=np.eye(3).ravel(), p=np.asarray(info["p"], float), binning_x=0, binning_y=0,
        roi=T["sensor_msgs/msg/RegionOfInterest"](x_offset=0, y_offset=0, height=0, width=0,
                                                  do_rectify=False))


def _joints(T, names, q, t):
    return T["sensor_msgs/msg/JointState"](header=_header(T, t), name=list(names),
                                           position=np.asarray(q, float),
                                           velocity=np.zeros(0), effort=np.zeros(0))


def write_calibration_bag(root: Path, scenario, qs, rest_s=0.6, move_s=0.5) -> Path:
    """Rest ``rest_s`` at each joint vector of ``qs``, move linearly ``move_s`` to the next."""
    from vservo_node.sim import SimCell

    cell = SimCell(scenario)
    names = scenario.joint_names
    plan = []          # (t, q)
    t = 0.0
    for i, q in enumerate(qs):
        for k in range(int(rest_s * 100)):
            plan.append((t + k * 0.01, q))
        t += rest_s
        if i + 1 < len(qs):
            for k in range(int(move_s * 100)):
                s = k / (move_s * 100)
                plan.append((t + k * 0.01, (1 - s) * q + s * qs[i + 1]))
            t += move_s
    with RunRecorder(root, "calibration", started=datetime(2000, 1, 1, tzinfo=UTC),
                     folder_name="calibration") as rec:
        T = rec.typestore.types
        rec.write(itf.TOPIC_ROBOT_DESCRIPTION, "std_msgs/msg/String",
                  T["std_msgs/msg/String"](data=Path(scenario.urdf_path).read_text()), _ns(0))
        rec.write(itf.TOPIC_CAMERA_INFO, "sensor_msgs/msg/CameraInfo",
                  _camera_info(T, scenario.camera, 0.0), _ns(0))
        for k, (t, q) in enumerate(plan):
            rec.write(itf.TOPIC_JOINT_STATES, "sensor_msgs/msg/JointState",
                      _joints(T, names, q, t), _ns(t))
            if k % 10 == 5:
                rgb = cell.render_at(q, t)
                rec.write(itf.TOPIC_IMAGE, IMAGE, T[IMAGE](
                    header=_header(T, t, "camera_optical_frame"), height=rgb.shape[0],
                    width=rgb.shape[1], encoding="rgb8", is_bigendian=0, step=rgb.shape[1] * 3,
                    data=np.ascontiguousarray(rgb).reshape(-1)), _ns(t))
    return rec.bag_dir


def write_run_bag(root: Path, scenario, recorder, values: dict, perception_s=None,
                  name: str = "run") -> Path:
    """A run record of a headless episode's ``TraceRecorder`` (controller parameters
    ``values``: io.output_rate_hz and the rest, with the believed hand-eye). With
    ``perception_s`` (one delay per frame, s) the features are logged that long after the
    frame's capture, as a loaded node publishes them, and a status record with the frame's
    stamp (``t``, s since the epoch like a node's clock) is logged 1 ms later."""
    trace = recorder.trace()
    names = scenario.joint_names
    T_belief = scenario.T_tool_camera_belief
    params = {**values, "robot.urdf_path": str(scenario.urdf_path),
              "robot.base_frame": scenario.base_frame, "robot.tool_frame": scenario.tool_frame,
              "robot.camera_frame": scenario.camera_frame, "robot.hand_eye": xyz_quat(T_belief),
              "target.file": str(scenario.target.source or scenario.target.name)}
    params = {k: (v.tolist() if isinstance(v, np.ndarray) else v) for k, v in params.items()}
    with RunRecorder(root, name, params={"/vservo": {"ros__parameters": params}},
                     started=datetime(2000, 1, 1, tzinfo=UTC),
                     folder_name=name) as rec:
        T = rec.typestore.types
        rec.write(itf.TOPIC_CAMERA_INFO, "sensor_msgs/msg/CameraInfo",
                  _camera_info(T, scenario.camera, 0.0), _ns(0))
        layout = T["std_msgs/msg/MultiArrayLayout"](dim=[], data_offset=0)
        for i, (t, xy, q) in enumerate(zip(trace.t, trace.xy, trace.q)):
            uv = scenario.camera.normalized_to_pixels(xy)
            rec.write(itf.TOPIC_JOINT_STATES, "sensor_msgs/msg/JointState",
                      _joints(T, names, q, t), _ns(t))
            late = 0.0 if perception_s is None else float(perception_s[i])
            rec.write(itf.TOPIC_FEATURES, "std_msgs/msg/Float64MultiArray",
                      T["std_msgs/msg/Float64MultiArray"](layout=layout,
                                                          data=np.asarray(uv, float).ravel()),
                      _ns(t + late))
            if perception_s is not None:
                status = {"t": T0_NS * 1e-9 + float(t), "state": "servoing"}
                rec.write(itf.TOPIC_STATUS, "std_msgs/msg/String",
                          T["std_msgs/msg/String"](data=json.dumps(status)), _ns(t + late + 1e-3))
        for t, dq in zip(trace.t_cmd, trace.dq_cmd):
            rec.write(itf.TOPIC_JOINT_VELOCITY_CMD, "std_msgs/msg/Float64MultiArray",
                      T["std_msgs/msg/Float64MultiArray"](layout=layout,
                                                          data=np.asarray(dq, float)), _ns(t))
        depths = np.nanmean(trace.depth, axis=0)
        reference = {"name": "station", "target": scenario.target.name,
                     "kind": scenario.target.kind,
                     "features": [{"key": list(k), "depth": float(z)}
                                  for k, z in zip(recorder.keys, depths)]}
        path = Path(root) / "station.yaml"
        path.write_text(dump_yaml(reference, sort_keys=False))
        rec.copy_reference(path)
    return rec.bag_dir
