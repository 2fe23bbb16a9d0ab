"""`vservo handeye collect|solve|check` and `vservo delay`: the cell's geometry from data.

- ``collect``: hand-eye samples from a bag (``--bag``), from the simulated cell headless
  (``--scenario``) or live from a running cell (``--live``: a sample each time you press Enter
  with the arm at rest; the command never moves the arm). Writes a samples file.
- ``solve``: every solver over a samples file; prints each method's result and residuals and
  the spread warnings; writes the parameter snippet (``robot.hand_eye``) and a URDF joint.
- ``check``: the configured hand-eye judged from a recorded run (predicted against observed
  feature motion), or from a headless run of a scenario.
- ``delay`` (top-level ``vservo delay``): the loop delay of a recorded run, the
  ``control.loop_delay_s`` to configure and the gain bound it implies.

The work is in vservo_node/calib/ (no ROS); the live collector in ros/handeye_client.py.
"""
from __future__ import annotations

import math
import sys
from pathlib import Path

import numpy as np


def register(subparsers) -> None:
    parser = subparsers.add_parser(
        "handeye", help="hand-eye calibration: collect samples, solve, check a configured one",
        description=__doc__.split("\n\n")[1] if __doc__ else None)
    sub = parser.add_subparsers(dest="handeye_command", metavar="STEP")

    c = sub.add_parser("collect", help="samples from a bag, the simulated cell or a live cell")
    src = c.add_mutually_exclusive_group(required=True)
    src.add_argument("--bag", help="rosbag2 bag with joint states and camera images; the arm "
                     "held still at each pose")
    src.add_argument("--scenario", help="simulated cell (shipped name or file), headless: the "
                     "arm is put at proposed views around the taught one")
    src.add_argument("--live", action="store_true", help="from a running cell over ROS: a "
                     "sample each time Enter is pressed (the arm must rest); q + Enter ends")
    c.add_argument("--out", required=True, help="samples file to write (YAML)")
    c.add_argument("--mounting", choices=("hand", "fixed"), default="hand",
                   help="hand: camera on the tool (default); fixed: camera in the cell, "
                   "target on the tool (--scenario: the scenario's)")
    c.add_argument("--target", help="target file (shipped name or path); default: the "
                   "scenario's, else tray_dots")
    c.add_argument("--urdf", help="URDF file (default: the bag's robot_description)")
    c.add_argument("--base-frame", default="base_link")
    c.add_argument("--tool-frame", default="tool0")
    c.add_argument("--views", type=int, default=12, help="--scenario: views to propose")
    c.add_argument("--seed", type=int, default=0)
    c.add_argument("--namespace", default="", help="--live: namespace of the cell's topics")
    c.set_defaults(func=_collect)

    s = sub.add_parser("solve", help="solve the hand-eye from a samples file")
    s.add_argument("samples", help="samples file from `vservo handeye collect`")
    s.add_argument("--mounting", choices=("hand", "fixed"), help="default: the samples file's")
    s.add_argument("--params-out", help="write the parameter snippet here")
    s.add_argument("--urdf-out", help="write the URDF joint snippet here")
    s.add_argument("--parent", help="URDF parent link (default: tool0 for hand, base_link for "
                   "fixed)")
    s.add_argument("--child", default="camera_optical_frame", help="URDF child link")
    s.set_defaults(func=_solve)

    k = sub.add_parser("check", help="judge the configured hand-eye from a recorded run")
    ksrc = k.add_mutually_exclusive_group(required=True)
    ksrc.add_argument("--bag", help="a run record (vservo_recorder or ros2 bag record with "
                      "servo/features, joint states and servo/joint_velocity_cmd)")
    ksrc.add_argument("--scenario", help="run this simulated scenario headless and judge it")
    _belief_args(k)
    k.set_defaults(func=_check)

    d = subparsers.add_parser(
        "delay", help="loop delay of a recorded run: control.loop_delay_s and the gain bound",
        description="Cross-correlates the commanded joint motion with the feature motion seen "
                    "in the images (start nod included) and prints the delay, the "
                    "control.loop_delay_s to configure and the gain bound it implies.")
    dsrc = d.add_mutually_exclusive_group(required=True)
    dsrc.add_argument("--bag", help="a run record (as for `vservo handeye check`)")
    dsrc.add_argument("--scenario", help="run this simulated scenario headless and measure it")
    d.add_argument("--output-rate", type=float, help="io.output_rate_hz (default: the run's)")
    d.add_argument("--lag", type=float, help="--scenario: the drives' velocity_lag_s instead of "
                   "the scenario's")
    d.add_argument("--latency", type=float, help="--scenario: command_latency_s instead")
    d.set_defaults(func=_delay)
    parser.set_defaults(func=lambda args: (parser.print_help(), 2)[1])


def _belief_args(parser) -> None:
    parser.add_argument("--belief-error-deg", type=float, nargs=3, metavar=("RX", "RY", "RZ"),
                        help="--scenario: the controller's hand-eye turned by this rotation "
                        "vector (deg, camera axes) from the true one")
    parser.add_argument("--belief-error-mm", type=float, nargs=3, metavar=("X", "Y", "Z"),
                        help="--scenario: ... and moved by this (mm, camera axes)")
    parser.add_argument("--sensing", choices=("image", "projected"), default="image",
                        help="--scenario: rendered images (default) or projected features")


def _fail(command: str, exc) -> int:
    print(f"vservo {command}: {exc}", file=sys.stderr)
    return 1


# ----------------------------------------------------------------------------- collect
def _collect(args) -> int:
    from vservo_node.calib import handeye as he
    from vservo_node.calib import samples as cs
    from vservo_node.vision.targets import load_target

    try:
        if args.scenario:
            from vservo_node.sim import load_scenario

            sc = load_scenario(args.scenario)
            samples, info = cs.samples_from_sim(sc, args.views, args.seed)
            for k, why in info["skipped"]:
                print(f"  view {k}: no sample ({why})")
            if info["mounting"] != args.mounting:
                print(f"  {sc.name} has a {info['mounting']} camera: --mounting "
                      f"{info['mounting']}")
                args.mounting = info["mounting"]
            arm, camera = sc.arm_model("urdf" if sc.mount() else "belief"), sc.camera
        elif args.bag:
            arm = _arm_for_bag(args)
            target = load_target(args.target or "tray_dots")
            samples, info = cs.samples_from_bag(args.bag, arm, target)
            camera = info["camera"]
            print(f"  {info['frames']} frames, {info['at_rest']} with the arm at rest, "
                  f"{len(info['rejected'])} without a target pose")
            for t, why in info["rejected"][:10]:
                print(f"    t={t:.2f} s: {why}")
        else:
            from vservo_node.ros.handeye_client import collect_live

            target = load_target(args.target or "tray_dots")
            samples, arm, camera = collect_live(args, target)
    except (OSError, ValueError, RuntimeError) as exc:
        return _fail("handeye collect", exc)
    path = cs.save_samples(args.out, samples, arm.joint_names, camera=camera,
                           mounting=args.mounting,
                           notes={"source": args.bag or args.scenario or "live"})
    sp = he.spread(samples, args.mounting)
    print(f"{len(samples)} samples -> {path}; relative rotations up to "
          f"{sp.max_rotation_deg:.1f} deg, rotation axes up to {sp.axis_spread_deg:.1f} deg apart")
    for w in sp.warnings:
        print(f"warning: {w}")
    return 0


def _arm_for_bag(args):
    from vservo_node.calib.samples import urdf_from_bag
    from vservo_node.control.kinematics import ArmModel

    if args.urdf:
        return ArmModel.from_urdf_file(args.urdf, args.base_frame, args.tool_frame, None, 1)
    text = urdf_from_bag(args.bag)
    if not text:
        raise ValueError(f"bag {args.bag} has no robot_description; give --urdf")
    return ArmModel.from_urdf(text, args.base_frame, args.tool_frame, None, 1)


# ----------------------------------------------------------------------------- solve
def _solve(args) -> int:
    from vservo_node.calib import handeye as he
    from vservo_node.calib.samples import load_samples

    try:
        samples, header = load_samples(args.samples)
        mounting = args.mounting or header.get("mounting") or "hand"
        focal = header.get("focal_px")
        if not focal:
            raise ValueError(f"{args.samples} has no focal_px (the camera's focal length)")
        cal = he.calibrate(samples, mounting, float(focal))
    except (OSError, ValueError) as exc:
        return _fail("handeye solve", exc)
    print(f"{len(samples)} samples, {mounting} mounting; X = "
          + ("T_tool_camera" if mounting == "hand" else "T_base_camera"))
    print(he.format_table(cal))
    best = cal.best
    print(f"chosen: {best.method}: reprojection {best.reprojection_px:.3f} px RMS, consistency "
          f"{best.consistency_mm:.3f} mm / {best.consistency_deg:.4f} deg, one standard "
          f"deviation {best.std_mm:.3f} mm / {best.std_deg:.4f} deg")
    for w in cal.warnings:
        print(f"warning: {w}")
    params_text = he.params_snippet(cal)
    parent = args.parent or ("tool0" if mounting == "hand" else "base_link")
    urdf_text = he.urdf_snippet(cal, parent, args.child)
    print("\n" + params_text + "\n" + urdf_text, end="")
    for path, text in ((args.params_out, params_text), (args.urdf_out, urdf_text)):
        if path:
            Path(path).write_text(text)
            print(f"wrote {path}")
    return 0


# ----------------------------------------------------------------------------- check, delay
def scenario_trace(name: str, error_deg=None, error_mm=None, sensing: str = "image",
                   lag=None, latency=None):
    """(trace, episode result, scenario) of a headless run of ``name`` whose controller
    believes the hand-eye (a fixed camera: the stand's pose) turned by ``error_deg`` and moved
    by ``error_mm`` (camera axes) from the true one."""
    import dataclasses

    from scipy.spatial.transform import Rotation

    from vservo_node.calib.trace import TraceRecorder
    from vservo_node.control import frames
    from vservo_node.episode import run_scenario_episode
    from vservo_node.sim import load_scenario

    sc = load_scenario(name)
    if error_deg is not None or error_mm is not None:
        E = frames.transform(
            Rotation.from_rotvec(np.radians(np.zeros(3) if error_deg is None else
                                            np.asarray(error_deg, float))).as_matrix(),
            (np.zeros(3) if error_mm is None else np.asarray(error_mm, float)) / 1e3)
        if sc.mount() is None:
            sc = dataclasses.replace(sc, T_tool_camera_belief=sc.T_tool_camera_true @ E)
        else:   # a fixed camera: the stand's pose believed off, in the camera axes
            from vservo_node.control.mounting import FixedCamera

            true = sc.mount("true")
            sc = dataclasses.replace(sc, fixed_belief=FixedCamera(
                true.T_base_camera @ E, sc.mount("belief").T_tool_target))
    if lag is not None or latency is not None:
        dyn = sc.arm_dynamics
        sc = dataclasses.replace(sc, arm_dynamics=dataclasses.replace(
            dyn, velocity_lag_s=dyn.velocity_lag_s if lag is None else lag,
            command_latency_s=dyn.command_latency_s if latency is None else latency))
    rec = TraceRecorder(sc.arm_model("belief" if sc.mount() is None else "urdf"), sc.camera,
                        sc.target, sc.mount("belief"))
    result = run_scenario_episode(sc, sensing=sensing, trace=rec)
    return rec.trace(), result, sc


def _check(args) -> int:
    from vservo_node.calib.check import check_hand_eye
    from vservo_node.calib.trace import trace_from_run

    try:
        if args.bag:
            from vservo_node.record.bag import load_run

            trace = trace_from_run(load_run(args.bag))
        else:
            trace, result, sc = scenario_trace(args.scenario, args.belief_error_deg,
                                               args.belief_error_mm, args.sensing)
            print(f"{sc.name} headless: {'converged' if result.converged else result.reason} "
                  f"after {result.time_s:.2f} s")
        check = check_hand_eye(trace)
    except (OSError, ValueError) as exc:
        return _fail("handeye check", exc)
    print(check.verdict())
    print(f"residual of the feature motion: {check.residual_before_px:.3f} px before, "
          f"{check.residual_after_px:.3f} px after the correction")
    corrected = check.as_dict()["corrected"]
    print(f"corrected {check.parameter} (translation kept where the run does not show it; a "
          "calibration is better): "
          f"[{', '.join(f'{v:.6f}' for v in corrected)}]")
    return 0


def _delay(args) -> int:
    from vservo_node.calib.delay import estimate_delay
    from vservo_node.calib.trace import trace_from_run

    try:
        if args.bag:
            from vservo_node.record.bag import load_run
            from vservo_node.record.metrics import run_params

            run = load_run(args.bag)
            trace = trace_from_run(run)
            rate = args.output_rate or run_params(run).get("io.output_rate_hz")
        else:
            from vservo_node.episode import episode_params

            trace, _result, sc = scenario_trace(args.scenario, sensing="image", lag=args.lag,
                                               latency=args.latency)
            rate = args.output_rate or episode_params(sc.controller)["io.output_rate_hz"]
            print(f"{sc.name} headless: drives' command_latency_s "
                  f"{sc.arm_dynamics.command_latency_s:g} + velocity_lag_s "
                  f"{sc.arm_dynamics.velocity_lag_s:g} = "
                  f"{1e3 * (sc.arm_dynamics.command_latency_s + sc.arm_dynamics.velocity_lag_s):.1f}"
                  " ms configured")
        if not rate or not math.isfinite(float(rate)):
            raise ValueError("no io.output_rate_hz in the run; give --output-rate")
        estimate = estimate_delay(trace, 1.0 / float(rate))
    except (OSError, ValueError) as exc:
        return _fail("delay", exc)
    for line in estimate.lines():
        print(line)
    return 0
