"""IBVS control law on a given image Jacobian: DLS solve, gain schedule, soft start, null space.

Pure functions and small classes on NumPy arrays; the caller supplies the Jacobians.

Quantities and units
--------------------
* ``error`` e = s - s* (2N,): stacked normalized image coordinates ``[x1, y1, x2, y2, ...]``
  (dimensionless, camera optical frame), current minus taught.
* ``J_img`` (2N x n): image Jacobian, s_dot = J_img @ dq, i.e. L (2N x 6) times the twist
  transform and tool Jacobian; units 1/rad (per joint velocity in rad/s gives 1/s).
* ``dq`` (n,): joint velocity command in rad/s (m/s for prismatic joints).
* ``rms_px``: root-mean-square feature error in pixels, used only by the gain schedule.

The law
-------
The desired error rate is (Mansard & Chaumette 2007, soft start)::

    e_dot* = -lambda(rms_px) * (e - e0 * exp(-(t - t0) / tau))

and the command is ``dq = J# e_dot* + (1 - w) * k * (I - J# J) * (-grad H(q))`` with
``w = exp(-(t - t0)/tau)``, J# the damped least-squares inverse of J_img (Wampler 1986;
Nakamura & Hanafusa 1986) and H the joint-limit distance cost (Liegeois 1977). Without soft
start and without the secondary task this is the classical IBVS law dq = -lambda J# e
(Chaumette & Hutchinson 2006, sec. on IBVS).

Singularity judgement
---------------------
J_img factors through the 6-dof camera twist, so its rank is at most
``task_rank = min(6, 2N, n)``. The damping is judged on the singular value of that index
(the 6th for N >= 3 points and n >= 6 joints): for a 7-joint arm the 7th singular value is
structurally zero (round-off) and must not trigger damping; singular values past the rank
bound are dropped as round-off. A caller that knows better (e.g. the product
sigma_6(L) * sigma_6(twist transform @ J_tool), a lower bound of sigma_6(J_img) when both
factors have full rank) may pass ``sigma_judge`` explicitly.
"""
from __future__ import annotations

from dataclasses import dataclass, field

import numpy as np

from vservo_node.params import default

#: Rank bound of an image Jacobian: it maps joint rates through a 6-dof camera twist.
CAMERA_TWIST_DOF = 6


def _raise_if(problems: list[str], what: str) -> None:
    if problems:
        raise ValueError(f"invalid {what}: " + "; ".join(problems))


def _positive(name: str, value: float) -> list[str]:
    if not (np.isfinite(value) and value > 0):
        return [f"{name} = {value!r}; expected a finite value > 0"]
    return []


# --------------------------------------------------------------------------------------------
# Damped least squares
# --------------------------------------------------------------------------------------------
@dataclass(frozen=True)
class DampingSchedule:
    """When and how much to damp the least-squares solve.

    ``mu^2 = 0`` while the judged singular value ``sigma >= epsilon``, else
    ``mu^2 = mu_max^2 * (1 - (sigma/epsilon)^2)``: continuous at epsilon, mu_max at sigma = 0
    (common practice, no source). ``epsilon`` and ``mu_max`` are in the units of the singular
    values of J_img (normalized image units per rad).
    ``task_rank``: rank bound of the task (6 for an image Jacobian, see module docstring).
    """

    epsilon: float = default("control.singular_threshold")
    mu_max: float = default("control.max_damping")
    task_rank: int = CAMERA_TWIST_DOF

    def __post_init__(self) -> None:
        _raise_if(self.problems(), "DampingSchedule")

    def problems(self) -> list[str]:
        out = _positive("epsilon", self.epsilon) + _positive("mu_max", self.mu_max)
        if not (isinstance(self.task_rank, (int, np.integer)) and self.task_rank >= 1):
            out.append(f"task_rank = {self.task_rank!r}; expected an integer >= 1")
        return out

    def mu(self, sigma_judge: float) -> float:
        """Damping factor mu (same units as sigma) for the judged singular value."""
        if sigma_judge >= self.epsilon:
            return 0.0
        ratio = max(sigma_judge, 0.0) / self.epsilon
        return self.mu_max * float(np.sqrt(1.0 - ratio * ratio))


@dataclass(frozen=True)
class DlsInfo:
    """What the damped solve saw and did.

    ``singular_values``: all singular values of J (descending); ``judge_index``: index of the
    judged one; ``sigma_judge``: the judged value (from J or from the caller); ``damping``: mu
    applied; ``condition``: sigma_max / sigma_judge (inf when sigma_judge is 0).
    """

    singular_values: np.ndarray
    judge_index: int
    sigma_judge: float
    damping: float
    condition: float


class DampedInverse:
    """The damped least-squares inverse J# = J^T (J J^T + mu^2 I)^-1 of one Jacobian, via SVD.

    J# = sum_i sigma_i / (sigma_i^2 + mu^2) v_i u_i^T over the first ``task_rank`` singular
    values (Wampler 1986; Nakamura & Hanafusa 1986); each gain is at most 1/(2 mu).
    """

    def __init__(self, J: np.ndarray, damping: DampingSchedule, sigma_judge: float | None = None):
        J = np.asarray(J, dtype=float)
        if J.ndim != 2 or min(J.shape) == 0:
            raise ValueError(f"Jacobian has shape {J.shape}; expected a non-empty 2-D array")
        if not np.all(np.isfinite(J)):
            raise ValueError("Jacobian has non-finite entries; expected finite values")
        if sigma_judge is not None and not (np.isfinite(sigma_judge) and sigma_judge >= 0):
            raise ValueError(f"sigma_judge = {sigma_judge!r}; expected a finite value >= 0")
        U, S, Vt = np.linalg.svd(J, full_matrices=False)
        rank = min(damping.task_rank, len(S))
        judge = rank - 1
        sigma = float(S[judge]) if sigma_judge is None else float(sigma_judge)
        mu = damping.mu(sigma)
        kept = S[:rank]
        with np.errstate(divide="ignore", invalid="ignore"):        # 0/0 where sigma = mu = 0
            self._gains = np.where(kept > 0.0, kept / (kept * kept + mu * mu), 0.0)
        self._U, self._Vt, self._S = U[:, :rank], Vt[:rank], kept
        condition = float(S[0] / sigma) if sigma > 0 else float("inf")
        self.info = DlsInfo(S, judge, sigma, mu, condition)

    def solve(self, rhs: np.ndarray) -> np.ndarray:
        """dq = J# rhs."""
        return np.asarray(self._Vt.T @ (self._gains * (self._U.T @ rhs)))

    def project_null(self, z: np.ndarray) -> np.ndarray:
        """(I - J# J) z, with the same damped J# as :meth:`solve` (exact null-space projection
        when no damping is applied)."""
        return np.asarray(z - self._Vt.T @ (self._gains * self._S * (self._Vt @ z)))


def dls_solve(J: np.ndarray, rhs: np.ndarray, damping: DampingSchedule,
              sigma_judge: float | None = None) -> tuple[np.ndarray, DlsInfo]:
    """Damped least-squares solution dq = J^T (J J^T + mu^2 I)^-1 rhs, with mu from ``damping``.

    Returns (dq, info). See the module docstring for which singular value is judged.
    """
    inverse = DampedInverse(J, damping, sigma_judge)
    return inverse.solve(np.asarray(rhs, dtype=float)), inverse.info


# --------------------------------------------------------------------------------------------
# Gain
# --------------------------------------------------------------------------------------------
@dataclass(frozen=True)
class GainSchedule:
    """Adaptive gain lambda (1/s) as a function of the RMS feature error in pixels.

    ``lambda(e) = gain_far + (gain_near - gain_far) / (1 + e / half_error_px)`` (our design):
    gain_near at e = 0, tends to gain_far far away, halfway between them at e = half_error_px,
    monotone in e. A larger gain near the goal shortens the slow exponential tail; a smaller one
    far away keeps large errors from commanding large speeds.
    """

    gain_near: float = default("control.gain_near")
    gain_far: float = default("control.gain_far")
    half_error_px: float = default("control.gain_half_error_px")

    def __post_init__(self) -> None:
        _raise_if(self.problems(), "GainSchedule")

    def problems(self) -> list[str]:
        return (_positive("gain_near", self.gain_near) + _positive("gain_far", self.gain_far)
                + _positive("half_error_px", self.half_error_px))

    @property
    def max_gain(self) -> float:
        return max(self.gain_near, self.gain_far)

    def __call__(self, error_px: float) -> float:
        e = max(float(error_px), 0.0)
        return self.gain_far + (self.gain_near - self.gain_far) / (1.0 + e / self.half_error_px)


def check_delay_bound(max_gain: float, loop_delay_s: float, cycle_s: float,
                      bound: float = 0.3) -> tuple[bool, float, str]:
    """Check gain x (loop delay + cycle time) < bound (common practice, no source).

    A discrete loop with a pure delay loses phase margin as lambda * delay grows; keeping the
    product well below 1 keeps the response close to the ideal exponential.
    Returns (ok, product, message).
    """
    product = max_gain * (loop_delay_s + cycle_s)
    if product < bound:
        return True, product, (f"gain x (delay + cycle) = {max_gain:g} x ({loop_delay_s:g} + "
                               f"{cycle_s:g}) s = {product:.3g} < {bound:g}")
    limit = bound / (loop_delay_s + cycle_s) if loop_delay_s + cycle_s > 0 else float("inf")
    return False, product, (f"gain x (delay + cycle) = {max_gain:g} x ({loop_delay_s:g} + "
                            f"{cycle_s:g}) s = {product:.3g}; expected < {bound:g}: lower the "
                            f"maximum gain below {limit:.3g} 1/s or shorten the loop")


# --------------------------------------------------------------------------------------------
# Joint-limit cost for the secondary task
# --------------------------------------------------------------------------------------------
def joint_limit_cost(q: np.ndarray, lower: np.ndarray, upper: np.ndarray
                     ) -> tuple[float, np.ndarray]:
    """H(q) = sum_i ((q_i - mid_i) / (upper_i - lower_i))^2 and its gradient (1/rad).

    Distance-to-limit cost in the spirit of Liegeois 1977; joints without finite limits
    (continuous joints) do not contribute.
    """
    bounded = np.isfinite(lower) & np.isfinite(upper)
    low, high = np.where(bounded, lower, -1.0), np.where(bounded, upper, 1.0)
    span = high - low
    offset = np.where(bounded, q - 0.5 * (low + high), 0.0) / span
    return float(offset @ offset), 2.0 * offset / span


# --------------------------------------------------------------------------------------------
# The composed law
# --------------------------------------------------------------------------------------------
@dataclass(frozen=True)
class LawConfig:
    """Parameters of :class:`ControlLaw`.

    ``soft_start_tau`` (s): time constant of the soft start; 0 turns it off.
    ``null_space_gain`` (rad^2/s): gain k of the joint-limit secondary task; 0 turns it off.
    """

    gain: GainSchedule = field(default_factory=GainSchedule)
    damping: DampingSchedule = field(default_factory=DampingSchedule)
    soft_start_tau: float = default("control.soft_start_s")
    null_space_gain: float = default("control.null_space_gain")

    def __post_init__(self) -> None:
        _raise_if(self.problems(), "LawConfig")

    def problems(self) -> list[str]:
        out = []
        if not (np.isfinite(self.soft_start_tau) and self.soft_start_tau >= 0):
            out.append(f"soft_start_tau = {self.soft_start_tau!r}; expected a finite value >= 0 s")
        if not (np.isfinite(self.null_space_gain) and self.null_space_gain >= 0):
            out.append(f"null_space_gain = {self.null_space_gain!r}; expected a finite value >= 0")
        return out


@dataclass(frozen=True)
class LawInfo:
    """By-products of one :meth:`ControlLaw.compute` call.

    ``gain`` lambda (1/s); ``soft_start_weight`` w = exp(-(t - t0)/tau) (0 without soft start);
    ``primary`` / ``secondary``: the two parts of dq (rad/s); ``limit_cost``: H(q);
    ``dls``: the damped solve's info (None on a fault); ``fault``: why the command is zero.
    """

    gain: float
    soft_start_weight: float
    primary: np.ndarray
    secondary: np.ndarray
    null_space_active: bool
    limit_cost: float
    dls: DlsInfo | None
    fault: str | None = None


class ControlLaw:
    """IBVS law with damped least squares, adaptive gain, soft start and a joint-limit task.

    ``lower``/``upper`` (n,): joint limits for the secondary task (rad; +-inf for continuous
    joints).
    """

    def __init__(self, config: LawConfig, lower: np.ndarray, upper: np.ndarray):
        self.config = config
        self.lower = np.asarray(lower, dtype=float)
        self.upper = np.asarray(upper, dtype=float)
        problems = []
        if self.lower.ndim != 1 or self.lower.shape != self.upper.shape:
            problems.append(f"joint limits have shapes {self.lower.shape} and "
                            f"{self.upper.shape}; expected two (n,) arrays")
        elif np.any(np.isnan(self.lower) | np.isnan(self.upper) | (self.lower >= self.upper)):
            problems.append(f"joint limits lower {self.lower} upper {self.upper}; expected "
                            "lower < upper for every joint (+-inf for continuous joints)")
        _raise_if(problems, "ControlLaw")
        self.n = len(self.lower)
        self._e0: np.ndarray | None = None
        self._t0 = 0.0

    def restart(self, e0: np.ndarray, t0: float) -> None:
        """Restart the soft start from error e0 at time t0 (s); call it when the matched
        feature set changes. The first :meth:`compute` call, and any call whose error has a
        different length from e0, restarts by itself."""
        self._e0 = np.array(e0, dtype=float)
        self._t0 = float(t0)

    def soft_start_weight(self, t: float) -> float:
        tau = self.config.soft_start_tau
        if tau == 0.0 or self._e0 is None:
            return 0.0
        return float(np.exp(-max(t - self._t0, 0.0) / tau))

    def compute(self, J_img: np.ndarray, error: np.ndarray, rms_px: float, q: np.ndarray,
                t: float, null_space_enabled: bool, sigma_judge: float | None = None
                ) -> tuple[np.ndarray, LawInfo]:
        """Joint velocity command (n,) in rad/s and the law's by-products.

        ``J_img`` (2N x n), ``error`` e = s - s* (2N,) in normalized coordinates, ``rms_px``
        the RMS error in pixels, ``q`` (n,) joint positions (rad), ``t`` (s),
        ``null_space_enabled``: the caller's flag (off at convergence and while halting).
        Non-finite inputs give a zero command and ``info.fault``; wrong shapes raise ValueError.
        """
        J_img = np.asarray(J_img, dtype=float)
        error = np.asarray(error, dtype=float)
        q = np.asarray(q, dtype=float)
        self._check_shapes(J_img, error, q)
        zero = np.zeros(self.n)
        bad = [name for name, value in (("J_img", J_img), ("error", error), ("q", q),
                                        ("rms_px", rms_px), ("t", t))
               if not np.all(np.isfinite(value))]
        if bad:
            return zero, LawInfo(0.0, 0.0, zero, zero, False, float("nan"), None,
                                 fault="non-finite " + ", ".join(bad) + "; command set to zero")
        if self._e0 is None or self._e0.shape != error.shape:
            self.restart(error, t)
        gain = self.config.gain(rms_px)
        w = self.soft_start_weight(t)
        inverse = DampedInverse(J_img, self.config.damping, sigma_judge)
        assert self._e0 is not None           # restart set it
        primary = inverse.solve(-gain * (error - w * self._e0))
        cost, grad = joint_limit_cost(q, self.lower, self.upper)
        k = (1.0 - w) * self.config.null_space_gain
        active = bool(null_space_enabled and k > 0.0)
        secondary = inverse.project_null(-k * grad) if active else zero
        info = LawInfo(gain, w, primary, secondary, active, cost, inverse.info)
        return primary + secondary, info

    def _check_shapes(self, J_img: np.ndarray, error: np.ndarray, q: np.ndarray) -> None:
        problems = []
        if J_img.ndim != 2 or J_img.shape[1] != self.n or J_img.shape[0] == 0:
            problems.append(f"J_img has shape {J_img.shape}; expected (2N, {self.n})")
        elif error.shape != (J_img.shape[0],):
            problems.append(f"error has shape {error.shape}; expected ({J_img.shape[0]},)")
        if q.shape != (self.n,):
            problems.append(f"q has shape {q.shape}; expected ({self.n},)")
        _raise_if(problems, "ControlLaw.compute input")
