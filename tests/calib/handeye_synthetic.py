"""INVENTED GEOMETRY for the hand-eye tests: a camera on a tool (or on a stand) and a 5 x 4
dot grid, poses drawn at random around the target. No real cell or arm."""
from __future__ import annotations

import numpy as np
from scipy.spatial.transform import Rotation

from vservo_node.calib.handeye import Sample
from vservo_node.control import frames
from vservo_node.control.pose_error import pose_from_model

FOCAL_PX = 600.0
# an invented hand-eye: camera 62 mm ahead of the flange, off-centre, turned about all axes
T_TOOL_CAMERA = frames.transform(Rotation.from_rotvec(np.radians([3.0, -5.0, 92.0])).as_matrix(),
                                 [0.031, -0.047, 0.062])
T_BASE_TARGET = frames.transform(Rotation.from_euler("xyz", [180.0, 0.0, -90.0], degrees=True)
                                 .as_matrix(), [0.52, 0.03, 0.01])
# fixed mounting: a camera on a stand looking down and back at the arm; target on the flange
T_BASE_CAMERA = frames.transform(Rotation.from_euler("xyz", [-150.0, 5.0, 88.0], degrees=True)
                                 .as_matrix(), [0.9, 0.1, 0.6])
T_TOOL_TARGET = frames.transform(Rotation.from_rotvec(np.radians([0.0, 8.0, 30.0])).as_matrix(),
                                 [0.01, 0.02, 0.045])
GRID = np.array([[x, y, 0.0] for x in np.linspace(-0.06, 0.06, 5)
                 for y in np.linspace(-0.04, 0.04, 4)])


def _view(rng, depth, tilt_deg, twist_deg) -> np.ndarray:
    """T_camera_target of a view: the target ``depth`` m ahead, tilted and turned at random."""
    R = Rotation.from_rotvec(np.radians([rng.uniform(-tilt_deg, tilt_deg),
                                         rng.uniform(-tilt_deg, tilt_deg),
                                         rng.uniform(-twist_deg, twist_deg)])).as_matrix()
    t = np.array([rng.uniform(-0.03, 0.03), rng.uniform(-0.03, 0.03),
                  depth + rng.uniform(-0.05, 0.05)])
    return frames.transform(R, t)


def samples(n: int, mounting: str = "hand", noise_px: float = 0.0, seed: int = 0,
            tilt_deg: float = 25.0, twist_deg: float = 60.0, axis=None) -> list[Sample]:
    """``n`` samples; ``axis``: when given, every view differs only by rotation about this axis
    of the camera (poorly spread samples)."""
    rng = np.random.default_rng(seed)
    out = []
    for k in range(n):
        if axis is None:
            T_ct = _view(rng, 0.40, tilt_deg, twist_deg)
        else:
            R = Rotation.from_rotvec(np.radians(rng.uniform(-twist_deg, twist_deg))
                                     * np.asarray(axis, float)).as_matrix()
            T_ct = frames.transform(R, [0.0, 0.0, 0.40])
        if mounting == "hand":
            T_base_camera = T_BASE_TARGET @ frames.invert(T_ct)
            T_base_tool = T_base_camera @ frames.invert(T_TOOL_CAMERA)
        else:
            T_base_tool = T_BASE_CAMERA @ T_ct @ frames.invert(T_TOOL_TARGET)
        p = GRID @ T_ct[:3, :3].T + T_ct[:3, 3]
        xy = p[:, :2] / p[:, 2:3] + rng.normal(0.0, noise_px / FOCAL_PX, (len(GRID), 2))
        T_pnp, _ = pose_from_model(xy, GRID)
        out.append(Sample(T_base_tool, T_pnp, xy, GRID.copy(), t=float(k)))
    return out


def truth(mounting: str) -> np.ndarray:
    return T_TOOL_CAMERA if mounting == "hand" else T_BASE_CAMERA
