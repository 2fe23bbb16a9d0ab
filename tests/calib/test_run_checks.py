"""The hand-eye check and the loop-delay estimate on headless runs of the simulated cell, and
the same read back from a run record.

Outside checks: the simulated drives' configured latency and first-order lag (sim/arm.py;
a first-order lag follows a ramp its time constant behind: Ogata, Modern Control Engineering,
5th ed. 2010, sec. 5.2; from memory, confirmed by the runs here); the scenario's true and
believed hand-eye; the delay loop's gain bounds
against the roots of s + lambda exp(-s tau) = 0 from SciPy's Lambert W (Corless et al., "On the
Lambert W function", Adv. Comput. Math. 5, 1996) and a direct simulation of the delay equation.
"""
from __future__ import annotations

import dataclasses
import math
import sys
from pathlib import Path

import numpy as np
import pytest
from scipy.special import lambertw

sys.path.insert(0, str(Path(__file__).parent))
import calib_bags

from vservo_node.calib import handeye as he
from vservo_node.calib.check import LARGE_ERROR_DEG, check_hand_eye
from vservo_node.calib.delay import estimate_delay
from vservo_node.calib.trace import TraceRecorder, trace_from_run
from vservo_node.commands.handeye import scenario_trace
from vservo_node.episode import episode_params, run_scenario_episode
from vservo_node.record.bag import load_run
from vservo_node.sim import load_scenario

OUTPUT_PERIOD_S = 1.0 / 125.0


@pytest.mark.parametrize("lag, latency", [(None, None), (0.05, 0.03), (0.005, 0.08)])
def test_delay_matches_the_drives_configured_latency_and_lag(lag, latency):
    trace, result, sc = scenario_trace("tray_offset", sensing="projected", lag=lag,
                                       latency=latency)
    assert result.converged
    est = estimate_delay(trace, OUTPUT_PERIOD_S)
    configured = sc.arm_dynamics.command_latency_s + sc.arm_dynamics.velocity_lag_s
    # the requirement: within 10 ms; the drives act at the next 1 ms cycle boundary
    assert abs(est.delay_s - configured) < 0.010, (est.delay_s, configured)
    assert est.reliable
    assert est.loop_delay_s == pytest.approx(est.delay_s + OUTPUT_PERIOD_S)


def test_a_pure_delay_alone_under_reads_a_long_lag():
    """Why the search includes a first-order lag: with the lag 50 ms the best pure delay is
    shorter than latency + lag (phase delay atan(w T)/w < T)."""
    trace, _, _sc = scenario_trace("tray_offset", sensing="projected", lag=0.05, latency=0.03)
    pure = estimate_delay(trace, OUTPUT_PERIOD_S, lags_s=(0.0,))
    assert pure.delay_s < 0.08 - 0.005


def test_gain_bounds_are_those_of_the_delay_equation():
    """de/dt = -lambda e(t - tau): roots s = W_k(-lambda tau)/tau; the principal branch is real
    up to lambda tau = 1/e and the rightmost root crosses into the right half plane at pi/2."""
    tau = 0.1
    for lt, real in ((0.99 / math.e, True), (1.01 / math.e, False)):
        s0 = lambertw(-lt, 0) / tau
        assert (abs(s0.imag) < 1e-9) == real
    for lt, stable in ((1.5, True), (1.65, False)):
        s0 = lambertw(-lt, 0) / tau
        assert (s0.real < 0) == stable
        # and the equation itself, stepped at 0.1 ms from e = 1
        dt, n_delay = 1e-4, int(tau / 1e-4)
        e = np.ones(n_delay + 1)
        hist = list(e)
        for _ in range(int(6.0 / dt)):
            hist.append(hist[-1] - dt * lt / tau * hist[-1 - n_delay])
        late = np.abs(hist[-int(1.0 / dt):]).max()
        assert (late < 0.5) == stable


def _wrong(deg, mm):
    return np.array([0.6, -0.8, 0.0]) * deg, (mm, 0.0, mm / 2)


@pytest.mark.parametrize("deg, mm", [(20.0, 30.0), (5.0, 10.0)])
def test_check_finds_the_believed_hand_eye_error(deg, mm):
    """A 20 deg / 30 mm error halts the run (wrong_direction) and is named as its likely
    cause; a 5 deg / 10 mm one converges and is not. The estimated rotation error is the
    scenario's within three standard deviations plus 0.3 deg."""
    rotvec, t = _wrong(deg, mm)
    trace, result, sc = scenario_trace("tray_offset", rotvec, t, sensing="projected")
    check = check_hand_eye(trace)
    E_true = np.linalg.inv(sc.T_tool_camera_belief) @ sc.T_tool_camera_true
    _, rot_err = he.pose_difference(E_true, check.E)
    assert rot_err < 3 * check.rotation_std_deg + 0.3, (rot_err, check.rotation_std_deg)
    assert check.large == (deg >= LARGE_ERROR_DEG)
    assert ("wrong_direction" in check.verdict()) == (deg >= LARGE_ERROR_DEG)
    assert result.converged == (deg < LARGE_ERROR_DEG)
    # the corrected hand-eye is nearer the truth in rotation than the believed one
    assert (he.pose_difference(sc.T_tool_camera_true, check.corrected)[1]
            < 0.2 * he.pose_difference(sc.T_tool_camera_true, sc.T_tool_camera_belief)[1])


def test_check_and_delay_read_the_same_from_a_run_record(tmp_path):
    rotvec, t = _wrong(8.0, 10.0)
    sc = load_scenario("tray_offset")
    from scipy.spatial.transform import Rotation

    from vservo_node.control import frames

    E = frames.transform(Rotation.from_rotvec(np.radians(rotvec)).as_matrix(),
                         np.asarray(t) / 1e3)
    sc = dataclasses.replace(sc, T_tool_camera_belief=sc.T_tool_camera_true @ E)
    rec = TraceRecorder(sc.arm_model("belief"), sc.camera, sc.target)
    run_scenario_episode(sc, sensing="projected", trace=rec)
    values = episode_params(sc.controller, camera_rate_hz=sc.fps)
    bag = calib_bags.write_run_bag(tmp_path, sc, rec, values)
    from_bag = trace_from_run(load_run(bag))
    direct = rec.trace()
    assert from_bag.n_frames == direct.n_frames
    assert np.abs(from_bag.xy - direct.xy).max() < 1e-6
    check_bag, check_direct = check_hand_eye(from_bag), check_hand_eye(direct)
    # the record's check first finds how far the features lag the joints (here 0: the same
    # times; measured 1.5 ms), which moves the estimate within its own uncertainty
    assert abs(check_bag.image_lag_s) < 0.003
    assert abs(check_bag.rotation_deg - check_direct.rotation_deg) < 2 * check_bag.rotation_std_deg
    assert abs(check_bag.rotation_deg - 8.0) < 3 * check_bag.rotation_std_deg + 0.3
    d_bag = estimate_delay(from_bag, OUTPUT_PERIOD_S)
    configured = sc.arm_dynamics.command_latency_s + sc.arm_dynamics.velocity_lag_s
    assert abs(d_bag.delay_s - configured) < 0.010


def test_the_run_report_shows_the_check_and_the_delay(tmp_path):
    from vservo_node.record.report import write_report

    rotvec, t = _wrong(20.0, 30.0)
    trace, _, sc = scenario_trace("tray_offset", rotvec, t, sensing="projected")
    rec = TraceRecorder(sc.arm_model("belief"), sc.camera, sc.target)
    rec.frames = [(tt, xy, z, q) for tt, xy, z, q in zip(trace.t, trace.xy, trace.depth, trace.q)]
    rec.commands = list(zip(trace.t_cmd, trace.dq_cmd))
    rec.keys = tuple(sc.target.keys())
    bag = calib_bags.write_run_bag(tmp_path, sc, rec, episode_params(sc.controller,
                                                                     camera_rate_hz=sc.fps))
    page, _ = write_report(bag, tmp_path / "report")
    text = page.read_text()
    assert "Cell geometry" in text and "likely cause of a wrong_direction" in text
    assert "control.loop_delay_s" in text


def test_a_loaded_nodes_late_features_are_put_back_at_their_capture(tmp_path):
    """Features published 10-120 ms after capture (measured 18-168 ms on this loaded machine
    over DDS): the status records' image stamps put them back; the delay is the drives' again
    and the median perception time is added to control.loop_delay_s."""
    rotvec, t = _wrong(20.0, 30.0)
    trace, _, sc = scenario_trace("tray_offset", rotvec, t, sensing="projected")
    rec = TraceRecorder(sc.arm_model("belief"), sc.camera, sc.target)
    rec.frames = [(tt, xy, z, q) for tt, xy, z, q in zip(trace.t, trace.xy, trace.depth, trace.q)]
    rec.commands = list(zip(trace.t_cmd, trace.dq_cmd))
    rec.keys = tuple(sc.target.keys())
    # a node perceives one frame after the other: publication k+1 follows publication k
    published = trace.t + np.random.default_rng(3).uniform(0.010, 0.120, trace.n_frames)
    published = np.maximum.accumulate(published - np.arange(trace.n_frames) * 2e-3) + \
        np.arange(trace.n_frames) * 2e-3
    late = published - trace.t
    bag = calib_bags.write_run_bag(tmp_path, sc, rec,
                                   episode_params(sc.controller, camera_rate_hz=sc.fps), late)
    from_bag = trace_from_run(load_run(bag))
    assert np.abs(from_bag.t - trace.t).max() < 1e-6
    assert np.abs(from_bag.perception_s - late).max() < 1e-6
    check = check_hand_eye(from_bag)
    assert check.large and abs(check.rotation_deg - 20.0) < 3 * check.rotation_std_deg + 0.3
    d = estimate_delay(from_bag, OUTPUT_PERIOD_S)
    configured = sc.arm_dynamics.command_latency_s + sc.arm_dynamics.velocity_lag_s
    assert abs(d.delay_s - configured) < 0.010
    assert d.loop_delay_s == pytest.approx(d.delay_s + np.median(late) + OUTPUT_PERIOD_S)


def test_fixed_camera_check_and_delay():
    """A camera on a stand believed 15 deg / 20 mm off (vs6_stand_offset): the run halts
    wrong_direction and the check reads the stand's error (the eye-to-hand Jacobian of
    control/mounting.py); with the true stand it reads near zero; the delay is the drives'."""
    trace, result, sc = scenario_trace("vs6_stand_offset", [9.0, 12.0, 0.0], [20.0, 0.0, 0.0],
                                       sensing="projected")
    check = check_hand_eye(trace)
    assert check.parameter == "robot.fixed_camera_pose" and check.large
    E_true = np.linalg.inv(sc.mount("belief").T_base_camera) @ sc.mount("true").T_base_camera
    assert he.pose_difference(E_true, check.E)[1] < 3 * check.rotation_std_deg + 0.3
    assert not result.converged
    trace, result, sc = scenario_trace("vs6_stand_offset", sensing="projected")
    assert result.converged
    check = check_hand_eye(trace)
    assert check.rotation_deg < 3 * check.rotation_std_deg + 0.3
    est = estimate_delay(trace, OUTPUT_PERIOD_S)
    configured = sc.arm_dynamics.command_latency_s + sc.arm_dynamics.velocity_lag_s
    assert abs(est.delay_s - configured) < 0.010
