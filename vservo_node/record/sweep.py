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

# Split along its concerns (spec, plan, run, results, figures); every public name keeps this
# import path.
from vservo_node.record.sweep_figures import (write_results)
from vservo_node.record.sweep_plan import (plan, scenario_variant, user_params)
from vservo_node.record.sweep_results import (SCENE_UNITS, axis_label, best_params, success_map,
                                              summarize, wilson_interval, write_table)
from vservo_node.record.sweep_run import (Progress, judge, run_job, run_sweep, write_episode_record)
from vservo_node.record.sweep_spec import (BRAKE_ALLOWANCE_S, DASK_PINS, FORMAT, MAX_EPISODES,
                                           MAX_MAP_BINS, METRICS, MIN_PER_CELL, MODES,
                                           NOT_APPLICABLE, SCENE_NAMES, SENSING, Axis, Best, Point,
                                           Success, SweepError, SweepRun, SweepSpec, load_sweep,
                                           sweep_from_dict)

__all__ = ["BRAKE_ALLOWANCE_S", "DASK_PINS", "FORMAT", "MAX_EPISODES", "MAX_MAP_BINS", "METRICS",
           "MIN_PER_CELL", "MODES", "NOT_APPLICABLE", "SCENE_NAMES", "SENSING", "Axis", "Best",
           "Point", "Success", "SweepError", "SweepRun", "SweepSpec", "load_sweep",
           "sweep_from_dict", "plan", "scenario_variant", "user_params", "Progress", "judge",
           "run_job", "run_sweep", "write_episode_record", "SCENE_UNITS", "axis_label",
           "best_params", "success_map", "summarize", "wilson_interval", "write_table",
           "write_results"]
