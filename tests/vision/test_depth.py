"""Per-point depth: PnP (IPPE) against the true pose, depth images with holes, constant."""
import numpy as np
import pytest
import vision_synth as vs

from vservo_node.vision import depth
from vservo_node.vision.camera import CameraModel
from vservo_node.vision.features import make_detector
from vservo_node.vision.reference import identify
from vservo_node.vision.targets import load_target

SIZE = (640, 480)
K = vs.intrinsics(600.0, SIZE)
CAMERA = CameraModel(SIZE[0], SIZE[1], K)


@pytest.mark.parametrize("name", ["tray_dots", "tray_tags", "tray_poster"])
@pytest.mark.parametrize("rpy", [(0, 0, 0), (25, -15, 30), (-35, 20, -50)])
def test_pnp_depths_within_1pct_at_half_a_metre(name, rpy):
    # Ground truth: Z of the model points in the camera frame of the rendered pose. Brief:
    # within 1 % at 0.5 m.
    target = load_target(name)
    T = vs.pose(rpy, (0.01, -0.01, 0.5))
    image = vs.render(target, K, SIZE, T, noise=2.0)
    match = identify(target, make_detector(target).detect(image))
    assert match.ok
    model = target.model_points(match.keys)
    d = depth.from_pnp(match.points, model, CAMERA)
    z_true = (model @ T[:3, :3].T + T[:3, 3])[:, 2]
    assert np.abs(d.z / z_true - 1).max() < 0.01
    assert d.source == "pnp" and d.valid.all() and d.reprojection_rms_px < 1.0


def test_pnp_removes_lens_distortion_through_the_camera():
    # Points projected with distortion by OpenCV (cv2.projectPoints inside CameraModel.project)
    # give the exact depths back.
    cam = CameraModel(640, 480, K, [-0.25, 0.08, 0.001, -0.0005, 0.0], "plumb_bob")
    target = load_target("tray_tags")
    T = vs.pose((20, 10, 5), (0.02, 0.0, 0.5))
    model = target.model_points()
    pts_cam = model @ T[:3, :3].T + T[:3, 3]
    d = depth.from_pnp(cam.project(pts_cam), model, cam)
    assert np.allclose(d.z, pts_cam[:, 2], rtol=1e-6)


def test_pnp_refuses_too_few_or_non_planar_points():
    with pytest.raises(ValueError, match=">= 4"):
        depth.from_pnp(np.zeros((3, 2)), np.zeros((3, 3)), CAMERA)
    with pytest.raises(ValueError, match="planar"):
        depth.from_pnp(np.zeros((4, 2)), np.ones((4, 3)), CAMERA)


@pytest.mark.parametrize("encoding", ["16UC1", "32FC1"])
def test_depth_image_with_holes(encoding):
    z = np.full((40, 60), 0.8)
    z[10:13, 10:13] = np.nan   # a small hole: filled from the valid neighbourhood
    z[25:40, 40:60] = np.nan   # a large hole: no valid neighbour, fallback
    z[5, 50] = 0.7
    image = (np.nan_to_num(z) * 1000).astype(np.uint16) if encoding == "16UC1" else \
        z.astype(np.float32)
    pts = [[50, 5], [11, 11], [55, 35], [80, 5], [30, 20]]
    d = depth.from_depth_image(image, encoding, pts, fallback=0.5)
    assert d.z == pytest.approx([0.7, 0.8, 0.5, 0.5, 0.8])
    assert d.valid.tolist() == [True, True, False, False, True]


def test_depth_image_refuses_wrong_types():
    with pytest.raises(ValueError, match="unsupported depth encoding"):
        depth.from_depth_image(np.zeros((4, 4), np.uint16), "mono16", [[1, 1]], 0.5)
    with pytest.raises(ValueError, match="float32"):
        depth.from_depth_image(np.zeros((4, 4), np.uint16), "32FC1", [[1, 1]], 0.5)


def test_constant():
    d = depth.constant(3, 0.45)
    assert d.z.tolist() == [0.45] * 3 and d.valid.all()
    with pytest.raises(ValueError):
        depth.constant(3, 0.0)
