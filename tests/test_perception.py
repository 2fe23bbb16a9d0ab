"""Perception: rendered images of the demo targets -> observations the servo can use.

Images come from the simulator's renderer (vservo_node.sim.render) at known target poses, so
every figure is checked against the exact geometry of the pose:
- pinhole projection x = X/Z, y = Y/Z of the true feature points (Hartley & Zisserman 2003,
  Multiple View Geometry, 2nd ed., sec. 6.1); for dots, the centroid of a disc's image is the
  centre of the projected conic C' = H^-T C H^-1 (ibid., sec. 2.3, result 2.13), not the image
  of the disc centre;
- depths are the z of the points in the camera frame; a plane n.X = d seen along the ray
  (x, y, 1) is at depth Z = d / (n . (x, y, 1)) (ray-plane intersection, ibid. sec. 8.1);
- image rescaling follows cv2.resize's pixel-centre convention (OpenCV docs, geometric
  image transformations), which CameraModel.scaled reproduces.
"""
import cv2
import numpy as np
import pytest
from scipy.spatial.transform import Rotation

from vservo_node.perception import DepthImage, DepthSettings, Perception, taught_view
from vservo_node.sim.render import PlanarTexture, PlaneRenderer
from vservo_node.vision.camera import CameraModel
from vservo_node.vision.targets import load_target, render_target_texture

CAMERA = CameraModel.pinhole(640, 480, 600.0, 600.0, 319.5, 239.5)
BACKGROUND = (120, 110, 100)
_TEXTURES = {}


def pose(rpy_deg=(0.0, 0.0, 0.0), t=(0.0, 0.0, 0.40)):
    """T_camera_target from intrinsic x-y-z angles (degrees) and a translation (m)."""
    T = np.eye(4)
    T[:3, :3] = Rotation.from_euler("XYZ", rpy_deg, degrees=True).as_matrix()
    T[:3, 3] = t
    return T


def texture(target):
    if target.name not in _TEXTURES:
        image, plane_from_texel = render_target_texture(target, 5000.0)
        _TEXTURES[target.name] = PlanarTexture(image, plane_from_texel)
    return _TEXTURES[target.name]


def render(target, T_camera_target, camera=CAMERA):
    image = np.empty((camera.height, camera.width, 3), np.uint8)
    image[:] = BACKGROUND
    assert PlaneRenderer(camera).draw(image, texture(target), T_camera_target) is not None
    return image


def camera_points(target, keys, T_camera_target):
    """Feature points (N, 3) in the camera frame, metres."""
    p = target.model_points(keys)
    return p @ T_camera_target[:3, :3].T + T_camera_target[:3, 3]


def disc_centroid_normalized(dot, T_camera_target):
    """Normalized coordinates of the centroid of a disc's image (conic centre, see above)."""
    cx, cy = dot.centre
    r = dot.radius
    C = np.array([[1, 0, -cx], [0, 1, -cy], [-cx, -cy, cx * cx + cy * cy - r * r]])
    Hi = np.linalg.inv(T_camera_target[:3, [0, 1, 3]])  # plane -> normalized image, inverted
    Ci = Hi.T @ C @ Hi
    return -np.linalg.solve(Ci[:2, :2], Ci[:2, 2])


def true_normalized(target, keys, T_camera_target):
    if target.kind == "dots":
        dots = {("dot", d.id): d for d in target.dots}
        return np.array([disc_centroid_normalized(dots[k], T_camera_target) for k in keys])
    p = camera_points(target, keys, T_camera_target)
    return p[:, :2] / p[:, 2:]


TAUGHT = pose((0.0, 0.0, 0.0), (0.0, 0.0, 0.40))
NOW = pose((6.0, -4.0, 15.0), (0.012, -0.008, 0.46))


@pytest.fixture(scope="module")
def dots():
    return load_target("tray_dots")


@pytest.fixture(scope="module")
def dots_reference(dots):
    return Perception(dots, CAMERA).capture(render(dots, TAUGHT), "station_test")


@pytest.mark.parametrize("name, tol_px", [("tray_dots", 0.1), ("tray_tags", 0.4)])
def test_observation_is_the_pinhole_projection_of_the_target(name, tol_px):
    """Normalized coordinates within tol_px / f of the exact projection, keys = reference keys.
    Tolerances: dot centroids of area-sampled discs are biased by well under a tenth of a
    pixel; sub-pixel corner refinement of markers within a few tenths (common practice, no
    source; the figures measured here are 0.007 px and 0.2 px)."""
    target = load_target(name)
    perception = Perception(target, CAMERA)
    perception.set_reference(perception.capture(render(target, TAUGHT), "station_test"))
    obs, info = perception.process(render(target, NOW), t=1.5)
    assert obs is not None and info.reason == ""
    assert set(obs.keys) == set(target.keys()) and info.n_matched == len(target.keys())
    assert info.missing == [] and info.t == 1.5
    error_px = (obs.xy - true_normalized(target, obs.keys, NOW)) * 600.0
    assert np.max(np.abs(error_px)) < tol_px
    np.testing.assert_allclose(obs.uv, CAMERA.normalized_to_pixels(obs.xy), atol=1e-6)
    assert obs.depth is None  # default depth source 'taught': the servo applies it


def test_reference_keeps_normalized_points_and_pnp_depths(dots, dots_reference):
    ref = dots_reference
    assert ref.keys == dots.keys()
    np.testing.assert_allclose(ref.normalized, true_normalized(dots, ref.keys, TAUGHT),
                               atol=0.1 / 600.0)
    # PnP on disc-image centroids: the few-hundredths-of-a-pixel centroid bias moves the pose
    # by well under a millimetre at 0.4 m.
    np.testing.assert_allclose(ref.depths, camera_points(dots, ref.keys, TAUGHT)[:, 2],
                               atol=1e-3)


def test_taught_view_at_another_resolution(dots, dots_reference):
    """A reference taught at 640x480 serves a 320x240 stream of the same camera: the taught
    view's pixels are where the half-size image shows the target at the taught pose."""
    half = CAMERA.scaled(320, 240)
    view = taught_view(dots_reference, half)
    np.testing.assert_allclose(view.xy, dots_reference.normalized)
    np.testing.assert_allclose(view.depth, dots_reference.depths)
    perception = Perception(dots, half, dots_reference)
    obs, _ = perception.process(render(dots, TAUGHT, half), t=0.0)
    index = view.index()
    uv_ref = view.uv[[index[k] for k in obs.keys]]
    assert np.max(np.abs(obs.uv - uv_ref)) < 0.1  # px of the 320x240 image
    # the same view seen through cv2.resize's pixel-centre map of the 640x480 pixels
    full = CAMERA.normalized_to_pixels(dots_reference.normalized)
    np.testing.assert_allclose(view.uv, (full + 0.5) * 0.5 - 0.5, atol=1e-9)


def test_taught_view_carries_the_target_model_for_the_pose_estimate(dots, dots_reference):
    """With the target, the taught view holds the features' model points (target frame), and
    the pose-error estimate of a later view (PnP, control.pose_error) is the true camera
    displacement within 0.5 mm / 0.1 deg (rendered dots: centroid bias of a few hundredths of
    a pixel; the truth from the poses this test rendered)."""
    from vservo_node.control import frames
    from vservo_node.control.pose_error import PoseErrorEstimator

    view = taught_view(dots_reference, CAMERA, dots)
    np.testing.assert_array_equal(view.model, dots.model_points(dots_reference.keys))
    assert taught_view(dots_reference, CAMERA).model is None
    later = pose((4.0, -3.0, 12.0), (0.01, -0.005, 0.43))
    obs, _ = Perception(dots, CAMERA, dots_reference).process(render(dots, later), t=0.0)
    index = view.index()
    estimate = PoseErrorEstimator(view.xy, model_points=view.model).estimate(
        obs.xy, [index[k] for k in obs.keys])
    truth = TAUGHT @ frames.invert(later)        # T_taught_current = T_taught_target T_target_now
    moved, turned = frames.pose_error(estimate.T_taught_current, truth)
    assert estimate.valid and 1e3 * moved < 0.5 and np.degrees(turned) < 0.1, (1e3 * moved,
                                                                               np.degrees(turned))


def test_tracking_keeps_identities_over_a_moving_sequence(dots, dots_reference):
    """Ten frames of a camera sliding and turning: every frame's keys sit on the dot whose
    true image is there (the tracker's windows follow, the matcher keeps identities)."""
    perception = Perception(dots, CAMERA, dots_reference)
    for k in range(10):
        T = pose((0.5 * k, -0.3 * k, 2.0 * k), (0.002 * k, -0.001 * k, 0.40 + 0.004 * k))
        obs, info = perception.process(render(dots, T), t=0.033 * k)
        assert obs is not None and len(obs.keys) == 5, info
        error_px = (obs.xy - true_normalized(dots, obs.keys, T)) * 600.0
        assert np.max(np.abs(error_px)) < 0.1


def test_occluded_dot_is_missing_and_others_kept(dots, dots_reference):
    image = render(dots, NOW)
    uv = CAMERA.normalized_to_pixels(true_normalized(dots, [("dot", 2)], NOW))[0]
    cv2.circle(image, tuple(int(round(c)) for c in uv), 18, (235, 235, 235), -1)
    obs, info = Perception(dots, CAMERA, dots_reference).process(image, t=0.0)
    assert info.missing == [("dot", 2)]
    assert set(obs.keys) == set(dots.keys()) - {("dot", 2)}
    assert info.n_detected == 4


def test_pnp_depth_is_the_true_depth(dots, dots_reference):
    perception = Perception(dots, CAMERA, dots_reference, DepthSettings("target_model"))
    obs, info = perception.process(render(dots, NOW), t=0.0)
    np.testing.assert_allclose(obs.depth, camera_points(dots, obs.keys, NOW)[:, 2], atol=1e-3)
    assert info.depth_invalid == []


def plane_depth_image(T_camera_target, camera, encoding):
    """Depth of the target plane at every pixel: Z = d / (n . (x, y, 1)) with n the plane
    normal and d its distance, both in the camera frame."""
    u, v = np.meshgrid(np.arange(camera.width, dtype=float), np.arange(camera.height, dtype=float))
    xy = camera.pixels_to_normalized(np.column_stack([u.ravel(), v.ravel()]))
    n = T_camera_target[:3, 2]
    d = n @ T_camera_target[:3, 3]
    z = (d / (xy @ n[:2] + n[2])).reshape(camera.height, camera.width)
    if encoding == "16UC1":
        return np.round(z * 1000.0).astype(np.uint16)
    return z.astype(np.float32)


@pytest.mark.parametrize("encoding, tol_m", [("32FC1", 2e-4), ("16UC1", 1.5e-3)])
def test_depth_image_reads_the_depth_at_each_point(dots, dots_reference, encoding, tol_m):
    """Tolerance: the nearest pixel's depth (one pixel ~0.8 mm on this tilted board), plus
    millimetre quantization for 16UC1."""
    depth = plane_depth_image(NOW, CAMERA, encoding)
    perception = Perception(dots, CAMERA, dots_reference, DepthSettings("depth_image"))
    obs, info = perception.process(render(dots, NOW), 0.0, DepthImage(depth, encoding))
    np.testing.assert_allclose(obs.depth, camera_points(dots, obs.keys, NOW)[:, 2], atol=tol_m)
    assert info.depth_invalid == []


def test_invalid_depth_pixels_fall_back_to_taught_depth(dots, dots_reference):
    depth = plane_depth_image(NOW, CAMERA, "32FC1")
    uv = CAMERA.normalized_to_pixels(true_normalized(dots, [("dot", 1)], NOW))[0]
    u, v = np.round(uv).astype(int)
    depth[v - 10:v + 11, u - 10:u + 11] = np.nan  # a hole the 5x5 median cannot bridge
    perception = Perception(dots, CAMERA, dots_reference, DepthSettings("depth_image"))
    obs, info = perception.process(render(dots, NOW), 0.0, DepthImage(depth, "32FC1"))
    assert info.depth_invalid == [("dot", 1)]
    i = obs.keys.index(("dot", 1))
    assert obs.depth[i] == dots_reference.depths[dots_reference.keys.index(("dot", 1))]
    # without any depth frame every point falls back
    obs, info = perception.process(render(dots, NOW), 0.0, None)
    assert sorted(info.depth_invalid) == sorted(obs.keys)


def test_without_reference_or_with_a_wrong_image_size(dots):
    perception = Perception(dots, CAMERA)
    obs, info = perception.process(render(dots, NOW), 0.0)
    assert obs is None and info.reason == "no reference loaded" and info.n_detected == 5
    with pytest.raises(ValueError, match="320x240 but the camera model is 640x480"):
        perception.process(np.zeros((240, 320, 3), np.uint8), 0.0)


def test_nothing_in_view(dots, dots_reference):
    empty = np.full((480, 640, 3), BACKGROUND, np.uint8)
    obs, info = Perception(dots, CAMERA, dots_reference).process(empty, 0.0)
    assert obs is None and info.n_matched == 0 and "need" in info.reason
    assert sorted(info.missing) == sorted(dots.keys())
