"""Run bags against independent readers: rosbags (Ternaris, rosbags 0.11.9, AnyReader) and the
mcap package (Foxglove, mcap 1.6.0, make_reader); metadata.yaml against the file rosbags' own
Writer produces; type hashes against those the ROS message packages ship. Runs are SYNTHETIC
TEST DATA (synthetic.py)."""
from __future__ import annotations

import json
import shutil
import signal
import subprocess
import sys
import time
from collections import Counter
from pathlib import Path

import cv2
import numpy as np
import pytest
import yaml
from mcap.reader import make_reader
from rosbags.highlevel import AnyReader
from rosbags.rosbag2 import StoragePlugin, Writer

import synthetic as syn
from vservo_node.record.bag import (COMPRESSED_IMAGE, IMAGE, OPEN_DIR, RunRecorder,
                                    default_typestore, load_run, run_folder_name)

HERE = Path(__file__).parent


def _expected(spec):
    msgs, _ = syn.messages(spec)
    return msgs


def _mcap_messages(bag_dir: Path):
    """(topic, schema name, log time, data) of every message, via the mcap package alone."""
    meta = yaml.safe_load((bag_dir / "metadata.yaml").read_text())["rosbag2_bagfile_information"]
    out = []
    for name in meta["relative_file_paths"]:
        with open(bag_dir / name, "rb") as f:
            reader = make_reader(f)
            assert reader.get_header().profile == "ros2"
            for schema, channel, message in reader.iter_messages():
                out.append((channel.topic, schema.name, message.log_time, message.data))
    return out


def test_rosbags_reader_gets_every_message(recorded, spec):
    expected = _expected(spec)
    with AnyReader([recorded]) as reader:   # digests are checked against embedded definitions
        types = {c.topic: c.msgtype for c in reader.connections}
        got = [(c.topic, c.msgtype, stamp, raw) for c, stamp, raw in reader.messages()]
    assert types == {t: m for t, m, _, _ in expected}
    key = lambda m: (m[2], m[0])   # noqa: E731
    got.sort(key=key)
    want = sorted([(t, m, s, bytes(syn.TS.serialize_cdr(msg, m))) for t, m, msg, s in expected],
                  key=key)
    assert [g[:3] for g in got] == [w[:3] for w in want]
    assert all(bytes(g[3]) == w[3] for g, w in zip(got, want))


def test_mcap_reader_gets_every_message(recorded, spec):
    expected = _expected(spec)
    got = _mcap_messages(recorded)
    assert Counter((t, s) for t, s, _, _ in got) == Counter((t, m) for t, m, _, _ in expected)
    assert sorted(s for _, _, s, _ in got) == sorted(s for _, _, _, s in expected)
    assert len(list(recorded.glob("*.mcap"))) > 3, "the run should span several splits"


def test_metadata_matches_rosbags_writer_format_and_contents(recorded, spec, tmp_path):
    """Same keys at every level and the same version as the metadata.yaml that rosbags'
    Writer writes on a normal close; counts and time span match the messages."""
    ts = default_typestore()
    with Writer(tmp_path / "ref", version=9, storage_plugin=StoragePlugin.MCAP) as w:
        conn = w.add_connection("/x", "std_msgs/msg/String", typestore=ts)
        w.write(conn, 1, ts.serialize_cdr(ts.types["std_msgs/msg/String"](data="a"),
                                          "std_msgs/msg/String"))
    ref = yaml.safe_load((tmp_path / "ref" / "metadata.yaml").read_text())
    ours = yaml.safe_load((recorded / "metadata.yaml").read_text())

    def shape(d):
        return {k: shape(v) if isinstance(v, dict) else
                [shape(x) for x in v[:1]] if isinstance(v, list) and v and isinstance(v[0], dict)
                else type(v).__name__ for k, v in d.items()}
    ref_info, info = ref["rosbag2_bagfile_information"], ours["rosbag2_bagfile_information"]
    ref_shape, our_shape = shape(ref_info), shape(info)
    ref_shape.pop("custom_data"), our_shape.pop("custom_data")  # null there, a mapping here
    assert our_shape == ref_shape
    assert info["version"] == ref_info["version"] == 9
    assert info["storage_identifier"] == "mcap"
    expected = _expected(spec)
    stamps = [s for *_, s in expected]
    assert info["message_count"] == len(expected) == sum(f["message_count"] for f in info["files"])
    assert info["starting_time"]["nanoseconds_since_epoch"] == min(stamps)
    assert info["duration"]["nanoseconds"] == max(stamps) - min(stamps)
    counts = Counter(t for t, *_ in expected)
    assert {x["topic_metadata"]["name"]: x["message_count"]
            for x in info["topics_with_message_count"]} == counts
    assert [f["path"] for f in info["files"]] == info["relative_file_paths"]
    assert sorted(info["relative_file_paths"]) == sorted(p.name for p in recorded.glob("*.mcap"))
    assert not (recorded / OPEN_DIR).exists()


def test_type_hashes_equal_those_of_the_ros_message_packages(recorded):
    """type_description_hash (RIHS01) of every topic equals the hash the message package ships
    in share/<package>/msg/<Type>.json (rosidl_generator_type_description output; the ROS
    message wheels of requirements.txt install share/ under the venv prefix)."""
    info = yaml.safe_load((recorded / "metadata.yaml").read_text())["rosbag2_bagfile_information"]
    assert info["topics_with_message_count"]
    for entry in info["topics_with_message_count"]:
        meta = entry["topic_metadata"]
        package, _, name = meta["type"].split("/")
        shipped = json.loads((Path(sys.prefix) / "share" / package / "msg" /
                              f"{name}.json").read_text())
        hashes = {h["type_name"]: h["hash_string"] for h in shipped["type_hashes"]}
        assert meta["type_description_hash"] == hashes[meta["type"]], meta["type"]


def test_sigkill_loses_at_most_one_second(tmp_path):
    """A recorder killed with SIGKILL leaves a bag that both readers read up to the last
    completed split; the data lost is under 1 s (default split settings)."""
    child = subprocess.Popen([sys.executable, str(HERE / "record_until_killed.py"),
                              str(tmp_path)], stdout=subprocess.PIPE, text=True)
    try:
        bag_dir = Path(child.stdout.readline().strip())
        time.sleep(2.5)
        killed_ns = time.time_ns()
        child.send_signal(signal.SIGKILL)
    finally:
        child.kill()
        child.wait(10)
    assert child.returncode == -signal.SIGKILL
    assert (bag_dir / OPEN_DIR).exists(), "the open split should have been cut off"
    with AnyReader([bag_dir]) as reader:
        types = {c.topic: c.msgtype for c in reader.connections}
        counts = {c.topic: c.msgcount for c in reader.connections}
        rows = [(c.topic, stamp, reader.deserialize(raw, c.msgtype))
                for c, stamp, raw in reader.messages()]
    assert types == {"/servo/status": "std_msgs/msg/String",
                     "/joint_states": "sensor_msgs/msg/JointState"}
    seqs = [json.loads(m.data)["seq"] for t, _, m in rows if t == "/servo/status"]
    assert seqs == list(range(len(seqs))), "messages lost inside the recovered span"
    assert Counter(t for t, _, _ in rows) == counts
    last = max(stamp for _, stamp, _ in rows)
    assert killed_ns - last < 1.0e9, f"lost {(killed_ns - last) / 1e9:.3f} s"
    mcap_rows = _mcap_messages(bag_dir)
    assert sorted(s for _, _, s, _ in mcap_rows) == sorted(s for _, s, _ in rows)


def test_empty_bag_is_readable_at_once(tmp_path):
    rec = RunRecorder(tmp_path, "empty")
    try:
        with AnyReader([rec.bag_dir]) as reader:
            assert reader.message_count == 0
    finally:
        rec.close()


def test_folder_params_and_result(tmp_path):
    from datetime import datetime, timezone
    started = datetime(2026, 12, 2, 10, 15, 0, tzinfo=timezone.utc)
    assert run_folder_name("tray twist!", started) == "20261202T101500Z_tray_twist"
    with RunRecorder(tmp_path, "tray twist!", started=started, params={"a.b": 1}) as rec:
        rec.set_result({"run_id": "r", "converged": True})
    with RunRecorder(tmp_path, "tray twist!", started=started) as second:
        pass
    assert rec.bag_dir == tmp_path / "20261202T101500Z_tray_twist"
    assert second.bag_dir != rec.bag_dir
    assert yaml.safe_load((rec.bag_dir / "params.yaml").read_text()) == {"a.b": 1}
    assert json.loads((rec.bag_dir / "result.json").read_text())["converged"] is True


def test_refuses_type_change_and_unknown_types(tmp_path):
    ts = default_typestore()
    with RunRecorder(tmp_path, "bad") as rec:
        rec.write("x", "std_msgs/msg/String", ts.types["std_msgs/msg/String"](data="a"), 1)
        with pytest.raises(ValueError, match="one type per topic"):
            rec.write("x", "std_msgs/msg/Float64", b"\x00\x01\x00\x00" + bytes(8), 2)
        with pytest.raises(ValueError, match="not in the typestore"):
            rec.write("y", "my_msgs/msg/Nope", b"\x00\x01\x00\x00", 3)


def _image_msg(ts, rgb: np.ndarray, i: int):
    h, w, _ = rgb.shape
    header = ts.types["std_msgs/msg/Header"](
        stamp=ts.types["builtin_interfaces/msg/Time"](sec=i, nanosec=0), frame_id="cam")
    return ts.types[IMAGE](header=header, height=h, width=w, encoding="rgb8", is_bigendian=0,
                           step=w * 3, data=rgb.ravel())


@pytest.mark.parametrize("fmt", ["png", "jpeg"])
def test_images_decimated_and_compressed(tmp_path, fmt):
    """Every 3rd image kept, stored as CompressedImage on <topic>/compressed, decoding with
    OpenCV to exactly what OpenCV's own encoder makes of the frame in BGR order (for PNG, the
    original pixels: lossless, W3C PNG specification)."""
    ts = default_typestore()
    rng = np.random.default_rng(1)
    frames = [cv2.GaussianBlur(rng.integers(0, 256, (24, 32, 3), dtype=np.uint8), (5, 5), 0)
              for _ in range(7)]
    with RunRecorder(tmp_path, fmt, image_every=3, image_format=fmt) as rec:
        for i, rgb in enumerate(frames):
            rec.write("camera/image", IMAGE, ts.serialize_cdr(_image_msg(ts, rgb, i), IMAGE), i)
    with AnyReader([rec.bag_dir]) as reader:
        assert {c.topic: c.msgtype for c in reader.connections} == {
            "/camera/image/compressed": COMPRESSED_IMAGE}
        msgs = [(stamp, reader.deserialize(raw, c.msgtype)) for c, stamp, raw in reader.messages()]
    assert [s for s, _ in msgs] == [0, 3, 6]
    for stamp, msg in msgs:
        bgr = cv2.imdecode(msg.data, cv2.IMREAD_COLOR)
        rgb = cv2.cvtColor(bgr, cv2.COLOR_BGR2RGB)
        ext, opts = (".png", []) if fmt == "png" else (".jpg", [cv2.IMWRITE_JPEG_QUALITY, 90])
        reference = cv2.imdecode(cv2.imencode(ext, frames[stamp][..., ::-1], opts)[1],
                                 cv2.IMREAD_COLOR)[..., ::-1]
        np.testing.assert_array_equal(rgb, reference)
        if fmt == "png":
            np.testing.assert_array_equal(rgb, frames[stamp])
        assert msg.format.startswith(f"rgb8; {fmt} compressed")


def test_plain_ros2_bag_loads_like_ours(recorded, plain):
    """A bag as `ros2 bag record` writes it (mcap or sqlite3, namespaced topics, no params.yaml)
    loads to the same series as our recorder's bag of the same run."""
    ours, theirs = load_run(recorded), load_run(plain)
    for name in ("rms_px", "gain", "cycle_ms", "dq"):
        np.testing.assert_array_equal(theirs.status[name], ours.status[name])
    assert list(theirs.status["state"]) == list(ours.status["state"])
    np.testing.assert_array_equal(theirs.status_t, ours.status_t)
    assert theirs.joint_names == ours.joint_names
    np.testing.assert_array_equal(theirs.joint_position, ours.joint_position)
    for name in ("features", "feature_error", "camera_twist", "camera_truth", "joint_cmd"):
        np.testing.assert_array_equal(getattr(theirs, name).values, getattr(ours, name).values)
    np.testing.assert_array_equal(theirs.image_t, ours.image_t)
    assert theirs.params == {} and ours.params
    assert theirs.robot_description and ours.robot_description is None
    assert theirs.result["converged"] is True and ours.result["converged"] is True


def test_a_failed_split_close_is_reported_by_the_next_write(tmp_path):
    """An error in the background thread (here: the bag folder vanished) must not pass
    silently: the next write raises and names the bag."""
    ts = default_typestore()
    msg = ts.types["std_msgs/msg/String"](data="a")
    rec = RunRecorder(tmp_path, "fail", split_s=0.05, poll_s=0.01)
    rec.write("x", "std_msgs/msg/String", msg, 1)
    shutil.rmtree(rec.bag_dir)
    time.sleep(0.3)
    with pytest.raises(RuntimeError, match="failed"):
        rec.write("x", "std_msgs/msg/String", msg, 2)


def test_the_taught_reference_and_the_image_it_names_are_copied_into_the_bag(tmp_path):
    station = tmp_path / "station"
    station.mkdir()
    view = np.full((6, 8, 3), 77, np.uint8)
    cv2.imwrite(str(station / "s1.png"), view)
    (station / "s1.yaml").write_text(yaml.safe_dump({
        "format": "vservo_reference/1", "name": "s1", "image": "s1.png",
        "joint_positions": {"j1": 0.25}, "features": []}))
    with RunRecorder(tmp_path / "runs", "ref") as rec:
        copy = rec.copy_reference(station / "s1.yaml")
        assert rec.copy_reference(station / "missing.yaml") is None
    assert copy == rec.bag_dir / "reference" / "s1.yaml"
    assert copy.read_bytes() == (station / "s1.yaml").read_bytes()
    np.testing.assert_array_equal(cv2.imread(str(rec.bag_dir / "reference" / "s1.png")), view)
    run = load_run(rec.bag_dir)
    assert run.reference["joint_positions"] == {"j1": 0.25}
    assert run.reference_path == copy


@pytest.mark.parametrize("fmt", [None, "jpeg"])
def test_first_and_last_frames_are_decoded_in_rgb(tmp_path, fmt):
    """Raw rgb8 frames come back exactly; JPEG ones within JPEG's error of the same frame
    decoded by OpenCV; in both, red stays in channel 0."""
    ts = default_typestore()
    frames = []
    for i in range(4):
        rgb = np.zeros((24, 32, 3), np.uint8)
        rgb[..., 0] = 200          # red
        rgb[:, : 4 + 6 * i, 2] = 90
        frames.append(rgb)
    with RunRecorder(tmp_path, "frames", image_format=fmt) as rec:
        for i, rgb in enumerate(frames):
            rec.write("camera/image", IMAGE, ts.serialize_cdr(_image_msg(ts, rgb, i), IMAGE),
                      10**9 * (i + 1))
    run = load_run(rec.bag_dir)
    assert [f.t for f in run.frames] == [0.0, 3.0]
    for frame, sent in zip(run.frames, (frames[0], frames[-1])):
        if fmt is None:
            np.testing.assert_array_equal(frame.rgb, sent)
        else:
            assert np.abs(frame.rgb.astype(int) - sent).mean() < 4
            assert frame.rgb[..., 0].mean() > 150 > frame.rgb[..., 1].mean()


def test_one_split_file_is_read_as_its_own_span(recorded):
    """A split file keeps the bag's clock and reports only the result it holds itself."""
    whole = load_run(recorded)
    info = yaml.safe_load((recorded / "metadata.yaml").read_text())["rosbag2_bagfile_information"]
    names = info["relative_file_paths"]
    assert len(names) >= 3
    first, last = load_run(recorded / names[0]), load_run(recorded / names[-1])
    assert first.piece.index == 0 and first.piece.count == len(names)
    assert first.result is None                        # result.json is the whole run's
    assert last.result is not None and last.result["converged"] is True   # run_result inside
    middle = load_run(recorded / names[1])
    np.testing.assert_allclose(middle.status_t, whole.status_t[np.isin(
        whole.status_t, middle.status_t)])
    assert middle.piece.t0_s <= middle.status_t[0] and middle.status_t[-1] <= middle.piece.t1_s
    assert middle.status_t[0] > whole.status_t[0]      # later than the start, same clock
