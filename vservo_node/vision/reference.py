"""Taught reference: the view of the target the servo drives back to.

``capture_reference`` detects the target in one image, identifies every feature (dots by
their printed colours and layout, markers by id and corner, textured posters through their
texture) and records per feature: key, pixel, normalized coordinates (when the camera is
known), measured colour (CIELAB, dots), depth (given, or by PnP when the camera and the
target's geometry are known); plus the camera, the image size and the target's name. Every
reference also keeps the taught image, saved as PNG next to its file (a textured target needs
it: the run-time detector matches to that view; for the others it shows what was taught), and,
when the caller knows them (``with_joints``), the arm's joint positions at the image's stamp:
the node's joint history at the capture, the simulated arm in headless runs. The report
measures the camera's path against that pose on records without a simulator's ground truth.
References written before these were kept still load; ``Reference.notes`` says what they lack
(the node logs it as information).

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
    image: station_a.png       # the taught view, beside the file (relative path)
    joint_positions: {joint_1: 0.1, ...}   # rad (m for prismatic), optional
    features:
      - {key: [dot, 0], pixel: [u, v], normalized: [x, y], colour_lab: [L, a, b], depth: z}

A reference taught at one resolution serves at another when the camera was known at teach
time: ``points_for(camera)`` re-projects the normalized coordinates through the current camera.
"""
from __future__ import annotations

import dataclasses
import datetime
import logging
import re
from collections import Counter
from dataclasses import dataclass
from pathlib import Path
from typing import Any, Iterable, Mapping, NoReturn

import cv2
import numpy as np
from numpy.typing import ArrayLike

from vservo_node.vision import depth as depth_mod
from vservo_node.vision.camera import CameraModel
from vservo_node.vision.features import Detection, Detector, make_detector, model_from_image
from vservo_node.vision.matching import MIN_MATCHED, MatchResult, match_by_key, match_dots
from vservo_node.vision.targets import Target
from vservo_node.vision.reference_entries import (_joints_entry, _KEY_FORMS, _png_size, _Reader,
                                                  camera_from_entry as camera_from_entry,
                                                  BadReferenceError as BadReferenceError,
                                                  MAX_IMAGE_SIDE as MAX_IMAGE_SIDE)
from vservo_node.yaml_files import brief, dump_yaml

FORMAT = "vservo_reference/1"
_LOG = logging.getLogger(__name__)
_NAME = re.compile(r"^[A-Za-z0-9][A-Za-z0-9_.-]*$")


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
        image: the taught image (BGR or mono), or None (a file written without one).
        created: ISO 8601 time of capture.
        joint_names, joint_positions: the arm's joints at the taught view (rad, m for
            prismatic joints), by name; None when not known (``with_joints`` sets them).
        notes: what a loaded file lacks that newer references keep (for a log line).
    """
    name: str
    target: str
    kind: str
    keys: list[Any]
    pixels: np.ndarray
    image_size: tuple[int, ...]
    normalized: np.ndarray | None = None
    colours_lab: np.ndarray | None = None
    depths: np.ndarray | None = None
    depth_source: str | None = None
    camera: CameraModel | None = None
    image: np.ndarray | None = None
    created: str = ""
    joint_names: tuple[str, ...] | None = None
    joint_positions: np.ndarray | None = None
    notes: tuple[str, ...] = ()

    def joints_for(self, names: Iterable[str]) -> np.ndarray | None:
        """The taught joint positions in the order of ``names`` (joint order is by name,
        never by position); None when the reference keeps no joints or lacks one of them."""
        if self.joint_names is None:
            return None
        index = {n: i for i, n in enumerate(self.joint_names)}
        if not all(n in index for n in names):
            return None
        positions = self.joint_positions
        assert positions is not None   # kept with the names (with_joints, the file's entry)
        return np.array([positions[index[n]] for n in names], dtype=float)

    def points_for(self, camera: CameraModel | None = None,
                   image_size: tuple[int, ...] | None = None) -> np.ndarray:
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

    def detector(self, target: Target) -> Detector:
        """The run-time detector; a textured target matches to the taught view."""
        check_target(self, target)
        if self.kind == "textured":
            assert self.image is not None   # a textured reference has its image (save, load)
            return make_detector(target, model_from_image(self.image, self.pixels, self.keys))
        return make_detector(target)

    def match(self, detection: Detection, camera: CameraModel | None = None,
              predicted: Mapping[Any, ArrayLike] | None = None, min_matched: int = MIN_MATCHED,
              ref_points: np.ndarray | None = None, **options: Any) -> MatchResult:
        """Match a detection (dots by colour and geometry, others by key) to this reference.

        ``ref_points`` of the result are the reference pixels as the current camera sees them:
        ``points_for(camera, detection.image_size)``, unless the caller passes them (a stream
        whose camera does not change computes them once).
        With ``camera``, the dots' geometric checks compare undistorted normalized coordinates
        (the taught ones, or those of ``ref_points`` for a reference taught without a camera)
        with the detections' (``matching.match_dots``). ``options`` go to ``match_dots``.
        """
        if ref_points is None:
            ref_points = self.points_for(camera, detection.image_size)
        if self.kind == "dots":
            geometry: np.ndarray | None = None
            if camera is not None:
                geometry = (self.normalized if self.normalized is not None
                            else camera.pixels_to_normalized(ref_points))
            assert self.colours_lab is not None   # a dots reference has its colours
            return match_dots(detection, self.keys, self.colours_lab, ref_points, predicted,
                              min_matched=min_matched, camera=camera, ref_geometry=geometry,
                              **options)
        return match_by_key(detection, self.keys, ref_points, min_matched=min_matched)


def check_target(reference: Reference, target: Target) -> None:
    """Refuse a reference that was taught on another target."""
    if reference.target != target.name or reference.kind != target.kind:
        raise BadReferenceError(f"reference {reference.name!r} was taught on target "
                             f"{reference.target!r} ({reference.kind}), not on "
                             f"{target.name!r} ({target.kind})")
    known = set(target.keys())
    unknown = [k for k in reference.keys if k not in known]
    if unknown:
        raise BadReferenceError(f"reference {reference.name!r} has features {unknown} that "
                             f"target {target.name!r} does not have")


def identify(target: Target, detection: Detection,
             camera: CameraModel | None = None) -> MatchResult:
    """Which target feature each detection is, from the target file alone (no taught view):
    dots by their printed colours (and layout, if given), others by key. ``ref_points`` of
    the result are target-frame metres (x, y), or zeros where the target gives no positions.
    With ``camera``, the dots' layout is checked against the detections' undistorted
    normalized coordinates (the plane maps to them by a homography, to distorted pixels not).
    """
    geometry = (target.model_points()[:, :2] if target.has_geometry
                else np.zeros((len(target.keys()), 2)))
    if target.kind == "dots":
        return match_dots(detection, target.keys(), target.nominal_lab(),
                          geometry if target.has_geometry else None, camera=camera)
    return match_by_key(detection, target.keys(), geometry)


def capture_reference(name: str, target: Target, image: np.ndarray,
                      camera: CameraModel | None = None, depths: ArrayLike | None = None,
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
    match = identify(target, detection, camera)
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
    taught_depths: np.ndarray | None = None
    if depths is not None:
        taught_depths = np.asarray(depths, dtype=float).ravel()
        if taught_depths.shape != (len(match),) or not np.all(taught_depths > 0):
            raise BadReferenceError(f"depths must be {len(match)} positive values, got "
                                 f"{taught_depths.tolist()}")
        depth_source = "given"
    elif camera is not None and target.has_geometry:
        taught_depths = depth_mod.from_pnp(match.points, target.model_points(match.keys),
                                           camera).z
        depth_source = "pnp"
    return Reference(
        name=name, target=target.name, kind=target.kind, keys=list(match.keys),
        pixels=match.points.copy(), image_size=detection.image_size,
        normalized=None if camera is None else camera.pixels_to_normalized(match.points),
        colours_lab=(_colours_lab(detection)[match.detection_index] if target.kind == "dots"
                     else None),
        depths=taught_depths, depth_source=depth_source, camera=camera,
        image=np.array(image),
        created=datetime.datetime.now(datetime.timezone.utc).isoformat(timespec="seconds"))


def _colours_lab(detection: Detection) -> np.ndarray:
    lab = detection.colours_lab
    assert lab is not None   # a dots detection measures its blobs' colours
    return lab


def with_joints(reference: Reference, names: Iterable[Any], positions: ArrayLike) -> Reference:
    """``reference`` with the arm's joint positions at the taught view: ``names`` (joint
    names) and ``positions`` (rad, m for prismatic joints) in the same order. BadReferenceError
    (a ValueError) when they do not pair up, repeat a name or hold a non-finite value."""
    joint_names = tuple(str(n) for n in names)
    q = np.asarray(positions, dtype=float).ravel()
    if not joint_names or len(joint_names) != q.size:
        raise BadReferenceError(f"joint positions of {reference.name!r}: {len(joint_names)} "
                                f"names for {q.size} positions; expected one position per name")
    if len(set(joint_names)) != len(joint_names):
        raise BadReferenceError(f"joint positions of {reference.name!r}: repeated names "
                                f"{sorted(n for n, c in Counter(joint_names).items() if c > 1)}")
    if not np.all(np.isfinite(q)):
        raise BadReferenceError(f"joint positions of {reference.name!r} must be finite, got "
                                f"{q.tolist()}")
    return dataclasses.replace(reference, joint_names=joint_names, joint_positions=q)


def joints_at_capture(reference: Reference, names: Iterable[Any] | None,
                      positions: ArrayLike | None, why: str = ""
                      ) -> tuple[Reference, str]:
    """(reference, note) for a capture service: ``reference`` with the joints ``names`` at
    ``positions`` (the joint history at the image's stamp), or, when ``positions`` is None,
    the reference as it is and a note saying why it keeps no joints (``why``). A view is
    still taught without joints: servoing does not need them, only the report's path to the
    taught pose does."""
    if positions is None or names is None:
        return reference, f"no joint positions kept ({why or 'no joint state at the image'})"
    return with_joints(reference, names, positions), ""


# ----------------------------------------------------------------------------- files
def _check_name(name: object) -> None:
    if not _NAME.match(str(name)):
        raise BadReferenceError(f"reference name {name!r} must start with a letter or digit and "
                             "hold only letters, digits, '_', '.', '-'")


def reference_path(directory: str | Path, name: str) -> Path:
    """The file of slot ``name`` in ``directory``: ``directory/name.yaml``."""
    _check_name(name)
    return Path(directory) / f"{name}.yaml"


def _floats(values: Iterable[Any]) -> list[float]:
    return [float(v) for v in values]


def save_reference(reference: Reference, path_in: str | Path) -> Path:
    """Write the reference YAML and, when it holds one, the taught image as PNG beside it
    (``<stem>.png``, named in the file relative to it); the joint positions when known."""
    path = Path(path_in)
    path.parent.mkdir(parents=True, exist_ok=True)
    features = []
    for i, key in enumerate(reference.keys):
        f: dict[str, Any] = {"key": list(key), "pixel": _floats(reference.pixels[i])}
        if reference.normalized is not None:
            f["normalized"] = _floats(reference.normalized[i])
        if reference.colours_lab is not None:
            f["colour_lab"] = _floats(reference.colours_lab[i])
        if reference.depths is not None:
            f["depth"] = float(reference.depths[i])
        features.append(f)
    data: dict[str, Any] = {"format": FORMAT, "name": reference.name, "target": reference.target,
            "kind": reference.kind, "created": reference.created,
            "image_size": [int(v) for v in reference.image_size],
            "camera": None if reference.camera is None else reference.camera.to_dict(),
            "depth_source": reference.depth_source, "features": features}
    if reference.kind == "textured" and reference.image is None:
        raise BadReferenceError(f"reference {reference.name!r} is textured but holds no taught "
                                "image; the run-time detector needs it")
    if reference.image is not None:
        image_file = path.with_suffix(".png")
        if not cv2.imwrite(str(image_file), reference.image):
            raise BadReferenceError(f"could not write the taught image {image_file}")
        data["image"] = image_file.name
    if reference.joint_names is not None:
        assert reference.joint_positions is not None   # kept with the names
        data["joint_positions"] = {n: float(q) for n, q in
                                   zip(reference.joint_names, reference.joint_positions)}
    with open(path, "w") as stream:
        dump_yaml(data, stream, sort_keys=False, default_flow_style=None)
    return path


def load_reference(path_in: str | Path, target: Target | None = None) -> Reference:
    """Read and validate a reference file; with ``target``, also check it was taught on it.

    Raises BadReferenceError (a ``yaml_files.YamlFileError``) naming the file, the entry and
    what is missing or inconsistent; the file is read through ``yaml_files.load_yaml`` (size
    cap, no anchors/aliases or tags).
    """
    path = Path(path_in)
    r = _Reader(path)

    def fail(msg: str, entry: str | None = None) -> NoReturn:
        if entry is None:
            raise BadReferenceError(f"reference file {path}: {msg}")
        r.fail(entry, msg)

    try:
        exists = path.is_file()
    except (OSError, ValueError):
        exists = False
    if not exists:
        fail("not found")
    data = r.read_yaml(path)
    if not isinstance(data, dict):
        fail(f"must hold a mapping, got {brief(data)}")
    if data.get("format") != FORMAT:
        fail(f"format is {brief(data.get('format'))}, expected {FORMAT!r}", "format")
    missing = [k for k in ("name", "target", "kind", "image_size", "features") if k not in data]
    if missing:
        fail(f"missing fields {missing}")
    name = r.text(data["name"], "name")
    target_name = r.text(data["target"], "target")
    kind = data["kind"]
    if not isinstance(kind, str) or kind not in _KEY_FORMS:
        fail(f"expected one of {sorted(_KEY_FORMS)}, got {brief(kind)}", "kind")
    size = data["image_size"]
    if not (isinstance(size, list) and len(size) == 2 and all(
            isinstance(v, int) and not isinstance(v, bool) and 0 < v <= MAX_IMAGE_SIDE
            for v in size)):
        fail(f"image_size must be [width, height] in pixels (1..{MAX_IMAGE_SIDE}), got "
             f"{brief(size)}", "image_size")
    features = data["features"]
    if not isinstance(features, list) or len(features) < MIN_MATCHED:
        fail(f"needs at least {MIN_MATCHED} features, got "
             f"{len(features) if isinstance(features, list) else brief(features)}", "features")
    for i, f in enumerate(features):
        if not isinstance(f, dict):
            fail(f"expected a mapping {{key: [...], pixel: [u, v], ...}}, got {brief(f)}",
                 f"features[{i}]")
    camera: CameraModel | None = None
    if data.get("camera") is not None:
        camera = camera_from_entry(r, data["camera"], "camera")
        if (camera.width, camera.height) != tuple(size):
            fail(f"camera is {camera.width}x{camera.height} but image_size is {size}", "camera")
    depth_source = data.get("depth_source")
    if depth_source is not None and not isinstance(depth_source, str):
        fail(f"expected text or null, got {brief(depth_source)}", "depth_source")

    def column(field: str, width: int, required: bool) -> np.ndarray | None:
        present = [field in f for f in features]
        if required and not all(present):
            fail(f"every feature needs '{field}'; missing in features "
                 f"{brief([i for i, p in enumerate(present) if not p])}")
        if not any(present):
            return None
        if not all(present):
            fail(f"'{field}' is given for some features but not all")
        bad: list[int] = []
        values: list[list[float]] = []
        for i, f in enumerate(features):
            v = f[field] if width > 1 else [f[field]]
            if (isinstance(v, list) and len(v) == width and all(
                    isinstance(x, (int, float)) and not isinstance(x, bool) for x in v)
                    and all(np.isfinite(float(x)) for x in v)):
                values.append([float(x) for x in v])
            else:
                bad.append(i)
        if bad:
            fail(f"'{field}' must be {width} finite number(s) per feature; wrong in features "
                 f"{brief(bad)}", f"features[{bad[0]}].{field}")
        array = np.array(values, dtype=float)
        return array if width > 1 else array.ravel()

    form, ids = _KEY_FORMS[kind]
    keys: list[tuple[Any, ...]] = []
    for i, f in enumerate(features):
        key = f.get("key")
        if not (isinstance(key, list) and len(key) == 1 + ids and key[0] == form and all(
                isinstance(k, int) and not isinstance(k, bool) and k >= 0 for k in key[1:])
                and (form != "tag" or key[2] < 4)):
            example = [form, 0] + ([0] if ids == 2 else [])
            fail(f"every feature needs 'key' as a list, e.g. {example} for a {kind} reference"
                 f"{' (corner 0..3)' if form == 'tag' else ''}; got {brief(key)}",
                 f"features[{i}].key")
        keys.append(tuple(key))
    counts = Counter(keys)
    if len(counts) != len(keys):
        fail(f"repeated feature keys {brief(sorted(k for k, n in counts.items() if n > 1))}",
             "features")
    pixels = column("pixel", 2, True)
    assert pixels is not None   # required: given for every feature, else refused
    normalized = column("normalized", 2, camera is not None)
    if normalized is not None and camera is None:
        fail("has normalized coordinates but no camera")
    colours = column("colour_lab", 3, kind == "dots")
    depths = column("depth", 1, False)
    if depths is not None and not np.all(depths > 0):
        fail("depths must be > 0 metres")
    notes: list[str] = []
    image: np.ndarray | None = None
    if kind == "textured" and "image" not in data:
        fail("a textured reference needs 'image', the taught view saved beside it")
    if "image" in data:
        image_file = r.text(data["image"], "image")
        image_path = path.parent / image_file
        if Path(image_file).is_absolute() or ".." in Path(image_file).parts:
            fail(f"expected a file name beside the reference, got {image_file!r}", "image")
        if kind != "textured" and not image_path.is_file():
            notes.append(f"its taught image {image_file} is not beside it (not needed to "
                         f"servo on {kind})")
        else:
            png = _png_size(image_path)
            if png is None:
                fail(f"cannot read the taught image {image_path}: expected a PNG file",
                     "image")
            if png != tuple(size):    # checked before decoding: no huge image is ever decoded
                fail(f"taught image is {png[0]}x{png[1]}, image_size is {size}", "image")
            # textured: the colour view the detector matches to; others: as taught (mono or
            # BGR, 8 or 16 bit)
            image = cv2.imread(str(image_path), cv2.IMREAD_COLOR if kind == "textured"
                               else cv2.IMREAD_UNCHANGED)
            if image is None:
                fail(f"cannot read the taught image {image_path}", "image")
            if image.ndim == 3 and image.shape[2] == 4:
                image = cv2.cvtColor(image, cv2.COLOR_BGRA2BGR)
            if (image.shape[1], image.shape[0]) != tuple(size):
                fail(f"taught image is {image.shape[1]}x{image.shape[0]}, image_size is {size}")
    else:
        notes.append("keeps no taught image (written before references kept one)")
    joint_names, joint_positions = _joints_entry(r, data.get("joint_positions"), fail)
    if joint_names is None:
        notes.append("keeps no joint positions (taught before references kept them, or "
                     "without joint states): reports measure the camera path against its "
                     "final pose instead of the taught one")
    reference = Reference(
        name=name, target=target_name, kind=kind, keys=keys,
        pixels=pixels, image_size=tuple(size), normalized=normalized, colours_lab=colours,
        depths=depths, depth_source=depth_source, camera=camera, image=image,
        created=str(data.get("created", "")), joint_names=joint_names,
        joint_positions=joint_positions, notes=tuple(notes))
    if target is not None:
        try:
            check_target(reference, target)
        except BadReferenceError as exc:
            fail(str(exc))
    for note in reference.notes:
        _LOG.info("reference file %s %s", path, note)
    return reference
