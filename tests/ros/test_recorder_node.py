"""The run recorder node: run segmentation (pure logic), and a real recorder process fed by a
stub controller process, its bags read back by rosbags' AnyReader (an independent reader of
the rosbag2/MCAP formats) and its PNG images decoded by OpenCV."""
import json
import re
import sys
import signal
import textwrap
from dataclasses import dataclass, field
from pathlib import Path

import cv2
import numpy as np
import pytest
import yaml
from rosbags.highlevel import AnyReader
from std_msgs.msg import String

from vservo_node import interface as itf
from vservo_node.params import load_params_file
from vservo_node.record.bag import OPEN_DIR, default_typestore
from vservo_node.ros import harness, qos
from vservo_node.ros.recorder_node import TOPIC_LAST_BAG, RunSegmenter, type_name

URDF = Path(__file__).parents[1] / "control" / "data" / "planar3.urdf"
CYCLES = 20          # servo cycles of the stub's run r1, one message per topic each
IMAGE_EVERY = 2
TAIL_S = 0.3


# ------------------------------------------------------------------------ segmentation
def status(run_id, state):
    return {"run_id": run_id, "state": state}


def test_one_bag_per_run_closed_after_the_tail():
    seg = RunSegmenter(tail_s=0.5)
    assert seg.on_status(status("", "armed"), 0.0) == []
    assert not seg.on_result({"run_id": "r0", "converged": True}, 0.1)   # an earlier run's
    assert seg.on_status(status("r1", "servoing"), 1.0) == ["open"]
    assert seg.on_status(status("r1", "servoing"), 1.1) == []
    assert seg.on_status(status("r1", "settling"), 1.2) == []
    assert seg.on_result({"run_id": "r1", "converged": True}, 2.0)
    assert seg.on_status(status("r1", "converged"), 2.1) == []   # the tail runs from the result
    assert not seg.on_tick(2.49) and seg.recording
    assert seg.on_tick(2.5) and not seg.recording
    assert not seg.on_tick(3.0)
    assert seg.on_status(status("r1", "converged"), 3.1) == []   # no second close, no reopen
    assert not seg.on_tick(10.0)
    assert seg.on_status(status("r2", "servoing"), 11.0) == ["open"]


def test_status_end_closes_without_result_and_a_new_run_closes_the_old_bag():
    seg = RunSegmenter(tail_s=0.5)
    assert seg.on_status(status("r1", "braking"), 0.0) == ["open"]   # joined mid-run
    assert seg.on_status(status("r1", "halted"), 1.0) == []
    assert seg.on_status(status("r2", "servoing"), 1.2) == ["close", "open"]   # inside the tail
    assert not seg.on_tick(1.6) and seg.run_id == "r2"
    assert seg.on_result({"run_id": "r2"}, 2.0) and seg.on_tick(2.5)


def test_continuous_session_saves_results_and_never_closes():
    seg = RunSegmenter(tail_s=0.5, continuous=True)
    assert seg.recording
    assert seg.on_status(status("r1", "servoing"), 0.0) == []
    assert seg.on_result({"run_id": "r1"}, 1.0)
    assert seg.on_status(status("r2", "servoing"), 2.0) == []
    assert not seg.on_result({"run_id": "r1"}, 2.5)
    assert not seg.on_tick(100.0) and seg.recording


# ------------------------------------------------------------------------ processes
STUB = textwrap.dedent("""
    # Stub controller: node 'vservo' with parameters; run r1 of CYCLES cycles, then run r2
    # until stopped. Pre- and post-run messages must not reach the bag.
    import json, sys, threading, time
    import numpy as np, rclpy
    from rclpy.parameter import Parameter
    from geometry_msgs.msg import PoseStamped, TwistStamped
    from sensor_msgs.msg import CameraInfo, Image, JointState
    from std_msgs.msg import Float64, Float64MultiArray, String
    from trajectory_msgs.msg import JointTrajectory
    from vservo_node import interface as itf
    from vservo_node.ros import convert, harness, qos
    from vservo_node.vision.camera import CameraModel

    urdf, cycles, recorders = open(sys.argv[1]).read(), int(sys.argv[2]), int(sys.argv[3])
    reference_file = sys.argv[4]
    joints = ["p_j1", "p_j2", "p_j3"]
    rclpy.init()
    node = rclpy.create_node("vservo")
    for name, value in [("control.tolerance_px", 2.0), ("limits.joint_velocity_scale", 0.5),
                        ("robot.base_frame", "base_link"), ("robot.tool_frame", "ee"),
                        ("robot.min_joints", 3), ("robot.hand_eye", [0.0] * 6 + [1.0]),
                        ("reference.file", reference_file)]:
        node.declare_parameter(name, value)
    # declared with a type and no value, as the controller declares its empty-list defaults:
    # rclpy's GetParameters then answers nothing for a request that names it
    node.declare_parameter("io.command_joint_order", Parameter.Type.STRING_ARRAY)
    threading.Thread(target=rclpy.spin, args=(node,), daemon=True).start()   # parameter services
    topics = {itf.TOPIC_JOINT_STATES: (JointState, qos.STATE),
              itf.TOPIC_JOINT_VELOCITY_CMD: (Float64MultiArray, qos.COMMANDS),
              itf.TOPIC_JOINT_TRAJECTORY_CMD: (JointTrajectory, qos.COMMANDS),
              itf.TOPIC_TWIST_CMD: (TwistStamped, qos.COMMANDS),
              itf.TOPIC_STATUS: (String, qos.STATE),
              itf.TOPIC_FEATURE_ERROR: (Float64MultiArray, qos.STATE),
              itf.TOPIC_ERROR_RMS: (Float64, qos.STATE),
              itf.TOPIC_CAMERA_TWIST: (TwistStamped, qos.STATE),
              itf.TOPIC_FEATURES: (Float64MultiArray, qos.STATE),
              itf.TOPIC_RUN_RESULT: (String, qos.LATCHED),
              itf.TOPIC_CAMERA_INFO: (CameraInfo, qos.SENSOR_DATA),
              itf.TOPIC_IMAGE: (Image, qos.SENSOR_DATA),
              itf.TOPIC_ROBOT_DESCRIPTION: (String, qos.LATCHED),
              itf.TOPIC_SIM_CAMERA_POSE_TRUTH: (PoseStamped, qos.STATE),
              itf.TOPIC_SIM_TARGET_POSE_TRUTH: (PoseStamped, qos.STATE),
              itf.TOPIC_SIM_TAUGHT_POSE: (PoseStamped, qos.LATCHED)}
    pub = {t: node.create_publisher(c, t, q) for t, (c, q) in topics.items()}
    result = lambda run_id: String(data=json.dumps({
        "run_id": run_id, "converged": True, "reason": "", "time_s": 1.0,
        "final_rms_px": 0.1, "final_pose_error_mm": None, "final_pose_error_deg": None}))
    pub[itf.TOPIC_RUN_RESULT].publish(result("r0"))       # an earlier run's, latched
    pub[itf.TOPIC_ROBOT_DESCRIPTION].publish(String(data=urdf))
    pub[itf.TOPIC_SIM_TAUGHT_POSE].publish(convert.matrix_to_pose(np.eye(4), 0.0, "base_link"))
    for t in topics:
        harness.wait_until(lambda: node.count_subscribers(t) >= recorders, 30.0,
                           f"every recorder on {t}")
    time.sleep(1.5)            # the recorder fetches the parameters (it polls at 10 Hz)
    node.set_parameters([Parameter("control.tolerance_px", value=1.25)])   # an event
    camera = CameraModel.pinhole(32, 24, 30.0, 30.0, 15.5, 11.5)

    def send_status(run_id, state, k):
        pub[itf.TOPIC_STATUS].publish(String(data=json.dumps({
            "t": 0.05 * k, "run_id": run_id, "state": state, "reason": "",
            "rms_px": 10.0 * 0.8 ** k, "n_matched": 4, "gain": 1.0, "sigma_min": 0.5,
            "damping": 0.0, "speed_scale": 1.0, "limits_acted": [], "limit_counts": {},
            "cycle_ms": 2.0, "dq": [0.5, 0.0, 0.0]})))

    def send_joints(k):
        pub[itf.TOPIC_JOINT_STATES].publish(convert.joint_state(
            joints, [0.1 + 0.025 * k, 0.2, 0.3], [0.5, 0.0, 0.0], 0.05 * k))

    def send_cycle(k):
        send_joints(k)
        pixels = ((np.arange(24 * 32).reshape(24, 32) + 7 * k) % 256).astype(np.uint8)
        pub[itf.TOPIC_IMAGE].publish(convert.numpy_to_image(pixels, "mono8", float(k)))
        pub[itf.TOPIC_CAMERA_INFO].publish(convert.model_to_camera_info(camera, float(k)))
        error = [2.0 * 0.8 ** k] * 8
        pub[itf.TOPIC_FEATURE_ERROR].publish(Float64MultiArray(data=error))
        pub[itf.TOPIC_ERROR_RMS].publish(Float64(data=float(np.hypot(*error[:2]))))
        pub[itf.TOPIC_FEATURES].publish(Float64MultiArray(data=[10.0, 10.0, 20.0, 10.0,
                                                                20.0, 15.0, 10.0, 15.0]))
        twist = convert.vector_to_twist([0.01, 0, 0, 0, 0, 0.1], 0.05 * k)
        pub[itf.TOPIC_CAMERA_TWIST].publish(twist)
        pub[itf.TOPIC_TWIST_CMD].publish(twist)
        pub[itf.TOPIC_JOINT_VELOCITY_CMD].publish(convert.joint_array([0.5, 0, 0], joints))
        pub[itf.TOPIC_JOINT_TRAJECTORY_CMD].publish(
            convert.trajectory_point(joints, velocities=[0.5, 0, 0], time_from_start_s=0.01))
        for topic in (itf.TOPIC_SIM_CAMERA_POSE_TRUTH, itf.TOPIC_SIM_TARGET_POSE_TRUTH):
            pub[topic].publish(convert.matrix_to_pose(np.eye(4), 0.05 * k, "base_link"))
        send_status("r1", "servoing" if k < cycles - 4 else "settling", k)

    for k in range(3):                           # before the run: not recorded
        send_joints(k)
        send_status("", "armed", k)
        time.sleep(0.05)
    time.sleep(0.3)
    send_status("r1", "servoing", 0)             # the run starts: the bag opens
    time.sleep(0.3)
    for k in range(cycles):
        send_cycle(k)
        time.sleep(0.05)
    send_status("r1", "converged", cycles)
    pub[itf.TOPIC_RUN_RESULT].publish(result("r1"))
    time.sleep(2.0)                              # the tail ends and the bag closes
    for k in range(3):                           # after the run: not recorded
        send_joints(k)
        send_status("r1", "converged", cycles)
        time.sleep(0.05)
    print("r1 done", flush=True)
    k = 0
    while True:                                  # run r2 until stopped
        send_joints(k)
        send_status("r2", "servoing", k)
        k += 1
        time.sleep(0.05)
""")


@dataclass
class Recorder:
    """One recorder process of the session: its output folder, the paths it announced, its
    exit code and its log."""
    out: Path
    announced: list = field(default_factory=list)
    code: int | None = None
    log: str = ""


def start_recorder(out, *ros_args):
    return harness.start_module("vservo_node.ros.recorder_node", name=out.name, ros_args=[
        "-p", f"output_dir:={out}", "-p", "scenario:=stub test", *ros_args])


def stop(proc, sig):
    """Send ``sig`` and wait for the exit code (SIGINT and SIGTERM take the same path)."""
    proc.popen.send_signal(sig)
    code = proc.popen.wait(15.0)
    proc.stop()
    return code


@pytest.fixture(scope="module")
def session(ros_node, tmp_path_factory):
    """Three recorders and the stub: ``per_run`` (images decimated and PNG-encoded),
    ``continuous`` (record_continuously) and ``killed`` (no report); the last two with their
    node name and last_bag topic remapped. Run r1 ends normally; during r2 the recorders get
    SIGINT, SIGTERM and SIGKILL, the last once its r2 bag has a completed split."""
    station = tmp_path_factory.mktemp("station")
    (station / "s1.png").write_bytes(b"\x89PNG\r\n\x1a\n not really an image")
    (station / "s1.yaml").write_text(yaml.safe_dump({"format": "vservo_reference/1",
                                                    "name": "s1", "image": "s1.png"}))
    per_run = Recorder(tmp_path_factory.mktemp("runs"))
    continuous = Recorder(tmp_path_factory.mktemp("session"))
    killed = Recorder(tmp_path_factory.mktemp("killed"))
    runs_seen = set()
    last_bag_topics = ((TOPIC_LAST_BAG, per_run), ("session_recorder/last_bag", continuous),
                       ("killed_recorder/last_bag", killed))
    subs = [ros_node.create_subscription(String, topic, lambda m, r=r: r.announced.append(
                Path(m.data)), qos.LATCHED) for topic, r in last_bag_topics]
    subs.append(ros_node.create_subscription(
        String, itf.TOPIC_STATUS, lambda m: runs_seen.add(json.loads(m.data)["run_id"]),
        qos.STATE))
    procs = [start_recorder(per_run.out, "-p", f"image_every:={IMAGE_EVERY}",
                            "-p", "image_format:=png", "-p", f"tail_s:={TAIL_S}"),
             start_recorder(continuous.out, "-p", "record_continuously:=true",
                            "-r", "__node:=session_recorder",
                            "-r", f"{TOPIC_LAST_BAG}:={last_bag_topics[1][0]}"),
             start_recorder(killed.out, "-p", "make_report:=false",
                            "-r", "__node:=killed_recorder",
                            "-r", f"{TOPIC_LAST_BAG}:={last_bag_topics[2][0]}")]
    try:
        for topic, _ in last_bag_topics:
            harness.wait_for_publisher(ros_node, topic, 30.0, procs)
        procs.append(harness.NodeProcess([sys.executable, "-c", STUB, str(URDF), str(CYCLES),
                                          str(len(last_bag_topics)), str(station / "s1.yaml")],
                                         "stub"))
        harness.spin_until(ros_node, lambda: len(per_run.announced) == 1
                           and len(killed.announced) == 1, 60.0, "the bags of run r1", procs)
        harness.spin_until(ros_node, lambda: "r2" in runs_seen, 20.0, "run r2", procs)
        harness.wait_until(lambda: any(completed_splits(b) for b in killed.out.iterdir()
                                       if b not in killed.announced), 10.0,
                           "a completed split in the r2 bag of 'killed'", procs)
        per_run.code = stop(procs[0], signal.SIGINT)
        continuous.code = stop(procs[1], signal.SIGTERM)
        killed.code = stop(procs[2], signal.SIGKILL)
        harness.spin_until(ros_node, lambda: len(per_run.announced) == 2
                           and len(continuous.announced) == 1, 5.0, "the bags closed at exit")
    finally:
        for proc in procs:
            proc.stop()
        for sub in subs:
            ros_node.destroy_subscription(sub)
    for rec, proc in zip((per_run, continuous, killed), procs):
        rec.log = proc.output()
    yield per_run, continuous, killed
    for proc in procs:
        proc.remove_log()


def completed_splits(bag):
    """The split files metadata.yaml lists (RunRecorder lists only closed ones)."""
    try:
        info = yaml.safe_load((bag / "metadata.yaml").read_text())
    except (OSError, yaml.YAMLError):
        return []
    return info["rosbag2_bagfile_information"]["relative_file_paths"]


def read_bag(path):
    """{topic: (type, [(log time ns, message), ...])} through rosbags' AnyReader."""
    topics = {}
    with AnyReader([path], default_typestore=default_typestore()) as reader:
        for conn, stamp, raw in reader.messages():
            _, msgs = topics.setdefault(conn.topic, (conn.msgtype, []))
            msgs.append((stamp, reader.deserialize(raw, conn.msgtype)))
    return topics


def test_one_bag_per_run_named_by_time_and_scenario(session):
    rec = session[0]
    assert rec.code == 0, rec.log
    assert len(rec.announced) == 2 and all(p.parent == rec.out for p in rec.announced)
    assert sorted(rec.out.iterdir()) == sorted(rec.announced)
    for path in rec.announced:
        assert re.fullmatch(r"\d{8}T\d{6}Z_stub_test(-\d+)?", path.name), path.name


def test_run_bag_holds_the_run_topics_types_and_counts(session):
    bag = session[0].announced[0]
    got = read_bag(bag)
    n = CYCLES
    expected = {  # topic -> (type, count): every cycle message, the start and end status,
        # the run's result, the latched topics once; images decimated and PNG-encoded
        "/servo/status": ("std_msgs/msg/String", n + 2),
        "/servo/run_result": ("std_msgs/msg/String", 1),
        "/joint_states": ("sensor_msgs/msg/JointState", n),
        "/camera/camera_info": ("sensor_msgs/msg/CameraInfo", n),
        "/servo/feature_error": ("std_msgs/msg/Float64MultiArray", n),
        "/servo/error_rms": ("std_msgs/msg/Float64", n),
        "/servo/features": ("std_msgs/msg/Float64MultiArray", n),
        "/servo/camera_twist": ("geometry_msgs/msg/TwistStamped", n),
        "/servo/twist_cmd": ("geometry_msgs/msg/TwistStamped", n),
        "/servo/joint_velocity_cmd": ("std_msgs/msg/Float64MultiArray", n),
        "/servo/joint_trajectory_cmd": ("trajectory_msgs/msg/JointTrajectory", n),
        "/sim/camera_pose_truth": ("geometry_msgs/msg/PoseStamped", n),
        "/sim/target_pose_truth": ("geometry_msgs/msg/PoseStamped", n),
        "/robot_description": ("std_msgs/msg/String", 1),
        "/sim/taught_camera_pose": ("geometry_msgs/msg/PoseStamped", 1),
    }
    images = got.pop("/camera/image/compressed")
    assert {t: (kind, len(msgs)) for t, (kind, msgs) in got.items()} == expected
    states = [json.loads(m.data)["state"] for _, m in got["/servo/status"][1]]
    assert states[0] == "servoing" and states[-1] == "converged"
    assert {json.loads(m.data)["run_id"] for _, m in got["/servo/status"][1]} == {"r1"}
    assert json.loads(got["/servo/run_result"][1][0][1].data)["run_id"] == "r1"
    # joints by name, in the order sent
    q = [m.position[0] for _, m in got["/joint_states"][1]]
    assert np.allclose(q, 0.1 + 0.025 * np.arange(n))
    start = got["/servo/status"][1][0][0]
    assert all(stamp >= start for _, msgs in got.values() for stamp, _ in msgs)
    # Images: sensor-data QoS is best effort, so allow one lost frame; decimation keeps every
    # second frame received (never two neighbours). Pixels must survive PNG exactly
    # (PNG is lossless: W3C, Portable Network Graphics Specification, 2003, sec. 1).
    kind, msgs = images
    assert kind == "sensor_msgs/msg/CompressedImage"
    frames = [m.header.stamp.sec for _, m in msgs]
    assert n // IMAGE_EVERY - 1 <= len(frames) <= n // IMAGE_EVERY, frames
    assert np.all(np.diff(frames) >= IMAGE_EVERY), frames
    for k, (_, m) in zip(frames, msgs):
        assert m.format.startswith("mono8; png")
        decoded = cv2.imdecode(np.asarray(m.data, np.uint8), cv2.IMREAD_UNCHANGED)
        sent = ((np.arange(24 * 32).reshape(24, 32) + 7 * k) % 256).astype(np.uint8)
        assert np.array_equal(decoded, sent)


def test_run_bag_has_result_controller_params_and_report(session):
    bag = session[0].announced[0]
    result = json.loads((bag / "result.json").read_text())
    assert result["run_id"] == "r1" and result["converged"] is True
    params = load_params_file(bag / "params.yaml", "vservo")
    assert params["robot.hand_eye"] == [0.0] * 6 + [1.0]      # a received double array
    assert params["control.tolerance_px"] == 1.25              # changed after the fetch
    assert params["robot.base_frame"] == "base_link"           # the set ones despite ...
    assert "io.command_joint_order" not in params              # ... an unset one, left out
    metrics = json.loads((bag / "report" / "metrics.json").read_text())
    assert (bag / "report" / "report.html").is_file()
    assert metrics["run_id"] == "r1" and metrics["converged"] is True
    assert metrics["tolerance_px"] == 1.25 and metrics["n_cycles"] == CYCLES + 2
    # The report used the recorded URDF (joint speed limit 2.0 rad/s, planar3.urdf) and the
    # recorded parameters (scale 0.5): peak ratio 0.5 / (2.0 * 0.5) = 0.5.
    assert metrics["peak_joint_speed_ratio"] == pytest.approx(0.5)
    # the controller's reference.file and the image it names, copied into the bag
    station = Path(params["reference.file"]).parent
    for name in ("s1.yaml", "s1.png"):
        assert (bag / "reference" / name).read_bytes() == (station / name).read_bytes()


def test_interrupted_run_bag_is_closed_cleanly(session):
    rec = session[0]
    bag = rec.announced[1]
    assert not (bag / OPEN_DIR).exists()
    got = read_bag(bag)
    assert {json.loads(m.data)["run_id"] for _, m in got["/servo/status"][1]} == {"r2"}
    assert len(got["/joint_states"][1]) >= 1
    assert not (bag / "result.json").exists() and not (bag / "report").exists()
    assert "no report for" in rec.log


def test_continuous_session_is_one_bag_of_everything(session):
    """record_continuously: one bag from start to SIGTERM, runs and idle time alike; the
    remapped last_bag topic names it; result.json is the last ended run's."""
    rec = session[1]
    assert rec.code == 0, rec.log
    assert len(rec.announced) == 1 and list(rec.out.iterdir()) == rec.announced
    bag = rec.announced[0]
    got = read_bag(bag)
    run_ids = [json.loads(m.data)["run_id"] for _, m in got["/servo/status"][1]]
    assert run_ids[:3] == ["", "", ""] and {"r1", "r2"} <= set(run_ids)
    assert len(got["/joint_states"][1]) > 3 + CYCLES + 3         # before, in, after r1, r2
    assert [json.loads(m.data)["run_id"] for _, m in got["/servo/run_result"][1]] == \
        ["r0", "r1"]                                          # latched r0 arrives too
    # JPEG by default (image_format), not decimated
    images = got["/camera/image/compressed"][1]
    assert len(images) >= CYCLES - 1 and images[0][1].format.startswith("mono8; jpeg")
    assert json.loads((bag / "result.json").read_text())["run_id"] == "r1"
    assert "control.tolerance_px" in load_params_file(bag / "params.yaml", "vservo")
    assert not (bag / "report").exists() and not (bag / OPEN_DIR).exists()


def test_type_names_match_the_typestore():
    """type_name gives the names rosbags' Jazzy typestore knows (so the bag can be read)."""
    from geometry_msgs.msg import TwistStamped
    from sensor_msgs.msg import CameraInfo
    store = default_typestore()
    for cls in (TwistStamped, CameraInfo, String):
        assert type_name(cls) in store.types


def test_invalid_parameters_refuse_to_start_naming_the_problem(tmp_path):
    harness.require_isolation()
    procs = {"image_format must be one of": start_recorder(tmp_path, "-p", "image_format:=gif"),
             "image_every out of range": start_recorder(tmp_path, "-p", "image_every:=0")}
    for expected, proc in procs.items():
        assert proc.popen.wait(30.0) == 2, proc.describe()
        assert expected in proc.output(), proc.describe()
        proc.stop()
        proc.remove_log()
    assert list(tmp_path.iterdir()) == []


def test_sigkill_keeps_the_completed_splits(session):
    """After SIGKILL the r2 bag is readable up to its last completed split; r1's is whole."""
    rec = session[2]
    assert rec.code == -signal.SIGKILL
    (r1,) = rec.announced
    (r2,) = [b for b in rec.out.iterdir() if b != r1]
    assert not (r1 / OPEN_DIR).exists() and (r1 / "result.json").is_file()
    got = read_bag(r2)
    assert {json.loads(m.data)["run_id"] for _, m in got["/servo/status"][1]} == {"r2"}
    assert len(got["/joint_states"][1]) >= 1
