"""Small exact-perspective image generator for the vision tests (no simulator needed).

A plane z = 0 seen by a pinhole camera maps to the image by the homography
H = K [r1 r2 t] (Hartley & Zisserman, Multiple View Geometry, 2nd ed. 2003, sec. 8.1.1 and
13.1). The target's texture (``targets.render_target_texture``) is warped by H at
``supersample`` x the image resolution with bilinear lookup, then area-averaged down, so each
pixel is close to the mean of the target over its square footprint.
"""
from __future__ import annotations

import cv2
import numpy as np
from scipy.spatial.transform import Rotation

from vservo_node.vision.targets import render_target_texture

BACKGROUND_BGR = (90, 90, 90)
_TEXTURES = {}


def intrinsics(f=600.0, size=(640, 480)):
    """K with the principal point at the image centre, pixels."""
    w, h = size
    return np.array([[f, 0, (w - 1) / 2], [0, f, (h - 1) / 2], [0, 0, 1.0]])


def pose(rpy_deg=(0, 0, 0), t=(0, 0, 0.5)):
    """T_camera_target from intrinsic x-y-z rotation angles (degrees) and translation (m)."""
    T = np.eye(4)
    T[:3, :3] = Rotation.from_euler("XYZ", rpy_deg, degrees=True).as_matrix()
    T[:3, 3] = t
    return T


def plane_homography(K, T_camera_target):
    """H mapping target-plane metres (x, y, 1) to pixels (H & Z 2003: H = K [r1 r2 t])."""
    return K @ T_camera_target[:3, [0, 1, 3]]


def project(K, T_camera_target, points):
    """Pixels of target-frame points (N, 3), pinhole without distortion."""
    p = np.asarray(points, float) @ T_camera_target[:3, :3].T + T_camera_target[:3, 3]
    uv = p @ K.T
    return uv[:, :2] / uv[:, 2:]


def disc_centroid(K, T_camera_target, centre, radius):
    """Exact centroid (u, v) of the image of a disc on the target plane.

    The circle is the conic C = [[1,0,-cx],[0,1,-cy],[-cx,-cy,cx^2+cy^2-r^2]]; its image is
    C' = H^-T C H^-1 (H & Z 2003, sec. 2.3, result 2.13); the filled ellipse's centroid is the
    conic's centre -A^-1 b with C' = [[A, b], [b^T, c]].
    """
    cx, cy = centre
    C = np.array([[1, 0, -cx], [0, 1, -cy], [-cx, -cy, cx * cx + cy * cy - radius ** 2]])
    Hi = np.linalg.inv(plane_homography(K, T_camera_target))
    Ci = Hi.T @ C @ Hi
    return -np.linalg.solve(Ci[:2, :2], Ci[:2, 2])


def texture(target, px_per_m):
    key = (target.name, target.source, round(px_per_m))
    if key not in _TEXTURES:
        _TEXTURES.clear()  # keep one texture at a time: they are large
        _TEXTURES[key] = render_target_texture(target, round(px_per_m))
    return _TEXTURES[key]


def render(target, K, size, T_camera_target, supersample=4, texels=2.0, noise=0.0, seed=0,
           background=BACKGROUND_BGR, canvas=None):
    """BGR uint8 image (H, W, 3) of ``target`` at ``T_camera_target``.

    texels: texture pixels per supersample near the closest board point. noise: Gaussian
    sigma in grey levels, added after rendering. canvas: picture behind the board.
    """
    w, h = size
    corners = np.array([[sx * target.width / 2, sy * target.height / 2, 0]
                        for sx, sy in ((-1, -1), (1, -1), (1, 1), (-1, 1))])
    depth = (corners @ T_camera_target[:3, :3].T + T_camera_target[:3, 3])[:, 2].min()
    px_per_m = texels * supersample * K[0, 0] / depth
    tex, T_tex = texture(target, px_per_m)
    H = plane_homography(K, T_camera_target) @ T_tex
    th, tw = tex.shape[:2]
    outline = cv2.perspectiveTransform(np.array([[[-0.5, -0.5], [tw - 0.5, -0.5],
                                                  [tw - 0.5, th - 0.5], [-0.5, th - 0.5]]]),
                                       H).reshape(-1, 2)
    x0, y0 = np.maximum(np.floor(outline.min(axis=0)).astype(int) - 2, 0)
    x1, y1 = np.minimum(np.ceil(outline.max(axis=0)).astype(int) + 3, (w, h))
    image = np.empty((h, w, 3), np.uint8)
    image[:] = background if canvas is None else canvas
    if x1 > x0 and y1 > y0:
        s = supersample
        S = np.array([[s, 0, s * (0.5 - x0) - 0.5], [0, s, s * (0.5 - y0) - 0.5], [0, 0, 1]])
        roi = image[y0:y1, x0:x1]
        hi = cv2.resize(roi, None, fx=s, fy=s, interpolation=cv2.INTER_NEAREST)
        cv2.warpPerspective(tex, S @ H, (hi.shape[1], hi.shape[0]), dst=hi,
                            flags=cv2.INTER_LINEAR, borderMode=cv2.BORDER_TRANSPARENT)
        image[y0:y1, x0:x1] = cv2.resize(hi, (x1 - x0, y1 - y0), interpolation=cv2.INTER_AREA)
    if noise > 0:
        rng = np.random.default_rng(seed)
        image = np.clip(image + rng.normal(0, noise, image.shape), 0, 255).astype(np.uint8)
    return image
