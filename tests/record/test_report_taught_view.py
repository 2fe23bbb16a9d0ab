"""The report shows the taught view when the record's copied reference keeps its image; a
reference written before references kept one leaves the frames as they were. SYNTHETIC TEST
DATA (synthetic.py) and an invented marker reference."""
from __future__ import annotations

import cv2
import numpy as np
import yaml

import synthetic as syn
from vservo_node.record.bag import RunRecorder, load_run
from vservo_node.record.report import taught_view, write_report
from vservo_node.vision.reference import Reference, save_reference, with_joints

CAPTION = "right: the taught view from the reference copied into the record"


def _reference(folder):
    image = np.full((48, 64, 3), 200, np.uint8)
    image[10:20, 12:22] = (0, 0, 255)           # BGR: a red square
    pixels = np.array([[12.0, 10.0], [21.0, 10.0], [21.0, 19.0], [12.0, 19.0]])
    ref = Reference(name="st", target="tray_tags", kind="markers",
                    keys=[("tag", 3, c) for c in range(4)], pixels=pixels, image_size=(64, 48),
                    image=image, created="2026-01-01T00:00:00+00:00")
    ref = with_joints(ref, [f"vs6_j{i}" for i in range(1, 7)], np.zeros(6))
    return image, pixels, save_reference(ref, folder / "st.yaml")


def _record(root, name, reference_file):
    spec = syn.Spec()
    with RunRecorder(root, name, params=spec.params()) as rec:
        syn.record_with(rec, spec)
        rec.copy_reference(reference_file)
    return rec.bag_dir


def test_taught_view_in_the_report(tmp_path):
    image, pixels, path = _reference(tmp_path)
    bag = _record(tmp_path / "runs", "taught", path)
    rgb, uv = taught_view(load_run(bag))
    np.testing.assert_array_equal(rgb, cv2.cvtColor(image, cv2.COLOR_BGR2RGB))
    np.testing.assert_array_equal(uv, pixels)
    page, _ = write_report(bag, tmp_path / "report")
    text = page.read_text()
    assert CAPTION in text and "Not drawn" not in text


def test_an_older_reference_without_image_leaves_the_frames_as_they_were(tmp_path):
    _, _, path = _reference(tmp_path)
    data = yaml.safe_load(path.read_text())
    del data["image"], data["joint_positions"]
    old = tmp_path / "old" / "st.yaml"
    old.parent.mkdir()
    old.write_text(yaml.safe_dump(data))
    bag = _record(tmp_path / "runs", "old", old)
    run = load_run(bag)
    assert run.reference_path is not None and taught_view(run) is None
    page, _ = write_report(bag, tmp_path / "report")
    text = page.read_text()
    assert CAPTION not in text and "Camera frames with the detected features" in text
