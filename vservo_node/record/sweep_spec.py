"""Sweep files (``vservo_sweep/1``, see vservo_node.record.sweep): their entries, limits and
loading into a checked :class:`SweepSpec`."""
from __future__ import annotations

import math
from dataclasses import dataclass, field
from pathlib import Path

import numpy as np

from vservo_node import params, paths
from vservo_node.interface import SENSING_MODES
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

    @property
    def bounds(self) -> tuple[float, float]:
        """``(low, high)`` of a range axis (ValueError for an axis of explicit values)."""
        if self.low is None or self.high is None:
            raise ValueError(f"axis {self.name} has values, not a range")
        return self.low, self.high

    def grid(self) -> tuple:
        if self.values:
            return self.values
        points = np.linspace(*self.bounds, self.steps)
        return tuple(int(round(v)) if self.integer else float(v) for v in points)

    def draw(self, rng: np.random.Generator):
        if self.values:
            return self.values[int(rng.integers(len(self.values)))]
        return self.draw_between(rng, *self.bounds)

    def draw_between(self, rng: np.random.Generator, low: float, high: float):
        """Uniform in [low, high) (integers: of those inside, at least the nearest one)."""
        if self.integer:
            lo, hi = math.ceil(low), max(math.ceil(low), math.ceil(high) - 1)
            if high >= self.bounds[1]:
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
    success_entry = r.mapping(data.get("success"), "success", _SUCCESS)
    success = Success(**{k: r.number(v, f"success.{k}", minimum=0.0)
                         for k, v in success_entry.items()})
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
    best_entry = r.mapping(data.get("best"), "best", _BEST)
    best = Best(min_episodes=r.integer(best_entry.get("min_episodes", Best.min_episodes),
                                       "best.min_episodes", 1, MAX_EPISODES),
                margin=r.number(best_entry.get("margin", Best.margin), "best.margin",
                                minimum=0.0))
    return SweepSpec(
        name=r.text(data["name"], "name"), description=str(data.get("description", "")).strip(),
        scenario=scenario, mode=mode, seed=r.integer(data.get("seed", 0), "seed", 0),
        repeats=repeats, episodes=episodes, fixed=fixed, axes=axes, success=success,
        map_axes=tuple(map_axes), map_bins=map_bins, source=source, sensing=sensing, best=best)


def load_sweep(name_or_path) -> SweepSpec:
    """Load a sweep by short name (``"quick"``, from config/sweeps) or path."""
    path = paths.shipped("sweeps", str(name_or_path))
    return sweep_from_dict(_Reader.read_yaml(path), source=Path(path))
