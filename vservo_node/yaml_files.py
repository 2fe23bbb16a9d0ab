"""The one way the package reads a YAML file: bounded, plain data only, refusals that say where.

Every YAML reader of the package (parameter files, targets, references, scenarios, sweeps,
robots, camera files, the params.yaml and metadata.yaml of recorded bags) goes through
:func:`load_yaml` (or :func:`screen_yaml` where another library parses the file). Whatever the
file holds, the caller gets plain data (dict, list, str, int, float, bool, None) or one
exception type, :class:`YamlFileError` (a ValueError; a format may raise its own subclass),
whose message names the file, the place (key path such as ``features[2].colour``, with line and
column) and what was expected. Refused before or while parsing:

- **Size.** A file over ``max_bytes`` (default :data:`MAX_BYTES`) is refused before parsing;
  at most ``max_bytes + 1`` bytes are ever read, so ``/dev/zero`` or a growing file cannot
  exhaust memory. Anything but a regular file (a folder, a FIFO, a device) is refused.
- **Anchors and aliases.** An alias (``*name``) re-uses the node anchored as ``&name``
  (YAML 1.2.2 spec, sec. 3.2.2.2 "Anchors and Aliases" and sec. 7.1 "Alias Nodes"). Nested
  aliases make a document of under 1 kB stand for billions of nodes ("billion laughs"); the
  reader builds shared references, but any code that walks, copies or prints the result expands
  them (a 923-byte reference file took 37 s and 4.2 GB, issue 10 finding 5). Refusing them at
  the first anchor or alias event is common practice for untrusted YAML (no source). **None of
  our formats needs an anchor or an alias**; the files the package writes never contain one
  (:func:`dump_yaml`), and plain rosbag2 metadata (yaml-cpp) does not either.
- **Tags.** Only the core schema's tags may be written explicitly (``!!str``, ``!!int``,
  ``!!float``, ``!!bool``, ``!!null``, ``!!seq``, ``!!map`` and the non-specific ``!``; YAML
  1.2.2 spec, sec. 10.3 "Core Schema", from memory). ``!!python/...`` (which an unsafe loader
  turns into code execution), ``!!binary``, ``!!timestamp``, ``!!set`` and custom ``!tags`` are
  refused by name.
- **Nesting** deeper than :data:`MAX_DEPTH` (our formats need 6; the composer recurses per
  level, so a file of a million ``[`` would otherwise end in a RecursionError).
- **Keys** that are not text (``1:``, ``null:``, ``on:`` in YAML 1.1, ``[a, b]:``) and keys
  given twice in one mapping (keys are unique, YAML 1.2.2 spec sec. 3.2.1.1 "Nodes"; a
  repeated ``limits.*`` entry must not silently loosen the first).
- **Integers** outside int64 (ROS 2 parameters are int64; larger ones overflow ``float()``).
- **Syntax errors** and undecodable text: the message gives line and column, never a traceback.

Plain scalars that look like dates stay text and ``<<`` is an ordinary key: the timestamp and
merge-key rules of YAML 1.1 are not applied (our formats use neither; a malformed date would
otherwise escape as a bare ValueError).
"""
from __future__ import annotations

import os
import reprlib
import stat
from typing import Any

import yaml
from yaml.composer import Composer
from yaml.constructor import SafeConstructor
from yaml.events import (AliasEvent, MappingEndEvent, MappingStartEvent, SequenceEndEvent,
                         SequenceStartEvent)
from yaml.nodes import ScalarNode
from yaml.resolver import Resolver

# 256 KiB: our largest files are references, ~130 bytes per feature, so 256 KiB holds ~2000
# features (our targets have 5 to a few hundred); the shipped files are under 7 kB. The cap also
# bounds the parse, which runs inside the controller's callbacks when a target or reference is
# set live: 1 MiB of dense YAML takes ~1.6 s on one idle core and ~6 s on a loaded machine
# (benchmarks/yaml_load_bench.py), a quarter of that at this cap.
MAX_BYTES = 256 << 10
# rosbag2 metadata.yaml lists every split file (~250 bytes each); our recorder splits every
# 0.75 s, so 8 hours of recording list ~38,000 files (~10 MB). Screened without building data.
METADATA_MAX_BYTES = 32 << 20
# Our deepest format nests 6 levels (a parameter file: node / ros__parameters / a / b / c / list).
MAX_DEPTH = 32
_INT64 = (-(1 << 63), (1 << 63) - 1)

_CORE = "tag:yaml.org,2002:"
ALLOWED_TAGS = frozenset({"!"} | {_CORE + t for t in ("str", "int", "float", "bool", "null",
                                                      "seq", "map")})

_brief = reprlib.Repr()
_brief.maxstring, _brief.maxother, _brief.maxlevel = 60, 60, 3
_brief.maxlist = _brief.maxtuple = _brief.maxdict = _brief.maxset = 6


def brief(value) -> str:
    """A short repr of ``value`` for a refusal (long texts and big lists are cut with ...)."""
    return _brief.repr(value)


class YamlFileError(ValueError):
    """A YAML file that cannot be used. The message names the file, where in it (key path,
    line and column where known) and what was expected. Formats subclass it (ScenarioError,
    SweepError, TargetError, BadReferenceError) so their callers can catch either."""


def path_text(steps) -> str:
    """``["features", 2, "colour"]`` -> ``"features[2].colour"``."""
    out = ""
    for step in steps:
        if isinstance(step, int):
            out += f"[{step}]"
        else:
            out += ("." if out else "") + str(step)
    return out


# ----------------------------------------------------------------------------- the loader
class _Refusal(yaml.YAMLError):
    """Raised inside the loader; turned into the caller's error class with the file name."""

    def __init__(self, where: str, mark, message: str):
        super().__init__(message)
        self.where, self.mark, self.message = where, mark, message


class _PlainResolver(Resolver):
    """PyYAML's YAML 1.1 resolver without timestamps, merge keys and the ``=`` value tag."""


_PlainResolver.yaml_implicit_resolvers = {
    first: [(tag, regexp) for tag, regexp in rules
            if tag not in (_CORE + "timestamp", _CORE + "merge", _CORE + "value")]
    for first, rules in Resolver.yaml_implicit_resolvers.items()}


_PLAIN = "expected plain mappings, lists and values"


def _event_problem(event, depth: int) -> str | None:
    """Why a parser event is refused (anchor, alias, tag, nesting), or None."""
    if isinstance(event, AliasEvent):
        return f"alias *{event.anchor} refused: our YAML files use no anchors or aliases ({_PLAIN})"
    if getattr(event, "anchor", None) is not None:
        return (f"anchor &{event.anchor} refused: our YAML files use no anchors or aliases "
                f"({_PLAIN})")
    tag = getattr(event, "tag", None)
    if tag is not None and tag not in ALLOWED_TAGS:
        shown = "!!" + tag[len(_CORE):] if tag.startswith(_CORE) else tag
        return (f"tag {brief(shown)} refused: expected plain YAML (mappings, lists, text, numbers,"
                " true/false, null) without tags")
    if depth > MAX_DEPTH:
        return f"nested deeper than {MAX_DEPTH} levels"
    return None


class _StrictComposer(Composer):
    """Composes nodes as PyYAML does, refusing anchors, aliases, other tags, deep nesting,
    non-text and repeated keys; every node gets ``.path`` (list of keys and indices)."""

    def __init__(self):
        super().__init__()
        self._steps: list = []

    def _where(self) -> str:
        return path_text(self._steps) or "top level"

    def compose_node(self, parent, index):
        event = self.peek_event()
        if parent is not None:
            if isinstance(index, int):
                self._steps.append(index)
            elif index is None:                  # a mapping key is being composed
                self._steps.append("(key)")
            else:
                self._steps.append(brief(index.value)[1:-1] if isinstance(index.value, str)
                                   else "?")
        try:
            problem = _event_problem(event, len(self._steps))
            if problem:
                raise _Refusal(self._where(), event.start_mark, problem)
            node = super().compose_node(parent, index)
            node.path = list(self._steps)
            return node
        finally:
            if parent is not None:
                self._steps.pop()

    def compose_mapping_node(self, anchor):
        node = super().compose_mapping_node(anchor)
        seen = {}
        for key, _ in node.value:
            if not (isinstance(key, ScalarNode) and key.tag == _CORE + "str"):
                shown = brief(key.value) if isinstance(key, ScalarNode) else f"({key.id})"
                raise _Refusal(path_text(key.path[:-1]) or "top level", key.start_mark,
                               f"key {shown} refused: expected a name (text) as key; quote it "
                               "if it is meant as text")
            if key.value in seen:
                raise _Refusal(path_text(key.path[:-1] + [key.value]), key.start_mark,
                               f"key {brief(key.value)} given twice (first on line "
                               f"{seen[key.value].line + 1}); expected each key once")
            seen[key.value] = key.start_mark
        return node


class _StrictConstructor(SafeConstructor):
    """SafeConstructor with int64 integers."""

    def construct_yaml_int(self, node):
        text = node.value.replace("_", "")
        if len(text.lstrip("+-")) > 40:   # int64 has 19 digits; a long text is refused unread
            value = None
        else:
            value = super().construct_yaml_int(node)
        if value is None or not _INT64[0] <= value <= _INT64[1]:
            raise _Refusal(path_text(getattr(node, "path", [])) or "top level", node.start_mark,
                           f"integer {brief(node.value)} out of range: expected a 64-bit "
                           "integer")
        return value


_StrictConstructor.add_constructor(_CORE + "int", _StrictConstructor.construct_yaml_int)

try:
    from yaml._yaml import CParser as _Parser
except ImportError:  # pragma: no cover - PyYAML built without libyaml
    _Parser = None


if _Parser is not None:
    class _Loader(_StrictComposer, _Parser, _StrictConstructor, _PlainResolver):
        """libyaml's scanner and parser (fast), our composer and constructor (checks)."""

        def __init__(self, stream):
            _Parser.__init__(self, stream)
            _StrictComposer.__init__(self)
            _StrictConstructor.__init__(self)
            _PlainResolver.__init__(self)
else:  # pragma: no cover - PyYAML built without libyaml
    from yaml.parser import Parser
    from yaml.reader import Reader
    from yaml.scanner import Scanner

    class _Loader(Reader, Scanner, Parser, _StrictComposer, _StrictConstructor, _PlainResolver):
        def __init__(self, stream):
            Reader.__init__(self, stream)
            Scanner.__init__(self)
            Parser.__init__(self)
            _StrictComposer.__init__(self)
            _StrictConstructor.__init__(self)
            _PlainResolver.__init__(self)


# ----------------------------------------------------------------------------- public API
def _fail(error, path, message):
    return error(f"{path}: {message}")


def _place(mark) -> str:
    return "" if mark is None else f"line {mark.line + 1}, column {mark.column + 1}"


def _reader_problem(exc) -> str:
    """Text of a ReaderError (bytes that are not UTF-8/16 text, or control characters)."""
    position, character = getattr(exc, "position", None), getattr(exc, "character", None)
    if position is None:
        return f"not valid YAML text: {brief(str(exc))}"
    what = (f"byte #x{character:02x}" if isinstance(character, int) else
            f"character #x{ord(character):04x}" if isinstance(character, str) and character
            else "character")
    return (f"position {position}: not valid YAML text: {what} ({exc.reason}); expected "
            "UTF-8 text without control characters")


def read_bounded(path, max_bytes: int = MAX_BYTES, error: type[ValueError] = YamlFileError,
                 prefix: str = "") -> bytes:
    """The bytes of the regular file ``path``, refused (``error``) when larger than
    ``max_bytes`` or unreadable; never reads more than ``max_bytes + 1`` bytes."""
    name = f"{prefix}{path}"
    try:
        info = os.stat(path)
        if not stat.S_ISREG(info.st_mode):
            kind = "a folder" if stat.S_ISDIR(info.st_mode) else "not a regular file"
            raise _fail(error, name, f"is {kind}; expected a regular file")
        with open(path, "rb") as f:
            data = f.read(max_bytes + 1)
    except OSError as exc:
        raise _fail(error, name, f"cannot read the file: {exc.strerror or exc}") from exc
    if len(data) > max_bytes:
        size = max(info.st_size, len(data))
        raise _fail(error, name, f"file larger than {max_bytes} bytes ({size} bytes): refused "
                                 f"unread; expected at most {max_bytes} bytes")
    return data


def parse_yaml(text, source="<text>", error: type[ValueError] = YamlFileError,
               prefix: str = ""):
    """Parse YAML ``text`` (str or bytes) with the checks of the module doc; ``source`` names it
    in refusals. Returns plain data (None for an empty document)."""
    name = f"{prefix}{source}"
    if isinstance(text, str):
        try:
            text = text.encode("utf-8")
        except UnicodeError as exc:    # lone surrogates
            raise _fail(error, name, f"position {exc.start}: not valid text: {exc.reason}") \
                from None
    loader = _Loader(text)
    try:
        return loader.get_single_data()
    except _Refusal as exc:
        raise _fail(error, name, f"{exc.where} ({_place(exc.mark)}): {exc.message}") from None
    except yaml.MarkedYAMLError as exc:
        mark = exc.problem_mark or exc.context_mark
        what = " ".join(str(p) for p in (exc.context, exc.problem) if p)
        raise _fail(error, name, f"{_place(mark)}: not valid YAML: {what}") from None
    except yaml.YAMLError as exc:      # ReaderError (undecodable bytes, control characters)
        raise _fail(error, name, _reader_problem(exc)) from None
    finally:
        loader.dispose()


def load_yaml(path, error: type[ValueError] = YamlFileError, max_bytes: int = MAX_BYTES,
              prefix: str = ""):
    """The plain data of the YAML file ``path`` (None when empty), or ``error`` (YamlFileError
    or a subclass) naming ``prefix + path``, the place and what was expected: too large, not a
    regular file, unreadable, not valid YAML, anchors/aliases, tags, deep nesting, non-text or
    repeated keys, integers beyond int64 (see the module doc)."""
    return parse_yaml(read_bounded(path, max_bytes, error, prefix), path, error, prefix)


def screen_yaml(path, error: type[ValueError] = YamlFileError,
                max_bytes: int = METADATA_MAX_BYTES, prefix: str = "") -> None:
    """Check a YAML file another library will parse (rosbag2 metadata.yaml, read by rosbags):
    size, syntax, anchors/aliases, tags and nesting as :func:`load_yaml`, from the parser's
    events alone (nothing is built, so large files pass quickly)."""
    name = f"{prefix}{path}"
    data = read_bounded(path, max_bytes, error, prefix)
    depth = 0          # containers open
    try:
        for event in yaml.parse(data, Loader=yaml.CSafeLoader if _Parser else yaml.SafeLoader):
            if isinstance(event, (SequenceEndEvent, MappingEndEvent)):
                depth -= 1
                continue
            problem = _event_problem(event, depth)
            if problem:
                raise _Refusal("", event.start_mark, problem)
            if isinstance(event, (SequenceStartEvent, MappingStartEvent)):
                depth += 1
    except _Refusal as exc:
        raise _fail(error, name, f"{_place(exc.mark)}: {exc.message}") from None
    except yaml.MarkedYAMLError as exc:
        mark = exc.problem_mark or exc.context_mark
        what = " ".join(str(p) for p in (exc.context, exc.problem) if p)
        raise _fail(error, name, f"{_place(mark)}: not valid YAML: {what}") from None
    except yaml.YAMLError as exc:
        raise _fail(error, name, _reader_problem(exc)) from None


class _PlainDumper(yaml.SafeDumper):
    """SafeDumper that never writes anchors or aliases (a list or dict object used twice is
    written twice), so every file we write is one our own loader accepts."""

    def ignore_aliases(self, data):
        return True


def dump_yaml(data: Any, stream: Any = None, **options: Any) -> Any:
    """``yaml.safe_dump`` without anchors/aliases; options as for ``yaml.dump``."""
    return yaml.dump(data, stream, Dumper=_PlainDumper, **options)


__all__ = ["MAX_BYTES", "METADATA_MAX_BYTES", "MAX_DEPTH", "ALLOWED_TAGS", "YamlFileError",
           "brief", "path_text", "read_bounded", "parse_yaml", "load_yaml", "screen_yaml",
           "dump_yaml"]
