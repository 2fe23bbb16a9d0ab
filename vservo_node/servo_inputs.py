"""What the servo is given per run and per image: the taught view and the matched features of
one image (re-exported by vservo_node.servo)."""
from __future__ import annotations

import functools
from dataclasses import dataclass
from typing import Hashable

import numpy as np


@dataclass(frozen=True)
class TaughtView:
    """What the camera saw when the pose was taught.

    ``keys``: feature identities in order; ``xy`` (N, 2) normalized coordinates; ``uv`` (N, 2)
    pixels in the current camera model (for errors in px); ``depth`` (N,) metres, or None;
    ``model`` (N, 3) the features' positions in a frame fixed to the target (metres, e.g. the
    target file's), or None: with it the pose error is estimated by PnP, without it from the
    plane homography and the depths (``control.pose_error``).
    """

    keys: tuple[Hashable, ...]
    xy: np.ndarray
    uv: np.ndarray
    depth: np.ndarray | None = None
    image_size: tuple[int, int] | None = None   # (width, height) px, for the border margin
    model: np.ndarray | None = None

    def __post_init__(self) -> None:
        n = len(self.keys)
        if n == 0 or len(set(self.keys)) != n:
            raise ValueError(f"taught view needs distinct feature keys, got {list(self.keys)}")
        for name, arr in (("xy", self.xy), ("uv", self.uv)):
            if np.shape(arr) != (n, 2):
                raise ValueError(f"taught view {name} has shape {np.shape(arr)}; expected ({n}, 2)")
        if self.depth is not None and (np.shape(self.depth) != (n,) or
                                       not np.all(np.asarray(self.depth) > 0)):
            raise ValueError(f"taught depths must be {n} positive values, got {self.depth}")
        if self.model is not None and (np.shape(self.model) != (n, 3) or
                                       not np.all(np.isfinite(self.model))):
            raise ValueError(f"taught model points must be ({n}, 3) finite metres, got shape "
                             f"{np.shape(self.model)}")

    def index(self) -> dict[Hashable, int]:
        return {k: i for i, k in enumerate(self.keys)}

    @functools.cached_property
    def px_per_unit(self) -> float:
        """Pixels per normalized unit, from the view itself (spread of uv over spread of xy)."""
        d_uv = np.linalg.norm(self.uv - self.uv.mean(axis=0), axis=1).sum()
        d_xy = np.linalg.norm(self.xy - self.xy.mean(axis=0), axis=1).sum()
        return float(d_uv / d_xy) if d_xy > 0 else 1.0


@dataclass(frozen=True)
class Observation:
    """Matched features of one image: ``keys`` (M,), ``uv`` (M, 2) px, ``xy`` (M, 2)
    normalized, ``depth`` (M,) metres or None (then the configured depth source applies)."""

    keys: tuple[Hashable, ...]
    uv: np.ndarray
    xy: np.ndarray
    depth: np.ndarray | None = None
