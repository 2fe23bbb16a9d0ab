"""Detection and tracking timed per target kind and image size (no ROS).

Frames: the shipped targets (tray_dots, tray_tags, tray_poster) rendered by the simulator's
plane renderer (``sim.render``) along a slow approach to the taught view (from 12 cm off and
15 deg turned, 2 mm and 0.5 deg per frame), camera f = 600 px per 640 px of width. Per frame:

- ``detect``: the detector over the full frame;
- ``track``: ``vision.features.Tracker`` over the sequence (the first frame in full, then
  windows around the predicted positions), the first frame left out of the figures.

Textured targets use the taught view (the sequence's last frame) as their keypoint model, as
a taught reference does. One OpenCV thread (``cv2.setNumThreads(1)``): one core's cost.
"""
from __future__ import annotations

import time

import cv2
import numpy as np
from scipy.spatial.transform import Rotation

from vservo_node.sim.render import PlanarTexture, PlaneRenderer
from vservo_node.vision.camera import CameraModel
from vservo_node.vision.features import Tracker, make_detector, model_from_image
from vservo_node.vision.targets import load_target, render_target_texture

SIZES = ((640, 480), (1280, 720), (1920, 1080))
TARGETS = {"dots": "tray_dots", "markers": "tray_tags", "textured": "tray_poster"}


def camera_for(width: int, height: int) -> CameraModel:
    f = 600.0 * width / 640
    return CameraModel.pinhole(width, height, f, f, (width - 1) / 2, (height - 1) / 2)


def pose(k: int, frames: int) -> np.ndarray:
    """T_camera_target of frame k of ``frames``: approaching the taught view."""
    s = 1.0 - k / frames
    T = np.eye(4)
    T[:3, :3] = Rotation.from_euler("XYZ", [4 * s, -3 * s, 15 * s], degrees=True).as_matrix()
    T[:3, 3] = [0.06 * s, -0.04 * s, 0.40 + 0.08 * s]
    return T


def render_sequence(target, camera: CameraModel, frames: int) -> list:
    texture = PlanarTexture(*render_target_texture(target, 5000.0 * camera.width / 640))
    renderer = PlaneRenderer(camera)
    images = []
    for k in range(frames + 1):
        image = np.full((camera.height, camera.width, 3), 110, np.uint8)
        renderer.draw(image, texture, pose(k, frames))
        images.append(image)
    return images


def detector_for(target, camera, taught_image):
    if target.kind != "textured":
        return make_detector(target)
    uv = camera.project(_model_in_camera(target, pose(1, 1)))
    return make_detector(target, model_from_image(taught_image, uv, target.keys()))


def _model_in_camera(target, T):
    P = target.model_points()
    return P @ T[:3, :3].T + T[:3, 3]


def time_vision(kind: str, size: tuple, frames: int = 30) -> dict:
    """{'detect': ms per frame (array), 'track': ms per frame (array), 'windowed': fraction
    of tracked frames searched in windows, 'points': features per frame}."""
    cv2.setNumThreads(1)
    target = load_target(TARGETS[kind])
    camera = camera_for(*size)
    images = render_sequence(target, camera, frames)
    detector = detector_for(target, camera, images[-1])
    detect = []
    for image in images[:-1]:
        t0 = time.thread_time()
        det = detector.detect(image)
        detect.append(1e3 * (time.thread_time() - t0))
    tracker = Tracker(detector)
    track, windowed, points = [], 0, []
    for image in images[:-1]:
        t0 = time.thread_time()
        det = tracker.detect(image)
        track.append(1e3 * (time.thread_time() - t0))
        windowed += det.windowed
        points.append(len(det))
    return {"detect": np.array(detect), "track": np.array(track[1:]),
            "windowed": windowed / max(1, len(images) - 2), "points": int(np.median(points))}
