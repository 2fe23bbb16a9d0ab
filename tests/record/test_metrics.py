"""Run metrics against closed forms and against a recomputation from the raw bag.

Runs are SYNTHETIC TEST DATA (synthetic.py): the error decays as exp(-lambda t) and the joints
as a exp(-lambda t), so the true values are known in closed form.
"""
from __future__ import annotations

import json
import math
import struct
from pathlib import Path

import numpy as np
import pinocchio as pin
import pytest
import yaml
from mcap.reader import make_reader

import synthetic as syn
from vservo_node import cli
from vservo_node.record.bag import load_run
from vservo_node.record.metrics import (DEFINITIONS, arm_of_run, command_of_run,
                                        compute_metrics, episode_figures, headline, ideal_decay,
                                        motion_of_run, overshoot_px, rebound, time_to_tolerance)


@pytest.fixture(scope="module")
def report_dir(recorded, tmp_path_factory):
    """The recorded run's report, made through the CLI as a user would."""
    out = tmp_path_factory.mktemp("report")
    assert cli.main(["report", str(recorded), "--out", str(out)]) == 0
    return out


def test_time_to_tolerance_matches_the_exponential_closed_form(recorded, spec):
    """Under e_dot = -lambda e the RMS error is e0 exp(-lambda t) (Chaumette & Hutchinson 2006,
    Part I, sec. II), so it reaches tol at ln(e0/tol)/lambda; records come every 1/30 s."""
    m = compute_metrics(load_run(recorded))
    assert m["converged"] is True
    assert m["initial_rms_px"] == pytest.approx(spec.rms0)
    assert m["time_to_tolerance_s"] >= spec.time_to_tolerance
    assert m["time_to_tolerance_s"] - spec.time_to_tolerance <= 1.0 / spec.status_hz + 1e-9
    assert m["t_start_s"] == pytest.approx(spec.t_start, abs=1e-6)


def test_ideal_decay_integrates_the_gain():
    """exp(-integral of lambda): constant gain gives exp(-lambda t); a gain linear in time,
    a + b t, gives exp(-(a t + b t^2 / 2)) (the trapezoid rule is exact for linear integrands)."""
    t = np.linspace(0.0, 3.0, 61)
    np.testing.assert_allclose(ideal_decay(t, np.full_like(t, 1.2), 40.0),
                               40.0 * np.exp(-1.2 * t), rtol=1e-12)
    np.testing.assert_allclose(ideal_decay(t, 0.5 + 0.4 * t, 10.0),
                               10.0 * np.exp(-(0.5 * t + 0.2 * t ** 2)), rtol=1e-12)


def test_time_to_tolerance_needs_the_error_to_stay_below():
    t = np.arange(6.0)
    assert time_to_tolerance(t, np.array([5, 0.4, 0.6, 0.3, 0.2, 0.1]), 0.5) == 3.0
    assert time_to_tolerance(t, np.array([5, 4, 3, 2, 1, 0.6]), 0.5) is None
    assert time_to_tolerance(t, np.array([0.1, np.nan, 0.2, 0.3, 0.2, 0.1]), 0.5) == 0.0


def test_overshoot_of_a_second_order_response():
    """Each error component follows e0 (1 - y(t)), y the unit step response of an underdamped
    second-order system; y peaks at 1 + Mp, Mp = exp(-zeta pi / sqrt(1 - zeta^2)) (Ogata,
    Modern Control Engineering, 5th ed., 2010, sec. 5-3), so the error overshoots by e0 Mp."""
    zeta, wn = 0.3, 4.0
    wd = wn * math.sqrt(1 - zeta ** 2)
    t = np.linspace(0, 5, 20001)
    y = 1 - np.exp(-zeta * wn * t) * (np.cos(wd * t) + zeta / math.sqrt(1 - zeta ** 2)
                                      * np.sin(wd * t))
    mp = math.exp(-zeta * math.pi / math.sqrt(1 - zeta ** 2))
    error = np.column_stack([12.0 * (1 - y), -30.0 * (1 - y), 5.0 * np.exp(-t)])
    assert overshoot_px(error) == pytest.approx(30.0 * mp, rel=1e-6)
    assert overshoot_px(error[:, 2:]) == 0.0


def test_peak_joint_speed_ratio_closed_form(recorded, spec):
    """Joint i moves as a_i exp(-lambda t'): its peak speed lambda |a_i| at the start; the limit
    in use is the URDF velocity x limits.joint_velocity_scale."""
    m = compute_metrics(load_run(recorded))
    limits = syn.urdf_velocity_limits()
    names = [f"vs6_j{i}" for i in range(1, 7)]
    ratios = [spec.gain * abs(a) / (limits[n] * spec.velocity_scale)
              for n, a in zip(names, spec.joint_offset)]
    assert m["peak_joint_speed_ratio"] == pytest.approx(max(ratios), rel=1e-9)
    assert m["peak_joint_speed_joint"] == names[int(np.argmax(ratios))]


def _pinocchio_positions(q_chain: np.ndarray, frame: str) -> np.ndarray:
    """Origin of ``frame`` in the URDF base_link, from pinocchio directly on the full URDF
    (gripper fingers at zero; continuous joints stored as (cos, sin))."""
    model = pin.buildModelFromUrdf(str(syn.URDF_PATH))
    data = model.createData()
    fid, base = model.getFrameId(frame), model.getFrameId("base_link")
    out = []
    for q in q_chain:
        cfg = pin.neutral(model)
        for i, value in enumerate(q):
            joint = model.joints[model.getJointId(f"vs6_j{i + 1}")]
            cfg[joint.idx_q:joint.idx_q + joint.nq] = (
                (math.cos(value), math.sin(value)) if joint.nq == 2 else (value,))
        pin.framesForwardKinematics(model, data, cfg)
        out.append((data.oMf[base].inverse() * data.oMf[fid]).translation.copy())
    return np.array(out)


def test_motion_against_pinocchio_and_finite_differences(recorded, spec):
    """Camera path equals pinocchio's forward kinematics of the URDF; the tool-point speed
    (Jacobian x joint speed) equals the finite-difference speed of pinocchio's tool origin."""
    run = load_run(recorded)
    motion = motion_of_run(run, arm_of_run(run))
    np.testing.assert_allclose(motion.camera_xyz,
                               _pinocchio_positions(motion.q, "camera_optical_frame"), atol=1e-9)
    tool = _pinocchio_positions(motion.q, "tool0")
    fd = np.linalg.norm(np.diff(tool, axis=0), axis=1) / np.diff(motion.t)
    mid = 0.5 * (motion.tool_speed[1:] + motion.tool_speed[:-1])
    moving = motion.t[1:] > spec.t_start + 0.02
    np.testing.assert_allclose(fd[moving], mid[moving], rtol=0.02, atol=1e-4)
    assert motion.tool_speed.max() > 0.05   # the check above ran on real motion


def _cdr_string(data: bytes) -> str:
    """std_msgs/String from CDR by hand: a 4-byte encapsulation header (0x00 0x01 = little-endian
    CDR), then a uint32 length counting the trailing NUL, then the characters (OMG CORBA 3.3
    Part 2, sec. 9.3 CDR, string type; OMG DDS-XTypes 1.3, sec. 7.6.3.1 encapsulation; from
    memory, confirmed here by every record parsing as JSON)."""
    assert data[:2] == b"\x00\x01"
    (n,) = struct.unpack_from("<I", data, 4)
    assert data[8 + n - 1] == 0
    return data[8:8 + n - 1].decode("utf8")


def _raw_status(bag_dir):
    """(log time ns, record) of every status message, read with the mcap package alone."""
    info = yaml.safe_load((bag_dir / "metadata.yaml").read_text())["rosbag2_bagfile_information"]
    rows = []
    for name in info["relative_file_paths"]:
        with open(bag_dir / name, "rb") as f:
            for _, _channel, msg in make_reader(f).iter_messages(topics=["/servo/status"]):
                rows.append((msg.log_time, json.loads(_cdr_string(msg.data))))
    return sorted(rows, key=lambda r: r[0]), info["starting_time"]["nanoseconds_since_epoch"]


def test_metrics_json_agrees_with_a_recomputation_from_the_raw_bag(report_dir, recorded, spec):
    metrics = json.loads((report_dir / "metrics.json").read_text())
    rows, start_ns = _raw_status(recorded)
    t = np.array([(s - start_ns) * 1e-9 for s, _ in rows])
    recs = [r for _, r in rows]
    k0 = next(i for i, r in enumerate(recs) if r["state"] == "servoing")
    rms = np.array([r["rms_px"] for r in recs])
    tol = yaml.safe_load((recorded / "params.yaml").read_text())["control.tolerance_px"]
    last_above = max(i for i in range(k0, len(recs)) if rms[i] > tol)
    acted: dict[str, int] = {}
    for r in recs:
        for name in r["limits_acted"]:
            acted[name] = acted.get(name, 0) + 1
    cycle = np.array([r["cycle_ms"] for r in recs])
    assert metrics["n_cycles"] == len(recs)
    assert metrics["t_start_s"] == pytest.approx(t[k0])
    assert metrics["initial_rms_px"] == pytest.approx(rms[k0])
    assert metrics["final_rms_px"] == pytest.approx(rms[-1])
    assert metrics["time_to_tolerance_s"] == pytest.approx(t[last_above + 1] - t[k0])
    assert metrics["limit_activations"] == acted == spec.acted
    assert metrics["n_halts"] == 0 and metrics["halts"] == []
    assert metrics["converged"] is (recs[-1]["state"] == "converged") is True
    assert metrics["cycle_ms_max"] == pytest.approx(cycle.max())
    assert metrics["cycle_ms_mean"] == pytest.approx(cycle.mean())
    # peak joint speed ratio from the raw commanded dq in the records as a cross-check: the
    # synthetic arm follows its command exactly
    limits = syn.urdf_velocity_limits()
    v = np.array([limits[f"vs6_j{i}"] for i in range(1, 7)]) * spec.velocity_scale
    peak = max(np.max(np.abs(r["dq"]) / v) for r in recs)
    assert metrics["peak_joint_speed_ratio"] == pytest.approx(peak, rel=1e-9)
    assert metrics["tool_speed_limit_m_s"] == spec.tool_speed_limit


def test_halted_run(halted, halted_spec):
    m = compute_metrics(load_run(halted))
    assert m["converged"] is False and m["reason"] == "image_stale"
    assert m["verdict"] == "halted"
    # a halted run has no time to converge and no overshoot (there was no arrival)
    assert m["time_to_converge_s"] is None and m["overshoot_pct"] is None
    # braking (halt_at after the start) lasts 0.2 s, then halted; records every 1/30 s
    assert m["time_to_halt_s"] == pytest.approx(halted_spec.halt_at + 0.2, abs=1 / 30 + 1e-9)
    assert m["n_halts"] == 1
    halt = m["halts"][0]
    assert halt["state"] == "braking" and halt["reason"] == "image_stale"
    assert abs(halt["t_s"] - (halted_spec.t_start + halted_spec.halt_at)) <= 1 / 30 + 1e-9
    assert m["time_to_tolerance_s"] is None
    # e0 exp(-lambda t) at the last record, lambda = 1/s, records until halt_at + 0.3 s
    last_t = halted_spec.t_start + halted_spec.halt_at + 0.3
    expected = halted_spec.rms0 * math.exp(-halted_spec.gain * (
        math.floor(last_t * 30 + 1e-9) / 30 - halted_spec.t_start))
    assert m["final_rms_px"] == pytest.approx(expected, rel=1e-9)


def test_time_to_converge_is_the_converged_record_minus_the_run_start(recorded, spec):
    """Converged at the first record after the error has stayed below tolerance for the dwell:
    ln(e0/tol)/lambda + dwell after the start, each on the 1/30 s record grid (so within two
    record periods), on the record's clock; the node's own time is kept beside it."""
    m = compute_metrics(load_run(recorded))
    assert m["verdict"] == "converged" and m["time_to_halt_s"] is None
    assert m["time_to_converge_s"] == pytest.approx(spec.time_to_tolerance + spec.dwell_s,
                                                    abs=2 / spec.status_hz + 1e-9)
    assert m["node_run_time_s"] == json.loads((recorded / "result.json").read_text())["time_s"]
    assert m["overshoot_pct"] == pytest.approx(0.0, abs=1e-9)   # exp decay: monotone
    rows = dict(headline(m))
    assert rows["verdict"] == f"converged in {m['time_to_converge_s']:.2f} s"


def test_rebound_is_the_classic_overshoot_of_a_scalar_response():
    """|e| of e0 (1 - y), y an underdamped second-order step response, dips to 0 and rises to
    e0 Mp, Mp = exp(-zeta pi / sqrt(1 - zeta^2)) (Ogata, Modern Control Engineering, 5th ed.,
    2010, sec. 5-3); an exponential decay does not rise at all."""
    zeta, wn = 0.3, 4.0
    wd = wn * math.sqrt(1 - zeta ** 2)
    t = np.linspace(0, 5, 20001)
    y = 1 - np.exp(-zeta * wn * t) * (np.cos(wd * t) + zeta / math.sqrt(1 - zeta ** 2)
                                      * np.sin(wd * t))
    mp = math.exp(-zeta * math.pi / math.sqrt(1 - zeta ** 2))
    # on the 0.25 ms grid |e| dips to ~3e-4, not to 0: hence 1e-3, not 1e-6
    assert rebound(np.abs(12.0 * (1 - y))) == pytest.approx(12.0 * mp, rel=1e-3)
    assert rebound(5.0 * np.exp(-t)) == 0.0


def test_command_acceleration_is_the_change_over_the_longer_of_period_and_gap():
    """dq steps of 0.024 rad/s every 8 ms are 3 rad/s^2; one command lost on the way (16 ms
    gap, 0.048 step) still reads 3 rad/s^2, not 6."""
    from vservo_node.record.bag import RunData, Series
    from vservo_node.record.bag import _status_table
    t = np.array([0.0, 0.008, 0.016, 0.032, 0.040])
    dq = np.array([[0.0], [0.024], [0.048], [0.096], [0.120]])
    run = RunData(path=Path("x"), start_ns=0, topics={}, status_t=np.zeros(0),
                  status=_status_table([]), joint_names=["j"], joint_t=np.zeros(0),
                  joint_position=np.zeros((0, 1)), joint_velocity=np.zeros((0, 1)),
                  joint_cmd=Series(t, dq), params={"io.output_rate_hz": 125.0})
    command = command_of_run(run, ["j"])
    assert command.period == pytest.approx(0.008)
    np.testing.assert_allclose(command.accel[:, 0], [3.0, 3.0, 3.0, 3.0])


def test_final_pose_error_from_the_truth_topics_against_scipy(halted):
    """Without a result's pose error, the last camera truth against the taught pose: distance
    by numpy, angle by SciPy's Rotation.magnitude of the relative rotation."""
    from scipy.spatial.transform import Rotation
    run = load_run(halted)
    run.result = {k: v for k, v in run.result.items() if not k.startswith("final_pose")}
    m = compute_metrics(run)
    goal, last = run.taught_pose.values[-1], run.camera_truth.values[-1]
    angle = (Rotation.from_quat(goal[3:]).inv() * Rotation.from_quat(last[3:])).magnitude()
    assert m["final_pose_error_mm"] == pytest.approx(1e3 * np.linalg.norm(last[:3] - goal[:3]))
    assert m["final_pose_error_deg"] == pytest.approx(math.degrees(angle))
    assert m["final_pose_error_mm"] > 1.0      # the halted run stopped away from its goal


def test_episode_figures_follow_the_record_definitions():
    """A headless episode's figures under the record's names: peak joint speed over the limit
    in use (EpisodeResult's is over the URDF limit), Cartesian peaks over their limits, and the
    time filed by verdict."""
    from types import SimpleNamespace
    values = {"limits.joint_velocity_scale": 0.5, "limits.tool_linear_speed": 0.1,
              "limits.camera_linear_speed": 0.08, "limits.angular_speed": 0.6}
    episode = SimpleNamespace(converged=True, reason="", time_s=6.2, initial_rms_px=80.0,
                              final_rms_px=0.1, pose_error_mm=0.2, pose_error_deg=0.05,
                              peak_joint_speed_ratio=0.3, peak_tool_speed=0.05,
                              peak_camera_speed=0.04, peak_angular_speed=0.3,
                              min_limit_margin=0.4, camera_depth_change_max=0.01)
    f = episode_figures(episode, values)
    assert f["peak_joint_speed_ratio"] == pytest.approx(0.6)
    assert f["peak_tool_speed_ratio"] == pytest.approx(0.5)
    assert f["peak_camera_speed_ratio"] == pytest.approx(0.5)
    assert f["peak_angular_speed_ratio"] == pytest.approx(0.5)
    assert f["time_to_converge_s"] == 6.2 and f["time_to_halt_s"] is None
    halted = episode_figures(SimpleNamespace(**{**vars(episode), "converged": False,
                                                "reason": "run_timeout"}), values)
    assert halted["time_to_converge_s"] is None and halted["time_to_halt_s"] == 6.2
    assert halted["reason"] == "run_timeout"
    assert all(k in DEFINITIONS for k in ("time_to_converge_s", "peak_joint_speed_ratio"))


def test_the_nodes_detail_and_pose_estimate_are_shown_when_present(halted):
    """Fields a newer node adds: ``detail`` (the check that fired) and the estimated pose error
    in the result, ``pose_error_mm``/``_deg`` in status records (the last one counts when the
    result has none). Older records simply lack them."""
    from vservo_node.record.bag import _status_table
    run = load_run(halted)
    assert compute_metrics(run)["estimated_pose_error_mm"] is None
    run.result = {**run.result, "detail": "image check: 4 frames against the prediction",
                  "estimated_pose_error_mm": 0.8, "estimated_pose_error_deg": 0.2,
                  "estimated_pose_error_spread_mm": 0.1}
    m = compute_metrics(run)
    assert m["detail"].startswith("image check") and m["estimated_pose_error_spread_mm"] == 0.1
    rows = dict(headline(m))
    assert rows["what fired"] == m["detail"]
    assert rows["pose error (node's estimate)"] == "0.800 mm, 0.200 deg"
    records = [{"t": 0.0, "state": "servoing", "pose_error_mm": 3.0, "pose_error_deg": 1.0,
                "detail": ""},
               {"t": 0.1, "state": "servoing", "pose_error_mm": 2.5, "pose_error_deg": None,
                "detail": "x"}]
    table = _status_table(records)
    assert table["pose_error_mm"].dtype == float and table["detail"].dtype == object
    run.status, run.status_t = table, np.array([0.0, 0.1])
    run.result = {"converged": False, "reason": "diverging"}
    m = compute_metrics(run)
    assert m["estimated_pose_error_mm"] == 2.5 and m["estimated_pose_error_deg"] == 1.0
