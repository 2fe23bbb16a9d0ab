"""Taught reference: the view of the target the servo drives back to.

``capture_reference`` detects the target in one image, identifies every feature (dots by
their printed colours and layout, markers by id and corner, textured posters through their
texture) and records per feature: key, pixel, normalized coordinates (when the camera is
known), measured colour (CIELAB, dots), depth (given, or by PnP when the camera and the
target's geometry are known); plus the camera, the image size and the target's name. A
textured reference also keeps the taught image, saved as PNG next to its file, because the
run-time detector matches to that view.

Reference file (YAML, format ``vservo_reference/1``, our own), one per slot / station
(``reference_path(directory, name)``)::

    format: vservo_reference/1
    name: station_a
    target: tray_dots
    kind: dots
    created: '2026-01-01T12:00:00+00:00'
    image_size: [640, 480]
    camera: {...}              # CameraModel.to_dict(), or null
    depth_source: pnp          # or given, or null
    image: station_a.png       # textured only
    features:
      - {key: [dot, 0], pixel: [u, v], normalized: [x, y], colour_lab: [L, a, b], depth: z}

A reference taught at one resolution serves at another when the camera was known at teach
time: ``points_for(camera)`` re-projects the normalized coordinates through the current camera.
"""
from __future__ import annotations

import datetime
import re
from dataclasses import dataclass
from pathlib import Path

import cv2
import numpy as np
import yaml

from vservo_node.vision import depth as depth_mod
from vservo_node.vision.camera import CameraModel
from vservo_node.vision.features import Detection, make_detector, model_from_image
from vservo_node.vision.matching import MIN_MATCHED, MatchResult, match_by_key, match_dots
from vservo_node.vision.targets import Target

FORMAT = "vservo_reference/1"
_NAME = re.compile(r"^[A-Za-z0-9][A-Za-z0-9_.-]*$")


class BadReferenceError(ValueError):
    """A reference that cannot be captured, read or used; the message says what and why."""


@dataclass
class Reference:
    """A taught view. Arrays are in ``keys`` order.

    Attributes:
        name: slot / station name.
        target: name of the target file's target; kind: its kind.
        keys: N feature keys.
        pixels: (N, 2) pixels in the taught image.
        image_size: (width, height) of the taught image.
        normalized: (N, 2) normalized coordinates, or None if taught without a camera.
        colours_lab: (N, 3) CIELAB colours (dots), else None.
        depths: (N,) metres in the taught camera frame, or None.
        depth_source: how the depths were obtained ('given', 'pnp') or None.
        camera: CameraModel of the taught image, or None.
        image: the taught image (textured targets), else None.
        created: ISO 8601 time of capture.
    """
    name: str
    target: str
    kind: str
    keys: list
    pixels: np.ndarray
    image_size: tuple
    normalized: np.ndarray | None = None
    colours_lab: np.ndarray | None = None
    depths: np.ndarray | None = None
    depth_source: str | None = None
    camera: CameraModel | None = None
    image: np.ndarray | None = None
    created: str = ""

    def points_for(self, camera: CameraModel | None = None, image_size=None) -> np.ndarray:
        """Reference pixels (N, 2) as the current camera would see them.

        With ``camera``: the normalized coordinates re-projected through it (any resolution).
        Without: the taught pixels, refused if ``image_size`` differs from the taught size.
        """
        if camera is not None:
            if self.normalized is not None:
                return camera.normalized_to_pixels(self.normalized)
            image_size = (camera.width, camera.height)
        if image_size is not None and tuple(image_size) != tuple(self.image_size):
            raise BadReferenceError(
                f"reference {self.name!r} was taught at {self.image_size[0]}x"
                f"{self.image_size[1]} without camera intrinsics, so it cannot be used at "
                f"{image_size[0]}x{image_size[1]}; teach it again with the camera known")
        return self.pixels

    def detector(self, target: Target):
        """The run-time detector; a textured target matches to the taught view."""
        check_target(self, target)
        if self.kind == "textured":
            return make_detector(target, model_from_image(self.image, self.pixels, self.keys))
        return make_detector(target)

    def match(self, detection: Detection, camera: CameraModel | None = None, predicted=None,
              min_matched=MIN_MATCHED, ref_points=None, **options) -> MatchResult:
        """Match a detection (dots by colour and geometry, others by key) to this reference.

        ``ref_points`` of the result are the reference pixels as the current camera sees them:
        ``points_for(camera, detection.image_size)``, unless the caller passes them (a stream
        whose camera does not change computes them once).
        ``options`` go to ``matching.match_dots``.
        """
        if ref_points is None:
            ref_points = self.points_for(camera, detection.image_size)
        if self.kind == "dots":
            return match_dots(detection, self.keys, self.colours_lab, ref_points, predicted,
                              min_matched=min_matched, **options)
        return match_by_key(detection, self.keys, ref_points, min_matched=min_matched)


def check_target(reference: Reference, target: Target):
    """Refuse a reference that was taught on another target."""
    if reference.target != target.name or reference.kind != target.kind:
        raise BadReferenceError(f"reference {reference.name!r} was taught on target "
                             f"{reference.target!r} ({reference.kind}), not on "
                             f"{target.name!r} ({target.kind})")
    unknown = [k for k in reference.keys if k not in set(target.keys())]
    if unknown:
        raise BadReferenceError(f"reference {reference.name!r} has features {unknown} that "
                             f"target {target.name!r} does not have")


def identify(target: Target, detection: Detection) -> MatchResult:
    """Which target feature each detection is, from the target file alone (no taught view):
    dots by their printed colours (and layout, if given), others by key. ``ref_points`` of
    the result are target-frame metres (x, y), or zeros where the target gives no positions.
    """
    geometry = (target.model_points()[:, :2] if target.has_geometry
                else np.zeros((len(target.keys()), 2)))
    if target.kind == "dots":
        return match_dots(detection, target.keys(), target.nominal_lab(),
                          geometry if target.has_geometry else None)
    return match_by_key(detection, target.keys(), geometry)


def capture_reference(name: str, target: Target, image: np.ndarray,
                      camera: CameraModel | None = None, depths=None,
                      require_all: bool = True) -> Reference:
    """Teach a reference from one image (BGR or mono, as from ``image_io.to_bgr_or_mono``).

    Args:
        name: slot / station name (letters, digits, ``_ . -``).
        target: the target in view.
        camera: the camera of ``image``; enables normalized coordinates and PnP depths.
        depths: (N,) depths in ``target.keys()`` order of the seen features, metres; None
            computes them by PnP when the camera and the target geometry are known.
        require_all: refuse the view unless every feature of the target is seen.
    """
    _check_name(name)
    detection = make_detector(target).detect(image)
    match = identify(target, detection)
    if not match.ok or (require_all and match.missing):
        raise BadReferenceError(f"cannot teach {name!r}: {len(match)} of {len(target.keys())} "
                             f"features of {target.name!r} identified, missing "
                             f"{match.missing}" + (f" ({detection.quality['reason']})"
                                                   if "reason" in detection.quality else ""))
    if match.quality.get("ambiguous"):
        raise BadReferenceError(f"cannot teach {name!r}: the dots of {target.name!r} could be "
                             "assigned in more than one way; give dots distinct colours or "
                             "an asymmetric layout")
    depth_source = None
    if depths is not None:
        depths = np.asarray(depths, dtype=float).ravel()
        if depths.shape != (len(match),) or not np.all(depths > 0):
            raise BadReferenceError(f"depths must be {len(match)} positive values, got "
                                 f"{depths.tolist()}")
        depth_source = "given"
    elif camera is not None and target.has_geometry:
        depths = depth_mod.from_pnp(match.points, target.model_points(match.keys), camera).z
        depth_source = "pnp"
    return Reference(
        name=name, target=target.name, kind=target.kind, keys=list(match.keys),
        pixels=match.points.copy(), image_size=detection.image_size,
        normalized=None if camera is None else camera.pixels_to_normalized(match.points),
        colours_lab=(detection.colours_lab[match.detection_index] if target.kind == "dots"
                     else None),
        depths=depths, depth_source=depth_source, camera=camera,
        image=np.array(image) if target.kind == "textured" else None,
        created=datetime.datetime.now(datetime.timezone.utc).isoformat(timespec="seconds"))


# ----------------------------------------------------------------------------- files
def _check_name(name):
    if not _NAME.match(str(name)):
        raise BadReferenceError(f"reference name {name!r} must start with a letter or digit and "
                             "hold only letters, digits, '_', '.', '-'")


def reference_path(directory, name: str) -> Path:
    """The file of slot ``name`` in ``directory``: ``directory/name.yaml``."""
    _check_name(name)
    return Path(directory) / f"{name}.yaml"


def _floats(values):
    return [float(v) for v in values]


def save_reference(reference: Reference, path) -> Path:
    """Write the reference YAML (and, for a textured one, the taught image as PNG beside it)."""
    path = Path(path)
    path.parent.mkdir(parents=True, exist_ok=True)
    features = []
    for i, key in enumerate(reference.keys):
        f = {"key": list(key), "pixel": _floats(reference.pixels[i])}
        if reference.normalized is not None:
            f["normalized"] = _floats(reference.normalized[i])
        if reference.colours_lab is not None:
            f["colour_lab"] = _floats(reference.colours_lab[i])
        if reference.depths is not None:
            f["depth"] = float(reference.depths[i])
        features.append(f)
    data = {"format": FORMAT, "name": reference.name, "target": reference.target,
            "kind": reference.kind, "created": reference.created,
            "image_size": [int(v) for v in reference.image_size],
            "camera": None if reference.camera is None else reference.camera.to_dict(),
            "depth_source": reference.depth_source, "features": features}
    if reference.kind == "textured":
        image_file = path.with_suffix(".png")
        if not cv2.imwrite(str(image_file), reference.image):
            raise BadReferenceError(f"could not write the taught image {image_file}")
        data["image"] = image_file.name
    with open(path, "w") as f:
        yaml.safe_dump(data, f, sort_keys=False, default_flow_style=None)
    return path


def load_reference(path, target: Target | None = None) -> Reference:
    """Read and validate a reference file; with ``target``, also check it was taught on it.

    Raises BadReferenceError naming the file and what is missing or inconsistent.
    """
    path = Path(path)

    def fail(msg):
        raise BadReferenceError(f"reference file {path}: {msg}")

    if not path.is_file():
        fail("not found")
    with open(path) as f:
        try:
            data = yaml.safe_load(f)
        except yaml.YAMLError as exc:
            fail(f"not valid YAML ({exc})")
    if not isinstance(data, dict):
        fail("must hold a mapping")
    if data.get("format") != FORMAT:
        fail(f"format is {data.get('format')!r}, expected {FORMAT!r}")
    missing = [k for k in ("name", "target", "kind", "image_size", "features") if k not in data]
    if missing:
        fail(f"missing fields {missing}")
    size = data["image_size"]
    if not (isinstance(size, list) and len(size) == 2 and all(
            isinstance(v, int) and v > 0 for v in size)):
        fail(f"image_size must be [width, height] in pixels, got {size!r}")
    features = data["features"]
    if not isinstance(features, list) or len(features) < MIN_MATCHED:
        fail(f"needs at least {MIN_MATCHED} features, got "
             f"{len(features) if isinstance(features, list) else features!r}")
    camera = None
    if data.get("camera") is not None:
        try:
            camera = CameraModel.from_dict(data["camera"])
        except (ValueError, TypeError) as exc:
            fail(f"camera: {exc}")
        if (camera.width, camera.height) != tuple(size):
            fail(f"camera is {camera.width}x{camera.height} but image_size is {size}")

    def column(field, width, required):
        present = [field in f for f in features]
        if required and not all(present):
            fail(f"every feature needs '{field}'; missing in features "
                 f"{[i for i, p in enumerate(present) if not p]}")
        if not any(present):
            return None
        if not all(present):
            fail(f"'{field}' is given for some features but not all")
        try:
            values = [np.array(f[field], dtype=float).reshape(-1) for f in features]
        except (ValueError, TypeError):
            values = None
        bad = [i for i, v in enumerate(values or []) if v.size != width
               or not np.isfinite(v).all()]
        if values is None or bad:
            fail(f"'{field}' must be {width} finite number(s) per feature; wrong in features "
                 f"{bad if values is not None else 'some'}")
        values = np.array(values)
        return values if width > 1 else values.ravel()

    if not all(isinstance(f, dict) and isinstance(f.get("key"), list) for f in features):
        fail("every feature needs 'key' as a list, e.g. [dot, 0]")
    keys = [tuple(f["key"]) for f in features]
    if len(set(keys)) != len(keys):
        fail(f"repeated feature keys {sorted({k for k in keys if keys.count(k) > 1})}")
    pixels = column("pixel", 2, True)
    normalized = column("normalized", 2, camera is not None)
    if normalized is not None and camera is None:
        fail("has normalized coordinates but no camera")
    colours = column("colour_lab", 3, data["kind"] == "dots")
    depths = column("depth", 1, False)
    if depths is not None and not np.all(depths > 0):
        fail("depths must be > 0 metres")
    image = None
    if data["kind"] == "textured":
        if "image" not in data:
            fail("a textured reference needs 'image', the taught view saved beside it")
        image = cv2.imread(str(path.parent / data["image"]), cv2.IMREAD_COLOR)
        if image is None:
            fail(f"cannot read the taught image {path.parent / data['image']}")
        if (image.shape[1], image.shape[0]) != tuple(size):
            fail(f"taught image is {image.shape[1]}x{image.shape[0]}, image_size is {size}")
    reference = Reference(
        name=str(data["name"]), target=str(data["target"]), kind=str(data["kind"]), keys=keys,
        pixels=pixels, image_size=tuple(size), normalized=normalized, colours_lab=colours,
        depths=depths, depth_source=data.get("depth_source"), camera=camera, image=image,
        created=str(data.get("created", "")))
    if target is not None:
        try:
            check_target(reference, target)
        except BadReferenceError as exc:
            fail(str(exc))
    return reference
