"""References keep the taught image and the arm's joints at the taught view, for every target
kind; references written before they did still load and say what they lack."""
import logging

import cv2
import numpy as np
import pytest
import vision_synth as vs
import yaml

from vservo_node.record.bag import RunRecorder, load_run
from vservo_node.vision.camera import CameraModel
from vservo_node.vision.reference import (BadReferenceError, capture_reference, load_reference,
                                          reference_path, save_reference, with_joints)
from vservo_node.vision.targets import load_target

SIZE = (640, 480)
K = vs.intrinsics(600.0, SIZE)
CAMERA = CameraModel(SIZE[0], SIZE[1], K)
TAUGHT = vs.pose((10, -5, 8), (0.0, 0.01, 0.4))
KINDS = ("tray_dots", "tray_tags", "tray_poster")     # dots, square markers, textured poster
NAMES = ("shoulder_pan", "shoulder_lift", "elbow", "wrist_1", "wrist_2", "wrist_3")
Q = np.array([0.1, -1.2, 1.9, -0.7, -1.5707963267948966, 3.0e-7])   # invented


@pytest.fixture(scope="module")
def saved(tmp_path_factory):
    """{target name: (target, taught image, path)}: taught with joints and saved once."""
    folder = tmp_path_factory.mktemp("refs")
    out = {}
    for name in KINDS:
        target = load_target(name)
        image = vs.render(target, K, SIZE, TAUGHT, noise=2.0)
        ref = with_joints(capture_reference(f"st_{name}", target, image, CAMERA), NAMES, Q)
        out[name] = (target, image, save_reference(ref, reference_path(folder, ref.name)))
    return out


@pytest.mark.parametrize("name", KINDS)
def test_image_and_joints_round_trip_for_every_kind(saved, name):
    target, image, path = saved[name]
    data = yaml.safe_load(path.read_text())
    # the image is named relative to the file and lies beside it
    assert data["image"] == path.with_suffix(".png").name
    assert data["joint_positions"] == dict(zip(NAMES, Q.tolist()))
    back = load_reference(path, target)
    # PNG is lossless: the very pixels that were taught (read back by OpenCV independently)
    np.testing.assert_array_equal(back.image, image)
    np.testing.assert_array_equal(cv2.imread(str(path.parent / data["image"]),
                                             cv2.IMREAD_UNCHANGED), image)
    assert back.joint_names == NAMES and back.joint_positions.tolist() == Q.tolist()
    assert back.notes == ()
    # joint order is by name, never by position
    order = NAMES[::-1]
    assert back.joints_for(order).tolist() == Q[::-1].tolist()
    assert back.joints_for(NAMES[:3]).tolist() == Q[:3].tolist()
    assert back.joints_for(("elbow", "gripper")) is None


def _without(path, tmp_path, *keys):
    data = yaml.safe_load(path.read_text())
    for key in keys:
        data.pop(key)
    out = tmp_path / path.name
    out.write_text(yaml.safe_dump(data))
    png = path.with_suffix(".png")
    (tmp_path / png.name).write_bytes(png.read_bytes())
    return out


@pytest.mark.parametrize("name", ["tray_dots", "tray_tags"])
def test_old_reference_without_image_or_joints_loads_and_says_so(saved, tmp_path, caplog, name):
    target, _, path = saved[name]
    old = _without(path, tmp_path, "image", "joint_positions")
    with caplog.at_level(logging.INFO, logger="vservo_node.vision.reference"):
        back = load_reference(old, target)
    assert back.image is None and back.joint_names is None and back.joints_for(NAMES) is None
    assert any("no taught image" in n for n in back.notes)
    assert any("no joint positions" in n for n in back.notes)
    logged = [r for r in caplog.records if str(old) in r.getMessage()]
    assert len(logged) == 2 and all(r.levelno == logging.INFO for r in logged)
    # a copied YAML whose image was left behind: loads (dots and markers do not need it)
    (tmp_path / "moved").mkdir()
    moved = tmp_path / "moved" / path.name
    moved.write_text(path.read_text())
    back = load_reference(moved, target)
    assert back.image is None and any("not beside it" in n for n in back.notes)
    assert back.joint_names == NAMES


def test_textured_reference_still_needs_its_image(saved, tmp_path):
    target, _, path = saved["tray_poster"]
    with pytest.raises(BadReferenceError, match="textured reference needs 'image'"):
        load_reference(_without(path, tmp_path, "image"), target)
    # without joints it loads, and says so
    back = load_reference(_without(path, tmp_path, "joint_positions"), target)
    assert back.image is not None and back.joint_names is None and len(back.notes) == 1


@pytest.mark.parametrize("change, message", [
    (lambda d: d.update(joint_positions=[0.1, 0.2]), "expected a mapping"),
    (lambda d: d["joint_positions"].update(elbow="x"), r"joint_positions\.elbow"),
    (lambda d: d["joint_positions"].update(elbow=float("nan")), "finite number"),
    (lambda d: d.update(image="../elsewhere.png"), "file name beside the reference"),
])
def test_malformed_entries_are_refused(saved, tmp_path, change, message):
    target, _, path = saved["tray_dots"]
    data = yaml.safe_load(path.read_text())
    change(data)
    out = path.parent / "edited_joints.yaml"
    out.write_text(yaml.safe_dump(data))
    with pytest.raises(BadReferenceError, match=message):
        load_reference(out, target)


def test_with_joints_refuses_what_does_not_pair_up():
    target = load_target("tray_dots")
    ref = capture_reference("j", target, vs.render(target, K, SIZE, TAUGHT), CAMERA)
    with pytest.raises(BadReferenceError, match="6 names for 5 positions"):
        with_joints(ref, NAMES, Q[:5])
    with pytest.raises(BadReferenceError, match="repeated names"):
        with_joints(ref, ("a", "a"), [0.0, 1.0])
    with pytest.raises(BadReferenceError, match="finite"):
        with_joints(ref, ("a", "b"), [0.0, np.inf])


def test_run_record_keeps_the_reference_with_its_image_and_joints(saved, tmp_path):
    target, image, path = saved["tray_tags"]
    with RunRecorder(tmp_path / "runs", "taught") as rec:
        copy = rec.copy_reference(path)
    assert (copy.parent / path.with_suffix(".png").name).is_file()
    back = load_reference(copy, target)           # the record's copy stands on its own
    np.testing.assert_array_equal(back.image, image)
    run = load_run(rec.bag_dir)
    assert run.reference["joint_positions"] == dict(zip(NAMES, Q.tolist()))


@pytest.mark.parametrize("scenario", ["tray_offset", "tray_tags_offset", "tray_poster_offset"])
def test_headless_teach_keeps_the_simulated_arms_joints_and_image(tmp_path, scenario):
    """The headless runs' teach (episode.teach_reference, the node's capture on the simulated
    cell) keeps the scenario's taught joints by name, and they belong to the image: the
    target model seen from the camera pose of the kept joints (forward kinematics), projected
    by OpenCV (cv2.projectPoints; Bradski & Kaehler, Learning OpenCV, 2008, ch. 11), lands on
    the reference's taught pixels (within 1.5 px: detection under noise and blur, textured
    points by texture matching; common practice, no source). Joints 1 mrad off would miss by
    more."""
    from vservo_node.episode import teach_reference
    from vservo_node.perception import DepthSettings
    from vservo_node.sim import SimCell, load_scenario

    sc = load_scenario(scenario)
    cell = SimCell(sc)
    path = teach_reference(sc, cell, sc.camera, DepthSettings(), tmp_path, "taught")
    back = load_reference(path, sc.target)
    assert back.notes == () and back.image.shape[:2] == (sc.camera.height, sc.camera.width)
    arm = cell.arm_model
    q = back.joints_for(arm.joint_names)
    np.testing.assert_array_equal(q, sc.q_taught)
    d = np.asarray(sc.camera.to_dict().get("d") or [], float)

    def seen_from(q):
        T = np.linalg.inv(arm.camera_pose(q)) @ sc.T_base_target     # T_camera_target
        uv, _ = cv2.projectPoints(sc.target.model_points(back.keys), cv2.Rodrigues(T[:3, :3])[0],
                                  T[:3, 3], sc.camera.K, d)
        return uv.reshape(-1, 2)

    assert np.abs(seen_from(q) - back.pixels).max() < 1.5
    assert np.abs(seen_from(q + 1e-3) - back.pixels).max() > 1.5
