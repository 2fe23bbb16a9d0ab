"""Checks of the entries of our own YAML files (scenarios, sweeps), shared by their loaders.

Every refusal names the file and the entry (``"<kind> <file>: <entry>: <what is wrong>"``) and
raises the loader's own error class. A loader subclasses :class:`EntryReader`, setting
``kind`` and ``error`` and adding the checks only its format needs.
"""
from __future__ import annotations

import math
from collections.abc import Collection
from pathlib import Path

import numpy as np
import yaml


class EntryReader:
    """Checks one file's entries; ``source`` (the file's path, or None) goes into messages."""

    kind = "file"
    error: type[ValueError] = ValueError

    def __init__(self, source):
        self.where = f"{self.kind} {source}" if source else self.kind

    @classmethod
    def read_yaml(cls, path):
        """The parsed contents of the file ``path``; ``error`` when it is not valid YAML."""
        try:
            return yaml.safe_load(Path(path).read_text())
        except yaml.YAMLError as exc:
            raise cls.error(f"{cls.kind} {path}: not valid YAML: {exc}") from exc

    def fail(self, entry: str, message: str):
        raise self.error(f"{self.where}: {entry}: {message}")

    def mapping(self, value, entry: str, allowed: Collection | None = None,
                required: Collection = ()) -> dict:
        """A mapping (None reads as empty) with keys from ``allowed`` (any when None) and every
        key of ``required``."""
        value = {} if value is None else value
        if not isinstance(value, dict):
            self.fail(entry, f"expected a mapping, got {value!r}")
        if allowed is not None:
            unknown = sorted(set(value) - set(allowed))
            if unknown:
                self.fail(entry, f"unknown key(s) {unknown}; expected some of {sorted(allowed)}")
        missing = sorted(set(required) - set(value))
        if missing:
            self.fail(entry, f"missing key(s) {missing}")
        return value

    def number(self, value, entry: str, minimum: float | None = None, positive: bool = False,
               allow_inf: bool = False) -> float:
        """A finite number (or +inf when ``allow_inf``), as float; booleans are refused."""
        if isinstance(value, bool) or not isinstance(value, (int, float)):
            self.fail(entry, f"expected a number, got {value!r}")
        value = float(value)
        if not (math.isfinite(value) or (allow_inf and value == math.inf)):
            self.fail(entry, f"expected a finite number, got {value!r}")
        if positive and not value > 0:
            self.fail(entry, f"must be > 0, got {value!r}")
        if minimum is not None and value < minimum:
            self.fail(entry, f"must be >= {minimum}, got {value!r}")
        return value

    def integer(self, value, entry: str, minimum: int) -> int:
        """An integer >= ``minimum``; booleans and floats are refused."""
        if isinstance(value, bool) or not isinstance(value, int) or value < minimum:
            self.fail(entry, f"expected an integer >= {minimum}, got {value!r}")
        return value

    def vector(self, value, entry: str, n: int) -> np.ndarray:
        """A list of ``n`` finite numbers, as a float array."""
        if not isinstance(value, (list, tuple)) or len(value) != n:
            self.fail(entry, f"expected a list of {n} numbers, got {value!r}")
        return np.array([self.number(v, f"{entry}[{i}]") for i, v in enumerate(value)])

    def text(self, value, entry: str) -> str:
        """A non-empty string."""
        if not isinstance(value, str) or not value:
            self.fail(entry, f"expected a non-empty string, got {value!r}")
        return value
