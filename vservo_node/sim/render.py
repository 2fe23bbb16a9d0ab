"""Exact-perspective rendering of a textured plane into a camera image (no ROS).

Geometry: a point ``(X, Y, 0)`` of a target plane (target frame, metres) lands in the camera
optical frame at ``[r1 r2 t] @ [X, Y, 1]``, where ``r1, r2, t`` are the first two columns and
the translation of ``T_camera_target``; with the intrinsics this is the plane-induced
homography ``H = K [r1 r2 t]`` (Hartley & Zisserman 2003, Multiple View Geometry, 2nd ed.,
sec. 8.1.1 / 13.1). Without lens distortion one ``cv2.warpPerspective`` draws the target; with
distortion each output pixel is first undistorted to its ray (a map precomputed once per
camera), the ray is intersected with the plane, and ``cv2.remap`` samples the texture there.
Both paths draw only inside the bounding box of the target's image.

Anti-aliasing: the texture is kept as a pyramid of area-averaged (``cv2.INTER_AREA``) halvings
and each frame samples, bilinearly, the finest level whose texels are still no smaller than a
pixel wherever the target is seen most compressed (a mipmap pick, conservative towards blur).
Every sample then averages the texture over at least a pixel, so edges carry no aliasing: the
intensity centroid of a dot is the centroid of the projected disc and chessboard corners land
where cv2.projectPoints puts them (tests/sim/test_render.py measures both).
"""
from __future__ import annotations

from dataclasses import dataclass
from functools import cached_property

import cv2
import numpy as np

# Planes closer to the camera centre than this are clipped (metres); common practice, no source.
Z_NEAR = 1e-3
# Points sampled per polygon edge to bound the curved (distorted) image of a straight edge.
_EDGE_SAMPLES = 16
# Fractions along each edge where it is sampled.
_EDGE_T = np.linspace(0.0, 1.0, _EDGE_SAMPLES, endpoint=False)[:, None, None]
# Pixels of margin around a target's bounding box (bilinear footprint + rounding).
_BOX_MARGIN = 2
# The pyramid stops halving once the texture is this small (texels).
_MIN_LEVEL_SIZE = 8


@dataclass(frozen=True)
class TextureLevel:
    """One pyramid level: an RGB image and the affine map from its texel coordinates
    ``(col, row, 1)`` (texel centres at integers, OpenCV convention) to plane coordinates
    ``(X, Y, 1)`` in the target frame, metres."""

    image: np.ndarray
    plane_from_texel: np.ndarray

    @cached_property
    def texels_per_m(self) -> float:
        """Texel density along the finer of the two texture axes, texels per metre."""
        return 1.0 / min(float(np.linalg.norm(self.plane_from_texel[:2, 0])),
                         float(np.linalg.norm(self.plane_from_texel[:2, 1])))

    @cached_property
    def texel_from_plane(self) -> np.ndarray:
        """Inverse of ``plane_from_texel``."""
        return np.linalg.inv(self.plane_from_texel)


class PlanarTexture:
    """An RGB image printed on the plane ``z = 0`` of a target frame, kept as a pyramid.

    Args:
        image: (h, w, 3) uint8 RGB texture.
        plane_from_texel: 3x3 affine map from texel coordinates ``(col, row, 1)`` of ``image``
            to plane coordinates ``(X, Y, 1)``, metres. The texture is seen un-mirrored from
            one side only (the front); from behind the plane the target is not drawn.
    """

    def __init__(self, image, plane_from_texel):
        image = np.ascontiguousarray(image)
        if image.ndim != 3 or image.shape[2] != 3 or image.dtype != np.uint8:
            raise ValueError(f"texture must be an (h, w, 3) uint8 RGB image, got "
                             f"{image.shape} {image.dtype}")
        A = np.asarray(plane_from_texel, dtype=float)
        if A.shape != (3, 3) or not np.allclose(A[2], [0.0, 0.0, 1.0]):
            raise ValueError(f"plane_from_texel must be a 3x3 affine matrix, got {A.tolist()}")
        if abs(np.linalg.det(A[:2, :2])) < 1e-15:
            raise ValueError("plane_from_texel is singular")
        self.levels = _pyramid(image, A)
        h, w = image.shape[:2]
        # Outer corners of the texture (texel edges at -0.5 and size - 0.5), plane metres.
        edges = np.array([[-0.5, -0.5, 1.0], [w - 0.5, -0.5, 1.0],
                          [w - 0.5, h - 0.5, 1.0], [-0.5, h - 0.5, 1.0]])
        self.corners = (edges @ A.T)[:, :2]
        # Viewed from -z the texel axes (col right, row down) keep their handedness if
        # det > 0: that is the front side.
        self.front_sign = -1.0 if np.linalg.det(A[:2, :2]) > 0 else 1.0

    @classmethod
    def from_extent(cls, image, px_per_m, top_left_xy=(0.0, 0.0)):
        """A texture whose columns run along +X and rows along +Y of the target frame at
        ``px_per_m`` texels per metre, with the outer corner of texel (0, 0) at
        ``top_left_xy`` (metres); seen un-mirrored from -z."""
        s = 1.0 / float(px_per_m)
        x0, y0 = top_left_xy
        A = np.array([[s, 0.0, x0 + 0.5 * s], [0.0, s, y0 + 0.5 * s], [0.0, 0.0, 1.0]])
        return cls(image, A)

    def level_at_most(self, texels_per_m: float) -> TextureLevel:
        """The finest level with at most ``texels_per_m`` texels per metre (else the coarsest)."""
        for level in self.levels:
            if level.texels_per_m <= texels_per_m:
                return level
        return self.levels[-1]


def _pyramid(image, A):
    levels = [TextureLevel(image, A)]
    while min(image.shape[:2]) >= 2 * _MIN_LEVEL_SIZE:
        h, w = image.shape[:2]
        small = cv2.resize(image, ((w + 1) // 2, (h + 1) // 2), interpolation=cv2.INTER_AREA)
        # cv2.resize maps pixel centres as (x_small + 0.5) * scale - 0.5 = x_big.
        sx, sy = w / small.shape[1], h / small.shape[0]
        big_from_small = np.array([[sx, 0.0, 0.5 * sx - 0.5], [0.0, sy, 0.5 * sy - 0.5],
                                   [0.0, 0.0, 1.0]])
        A = A @ big_from_small
        image = small
        levels.append(TextureLevel(image, A))
    return levels


def _clip_polygon(points, normal, offset):
    """Sutherland-Hodgman: the part of a convex polygon (rows of ``points``) where
    ``points @ normal >= offset``."""
    if np.all(points @ normal >= offset):
        return points  # nothing to clip (what the loop below would return, without the loop)
    out = []
    n = len(points)
    for i in range(n):
        a, b = points[i], points[(i + 1) % n]
        da, db = a @ normal - offset, b @ normal - offset
        if da >= 0:
            out.append(a)
        if (da >= 0) != (db >= 0):
            out.append(a + (b - a) * (da / (da - db)))
    return np.array(out).reshape(-1, points.shape[1])


_RAY_MAPS: dict = {}
_RAY_MAPS_KEPT = 4


def _ray_map(camera):
    """Ray of every pixel of ``camera`` (H, W, 2) float32, shared by renderers of equal cameras
    (undistorting every pixel takes a few tenths of a second)."""
    key = (camera.width, camera.height, camera.effective_distortion,
           camera.intrinsics.tobytes(), camera.D.tobytes(), camera.R.tobytes())
    if key not in _RAY_MAPS:
        w, h = camera.width, camera.height
        u, v = np.meshgrid(np.arange(w, dtype=float), np.arange(h, dtype=float))
        xy = camera.pixels_to_normalized(np.column_stack([u.ravel(), v.ravel()]))
        if len(_RAY_MAPS) >= _RAY_MAPS_KEPT:
            _RAY_MAPS.pop(next(iter(_RAY_MAPS)))
        rays = xy.reshape(h, w, 2).astype(np.float32)
        rays.setflags(write=False)
        _RAY_MAPS[key] = rays
    return _RAY_MAPS[key]


def _lens_projector(camera):
    """A function xy (N, 2) normalized -> pixels (N, 2) of ``camera``'s raw image, in numpy
    for the polynomial lens models (OpenCV's model as cv2.projectPoints evaluates it: radial
    k1..k6 as a ratio, tangential p1, p2; only fx, fy, cx, cy of K), since the per-call cost
    of cv2.projectPoints is most of the work for the few dozen points of a target outline.
    Other models (fisheye, rectified streams) go through the camera model itself."""
    if camera.rectified or camera.distortion_model not in ("plumb_bob", "rational_polynomial"):
        return camera.normalized_to_pixels
    k = np.zeros(8)
    k[:camera.D.size] = camera.D
    k1, k2, p1, p2, k3, k4, k5, k6 = k.tolist()
    K = camera.K
    fx, fy, cx, cy = float(K[0, 0]), float(K[1, 1]), float(K[0, 2]), float(K[1, 2])

    def project(xy):
        x, y = xy[:, 0], xy[:, 1]
        r2 = x * x + y * y
        r4, r6 = r2 * r2, r2 * r2 * r2
        radial = (1 + k1 * r2 + k2 * r4 + k3 * r6) / (1 + k4 * r2 + k5 * r4 + k6 * r6)
        a1 = 2 * x * y
        xd = x * radial + p1 * a1 + p2 * (r2 + 2 * x * x)
        yd = y * radial + p1 * (r2 + 2 * y * y) + p2 * a1
        return np.column_stack([fx * xd + cx, fy * yd + cy])

    return project


class PlaneRenderer:
    """Draws a :class:`PlanarTexture` into images of one camera.

    Args:
        camera: a ``vservo_node.vision.camera.CameraModel`` (raw, distorted stream).
    """

    def __init__(self, camera):
        self.camera = camera
        self.distorted = camera.effective_distortion != "none" and bool(np.any(camera.D != 0))
        self._project = _lens_projector(camera)
        self._focal = float(np.max(np.diag(camera.intrinsics)[:2]))
        self._rays = None  # (H, W, 2) float32 normalized ray of every pixel, built on demand
        self._ray_box = None
        self._ray_box_corners = None

    def rays(self):
        """Normalized undistorted coordinates (H, W, 2) float32 of every pixel centre."""
        if self._rays is None:
            self._rays = _ray_map(self.camera)
            xy = self._rays.reshape(-1, 2)
            lo, hi = xy.min(axis=0).astype(float), xy.max(axis=0).astype(float)
            pad = 0.05 * (hi - lo)
            self._ray_box = (lo - pad, hi + pad)
            self._ray_box_corners = np.array([[lo[0], lo[1], 1.0], [lo[0], hi[1], 1.0],
                                              [hi[0], lo[1], 1.0], [hi[0], hi[1], 1.0]])
        return self._rays

    def draw(self, image, texture: PlanarTexture, T_camera_target):
        """Draw ``texture`` (on plane z = 0 of the target frame) into ``image`` (H, W, 3) uint8,
        in place; ``T_camera_target`` is the target pose in the camera optical frame.

        Returns the drawn box ``(x0, y0, x1, y1)`` (pixels, end exclusive) or None when the
        target is behind the camera, seen from its back, edge-on or out of view.
        """
        T = np.asarray(T_camera_target, dtype=float)
        Hn = np.column_stack([T[:3, 0], T[:3, 1], T[:3, 3]])  # plane (X, Y, 1) -> camera XYZ
        centre_in_target = -T[:3, :3].T @ T[:3, 3]
        if centre_in_target[2] * texture.front_sign <= 1e-9:
            return None  # seen from behind or edge-on
        corners = np.column_stack([texture.corners, np.ones(4)]) @ Hn.T
        poly = _clip_polygon(corners, np.array([0.0, 0.0, 1.0]), Z_NEAR)
        if len(poly) < 3:
            return None
        xy = poly[:, :2] / poly[:, 2:]
        if self.distorted or len(poly) != 4 or np.any(corners[:, 2] <= Z_NEAR):
            return self._draw_by_rays(image, texture, Hn, xy)
        return self._draw_by_homography(image, texture, Hn, xy)

    # ------------------------------------------------------------------ helpers
    def _box(self, uv):
        """Integer pixel box around points ``uv`` (N, 2), clipped to the image, or None."""
        x0, y0 = np.floor(uv.min(axis=0)).astype(int) - _BOX_MARGIN
        x1, y1 = np.ceil(uv.max(axis=0)).astype(int) + _BOX_MARGIN + 1
        x0, y0 = max(x0, 0), max(y0, 0)
        x1, y1 = min(x1, self.camera.width), min(y1, self.camera.height)
        if x0 >= x1 or y0 >= y1:
            return None
        return x0, y0, x1, y1

    def _level(self, texture, Hn, G, xy):
        """Texture level for the polygon with vertices ``xy`` (normalized coordinates).

        The image scale of the plane (pixels per metre) in its most compressed direction is the
        smaller singular value of the local Jacobian d(u, v)/d(X, Y); over a convex polygon it
        is smallest at a vertex. The finest level whose texels are no smaller than a pixel there
        keeps every sample's footprint at least a pixel wide: no aliasing, at the cost of up to
        two (plus foreshortening) pixels of blur where the target is closest.
        """
        inv_z = xy @ G[2, :2] + G[2, 2]  # G = inv(Hn): camera ray -> plane (X, Y, 1) / Z
        # d(x, y)/d(X, Y) of x = (Hn P)_xy / (Hn P)_z at the plane point P seen along (x, y),
        # one 2x2 matrix [[a, b], [c, d]] per vertex
        a = (Hn[0, 0] - xy[:, 0] * Hn[2, 0]) * inv_z
        b = (Hn[0, 1] - xy[:, 0] * Hn[2, 1]) * inv_z
        c = (Hn[1, 0] - xy[:, 1] * Hn[2, 0]) * inv_z
        d = (Hn[1, 1] - xy[:, 1] * Hn[2, 1]) * inv_z
        # its singular values: s1^2 + s2^2 = a^2 + b^2 + c^2 + d^2 and s1 s2 = |det|; the
        # smaller as |det| / s1 (no cancellation when the view is foreshortened)
        squares, det = a * a + b * b + c * c + d * d, np.abs(a * d - b * c)
        s1 = np.sqrt(0.5 * (squares + np.sqrt(np.maximum(squares * squares - 4 * det * det,
                                                          0.0))))
        return texture.level_at_most(self._focal * float(np.min(det / s1)))

    def _draw_by_homography(self, image, texture, Hn, xy):
        K = self.camera.intrinsics
        box = self._box(xy * np.diag(K)[:2] + K[:2, 2])
        if box is None:
            return None
        x0, y0, x1, y1 = box
        level = self._level(texture, Hn, np.linalg.inv(Hn), xy)
        shift = np.array([[1.0, 0.0, x0], [0.0, 1.0, y0], [0.0, 0.0, 1.0]])
        texel_from_roi = np.linalg.inv(K @ Hn @ level.plane_from_texel) @ shift
        roi = image[y0:y1, x0:x1]
        cv2.warpPerspective(level.image, texel_from_roi, (x1 - x0, y1 - y0), dst=roi,
                            flags=cv2.INTER_LINEAR | cv2.WARP_INVERSE_MAP,
                            borderMode=cv2.BORDER_TRANSPARENT)
        return box

    def _draw_by_rays(self, image, texture, Hn, xy):
        rays = self.rays()
        lo, hi = self._ray_box
        for axis in range(2):  # keep to where the lens model is used (avoids its fold-back)
            xy = _clip_polygon(xy, np.eye(2)[axis], lo[axis])
            if len(xy) >= 3:
                xy = _clip_polygon(xy, -np.eye(2)[axis], -hi[axis])
            if len(xy) < 3:
                return None
        edges = (xy[None] + _EDGE_T * (np.roll(xy, -1, axis=0) - xy)[None]).reshape(-1, 2)
        box = self._box(self._project(edges))
        if box is None:
            return None
        x0, y0, x1, y1 = box
        G = np.linalg.inv(Hn)  # camera ray (x, y, 1) -> plane (X, Y, 1) / Z
        level = self._level(texture, Hn, G, xy)
        texel_from_ray = level.texel_from_plane @ G
        r = rays[y0:y1, x0:x1]
        maps = cv2.perspectiveTransform(r, texel_from_ray)
        # The third row gives 1/Z of the ray's hit on the plane; where it is <= 0 the ray meets
        # the plane behind the camera (or never) and the map is meaningless. It is linear in
        # the ray, so if it is positive at the corners of the box holding all of the camera's
        # rays, no pixel needs the check.
        w_row = texel_from_ray[2]
        if np.min(self._ray_box_corners @ w_row) <= 1e-9:
            w = r[..., 0] * w_row[0] + r[..., 1] * w_row[1] + w_row[2]
            maps[w <= 1e-9] = -1e6  # off the texture: left untouched by BORDER_TRANSPARENT
        roi = image[y0:y1, x0:x1]
        cv2.remap(level.image, maps, None, cv2.INTER_LINEAR, dst=roi,
                  borderMode=cv2.BORDER_TRANSPARENT)
        return box
