"""Every YAML loader of the package refuses malformed or hostile files with YamlFileError (a
ValueError naming the file and the place), and never lets another exception type escape.

Loaders: targets, references, scenarios, sweeps, robots, controller parameter files, camera
files (``vservo detect --camera``), a bag's params.yaml and the screen of a bag's metadata.yaml.

Hazards checked explicitly: an alias-expansion document (YAML 1.2.2 spec, sec. 3.2.2.2
"Anchors and Aliases" and sec. 7.1 "Alias Nodes": an alias re-uses an anchored node, so nested
aliases multiply; refusing them in untrusted input is common practice, no source), a
``!!python/object/apply`` tag (code execution in an unsafe loader), syntax errors (line and
column), oversized files, non-regular files, deep nesting, repeated and non-text keys.

Fuzzing (Hypothesis, derandomized so every run checks the same examples): (a) arbitrary
YAML-able structures, bare and under the format's own keys; (b) mutations of each shipped file
(keys dropped, values replaced by other types, NaN/inf/huge numbers, text cut at a random byte,
bytes changed); (c) random bytes and YAML-ish text. The property: the loader returns an object
of its type that can be used, or raises YamlFileError; nothing else escapes.
"""
from __future__ import annotations

import copy
import math
import os
import shutil
from pathlib import Path

import numpy as np
import pytest
import yaml
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st

from vservo_node import params
from vservo_node.commands.detect import load_camera
from vservo_node.control.kinematics import RobotConfig, load_robot
from vservo_node.paths import config_dir
from vservo_node.record.bag import _read_params
from vservo_node.record.sweep import SweepSpec, load_sweep
from vservo_node.sim.scenario import Scenario, load_scenario
from vservo_node.vision.camera import CameraModel
from vservo_node.vision.reference import Reference, load_reference, save_reference
from vservo_node.vision.targets import Target, load_target
from vservo_node.yaml_files import (MAX_BYTES, MAX_DEPTH, YamlFileError, dump_yaml, load_yaml,
                                    parse_yaml, screen_yaml)

CONFIG = config_dir()
# Per loader: 40 arbitrary structures + 80 mutations + 40 random byte strings (plus the
# exhaustive entry sweep below). Derandomized: every run, local or CI, checks the same examples.
_SETTINGS = dict(derandomize=True, deadline=None, database=None,
                 suppress_health_check=[HealthCheck.too_slow, HealthCheck.data_too_large,
                                        HealthCheck.filter_too_much])


# ----------------------------------------------------------------------------- base files
def _camera():
    return CameraModel(64, 48, [[60.0, 0.0, 31.5], [0.0, 60.0, 23.5], [0.0, 0.0, 1.0]],
                       [0.01, -0.02, 0.0, 0.0, 0.001], "plumb_bob")


def _references(folder: Path) -> dict:
    """Three reference files (dots with camera and depths, tags without camera, a textured one
    with its PNG), written by save_reference (invented data)."""
    cam = _camera()
    px = np.array([[10.0, 10.0], [50.0, 12.0], [48.0, 40.0], [12.0, 38.0], [30.0, 25.0]])
    dots = Reference("r_dots", "tray_dots", "dots", [("dot", i) for i in range(5)], px, (64, 48),
                     normalized=cam.pixels_to_normalized(px),
                     colours_lab=np.tile([50.0, 20.0, -10.0], (5, 1)),
                     depths=np.full(5, 0.4), depth_source="pnp", camera=cam,
                     created="2026-01-01T00:00:00+00:00")
    tags = Reference("r_tags", "tray_tags", "markers",
                     [("tag", 3, c) for c in range(4)], px[:4], (64, 48))
    image = np.full((48, 64, 3), 128, np.uint8)
    poster = Reference("r_poster", "tray_poster", "textured", [("pt", i) for i in range(5)], px,
                       (64, 48), image=image)
    return {ref.kind: save_reference(ref, folder / f"{ref.name}.yaml")
            for ref in (dots, tags, poster)}


def _camera_calibration() -> str:
    """A camera_calibration-style file (invented numbers)."""
    return ("image_width: 64\nimage_height: 48\ncamera_name: demo\n"
            "camera_matrix: {rows: 3, cols: 3, data: [60.0, 0.0, 31.5, 0.0, 60.0, 23.5, 0, 0, 1]}\n"
            "distortion_model: plumb_bob\n"
            "distortion_coefficients: {rows: 1, cols: 5, data: [0.01, -0.02, 0.0, 0.0, 0.001]}\n"
            "rectification_matrix: {rows: 3, cols: 3, data: [1, 0, 0, 0, 1, 0, 0, 0, 1]}\n"
            "projection_matrix: {rows: 3, cols: 4, data: [60, 0, 31.5, 0, 0, 60, 23.5, 0, 0, 0, 1, "
            "0]}\n")


def _metadata() -> str:
    """A rosbag2 metadata.yaml as ``ros2 bag record`` (yaml-cpp) writes it (invented values)."""
    return ("rosbag2_bagfile_information:\n  version: 9\n  storage_identifier: mcap\n"
            "  duration:\n    nanoseconds: 1500000000\n  starting_time:\n"
            "    nanoseconds_since_epoch: 1700000000000000000\n  message_count: 3\n"
            "  topics_with_message_count:\n    - topic_metadata:\n        name: /vservo/status\n"
            "        type: std_msgs/msg/String\n        serialization_format: cdr\n"
            "        offered_qos_profiles: \"- history: 3\\n  depth: 0\\n\"\n"
            "        type_description_hash: RIHS01_abc\n      message_count: 3\n"
            "  compression_format: \"\"\n  compression_mode: \"\"\n"
            "  relative_file_paths:\n    - run_0.mcap\n  files:\n    - path: run_0.mcap\n"
            "      starting_time:\n        nanoseconds_since_epoch: 1700000000000000000\n"
            "      duration:\n        nanoseconds: 1500000000\n      message_count: 3\n"
            "  custom_data: ~\n  ros_distro: jazzy\n")


class Loader:
    """One loader: ``load(path)`` and the check of what it returns; ``file`` is where the
    fuzzed text goes (robots need their URDF beside, references their PNG)."""

    def __init__(self, name, load, check, bases, file):
        self.name, self.load, self.check, self.bases, self.file = name, load, check, bases, file

    def run(self, text) -> None:
        """Write ``text`` (str or bytes) and load it: a usable object or YamlFileError."""
        data = text.encode("utf8", "surrogatepass") if isinstance(text, str) else text
        self.file.write_bytes(data)
        try:
            result = self.load(self.file)
        except YamlFileError as exc:
            assert str(self.file) in str(exc) or self.file.name in str(exc), str(exc)
            assert len(str(exc)) < 4000, f"a refusal of {len(str(exc))} characters"
            return
        self.check(result)


def _check_target(t):
    assert isinstance(t, Target) and t.keys()
    if t.has_geometry:
        assert np.isfinite(t.model_points()).all()


def _check_reference(r):
    assert isinstance(r, Reference)
    assert np.isfinite(r.points_for(None, r.image_size)).all()
    assert len(r.keys) == len(set(r.keys)) == len(r.pixels)


def _check_params(values):
    assert isinstance(values, dict)
    params.validate(values)         # a CheckResult, never an exception


@pytest.fixture(scope="module")
def loaders(tmp_path_factory) -> dict:
    root = tmp_path_factory.mktemp("yaml_fuzz")
    robots = root / "robots"
    robots.mkdir()
    for urdf in (CONFIG / "robots").glob("*.urdf"):
        shutil.copy(urdf, robots / urdf.name)
    refs = _references(root / "refs")
    ref_file = root / "refs" / "fuzzed.yaml"
    shutil.copy(refs["textured"].with_suffix(".png"), ref_file.with_suffix(".png"))
    camera_file = root / "camera.yaml"
    params_files = [CONFIG / n for n in ("vservo_sim.yaml", "real_arm_template.yaml")]
    bag_params = root / "bag_params_base.yaml"
    bag_params.write_text(dump_yaml(params.defaults(), sort_keys=False))

    def check_camera(c):
        assert isinstance(c, CameraModel) and np.isfinite(c.K).all()

    table = [
        Loader("target", load_target, _check_target,
               sorted((CONFIG / "targets").glob("*.yaml")), root / "target.yaml"),
        Loader("reference", load_reference, _check_reference, list(refs.values()), ref_file),
        Loader("scenario", load_scenario, lambda s: isinstance(s, Scenario) or pytest.fail(),
               sorted((CONFIG / "scenarios").glob("*.yaml"))[:4], root / "scenario.yaml"),
        Loader("sweep", load_sweep, lambda s: isinstance(s, SweepSpec) or pytest.fail(),
               sorted((CONFIG / "sweeps").glob("*.yaml")), root / "sweep.yaml"),
        Loader("robot", load_robot, lambda r: isinstance(r, RobotConfig) or pytest.fail(),
               sorted((CONFIG / "robots").glob("*.yaml")), robots / "fuzzed.yaml"),
        Loader("params", params.load_params_file, _check_params, params_files,
               root / "params.yaml"),
        Loader("camera", load_camera, check_camera, [], camera_file),
        Loader("bag params", _read_params, lambda d: isinstance(d, dict) or pytest.fail(),
               [bag_params], root / "params_of_bag.yaml"),
        Loader("bag metadata", screen_yaml, lambda r: r is None or pytest.fail(), [],
               root / "metadata.yaml"),
    ]
    out = {lo.name: lo for lo in table}
    # texts of the bases (camera files and metadata are written here)
    our_camera = root / "camera_ours.yaml"
    our_camera.write_text(dump_yaml(_camera().to_dict(), sort_keys=False))
    calibration = root / "camera_calibration.yaml"
    calibration.write_text(_camera_calibration())
    out["camera"].bases = [our_camera, calibration]
    metadata = root / "metadata_base.yaml"
    metadata.write_text(_metadata())
    out["bag metadata"].bases = [metadata]
    return out


NAMES = ["target", "reference", "scenario", "sweep", "robot", "params", "camera", "bag params",
         "bag metadata"]


def test_every_base_file_loads(loaders):
    """The fuzz starts from valid files: each base loads and passes its check (else the
    mutations below would test nothing but the first refusal)."""
    for lo in loaders.values():
        assert lo.bases, lo.name
        for base in lo.bases:
            lo.run(base.read_bytes())
            lo.check(lo.load(lo.file))


# ----------------------------------------------------------------------------- strategies
SCALARS = st.one_of(
    st.none(), st.booleans(),
    st.integers(min_value=-2**70, max_value=2**70),
    st.floats(allow_nan=True, allow_infinity=True),
    st.text(max_size=12),
    st.sampled_from(["", "dot", "tag", "pt", "dots", "markers", "textured", "none", "plumb_bob",
                     "vservo_target/1", "vservo_reference/1", "vservo_scenario/1",
                     "vservo_sweep/1", "shapes", "grid", "random", "tray_dots", "/dev/zero",
                     "x" * 300, "1e999", ".nan"]))
STRUCTURES = st.recursive(
    SCALARS,
    lambda children: st.lists(children, max_size=6) | st.dictionaries(
        st.text(max_size=8), children, max_size=6),
    max_leaves=12)


def _yaml_text(data) -> str:
    dumper = getattr(yaml, "CSafeDumper", yaml.SafeDumper)    # libyaml's emitter: faster
    return yaml.dump(data, Dumper=dumper, allow_unicode=True, sort_keys=False)


def _paths(tree, prefix=()):
    """Every path (tuple of keys / indices) into a nested structure, root excluded."""
    if isinstance(tree, dict):
        items = list(tree.items())
    elif isinstance(tree, list):
        items = list(enumerate(tree))
    else:
        return
    for key, value in items:
        yield prefix + (key,)
        yield from _paths(value, prefix + (key,))


def _parent(tree, path):
    for step in path[:-1]:
        tree = tree[step]
    return tree


ODD_VALUES = [None, True, 0, -1, 2**63, -(2**63) - 1, 10**30, math.nan, math.inf, -math.inf,
              1e308, 5e-324, "", "text", [], {}, [1.0], [[1.0, 2.0]], {"x": 1}, "ünï©ødé ✓"]


def _is_leaf(tree, path) -> bool:
    value = _parent(tree, path)[path[-1]]
    return not isinstance(value, (dict, list)) or not value


@st.composite
def mutated(draw, base_text: str):
    """A shipped file's data with 1-4 changes (mostly at leaves, where the deep checks are): a
    key or item dropped, a value replaced by an odd value or an arbitrary structure, a value
    wrapped or turned into text."""
    data = copy.deepcopy(yaml.safe_load(base_text))
    for _ in range(draw(st.sampled_from([1, 1, 1, 2, 3, 4]))):
        paths = list(_paths(data))
        leaves = [p for p in paths if _is_leaf(data, p)]
        if not paths:
            break
        path = draw(st.sampled_from(leaves if leaves and draw(st.integers(0, 3)) else paths))
        parent, key = _parent(data, path), path[-1]
        op = draw(st.sampled_from(["drop", "odd", "structure", "wrap", "text", "duplicate"]))
        if op == "drop":
            del parent[key]
        elif op == "odd":
            parent[key] = copy.deepcopy(draw(st.sampled_from(ODD_VALUES)))
        elif op == "structure":
            parent[key] = draw(STRUCTURES)
        elif op == "wrap":
            parent[key] = draw(st.sampled_from([[parent[key]], {"v": parent[key]}]))
        elif op == "text":
            parent[key] = str(parent[key])
        elif isinstance(parent, list):
            parent.append(copy.deepcopy(parent[key]))
        else:
            parent[f"{key}_2"] = copy.deepcopy(parent[key])
    return _yaml_text(data)


@st.composite
def damaged_bytes(draw, base: bytes):
    """The file's bytes cut at a random byte, or with a few bytes changed."""
    if draw(st.booleans()):
        return base[:draw(st.integers(0, len(base)))]
    out = bytearray(base)
    for _ in range(draw(st.integers(1, 4))):
        out[draw(st.integers(0, len(out) - 1))] = draw(st.integers(0, 255))
    return bytes(out)


YAMLISH = st.text(alphabet=st.sampled_from(list("abcdxyz019.-_:,[]{}!&*?|>'\"#%@` \n\t\\")),
                  max_size=300)


# ----------------------------------------------------------------------------- fuzzing
@pytest.mark.parametrize("name", NAMES)
@settings(max_examples=40, **_SETTINGS)
@given(data=st.data())
def test_fuzz_arbitrary_structures(loaders, name, data):
    """(a) arbitrary YAML-able structures: bare, or under the keys of a base file."""
    lo = loaders[name]
    base = yaml.safe_load(lo.bases[0].read_text())
    keys = sorted(base) if isinstance(base, dict) else ["x"]
    doc = data.draw(st.one_of(
        STRUCTURES,
        st.dictionaries(st.sampled_from(keys), STRUCTURES, min_size=1, max_size=len(keys))))
    lo.run(_yaml_text(doc))


@pytest.mark.parametrize("name", NAMES)
@settings(max_examples=80, **_SETTINGS)
@given(data=st.data())
def test_fuzz_mutated_shipped_files(loaders, name, data):
    """(b) mutations of each shipped (or base) file: keys dropped, types changed, NaN, inf,
    huge numbers, text cut at a random byte, bytes changed."""
    lo = loaders[name]
    base = data.draw(st.sampled_from(lo.bases))
    if data.draw(st.integers(0, 3)) == 0:
        lo.run(data.draw(damaged_bytes(base.read_bytes())))
    else:
        lo.run(data.draw(mutated(base.read_text())))


@pytest.mark.parametrize("name", NAMES)
@settings(max_examples=40, **_SETTINGS)
@given(blob=st.one_of(st.binary(max_size=400), YAMLISH))
def test_fuzz_random_bytes(loaders, name, blob):
    """(c) random bytes and YAML-ish punctuation soup."""
    loaders[name].run(blob)


SWEEP_VALUES = ["(dropped)", None, "text", [], {"x": 1}, math.nan, -1, 2**63 - 1]


@pytest.mark.parametrize("name", NAMES)
def test_every_entry_of_every_base_file_takes_odd_values(loaders, name):
    """Exhaustive, deterministic: every entry (key, list item, leaf) of every base file dropped
    or replaced in turn by each of SWEEP_VALUES (wrong types, NaN, negative, int64 max). List
    items from the third on are left out: they repeat the checks of the first two."""
    lo = loaders[name]
    bases = lo.bases[:1] if name == "scenario" else lo.bases   # scenarios solve IK: one file
    count = 0
    for base in bases:
        data = yaml.safe_load(base.read_text())
        for path in _paths(data):
            if any(isinstance(step, int) and step >= 2 for step in path):
                continue
            for value in SWEEP_VALUES:
                changed = copy.deepcopy(data)
                parent = _parent(changed, path)
                if value == "(dropped)":
                    del parent[path[-1]]
                else:
                    parent[path[-1]] = copy.deepcopy(value)
                lo.run(_yaml_text(changed))
                count += 1
    assert count >= 8 * 25, f"only {count} variants: the base files are too small to test"


# ----------------------------------------------------------------------------- hazards
# A "billion laughs" document: 9 levels of 9 aliases stand for 9^9 (387 million) strings in
# 0.35 kB. Expanding it (walking, copying or printing the result) takes minutes and GBs
# (benchmarks/yaml_load_bench.py times 5 levels and the factor 9 per level).
BOMB = 'a: &a ["lol","lol","lol","lol","lol","lol","lol","lol","lol"]\n' + "".join(
    f"{c}: &{c} [{','.join(['*' + p] * 9)}]\n" for p, c in zip("abcdefgh", "bcdefghi"))


def _inside(name: str, value: str) -> str:
    """``value`` (YAML text of one value) placed where the format reads a list or mapping."""
    key = {"target": "dots", "reference": "features", "scenario": "camera", "sweep": "axes",
           "robot": "home", "params": "vservo", "camera": "d", "bag params": "vservo",
           "bag metadata": "rosbag2_bagfile_information"}[name]
    return f"format: x\nname: n\n{key}: {value}\n"


def _write(path: Path, text: str) -> Path:
    path.write_text(text)
    return path


@pytest.mark.parametrize("name", NAMES)
def test_an_alias_bomb_is_refused_unexpanded(loaders, name):
    assert len(BOMB) < 1000
    lo = loaders[name]
    for text, line in ((BOMB, 1), (_inside(name, "&x [1, 2]") + "other: *x\n", 3)):
        with pytest.raises(YamlFileError, match=rf"line {line}, column \d+\)?: "
                                                r"(anchor &\w+ refused|anchors and aliases)") \
                as info:
            lo.load(_write(lo.file, text))
        assert str(lo.file) in str(info.value)


@pytest.mark.parametrize("name", NAMES)
def test_a_python_tag_is_refused_and_never_run(loaders, name, tmp_path):
    lo = loaders[name]
    marker = tmp_path / "ran"
    text = _inside(name, f"!!python/object/apply:os.system ['touch {marker}']")
    with pytest.raises(YamlFileError, match=r"tag '!!python/object/apply:os.system' refused"):
        lo.load(_write(lo.file, text))
    assert not marker.exists()
    with pytest.raises(YamlFileError, match=r"tag '!vservo_thing' refused"):
        lo.load(_write(lo.file, _inside(name, "!vservo_thing {a: 1}")))


@pytest.mark.parametrize("name", NAMES)
def test_a_syntax_error_names_line_and_column(loaders, name):
    lo = loaders[name]
    text = "format: x\nname: n\nitems: [1, 2\nnext: 3\n"
    with pytest.raises(YamlFileError, match=r"line 4, column 5: not valid YAML") as info:
        lo.load(_write(lo.file, text))
    assert str(lo.file) in str(info.value)


@pytest.mark.parametrize("name", NAMES)
def test_an_oversized_file_is_refused_unread(loaders, name):
    lo = loaders[name]
    limit = {"bag params": 16 << 20, "bag metadata": 32 << 20}.get(name, MAX_BYTES)
    with open(lo.file, "wb") as f:       # sparse: a size without the bytes
        f.truncate(limit + 1)
    with pytest.raises(YamlFileError, match=rf"larger than {limit} bytes"):
        lo.load(lo.file)


def test_non_regular_files_are_refused_without_reading(tmp_path):
    with pytest.raises(YamlFileError, match="not a regular file"):
        load_yaml("/dev/zero")
    with pytest.raises(YamlFileError, match="is a folder"):
        load_yaml(tmp_path)
    fifo = tmp_path / "pipe.yaml"
    os.mkfifo(fifo)
    with pytest.raises(YamlFileError, match="not a regular file"):   # open() would block
        load_yaml(fifo)
    with pytest.raises(YamlFileError, match="cannot read the file"):
        load_yaml(tmp_path / "missing.yaml")


@pytest.mark.parametrize("text, complaint", [
    ("a: 1\nb: {c: 1, c: 2}\n", r"b.c \(line 2, column 11\): key 'c' given twice"),
    ("x:\n  - {1: 2}\n", r"x\[0\] \(line 2, column 6\): key '1' refused: expected a name"),
    ("on: 1\n", r"key 'on' refused"),              # YAML 1.1 reads it as true
    ("? [a, b]\n: 1\n", r"key \(sequence\) refused"),
    ("a: 9223372036854775808\n", r"a \(line 1, column 4\): integer .* out of range"),
    ("a: " + "9" * 5000 + "\n", r"out of range: expected a 64-bit integer"),
    ("[" * (MAX_DEPTH + 5) + "]" * (MAX_DEPTH + 5), rf"nested deeper than {MAX_DEPTH}"),
    ("[" * 200000, rf"nested deeper than {MAX_DEPTH}"),
    ("a: !!binary aGVsbG8=\n", r"tag '!!binary' refused"),
    ("a: !!set {x: null}\n", r"tag '!!set' refused"),
    ("a: 1\n---\nb: 2\n", r"line 2, column 1: not valid YAML: expected a single document"),
    ("a: \x07\n", r"position 3: not valid YAML text: .*#x0?07"),
])
def test_hazards_of_the_loader(text, complaint):
    with pytest.raises(YamlFileError, match=complaint) as info:
        parse_yaml(text, source="t.yaml")
    assert str(info.value).startswith("t.yaml: ")


def test_plain_yaml_reads_as_before():
    data = parse_yaml("a: 1\nb: [1, 2.5, x, .nan, .inf, null, true]\nc: {d: 2024-01-01, e: '<<'}"
                      "\nf: !!str 12\n")
    assert data["a"] == 1 and data["b"][:3] == [1, 2.5, "x"] and math.isnan(data["b"][3])
    assert data["b"][4:] == [math.inf, None, True]
    assert data["c"] == {"d": "2024-01-01", "e": "<<"} and data["f"] == "12"
    assert parse_yaml("") is None


def test_files_we_write_hold_no_anchors():
    shared = [1.0, 2.0]
    text = dump_yaml({"a": shared, "b": shared, "c": {"d": shared}})
    assert "&" not in text and "*" not in text
    assert parse_yaml(text) == {"a": shared, "b": shared, "c": {"d": shared}}
    assert "&id" in yaml.safe_dump({"a": shared, "b": shared})  # what plain safe_dump does


def test_refusals_name_file_key_and_expectation(tmp_path):
    bad = tmp_path / "x.yaml"
    bad.write_text(_yaml_text({"format": "vservo_target/1", "name": "t", "kind": "dots",
                               "dots": [{"id": 0, "colour": [1, 2, 3]},
                                        {"id": 1, "colour": [1, 2, 3]},
                                        {"id": 2, "colour": "red"}]}))
    with pytest.raises(YamlFileError, match=rf"target file {bad}: dots\[2\].colour: must be sRGB "
                                            r"\[R, G, B\] in 0..255, got 'red'"):
        load_target(bad)
    # the node catches ValueError and OSError from these loaders
    assert issubclass(YamlFileError, ValueError)
