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
    n = len(points)
    depth = np.asarray(Z, dtype=float)
    if depth.ndim == 0:
        depth = np.full(n, depth)
    if depth.shape != (n,):
        raise ValueError(f"Z must be a scalar or have shape ({n},), got {depth.shape}")
    if not (depth > 0).all() or not np.isfinite(depth).all():     # (NaN > 0 is False)
        raise ValueError(f"depths Z must be finite and > 0 m, got {depth.tolist()}")
    # filled column by column into one preallocated array: no temporaries per row
    # (benchmarks: vservo bench, Servo.observe rows)
    x, y, iz = points[:, 0], points[:, 1], 1.0 / depth
    L = np.empty((n, 2, 6))
    L[:, 0, 0] = -iz
    L[:, 0, 1] = 0.0
    np.multiply(x, iz, out=L[:, 0, 2])
    np.multiply(x, y, out=L[:, 0, 3])
    L[:, 1, 4] = -L[:, 0, 3]
    L[:, 0, 4] = -1.0 - x * x
    L[:, 0, 5] = y
    L[:, 1, 0] = 0.0
    L[:, 1, 1] = -iz
    np.multiply(y, iz, out=L[:, 1, 2])
    L[:, 1, 3] = 1.0 + y * y
    L[:, 1, 5] = -x
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
        L_now += L_taught
        L_now *= 0.5
        return L_now
    raise ValueError(f"unknown interaction estimate {estimate!r}; expected one of "
                     f"{list(INTERACTION_ESTIMATES)}")
