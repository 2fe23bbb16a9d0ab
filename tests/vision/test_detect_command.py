"""`vservo detect`: overlay PNG and features JSON from an image file."""
import json

import cv2
import numpy as np
import vision_synth as vs
import yaml

from vservo_node.cli import main
from vservo_node.vision.camera import CameraModel
from vservo_node.vision.reference import capture_reference, save_reference
from vservo_node.vision.targets import load_target

K = vs.intrinsics(600.0, (640, 480))


def test_detect_with_reference_and_camera(tmp_path):
    target = load_target("tray_dots")
    camera = CameraModel(640, 480, K)
    (tmp_path / "cam.yaml").write_text(yaml.safe_dump(camera.to_dict()))
    ref = capture_reference("a", target, vs.render(target, K, (640, 480), vs.pose()), camera)
    save_reference(ref, tmp_path / "a.yaml")
    T = vs.pose((15, 5, 20), (0.01, 0.0, 0.45))
    image = vs.render(target, K, (640, 480), T)
    cv2.circle(image, (50, 50), 10, (220, 200, 0), -1)  # a cyan distractor
    cv2.imwrite(str(tmp_path / "view.png"), image)
    rc = main(["detect", str(tmp_path / "view.png"), "--target", "tray_dots", "--reference",
               str(tmp_path / "a.yaml"), "--camera", str(tmp_path / "cam.yaml"), "--out",
               str(tmp_path / "out")])
    assert rc == 0
    overlay = cv2.imread(str(tmp_path / "out" / "view_detect.png"))
    assert overlay.shape == image.shape and np.any(overlay != image)
    record = json.loads((tmp_path / "out" / "view_features.json").read_text())
    assert len(record["detections"]) == 6
    assert record["match"]["keys"] == [["dot", i] for i in range(5)]
    assert record["match"]["rejected"] == [[["blob", 0], "colour"]]
    truth = vs.project(K, T, target.model_points())
    assert np.abs(np.array(record["match"]["pixels"]) - truth).max() < 0.3
    z = (target.model_points() @ T[:3, :3].T + T[:3, 3])[:, 2]
    assert np.abs(np.array(record["pnp"]["depths_m"]) / z - 1).max() < 0.01


def test_bad_input_exits_2(tmp_path, capsys):
    assert main(["detect", str(tmp_path / "none.png"), "--target", "tray_dots"]) == 2
    assert "vservo detect:" in capsys.readouterr().err
    cv2.imwrite(str(tmp_path / "blank.png"), np.zeros((48, 64, 3), np.uint8))
    assert main(["detect", str(tmp_path / "blank.png"), "--target", "tray_tags", "--out",
                 str(tmp_path)]) == 1


def test_camera_files_in_both_layouts(tmp_path):
    from vservo_node.commands.detect import load_camera
    camera = CameraModel(640, 480, K, [-0.2, 0.05, 0.001, 0.0, 0.0], "plumb_bob")
    (tmp_path / "ours.yaml").write_text(yaml.safe_dump(camera.to_dict()))
    # the layout written by ROS camera_calibration (image_width, camera_matrix: {data}, ...)
    (tmp_path / "ros.yaml").write_text(yaml.safe_dump({
        "image_width": 640, "image_height": 480, "camera_name": "cam",
        "camera_matrix": {"rows": 3, "cols": 3, "data": K.ravel().tolist()},
        "distortion_model": "plumb_bob",
        "distortion_coefficients": {"rows": 1, "cols": 5, "data": camera.D.tolist()},
        "rectification_matrix": {"rows": 3, "cols": 3, "data": np.eye(3).ravel().tolist()},
        "projection_matrix": {"rows": 3, "cols": 4, "data": camera.P.ravel().tolist()}}))
    for name in ("ours.yaml", "ros.yaml"):
        assert load_camera(tmp_path / name).to_dict() == camera.to_dict()
