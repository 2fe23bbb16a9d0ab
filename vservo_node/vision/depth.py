"""Depth Z of each feature point in the camera optical frame (metres, along the optical axis),
as the interaction matrix needs it (Chaumette & Hutchinson 2006, eq. 11).

Four sources: a constant; the depths taught with the reference; the pose of the target's 3-D
model from the matched points (cv2.solvePnP with SOLVEPNP_IPPE, the planar-target solver:
Collins & Bartoli, "Infinitesimal plane-based pose estimation", IJCV 109(3), 2014, refined
by Levenberg-Marquardt); or an aligned depth image (16UC1 millimetres, 32FC1 metres) where an
invalid pixel (0, NaN, inf) is replaced by the median of the valid pixels around it, else by
a fallback value with its ``valid`` flag cleared.
"""
from __future__ import annotations

from dataclasses import dataclass
from typing import TYPE_CHECKING, Any, Iterable

import cv2
import numpy as np
from numpy.typing import ArrayLike

from vservo_node.vision.image_io import DEPTH_ENCODINGS

if TYPE_CHECKING:
    from vservo_node.vision.camera import CameraModel
    from vservo_node.vision.reference import Reference


@dataclass
class Depths:
    """Per-point depths.

    Attributes:
        z: (N,) metres along the optical axis of the camera frame.
        valid: (N,) False where a fallback value stands in for a measurement.
        source: 'constant', 'taught', 'pnp' or 'depth_image'.
        T_camera_target: 'pnp' only: 4x4 pose of the target frame in the camera frame.
        reprojection_rms_px: 'pnp' only: RMS distance of the model's projection to the points.
    """
    z: np.ndarray
    valid: np.ndarray
    source: str
    T_camera_target: np.ndarray | None = None
    reprojection_rms_px: float | None = None


def constant(n: int, z: float) -> Depths:
    """The same depth ``z`` (m, > 0) for ``n`` points."""
    if not z > 0:
        raise ValueError(f"a constant depth must be > 0 m, got {z}")
    return Depths(np.full(n, float(z)), np.ones(n, bool), "constant")


def taught(reference: Reference, keys: Iterable[Any]) -> Depths:
    """The reference's taught depths of ``keys`` (e.g. ``MatchResult.keys``)."""
    if reference.depths is None:
        raise ValueError(f"reference {reference.name!r} was taught without depths")
    table = dict(zip(reference.keys, reference.depths))
    unknown = [k for k in keys if tuple(k) not in table]
    if unknown:
        raise ValueError(f"reference {reference.name!r} has no depth for {unknown}")
    z = np.array([table[tuple(k)] for k in keys], dtype=float)
    return Depths(z, np.ones(len(z), bool), "taught")


def from_pnp(points_px: ArrayLike, model_points: ArrayLike, camera: CameraModel) -> Depths:
    """Depths from the pose of a planar model fitted to its image.

    Args:
        points_px: (N, 2) pixels of the features, N >= 4.
        model_points: (N, 3) the same features in the target frame, metres, all with z = 0.
        camera: CameraModel of the image (distortion is removed through it first).
    """
    uv = np.asarray(points_px, dtype=float).reshape(-1, 2)
    obj = np.asarray(model_points, dtype=float).reshape(-1, 3)
    if len(uv) != len(obj) or len(uv) < 4:
        raise ValueError(f"PnP needs >= 4 points with model coordinates, got {len(uv)} points "
                         f"and {len(obj)} model points")
    if np.any(np.abs(obj[:, 2]) > 1e-9):
        raise ValueError("PnP with IPPE needs planar model points (z = 0 in the target frame)")
    xy = camera.pixels_to_normalized(uv)
    eye = np.eye(3)
    ok, rvec, tvec = cv2.solvePnP(obj, xy, eye, None, flags=cv2.SOLVEPNP_IPPE)
    if not ok:
        raise ValueError("solvePnP found no pose for the matched points")
    rvec, tvec = cv2.solvePnPRefineLM(obj, xy, eye, None, rvec, tvec)
    R = cv2.Rodrigues(rvec)[0]
    cam = obj @ R.T + tvec.ravel()
    if np.any(cam[:, 2] <= 0):
        raise ValueError("the PnP pose puts points behind the camera")
    T = np.eye(4)
    T[:3, :3], T[:3, 3] = R, tvec.ravel()
    err = camera.project(cam) - uv
    return Depths(cam[:, 2], np.ones(len(cam), bool), "pnp", T_camera_target=T,
                  reprojection_rms_px=float(np.sqrt(np.mean(np.sum(err ** 2, axis=1)))))


def from_depth_image(depth: np.ndarray, encoding: str, points_px: ArrayLike,
                     fallback: ArrayLike,
                     radius: int = 2) -> Depths:
    """Depths read from an aligned depth image at the features' pixels.

    Args:
        depth: (H, W) depth image on the colour image's pixel grid: uint16 millimetres for
            16UC1, float32 metres for 32FC1 (e.g. ``image_io.raw_view`` of the message).
        points_px: (N, 2) pixels; each reads the nearest depth pixel.
        fallback: depth (m) used, with ``valid`` False, where no valid pixel lies within
            ``radius`` pixels (scalar or (N,)).
        radius: half-size of the square neighbourhood whose valid median replaces an invalid
            pixel (2: 5 x 5; common practice, no source).
    """
    if encoding not in DEPTH_ENCODINGS:
        raise ValueError(f"unsupported depth encoding {encoding!r}; supported: "
                         f"{', '.join(DEPTH_ENCODINGS)}")
    expected = np.uint16 if encoding == "16UC1" else np.float32
    if depth.ndim != 2 or depth.dtype != expected:
        raise ValueError(f"a {encoding} depth image must be 2-D {np.dtype(expected)}, got "
                         f"{depth.dtype} {depth.shape}")
    scale = 0.001 if encoding == "16UC1" else 1.0
    uv = np.asarray(points_px, dtype=float).reshape(-1, 2)
    fallback = np.broadcast_to(np.asarray(fallback, dtype=float), (len(uv),))
    z, valid = fallback.copy(), np.zeros(len(uv), bool)
    h, w = depth.shape
    for i, (u, v) in enumerate(np.rint(uv).astype(int)):
        if not (0 <= u < w and 0 <= v < h):
            continue
        centre = float(depth[v, u]) * scale
        if np.isfinite(centre) and centre > 0:
            z[i], valid[i] = centre, True
            continue
        patch = depth[max(v - radius, 0):v + radius + 1, max(u - radius, 0):u + radius + 1]
        values = patch.astype(float).ravel() * scale
        values = values[np.isfinite(values) & (values > 0)]
        if values.size:
            z[i], valid[i] = float(np.median(values)), True
    return Depths(z, valid, "depth_image")
