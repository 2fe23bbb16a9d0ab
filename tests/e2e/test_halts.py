"""Halts of the product end to end (vservo_sim + vservo_node over DDS, shipped parameters).

The sim's images reach the controller through this test process (e2e_helpers.Observer relay),
which can stop them (a camera that dies) or paint over part of them (an object in front of the
lens, like the scenario format's image-space occluders, but timed by the test). Joint states,
camera_info and commands go directly.

Already covered against a stub cell by tests/ros/test_controller_node.py and not repeated here:
joints_stale, permit_withdrawn, camera_info_invalid, the state x service table, one explicit
zero then silence.
Run: cd /work/main && tools/isolated .venv/bin/python -m pytest tests/e2e/test_halts.py -q -s
"""
from __future__ import annotations

import math
import xml.etree.ElementTree as ET

import numpy as np
import yaml
from scipy.spatial.transform import Rotation

from e2e_helpers import CellSpec, speeds, write_scenario
from vservo_node.paths import config_dir
from vservo_node.sim import load_scenario

RELAYED = CellSpec("tray_offset", relay=True)
MID_RUN_S = 0.8     # into a run: past the soft start, still far from the goal


def _status_time(node, state: str, reason: str, since: float) -> float:
    """Arrival time of the first status in ``state`` with ``reason`` after ``since``."""
    return next(t for t, s in node.statuses
                if t >= since and s["state"] == state and s["reason"] == reason)


def _mid_run(cell) -> str:
    run_id = cell.begin()
    cell.spin(MID_RUN_S)
    assert cell.node.status["state"] == "servoing", cell.node.status
    return run_id


def test_camera_stopped_mid_run_brakes_after_the_image_timeout(cell, figures):
    """Images stop; the controller keeps its last command until io.image_timeout_s, then
    brakes at limits.joint_acceleration to zero. Bounds, measured on the command topic from
    the last image the relay forwarded (T = image timeout, P = output period, a = the
    acceleration limit per joint, dq = the last command before braking): no braking before
    T; speed non-increasing from T + P; zero by T + max(|dq_i| / a_i) + P (the brief's
    bounds; common practice, no source). These bounds hold at the controller; measured here
    they also include two DDS deliveries (relay to controller, controller to this process)
    and process scheduling on a shared machine, allowed for with D = 2 P, a period per
    delivery (common practice, no source; the printed figures show how much of it was used:
    none on an idle machine, 8.1 ms once with both cores busy elsewhere)."""
    cell.use(RELAYED)
    node, v = cell.node, cell.values
    T, P = v["io.image_timeout_s"], 1.0 / v["io.output_rate_hz"]
    accel = np.broadcast_to(np.asarray(v["limits.joint_acceleration"], float),
                            (len(cell.scenario.joint_names),))
    run_id = _mid_run(cell)
    node.relay_mode = "pause"
    t_last = node.relayed[-1][0]
    outcome = cell.finish(run_id)
    assert outcome.reason == "image_stale", outcome.result
    t_brake = _status_time(node, "braking", "image_stale", t_last)
    commands = [(t, c) for t, c in node.commands if t > t_last]
    before = [c for t, c in commands if t < t_last + T]
    after = [(t, c) for t, c in commands if t >= t_last + T + P]
    dq = before[-1]
    t_stop = next(t for t, c in commands if not np.any(c))
    bound = T + float(np.max(np.abs(dq) / accel)) + P
    figures.append(f"camera stopped: braking status {t_brake - t_last:.3f} s after the last "
                   f"image (timeout {T} s), |dq| {np.max(np.abs(dq)):.3f} rad/s, zero at "
                   f"{t_stop - t_last:.3f} s (bound {bound:.3f} s + delivery {2 * P:.3f} s)")
    assert t_brake >= t_last + T
    assert np.all(np.diff(speeds(after)) <= 1e-12), speeds(after)
    assert t_stop <= t_last + bound + 2 * P
    node.relay_mode = "pass"


def test_target_occluded_below_the_minimum_halts_too_few_features(cell, figures):
    """Two of the five dots covered mid-run leave three, below control.min_features = 4: the
    servo halts on the first such image (vservo_node/servo.py, Servo.observe). Bound: braking
    within three camera frames of the first occluded image (one frame of perception, one of
    queueing, one of slack; common practice, no source)."""
    cell.use(RELAYED)
    cell.return_to_start()
    node = cell.node
    run_id = _mid_run(cell)
    uv = node.features
    covered = np.argsort(uv[:, 0])[:2]                 # the two leftmost features
    x0, y0 = np.floor(uv[covered].min(axis=0) - 20).astype(int)
    x1, y1 = np.ceil(uv[covered].max(axis=0) + 20).astype(int)
    rest = np.delete(uv, covered, axis=0)
    inside = (rest[:, 0] >= x0) & (rest[:, 0] <= x1) & (rest[:, 1] >= y0) & (rest[:, 1] <= y1)
    assert len(uv) - 2 < cell.values["control.min_features"] and not inside.any(), (uv, x0, x1)
    node.relay_mode = (max(x0, 0), max(y0, 0), x1, y1)
    outcome = cell.finish(run_id)
    t_first = next(t for t, occluded in node.relayed if occluded)
    assert outcome.reason == "too_few_features", outcome.result
    t_brake = _status_time(node, "braking", "too_few_features", t_first)
    frame = 1.0 / cell.scenario.fps
    figures.append(f"occluded: braking {t_brake - t_first:.3f} s after the first occluded "
                   f"image ({(t_brake - t_first) / frame:.1f} frames)")
    # plus one output period per DDS delivery (relay -> controller -> here), as the
    # camera-stop test allows (common practice, no source)
    assert t_brake - t_first <= 3 * frame + 2.0 / cell.values["io.output_rate_hz"]
    node.relay_mode = "pass"


def test_hand_eye_believed_turned_half_a_turn_halts_wrong_direction(cell, figures,
                                                                      tmp_path_factory):
    """The controller believes the camera is mounted turned 180 deg about its optical axis:
    every commanded motion moves the features against the prediction of its image Jacobian
    (Chaumette & Hutchinson 2006, Part I, eq. 3-4: s' = L_s v_c; here v_c is mirrored in x
    and y). At tray_offset's start the translational and rotational feature flows of the
    servo's own motion nearly cancel, so a mirrored motion also looks like a depth error; the
    start nod (a turn about the camera centre, whose flow does not depend on depth, ibid.
    eq. 11) decides it. Measured here: the halt after 0.34 s (10 frames, braking included),
    the camera back within 0.01 mm, 0.06 deg of its start; without the nod: ~1.0 s, ~60 mm.
    Bounds (ours, no source): halted on wrong_direction, result time (decision + braking)
    within 15 frames, the camera within 5 mm and 1 deg of its start."""
    folder = tmp_path_factory.mktemp("wrong_direction")
    belief = write_scenario(folder, "tray_offset", "tray_offset_hand_eye_turned", {
        "controller_belief": {"hand_eye_error": {"rotation_deg": [0.0, 0.0, 180.0]}}})
    cell.use(CellSpec("tray_offset", controller_scenario=str(belief), relay=True))
    cell.return_to_start()
    T_start = cell.node.truth["camera"]
    outcome = cell.run()
    assert outcome.reason == "wrong_direction", outcome.result
    T_end = cell.node.truth["camera"]
    moved_mm = 1e3 * float(np.linalg.norm(T_end[:3, 3] - T_start[:3, 3]))
    turned_deg = math.degrees(Rotation.from_matrix(T_start[:3, :3].T @ T_end[:3, :3]).magnitude())
    frames = outcome.result["time_s"] * cell.scenario.fps
    figures.append(f"hand-eye turned 180 deg: wrong_direction after {outcome.result['time_s']:.3f}"
                   f" s ({frames:.1f} frames), camera moved {moved_mm:.2f} mm {turned_deg:.3f} deg")
    assert frames <= 15
    assert moved_mm < 5.0 and turned_deg < 1.0


def test_command_in_the_wrong_joint_order_halts_wrong_direction(cell, figures):
    """io.command_joint_order names two wrist joints the wrong way round: the node writes each
    joint's velocity into the other's slot of the command array, so the sim's drives move
    joints the servo did not command. The measured joints move as they were told, so the
    features agree with the image Jacobian; the follow check compares the joints' net travel
    with the commanded net travel (servo.py, Servo._following), first over the start nod's way
    out, which moves these wrist joints, and finds it pointing elsewhere. Measured headless:
    0.18 s (tests/test_direction_check.py). Bound (ours, no source): halted on wrong_direction
    within 0.6 s (the nod, its judgement at the turning point, braking, DDS), before the camera
    strayed 10 mm (measured 3.2 mm: the swapped wrist joints moved the camera off its centre)."""
    names = list(load_scenario("tray_offset").joint_names)
    names[4], names[5] = names[5], names[4]
    cell.use(CellSpec("tray_offset", extra=(("io", "command_joint_order", names),)))
    cell.return_to_start()
    T_start = cell.node.truth["camera"]
    outcome = cell.run()
    assert outcome.reason == "wrong_direction", outcome.result
    moved_mm = 1e3 * float(np.linalg.norm(cell.node.truth["camera"][:3, 3] - T_start[:3, 3]))
    figures.append(f"command joint order swapped: wrong_direction after "
                   f"{outcome.result['time_s']:.3f} s, camera moved {moved_mm:.1f} mm")
    assert outcome.result["time_s"] < 0.6
    assert moved_mm < 10.0


def _limited_arm(folder):
    """vs6_tray_offset with the joint that moves most from start to goal given a URDF limit
    0.02 rad beyond its taught value, inside limits.position_margin: the servo must drive
    that joint toward the limit and cannot reach the goal. Returns (scenario path, joint
    index, limit side, limit value)."""
    base = load_scenario("vs6_tray_offset")
    arm = base.arm_model()
    travel = np.where(arm.continuous, 0.0, base.q_start - base.q_taught)
    k = int(np.argmax(np.abs(travel)))
    side = "upper" if travel[k] < 0 else "lower"   # the goal lies above / below the start
    limit = base.q_taught[k] + (0.02 if side == "upper" else -0.02)
    tree = ET.parse(base.urdf_path)
    joint = next(j for j in tree.getroot().iter("joint") if j.get("name") == arm.joint_names[k])
    joint.find("limit").set(side, f"{limit:.6f}")
    urdf = folder / "vs6_limited.urdf"
    tree.write(urdf)
    home = yaml.safe_load((config_dir() / "robots" / "vs6_bench.yaml").read_text())["home"]
    names = base.joint_names
    path = write_scenario(folder, "vs6_tray_offset", "vs6_limit", {
        "robot": {"urdf": str(urdf), "base_frame": base.base_frame, "tool_frame": base.tool_frame,
                  "camera_frame": base.camera_frame, "home": home},
        "taught": {"joints": dict(zip(names, map(float, base.q_taught)))},
        "start": {"joints": dict(zip(names, map(float, base.q_start)))}})
    return path, k, side, limit


def test_arm_driven_toward_a_joint_limit_stops_before_it(cell, figures, tmp_path_factory):
    """The position envelope (vservo_node/control/safety.py: braking at the acceleration
    limit ends limits.position_margin short of the URDF limit) halts the run before the
    joint reaches its limit. The sim stops a joint that reaches a limit exactly at it, so
    a joint state at the limit would show the envelope failed. Bound: every joint of every
    joint state at least half the margin inside its limits (the other half is room for the
    drives' lag; common practice, no source)."""
    path, k, side, limit = _limited_arm(tmp_path_factory.mktemp("limit"))
    cell.use(CellSpec(str(path)))
    margin = cell.values["limits.position_margin"]
    outcome = cell.run()
    assert outcome.reason == "joint_limit_envelope", outcome.result
    arm = cell.scenario.arm_model()
    q = np.array([q for _, q in cell.node.joints])
    finite = ~arm.continuous
    room = np.minimum(q - arm.lower, arm.upper - q)[:, finite]
    closest = float(room[:, k].min())
    figures.append(f"joint limit: {arm.joint_names[k]} {side} limit {limit:.4f} rad, closest "
                   f"approach {closest:.4f} rad (margin {margin} rad), halted after "
                   f"{outcome.result['time_s']:.2f} s")
    assert room.min() > margin / 2, room.min(axis=0)

