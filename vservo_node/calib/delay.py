"""The loop delay of a cell from a recorded run: when does commanded motion show in the image?

Between two frames at ``t_a``, ``t_b`` the features moved by ``ds`` (observed). Had the arm
followed the command with a delay ``tau``, the joints would have moved by
``dq(tau) = Q(t_b - tau) - Q(t_a - tau)``, with ``Q`` the integral of the commanded joint
velocities (each command held until the next), and the features by ``M dq(tau)`` with
``M = L(x, y, Z) Ad(inv(X^)) J_tool(q)`` (point interaction matrix, Chaumette & Hutchinson,
IEEE RAM 2006, eq. 11; the believed hand-eye; the URDF chain) evaluated at the measured state.
The delay is the ``tau`` that maximises the normalized cross-correlation
``sum <ds, M dq(tau)> / sqrt(sum |ds|^2 sum |M dq(tau)|^2)`` over the run's frame pairs (the
start nod included), searched on a 1 ms grid and refined to below the grid by the vertex of
the parabola through the peak and its two neighbours (sub-sample interpolation of a
correlation peak: common practice, no source). The same search between the command and the reported
joint motion gives the drives' part alone; their difference is how far the images lag the
joint states (camera latency, or stamps taken late).

Drives follow a velocity command with a pure delay and a lag. A first-order lag of time
constant ``T`` follows a ramp ``T`` behind (Ogata, Modern Control Engineering, 5th ed. 2010,
sec. 5.2, unit-ramp response: the error tends to ``T``; from memory, and measured by
tests/calib/test_run_checks.py) but a faster motion such as the start
nod by less (phase delay ``atan(w T) / w``), so a pure delay alone under-reads a long lag
(measured: 68.7 ms for 30 ms + 50 ms). The search therefore also passes the command through a
first-order lag (``LAGS_S``, 5 ms steps) and keeps the lag and delay of the best correlation;
the delay reported is their sum, the figure to compare with a simulated cell's
``command_latency_s + velocity_lag_s``.

The ``control.loop_delay_s`` to configure is that delay, plus the median time from capture
to the features (a record whose status records carry the image stamps: calib/trace.py,
``capture_times``; 0 for a headless episode, which perceives at the frame time), plus one
output period (a new image acts on the command at the next output tick at the latest). The
gain bound printed with it:

- the node's own check (params.py, ``DELAY_GAIN_BOUND``): ``gain x (loop delay + 1/camera
  rate) < 0.3`` (common practice, no source);
- the continuous loop ``de/dt = -lambda e(t - tau)`` with ``tau`` = loop delay + frame period:
  its characteristic equation ``s + lambda exp(-s tau) = 0`` has the roots
  ``s = W_k(-lambda tau) / tau`` (Lambert W: Corless et al., "On the Lambert W function", Adv.
  Comput. Math. 5, 1996, among its applications; from memory); the response is free of
  oscillation (real dominant root) while ``lambda tau <= 1/e`` and stable while
  ``lambda tau < pi/2`` (the gain at which the phase margin ``pi/2 - lambda tau`` of
  ``lambda exp(-s tau) / s`` vanishes). Both are checked numerically in
  tests/calib/test_delay.py.
"""
from __future__ import annotations

import math
from dataclasses import dataclass

import numpy as np
from scipy.signal import lfilter

from vservo_node.control.interaction import point_interaction_matrix
from vservo_node.params import DELAY_GAIN_BOUND

SEARCH_S = (-0.05, 0.5)
GRID_S = 0.001
LAGS_S = tuple(np.round(np.arange(0.0, 0.1001, 0.005), 3))
# below this normalized correlation at the peak the run says too little about the delay
# (common practice, no source)
MIN_CORRELATION = 0.8


@dataclass
class DelayEstimate:
    """``delay_s``: command -> image motion; ``drives_s``: command -> reported joint motion (NaN
    without joint motion); ``correlation`` at the peak; ``loop_delay_s`` the value to
    configure; ``output_period_s`` and ``frame_period_s`` used; the gain bounds (1/s)."""

    delay_s: float
    correlation: float
    drives_s: float
    loop_delay_s: float
    output_period_s: float
    frame_period_s: float
    n_pairs: int
    latency_s: float = math.nan
    lag_s: float = 0.0
    perception_s: float = 0.0          # median capture -> features published (records)
    perception_p95_s: float = 0.0

    @property
    def loop_s(self) -> float:
        return self.loop_delay_s + self.frame_period_s

    @property
    def gain_bound_node(self) -> float:
        return DELAY_GAIN_BOUND / self.loop_s

    @property
    def gain_bound_no_oscillation(self) -> float:
        return 1.0 / (math.e * self.loop_s)

    @property
    def gain_bound_stable(self) -> float:
        return math.pi / (2.0 * self.loop_s)

    @property
    def reliable(self) -> bool:
        return self.correlation >= MIN_CORRELATION

    def lines(self) -> list[str]:
        out = [(f"command -> image motion: {1e3 * self.delay_s:.1f} ms = pure delay "
                f"{1e3 * self.latency_s:.1f} ms + first-order lag {1e3 * self.lag_s:.0f} ms "
                f"(correlation {self.correlation:.4f} over {self.n_pairs} frame pairs)")]
        if math.isfinite(self.drives_s):
            out.append(f"command -> reported joint motion: {1e3 * self.drives_s:.1f} ms (images "
                       f"lag the joint states by {1e3 * (self.delay_s - self.drives_s):.1f} ms)")
        if self.perception_s:
            out.append(f"capture -> features published: median {1e3 * self.perception_s:.1f} ms "
                       f"(95th percentile {1e3 * self.perception_p95_s:.1f} ms)")
        out.append(f"control.loop_delay_s: {self.loop_delay_s:.3f}   (delay"
                   + (" + median perception" if self.perception_s else "")
                   + f" + one output period {1e3 * self.output_period_s:.1f} ms)")
        out.append(f"gain bound with the frame period {1e3 * self.frame_period_s:.1f} ms: "
                   f"max(control.gain_near, gain_far) < {self.gain_bound_node:.2f} 1/s (the "
                   f"node's check, gain x loop < {DELAY_GAIN_BOUND}); no oscillation below "
                   f"{self.gain_bound_no_oscillation:.2f} 1/s, unstable from "
                   f"{self.gain_bound_stable:.2f} 1/s (de/dt = -gain e(t - loop))")
        if not self.reliable:
            out.append(f"warning: correlation below {MIN_CORRELATION}: the run moved too little "
                       "or the features are too noisy for a delay")
        return out

    def as_dict(self) -> dict:
        return {"delay_s": self.delay_s, "correlation": self.correlation,
                "drives_s": self.drives_s, "loop_delay_s": self.loop_delay_s,
                "output_period_s": self.output_period_s, "frame_period_s": self.frame_period_s,
                "latency_s": self.latency_s, "lag_s": self.lag_s,
                "perception_s": self.perception_s, "perception_p95_s": self.perception_p95_s,
                "gain_bound_node": self.gain_bound_node,
                "gain_bound_no_oscillation": self.gain_bound_no_oscillation,
                "gain_bound_stable": self.gain_bound_stable, "n_pairs": self.n_pairs,
                "reliable": self.reliable}


def command_integral(t_cmd, dq_cmd):
    """``Q(t)``: the integral of held commands, as a function of time (n per row)."""
    t_cmd = np.asarray(t_cmd, dtype=float)
    dq = np.nan_to_num(np.asarray(dq_cmd, dtype=float))
    order = np.argsort(t_cmd, kind="stable")
    t_cmd, dq = t_cmd[order], dq[order]
    steps = np.diff(t_cmd)[:, None] * dq[:-1]
    Q = np.vstack([np.zeros((1, dq.shape[1])), np.cumsum(steps, axis=0)])

    def at(t):
        t = np.asarray(t, dtype=float)
        out = np.column_stack([np.interp(t, t_cmd, Q[:, j]) for j in range(Q.shape[1])])
        after = t > t_cmd[-1]       # the last command holds
        out[after] += (t[after] - t_cmd[-1])[:, None] * dq[-1]
        return out
    return at


def lagged_integral(t_cmd, dq_cmd, lag_s: float, step_s: float = 0.001):
    """``Q(t)`` of the commands passed through a first-order lag of time constant ``lag_s``
    (exact step response over ``step_s`` steps of a held reference: Ogata 2010, sec. 5.2);
    ``lag_s`` 0 is :func:`command_integral`."""
    if lag_s <= 0:
        return command_integral(t_cmd, dq_cmd)
    t_cmd = np.asarray(t_cmd, dtype=float)
    dq = np.nan_to_num(np.asarray(dq_cmd, dtype=float))
    order = np.argsort(t_cmd, kind="stable")
    t_cmd, dq = t_cmd[order], dq[order]
    grid = np.arange(t_cmd[0], t_cmd[-1] + 5.0 * lag_s + step_s, step_s)
    held = dq[np.clip(np.searchsorted(t_cmd, grid, side="right") - 1, 0, len(t_cmd) - 1)]
    alpha = math.exp(-step_s / lag_s)
    # v[i] = alpha v[i-1] + (1 - alpha) held[i-1], v[0] = 0 (SciPy lfilter, one pass per joint)
    v = np.zeros_like(held)
    v[1:] = lfilter([1.0 - alpha], [1.0, -alpha], held[:-1], axis=0)
    Q = np.vstack([np.zeros((1, dq.shape[1])),
                   np.cumsum(0.5 * (v[1:] + v[:-1]) * step_s, axis=0)])

    def at(t):
        t = np.asarray(t, dtype=float)
        return np.column_stack([np.interp(t, grid, Q[:, j]) for j in range(Q.shape[1])])
    return at


def _peak(taus, scores) -> tuple[float, float]:
    i = int(np.nanargmax(scores))
    if 0 < i < len(scores) - 1 and np.isfinite(scores[i - 1:i + 2]).all():
        a, b, c = scores[i - 1], scores[i], scores[i + 1]
        den = a - 2 * b + c
        shift = 0.5 * (a - c) / den if den < 0 else 0.0
        return float(taus[i] + shift * (taus[1] - taus[0])), float(b - 0.25 * (a - c) * shift)
    return float(taus[i]), float(scores[i])


def _search(observed, predict, taus) -> tuple[float, float]:
    """Peak of the normalized cross-correlation of observed (K, m) with predict(tau) (K, m)."""
    no = math.sqrt(float(np.sum(observed ** 2)))
    scores = np.full(len(taus), np.nan)
    for i, tau in enumerate(taus):
        p = predict(tau)
        npred = math.sqrt(float(np.sum(p ** 2)))
        if npred > 0 and no > 0:
            scores[i] = float(np.sum(observed * p)) / (no * npred)
    if not np.isfinite(scores).any():
        raise ValueError("no commanded motion in the run: nothing to correlate")
    return _peak(taus, scores)


def frame_pair_motion(trace, correction=None):
    """Per pair of consecutive frames with every feature, depth and joint finite: the image
    Jacobian at the pair's midpoint (interaction matrix @ ``correction`` @ camera Jacobian),
    the feature motion seen, both frame times and the pair's index k, as arrays
    ``(M (K, 2m, n), d (K, 2m), t_a, t_b, k)``; ValueError under 3 pairs."""
    Ms, ds, pairs = [], [], []
    for k in range(trace.n_frames - 1):
        xy_mid = 0.5 * (trace.xy[k] + trace.xy[k + 1])
        Z = 0.5 * (trace.depth[k] + trace.depth[k + 1])
        q_mid = 0.5 * (trace.q[k] + trace.q[k + 1])
        if not (np.isfinite(xy_mid).all() and np.isfinite(Z).all() and np.all(Z > 0)
                and np.isfinite(q_mid).all()):
            continue
        J = trace.camera_jacobian(q_mid)
        Ms.append(point_interaction_matrix(xy_mid, Z) @ (J if correction is None
                                                          else correction @ J))
        ds.append((trace.xy[k + 1] - trace.xy[k]).ravel())
        pairs.append(k)
    if len(ds) < 3:
        raise ValueError(f"{len(ds)} frame pairs with all features and depths; expected 3 or "
                         "more")
    k = np.array(pairs)
    return np.array(Ms), np.array(ds), trace.t[k], trace.t[k + 1], k


def estimate_delay(trace, output_period_s: float, frame_period_s: float | None = None,
                   search_s=SEARCH_S, lags_s=LAGS_S) -> DelayEstimate:
    """The delay of a run's trace (module doc). ``output_period_s``: 1 / io.output_rate_hz;
    ``frame_period_s``: default the median frame interval; ``lags_s``: the first-order lags
    tried (``(0.0,)``: a pure delay only)."""
    Ms, ds, ta, tb, pairs = frame_pair_motion(trace)
    dq_meas = trace.q[pairs + 1] - trace.q[pairs]
    taus = np.arange(search_s[0], search_s[1] + GRID_S / 2, GRID_S)
    best = None
    for lag in lags_s:
        Q = lagged_integral(trace.t_cmd, trace.dq_cmd, lag)

        def image_motion(tau, Q=Q):
            return np.einsum("kij,kj->ki", Ms, Q(tb - tau) - Q(ta - tau))
        latency, corr = _search(ds, image_motion, taus)
        if best is None or corr > best[2] + 1e-9:
            best = (lag, latency, corr, Q)
    lag, latency, corr, Q = best
    delay = latency + lag
    try:
        drives, _ = _search(dq_meas, lambda tau: Q(tb - tau) - Q(ta - tau), taus)
        drives += lag
    except ValueError:
        drives = math.nan
    frame = (float(np.median(np.diff(trace.t))) if frame_period_s is None
             else float(frame_period_s))
    perception = p95 = 0.0
    if trace.perception_s is not None and np.isfinite(trace.perception_s).any():
        perception = float(np.nanmedian(trace.perception_s))
        p95 = float(np.nanpercentile(trace.perception_s, 95))
    return DelayEstimate(delay, corr, drives, max(delay, 0.0) + perception + output_period_s,
                         float(output_period_s), frame, len(ds), latency, lag, perception, p95)
