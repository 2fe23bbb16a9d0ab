"""Taught references: capture, save, load, validation, use at another resolution."""
import cv2
import numpy as np
import pytest
import vision_synth as vs
import yaml

from vservo_node.vision.camera import CameraModel
from vservo_node.vision.reference import (BadReferenceError, capture_reference, load_reference,
                                          reference_path, save_reference)
from vservo_node.vision.targets import load_target

SIZE = (640, 480)
K = vs.intrinsics(600.0, SIZE)
CAMERA = CameraModel(SIZE[0], SIZE[1], K)
TAUGHT = vs.pose((10, -5, 8), (0.0, 0.01, 0.4))
LATER = vs.pose((20, 10, -25), (0.02, -0.01, 0.5))


@pytest.fixture(scope="module")
def taught(tmp_path_factory):
    """{target name: (target, reference, path)} taught and saved once."""
    folder = tmp_path_factory.mktemp("refs")
    out = {}
    for name in ("tray_dots", "tray_tags", "tray_poster"):
        target = load_target(name)
        ref = capture_reference(f"st_{name}", target, vs.render(target, K, SIZE, TAUGHT),
                                CAMERA)
        out[name] = (target, ref, save_reference(ref, reference_path(folder, ref.name)))
    return out


@pytest.mark.parametrize("name", ["tray_dots", "tray_tags", "tray_poster"])
def test_round_trip(taught, name):
    target, ref, path = taught[name]
    back = load_reference(path, target)
    assert back.keys == ref.keys == target.keys()
    for field in ("pixels", "normalized", "depths", "colours_lab"):
        a, b = getattr(ref, field), getattr(back, field)
        assert (a is None and b is None) or np.array_equal(a, b), field
    assert back.camera.to_dict() == CAMERA.to_dict() and back.image_size == SIZE
    # taught pixels are the projections of the features (independent pinhole projection)
    truth = vs.project(K, TAUGHT, target.model_points(ref.keys))
    assert np.abs(ref.pixels - truth).max() < (1.0 if name == "tray_poster" else 0.3)
    # PnP depths at teach time (camera and target geometry known)
    z = (target.model_points(ref.keys) @ TAUGHT[:3, :3].T + TAUGHT[:3, 3])[:, 2]
    assert ref.depth_source == "pnp" and np.abs(ref.depths / z - 1).max() < 0.01
    if name == "tray_poster":
        assert path.with_suffix(".png").is_file() and back.image.shape == (480, 640, 3)


@pytest.mark.parametrize("name", ["tray_dots", "tray_tags", "tray_poster"])
def test_loaded_reference_detects_and_matches_a_later_view(taught, name):
    target, _, path = taught[name]
    ref = load_reference(path, target)
    image = vs.render(target, K, SIZE, LATER, noise=2.0)
    m = ref.match(ref.detector(target).detect(image), CAMERA)
    assert m.ok and m.keys == target.keys()
    assert np.abs(m.points - vs.project(K, LATER, target.model_points(m.keys))).max() < 1.5


def test_reference_taught_at_640_serves_at_1280(taught):
    # Normalized coordinates carry the taught view to another resolution: seen from the taught
    # pose by a 1280x960 camera, the reference points land on the detections.
    target, ref, _ = taught["tray_dots"]
    big = CAMERA.scaled(1280, 960)
    image = vs.render(target, big.K, (1280, 960), TAUGHT)
    m = ref.match(ref.detector(target).detect(image), big)
    assert m.keys == target.keys()
    assert np.abs(m.points - m.ref_points).max() < 0.2


def test_without_camera_other_resolutions_are_refused():
    target = load_target("tray_dots")
    ref = capture_reference("nocam", target, vs.render(target, K, SIZE, TAUGHT))
    assert ref.normalized is None and ref.depths is None
    image = vs.render(target, K, SIZE, TAUGHT)
    assert ref.match(ref.detector(target).detect(image)).ok
    with pytest.raises(BadReferenceError, match="without camera intrinsics"):
        ref.points_for(image_size=(1280, 960))


def test_capture_refuses_incomplete_views():
    target = load_target("tray_dots")
    image = vs.render(target, K, SIZE, TAUGHT)
    image[:, 320:] = 90  # half the board out of view
    with pytest.raises(BadReferenceError, match="missing"):
        capture_reference("half", target, image, CAMERA)


def edit(path, tmp_path, change):
    data = yaml.safe_load(path.read_text())
    change(data)
    out = tmp_path / "edited.yaml"
    out.write_text(yaml.safe_dump(data))
    return out


@pytest.mark.parametrize("change, message", [
    (lambda d: d.pop("features"), r"missing fields \['features'\]"),
    (lambda d: d.update(features=d["features"][:3]), "at least 4 features, got 3"),
    (lambda d: d["features"][1].pop("pixel"), r"needs 'pixel'; missing in features \[1\]"),
    (lambda d: d["features"][2].update(pixel=[1.0]), "'pixel' must be 2 finite"),
    (lambda d: d["features"][0].pop("normalized"), "needs 'normalized'"),
    (lambda d: d["features"][0].pop("colour_lab"), "needs 'colour_lab'"),
    (lambda d: d["features"][0].pop("depth"), "'depth' is given for some features"),
    (lambda d: d["features"][1].update(key=["dot", 0]), "repeated feature keys"),
    (lambda d: d.update(image_size=[640]), "image_size must be"),
    (lambda d: d["camera"].update(width=320), "camera is 320x480"),
    (lambda d: d.update(format="other/9"), "format is 'other/9'"),
    (lambda d: d.update(target="tray_tags"), "taught on target 'tray_tags'"),
])
def test_invalid_files_are_refused_with_the_reason(taught, tmp_path, change, message):
    target, _, path = taught["tray_dots"]
    with pytest.raises(BadReferenceError, match=message):
        load_reference(edit(path, tmp_path, change), target)


def test_mismatched_target_and_missing_image(taught, tmp_path):
    _, _, path = taught["tray_dots"]
    with pytest.raises(BadReferenceError, match="not on 'tray_tags'"):
        load_reference(path, load_target("tray_tags"))
    target, _, poster = taught["tray_poster"]
    cv2.imwrite(str(tmp_path / "edited.png"), np.zeros((10, 10, 3), np.uint8))
    with pytest.raises(BadReferenceError, match="taught image is 10x10"):
        load_reference(edit(poster, tmp_path, lambda d: d.update(image="edited.png")), target)


def test_slot_names():
    assert reference_path("/tmp/x", "station_2").name == "station_2.yaml"
    with pytest.raises(BadReferenceError, match="must start with"):
        reference_path("/tmp/x", "../escape")
