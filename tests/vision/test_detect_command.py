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
