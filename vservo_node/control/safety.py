"""Convex command limiter: joint velocity, acceleration, position envelope, Cartesian speeds.

Pure functions on NumPy arrays (:func:`limit_command`) plus a small stateful wrapper
(:class:`Limiter`) that holds the previous command and counts how often each limit acted.

Units: joint velocities rad/s (m/s for prismatic joints), accelerations rad/s^2, positions rad,
``dt`` s, Cartesian speeds m/s and rad/s. The Cartesian Jacobians (3 x n) map joint velocities
to the linear velocity of a declared point (tool point, camera origin) and to the angular
velocity of the tool; any frame will do, since only their norms are limited.

The feasible set
----------------
Every limit is a convex constraint on the command x (n,):

* ``joint_velocity``: |x_i| <= v_i * speed_scale, v_i = URDF limit * velocity_scale;
* ``position_envelope``: toward an upper limit x_i <= h(upper_i - q_i), toward a lower limit
  x_i >= -h(q_i - lower_i), where h(d) is the largest speed from which braking at a_i per
  cycle stops within the distance d left (:func:`stopping_speed`; h(d) <= sqrt(2 a_i d), and
  h = 0 at or past the limit; moving away from a limit is always allowed);
* ``tool_linear_speed``, ``camera_linear_speed``: ||J_p x|| <= v_lin * speed_scale;
* ``angular_speed``: ||J_w x|| <= w_max * speed_scale;
* ``joint_acceleration``: |x_i - previous_i| <= a_i dt.

All static sets (all but the last) contain x = 0, so stopping is always allowed.

Which limit wins, and why acceleration bounds hold
--------------------------------------------------
The output is ``base + s (desired - base)`` with the largest s in [0, 1] that meets every
limit, where ``base`` is the previous command when that is feasible (the normal case, mode
``track``). Each limit alone allows s up to a fraction computed in closed form (a box gives a
linear bound per joint, a norm ball the larger root of a quadratic); the feasible s of the
intersection is the minimum of these fractions, because every constraint set is convex and
contains the base, so each allows an interval [0, s_c]. The limit with the smallest fraction
is "the one that wins"; ties go to the first in :data:`LIMITS`, which puts the hard joint
position limit first and the acceleration bound last, so the status names the most
safety-relevant cause. A limit "acted" when it changed the command: the speed limit(s) whose
fraction set the target's scale (not every limit the desired command exceeds), a limit that
cut a recovering previous command, and the acceleration bound when it cut the step. In track
mode the change ``s (desired - previous)`` keeps the direction of the requested change, and
since the
acceleration box around the previous command is one of the constraints, each joint changes by
at most a_i dt: no later clipping step can undo another limit.

The step goes toward a *target*, not toward the desired command itself: the desired command
scaled by the largest factor in [0, 1] that meets every speed limit (all of them contain 0, so
the direction of the desired command is kept). Both ends of the step then meet the speed
limits, so by convexity every point between does, and in practice only the acceleration bound
cuts the step. Stepping toward an infeasible desired command instead would pin the output to
the boundary of a binding Cartesian limit (the feasible fraction is ~0 there) while the desired
direction turns with the image error: the arm would keep moving the old way.

Recovery when the previous command is infeasible
------------------------------------------------
The previous command can leave the set without any fault: a limit or speed_scale was lowered,
the envelope shrank as the joint approached its limit (this happens on every braking cycle),
or the Cartesian Jacobians changed with q while moving at a Cartesian limit. Then (mode
``recover``) the base is the previous command scaled toward zero, keeping its direction, by
the larger of (a) the largest feasible multiple of it and (b) the smallest multiple reachable
with every joint changing by at most a_i dt (deceleration at the maximum rate). If (b) wins,
each joint is in addition clipped into its position envelope (then back into its acceleration
box): a position limit must not wait for the slowest-braking joint. When the base is feasible
the limiter then steps toward ``desired`` from it as above; when it is not (a limit was
lowered by more than one cycle of deceleration), the base itself is the output, and the
recovery continues on the next cycles.

The envelope is exact for the discrete loop (the command is held for dt and q advances by
command * dt): if the previous command met h at the previous q, the new h is at least the
previous command minus a_i dt, so braking at the acceleration limit keeps inside the envelope
and the joint comes to rest before its limit (POSITION_ROUNDOFF short of it, so that round-off
in q never crosses it). Pass limits already shrunk by whatever margin the real arm's tracking
lag needs.

Faults
------
Non-finite values in any input array or in speed_scale give mode ``fault``: the previous
command is scaled toward zero at the maximum synchronized deceleration (to zero when the
previous command itself is not finite). Wrong shapes, or dt not finite and > 0, are programming
errors and raise ValueError.
"""
from __future__ import annotations

import math
from dataclasses import dataclass, field
from types import MappingProxyType
from typing import Any, Mapping

import numpy as np

from vservo_node.params import default

#: Limit names, in tie-break order.
LIMITS = ("position_envelope", "joint_velocity", "tool_linear_speed", "camera_linear_speed",
          "angular_speed", "joint_acceleration")
#: Counters kept by :class:`Limiter` besides the limits.
EVENTS = ("previous_infeasible", "fault")
#: Reduced-speed ceiling at the tool in manual mode, m/s: ISO 10218-1 (from memory).
ISO_REDUCED_SPEED = 0.25
#: Relative tolerance when judging a command feasible.
FEASIBLE_TOL = 1e-9
#: Distance (rad or m) the envelope keeps free before each position limit.
POSITION_ROUNDOFF = 1e-9


@dataclass(frozen=True)
class LimitSet:
    """Every limit the command must meet.

    ``velocity`` (n,): URDF velocity limits (rad/s); ``velocity_scale`` in (0, 1] scales them.
    ``acceleration`` (n,): rad/s^2, required (URDF has none, so there is no default).
    ``lower``/``upper`` (n,): position limits (rad; +-inf for continuous joints).
    ``tool_linear_max``, ``camera_linear_max`` (m/s); approach speeds of tens of mm/s are common
    practice (no source). They may not exceed ISO_REDUCED_SPEED unless
    ``allow_above_reduced_speed`` is set. ``angular_max`` (rad/s). Defaults: the schema's
    ``limits.*`` entries (vservo_node.params).
    """

    velocity: np.ndarray
    acceleration: np.ndarray
    lower: np.ndarray
    upper: np.ndarray
    velocity_scale: float = default("limits.joint_velocity_scale")
    tool_linear_max: float = default("limits.tool_linear_speed")
    camera_linear_max: float = default("limits.camera_linear_speed")
    angular_max: float = default("limits.angular_speed")
    allow_above_reduced_speed: bool = False

    def __post_init__(self) -> None:
        for name in ("velocity", "acceleration", "lower", "upper"):
            object.__setattr__(self, name, np.array(getattr(self, name), dtype=float))
        problems = self.problems()
        if problems:
            raise ValueError("invalid LimitSet: " + "; ".join(problems))

    @property
    def n(self) -> int:
        return len(self.velocity)

    @property
    def velocity_max(self) -> np.ndarray:
        """Per-joint velocity limit in use, URDF limit x velocity_scale (rad/s)."""
        return self.velocity * self.velocity_scale

    def problems(self) -> list[str]:
        """What is wrong with these limits, each saying what was expected."""
        out = []
        arrays = {k: getattr(self, k) for k in ("velocity", "acceleration", "lower", "upper")}
        shapes = {a.shape for a in arrays.values()}
        if len(shapes) != 1 or self.velocity.ndim != 1 or self.n == 0:
            return [f"joint arrays have shapes { {k: a.shape for k, a in arrays.items()} }; "
                    "expected four arrays of shape (n,), n >= 1"]
        for name in ("velocity", "acceleration"):
            a = arrays[name]
            if not np.all(np.isfinite(a) & (a > 0)):
                out.append(f"{name} = {a}; expected finite values > 0 for every joint")
        if np.any(np.isnan(self.lower) | np.isnan(self.upper) | (self.lower >= self.upper)):
            out.append(f"lower = {self.lower}, upper = {self.upper}; expected lower < upper for "
                       "every joint (+-inf for continuous joints)")
        if not (np.isfinite(self.velocity_scale) and 0 < self.velocity_scale <= 1):
            out.append(f"velocity_scale = {self.velocity_scale!r}; expected 0 < scale <= 1")
        for name in ("tool_linear_max", "camera_linear_max", "angular_max"):
            value = getattr(self, name)
            if not (np.isfinite(value) and value > 0):
                out.append(f"{name} = {value!r}; expected a finite value > 0")
        for name in ("tool_linear_max", "camera_linear_max"):
            value = getattr(self, name)
            if value > ISO_REDUCED_SPEED and not self.allow_above_reduced_speed:
                out.append(f"{name} = {value!r} m/s exceeds the {ISO_REDUCED_SPEED} m/s reduced-"
                           "speed ceiling; expected <= it unless allow_above_reduced_speed")
        return out


@dataclass(frozen=True)
class LimitReport:
    """What the limiter did in one call.

    ``mode``: "track" (stepped from the previous command toward the desired one), "recover"
    (the previous command was infeasible, see the module docstring) or "fault" (non-finite
    input). ``base``: the command the step started from (rad/s); ``base_scale``: the multiple of
    the previous command it was scaled to (1 in track mode); ``scale``: the fraction s of the
    step from the base toward the target (0 when no step was taken); ``target_scale``: the
    multiple of the desired command the speed limits allow (the target is
    ``target_scale * desired``, 1 when the desired command meets them).
    ``acted``: limits that cut the command; ``winner`` (and ``winner_joint`` for per-joint
    limits): the one that set it. ``counts``: cumulative counts (filled by :class:`Limiter`,
    empty from :func:`limit_command`).
    """

    mode: str
    base: np.ndarray
    base_scale: float
    scale: float
    acted: tuple[str, ...]
    winner: str | None
    winner_joint: int | None
    fault: str | None = None
    target_scale: float = 1.0
    counts: Mapping[str, int] = field(default_factory=lambda: MappingProxyType({}))


def stopping_speed(distance: np.ndarray, accel: np.ndarray, dt: float) -> np.ndarray:
    """Largest speed from which braking by ``accel * dt`` per cycle stops within ``distance``.

    Discrete loop: the speed v_k is held for dt (position advances v_k dt) and the next speed
    is v_k - a dt. Starting at v = (m + r) a dt (m integer, 0 <= r < 1) the distance covered
    before standing still is a dt^2 ((m + 1) r + m (m + 1) / 2); this inverts it. The result
    is at most the continuous envelope sqrt(2 a d); it is 0 for distance <= 0.
    """
    distance = np.asarray(distance, dtype=float)
    step = accel * dt
    D = np.where(np.isfinite(distance), np.maximum(distance, 0.0), 0.0) / (step * dt)
    m = np.floor(0.5 * (np.sqrt(1.0 + 8.0 * D) - 1.0))
    # m is a whole number, so m + 2 == (m + 1) + 1 exactly
    m_1 = m + 1
    m = np.where(m_1 * (m_1 + 1) / 2 <= D, m_1, m)           # guard round-off of the sqrt
    m_1 = m + 1
    m = np.where(m * m_1 / 2 > D, m - 1, m)
    m_1 = m + 1
    r = (D - m * m_1 / 2) / m_1
    return np.where(distance == np.inf, np.inf, (m + r) * step)


# --------------------------------------------------------------------------------------------
# Step fractions in closed form
# --------------------------------------------------------------------------------------------
#: Per limit name, the largest step fraction it allows and the joint that sets it (or None).
Fractions = dict[str, tuple[float, int | None]]


def _box_fraction(base: np.ndarray, delta: np.ndarray, lo: np.ndarray, hi: np.ndarray
                  ) -> tuple[float, int | None]:
    """Largest s >= 0 with lo <= base + s delta <= hi, and the joint that sets it (the first
    on ties; joint 0 when nothing bounds s, which is then inf)."""
    # Plain floats: a handful of joints, and this runs several times per output cycle.
    best, joint = np.inf, 0
    for i, (b, d, low, high) in enumerate(zip(base.tolist(), delta.tolist(), lo.tolist(),
                                              hi.tolist())):
        if d > 0:
            s = (high - b) / d
        elif d < 0:
            s = (low - b) / d
        else:
            continue                      # no bound from this joint
        if s < 0.0:
            s = 0.0
        if s < best:
            best, joint = s, i
    return best, joint


def _box_fraction_from_zero(delta: np.ndarray, lo: np.ndarray, hi: np.ndarray
                            ) -> tuple[float, int | None]:
    """:func:`_box_fraction` with base 0 (``hi - 0`` is ``hi`` exactly)."""
    best, joint = np.inf, 0
    for i, (d, low, high) in enumerate(zip(delta.tolist(), lo.tolist(), hi.tolist())):
        if d > 0:
            s = high / d
        elif d < 0:
            s = low / d
        else:
            continue
        if s < 0.0:
            s = 0.0
        if s < best:
            best, joint = s, i
    return best, joint


def _ball_fractions_from_zero(A_stacked: np.ndarray, radii: tuple[float, ...],
                              delta: np.ndarray) -> list[float]:
    """Largest s >= 0 with ||A_k s delta|| <= r_k, for several balls at once: ``A_stacked``
    holds their 3 x n matrices one under the other, ``radii`` the r_k. (The base of every step
    is 0 here: each static set contains 0 and the limiter scales commands from it.)"""
    # Solved along the unit direction u and scaled back: with a tiny delta (1e-160) the
    # quadratic's coefficients underflow and the root came out as 0 instead of huge. From 0,
    # the larger root of |A u|^2 s^2 = r^2 is sqrt(aa r^2) / aa with aa = |A u|^2.
    length = math.sqrt(delta @ delta)      # np.linalg.norm of a vector computes it so
    if length == 0.0:
        return [np.inf] * len(radii)
    a = A_stacked @ (delta / length)
    out = []
    for i, radius in enumerate(radii):
        ai = a[3 * i:3 * i + 3]
        aa = float(ai @ ai)
        if aa == 0.0:
            out.append(np.inf)
            continue
        root = math.sqrt(aa * max(radius * radius, 0.0))
        out.append((root / aa) / length)   # Python floats: overflow gives inf, no warning
    return out


#: The Cartesian limits, in the order of _StaticSet.radii and the rows of _StaticSet.A.
BALLS = ("tool_linear_speed", "camera_linear_speed", "angular_speed")


@dataclass(frozen=True)
class _StaticSet:
    """The static (previous-independent) constraints for one call: joint velocity and position
    envelope boxes, and the Cartesian balls ||A_k x|| <= radius_k (A: the three 3 x n
    Jacobians of :data:`BALLS` stacked)."""

    lo_velocity: np.ndarray
    hi_velocity: np.ndarray
    lo_envelope: np.ndarray
    hi_envelope: np.ndarray
    A: np.ndarray
    radii: tuple[float, float, float]

    def fractions(self, x: np.ndarray) -> Fractions:
        """Per limit, the largest fraction of ``x`` (a step from 0) it allows."""
        out = {"position_envelope": _box_fraction_from_zero(x, self.lo_envelope,
                                                            self.hi_envelope),
               "joint_velocity": _box_fraction_from_zero(x, self.lo_velocity, self.hi_velocity)}
        for name, fraction in zip(BALLS, _ball_fractions_from_zero(self.A, self.radii, x)):
            out[name] = (fraction, None)
        return out


def _static_set(q: np.ndarray, dt: float, limits: LimitSet, tool_point_jac: np.ndarray,
                camera_point_jac: np.ndarray, angular_jac: np.ndarray,
                speed_scale: float) -> _StaticSet:
    n = limits.n
    vmax = limits.velocity_max * speed_scale
    # both envelopes in one call (element-wise, so the same values as two calls)
    envelope = stopping_speed(
        np.concatenate([q - limits.lower - POSITION_ROUNDOFF,
                        limits.upper - q - POSITION_ROUNDOFF]),
        np.concatenate([limits.acceleration, limits.acceleration]), dt)
    return _StaticSet(
        lo_velocity=-vmax, hi_velocity=vmax, lo_envelope=-envelope[:n], hi_envelope=envelope[n:],
        A=np.concatenate([tool_point_jac, camera_point_jac, angular_jac]),
        radii=(limits.tool_linear_max * speed_scale, limits.camera_linear_max * speed_scale,
               limits.angular_max * speed_scale))


def _decelerated(previous: np.ndarray, accel: np.ndarray, dt: float) -> float:
    """Smallest multiple c of ``previous`` reachable with each joint changing <= a_i dt."""
    speed = np.abs(previous)
    moving = speed > 0
    if not np.any(moving):
        return 0.0
    with np.errstate(over="ignore"):
        return max(0.0, 1.0 - float(np.min(accel[moving] * dt / speed[moving])))


def _winner(fractions: Fractions) -> tuple[str | None, int | None, float]:
    name = min((k for k in LIMITS if k in fractions),
               key=lambda k: fractions[k][0])  # first on ties
    value, joint = fractions[name]
    return name, joint, value


def _acted(*fractions: Fractions) -> tuple[str, ...]:
    return tuple(k for k in LIMITS if any(k in f and f[k][0] < 1.0 for f in fractions))


def _feasible(fractions: Fractions) -> bool:
    """Whether the point the fractions were taken toward (from 0) is feasible."""
    return min(f for f, _ in fractions.values()) >= 1.0 - FEASIBLE_TOL


# --------------------------------------------------------------------------------------------
# The limiter
# --------------------------------------------------------------------------------------------
def limit_command(desired: np.ndarray, previous: np.ndarray, q: np.ndarray, dt: float,
                  limits: LimitSet, tool_point_jac: np.ndarray, camera_point_jac: np.ndarray,
                  angular_jac: np.ndarray, speed_scale: float = 1.0
                  ) -> tuple[np.ndarray, LimitReport]:
    """The command (n,) nearest ``desired`` along the step from the previous command that meets
    every limit, and a report (see the module docstring).

    ``desired``, ``previous`` (n,) rad/s; ``q`` (n,) rad, the position at the start of the
    cycle; ``dt`` (s) the cycle over which the command is held; Jacobians (3 x n);
    ``speed_scale`` in [0, 1] scales every speed limit (not accelerations); 0 brings the arm to
    rest at the deceleration limit.
    """
    command, report = _limit_command(desired, previous, q, dt, limits, tool_point_jac,
                                      camera_point_jac, angular_jac, speed_scale)
    return command, LimitReport(**report)


def _limit_command(desired: np.ndarray, previous: np.ndarray, q: np.ndarray, dt: float,
                   limits: LimitSet, tool_point_jac: np.ndarray, camera_point_jac: np.ndarray,
                   angular_jac: np.ndarray, speed_scale: float
                   ) -> tuple[np.ndarray, dict[str, Any]]:
    """:func:`limit_command` with the report as a dict of LimitReport fields (no counts)."""
    n, accel = limits.n, limits.acceleration
    arrays = {"desired": desired, "previous": previous, "q": q, "tool_point_jac": tool_point_jac,
              "camera_point_jac": camera_point_jac, "angular_jac": angular_jac}
    arrays = {k: np.asarray(v, dtype=float) for k, v in arrays.items()}
    _check_shapes(arrays, n, dt, speed_scale)
    previous = arrays["previous"]

    # one test over every value (shapes are checked); which input was bad only on a fault
    bad = []
    if not np.isfinite(np.concatenate([v.ravel() for v in arrays.values()])).all():
        bad = [k for k, v in arrays.items() if not np.isfinite(v).all()]
    if not np.isfinite(speed_scale):
        bad.append("speed_scale")
    if bad:
        what = "non-finite " + ", ".join(bad)
        if not np.all(np.isfinite(previous)):
            return np.zeros(n), _fields("fault", np.zeros(n), 0.0, 0.0, (), None, None,
                                        what + "; previous command unknown, output zero")
        c = _decelerated(previous, accel, dt)
        return c * previous, _fields("fault", c * previous, c, 0.0, (), None, None,
                                     what + "; ramping down at the deceleration limit")

    static = _static_set(arrays["q"], dt, limits, arrays["tool_point_jac"],
                         arrays["camera_point_jac"], arrays["angular_jac"], speed_scale)
    accel_lo, accel_hi = previous - accel * dt, previous + accel * dt
    along_previous = static.fractions(previous)
    if _feasible(along_previous):
        mode, base, c, recovered = "track", previous, 1.0, {}
    else:
        mode, recovered = "recover", along_previous
        c_feasible = _winner(along_previous)[2]
        c = max(c_feasible, _decelerated(previous, accel, dt))
        base = c * previous
        if c > c_feasible:
            base = np.clip(np.clip(base, static.lo_envelope, static.hi_envelope),
                           accel_lo, accel_hi)
            if not _feasible(static.fractions(base)):
                name, joint, _ = _winner(recovered)
                return base, _fields(mode, base, c, 0.0, _acted(recovered), name, joint)

    # Scale the desired command into the speed limits first (direction kept: every static set
    # contains 0), then step toward that target. Stepping toward an infeasible desired command
    # would freeze the output on the boundary of a binding Cartesian limit (s -> 0 there) while
    # the desired direction keeps turning: the arm would go on moving the old way.
    desired = arrays["desired"]
    scaling = static.fractions(desired)
    name_d, joint_d, c_d = _winner(scaling)
    target = desired * min(c_d, 1.0)
    delta = target - base
    # base and target both meet the speed limits, so (convexity) every point between does:
    # only the acceleration bound can cut the step. Not re-testing the speed limits along it
    # also keeps round-off in those tests from cutting a step that is feasible.
    fractions = {"joint_acceleration": _box_fraction(base, delta, accel_lo, accel_hi)}
    name, joint, s = _winner(fractions)
    # a speed limit acted only if it set the target's scale: with several over 1 only the
    # smallest fraction binds (a joint far inside its envelope but asked too fast is cut by the
    # velocity limit, not by the envelope, which the scaled command meets)
    binding = {k: v for k, v in scaling.items() if v[0] <= c_d * (1.0 + FEASIBLE_TOL)}
    acted = _acted(recovered, binding, fractions)
    if c_d < 1.0 and (s >= 1.0 or c_d <= s):
        name, joint = name_d, joint_d
    elif s >= 1.0:
        name, joint = None, None
    s = min(s, 1.0)
    return base + s * delta, _fields(mode, base, c, s, acted, name, joint,
                                     target_scale=min(c_d, 1.0))


def _fields(mode: str, base: np.ndarray, base_scale: float, scale: float,
            acted: tuple[str, ...], winner: str | None, winner_joint: int | None,
            fault: str | None = None, target_scale: float = 1.0) -> dict[str, Any]:
    return dict(mode=mode, base=base, base_scale=base_scale, scale=scale, acted=acted,
                winner=winner, winner_joint=winner_joint, fault=fault, target_scale=target_scale)


def _check_shapes(arrays: dict[str, np.ndarray], n: int, dt: float, speed_scale: float) -> None:
    expected = {"desired": (n,), "previous": (n,), "q": (n,), "tool_point_jac": (3, n),
                "camera_point_jac": (3, n), "angular_jac": (3, n)}
    problems = [f"{k} has shape {arrays[k].shape}; expected {shape}"
                for k, shape in expected.items() if arrays[k].shape != shape]
    if not (np.isfinite(dt) and dt > 0):
        problems.append(f"dt = {dt!r}; expected a finite cycle time > 0 s")
    if np.isfinite(speed_scale) and not 0.0 <= speed_scale <= 1.0:
        problems.append(f"speed_scale = {speed_scale!r}; expected 0 <= speed_scale <= 1")
    if problems:
        raise ValueError("limit_command: " + "; ".join(problems))


class Limiter:
    """:func:`limit_command` with the previous command and cumulative counts held inside.

    Starts from a zero previous command (arm at rest). ``limits`` may be replaced at any time
    (e.g. lowered); a previous command that no longer fits is recovered as described in the
    module docstring.
    """

    def __init__(self, limits: LimitSet):
        self.limits = limits
        self.previous = np.zeros(limits.n)
        self.counts = dict.fromkeys(LIMITS + EVENTS, 0)

    def step(self, desired: np.ndarray, q: np.ndarray, dt: float, tool_point_jac: np.ndarray,
             camera_point_jac: np.ndarray, angular_jac: np.ndarray,
             speed_scale: float = 1.0) -> tuple[np.ndarray, LimitReport]:
        command, report = _limit_command(desired, self.previous, q, dt, self.limits,
                                         tool_point_jac, camera_point_jac, angular_jac,
                                         speed_scale)
        for name in report["acted"]:
            self.counts[name] += 1
        if report["mode"] == "recover":
            self.counts["previous_infeasible"] += 1
        elif report["mode"] == "fault":
            self.counts["fault"] += 1
        self.previous = command
        return command, LimitReport(**report, counts=MappingProxyType(dict(self.counts)))
