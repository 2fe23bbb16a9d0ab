"""Camera model: intrinsics, lens distortion, pixel <-> normalized coordinates.

Frames and units (DEVELOPERS.md): points are in the camera optical frame (metres; z forward,
x right, y down). Pixel coordinates ``(u, v)`` follow OpenCV: u right, v down, origin at the
centre of the top-left pixel. Normalized coordinates are ``(x, y) = (X/Z, Y/Z)`` of the
undistorted ray in the camera optical frame.

The fields mirror sensor_msgs/CameraInfo (K, D, R, P, distortion_model). All projection and
undistortion of a distorted stream goes through OpenCV so the model matches the calibrators
that produced the coefficients. A rectified stream (``rectified=True``: image_proc's
``image_rect``) already had its distortion removed and was rotated by R, so the model then uses
P's left 3x3 block as intrinsics, no distortion, and R to return rays to the optical frame.
"""
from __future__ import annotations

from typing import Any, Mapping

import cv2
import numpy as np
from numpy.typing import ArrayLike, NDArray

Floats = NDArray[np.float64]

# Number of coefficients in D per sensor_msgs/distortion_models.hpp model name.
DISTORTION_MODELS = {"plumb_bob": 5, "rational_polynomial": 8, "equidistant": 4, "none": 0}

# Iterative undistortion stops after this many iterations or this change in normalized
# coordinates; tight enough for 1e-6 px round trips on typical lenses (common practice, no
# source; tests/vision/test_camera.py measures the round trip).
_UNDISTORT_CRITERIA = (cv2.TERM_CRITERIA_COUNT | cv2.TERM_CRITERIA_EPS, 200, 1e-15)

_DICT_KEYS = ("width", "height", "distortion_model", "d", "k", "p", "r", "rectified")


def _matrix(value: ArrayLike, shape: tuple[int, int], name: str) -> Floats:
    flat = np.asarray(value, dtype=float)
    if flat.size != shape[0] * shape[1]:
        raise ValueError(f"{name} must have {shape[0]}x{shape[1]} entries, got shape "
                         f"{flat.shape}")
    m = flat.reshape(shape)
    if not np.isfinite(m).all():
        raise ValueError(f"{name} must be finite, got {m.tolist()}")
    return m


def _check_intrinsics(A: Floats, name: str) -> None:
    """Refuse a camera matrix OpenCV would misread (it ignores skew) or that is uncalibrated."""
    if A[0, 0] <= 0 or A[1, 1] <= 0:
        raise ValueError(f"{name} focal lengths fx={A[0, 0]}, fy={A[1, 1]} must be > 0 "
                         "(an all-zero CameraInfo means the camera is not calibrated)")
    if A[0, 1] != 0:
        raise ValueError(f"{name}[0,1] (skew) must be 0, got {A[0, 1]}: OpenCV ignores skew")
    if A[1, 0] != 0 or not np.array_equal(A[2, :3], [0.0, 0.0, 1.0]):
        raise ValueError(f"{name} must have the form [[fx,0,cx],[0,fy,cy],[0,0,1]], "
                         f"got {A[:, :3].tolist()}")


def _points(a: ArrayLike, ncols: int, name: str) -> Floats:
    out = np.asarray(a, dtype=float)
    if out.ndim != 2 or out.shape[1] != ncols:
        raise ValueError(f"{name} must have shape (N, {ncols}), got {out.shape}")
    return out


class CameraModel:
    """A calibrated camera of ``width`` x ``height`` pixels.

    Args:
        K: 3x3 intrinsic matrix of the raw (distorted) image, pixels.
        D: distortion coefficients, as many as ``distortion_model`` takes
            (plumb_bob: k1 k2 p1 p2 k3; rational_polynomial: k1 k2 p1 p2 k3 k4 k5 k6;
            equidistant: k1 k2 k3 k4; none: empty or all zero).
        distortion_model: one of ``DISTORTION_MODELS``.
        P: 3x4 projection matrix of the rectified image (default ``[K | 0]``).
        rectified: the images are rectified; use P's intrinsics and no distortion.
        R: 3x3 rectification rotation from the optical frame to the rectified frame
            (default identity; only stereo cameras have another).
    """

    def __init__(self, width: int, height: int, K: ArrayLike, D: ArrayLike = (),
                 distortion_model: str = "none", P: ArrayLike | None = None,
                 rectified: bool = False, R: ArrayLike | None = None) -> None:
        if int(width) != width or int(height) != height or width <= 0 or height <= 0:
            raise ValueError(f"image size must be positive integers, got {width}x{height}")
        if distortion_model not in DISTORTION_MODELS:
            raise ValueError(f"unknown distortion model {distortion_model!r}; expected one of "
                             f"{sorted(DISTORTION_MODELS)}")
        self.width, self.height = int(width), int(height)
        self.distortion_model = distortion_model
        self.K = _matrix(K, (3, 3), "K")
        _check_intrinsics(self.K, "K")
        self.D = np.asarray(D, dtype=float).ravel()
        if not np.isfinite(self.D).all():
            raise ValueError(f"distortion coefficients D must be finite, got {self.D.tolist()}")
        n = DISTORTION_MODELS[distortion_model]
        if distortion_model == "none":
            if np.any(self.D != 0):
                raise ValueError(f"distortion model 'none' takes no non-zero coefficients, "
                                 f"got D={self.D.tolist()}")
            self.D = np.zeros(0)
        elif self.D.size != n:
            raise ValueError(f"distortion model {distortion_model!r} takes {n} coefficients, "
                             f"got {self.D.size}: {self.D.tolist()}")
        if rectified and P is None:
            raise ValueError("rectified=True needs the projection matrix P of the rectified image")
        self.P = np.hstack([self.K, np.zeros((3, 1))]) if P is None else _matrix(P, (3, 4), "P")
        _check_intrinsics(self.P, "P")
        self.R = np.eye(3) if R is None else _matrix(R, (3, 3), "R")
        if not np.allclose(self.R @ self.R.T, np.eye(3), atol=1e-6) or np.linalg.det(self.R) < 0:
            raise ValueError(f"R must be a rotation matrix, got {self.R.tolist()}")
        self.rectified = bool(rectified)

    # ----------------------------------------------------------------- constructors
    @classmethod
    def pinhole(cls, width: int, height: int, fx: float, fy: float, cx: float, cy: float
                ) -> CameraModel:
        """An ideal camera without distortion; focal lengths and centre in pixels."""
        return cls(width, height, [[fx, 0.0, cx], [0.0, fy, cy], [0.0, 0.0, 1.0]])

    @classmethod
    def from_camera_info(cls, width: int, height: int, distortion_model: str, d: ArrayLike,
                         k: ArrayLike, r: ArrayLike, p: ArrayLike, rectified: bool = False
                         ) -> CameraModel:
        """Build from sensor_msgs/CameraInfo fields (k, r: 9 row-major; p: 12 row-major).

        An empty ``distortion_model`` string (uncalibrated drivers) is read as ``none``.
        """
        return cls(width, height, k, d, distortion_model or "none", P=p, rectified=rectified,
                   R=r)

    @classmethod
    def from_dict(cls, data: Mapping[str, Any]) -> CameraModel:
        """Build from a dict as written by ``to_dict`` (a YAML mapping)."""
        unknown = set(data) - set(_DICT_KEYS)
        if unknown:
            raise ValueError(f"unknown camera keys {sorted(unknown)}; expected {list(_DICT_KEYS)}")
        missing = {"width", "height", "k"} - set(data)
        if missing:
            raise ValueError(f"camera entry lacks {sorted(missing)}")
        return cls(data["width"], data["height"], data["k"], data.get("d", ()),
                   data.get("distortion_model", "none"), P=data.get("p"),
                   rectified=data.get("rectified", False), R=data.get("r"))

    def to_dict(self) -> dict[str, Any]:
        """Plain-Python dict for YAML: matrices as row-major flat lists, as in CameraInfo."""
        return {"width": self.width, "height": self.height,
                "distortion_model": self.distortion_model, "d": self.D.tolist(),
                "k": self.K.ravel().tolist(), "p": self.P.ravel().tolist(),
                "r": self.R.ravel().tolist(), "rectified": self.rectified}

    def scaled(self, width: int, height: int) -> CameraModel:
        """The same camera seen at another resolution (e.g. a reference taught at 1280x960 used
        on a 640x480 stream). Scales K and P rows with the pixel-centre convention of
        cv2.resize: a pixel coordinate u maps to ``(u + 0.5) * sx - 0.5``. D and R are unchanged
        (they act on normalized coordinates).
        """
        sx, sy = width / self.width, height / self.height
        S = np.array([[sx, 0.0, 0.5 * sx - 0.5], [0.0, sy, 0.5 * sy - 0.5], [0.0, 0.0, 1.0]])
        return CameraModel(width, height, S @ self.K, self.D, self.distortion_model,
                           P=S @ self.P, rectified=self.rectified, R=self.R)

    # ----------------------------------------------------------------- properties
    @property
    def intrinsics(self) -> Floats:
        """3x3 camera matrix of the images this model reads: P[:3,:3] if rectified, else K."""
        return self.P[:, :3] if self.rectified else self.K

    @property
    def effective_distortion(self) -> str:
        """Distortion model applied to the images this model reads (``none`` if rectified)."""
        return "none" if self.rectified else self.distortion_model

    def __repr__(self) -> str:
        return (f"CameraModel({self.width}x{self.height}, {self.distortion_model}, "
                f"rectified={self.rectified}, intrinsics={self.intrinsics.tolist()})")

    # ----------------------------------------------------------------- mappings
    def pixels_to_normalized(self, uv: ArrayLike) -> Floats:
        """Undistorted normalized coordinates (N, 2) of pixels ``uv`` (N, 2)."""
        px = _points(uv, 2, "uv")
        if len(px) == 0:
            return np.zeros((0, 2))
        model = self.effective_distortion
        if model == "none":
            A = self.intrinsics
            xy = (px - A[:2, 2]) / np.diag(A)[:2]
            if self.rectified:  # rays are in the rectified frame; rotate back to the optical one
                rays = np.hstack([xy, np.ones((len(xy), 1))]) @ self.R
                xy = rays[:, :2] / rays[:, 2:]
            return xy
        src = px.reshape(-1, 1, 2)
        if model == "equidistant":
            out = cv2.fisheye.undistortPoints(src, self.K, self.D, criteria=_UNDISTORT_CRITERIA)
        else:
            out = cv2.undistortPointsIter(src, self.K, self.D, None, None,  # type: ignore[call-overload]
                                          _UNDISTORT_CRITERIA)
        return np.asarray(out, dtype=float).reshape(-1, 2)

    def project(self, points_cam: ArrayLike) -> Floats:
        """Pixels (N, 2) of 3-D points (N, 3) in the camera optical frame, metres.

        Raises ValueError if a point is not in front of the camera (Z <= 0).
        """
        p = _points(points_cam, 3, "points_cam")
        if len(p) == 0:
            return np.zeros((0, 2))
        model = self.effective_distortion
        if self.rectified:
            p = p @ self.R.T
        behind = np.flatnonzero(p[:, 2] <= 0)
        if behind.size:
            raise ValueError(f"{behind.size} point(s) not in front of the camera (Z <= 0), "
                             f"first index {behind[0]}")
        if model == "none":
            A = self.intrinsics
            return np.asarray(p[:, :2] / p[:, 2:] * np.diag(A)[:2] + A[:2, 2])
        if model == "equidistant":
            zero = np.zeros(3)
            uv, _ = cv2.fisheye.projectPoints(p.reshape(-1, 1, 3), zero, zero, self.K, self.D)
            return np.asarray(uv, dtype=float).reshape(-1, 2)
        return self._project_polynomial(p)

    def _project_polynomial(self, p: Floats) -> Floats:
        """plumb_bob / rational_polynomial projection in NumPy: OpenCV's camera model
        (calib3d documentation, 'Camera Calibration and 3D Reconstruction': radial
        (1 + k1 r^2 + k2 r^4 + k3 r^6) / (1 + k4 r^2 + k5 r^4 + k6 r^6), tangential p1, p2), the
        same numbers as cv2.projectPoints (tests/vision/test_camera.py) at a tenth of its cost
        for a handful of points (it also computes Jacobians)."""
        D = self.D
        k1, k2, p1, p2, k3 = D[:5]
        k4, k5, k6 = D[5:8] if D.size >= 8 else (0.0, 0.0, 0.0)
        x = p[:, 0] / p[:, 2]
        y = p[:, 1] / p[:, 2]
        xy, r2 = x * y, x * x + y * y
        radial = ((1.0 + r2 * (k1 + r2 * (k2 + r2 * k3)))
                  / (1.0 + r2 * (k4 + r2 * (k5 + r2 * k6))))
        xd = x * radial + 2.0 * p1 * xy + p2 * (r2 + 2.0 * x * x)
        yd = y * radial + p1 * (r2 + 2.0 * y * y) + 2.0 * p2 * xy
        K = self.K
        return np.column_stack([K[0, 0] * xd + K[0, 2], K[1, 1] * yd + K[1, 2]])

    def normalized_to_pixels(self, xy: ArrayLike) -> Floats:
        """Pixels (N, 2) of normalized coordinates ``xy`` (N, 2), applying the distortion."""
        pts = _points(xy, 2, "xy")
        return self.project(np.hstack([pts, np.ones((len(pts), 1))]))
