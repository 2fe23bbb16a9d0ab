"""Target files: what the camera servos on, and pictures of it for simulation and tests.

A target file (YAML, format ``vservo_target/1``, our own) describes one planar target of one
of three kinds. Geometry is in the **target frame**, metres: origin at the board centre, x to
the right and y down as the board is printed (so rows of the printed picture run along +y),
z = x cross y into the board. A camera looking straight at the printed board with its optical
axes aligned to these has ``T_camera_target = [I | (0, 0, d)]``.

- ``dots``: coloured discs (>= 3, any colours); per dot ``id``, ``colour`` (sRGB 0..255) and
  optionally ``centre`` [x, y] and ``radius``. ``segmentation`` tells the detector how dots
  stand out: ``chroma`` (coloured dots on a grey/white board), ``dark`` or ``bright``.
- ``markers``: square fiducials of one ``dictionary`` (``apriltag_36h11``, ``4x4_50``, ... any
  OpenCV ``cv2.aruco.DICT_*`` name); per marker ``id`` and optionally ``centre`` and ``size``
  (side of the outer black square).
- ``textured``: a poster without markers. ``texture`` is either ``{generator: shapes, seed,
  count}`` (procedural, regenerated identically from the seed) or ``{image: file}`` (a picture
  of the poster, relative to the target file); ``points`` are the servo points [x, y].

Feature keys (hashable identities used everywhere downstream): ``('dot', id)``,
``('tag', id, corner)`` with OpenCV's corner order (0 top-left, then clockwise as printed), and
``('pt', index)``.
"""
from __future__ import annotations

from dataclasses import dataclass, field
from pathlib import Path
from typing import Any, Iterable, Mapping

import cv2
import numpy as np
from numpy.typing import ArrayLike

from vservo_node import paths
from vservo_node.vision.image_io import srgb_to_lab
from vservo_node.yaml_entries import EntryReader
from vservo_node.yaml_files import YamlFileError, brief

FORMAT = "vservo_target/1"
KINDS = ("dots", "markers", "textured")
SEGMENTATIONS = ("chroma", "dark", "bright")


@dataclass(frozen=True)
class Dot:
    """A coloured disc: ``colour`` sRGB 0..255 (R, G, B); ``centre`` (m), ``radius`` (m)."""
    id: int
    colour: tuple[int, int, int]
    centre: tuple[float, ...] | None = None
    radius: float | None = None


@dataclass(frozen=True)
class Marker:
    """A square fiducial: ``centre`` (m) and ``size`` (m, side of the outer black square)."""
    id: int
    centre: tuple[float, ...] | None = None
    size: float | None = None


@dataclass(frozen=True)
class Target:
    """One planar target; kind-specific fields are empty for the other kinds."""
    name: str
    kind: str
    width: float | None = None           # board size, metres
    height: float | None = None
    background: tuple[int, int, int] = (235, 235, 235)  # board colour, sRGB 0..255
    dots: tuple[Dot, ...] = ()
    segmentation: str = "chroma"
    threshold: float | None = None       # segmentation threshold (0..255), None: the default
    dictionary: str | None = None
    markers: tuple[Marker, ...] = ()
    texture: dict[str, Any] | None = None
    points: np.ndarray | None = None     # textured: servo points (P, 2), metres
    source: Path | None = field(default=None, compare=False)

    def keys(self) -> list[tuple[Any, ...]]:
        """Feature keys in the target's order."""
        if self.kind == "dots":
            return [("dot", d.id) for d in self.dots]
        if self.kind == "markers":
            return [("tag", m.id, c) for m in self.markers for c in range(4)]
        assert self.points is not None   # a textured target has its points
        return [("pt", i) for i in range(len(self.points))]

    @property
    def has_geometry(self) -> bool:
        """True when every feature has a position on the board (needed for PnP, rendering)."""
        if self.kind == "dots":
            return all(d.centre is not None for d in self.dots)
        if self.kind == "markers":
            return all(m.centre is not None for m in self.markers)
        return True

    def model_points(self, keys: Iterable[Iterable[Any]] | None = None) -> np.ndarray:
        """Target-frame coordinates (N, 3), metres (z = 0), of the features ``keys``
        (default: all, in ``keys()`` order). Dots: disc centres; tags: corners."""
        if not self.has_geometry:
            raise ValueError(f"target {self.name!r} gives no positions for its features; "
                             "add 'centre' (and 'size'/'radius') to each")
        table = dict(zip(self.keys(), self._xy()))
        wanted = self.keys() if keys is None else [tuple(k) for k in keys]
        unknown = [k for k in wanted if k not in table]
        if unknown:
            raise ValueError(f"target {self.name!r} has no features {unknown}")
        xy = np.array([table[k] for k in wanted], dtype=float).reshape(-1, 2)
        return np.hstack([xy, np.zeros((len(xy), 1))])

    def _xy(self) -> list[tuple[float, ...] | None]:
        if self.kind == "dots":
            return [d.centre for d in self.dots]
        if self.kind == "markers":
            # OpenCV's corner order of a printed marker: top-left, top-right, bottom-right,
            # bottom-left; with y down as printed, top-left is (-h, -h) from the centre.
            signs = ((-1, -1), (1, -1), (1, 1), (-1, 1))
            return [(_centre(m)[0] + sx * _size(m) / 2, _centre(m)[1] + sy * _size(m) / 2)
                    for m in self.markers for sx, sy in signs]
        assert self.points is not None
        return [tuple(p) for p in self.points]

    def nominal_lab(self) -> np.ndarray:
        """CIELAB (N, 3) of the dots' printed colours, in ``keys()`` order."""
        return srgb_to_lab(np.array([d.colour for d in self.dots], dtype=float) / 255.0)

    def aruco_dictionary(self) -> cv2.aruco.Dictionary:
        """The cv2.aruco dictionary of a marker target."""
        return aruco_dictionary(self.dictionary)


def _centre(feature: Dot | Marker) -> tuple[float, ...]:
    """The centre of a feature of a target with geometry (``Target.has_geometry``)."""
    assert feature.centre is not None
    return feature.centre


def _size(marker: Marker) -> float:
    assert marker.size is not None   # given with its centre (the target file's check)
    return marker.size


def aruco_dictionary(name: str | None) -> cv2.aruco.Dictionary:
    """cv2.aruco dictionary for a name such as ``apriltag_36h11`` or ``4x4_50``."""
    attr = "DICT_" + str(name).upper()
    if not hasattr(cv2.aruco, attr):
        known = sorted(n[5:].lower() for n in dir(cv2.aruco) if n.startswith("DICT_")
                       and n[5:] == n[5:].upper())
        raise ValueError(f"unknown marker dictionary {name!r}; expected one of {known}")
    return cv2.aruco.getPredefinedDictionary(getattr(cv2.aruco, attr))


# ----------------------------------------------------------------------------- loading
class TargetError(YamlFileError):
    """A target file or mapping that cannot be used; the message names the file and the entry
    (e.g. ``target file x.yaml: dots[2].colour: ...``) and what was expected."""


_TOP = {"format", "name", "kind", "board", "dots", "segmentation", "dictionary", "markers",
        "texture", "points"}
_BOARD = {"width", "height", "colour"}
_DOT = {"id", "colour", "centre", "radius"}
_MARKER = {"id", "centre", "size"}
_SEGMENTATION = {"mode", "threshold"}
_TEXTURE = {"generator", "seed", "count", "image"}
# A board the camera servos on; the simulator draws it at 8000 px/m and the textured detector
# at 2000 px/m, so a larger one would ask for images of gigabytes (common practice, no source).
MAX_BOARD_M = 2.0
MAX_SHAPES = 10000   # procedural poster shapes (the shipped poster has 160)


class _Reader(EntryReader):
    kind = "target file"
    error = TargetError

    def pair(self, value: Any, entry: str) -> tuple[float, ...]:
        return tuple(float(v) for v in self.vector(value, entry, 2))

    def length(self, value: Any, entry: str, limit: float | None = None) -> float | None:
        """None, or a positive length in metres (at most ``limit``)."""
        if value is None:
            return None
        v = self.number(value, entry, positive=True)
        if limit is not None and v > limit:
            self.fail(entry, f"expected at most {limit} m, got {v!r}")
        return v

    def colour(self, value: Any, entry: str) -> tuple[int, int, int]:
        if not (isinstance(value, (list, tuple)) and len(value) == 3):
            self.fail(entry, f"must be sRGB [R, G, B] in 0..255, got {brief(value)}")
        c = self.vector(value, entry, 3)
        if np.any(c < 0) or np.any(c > 255):
            self.fail(entry, f"must be sRGB [R, G, B] in 0..255, got {brief(value)}")
        r, g, b = (int(round(float(x))) for x in c)
        return r, g, b

    def items(self, value: Any, entry: str, allowed: set[str]) -> list[dict[Any, Any]]:
        """A list (None reads as empty) of mappings with keys from ``allowed``."""
        value = [] if value is None else value
        if not isinstance(value, list):
            self.fail(entry, f"expected a list, got {brief(value)}")
        return [self.mapping(v, f"{entry}[{i}]", allowed) for i, v in enumerate(value)]

    def unique_ids(self, items: Iterable[Dot | Marker], entry: str, what: str) -> None:
        ids = [i.id for i in items]
        repeated = sorted({i for i in ids if ids.count(i) > 1})
        if repeated:
            self.fail(entry, f"{what} ids must be unique, repeated: {repeated}")


def _dots(r: _Reader, data: Mapping[str, Any]) -> dict[str, Any]:
    dots = []
    for i, d in enumerate(r.items(data.get("dots"), "dots", _DOT)):
        entry = f"dots[{i}]"
        dots.append(Dot(id=r.integer(d.get("id", i), f"{entry}.id", 0),
                        colour=r.colour(d.get("colour"), f"{entry}.colour"),
                        centre=(None if d.get("centre") is None
                                else r.pair(d["centre"], f"{entry}.centre")),
                        radius=r.length(d.get("radius"), f"{entry}.radius", MAX_BOARD_M)))
    if len(dots) < 3:
        r.fail("dots", f"a dot target needs at least 3 dots, got {len(dots)}")
    r.unique_ids(dots, "dots", "dot")
    if any((d.centre is None) != (d.radius is None) for d in dots):
        r.fail("dots", "give each dot both 'centre' and 'radius', or neither")
    seg = r.mapping(data.get("segmentation"), "segmentation", _SEGMENTATION)
    mode = seg.get("mode", "chroma")
    if not isinstance(mode, str) or mode not in SEGMENTATIONS:
        r.fail("segmentation.mode", f"segmentation mode {brief(mode)} is not one of "
                                    f"{SEGMENTATIONS}")
    threshold = seg.get("threshold")
    if threshold is not None:
        threshold = r.number(threshold, "segmentation.threshold")
        if not 0 < threshold < 255:
            r.fail("segmentation.threshold", f"segmentation threshold must be in (0, 255), "
                                             f"got {threshold!r}")
    return dict(dots=tuple(dots), segmentation=mode, threshold=threshold)


def _markers(r: _Reader, data: Mapping[str, Any]) -> dict[str, Any]:
    if "dictionary" not in data:
        r.fail("dictionary", "missing (e.g. apriltag_36h11, 4x4_50)")
    name = r.text(data["dictionary"], "dictionary")
    try:
        size = aruco_dictionary(name).bytesList.shape[0]   # validates the name
    except ValueError as exc:
        r.fail("dictionary", str(exc))
    markers = []
    for i, m in enumerate(r.items(data.get("markers"), "markers", _MARKER)):
        entry = f"markers[{i}]"
        if "id" not in m:
            r.fail(entry, "missing key(s) ['id']")
        ident = r.integer(m["id"], f"{entry}.id", 0)
        if ident >= size:
            r.fail(f"{entry}.id", f"marker id {ident} is not in {name} (ids 0..{size - 1})")
        markers.append(Marker(id=ident,
                              centre=(None if m.get("centre") is None
                                      else r.pair(m["centre"], f"{entry}.centre")),
                              size=r.length(m.get("size"), f"{entry}.size", MAX_BOARD_M)))
    if not markers:
        r.fail("markers", "a marker target needs at least one marker")
    r.unique_ids(markers, "markers", "marker")
    if any((m.centre is None) != (m.size is None) for m in markers):
        r.fail("markers", "give each marker both 'centre' and 'size', or neither")
    return dict(dictionary=name, markers=tuple(markers))


def _textured(r: _Reader, data: Mapping[str, Any], common: Mapping[str, Any]
              ) -> dict[str, Any]:
    texture = data.get("texture")
    if not isinstance(texture, dict) or not ({"generator", "image"} & set(texture)):
        r.fail("texture", "a textured target needs 'texture' with 'generator' (and 'seed') or "
                          f"'image', got {brief(texture)}")
    texture = dict(r.mapping(texture, "texture", _TEXTURE))
    if "image" in texture:
        r.text(texture["image"], "texture.image")
    if texture.get("generator", "shapes") != "shapes":
        r.fail("texture.generator", f"texture generator {brief(texture['generator'])} is not "
                                    "'shapes'")
    if "seed" in texture:
        r.integer(texture["seed"], "texture.seed", 0)
    if "count" in texture:
        if r.integer(texture["count"], "texture.count", 1) > MAX_SHAPES:
            r.fail("texture.count", f"expected at most {MAX_SHAPES} shapes, got "
                                    f"{texture['count']}")
    if common["width"] is None or common["height"] is None:
        r.fail("board", "a textured target needs board width and height")
    points = data.get("points")
    if points is not None and not isinstance(points, list):
        r.fail("points", f"expected a list of [x, y] points, got {brief(points)}")
    pts = np.array([r.pair(p, f"points[{i}]") for i, p in enumerate(points or [])]).reshape(-1, 2)
    if len(pts) < 4:
        r.fail("points", f"a textured target needs at least 4 servo points, got {len(pts)}")
    return dict(texture=texture, points=pts)


def target_from_dict(data: Any, source: Path | None = None) -> Target:
    """Build and validate a Target from the mapping of a target file; TargetError (a
    ValueError) naming the file, the entry and what was expected."""
    r = _Reader(source)
    if not isinstance(data, dict):
        r.fail("top level", f"must be a mapping, got {type(data).__name__}")
    data = r.mapping(data, "top level", _TOP)
    if data.get("format", FORMAT) != FORMAT:
        r.fail("format", f"format {brief(data.get('format'))} is not {FORMAT!r}")
    for required in ("name", "kind"):
        if required not in data:
            r.fail(required, f"the target lacks '{required}'")
    kind = data["kind"]
    if not isinstance(kind, str) or kind not in KINDS:
        r.fail("kind", f"kind {brief(kind)} is not one of {KINDS}")
    board = r.mapping(data.get("board"), "board", _BOARD)
    common: dict[str, Any] = dict(name=r.text(data["name"], "name"), kind=kind,
                  width=r.length(board.get("width"), "board.width", MAX_BOARD_M),
                  height=r.length(board.get("height"), "board.height", MAX_BOARD_M),
                  background=r.colour(board.get("colour", (235, 235, 235)), "board.colour"),
                  source=source)
    extra = {"dots": ("dots", "segmentation"), "markers": ("dictionary", "markers"),
             "textured": ("texture", "points")}
    foreign = sorted(k for other, keys in extra.items() if other != kind for k in keys
                     if k in data)
    if foreign:
        r.fail("top level", f"{foreign} do not belong to a {kind} target")
    if kind == "dots":
        return Target(**common, **_dots(r, data))
    if kind == "markers":
        return Target(**common, **_markers(r, data))
    return Target(**common, **_textured(r, data, common))


def load_target(name_or_path: str | Path) -> Target:
    """Load a target file by path, or a shipped one by short name (e.g. ``tray_dots``);
    TargetError naming the file and the entry when it cannot be used (``yaml_files``: size
    cap, no anchors/aliases or tags), FileNotFoundError for an unknown short name."""
    path = paths.shipped("targets", str(name_or_path))
    return target_from_dict(_Reader.read_yaml(path), source=Path(path))


# ----------------------------------------------------------------------------- pictures
def texture_transform(target: Target, px_per_m: float
                      ) -> tuple[tuple[int, int], np.ndarray]:
    """Texture size (w, h) in pixels and the 3x3 ``T_target_from_texture_pixels``.

    The texture covers the board exactly; ``[x, y, 1] = T @ [u, v, 1]`` with (u, v) texture
    pixels (origin at the centre of the top-left pixel) and (x, y) target metres.
    """
    if target.width is None or target.height is None:
        raise ValueError(f"target {target.name!r} needs board width and height to be drawn")
    w = max(1, int(round(target.width * px_per_m)))
    h = max(1, int(round(target.height * px_per_m)))
    sx, sy = w / target.width, h / target.height
    T = np.array([[1 / sx, 0, -target.width / 2 + 0.5 / sx],
                  [0, 1 / sy, -target.height / 2 + 0.5 / sy],
                  [0, 0, 1.0]])
    return (w, h), T


def render_target_texture(target: Target, px_per_m: float) -> tuple[np.ndarray, np.ndarray]:
    """Picture of the printed board and where it lies on the target plane.

    Returns ``(image, T_target_from_texture_pixels)``: a BGR uint8 image of the board at
    ``px_per_m`` pixels per metre, and the 3x3 map from its pixels to target metres (see
    ``texture_transform``). Dots and marker cells are area-sampled, so edges are sub-pixel.
    """
    if not target.has_geometry:
        raise ValueError(f"target {target.name!r} has no feature positions to draw")
    (w, h), T = texture_transform(target, px_per_m)
    image = np.empty((h, w, 3), np.uint8)
    image[:] = target.background[::-1]
    if target.kind == "dots":
        for dot in target.dots:
            _draw_disc(image, T, dot)
    elif target.kind == "markers":
        dictionary = target.aruco_dictionary()
        for marker in target.markers:
            _draw_marker(image, T, marker, dictionary)
    elif "image" in _texture(target):
        image = _poster_from_file(target, (w, h))
    else:
        _draw_shapes(image, T, target)
    return image, T


def _texture(target: Target) -> dict[str, Any]:
    assert target.texture is not None   # a textured target has its texture
    return target.texture


def _texture_box(T: np.ndarray, image: np.ndarray, centre: tuple[float, ...], half: float
                 ) -> tuple[tuple[slice, slice], np.ndarray, np.ndarray]:
    """Pixel slice of the texture covering the square centre +- half (metres), and the
    target coordinates of those pixel centres."""
    h, w = image.shape[:2]
    su, sv = 1 / T[0, 0], 1 / T[1, 1]
    u0 = max(0, int(np.floor((centre[0] - half - T[0, 2]) * su)) - 1)
    u1 = min(w, int(np.ceil((centre[0] + half - T[0, 2]) * su)) + 2)
    v0 = max(0, int(np.floor((centre[1] - half - T[1, 2]) * sv)) - 1)
    v1 = min(h, int(np.ceil((centre[1] + half - T[1, 2]) * sv)) + 2)
    x = T[0, 2] + np.arange(u0, u1) * T[0, 0]
    y = T[1, 2] + np.arange(v0, v1) * T[1, 1]
    return (slice(v0, v1), slice(u0, u1)), x, y


def _blend(image: np.ndarray, box: tuple[slice, slice], coverage: np.ndarray,
           bgr: ArrayLike) -> None:
    patch = image[box].astype(float)
    a = coverage[..., None]
    image[box] = np.round(patch * (1 - a) + np.asarray(bgr, float) * a).astype(np.uint8)


def _draw_disc(image: np.ndarray, T: np.ndarray, dot: Dot) -> None:
    assert dot.radius is not None   # given with its centre (the target file's check)
    centre = _centre(dot)
    box, x, y = _texture_box(T, image, centre, dot.radius)
    d = np.hypot(x[None, :] - centre[0], y[:, None] - centre[1])
    # Fraction of a pixel inside the circle, straight-edge approximation (exact to second
    # order in pixel size / radius).
    coverage = np.clip((dot.radius - d) / T[0, 0] + 0.5, 0.0, 1.0)
    _blend(image, box, coverage, dot.colour[::-1])


_MARKER_SUBSAMPLES = 4  # 4x4 point samples per texture pixel for marker cell edges


def _draw_marker(image: np.ndarray, T: np.ndarray, marker: Marker,
                 dictionary: cv2.aruco.Dictionary) -> None:
    cells = dictionary.markerSize + 2
    bits = cv2.aruco.generateImageMarker(dictionary, marker.id, cells, borderBits=1)
    centre, size = _centre(marker), _size(marker)
    box, x, y = _texture_box(T, image, centre, size / 2)
    n = _MARKER_SUBSAMPLES
    offsets = (np.arange(n) + 0.5) / n - 0.5
    xs = (x[:, None] + offsets[None, :] * T[0, 0]).ravel()
    ys = (y[:, None] + offsets[None, :] * T[1, 1]).ravel()
    cell = size / cells
    ci = np.floor((xs - centre[0] + size / 2) / cell).astype(int)
    ri = np.floor((ys - centre[1] + size / 2) / cell).astype(int)
    inside = ((ri[:, None] >= 0) & (ri[:, None] < cells) & (ci[None, :] >= 0)
              & (ci[None, :] < cells))
    black = inside & (bits[np.clip(ri, 0, cells - 1)][:, np.clip(ci, 0, cells - 1)] == 0)
    white = inside & ~black
    shape = (len(y), n, len(x), n)
    cov_black = black.reshape(shape).mean(axis=(1, 3))
    cov_white = white.reshape(shape).mean(axis=(1, 3))
    patch = image[box].astype(float) * (1 - cov_black - cov_white)[..., None]
    image[box] = np.round(patch + 255.0 * cov_white[..., None]).astype(np.uint8)


def poster_shapes(target: Target) -> list[tuple[str, Any, tuple[int, ...]]]:
    """The procedural poster as a list of (kind, params, bgr) in target metres.

    Deterministic in ``texture.seed`` and ``texture.count`` (numpy PCG64 generator), so the
    simulator and the tests redraw the same poster at any resolution.
    """
    texture = _texture(target)
    assert target.width is not None and target.height is not None   # a textured target's
    rng = np.random.default_rng(int(texture.get("seed", 0)))
    count = int(texture.get("count", 150))
    hw, hh = target.width / 2, target.height / 2
    shapes: list[tuple[str, Any, tuple[int, ...]]] = []
    for _ in range(count):
        kind = ("disc", "box", "triangle")[rng.integers(3)]
        centre = (rng.uniform(-hw, hw), rng.uniform(-hh, hh))
        size = float(np.exp(rng.uniform(np.log(0.004), np.log(0.035))))
        angle = rng.uniform(0, np.pi)
        params: Any
        bgr = tuple(int(c) for c in rng.integers(0, 256, 3))
        if kind == "disc":
            params = (centre, size / 2)
        elif kind == "box":
            aspect = rng.uniform(0.3, 1.0)
            c, s = np.cos(angle), np.sin(angle)
            corners = np.array([[-1, -1], [1, -1], [1, 1], [-1, 1]]) * [size / 2,
                                                                      aspect * size / 2]
            params = corners @ np.array([[c, s], [-s, c]]) + centre
        else:
            params = rng.uniform(-size / 2, size / 2, (3, 2)) + centre
        shapes.append((kind, params, bgr))
    return shapes


_SHIFT = 4  # fixed-point fraction bits for sub-pixel drawing with cv2


def _draw_shapes(image: np.ndarray, T: np.ndarray, target: Target) -> None:
    s = 1 << _SHIFT

    def to_px(xy_in: ArrayLike) -> np.ndarray:
        xy = np.asarray(xy_in, float)
        px: np.ndarray = np.round(((xy - T[:2, 2]) / np.diag(T)[:2]) * s).astype(np.int32)
        return px

    for kind, params, bgr in poster_shapes(target):
        if kind == "disc":
            centre, radius = params
            cv2.circle(image, tuple(int(v) for v in to_px(centre)),
                       int(round(radius / T[0, 0] * s)), bgr, -1, cv2.LINE_AA, _SHIFT)
        else:
            cv2.fillPoly(image, [to_px(params)], bgr, cv2.LINE_AA, _SHIFT)


def _poster_from_file(target: Target, size: tuple[int, int]) -> np.ndarray:
    path = Path(_texture(target)["image"])
    if not path.is_absolute() and target.source is not None:
        path = Path(target.source).parent / path
    picture = cv2.imread(str(path), cv2.IMREAD_COLOR)
    if picture is None:
        raise ValueError(f"target {target.name!r}: cannot read texture image {path}")
    resized: np.ndarray = cv2.resize(picture, size, interpolation=cv2.INTER_AREA)
    return resized
