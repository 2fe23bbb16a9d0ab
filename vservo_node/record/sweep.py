"""Robustness sweeps: many headless scenario episodes over ranges of start offsets, calibration
errors, noise and controller parameters, and what they add up to.

Each episode is ``vservo_node.episode.run_scenario_episode`` (the node's code path, no DDS) on a
variant of one scenario. A sweep file (YAML, format ``vservo_sweep/1``, our own) says which::

    format: vservo_sweep/1
    name: quick
    description: free text
    scenario: tray_offset          # shipped scenario name or path (relative: to this file)
    mode: grid                     # grid: every combination; random: seeded uniform draws
    sensing: image                 # image (default): render and perceive each frame;
                                   # projected: the target's points projected with pixel
                                   # noise (sim/projected.py), ~3x faster, no detectors
    seed: 7                        # episode seeds, random draws and random directions
    repeats: 1                     # grid: episodes per combination (each with its own seed)
    episodes: 40                   # random: how many episodes
    fixed: {image.scale: 0.5, control.gain_near: 1.2}   # the same in every episode
    axes:                          # what varies
      start.rotation_deg: {values: [0, 45, 90]}         # these values
      start.lateral_m: {range: [0.0, 0.15], steps: 4}   # grid: 4 evenly spaced (steps: grid
                                                        # only); random: uniform in the range
    success: {pose_mm: 2.0, pose_deg: 0.5, limit_slack: 0.01}
    map: [start.rotation_deg, start.lateral_m]          # axes of the success map (1 or 2)
    map_bins: 3                    # random mode: bins per map axis (default: as many as
                                   # keep MIN_PER_CELL episodes in each cell)
    best: {min_episodes: 5, margin: 0.1}   # how best parameters are chosen (see best_params)

Names in ``fixed`` and ``axes`` are controller parameters (``vservo_node.params`` schema names,
e.g. ``control.gain_near``) or the scene quantities of :data:`SCENE_NAMES`. Start offsets are
in the taught camera's axes, as in the scenario format: ``T_taught_start = [R_tilt Rz(rotation)
| (lateral cos a, lateral sin a, depth)]``, ``R_tilt`` a rotation by ``tilt`` about the
image-plane axis ``(cos b, sin b, 0)``; when any ``start.*`` name is given it replaces the
scenario's start. Directions (a, b, the hand-eye error's rotation axis and translation
direction) are drawn per episode from its seed, so magnitudes are swept and directions vary.
Calibration errors are the controller's beliefs: the hand-eye error ``[R(axis * deg) | dir * m]``
composes onto the scenario's believed hand-eye in the camera's own axes (the scenario format's
convention), ``calib.depth`` scales the scenario's believed depth scale by ``1 + value``, and
``calib.focal`` makes the controller's camera model's fx, fy ``1 + value`` times the true ones.

Running: in this process (one worker), in local worker processes (``spawn``: a script that
calls :func:`run_sweep` with several workers needs the ``if __name__ == "__main__":`` guard), or
on a Dask cluster given its scheduler address (Dask is imported only then; its workers need
vservo_node and the scenario files). Rows come back in plan order, so the table is the same
however the sweep ran.

Random mode draws the map axes stratified: episode i falls in map cell i mod (number of
cells), uniformly inside it, so every cell of the map holds episodes (a plan with fewer
episodes than cells is refused); the other axes are drawn uniformly over their ranges.

Controller parameters of every episode, lowest priority first: ``config/vservo_sim.yaml`` (the
simulated cell's file), the user's parameter file (``vservo sweep --params FILE``: a ROS 2
parameter file of the node; ``robot.*`` but ``robot.tool_point``, ``target.file`` and
``reference.*`` do not apply, the scenario fixes them), ``fixed``, the swept values. When none of
them sets ``control.max_run_s`` it is the scenario's ``duration_s``, and each episode runs
``control.max_run_s`` + :data:`BRAKE_ALLOWANCE_S`, so a run too slow to converge ends on the
node's own ``run_timeout``.

Failed episodes (ran, not a success) are kept as run records (rosbag2, as the recorder writes
them) under ``<out>/records/`` when :func:`run_sweep` is given ``records_dir``: status records,
joint states, the true camera and taught poses, the camera frames at the start and at the end,
parameters and result, so ``vservo report`` opens them like any run.

Success of an episode: the servo converged, the true camera pose is within ``pose_mm`` and
``pose_deg`` of the true taught pose, and no limit was exceeded by more than ``limit_slack``
(relative): joint speeds (``limits.joint_velocity_scale`` of the URDF limits), tool-point,
camera and angular speeds (``limits.*``), and no joint touched a URDF position limit. An
episode whose start pose is out of reach or whose taught view cannot be taught is *skipped*
(it says nothing about the servo) and left out of the success rate; one that raised is an
*error*.
"""
from __future__ import annotations

import csv
import dataclasses
import functools
import itertools
import json
import math
import sys
import time
import traceback
from collections import Counter, defaultdict
from concurrent.futures import ProcessPoolExecutor, as_completed
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any, Iterator

import numpy as np
from scipy.spatial.transform import Rotation

from vservo_node import params, paths
from vservo_node.control.frames import transform
from vservo_node.interface import SENSING_MODES
from vservo_node.record import metrics
from vservo_node.yaml_entries import EntryReader
from vservo_node.yaml_files import YamlFileError, brief

FORMAT = "vservo_sweep/1"
MODES = ("grid", "random")
SENSING = SENSING_MODES
DASK_PINS = "dask==2026.8.0 distributed==2026.8.0"

# Quantities a sweep sets besides the controller parameters: name -> (description, default).
SCENE_NAMES = {
    "start.rotation_deg": ("start rotation about the optical axis, deg (signed)", 0.0),
    "start.lateral_m": ("start offset across the optical axis, m; direction random", 0.0),
    "start.tilt_deg": ("start tilt about an image-plane axis, deg; axis random", 0.0),
    "start.depth_m": ("start offset along the optical axis, m (+: towards the target)", 0.0),
    "calib.hand_eye_deg": ("error of the believed hand-eye rotation, deg; axis random", 0.0),
    "calib.hand_eye_m": ("error of the believed hand-eye translation, m; direction random",
                         0.0),
    "calib.focal": ("relative error of the believed focal lengths (0.05: 5 % long)", 0.0),
    "calib.depth": ("relative error of every depth the controller gets (-0.4: 40 % short)",
                    0.0),
    "image.noise_std": ("image noise, grey levels (default: the scenario's)", None),
    "image.scale": ("fraction of the scenario's resolution to render and perceive at", 1.0),
    "sensing.noise_px": ("pixel noise of projected sensing, px per axis (default: by target "
                         "kind, sim/projected.py)", None),
    "arm.joint_noise_std": ("noise of the reported joint positions, rad (default: the "
                            "scenario's)", None),
    "arm.velocity_lag_s": ("time constant of the drives' velocity loops, s (default: the "
                           "scenario's)", None),
    "arm.command_latency_s": ("delay before the drives act on a command, s (default: the "
                              "scenario's)", None),
}
_TOP = {"format", "name", "description", "scenario", "mode", "seed", "repeats", "episodes",
        "fixed", "axes", "success", "map", "map_bins", "sensing", "best"}
_BEST = {"min_episodes", "margin"}
MIN_PER_CELL = 3          # random mode: episodes per map cell the default bins keep
BRAKE_ALLOWANCE_S = 2.0   # an episode runs max_run_s + this: the timeout halt and its braking
# parameters a scenario fixes (a user parameter file's values for them do not apply)
NOT_APPLICABLE = ("robot.", "target.file", "reference.", "robot_description")
_AXIS = {"values", "range", "steps"}
_SUCCESS = {"pose_mm", "pose_deg", "limit_slack"}
# Columns of the episode table: vservo_node.record.metrics' names and definitions, from
# metrics.episode_figures (peak joint speed over the limit in use, times by verdict).
METRICS = ("converged", "reason", "time_to_converge_s", "time_to_halt_s", "final_rms_px",
           "initial_rms_px", "final_pose_error_mm", "final_pose_error_deg",
           "peak_joint_speed_ratio", "peak_tool_speed_m_s", "peak_camera_speed_m_s",
           "peak_angular_speed_rad_s", "min_joint_limit_margin", "camera_depth_change_max_m")


# Most episodes one sweep file may plan (grid combinations x repeats, or random episodes):
# at a second or more per episode, 100,000 is already a day of one core; it also bounds the plan
# built in memory (common practice, no source).
MAX_EPISODES = 100_000
MAX_MAP_BINS = 100


class SweepError(YamlFileError):
    """A sweep that cannot run; the message names the file and the entry."""


@dataclass(frozen=True)
class Axis:
    """One swept quantity: explicit ``values``, or a ``[low, high]`` range (``steps`` evenly
    spaced values in grid mode, uniform draws in random mode)."""

    name: str
    values: tuple = ()
    low: float | None = None
    high: float | None = None
    steps: int = 0

    @property
    def integer(self) -> bool:
        param = params.BY_NAME.get(self.name)
        return param is not None and param.type is int

    def grid(self) -> tuple:
        if self.values:
            return self.values
        points = np.linspace(self.low, self.high, self.steps)
        return tuple(int(round(v)) if self.integer else float(v) for v in points)

    def draw(self, rng: np.random.Generator):
        if self.values:
            return self.values[int(rng.integers(len(self.values)))]
        return self.draw_between(rng, self.low, self.high)

    def draw_between(self, rng: np.random.Generator, low: float, high: float):
        """Uniform in [low, high) (integers: of those inside, at least the nearest one)."""
        if self.integer:
            lo, hi = math.ceil(low), max(math.ceil(low), math.ceil(high) - 1)
            if high >= self.high:
                hi = max(lo, int(math.floor(high)))
            return int(rng.integers(lo, hi + 1))
        return float(rng.uniform(low, high))


@dataclass(frozen=True)
class Success:
    """Pass criteria: pose within ``pose_mm`` (mm) and ``pose_deg`` (deg), limits exceeded
    by no more than ``limit_slack`` (fraction)."""

    pose_mm: float = 2.0
    pose_deg: float = 0.5
    limit_slack: float = 0.01


@dataclass(frozen=True)
class Best:
    """How the best controller parameters are chosen: only groups of at least
    ``min_episodes``; ranked by the lower end of the 95 % Wilson interval of their success
    rate; and robust: on each numeric swept parameter the neighbouring values' groups reach a
    lower end within ``margin`` of it (the choice is not on a cliff's edge)."""

    min_episodes: int = 5
    margin: float = 0.1


@dataclass(frozen=True)
class SweepSpec:
    """A loaded sweep file (see the module doc)."""

    name: str
    description: str
    scenario: str
    mode: str
    seed: int
    repeats: int
    episodes: int
    fixed: dict
    axes: tuple
    success: Success
    map_axes: tuple
    map_bins: int
    source: Path | None = None
    sensing: str = "image"
    best: Best = field(default_factory=Best)
    base_params: dict = field(default_factory=dict)   # the user's parameter file (--params)
    params_source: str = ""


@dataclass(frozen=True)
class Point:
    """One planned episode: its index in the sweep, its seed and its swept values."""

    index: int
    seed: int
    values: dict


@dataclass
class SweepRun:
    """A finished sweep: its rows (plan order), wall time (s), where it ran, its summary."""

    spec: SweepSpec
    rows: list
    wall_s: float
    workers: str = ""
    summary: dict = field(default_factory=dict)


# ----------------------------------------------------------------------------- loading
class _Reader(EntryReader):
    """Checks one sweep file's entries; every error names the file and the entry."""

    kind = "sweep"
    error = SweepError

    def quantity(self, name, value, entry):
        """Check one value of a sweep quantity; returns it coerced."""
        param = params.BY_NAME.get(name)
        if param is not None:
            clean, reason = params.check_value(param, value)
            if reason:
                self.fail(entry, reason)
            return clean
        if name not in SCENE_NAMES:
            self.fail(entry, f"unknown quantity {name!r}: expected a controller parameter "
                             f"(vservo_node.params) or one of {sorted(SCENE_NAMES)}")
        number = self.number(value, entry)
        if name == "sensing.noise_px" and not number >= 0:
            self.fail(entry, f"must be >= 0 px, got {value!r}")
        if name == "image.scale" and not 0 < number <= 4:
            self.fail(entry, f"must be in (0, 4], got {value!r}")
        if name in ("calib.focal", "calib.depth") and not number > -1:
            self.fail(entry, f"must be > -1 (a relative error), got {value!r}")
        if name.startswith(("image.noise", "arm.")) and number < 0:
            self.fail(entry, f"must be >= 0, got {value!r}")
        return number


def _axis(r: _Reader, name, value, mode) -> Axis:
    entry = f"axes.{name}"
    value = r.mapping(value, entry, _AXIS)
    param = params.BY_NAME.get(name)
    if param is not None and param.type is list:
        r.fail(entry, "list parameters cannot vary in a sweep; give them in 'fixed'")
    if ("values" in value) == ("range" in value):
        r.fail(entry, "give either 'values' or 'range'")
    if "values" in value:
        values = value["values"]
        if not isinstance(values, list) or not values:
            r.fail(f"{entry}.values", f"expected a non-empty list, got {brief(values)}")
        if "steps" in value:
            r.fail(entry, "'steps' goes with 'range', not 'values'")
        return Axis(name, tuple(r.quantity(name, v, f"{entry}.values[{i}]")
                                for i, v in enumerate(values)))
    rng = value["range"]
    if not isinstance(rng, list) or len(rng) != 2:
        r.fail(f"{entry}.range", f"expected [low, high], got {brief(rng)}")
    low, high = (r.quantity(name, v, f"{entry}.range") for v in rng)
    if (isinstance(low, (str, bool)) or isinstance(high, (str, bool))
            or not isinstance(low, (int, float)) or not isinstance(high, (int, float))
            or not low <= high):
        r.fail(f"{entry}.range", f"expected numbers with low <= high, got {brief(rng)}")
    steps = value.get("steps", 0)
    if mode == "grid":
        steps = r.integer(steps, f"{entry}.steps (needed in grid mode)", 1, MAX_EPISODES)
        if steps == 1 and low != high:
            r.fail(f"{entry}.steps", "one step cannot span a range; use values: [x]")
    return Axis(name, (), low, high, steps)


def sweep_from_dict(data, source: Path | None = None) -> SweepSpec:
    """Build and check a SweepSpec from the mapping of a sweep file; SweepError (a ValueError)
    naming the entry on anything malformed."""
    r = _Reader(source)
    data = r.mapping(data, "top level", _TOP, {"name", "scenario", "axes"})
    if data.get("format", FORMAT) != FORMAT:
        r.fail("format", f"{data['format']!r} is not {FORMAT!r}")
    mode = data.get("mode", "grid")
    if mode not in MODES:
        r.fail("mode", f"expected one of {MODES}, got {brief(mode)}")
    sensing = data.get("sensing", "image")
    if sensing not in SENSING:
        r.fail("sensing", f"expected one of {SENSING}, got {brief(sensing)}")
    scenario = data["scenario"]
    if not isinstance(scenario, str) or not scenario:
        r.fail("scenario", f"expected a scenario name or path, got {scenario!r}")
    if source is not None and Path(scenario).suffix and not Path(scenario).is_absolute():
        beside = Path(source).parent / scenario
        try:
            found = beside.exists()
        except (OSError, ValueError):   # a name too long for the file system, a NUL byte
            found = False
        scenario = str(beside) if found else scenario
    fixed = r.mapping(data.get("fixed"), "fixed")
    fixed = {k: r.quantity(k, v, f"fixed.{k}") for k, v in fixed.items()}
    axes_map = r.mapping(data["axes"], "axes")
    if not axes_map:
        r.fail("axes", "give at least one quantity to vary")
    both = sorted(set(axes_map) & set(fixed), key=str)
    if both:
        r.fail("axes", f"{both} are also in fixed")
    axes = tuple(_axis(r, name, value, mode) for name, value in axes_map.items())
    success = r.mapping(data.get("success"), "success", _SUCCESS)
    success = Success(**{k: r.number(v, f"success.{k}", minimum=0.0)
                         for k, v in success.items()})
    names = [a.name for a in axes]
    default_map = [n for n in names if n.startswith("start.")] or names
    map_axes = data.get("map", default_map[:2])
    if (not isinstance(map_axes, list) or not 1 <= len(map_axes) <= 2
            or any(n not in names for n in map_axes)):
        r.fail("map", f"expected one or two of the swept axes {names}, got {brief(map_axes)}")
    repeats = r.integer(data.get("repeats", 1), "repeats", 1, MAX_EPISODES)
    episodes = r.integer(data.get("episodes", 1 if mode == "grid" else 20), "episodes", 1,
                         MAX_EPISODES)
    if mode == "grid":
        total = repeats
        for a in axes:
            total *= len(a.values) or a.steps
        if total > MAX_EPISODES:
            r.fail("axes", f"the grid plans {total} episodes (combinations x repeats); expected "
                           f"at most {MAX_EPISODES}")
    binned = [a for a in axes if a.name in map_axes and not a.values]
    if "map_bins" in data:
        map_bins = r.integer(data["map_bins"], "map_bins", 1, MAX_MAP_BINS)
        if mode == "random" and binned and map_bins ** len(binned) > episodes:
            r.fail("map_bins", f"{map_bins} bins per axis make {map_bins ** len(binned)} map "
                               f"cells, more than the {episodes} episodes can fill; lower "
                               f"map_bins or raise episodes")
    else:   # as many bins as keep MIN_PER_CELL episodes in each cell
        map_bins = min(MAX_MAP_BINS, max(1, int((episodes / MIN_PER_CELL)
                                                ** (1.0 / max(len(binned), 1)) + 1e-9)))
    best = r.mapping(data.get("best"), "best", _BEST)
    best = Best(min_episodes=r.integer(best.get("min_episodes", Best.min_episodes),
                                       "best.min_episodes", 1, MAX_EPISODES),
                margin=r.number(best.get("margin", Best.margin), "best.margin", minimum=0.0))
    return SweepSpec(
        name=r.text(data["name"], "name"), description=str(data.get("description", "")).strip(),
        scenario=scenario, mode=mode, seed=r.integer(data.get("seed", 0), "seed", 0),
        repeats=repeats, episodes=episodes, fixed=fixed, axes=axes, success=success,
        map_axes=tuple(map_axes), map_bins=map_bins, source=source, sensing=sensing, best=best)


def load_sweep(name_or_path) -> SweepSpec:
    """Load a sweep by short name (``"quick"``, from config/sweeps) or path."""
    path = paths.shipped("sweeps", str(name_or_path))
    return sweep_from_dict(_Reader.read_yaml(path), source=Path(path))


# ----------------------------------------------------------------------------- planning
def plan(spec: SweepSpec) -> list[Point]:
    """The episodes of ``spec`` in order. Grid: every combination of axis values, ``repeats``
    times; random: ``episodes`` draws. Each episode's seed and draws come from
    ``(spec.seed, index)``. SweepError when a planned episode's controller parameters do not
    pass ``vservo_node.params.validate``."""
    names = [a.name for a in spec.axes]
    if spec.sensing != "projected" and "sensing.noise_px" in {*names, *spec.fixed}:
        where = f"sweep {spec.source}" if spec.source else "sweep"
        raise SweepError(f"{where}: sensing.noise_px applies to projected sensing only; this "
                         f"sweep uses {spec.sensing!r} sensing")
    if spec.mode == "grid":
        combos = list(itertools.product(*(a.grid() for a in spec.axes)))
        chosen = [combo for combo in combos for _ in range(spec.repeats)]
    else:
        chosen = [None] * spec.episodes
    strata = _strata(spec)
    points = []
    for index, combo in enumerate(chosen):
        rng = np.random.default_rng([spec.seed, index])
        if combo is not None:
            values = dict(zip(names, combo))
        else:
            values = {a.name: a.draw(rng) for a in spec.axes}
            cell = np.unravel_index(index % max(1, math.prod(len(e) - 1 for _, e in strata)),
                                    [len(e) - 1 for _, e in strata]) if strata else ()
            for (axis, edges), k in zip(strata, cell):   # stratified over the map's cells
                values[axis.name] = axis.draw_between(rng, edges[k], edges[k + 1])
        points.append(Point(index, int(rng.integers(2**31)), values))
    for point in points:
        try:
            _episode_params(spec, point)
        except ValueError as exc:
            where = f"sweep {spec.source}" if spec.source else "sweep"
            raise SweepError(f"{where}: episode {point.index} {point.values}: {exc}") from None
    return points


def _strata(spec: SweepSpec) -> list:
    """[(axis, bin edges)] of the map axes a random plan draws stratified (ranges only)."""
    if spec.mode != "random":
        return []
    out = []
    for name in spec.map_axes:
        axis = next(a for a in spec.axes if a.name == name)
        if not axis.values:
            out.append((axis, np.linspace(axis.low, axis.high, spec.map_bins + 1)))
    return out


def _overrides(spec: SweepSpec, point: Point) -> dict:
    """Controller parameters over config/vservo_sim.yaml: the user's file, fixed, swept;
    ``control.max_run_s`` the scenario's duration_s when none of them sets it."""
    merged = {**spec.base_params, **spec.fixed, **point.values}
    out = {k: v for k, v in merged.items() if k in params.BY_NAME}
    out.setdefault("control.max_run_s", float(_base_scenario(spec.scenario).duration_s))
    return out


def _episode_params(spec: SweepSpec, point: Point) -> dict:
    from vservo_node.episode import episode_params

    base = _base_scenario(spec.scenario)
    # as run_scenario_episode builds them: the scenario's controller entries, then the user's
    # file, the sweep's fixed and swept values
    return episode_params({**base.controller, **_overrides(spec, point)},
                          camera_rate_hz=base.fps)


def user_params(path) -> tuple[dict, list[str]]:
    """The controller parameters of the user's parameter file that apply to sweep episodes,
    and notes on what was left out (ROS's own names; what the scenario fixes). SweepError
    naming the file for an unknown name (with the nearest known one) or an invalid value."""
    from vservo_node import param_names

    try:
        values = params.load_params_file(path)
    except Exception as exc:   # YAML syntax, layout, missing file: one message, no traceback
        raise SweepError(f"parameter file {path}: {exc}") from None
    known, ros_own, unknown = param_names.split(values)
    if unknown:
        raise SweepError(f"parameter file {path}: " + "; ".join(
            f"{name}: unknown parameter" + (f" (did you mean {hint}?)" if hint else "")
            for name, hint in unknown.items()))
    checked = params.validate(known)
    if not checked.ok:
        raise SweepError(f"parameter file {path}: " + "; ".join(checked.errors))
    fixed_by_scenario = sorted(k for k in known if k.startswith(NOT_APPLICABLE)
                               and k != "robot.tool_point")
    notes = []
    if fixed_by_scenario:
        notes.append(f"the scenario fixes {', '.join(fixed_by_scenario)}: the file's values "
                     "do not apply")
    if ros_own:
        notes.append(f"ROS's own {', '.join(sorted(ros_own))} ignored")
    return {k: known[k] for k in known if k not in fixed_by_scenario}, notes


@functools.lru_cache(maxsize=8)
def _base_scenario(name: str):
    from vservo_node.sim import load_scenario

    return load_scenario(name)


def _unit(v: np.ndarray) -> np.ndarray:
    return v / np.linalg.norm(v)


def scenario_variant(base, scene: dict, rng: np.random.Generator):
    """``(Scenario, focal_scale)``: ``base`` changed by the scene quantities ``scene``
    (:data:`SCENE_NAMES`), random directions from ``rng``. ValueError (from the IK) when the
    start pose is out of reach."""
    from vservo_node.sim.ik import solve_camera_pose

    get = lambda name: scene.get(name, SCENE_NAMES[name][1])  # noqa: E731
    lateral_dir = rng.uniform(0.0, 2.0 * math.pi)
    tilt_dir = rng.uniform(0.0, 2.0 * math.pi)
    hand_eye_axis, hand_eye_dir = _unit(rng.normal(size=3)), _unit(rng.normal(size=3))
    changes: dict[str, Any] = {}
    if get("image.scale") != 1.0:
        cam = base.camera
        changes["camera"] = cam.scaled(max(1, round(cam.width * get("image.scale"))),
                                       max(1, round(cam.height * get("image.scale"))))
    if any(name.startswith("start.") for name in scene):
        tilt = math.radians(get("start.tilt_deg"))
        R = (Rotation.from_rotvec([tilt * math.cos(tilt_dir), tilt * math.sin(tilt_dir), 0.0])
             * Rotation.from_euler("z", math.radians(get("start.rotation_deg")))).as_matrix()
        lateral = get("start.lateral_m")
        offset = transform(R, [lateral * math.cos(lateral_dir), lateral * math.sin(lateral_dir),
                               get("start.depth_m")])
        arm = base.arm_model("true")
        changes["q_start"] = solve_camera_pose(arm, arm.camera_pose(base.q_taught) @ offset,
                                               base.q_taught, base.q_home)
    if get("calib.hand_eye_deg") or get("calib.hand_eye_m"):
        error = transform(Rotation.from_rotvec(
            hand_eye_axis * math.radians(get("calib.hand_eye_deg"))).as_matrix(),
            hand_eye_dir * get("calib.hand_eye_m"))
        changes["T_tool_camera_belief"] = base.T_tool_camera_belief @ error
    changes["depth_scale_belief"] = base.depth_scale_belief * (1.0 + get("calib.depth"))
    if get("image.noise_std") is not None:
        changes["photometric"] = dataclasses.replace(base.photometric,
                                                     noise_std=get("image.noise_std"))
    drive = {field_: get(f"arm.{field_}") for field_ in
             ("joint_noise_std", "velocity_lag_s", "command_latency_s")
             if get(f"arm.{field_}") is not None}
    if drive:
        changes["arm_dynamics"] = dataclasses.replace(base.arm_dynamics, **drive)
    return dataclasses.replace(base, **changes), 1.0 + get("calib.focal")


# ----------------------------------------------------------------------------- one episode
def judge(result, values: dict, success: Success) -> tuple[bool, str, list]:
    """``(success, failure reason, limits exceeded)`` of an EpisodeResult run with parameter
    ``values`` (see the module doc)."""
    slack = 1.0 + success.limit_slack
    checks = (("joint_speed", result.peak_joint_speed_ratio, values["limits.joint_velocity_scale"]),
              ("tool_speed", result.peak_tool_speed, values["limits.tool_linear_speed"]),
              ("camera_speed", result.peak_camera_speed, values["limits.camera_linear_speed"]),
              ("angular_speed", result.peak_angular_speed, values["limits.angular_speed"]))
    exceeded = [name for name, peak, limit in checks if peak > limit * slack]
    if not result.min_limit_margin > 0:
        exceeded.append("joint_position")
    if not result.converged:
        failure = result.reason or "not_converged"
    elif result.pose_error_mm > success.pose_mm or result.pose_error_deg > success.pose_deg:
        failure = "pose_error"
    elif exceeded:
        failure = "limit:" + exceeded[0]
    else:
        failure = ""
    return not failure, failure, exceeded


def run_job(spec: SweepSpec, point: Point, records_dir: str | None = None) -> dict:
    """Run one planned episode; a flat row (axis values, status, success, failure, metrics).
    Status ``ok`` (it ran), ``skipped`` (start out of reach, view not teachable) or ``error``.
    A failed episode is written as a run record under ``records_dir`` when given (its folder
    in the row's ``record``)."""
    from vservo_node.episode import run_scenario_episode
    from vservo_node.vision.reference import BadReferenceError

    row: dict[str, Any] = {"index": point.index, "seed": point.seed, **point.values,
                           "status": "ok", "success": False, "failure": "",
                           "limits_exceeded": ""}
    row.update({k: None for k in METRICS})
    scene = {k: v for k, v in {**spec.fixed, **point.values}.items() if k in SCENE_NAMES}
    try:
        values = _episode_params(spec, point)
        try:
            scenario, focal_scale = scenario_variant(_base_scenario(spec.scenario), scene,
                                                     np.random.default_rng(point.seed))
        except ValueError as exc:
            return {**row, "status": "skipped", "failure": "start_unreachable",
                    "reason": str(exc).splitlines()[0]}
        overrides = _overrides(spec, point)
        scenario = dataclasses.replace(
            scenario, duration_s=values["control.max_run_s"] + BRAKE_ALLOWANCE_S)
        try:
            result = run_scenario_episode(scenario, overrides, point.seed,
                                          record=records_dir is not None,
                                          focal_scale=focal_scale, sensing=spec.sensing,
                                          noise_px=scene.get("sensing.noise_px"))
        except BadReferenceError as exc:
            return {**row, "status": "skipped", "failure": "teach_failed", "reason": str(exc)}
    except Exception as exc:  # a bug or a broken setup: kept in the table, counted as error
        return {**row, "status": "error", "failure": f"error:{type(exc).__name__}",
                "reason": "".join(traceback.format_exception_only(exc)).strip()}
    ok, failure, exceeded = judge(result, values, spec.success)
    figures = metrics.episode_figures(result, values)
    row.update({k: figures.get(k) for k in METRICS})
    row.update(success=ok, failure=failure, limits_exceeded=";".join(exceeded))
    if not ok and records_dir is not None:
        try:
            row["record"] = str(write_episode_record(
                records_dir, spec, point, scenario, values, result, failure))
        except Exception as exc:   # noqa: BLE001 - the row stands without its record
            row["record"] = f"error:{type(exc).__name__}: {exc}"
    return row


def write_episode_record(root, spec: SweepSpec, point: Point, scenario, values: dict, result,
                         failure: str) -> Path:
    """A failed episode as a run record (see record/episode_record.py); returns its folder."""
    from vservo_node.record.episode_record import write_record

    name = f"episode{point.index:04d}_{failure.replace(':', '_') or 'failed'}"
    return write_record(Path(root), name, scenario, values, result,
                        notes={"sweep": spec.name, "episode": point.index, "seed": point.seed,
                               **{k: v for k, v in point.values.items()}})


# ----------------------------------------------------------------------------- running
class Progress:
    """A plain-text progress bar on ``stream`` (stderr): redrawn in place on a terminal, a
    line per tenth of the work otherwise."""

    def __init__(self, total: int, label: str, stream=None, width: int = 30):
        self.total, self.label, self.width = total, label, width
        self.stream = stream if stream is not None else sys.stderr
        self.done = self.ok = self.failed = 0
        self.t0 = time.perf_counter()
        self.tty = hasattr(self.stream, "isatty") and self.stream.isatty()
        self._tenth = -1

    def update(self, row: dict) -> None:
        self.done += 1
        self.ok += bool(row.get("success"))
        self.failed += not row.get("success")
        tenth = 10 * self.done // max(self.total, 1)
        if self.tty or tenth != self._tenth:
            self._tenth = tenth
            self.stream.write(("\r" if self.tty else "") + self.line()
                              + ("" if self.tty else "\n"))
            self.stream.flush()

    def line(self) -> str:
        elapsed = time.perf_counter() - self.t0
        fraction = self.done / max(self.total, 1)
        filled = int(round(self.width * fraction))
        eta = elapsed / self.done * (self.total - self.done) if self.done else math.nan
        return (f"{self.label} [{'#' * filled}{'.' * (self.width - filled)}] "
                f"{self.done}/{self.total} {100 * fraction:3.0f}%  success {self.ok}  "
                f"other {self.failed}  {elapsed:5.0f} s  eta {eta:4.0f} s")

    def close(self) -> None:
        if self.tty:
            self.stream.write("\n")
            self.stream.flush()


def _one_cv_thread() -> None:
    """Worker start: one OpenCV thread per process, so N workers use N cores."""
    import cv2
    cv2.setNumThreads(1)


def _local_rows(spec, points, workers: int, records_dir=None) -> Iterator[dict]:
    if workers <= 1:
        for point in points:
            yield run_job(spec, point, records_dir)
        return
    import multiprocessing
    # spawn: a fresh interpreter per worker (forking a parent with OpenCV threads can hang)
    with ProcessPoolExecutor(workers, mp_context=multiprocessing.get_context("spawn"),
                             initializer=_one_cv_thread) as pool:
        futures = [pool.submit(run_job, spec, point, records_dir) for point in points]
        for future in as_completed(futures):
            yield future.result()


def _dask_rows(spec, points, address: str, records_dir=None) -> Iterator[dict]:
    try:
        from distributed import Client
        from distributed import as_completed as dask_completed
    except ImportError as exc:
        raise SweepError(f"a Dask scheduler was given ({address}) but the Dask distributed "
                         f"scheduler is not installed; install it with: pip install "
                         f"{DASK_PINS}") from exc
    with Client(address) as client:   # closes this connection only, not the cluster
        futures = client.map(run_job, [spec] * len(points), points,
                             [records_dir] * len(points), pure=False)
        for future in dask_completed(futures):
            yield future.result()


def run_sweep(spec: SweepSpec, workers: int = 1, scheduler: str | None = None,
              progress: bool = True, stream=None, records_dir=None) -> SweepRun:
    """Run every episode of ``spec``: in this process (``workers`` 1), in ``workers`` local
    processes, or on the Dask cluster whose scheduler listens at ``scheduler`` (its workers
    need vservo_node and the scenario files, and ``records_dir`` must be a folder they
    share). Rows come back in plan order whatever ran them, so the same spec gives the same
    table. With ``records_dir``, failed episodes are kept there as run records."""
    if records_dir is not None:
        records_dir = str(Path(records_dir).resolve())
        Path(records_dir).mkdir(parents=True, exist_ok=True)
    points = plan(spec)
    bar = Progress(len(points), f"sweep {spec.name}", stream) if progress else None
    t0 = time.perf_counter()
    rows = []
    source = (_dask_rows(spec, points, scheduler, records_dir) if scheduler
              else _local_rows(spec, points, workers, records_dir))
    for row in source:
        rows.append(row)
        if bar:
            bar.update(row)
    if bar:
        bar.close()
    rows.sort(key=lambda row: row["index"])
    run = SweepRun(spec, rows, time.perf_counter() - t0,
                   f"dask {scheduler}" if scheduler else f"{max(workers, 1)} local")
    run.summary = summarize(run)
    return run


# ----------------------------------------------------------------------------- results
def _stats(values) -> dict | None:
    if not values:
        return None
    v = np.asarray(values, dtype=float)
    return {"n": int(v.size), "mean": float(v.mean()), "min": float(v.min()),
            "p10": float(np.percentile(v, 10)), "median": float(np.median(v)),
            "p90": float(np.percentile(v, 90)), "max": float(v.max())}


def _map_bins(spec: SweepSpec, axis: Axis):
    """``(labels, index_of(value))`` of one success-map axis: its values as categories when it
    has a fixed set of them, else ``map_bins`` equal bins over its range."""
    if axis.values or spec.mode == "grid":
        categories = list(dict.fromkeys(axis.grid()))
        return [f"{c:.3g}" if isinstance(c, float) else str(c) for c in categories], \
            categories.index
    edges = np.linspace(axis.low, axis.high, spec.map_bins + 1)
    tiny = 1e-9 * max(abs(axis.high - axis.low), 1e-300)   # linspace round-off, not values

    def num(v):
        return f"{0.0 if abs(v) < tiny else v:.3g}"
    labels = [f"{num(a)} to {num(b)}" for a, b in zip(edges[:-1], edges[1:])]
    return labels, lambda v: int(np.clip(np.searchsorted(edges, v, "right") - 1, 0,
                                         spec.map_bins - 1))


# units of the scene quantities, for axis labels (controller parameters: params.SCHEMA's unit)
SCENE_UNITS = {"start.rotation_deg": "deg", "start.lateral_m": "m", "start.tilt_deg": "deg",
               "start.depth_m": "m", "calib.hand_eye_deg": "deg", "calib.hand_eye_m": "m",
               "calib.focal": "relative error", "calib.depth": "relative error",
               "image.noise_std": "grey levels", "image.scale": "fraction",
               "sensing.noise_px": "px", "arm.joint_noise_std": "rad",
               "arm.velocity_lag_s": "s", "arm.command_latency_s": "s"}


def axis_label(name: str) -> str:
    """``name (unit)`` of a swept quantity; ``(choice)`` for text parameters."""
    param = params.BY_NAME.get(name)
    unit = (param.unit or ("choice" if param.type is str else "-")) if param is not None \
        else SCENE_UNITS.get(name, "-")
    return f"{name} ({unit})"


def success_map(spec: SweepSpec, rows: list) -> dict:
    """Success rate of the episodes that ran, by the map axes: ``{axes, labels, n, successes,
    rate}`` with nested lists indexed [first axis][second axis] (rate None where empty)."""
    axes = [next(a for a in spec.axes if a.name == n) for n in spec.map_axes]
    binned = [_map_bins(spec, a) for a in axes]
    shape = tuple(len(labels) for labels, _ in binned)
    n, ok = np.zeros(shape, int), np.zeros(shape, int)
    for row in rows:
        if row["status"] == "ok":
            cell = tuple(index(row[a.name]) for a, (_, index) in zip(axes, binned))
            n[cell] += 1
            ok[cell] += bool(row["success"])
    rate = np.where(n > 0, ok / np.maximum(n, 1), None)
    return {"axes": list(spec.map_axes), "labels": [labels for labels, _ in binned],
            "n": n.tolist(), "successes": ok.tolist(), "rate": rate.tolist()}


def wilson_interval(successes: int, n: int, z: float = 1.959963984540054) -> tuple:
    """The Wilson score interval of a success rate (Wilson 1927, "Probable inference, the law
    of succession, and statistical inference", J. Am. Stat. Assoc. 22: 209-212), 95 % by
    default: unlike k/n it tells 2 of 2 (0.34..1) from 20 of 20 (0.84..1)."""
    if n <= 0:
        return 0.0, 1.0
    p = successes / n
    centre = (p + z * z / (2 * n)) / (1 + z * z / n)
    half = z / (1 + z * z / n) * math.sqrt(p * (1 - p) / n + z * z / (4 * n * n))
    return max(0.0, centre - half), min(1.0, centre + half)


def best_params(spec: SweepSpec, rows: list) -> dict | None:
    """The swept controller parameters' values to use, and every group's figures; None when
    no controller parameter was swept.

    Rule (``spec.best``, stated in the result): groups of fewer than ``min_episodes`` are not
    chosen; the rest rank by the lower end of the 95 % Wilson interval of their success rate
    (ties: the shorter median time to converge); the choice must be *robust*: on each numeric
    swept parameter, the groups at the neighbouring values (the others equal) reach a lower
    end within ``margin`` of the choice's (a value at the edge of the swept range has one
    neighbour). The first group in rank order that passes is ``best``; ``None`` when none
    does (then ``reason`` says why)."""
    names = [a.name for a in spec.axes if a.name in params.BY_NAME]
    if not names:
        return None
    rule = spec.best
    groups = defaultdict(list)
    for row in rows:
        if row["status"] == "ok":
            groups[tuple(row[n] for n in names)].append(row)
    table = {}
    for key, members in groups.items():
        wins = sum(bool(r["success"]) for r in members)
        times = [r["time_to_converge_s"] for r in members if r["success"]]
        low, high = wilson_interval(wins, len(members))
        table[key] = {"values": dict(zip(names, key)), "episodes": len(members),
                      "successes": wins, "success_rate": wins / len(members),
                      "rate_low": low, "rate_high": high,
                      "median_time_s": float(np.median(times)) if times else None}
    numeric = [i for i, n in enumerate(names)
               if all(isinstance(k[i], (int, float)) and not isinstance(k[i], bool)
                      for k in table)]
    axis_values = {i: sorted({k[i] for k in table}) for i in numeric}

    def neighbours(key):
        for i in numeric:
            values = axis_values[i]
            j = values.index(key[i])
            for jj in (j - 1, j + 1):
                if 0 <= jj < len(values):
                    other = key[:i] + (values[jj],) + key[i + 1:]
                    yield names[i], other

    for key, g in table.items():
        weak = [f"{name}={other[names.index(name)]} ({table[other]['successes']}/"
                f"{table[other]['episodes']})"
                for name, other in neighbours(key) if other in table
                and table[other]["rate_low"] < g["rate_low"] - rule.margin]
        g["enough_episodes"] = g["episodes"] >= rule.min_episodes
        g["weak_neighbours"] = weak
    ranked = sorted(table.values(), key=lambda g: (
        -g["rate_low"], g["median_time_s"] if g["median_time_s"] is not None else math.inf))
    best = next((g for g in ranked if g["enough_episodes"] and not g["weak_neighbours"]), None)
    reason = ""
    if best is None:
        reason = ("no group has " + str(rule.min_episodes) + " episodes"
                  if not any(g["enough_episodes"] for g in ranked)
                  else "every group with enough episodes has a neighbour that fails more "
                       f"(beyond the margin {rule.margin})")
    return {"parameters": names, "best": best, "reason": reason,
            "rule": {"min_episodes": rule.min_episodes, "margin": rule.margin,
                     "rank": "lower end of the 95 % Wilson interval of the success rate, "
                             "then the shorter median time to converge",
                     "robust": "neighbouring values on each numeric swept parameter reach a "
                               "lower end within the margin"},
            "groups": ranked}


def summarize(run: SweepRun) -> dict:
    """Figures of a finished sweep (JSON-ready)."""
    spec, rows = run.spec, run.rows
    ran = [r for r in rows if r["status"] == "ok"]
    wins = [r for r in ran if r["success"]]
    return {
        "format": "vservo_sweep_summary/1", "name": spec.name, "description": spec.description,
        "scenario": spec.scenario, "mode": spec.mode, "sensing": spec.sensing, "seed": spec.seed,
        "fixed": spec.fixed, "axes": [a.name for a in spec.axes],
        "success_criteria": dataclasses.asdict(spec.success),
        "episodes": len(rows), "ran": len(ran),
        "skipped": sum(r["status"] == "skipped" for r in rows),
        "errors": sum(r["status"] == "error" for r in rows),
        "successes": len(wins),
        "success_rate": len(wins) / len(ran) if ran else None,
        "time_to_converge_s": _stats([r["time_to_converge_s"] for r in wins]),
        "params_file": spec.params_source or None,
        "failure_reasons": dict(Counter(r["failure"] for r in rows if not r["success"])
                                .most_common()),
        "success_map": success_map(spec, rows),
        "best_params": best_params(spec, rows),
        "wall_s": run.wall_s, "workers": run.workers,
    }


def _cell(value) -> str:
    if value is None:
        return ""
    if isinstance(value, (bool, np.bool_)):
        return "true" if value else "false"
    return repr(float(value)) if isinstance(value, (float, np.floating)) else str(value)


def write_table(rows: list, path: Path) -> Path:
    """One CSV row per episode, full-precision numbers (the same sweep writes the same file)."""
    columns = list(dict.fromkeys(k for row in rows for k in row))
    with open(path, "w", newline="") as f:
        writer = csv.writer(f)
        writer.writerow(columns)
        for row in rows:
            writer.writerow([_cell(row.get(c)) for c in columns])
    return path


def _plot_map(summary: dict, path: Path) -> Path:
    import matplotlib
    matplotlib.use("Agg")
    import matplotlib.pyplot as plt

    m = summary["success_map"]
    fig, ax = plt.subplots(figsize=(6.4, 4.8))
    n, rate = np.array(m["n"]), np.array(m["rate"], dtype=float)   # None -> NaN
    if n.ndim == 1:
        xs = np.arange(len(rate))
        ax.bar(xs, np.nan_to_num(rate), color="tab:green")
        for x, k, r in zip(xs, n, rate):
            ax.text(x, (0 if np.isnan(r) else r) + 0.02, f"n={k}", ha="center", fontsize=8)
        ax.set_xticks(xs, m["labels"][0])
        ax.set_xlabel(axis_label(m["axes"][0]))
        ax.set_ylabel("success rate (fraction)")
        ax.set_ylim(0, 1.1)
    else:
        cmap = matplotlib.colormaps["RdYlGn"].with_extremes(bad="lightgrey")  # grey: no episode
        image = ax.imshow(rate.T, origin="lower", cmap=cmap, vmin=0, vmax=1, aspect="auto")
        for i, j in itertools.product(range(n.shape[0]), range(n.shape[1])):
            if n[i, j]:
                ax.text(i, j, f"{m['successes'][i][j]}/{n[i, j]}", ha="center", va="center",
                        fontsize=8)
        ax.set_xticks(range(n.shape[0]), m["labels"][0])
        ax.set_yticks(range(n.shape[1]), m["labels"][1])
        ax.set_xlabel(axis_label(m["axes"][0]))
        ax.set_ylabel(axis_label(m["axes"][1]))
        fig.colorbar(image, ax=ax, label="success rate (fraction; grey: no episode)")
    ax.set_title(f"{summary['name']}: success by {' and '.join(m['axes'])}", fontsize=10)
    fig.tight_layout()
    fig.savefig(path, dpi=100)
    plt.close(fig)
    return path


def _plot_times(rows: list, summary: dict, path: Path) -> Path:
    import matplotlib
    matplotlib.use("Agg")
    import matplotlib.pyplot as plt

    from matplotlib.ticker import MaxNLocator

    times = [r["time_to_converge_s"] for r in rows if r["success"]]
    fig, ax = plt.subplots(figsize=(6.4, 4.0))
    if times:
        ax.hist(times, bins=min(20, max(5, len(times) // 3)), color="tab:blue")
        ax.yaxis.set_major_locator(MaxNLocator(integer=True))
    else:
        ax.text(0.5, 0.5, "no successful episode", ha="center", transform=ax.transAxes)
    ax.set_xlabel("time to converge (s)")
    ax.set_ylabel("episodes (count)")
    ax.set_title(f"{summary['name']}: {len(times)} successful episodes")
    fig.tight_layout()
    fig.savefig(path, dpi=100)
    plt.close(fig)
    return path


def write_results(run: SweepRun, out_dir) -> list[Path]:
    """episodes.csv, summary.json, success_map.csv/.png, time_to_converge.png and, when
    controller parameters were swept, params.csv in ``out_dir``; returns the paths."""
    out = Path(out_dir)
    out.mkdir(parents=True, exist_ok=True)
    summary = run.summary or summarize(run)
    written = [write_table(run.rows, out / "episodes.csv")]
    (out / "summary.json").write_text(json.dumps(summary, indent=2, default=_cell) + "\n")
    written.append(out / "summary.json")
    m = summary["success_map"]
    n, wins, rate = (np.array(m[k], dtype=object) for k in ("n", "successes", "rate"))
    map_rows = [{**{axis: m["labels"][k][i] for k, (axis, i) in enumerate(zip(m["axes"], cell))},
                 "episodes": n[cell], "successes": wins[cell], "success_rate": rate[cell]}
                for cell in np.ndindex(n.shape)]
    written.append(write_table(map_rows, out / "success_map.csv"))
    written.append(_plot_map(summary, out / "success_map.png"))
    written.append(_plot_times(run.rows, summary, out / "time_to_converge.png"))
    if summary["best_params"]:
        groups = [{**g["values"], "episodes": g["episodes"], "successes": g["successes"],
                   "success_rate": g["success_rate"], "rate_low_95": g["rate_low"],
                   "median_time_s": g["median_time_s"],
                   "enough_episodes": g["enough_episodes"],
                   "weak_neighbours": "; ".join(g["weak_neighbours"])}
                  for g in summary["best_params"]["groups"]]
        written.append(write_table(groups, out / "params.csv"))
    return written
