"""Ground truth of a simulated frame: where the target's features really are in the image.

Two positions exist for a dot: the projection of its centre and the centroid of its image (the
projected disc). Under perspective they differ (Heikkila 2000, "Geometric camera calibration
using circular control points", IEEE TPAMI 22(10), sec. 3), and an intensity-centroid detector
measures the second, so both are reported. The disc's image is found by projecting its rim
(with lens distortion) and taking the area centroid of that polygon.
"""
from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from vservo_node.control.frames import invert

# Rim samples for a disc's image; the polygon centroid's error falls as 1/n^2 (about 1e-6 px
# for a 30 px dot at 720 samples).
RIM_SAMPLES = 720


@dataclass(frozen=True)
class Truth:
    """The true state of the cell at time ``t`` (seconds).

    Poses are 4x4, metres, in the base frame unless named otherwise. ``keys`` are the target's
    feature keys (``vision.targets``); per feature: ``points_target`` and ``points_camera``
    (N, 3) metres, ``uv`` (N, 2) pixels projected with distortion (NaN when the point is not in
    front of the camera), ``in_view`` (N,) bool (in front and inside the image), and for dot
    targets ``disc_centroids_uv`` (N, 2), the centroid of each dot's image (NaN unless the
    whole disc is in front of the camera); None for other targets. ``detectable`` (N,) bool,
    filled in by the cell: in view, not painted over and not behind an occluder.
    """

    t: float
    q: np.ndarray
    dq: np.ndarray
    T_base_camera: np.ndarray
    T_base_target: np.ndarray
    T_camera_target: np.ndarray
    keys: list
    points_target: np.ndarray
    points_camera: np.ndarray
    uv: np.ndarray
    in_view: np.ndarray
    disc_centroids_uv: np.ndarray | None
    detectable: np.ndarray | None = None


def project_points(camera, points_camera) -> np.ndarray:
    """Pixels (N, 2) of points (N, 3) in the camera optical frame, with the camera's distortion;
    NaN rows for points not in front of the camera (Z <= 0)."""
    points_camera = np.asarray(points_camera, dtype=float).reshape(-1, 3)
    uv = np.full((len(points_camera), 2), np.nan)
    front = points_camera[:, 2] > 0
    if front.any():
        uv[front] = camera.project(points_camera[front])
    return uv


def polygon_centroid(xy) -> np.ndarray:
    """Area centroid (2,) of a simple polygon with vertices ``xy`` (N, 2) in order
    (shoelace formula)."""
    x, y = np.asarray(xy, dtype=float).T
    x1, y1 = np.roll(x, -1), np.roll(y, -1)
    cross = x * y1 - x1 * y
    area = cross.sum() / 2.0
    return np.array([((x + x1) * cross).sum(), ((y + y1) * cross).sum()]) / (6.0 * area)


def disc_image_centroid(camera, T_camera_target, centre_xy, radius) -> np.ndarray:
    """Centroid (2,) in pixels of the image of the disc of ``radius`` (m) centred at
    ``centre_xy`` (m) on the target plane z = 0; NaN unless the whole rim is in front of the
    camera."""
    a = np.linspace(0.0, 2.0 * np.pi, RIM_SAMPLES, endpoint=False)
    rim = np.column_stack([centre_xy[0] + radius * np.cos(a), centre_xy[1] + radius * np.sin(a),
                           np.zeros_like(a)])
    T = np.asarray(T_camera_target, dtype=float)
    rim_camera = rim @ T[:3, :3].T + T[:3, 3]
    if np.any(rim_camera[:, 2] <= 0):
        return np.full(2, np.nan)
    return polygon_centroid(camera.project(rim_camera))


def unambiguous(camera, points_camera, uv) -> np.ndarray:
    """False for points whose pixel the lens model reached by folding back (far outside the
    field of view a polynomial distortion can map rays into the image): undistorting the pixel
    must give the point's own ray back."""
    if len(uv) == 0:
        return np.zeros(0, dtype=bool)
    xy = points_camera[:, :2] / points_camera[:, 2:]
    back = camera.pixels_to_normalized(uv)
    return np.linalg.norm(back - xy, axis=1) < 1e-6 * (1.0 + np.linalg.norm(xy, axis=1))


def inside_image(camera, uv) -> np.ndarray:
    """(N,) bool: pixels ``uv`` (N, 2) on the image (pixel centres at integers, the image
    spanning -0.5 .. size - 0.5); False for NaN rows."""
    with np.errstate(invalid="ignore"):
        return ((uv[:, 0] >= -0.5) & (uv[:, 0] <= camera.width - 0.5)
                & (uv[:, 1] >= -0.5) & (uv[:, 1] <= camera.height - 0.5))


def unoccluded(uv, occluders, t: float) -> np.ndarray:
    """(N,) bool: pixels ``uv`` (N, 2) not under an image-space occluder active at time t
    (``camera_sim.Occluder``: ``rect_px`` end exclusive, pixel centres at integers)."""
    free = np.ones(len(uv), dtype=bool)
    u, v = uv[:, 0], uv[:, 1]
    for occluder in occluders:
        if occluder.active(t):
            x0, y0, x1, y1 = occluder.rect_px
            with np.errstate(invalid="ignore"):
                free &= ~((u >= x0 - 0.5) & (u < x1 - 0.5) & (v >= y0 - 0.5) & (v < y1 - 0.5))
    return free


def frame_truth(t, q, dq, camera, target, T_base_camera, T_base_target) -> Truth:
    """Ground truth for a camera at ``T_base_camera`` seeing ``target``
    (``vision.targets.Target``) placed at ``T_base_target``."""
    T_camera_target = invert(T_base_camera) @ T_base_target
    keys = target.keys()
    points_target = target.model_points()
    points_camera = points_target @ T_camera_target[:3, :3].T + T_camera_target[:3, 3]
    uv = project_points(camera, points_camera)
    inside = inside_image(camera, uv)
    inside[inside] = unambiguous(camera, points_camera[inside], uv[inside])
    centroids = None
    if target.kind == "dots":
        centroids = np.array([disc_image_centroid(camera, T_camera_target, d.centre, d.radius)
                              for d in target.dots])
    return Truth(t=float(t), q=np.array(q, dtype=float), dq=np.array(dq, dtype=float),
                 T_base_camera=T_base_camera, T_base_target=T_base_target,
                 T_camera_target=T_camera_target, keys=keys, points_target=points_target,
                 points_camera=points_camera, uv=uv, in_view=inside & np.isfinite(uv[:, 0]),
                 disc_centroids_uv=centroids)
