"""Figures of one time series of a record: the ideal decay, time to a tolerance, rebound,
overshoot, halt events, limit activations, ratios to a limit (vservo_node.record.metrics)."""
from __future__ import annotations

import math
from collections import Counter

import numpy as np

from vservo_node.interface import HALT_STATES


def ideal_decay(t: np.ndarray, gain: np.ndarray, rms0: float) -> np.ndarray:
    """RMS error of the ideal closed loop e_dot = -lambda(t) e from rms0 at t[0]:
    rms0 exp(-integral of lambda dt) (Chaumette & Hutchinson 2006, Part I, sec. II: exponential
    decoupled decrease), the integral by the trapezoid rule over the recorded gains."""
    lam = np.nan_to_num(np.asarray(gain, float))
    integral = np.concatenate(([0.0], np.cumsum(0.5 * (lam[1:] + lam[:-1]) * np.diff(t))))
    return rms0 * np.exp(-integral)


def time_to_tolerance(t: np.ndarray, rms: np.ndarray, tol: float) -> float | None:
    """Time from t[0] until the RMS error enters [0, tol] for good (it stays there for the rest
    of the records): the settling-time idea of a step response. None if it ends above tol."""
    ok = np.isfinite(rms)
    t, rms = t[ok], rms[ok]
    if rms.size == 0 or rms[-1] > tol:
        return None
    above = np.flatnonzero(rms > tol)
    k = above[-1] + 1 if above.size else 0
    return float(t[k] - t[0])


def rebound(rms: np.ndarray) -> float:
    """Largest rise of a non-negative error signal above its lowest value so far (same unit):
    0 for a monotone decrease. For a scalar error that passes zero it is the classic overshoot
    (the excursion past the goal), so ``100 * rebound / initial`` is the overshoot in %."""
    r = np.asarray(rms, float)
    r = r[np.isfinite(r)]
    if r.size == 0:
        return 0.0
    return float(np.max(r - np.minimum.accumulate(r)))


def overshoot_px(error: np.ndarray) -> float:
    """Largest excursion (px) of any feature-error component past zero, to the side opposite
    its first finite value, error (T, 2N). Meaningful for straight approaches only (a turn
    about the optical axis moves points on arcs, whose components cross zero by design); the
    run's headline overshoot is :func:`rebound` of the RMS error."""
    worst = 0.0
    for column in np.asarray(error, float).T:
        finite = column[np.isfinite(column)]
        if finite.size and finite[0] != 0:
            worst = max(worst, float(np.max(-np.sign(finite[0]) * finite)))
    return worst


def halt_events(t: np.ndarray, states: np.ndarray, reasons: np.ndarray,
                details: np.ndarray | None = None) -> list[dict]:
    """Entries into braking/halted from any other state: [{t_s, state, reason, detail}]."""
    events, previous = [], None
    details = details if details is not None else [None] * len(t)
    for ti, state, reason, detail in zip(t, states, reasons, details):
        if state in HALT_STATES and previous not in HALT_STATES:
            events.append({"t_s": float(ti), "state": str(state), "reason": reason or "",
                           "detail": detail or ""})
        previous = state
    return events


def limit_activations(limits_acted: np.ndarray) -> dict[str, int]:
    """Number of status records in which each limit shaped the command."""
    return dict(Counter(name for acted in limits_acted for name in (acted or [])))


def _num(x) -> float | None:
    """JSON-friendly float: None for NaN/inf/None."""
    if x is None:
        return None
    x = float(x)
    return x if math.isfinite(x) else None


def ratio(peak, limit) -> float | None:
    """peak / limit; None when either is unknown or the limit is not positive."""
    if peak is None or limit is None or not limit > 0:
        return None
    return _num(peak / limit)
