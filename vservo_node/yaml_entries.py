"""Checks of the entries of our own YAML files (scenarios, sweeps, targets, references, robots,
parameter files), shared by their loaders.

Every refusal names the file and the entry (``"<kind> <file>: <entry>: <what is wrong>"``) and
raises the loader's own error class (a :class:`~vservo_node.yaml_files.YamlFileError`). A loader
subclasses :class:`EntryReader`, setting ``kind`` and ``error`` and adding the checks only its
format needs; files are read by ``read_yaml`` (:func:`vservo_node.yaml_files.load_yaml`: size
cap, no anchors/aliases, no tags). Values in messages are cut short (``yaml_files.brief``).
"""
from __future__ import annotations

import math
from collections.abc import Collection
from pathlib import Path
from typing import Any, NoReturn

import numpy as np

from vservo_node.yaml_files import YamlFileError, brief, load_yaml


class EntryReader:
    """Checks one file's entries; ``source`` (the file's path, or None) goes into messages."""

    kind = "file"
    error: type[ValueError] = YamlFileError

    def __init__(self, source: object) -> None:
        self.where = f"{self.kind} {source}" if source else self.kind

    @classmethod
    def read_yaml(cls, path: str | Path) -> Any:
        """The parsed contents of the file ``path`` (None when empty); ``error`` when it is too
        large, unreadable or not plain YAML (``yaml_files.load_yaml``)."""
        return load_yaml(path, error=cls.error, prefix=f"{cls.kind} ")

    def fail(self, entry: str, message: str) -> NoReturn:
        raise self.error(f"{self.where}: {entry}: {message}")

    def mapping(self, value, entry: str, allowed: Collection | None = None,
                required: Collection = ()) -> dict:
        """A mapping (None reads as empty) with keys from ``allowed`` (any when None) and every
        key of ``required``."""
        value = {} if value is None else value
        if not isinstance(value, dict):
            self.fail(entry, f"expected a mapping, got {brief(value)}")
        if allowed is not None:
            unknown = sorted(set(value) - set(allowed), key=str)
            if unknown:
                self.fail(entry, f"unknown key(s) {brief(unknown)}; expected some of "
                                 f"{sorted(allowed)}")
        missing = sorted(set(required) - set(value))
        if missing:
            self.fail(entry, f"missing key(s) {missing}")
        return value

    def number(self, value, entry: str, minimum: float | None = None, positive: bool = False,
               allow_inf: bool = False) -> float:
        """A finite number (or +inf when ``allow_inf``), as float; booleans are refused."""
        if isinstance(value, bool) or not isinstance(value, (int, float)):
            self.fail(entry, f"expected a number, got {brief(value)}")
        try:
            value = float(value)
        except OverflowError:
            self.fail(entry, f"expected a finite number, got {brief(value)}")
        if not (math.isfinite(value) or (allow_inf and value == math.inf)):
            self.fail(entry, f"expected a finite number, got {value!r}")
        if positive and not value > 0:
            self.fail(entry, f"must be > 0, got {value!r}")
        if minimum is not None and value < minimum:
            self.fail(entry, f"must be >= {minimum}, got {value!r}")
        return value

    def integer(self, value, entry: str, minimum: int, maximum: int | None = None) -> int:
        """An integer >= ``minimum`` (and <= ``maximum``); booleans and floats are refused."""
        if (isinstance(value, bool) or not isinstance(value, int) or value < minimum
                or (maximum is not None and value > maximum)):
            span = f">= {minimum}" if maximum is None else f"in {minimum}..{maximum}"
            self.fail(entry, f"expected an integer {span}, got {brief(value)}")
        return value

    def vector(self, value, entry: str, n: int) -> np.ndarray:
        """A list of ``n`` finite numbers, as a float array."""
        if not isinstance(value, (list, tuple)) or len(value) != n:
            self.fail(entry, f"expected a list of {n} numbers, got {brief(value)}")
        return np.array([self.number(v, f"{entry}[{i}]") for i, v in enumerate(value)])

    def numbers(self, value, entry: str, n: int) -> list:
        """``n`` finite numbers given flat or as rows (``[[a, b], [c, d]]``), as a flat list."""
        if isinstance(value, list) and value and all(isinstance(v, list) for v in value):
            value = [x for row in value for x in row]
        return self.vector(value, entry, n).tolist()

    def text(self, value, entry: str) -> str:
        """A non-empty string."""
        if not isinstance(value, str) or not value:
            self.fail(entry, f"expected a non-empty string, got {brief(value)}")
        return value
