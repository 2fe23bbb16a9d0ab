"""A sweep's plan: the episodes (grid or stratified random draws), each one's controller
parameters and scenario variant (vservo_node.record.sweep)."""
from __future__ import annotations

import dataclasses
import functools
import itertools
import math
from typing import Any

import numpy as np
from scipy.spatial.transform import Rotation

from vservo_node import params
from vservo_node.control.frames import transform
from vservo_node.record.sweep_spec import NOT_APPLICABLE, SCENE_NAMES, Point, SweepError, SweepSpec


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
        chosen: list[tuple[Any, ...] | None] = [combo for combo in combos
                                                for _ in range(spec.repeats)]
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

    def get(name: str) -> Any:
        return scene.get(name, SCENE_NAMES[name][1])

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
