"""Rendered geometry checked against OpenCV and against the geometry of projected discs.

Reference positions come from cv2.projectPoints (OpenCV, the pinhole model with the
Brown-Conrady "plumb_bob" distortion: Brown 1966, "Decentering distortion of lenses") of the
same 3-D points; measured positions come from OpenCV's own detectors (findChessboardCorners,
aruco) refined with cornerSubPix, or from intensity centroids. A renderer with the wrong
homography, pixel-centre convention, distortion direction or texture filtering misses the
0.1 px budgets below by far (a half-pixel convention slip alone costs 0.5 px).
"""
from __future__ import annotations

import functools

import cv2
import numpy as np
import pytest
from scipy.spatial.transform import Rotation

from vservo_node.sim.camera_sim import Photometric, SimCamera
from vservo_node.sim.cell import target_texture
from vservo_node.sim.render import PlanarTexture, PlaneRenderer
from vservo_node.sim.truth import disc_image_centroid
from vservo_node.vision.camera import CameraModel
from vservo_node.vision.targets import load_target, target_from_dict

K = [[610.0, 0.0, 322.3], [0.0, 606.0, 238.6], [0.0, 0.0, 1.0]]
LENSES = {"pinhole": ("none", []),
          "plumb_bob": ("plumb_bob", [-0.22, 0.09, 0.0012, -0.0007, -0.01])}
# Mild optics blur, as a real lens has (sigma in pixels): cornerSubPix is steadier on it.
LENS_BLUR = Photometric(blur_sigma_px=0.7, table_texture=0.0)
SHARP = Photometric(table_texture=0.0)
# Poses of the target in the camera frame: (xyz rotation vector in degrees, translation m).
POSES = [((0, 0, 0), (0.004, -0.003, 0.33)),
         ((14, -9, 35), (-0.01, 0.012, 0.30)),
         ((-18, 12, -120), (0.015, -0.01, 0.36)),
         ((8, 20, 170), (0.0, 0.0, 0.28))]


def camera(lens):
    model, d = LENSES[lens]
    return CameraModel(640, 480, K, d, model)


def pose(rotvec_deg, t):
    T = np.eye(4)
    T[:3, :3] = Rotation.from_rotvec(np.radians(rotvec_deg)).as_matrix()
    T[:3, 3] = t
    return T


def project(cam, T_camera_target, points):
    """Reference: cv2.projectPoints of target-frame points."""
    rvec, _ = cv2.Rodrigues(T_camera_target[:3, :3])
    uv, _ = cv2.projectPoints(np.asarray(points, float), rvec, T_camera_target[:3, 3],
                              cam.K, cam.D if cam.D.size else np.zeros(5))
    return uv.reshape(-1, 2)


def grey(image):
    return cv2.cvtColor(image, cv2.COLOR_RGB2GRAY)


def refine(gray, corners, half_window=5):
    criteria = (cv2.TERM_CRITERIA_EPS + cv2.TERM_CRITERIA_COUNT, 100, 1e-6)
    return cv2.cornerSubPix(gray, np.float32(corners).reshape(-1, 1, 2),
                            (half_window, half_window), (-1, -1), criteria).reshape(-1, 2)


# ----------------------------------------------------------------------------- chessboard
SQUARE = 0.02          # m
INNER = (8, 6)         # inner corners (columns, rows)
TEXELS = 64            # texels per square: edges fall on texel boundaries, exact


def chessboard_texture():
    cols, rows = INNER[0] + 1, INNER[1] + 1
    board = np.full(((rows + 2) * TEXELS, (cols + 2) * TEXELS, 3), 255, np.uint8)
    for i in range(rows):
        for j in range(cols):
            if (i + j) % 2 == 0:
                board[(i + 1) * TEXELS:(i + 2) * TEXELS, (j + 1) * TEXELS:(j + 2) * TEXELS] = 0
    width, height = (cols + 2) * SQUARE, (rows + 2) * SQUARE
    texture = PlanarTexture.from_extent(board, TEXELS / SQUARE, (-width / 2, -height / 2))
    xs = (np.arange(INNER[0]) - (INNER[0] - 1) / 2) * SQUARE
    ys = (np.arange(INNER[1]) - (INNER[1] - 1) / 2) * SQUARE
    corners = np.array([[x, y, 0.0] for y in ys for x in xs])
    return texture, corners


@pytest.mark.parametrize("lens", sorted(LENSES))
@pytest.mark.parametrize("rotvec_deg, t", POSES)
def test_chessboard_corners_match_project_points(lens, rotvec_deg, t):
    cam = camera(lens)
    texture, corners = chessboard_texture()
    T = pose(rotvec_deg, t)
    image = SimCamera(cam, texture, LENS_BLUR).render(T, 0.0)
    gray = grey(image)
    found, detected = cv2.findChessboardCorners(gray, INNER)
    assert found
    measured = refine(gray, detected)
    expected = project(cam, T, corners)
    # findChessboardCorners may list the grid from either end.
    if np.linalg.norm(measured[0] - expected[0]) > np.linalg.norm(measured[0] - expected[-1]):
        measured = measured[::-1]
    error = np.linalg.norm(measured - expected, axis=1)
    assert error.max() < 0.1, f"worst corner {error.max():.3f} px (mean {error.mean():.3f})"


# ----------------------------------------------------------------------------- fiducials
# cornerSubPix is biased on the L-shaped outer corners of a marker: on an 8x supersampled
# (near ideal) rendering of tray_tags it lands 0.10-0.25 px inside the corner (measured while
# writing this test), so marker corners are measured here by intersecting the marker's edge
# lines, each fitted to sub-pixel edge points (the 50 % crossing of the dark-to-light profile,
# unbiased for a straight edge under a symmetric blur; Canny 1986 and common practice). With a
# distorted lens the edge points are undistorted by cv2.undistortPoints first, the corners
# intersected in normalized coordinates and projected back by cv2.projectPoints.
def edge_points(gray, a, b, samples=24, reach=4.0):
    """Sub-pixel points of the straight edge running from corner ``a`` to corner ``b`` of a
    dark square whose corners run clockwise in the image, as aruco lists them."""
    along = (b - a) / np.linalg.norm(b - a)
    outward = np.array([along[1], -along[0]])  # clockwise corners (v down): outside the square
    offsets = np.arange(-reach, reach + 1e-9, 0.125)
    points = []
    for s in np.linspace(0.2, 0.8, samples):
        base = a + s * (b - a)
        line = base + offsets[:, None] * outward
        profile = cv2.remap(gray.astype(np.float32), line[:, 0:1].astype(np.float32),
                            line[:, 1:2].astype(np.float32), cv2.INTER_LINEAR).ravel()
        level = 0.5 * (profile[:8].mean() + profile[-8:].mean())
        k = np.flatnonzero((profile[:-1] < level) & (profile[1:] >= level))[0]
        frac = (level - profile[k]) / (profile[k + 1] - profile[k])
        points.append(base + (offsets[k] + frac * 0.125) * outward)
    return np.array(points)


def corners_from_edges(gray, cam, rough):
    """Marker corners (4, 2), pixels: intersections of lines fitted to its four edges."""
    lines = []
    for i in range(4):
        pts = edge_points(gray, rough[i], rough[(i + 1) % 4])
        xy = cv2.undistortPoints(pts.reshape(-1, 1, 2), cam.K,
                                 cam.D if cam.D.size else None).reshape(-1, 2)
        centre = xy.mean(axis=0)
        direction = np.linalg.svd(xy - centre)[2][0]
        lines.append(np.cross([*centre, 1.0], [*(centre + direction), 1.0]))
    corners = []
    for i in range(4):  # corner i joins the edge ending there and the edge starting there
        p = np.cross(lines[i - 1], lines[i])
        corners.append([p[0] / p[2], p[1] / p[2], 1.0])
    uv, _ = cv2.projectPoints(np.array(corners), np.zeros(3), np.zeros(3), cam.K,
                              cam.D if cam.D.size else np.zeros(5))
    return uv.reshape(-1, 2)


@functools.cache
def tags():
    target = load_target("tray_tags")
    return target, target_texture(target)


@pytest.mark.parametrize("lens", sorted(LENSES))
@pytest.mark.parametrize("rotvec_deg, t", POSES[:3])
def test_marker_corners_match_project_points(lens, rotvec_deg, t):
    target, texture = tags()
    cam = camera(lens)
    T = pose(rotvec_deg, t)
    gray = grey(SimCamera(cam, texture, LENS_BLUR).render(T, 0.0))
    detector = cv2.aruco.ArucoDetector(target.aruco_dictionary(),
                                       cv2.aruco.DetectorParameters())
    corners, ids, _ = detector.detectMarkers(gray)
    # The bits are drawn right: every marker is found, with its id and orientation (below).
    assert ids is not None and sorted(ids.ravel()) == sorted(m.id for m in target.markers)
    for rough, marker_id in zip(corners, ids.ravel()):
        measured = corners_from_edges(gray, cam, rough.reshape(4, 2).astype(float))
        keys = [("tag", int(marker_id), c) for c in range(4)]
        expected = project(cam, T, target.model_points(keys))
        error = np.linalg.norm(measured - expected, axis=1)
        assert error.max() < 0.1, f"tag {marker_id}: worst corner {error.max():.3f} px"


# ----------------------------------------------------------------------------- dots
def big_dark_dots():
    """Large dark dots: at these sizes and tilts the perspective bias is several tenths of a
    pixel, so the test tells the disc's centroid from its projected centre."""
    dots = [{"id": i, "colour": [20, 20, 20], "centre": [x, y], "radius": 0.014}
            for i, (x, y) in enumerate([(-0.045, -0.045), (0.045, -0.045), (0.045, 0.045),
                                        (-0.045, 0.045), (0.0, 0.0)])]
    return target_from_dict({"name": "big_dots", "kind": "dots", "dots": dots,
                             "board": {"width": 0.14, "height": 0.14,
                                       "colour": [240, 240, 240]},
                             "segmentation": {"mode": "dark"}})


def intensity_centroid(gray, rim_uv, background):
    """Centroid of the darkness (background - intensity) in a box around a dot's rim."""
    x0, y0 = np.floor(rim_uv.min(axis=0)).astype(int) - 3
    x1, y1 = np.ceil(rim_uv.max(axis=0)).astype(int) + 4
    weight = background - gray[y0:y1, x0:x1].astype(float)
    v, u = np.mgrid[y0:y1, x0:x1]
    return np.array([(weight * u).sum(), (weight * v).sum()]) / weight.sum()


@pytest.mark.parametrize("lens", sorted(LENSES))
@pytest.mark.parametrize("rotvec_deg, t", [((28, -15, 40), (0.01, -0.01, 0.28)),
                                           ((-25, 25, 160), (-0.01, 0.02, 0.30))])
def test_dot_intensity_centroid_is_the_projected_disc_centroid(lens, rotvec_deg, t):
    target = big_dark_dots()
    cam = camera(lens)
    T = pose(rotvec_deg, t)
    gray = grey(SimCamera(cam, target_texture(target), SHARP).render(T, 0.0)).astype(float)
    background = 240.0  # the board colour: darkness is zero off the dots
    a = np.linspace(0, 2 * np.pi, 90, endpoint=False)
    worst, bias = 0.0, 0.0
    for dot in target.dots:
        rim = np.column_stack([dot.centre[0] + dot.radius * np.cos(a),
                               dot.centre[1] + dot.radius * np.sin(a), np.zeros_like(a)])
        measured = intensity_centroid(gray, project(cam, T, rim), background)
        centroid = disc_image_centroid(cam, T, dot.centre, dot.radius)
        centre = project(cam, T, [[dot.centre[0], dot.centre[1], 0.0]])[0]
        worst = max(worst, np.linalg.norm(measured - centroid))
        bias = max(bias, np.linalg.norm(centre - centroid))
    assert worst < 0.02, f"intensity centroid {worst:.4f} px from the disc centroid"
    assert bias > 0.3, "pose too gentle: the test would not tell centroid from centre"


# ----------------------------------------------------------------------------- visibility
def plain_board(colour=(200, 30, 30), size=0.1):
    texture = np.empty((50, 50, 3), np.uint8)
    texture[:] = colour
    return PlanarTexture.from_extent(texture, 50 / size, (-size / 2, -size / 2))


@pytest.mark.parametrize("T, why", [
    (pose((0, 0, 0), (0, 0, -0.3)), "behind the camera"),
    (pose((180, 0, 0), (0, 0, 0.3)), "seen from its back"),
    (pose((90, 0, 0), (0, 0, 0.3)), "edge-on"),
    (pose((0, 0, 0), (2.0, 0, 0.3)), "out of view"),
])
@pytest.mark.parametrize("lens", sorted(LENSES))
def test_invisible_target_leaves_the_table(T, why, lens):
    sim = SimCamera(camera(lens), plain_board(), SHARP)
    table = sim.render(pose((0, 0, 0), (0, 0, -1.0)), 0.0)
    assert np.array_equal(sim.render(T, 0.0), table), why


@pytest.mark.parametrize("lens", sorted(LENSES))
def test_plane_through_the_camera_is_drawn_only_in_front(lens):
    """A large board passing beside and behind the camera (steep, close): every pixel is board
    or table exactly as the ray through it says (ray from cv2.undistortPoints, plane hit by
    hand), away from the board's border."""
    cam = camera(lens)
    board = plain_board(size=1.0)
    T = pose((0, 75, 0), (0.1, 0.0, 0.05))  # the plane x-z crosses z = 0 near the camera
    renderer = PlaneRenderer(cam)
    image = np.zeros((480, 640, 3), np.uint8)
    renderer.draw(image, board, T)
    u, v = np.meshgrid(np.arange(2, 640, 7.0), np.arange(2, 480, 7.0))
    uv = np.column_stack([u.ravel(), v.ravel()])
    rays = cv2.undistortPointsIter(uv.reshape(-1, 1, 2), cam.K, cam.D if cam.D.size else None,
                                   None, None, (cv2.TERM_CRITERIA_COUNT | cv2.TERM_CRITERIA_EPS,
                                                100, 1e-14)).reshape(-1, 2)
    rays = np.column_stack([rays, np.ones(len(rays))])
    normal, point = T[:3, 2], T[:3, 3]
    depth = (normal @ point) / (rays @ normal)          # ray parameter of the plane hit
    hit = rays * depth[:, None]
    local = (hit - point) @ T[:3, :3]                   # hit in target coordinates
    inside = np.max(np.abs(local[:, :2]), axis=1)
    on_board = (depth > 0) & (inside < 0.5 - 0.01)
    off_board = (depth <= 0) | (inside > 0.5 + 0.01)
    drawn = image[uv[:, 1].astype(int), uv[:, 0].astype(int), 0] == 200
    assert on_board.sum() > 100 and off_board.sum() > 100
    assert drawn[on_board].all()
    assert not drawn[off_board].any()


@pytest.mark.parametrize("model, d", [
    ("plumb_bob", [-0.11, 0.06, 0.0004, -0.0003, 0.01]),
    ("rational_polynomial", [-0.2, 0.1, 0.001, -0.002, 0.01, 0.05, -0.02, 0.01])])
def test_outline_projection_matches_opencv(model, d):
    """The renderer's numpy lens projection (target outlines) agrees with cv2.projectPoints,
    the independent reference, to float rounding."""
    from vservo_node.sim.render import _lens_projector

    K = np.array([[615.0, 0.0, 321.5], [0.0, 612.0, 238.0], [0.0, 0.0, 1.0]])
    camera = CameraModel(640, 480, K, d, model)
    xy = np.random.default_rng(2).uniform(-0.6, 0.6, (500, 2))
    ref, _ = cv2.projectPoints(np.column_stack([xy, np.ones(len(xy))]), np.zeros(3),
                               np.zeros(3), K, np.asarray(d, float))
    assert np.abs(_lens_projector(camera)(xy) - ref.reshape(-1, 2)).max() < 1e-9
