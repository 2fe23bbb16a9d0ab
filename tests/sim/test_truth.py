"""Ground truth of dot images against the conic geometry of a projected circle.

A circle on the plane z = 0 is the conic C = diag(1, 1, -r^2) (centred at the origin); under
the plane homography H = K [r1 r2 t] its image is the conic C' = H^-T C H^-1 (Hartley &
Zisserman 2003, Multiple View Geometry, 2nd ed., sec. 2.3, result 2.13). For an ellipse
``[[A, b], [b^T, c]]`` the centre, which is also the centroid of the region it bounds, is
``-A^-1 b``; it is not the image of the circle's centre (Heikkila 2000, IEEE TPAMI 22(10),
sec. 3). ``truth.disc_image_centroid`` instead takes the polygon centroid of the projected rim,
which also works with lens distortion; without distortion the two must agree.
"""
from __future__ import annotations

import cv2
import numpy as np
import pytest
from scipy.spatial.transform import Rotation

from vservo_node.sim.truth import disc_image_centroid, polygon_centroid, project_points
from vservo_node.vision.camera import CameraModel

K = np.array([[600.0, 0.0, 318.0], [0.0, 604.0, 242.0], [0.0, 0.0, 1.0]])


def conic_image_centre(T_camera_target, centre_xy, radius):
    shift = np.array([[1.0, 0, centre_xy[0]], [0, 1.0, centre_xy[1]], [0, 0, 1.0]])
    H = K @ T_camera_target[:3, [0, 1, 3]] @ shift
    Hinv = np.linalg.inv(H)
    C = Hinv.T @ np.diag([1.0, 1.0, -radius**2]) @ Hinv
    return -np.linalg.solve(C[:2, :2], C[:2, 2])


@pytest.mark.parametrize("rotvec_deg, t, centre", [
    ((30, -20, 10), (0.02, -0.01, 0.25), (0.03, -0.02)),
    ((-40, 5, 90), (-0.03, 0.02, 0.2), (-0.05, 0.04)),
])
def test_disc_centroid_is_the_centre_of_the_image_conic(rotvec_deg, t, centre):
    cam = CameraModel(640, 480, K)
    T = np.eye(4)
    T[:3, :3] = Rotation.from_rotvec(np.radians(rotvec_deg)).as_matrix()
    T[:3, 3] = t
    radius = 0.015
    centroid = disc_image_centroid(cam, T, centre, radius)
    assert np.allclose(centroid, conic_image_centre(T, centre, radius), atol=1e-4)
    projected_centre = project_points(cam, (T @ [centre[0], centre[1], 0, 1])[None, :3])[0]
    assert np.linalg.norm(projected_centre - centroid) > 0.3  # the perspective bias is real


def test_disc_partly_behind_the_camera_has_no_centroid():
    cam = CameraModel(640, 480, K)
    T = np.eye(4)
    T[:3, :3] = Rotation.from_euler("x", 80, degrees=True).as_matrix()
    T[:3, 3] = [0.0, 0.0, 0.005]  # the rim dips behind the camera (z = 0.005 -/+ 0.0098)
    assert np.isnan(disc_image_centroid(cam, T, (0.0, 0.0), 0.01)).all()


def test_polygon_centroid_of_known_shapes():
    square = [(0, 0), (2, 0), (2, 2), (0, 2)]
    triangle = [(0, 0), (3, 0), (0, 3)]
    assert np.allclose(polygon_centroid(square), (1, 1))
    assert np.allclose(polygon_centroid(triangle), (1, 1))  # mean of the vertices


def test_projected_points_match_opencv_and_mark_points_behind():
    cam = CameraModel(640, 480, K, [-0.2, 0.05, 0.001, -0.001, 0.0], "plumb_bob")
    points = np.array([[0.01, -0.02, 0.3], [0.1, 0.05, 0.5], [0.0, 0.0, -0.2]])
    uv = project_points(cam, points)
    expected, _ = cv2.projectPoints(points[:2], np.zeros(3), np.zeros(3), cam.K, cam.D)
    assert np.allclose(uv[:2], expected.reshape(-1, 2), atol=1e-9)
    assert np.isnan(uv[2]).all()


def test_a_ray_the_lens_model_folds_into_the_image_is_not_in_view():
    """A strong barrel polynomial (k2 < 0) folds rays far off-axis back into the image; such a
    point lands on a pixel whose own ray is another one, so it is out of view."""
    from vservo_node.sim.truth import frame_truth
    from vservo_node.vision.targets import target_from_dict

    cam = CameraModel(640, 480, K, [-0.3, -0.2, 0.0, 0.0, 0.0], "plumb_bob")
    # r + k1 r^3 + k2 r^5 peaks at r = 0.80 (0.58) and is 0.29 again at r = 1.15 (49 deg
    # off-axis), which lands at u = 318 + 600 * 0.29, inside the image.
    far = np.array([1.15, 0.0, 1.0])
    uv = project_points(cam, far[None])[0]
    assert 0 <= uv[0] < 640 and 0 <= uv[1] < 480, "the fold-back this test needs is gone"
    target = target_from_dict({"name": "t", "kind": "dots", "board": {"width": 1, "height": 1},
                               "dots": [{"id": i, "colour": [0, 0, 0], "centre": c,
                                         "radius": 0.01}
                                        for i, c in enumerate([(1.15, 0.0), (0.0, 0.0),
                                                               (0.05, 0.0)])]})
    T_base_target = np.eye(4)
    T_base_target[2, 3] = 1.0     # target plane z = 1 in the camera (= base) frame
    truth = frame_truth(0.0, [], [], cam, target, np.eye(4), T_base_target)
    assert truth.in_view.tolist() == [False, True, True]
