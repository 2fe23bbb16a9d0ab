"""Interaction matrices (image Jacobians) of image points.

For a point with normalized coordinates ``(x, y)`` (camera optical frame) at depth ``Z`` (m),
``s_dot = L @ v_c`` where ``v_c = [v; w]`` is the camera twist in the camera optical frame
(m/s, rad/s) and ``s = [x1, y1, x2, y2, ...]``. The camera moves, the target is fixed.
"""
from __future__ import annotations

import numpy as np
from numpy.typing import ArrayLike, NDArray

INTERACTION_ESTIMATES = ("current_view", "taught_view", "blended")


def point_interaction_matrix(xy: ArrayLike, Z: ArrayLike) -> NDArray[np.float64]:
    """Stacked interaction matrix (2N, 6) of N points ``xy`` (N, 2) at depths ``Z`` (N,) metres.

    Per point (Chaumette & Hutchinson, "Visual servo control, Part I: Basic approaches",
    IEEE RAM 2006, eq. 11):
        row x: [-1/Z,    0, x/Z,   x*y, -(1+x^2),  y]
        row y: [   0, -1/Z, y/Z, 1+y^2,     -x*y, -x]
    ``Z`` may also be a scalar, used for every point.
    """
    points = np.asarray(xy, dtype=float)
    if points.ndim != 2 or points.shape[1] != 2:
        raise ValueError(f"xy must have shape (N, 2), got {points.shape}")
    depth = np.asarray(Z, dtype=float)
    if depth.ndim == 0:
        depth = np.full(len(points), depth)
    if depth.shape != (len(points),):
        raise ValueError(f"Z must be a scalar or have shape ({len(points)},), got {depth.shape}")
    if not (np.isfinite(depth) & (depth > 0)).all():
        raise ValueError(f"depths Z must be finite and > 0 m, got {depth.tolist()}")
    x, y, iz = points[:, 0], points[:, 1], 1.0 / depth
    zero = np.zeros_like(x)
    L = np.empty((len(points), 2, 6))
    L[:, 0] = np.stack([-iz, zero, x * iz, x * y, -(1 + x * x), y], axis=1)
    L[:, 1] = np.stack([zero, -iz, y * iz, 1 + y * y, -x * y, -x], axis=1)
    return L.reshape(-1, 6)


def interaction_matrix(estimate: str, xy_now: ArrayLike, Z_now: ArrayLike, xy_taught: ArrayLike,
                       Z_taught: ArrayLike) -> NDArray[np.float64]:
    """Interaction matrix (2N, 6) used by the control law, per ``estimate``:

    - ``current_view``: L at the current features and depths (Chaumette & Hutchinson 2006,
      ``L_e``);
    - ``taught_view``: L at the taught features and depths (``L_e*``);
    - ``blended``: their mean, ``0.5 (L_e + L_e*)``.

    Only the arrays the estimate needs are read.
    """
    if estimate == "current_view":
        return point_interaction_matrix(xy_now, Z_now)
    if estimate == "taught_view":
        return point_interaction_matrix(xy_taught, Z_taught)
    if estimate == "blended":
        L_now = point_interaction_matrix(xy_now, Z_now)
        L_taught = point_interaction_matrix(xy_taught, Z_taught)
        if L_now.shape != L_taught.shape:
            raise ValueError(f"current and taught views differ in point count: "
                             f"{len(L_now) // 2} vs {len(L_taught) // 2}")
        return 0.5 * (L_now + L_taught)
    raise ValueError(f"unknown interaction estimate {estimate!r}; expected one of "
                     f"{list(INTERACTION_ESTIMATES)}")
