"""`vservo detect IMAGE --target TARGET [--reference REF.yaml] [--camera CAMERA.yaml] [--out DIR]`

Runs the target's detector on one image file (PNG or JPEG, decoded as a CompressedImage would
be), identifies the features (against the taught reference if given, else from the target
file), and writes ``<stem>_detect.png`` (overlay: features, keys, matches to the reference,
rejected detections) and ``<stem>_features.json`` into DIR. Exit code 0 when at least the
minimum number of features is matched, 1 when not, 2 on bad input.
"""
from __future__ import annotations

import json
import sys
from pathlib import Path

import cv2
import numpy as np

from vservo_node.vision import depth as depth_mod
from vservo_node.vision.camera import CameraModel
from vservo_node.vision.features import make_detector
from vservo_node.vision.image_io import to_bgr_or_mono
from vservo_node.vision.reference import (MAX_IMAGE_SIDE, camera_from_entry, identify,
                                          load_reference)
from vservo_node.vision.targets import load_target
from vservo_node.yaml_entries import EntryReader
from vservo_node.yaml_files import brief

GREEN, RED, BLUE, YELLOW = (60, 200, 60), (40, 40, 230), (230, 120, 30), (0, 220, 255)


def register(subparsers):
    p = subparsers.add_parser(
        "detect", help="detect a target in an image file; write an overlay PNG and JSON",
        description=__doc__.split("\n\n", 1)[1])
    p.add_argument("image", help="PNG or JPEG image file")
    p.add_argument("--target", required=True,
                   help="target file, or the name of a shipped target (e.g. tray_dots)")
    p.add_argument("--reference", help="taught reference file (YAML) to match against")
    p.add_argument("--camera", help="camera file: CameraModel YAML (vservo) or a "
                                    "camera_calibration YAML (image_width, camera_matrix, ...)")
    p.add_argument("--out", default=".", help="output folder (default: current folder)")
    p.set_defaults(func=run)


class _CameraReader(EntryReader):
    kind = "camera file"


def load_camera(path) -> CameraModel:
    """CameraModel from our YAML (``CameraModel.to_dict``) or a ROS camera_calibration file;
    YamlFileError (a ValueError) naming the file and the key when it cannot be used."""
    r = _CameraReader(path)
    data = r.mapping(r.read_yaml(path), "top level")
    if "camera_matrix" not in data and "image_width" not in data:
        return camera_from_entry(r, data, "")

    def matrix(name, n, required=False):
        if data.get(name) is None and not required:
            return None
        block = r.mapping(data.get(name), name, None, ("data",))
        if n is None:     # distortion: any count; the model checks it
            d = block["data"]
            if not isinstance(d, list) or len(d) > 16:
                r.fail(f"{name}.data", f"expected a list of coefficients, got {brief(d)}")
            return r.vector(d, f"{name}.data", len(d)).tolist()
        return r.numbers(block["data"], f"{name}.data", n)

    for key in ("image_width", "image_height"):
        if key not in data:
            r.fail(key, "missing (a camera_calibration file gives image_width and image_height)")
    width = r.integer(data["image_width"], "image_width", 1, MAX_IMAGE_SIDE)
    height = r.integer(data["image_height"], "image_height", 1, MAX_IMAGE_SIDE)
    model = data.get("distortion_model", "none")
    model = "none" if model in (None, "") else r.text(model, "distortion_model")
    d, k = matrix("distortion_coefficients", None) or (), matrix("camera_matrix", 9, True)
    rect, proj = matrix("rectification_matrix", 9), matrix("projection_matrix", 12)
    try:
        return CameraModel.from_camera_info(width, height, model, d, k, rect, proj)
    except ValueError as exc:
        r.fail("top level", str(exc))


def _jsonable(value):
    if isinstance(value, dict):
        return {str(k): _jsonable(v) for k, v in value.items()}
    if isinstance(value, (list, tuple)):
        return [_jsonable(v) for v in value]
    if isinstance(value, np.ndarray):
        return _jsonable(value.tolist())
    if isinstance(value, (np.floating, float)):
        return None if not np.isfinite(value) else float(value)
    if isinstance(value, np.integer):
        return int(value)
    return value


def _label(key):
    return "-".join(str(k) for k in key[1:])


def _overlay(image, detection, match, ref_points_px):
    out = image.copy() if image.ndim == 3 else cv2.cvtColor(image, cv2.COLOR_GRAY2BGR)
    if out.dtype != np.uint8:
        out = cv2.normalize(out, None, 0, 255, cv2.NORM_MINMAX, dtype=cv2.CV_8U)
    scale = max(out.shape[:2]) / 640.0
    thick, font = max(1, int(round(scale))), 0.4 * scale

    def pt(p):
        return tuple(int(round(v)) for v in p)

    rejected = dict(match.rejected)
    for p, key in zip(detection.points, detection.keys):
        if key in rejected:
            cv2.drawMarker(out, pt(p), RED, cv2.MARKER_TILTED_CROSS, int(10 * scale), thick)
            cv2.putText(out, rejected[key], pt(p + 8 * scale), cv2.FONT_HERSHEY_SIMPLEX, font,
                        RED, thick, cv2.LINE_AA)
    for i, (p, key) in enumerate(zip(match.points, match.keys)):
        if ref_points_px is not None:
            cv2.line(out, pt(ref_points_px[i]), pt(p), YELLOW, thick, cv2.LINE_AA)
        cv2.circle(out, pt(p), int(5 * scale), GREEN, thick, cv2.LINE_AA)
        cv2.putText(out, _label(key), pt(p + 6 * scale), cv2.FONT_HERSHEY_SIMPLEX, font, GREEN,
                    thick, cv2.LINE_AA)
    if ref_points_px is not None:
        for p in ref_points_px:
            cv2.drawMarker(out, pt(p), BLUE, cv2.MARKER_SQUARE, int(8 * scale), thick)
    text = (f"{detection.kind}: {len(detection)} found, {len(match)} matched"
            + (f", missing {[_label(k) for k in match.missing]}" if match.missing else ""))
    cv2.putText(out, text, pt((8, 18 * scale)), cv2.FONT_HERSHEY_SIMPLEX, font,
                GREEN if match.ok else RED, thick, cv2.LINE_AA)
    return out


def run(args) -> int:
    image_path = Path(args.image)
    try:
        target = load_target(args.target)
        camera = load_camera(args.camera) if args.camera else None
        reference = load_reference(args.reference, target) if args.reference else None
        fmt = "png" if image_path.suffix.lower() == ".png" else "jpeg"
        image = to_bgr_or_mono(image_path.read_bytes(), fmt)
        detector = reference.detector(target) if reference else make_detector(target)
        detection = detector.detect(image)
        if reference is not None:
            match = reference.match(detection, camera)
            ref_px = match.ref_points
        else:
            match, ref_px = identify(target, detection, camera), None
    except (OSError, ValueError) as exc:
        print(f"vservo detect: {exc}", file=sys.stderr)
        return 2
    record = {
        "image": str(image_path), "target": target.name, "kind": target.kind,
        "reference": reference.name if reference else None,
        "image_size": detection.image_size,
        "detections": [
            {"key": k, "pixel": p, **({"colour_lab": c} if detection.colours_linear is not None
                                      else {})}
            for k, p, c in zip(detection.keys, detection.points,
                               detection.colours_lab if detection.colours_lab is not None
                               else [None] * len(detection))],
        "quality": detection.quality, "timings_ms": detection.timings,
        "match": {"ok": match.ok, "reason": match.reason, "keys": match.keys,
                  "pixels": match.points, "reference_points": match.ref_points,
                  "missing": match.missing, "rejected": match.rejected,
                  "quality": match.quality},
    }
    if camera is not None and target.has_geometry and len(match) >= 4:
        d = depth_mod.from_pnp(match.points, target.model_points(match.keys), camera)
        record["pnp"] = {"depths_m": d.z, "T_camera_target": d.T_camera_target,
                         "reprojection_rms_px": d.reprojection_rms_px}
    out = Path(args.out)
    out.mkdir(parents=True, exist_ok=True)
    overlay_path = out / f"{image_path.stem}_detect.png"
    json_path = out / f"{image_path.stem}_features.json"
    cv2.imwrite(str(overlay_path), _overlay(image, detection, match, ref_px))
    json_path.write_text(json.dumps(_jsonable(record), indent=1))
    print(f"{target.name}: {len(detection)} detected, {len(match)} matched"
          f"{'' if match.ok else ' (' + match.reason + ')'}; wrote {overlay_path} and "
          f"{json_path}")
    return 0 if match.ok else 1
