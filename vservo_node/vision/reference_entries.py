"""The reference file's entries that stand alone: the camera, the taught image's size (read
from its PNG header), the joint positions, the key forms; and the reference's error class
(vservo_node.vision.reference, which re-exports the public names)."""
from __future__ import annotations

import math
from pathlib import Path
from typing import Any, Callable, NoReturn

import numpy as np

from vservo_node.vision.camera import CameraModel
from vservo_node.yaml_entries import EntryReader
from vservo_node.yaml_files import YamlFileError, brief


class BadReferenceError(YamlFileError):
    """A reference that cannot be captured, read or used; the message says what and why (for a
    file: which file and entry). A ``yaml_files.YamlFileError``, so a ValueError."""


_KEY_FORMS = {"dots": ("dot", 1), "markers": ("tag", 2), "textured": ("pt", 1)}
_CAMERA_KEYS = ("width", "height", "distortion_model", "d", "k", "p", "r", "rectified")
# Largest image side accepted from a file (pixels): an 8K sensor's. It bounds what a reference
# can make us decode: its taught PNG must have image_size, so at most 8192 x 8192 x 3 bytes
# (200 MB); a PNG compresses such an image ~1000:1 (common practice, no source).
MAX_IMAGE_SIDE = 8192


class _Reader(EntryReader):
    kind = "reference file"
    error = BadReferenceError


def camera_from_entry(r: EntryReader, value: Any, entry: str = "camera") -> CameraModel:
    """CameraModel from a ``CameraModel.to_dict`` mapping read from a file; every malformed
    entry is refused through ``r`` (its error class) naming ``entry`` and the key."""
    def at(key: str) -> str:
        return f"{entry}.{key}" if entry else key

    value = r.mapping(value, entry or "top level", _CAMERA_KEYS, ("width", "height", "k"))
    fields: dict[str, Any] = {
        "width": r.integer(value["width"], at("width"), 1, MAX_IMAGE_SIDE),
        "height": r.integer(value["height"], at("height"), 1, MAX_IMAGE_SIDE),
        "k": r.numbers(value["k"], at("k"), 9)}
    if "distortion_model" in value:
        fields["distortion_model"] = r.text(value["distortion_model"], at("distortion_model"))
    if value.get("d") is not None:
        d = value["d"]
        if not isinstance(d, list) or len(d) > 16:
            r.fail(at("d"), f"expected a list of distortion coefficients, got {brief(d)}")
        fields["d"] = r.vector(d, at("d"), len(d)).tolist()
    for key, n in (("p", 12), ("r", 9)):
        if value.get(key) is not None:
            fields[key] = r.numbers(value[key], at(key), n)
    if "rectified" in value:
        if not isinstance(value["rectified"], bool):
            r.fail(at("rectified"), f"expected true or false, got {brief(value['rectified'])}")
        fields["rectified"] = value["rectified"]
    try:
        return CameraModel.from_dict(fields)
    except ValueError as exc:
        r.fail(entry or "top level", str(exc))


def _png_size(path: Path) -> tuple[int, int] | None:
    """(width, height) from a PNG file's IHDR chunk, without decoding it; None when the file is
    not a PNG (ISO/IEC 15948:2004, sec. 5.2 signature and 11.2.2 IHDR, from memory)."""
    try:
        with open(path, "rb") as f:
            head = f.read(24)
    except OSError:
        return None
    if len(head) < 24 or head[:8] != b"\x89PNG\r\n\x1a\n" or head[12:16] != b"IHDR":
        return None
    return int.from_bytes(head[16:20], "big"), int.from_bytes(head[20:24], "big")


def _joints_entry(r: EntryReader, value: Any, fail: Callable[[str, str], NoReturn]
                  ) -> tuple[tuple[str, ...] | None, np.ndarray | None]:
    """(names, positions) of a ``joint_positions: {name: rad}`` entry; (None, None) when
    absent (null counts as absent); malformed entries refused naming the joint."""
    if value is None:
        return None, None
    if not isinstance(value, dict) or not value:
        fail(f"expected a mapping {{joint name: position}}, got {brief(value)}",
             "joint_positions")
    names: list[str] = []
    positions: list[float] = []
    for name, q in value.items():
        if not isinstance(name, str) or not name:
            fail(f"joint names must be text, got {brief(name)}", "joint_positions")
        if not (isinstance(q, (int, float)) and not isinstance(q, bool) and math.isfinite(q)):
            fail(f"expected a finite number (rad, or m for a prismatic joint), got {brief(q)}",
                 f"joint_positions.{name}")
        names.append(name)
        positions.append(float(q))
    return tuple(names), np.array(positions)
