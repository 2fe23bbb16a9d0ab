"""Per-frame detection times, full frame and windowed, beside cv2.SimpleBlobDetector.

Run: .venv/bin/python benchmarks/detect_bench.py [--repeat N]
One OpenCV thread (cv2.setNumThreads(1)) to measure one core. Frames are exact-perspective
renders of the shipped targets (tests/vision/vision_synth.py) with Gaussian noise sigma 2.
Goals (ours, from the project brief): dots full frame <= 0.5 x SimpleBlobDetector's time on
the same frame; windowed dot tracking < 0.5 ms at 640x480. Figures are printed as measured.
"""
from __future__ import annotations

import argparse
import sys
import time
from pathlib import Path

import cv2
import numpy as np

sys.path.insert(0, str(Path(__file__).resolve().parent.parent / "tests" / "vision"))
import vision_synth as vs  # noqa: E402

from vservo_node.vision.features import Tracker, make_detector, model_from_image  # noqa: E402
from vservo_node.vision.matching import match_dots  # noqa: E402
from vservo_node.vision.targets import load_target  # noqa: E402

SIZES = [(640, 480), (1920, 1080)]


def median_ms(fn, repeat):
    fn()  # warm up
    times = []
    for _ in range(repeat):
        t0 = time.perf_counter()
        fn()
        times.append(time.perf_counter() - t0)
    return 1e3 * float(np.median(times))


def frame(target, size):
    K = vs.intrinsics(600.0 * size[0] / 640, size)
    T = vs.pose((20, -10, 15), (0.01, 0.005, 0.4))
    return K, T, vs.render(target, K, size, T, noise=2.0)


def detector_for(target, K, size):
    if target.kind != "textured":
        return make_detector(target)
    taught = vs.pose((0, 0, 0), (0.0, 0.0, 0.4))
    image = vs.render(target, K, size, taught)
    return make_detector(target, model_from_image(
        image, vs.project(K, taught, target.model_points()), target.keys()))


def main():
    parser = argparse.ArgumentParser(description=__doc__.split("\n\n")[0])
    parser.add_argument("--repeat", type=int, default=50)
    args = parser.parse_args()
    cv2.setNumThreads(1)
    print(f"OpenCV {cv2.__version__}, 1 thread, median of {args.repeat} runs, milliseconds")
    print(f"{'target':<12} {'size':>10} {'full':>8} {'windowed':>9} {'match':>7} "
          f"{'SimpleBlob':>11} {'full/SBD':>9}")
    for name in ("tray_dots", "tray_tags", "tray_poster"):
        target = load_target(name)
        for size in SIZES:
            K, T, image = frame(target, size)
            detector = detector_for(target, K, size)
            full = median_ms(lambda: detector.detect(image), args.repeat)
            tracker = Tracker(detector)
            first = tracker.detect(image)
            windowed = median_ms(lambda: tracker.detect(image), args.repeat)
            assert tracker.detect(image).windowed and len(first) == len(target.keys())
            match = sbd = ratio = float("nan")
            if target.kind == "dots":
                det = detector.detect(image)
                lab, xy = target.nominal_lab(), target.model_points()[:, :2]
                match = median_ms(lambda: match_dots(det, target.keys(), lab, xy), args.repeat)
                grey = cv2.cvtColor(image, cv2.COLOR_BGR2GRAY)
                blobs = cv2.SimpleBlobDetector_create()  # default parameters
                sbd = median_ms(lambda: blobs.detect(grey), args.repeat)
                ratio = full / sbd
            print(f"{name:<12} {size[0]:>5}x{size[1]:<4} {full:>8.2f} {windowed:>9.3f} "
                  f"{match:>7.2f} {sbd:>11.2f} {ratio:>9.2f}")
    print("full: detector over the whole frame (dots: colour segmentation, components, "
          "moments); windowed: Tracker after the first frame; match: match_dots (Hungarian, "
          "exposure fit, homography check); SimpleBlob: cv2.SimpleBlobDetector default "
          "parameters on the grey frame (conversion not counted).")


if __name__ == "__main__":
    main()
