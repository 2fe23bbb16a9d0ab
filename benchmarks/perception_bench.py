"""Time Perception.process per frame (milliseconds) for the three demo targets at 640x480.

    .venv/bin/python benchmarks/perception_bench.py

Frames are rendered beforehand (vservo_node.sim.render) along a slow approach to the taught
view (2 mm and 0.5 deg per frame), so the tracker can search windows after the first frame;
"full frame" resets the tracker before each frame. Columns: median and 95th percentile of the
whole call, and the median of its stages as PerceptionInfo.timings reports them.
"""
import time

import numpy as np
from scipy.spatial.transform import Rotation

from vservo_node.perception import Perception
from vservo_node.sim.render import PlanarTexture, PlaneRenderer
from vservo_node.vision.camera import CameraModel
from vservo_node.vision.targets import load_target, render_target_texture

CAMERA = CameraModel.pinhole(640, 480, 600.0, 600.0, 319.5, 239.5)
FRAMES = 60


def pose(k: int) -> np.ndarray:
    """T_camera_target of frame k: from 12 cm off and 15 deg turned towards the taught view."""
    s = 1.0 - k / FRAMES
    T = np.eye(4)
    T[:3, :3] = Rotation.from_euler("XYZ", [4 * s, -3 * s, 15 * s], degrees=True).as_matrix()
    T[:3, 3] = [0.06 * s, -0.04 * s, 0.40 + 0.08 * s]
    return T


def frames(target):
    texture = PlanarTexture(*render_target_texture(target, 5000.0))
    renderer = PlaneRenderer(CAMERA)
    images = []
    for k in range(FRAMES + 1):
        image = np.full((CAMERA.height, CAMERA.width, 3), 110, np.uint8)
        renderer.draw(image, texture, pose(k))
        images.append(image)
    return images


def run(perception, images, full_frame):
    totals, stages = [], {}
    for k, image in enumerate(images[:-1]):
        if full_frame:
            perception.reset()
        start = time.perf_counter()
        obs, info = perception.process(image, k / 30.0)
        totals.append(1e3 * (time.perf_counter() - start))
        assert obs is not None, info.reason
        for name, ms in info.timings.items():
            stages.setdefault(name, []).append(ms)
    return np.array(totals), {k: float(np.median(v)) for k, v in stages.items()}


def main() -> int:
    print(f"Perception.process, {CAMERA.width}x{CAMERA.height}, {FRAMES} frames per row")
    print(f"{'target':12s} {'search':11s} {'median ms':>9s} {'p95 ms':>7s}  stages (median ms)")
    for name in ("tray_dots", "tray_tags", "tray_poster"):
        target = load_target(name)
        images = frames(target)
        teacher = Perception(target, CAMERA)
        reference = teacher.capture(images[-1], "bench")
        for full_frame in (False, True):
            perception = Perception(target, CAMERA, reference)
            totals, stages = run(perception, images, full_frame)
            text = ", ".join(f"{k} {v:.2f}" for k, v in stages.items() if k != "total")
            print(f"{name:12s} {'full frame' if full_frame else 'tracking':11s} "
                  f"{np.median(totals):9.2f} {np.percentile(totals, 95):7.2f}  {text}")
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
