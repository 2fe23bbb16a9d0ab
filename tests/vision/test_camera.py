"""CameraModel against OpenCV and the published distortion formulas."""

import cv2
import numpy as np
import pytest
from scipy.spatial.transform import Rotation

from vservo_node.vision.camera import CameraModel

WIDTH, HEIGHT = 640, 480
K_PINHOLE = np.array([[612.3, 0.0, 318.2], [0.0, 610.8, 243.6], [0.0, 0.0, 1.0]])
K_FISHEYE = np.array([[285.0, 0.0, 320.0], [0.0, 286.0, 240.0], [0.0, 0.0, 1.0]])
# Lens coefficients of our own invention, strong enough that a mistake shows at the corners.
LENSES = {
    "plumb_bob": (K_PINHOLE, [-0.28, 0.09, 6e-4, -4e-4, -0.012]),
    "rational_polynomial": (K_PINHOLE, [0.42, -0.11, 5e-4, -3e-4, 0.006, 0.75, -0.04, 0.02]),
    "equidistant": (K_FISHEYE, [-0.012, 0.045, -0.043, 0.011]),
}


def _camera(model):
    K, D = LENSES[model]
    return CameraModel(WIDTH, HEIGHT, K, D, model)


def _pixel_grid(n_u=41, n_v=31):
    """Pixels over the whole image, borders and corners included."""
    u, v = np.meshgrid(np.linspace(0, WIDTH - 1, n_u), np.linspace(0, HEIGHT - 1, n_v))
    return np.column_stack([u.ravel(), v.ravel()])


def _formula_pixels(model, K, D, xy):
    """Distort normalized coordinates with the formulas written out independently.

    plumb_bob / rational_polynomial: Brown, "Decentering distortion of lenses", 1966, and the
    OpenCV calib3d documentation ("Camera Calibration and 3D Reconstruction", detailed
    description: radial ratio (1+k1 r^2+k2 r^4+k3 r^6)/(1+k4 r^2+k5 r^4+k6 r^6), tangential p1,
    p2). equidistant: OpenCV fisheye module documentation (theta_d = theta (1 + k1 theta^2 +
    k2 theta^4 + k3 theta^6 + k4 theta^8), theta = atan(r)), after Kannala & Brandt, "A generic
    camera model and calibration method for conventional, wide-angle, and fish-eye lenses",
    IEEE TPAMI 28(8), 2006.
    """
    x, y = xy[:, 0], xy[:, 1]
    r2 = x * x + y * y
    if model == "equidistant":
        k1, k2, k3, k4 = D
        r = np.sqrt(r2)
        th = np.arctan(r)
        th_d = th * (1 + k1 * th**2 + k2 * th**4 + k3 * th**6 + k4 * th**8)
        scale = np.where(r > 0, th_d / np.where(r > 0, r, 1.0), 1.0)
        xd, yd = x * scale, y * scale
    else:
        k1, k2, p1, p2, k3, *rest = D
        k4, k5, k6 = rest if rest else (0.0, 0.0, 0.0)
        radial = (1 + k1 * r2 + k2 * r2**2 + k3 * r2**3) / (1 + k4 * r2 + k5 * r2**2 + k6 * r2**3)
        xd = x * radial + 2 * p1 * x * y + p2 * (r2 + 2 * x * x)
        yd = y * radial + p1 * (r2 + 2 * y * y) + 2 * p2 * x * y
    return np.column_stack([K[0, 0] * xd + K[0, 2], K[1, 1] * yd + K[1, 2]])


def _points_in_view(rng, n, max_tan):
    xy = rng.uniform(-max_tan, max_tan, (n, 2))
    Z = rng.uniform(0.2, 3.0, n)
    return np.column_stack([xy * Z[:, None], Z])


@pytest.mark.parametrize("model", sorted(LENSES))
def test_project_matches_published_formula(model):
    # Source: Brown 1966 / OpenCV calib3d docs / Kannala & Brandt 2006 (see _formula_pixels).
    K, D = LENSES[model]
    rng = np.random.default_rng(1)
    p = _points_in_view(rng, 200, 1.5 if model == "equidistant" else 0.5)
    expected = _formula_pixels(model, K, D, p[:, :2] / p[:, 2:])
    np.testing.assert_allclose(_camera(model).project(p), expected, atol=1e-9)


@pytest.mark.parametrize("model", sorted(LENSES))
def test_project_matches_opencv_with_a_world_pose(model):
    # Source: OpenCV cv2.projectPoints / cv2.fisheye.projectPoints (reference library), fed world
    # points and a pose; our model gets the same points moved into the camera frame by SciPy.
    K, D = LENSES[model]
    rng = np.random.default_rng(2)
    rvec, tvec = np.array([0.2, -0.4, 0.3]), np.array([0.05, -0.1, 0.4])
    p_cam = _points_in_view(rng, 100, 1.2 if model == "equidistant" else 0.5)
    p_world = Rotation.from_rotvec(rvec).inv().apply(p_cam - tvec)
    if model == "equidistant":
        ref, _ = cv2.fisheye.projectPoints(p_world.reshape(-1, 1, 3), rvec, tvec, K, np.array(D))
    else:
        ref, _ = cv2.projectPoints(p_world, rvec, tvec, K, np.array(D))
    np.testing.assert_allclose(_camera(model).project(p_cam), ref.reshape(-1, 2), atol=1e-8)


@pytest.mark.parametrize("model", sorted(LENSES))
def test_round_trip_over_the_whole_image(model):
    # pixel -> normalized (our iterative undistortion) -> pixel by the independent formula of
    # _formula_pixels, over every part of the image, corners included. 1e-6 px: project goal.
    K, D = LENSES[model]
    uv = _pixel_grid()
    xy = _camera(model).pixels_to_normalized(uv)
    np.testing.assert_allclose(_formula_pixels(model, K, D, xy), uv, atol=1e-6)
    np.testing.assert_allclose(_camera(model).normalized_to_pixels(xy), uv, atol=1e-6)


@pytest.mark.parametrize("model", ["plumb_bob", "rational_polynomial"])
def test_undistortion_agrees_with_opencv_default_and_beats_it_at_the_corners(model):
    # Source: OpenCV cv2.undistortPoints (reference library; its default does 5 fixed-point
    # iterations). In the central half of the image it has converged: we agree to 1e-3 px.
    # Over the whole image our reprojection error is never worse than OpenCV's default.
    K, D = LENSES[model]
    cam = _camera(model)
    uv = _pixel_grid()
    ours = cam.pixels_to_normalized(uv)
    ref = cv2.undistortPoints(uv.reshape(-1, 1, 2), K, np.array(D)).reshape(-1, 2)
    central = (np.abs(uv[:, 0] - K[0, 2]) < WIDTH / 4) & (np.abs(uv[:, 1] - K[1, 2]) < HEIGHT / 4)
    np.testing.assert_allclose(ours[central] * K[0, 0], ref[central] * K[0, 0], atol=1e-3)
    err_ours = np.abs(_formula_pixels(model, K, D, ours) - uv).max()
    err_ref = np.abs(_formula_pixels(model, K, D, ref) - uv).max()
    assert err_ours <= err_ref


def test_fisheye_undistortion_matches_opencv():
    # Source: OpenCV cv2.fisheye.undistortPoints (reference library), default criteria.
    K, D = LENSES["equidistant"]
    uv = _pixel_grid()
    ref = cv2.fisheye.undistortPoints(uv.reshape(-1, 1, 2), K, np.array(D)).reshape(-1, 2)
    np.testing.assert_allclose(_camera("equidistant").pixels_to_normalized(uv), ref, atol=1e-9)


def _stereo_right_camera_info():
    """A rectified right camera of our own stereo head: R rotates the optical frame into the
    rectified frame; P has new intrinsics and the baseline term Tx = -fx' * 0.12 m."""
    K, D = LENSES["plumb_bob"]
    R = Rotation.from_euler("xyz", [0.012, -0.021, 0.007]).as_matrix()
    P = np.array([[580.0, 0.0, 310.0, -580.0 * 0.12], [0.0, 580.0, 236.0, 0.0],
                  [0.0, 0.0, 1.0, 0.0]])
    return dict(width=WIDTH, height=HEIGHT, distortion_model="plumb_bob", d=D,
                k=K.ravel(), r=R.ravel(), p=P.ravel())


def test_rectified_mode_matches_opencv_rectification():
    # Source: OpenCV cv2.undistortPointsIter with R and P (reference library) maps a raw pixel to
    # the rectified image. The rectified model must read that rectified pixel as the same ray
    # (in the optical frame) as the raw model reads the raw pixel.
    info = _stereo_right_camera_info()
    raw = CameraModel.from_camera_info(**info)
    rect = CameraModel.from_camera_info(**info, rectified=True)
    uv_raw = _pixel_grid(9, 7)
    criteria = (cv2.TERM_CRITERIA_COUNT | cv2.TERM_CRITERIA_EPS, 200, 1e-15)
    uv_rect = cv2.undistortPointsIter(uv_raw.reshape(-1, 1, 2), raw.K, raw.D, raw.R, raw.P,
                                      criteria).reshape(-1, 2)
    np.testing.assert_allclose(rect.pixels_to_normalized(uv_rect),
                               raw.pixels_to_normalized(uv_raw), atol=1e-10)


def test_rectified_mode_projects_with_p_and_ignores_d():
    # Source: Hartley & Zisserman, Multiple View Geometry, 2nd ed. 2003, sec. 6.1 (x = P X) with
    # the point first rotated into the rectified frame by R (sensor_msgs/CameraInfo docs: R
    # aligns the camera frame to the rectified image plane). P's Tx only applies to points given
    # in the left camera's frame, so the camera's own points project with P[:, :3].
    info = _stereo_right_camera_info()
    rect = CameraModel.from_camera_info(**info, rectified=True)
    other_lens = CameraModel.from_camera_info(**{**info, "d": [0.3, -0.2, 0.01, 0.01, 0.1]},
                                              rectified=True)
    p = _points_in_view(np.random.default_rng(3), 50, 0.4)
    P = np.asarray(info["p"]).reshape(3, 4)
    R = np.asarray(info["r"]).reshape(3, 3)
    h = (P[:, :3] @ R @ p.T).T
    np.testing.assert_allclose(rect.project(p), h[:, :2] / h[:, 2:], atol=1e-9)
    uv = _pixel_grid(9, 7)
    np.testing.assert_array_equal(rect.pixels_to_normalized(uv),
                                  other_lens.pixels_to_normalized(uv))
    assert rect.effective_distortion == "none"


def _blob_centroid(image):
    v, u = np.mgrid[: image.shape[0], : image.shape[1]]
    return np.array([(u * image).sum(), (v * image).sum()]) / image.sum()


@pytest.mark.parametrize("model", ["plumb_bob", "equidistant"])
def test_scaled_model_matches_a_resized_image(model):
    # Source: OpenCV cv2.resize with INTER_AREA (reference library): at an integer factor it
    # averages whole pixel blocks, so it moves the intensity centroid of a blob exactly as it
    # moves pixel coordinates. A blob drawn at the full-size projection of a point, resized to
    # half size, must have its centroid at the half-size model's projection of the same point.
    full = _camera(model)
    half = full.scaled(WIDTH // 2, HEIGHT // 2)
    p = np.array([[0.13, -0.07, 0.9]])
    u0, v0 = full.project(p)[0]
    v, u = np.mgrid[:HEIGHT, :WIDTH]
    blob = np.exp(-((u - u0) ** 2 + (v - v0) ** 2) / (2 * 4.0**2))
    small = cv2.resize(blob, (WIDTH // 2, HEIGHT // 2), interpolation=cv2.INTER_AREA)
    np.testing.assert_allclose(half.project(p)[0], _blob_centroid(small), atol=1e-6)
    np.testing.assert_allclose(_blob_centroid(blob), [u0, v0], atol=1e-6)  # blob is unbiased


def test_scaled_model_sees_the_same_rays():
    # Scaling the image must not change the ray a feature stands for, and D is resolution-free.
    # Self-consistency check, no outside source.
    cam = _camera("rational_polynomial")
    big = cam.scaled(2 * WIDTH, 2 * HEIGHT)
    xy = cam.pixels_to_normalized(_pixel_grid(9, 7))
    uv_big = big.normalized_to_pixels(xy)
    np.testing.assert_allclose(uv_big, (cam.normalized_to_pixels(xy) + 0.5) * 2 - 0.5, atol=1e-9)
    np.testing.assert_allclose(big.pixels_to_normalized(uv_big), xy, atol=1e-12)
    back = big.scaled(WIDTH, HEIGHT)
    np.testing.assert_allclose(back.K, cam.K, atol=1e-12)
    np.testing.assert_allclose(back.P, cam.P, atol=1e-12)


def test_pinhole_and_dict_round_trip():
    # Source: Hartley & Zisserman 2003, sec. 6.1: u = fx X/Z + cx, v = fy Y/Z + cy.
    cam = CameraModel.pinhole(WIDTH, HEIGHT, 500.0, 510.0, 319.5, 239.5)
    np.testing.assert_allclose(cam.project([[0.1, -0.2, 2.0]]), [[319.5 + 25.0, 239.5 - 51.0]])
    for original in (cam, _camera("equidistant"),
                     CameraModel.from_camera_info(**_stereo_right_camera_info(), rectified=True)):
        copy = CameraModel.from_dict(original.to_dict())
        assert copy.to_dict() == original.to_dict()


def test_camera_info_without_model_name_is_distortion_free():
    cam = CameraModel.from_camera_info(WIDTH, HEIGHT, "", [], K_PINHOLE.ravel(), np.eye(3).ravel(),
                                       np.hstack([K_PINHOLE, np.zeros((3, 1))]).ravel())
    assert cam.distortion_model == "none"


@pytest.mark.parametrize("kwargs, message", [
    (dict(K=np.eye(2)), "K must have 3x3 entries"),
    (dict(K=np.zeros((3, 3))), "not calibrated"),
    (dict(K=[[500, 1, 320], [0, 500, 240], [0, 0, 1]]), "skew"),
    (dict(D=[0.1] * 4, distortion_model="plumb_bob"), "takes 5 coefficients, got 4"),
    (dict(D=[0.1] * 5, distortion_model="rational_polynomial"), "takes 8 coefficients, got 5"),
    (dict(D=[0.1] * 5, distortion_model="equidistant"), "takes 4 coefficients, got 5"),
    (dict(D=[0.1], distortion_model="none"), "no non-zero coefficients"),
    (dict(distortion_model="fisheye"), "unknown distortion model 'fisheye'"),
    (dict(rectified=True), "rectified=True needs"),
    (dict(P=np.eye(3)), "P must have 3x4 entries"),
    (dict(R=np.diag([1.0, 1.0, -1.0])), "R must be a rotation"),
    (dict(width=0), "positive integers"),
])
def test_invalid_inputs_are_refused_with_a_reason(kwargs, message):
    args = dict(width=WIDTH, height=HEIGHT, K=K_PINHOLE, D=(), distortion_model="none")
    with pytest.raises(ValueError, match=message):
        CameraModel(**{**args, **kwargs})


def test_points_behind_the_camera_and_bad_shapes_are_refused():
    cam = _camera("plumb_bob")
    with pytest.raises(ValueError, match="not in front"):
        cam.project([[0.0, 0.0, 1.0], [0.1, 0.1, -0.5]])
    with pytest.raises(ValueError, match=r"shape \(N, 2\)"):
        cam.pixels_to_normalized([1.0, 2.0])
    with pytest.raises(ValueError, match="unknown camera keys"):
        CameraModel.from_dict({**cam.to_dict(), "fx": 3.0})
    assert cam.pixels_to_normalized(np.zeros((0, 2))).shape == (0, 2)


def test_non_finite_distortion_is_refused():
    """CameraInfo with NaN in D was accepted, and start was then refused for another reason."""
    with pytest.raises(ValueError, match="distortion coefficients D must be finite"):
        CameraModel(640, 480, [[500, 0, 320], [0, 500, 240], [0, 0, 1]],
                    [0.1, float("nan"), 0.0, 0.0, 0.0], "plumb_bob")
