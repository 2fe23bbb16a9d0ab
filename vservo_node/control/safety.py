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
The output is ``previous + s (desired - previous)`` with the largest s in [0, 1] that meets
every limit. Each limit alone allows s up to a fraction computed in closed form (a box gives a
linear bound per joint, a norm ball the larger root of a quadratic); the feasible s of the
intersection is the minimum of these fractions, because when ``previous`` is feasible every
constraint set is convex and contains it, so each allows an interval [0, s_c]. The limit with
the smallest fraction is "the one that wins" (ties go to the first in :data:`LIMITS`); every
limit with s_c < 1 "acted". The change ``s (desired - previous)`` keeps the direction of the
requested change, and since the acceleration box is one of the constraints each joint changes
by at most a_i dt: no separate clipping step can undo another limit.

The envelope is exact for the discrete loop (the command is held for dt and q advances by
command * dt): if the previous command met h at the previous q, braking by a_i dt keeps inside
h at the new q, so the acceleration limit and the envelope never conflict and a joint stops
before its limit. Pass limits already shrunk by whatever margin the real arm's tracking lag
needs.

When the previous command is infeasible (a limit was lowered, speed_scale dropped, q moved
past the envelope), no step toward ``desired`` starts inside the set. The limiter then
decelerates along the previous command's direction: it scales the previous command to the
larger of (a) the largest feasible multiple of it and (b) the smallest multiple reachable with
every joint changing by at most a_i dt. Mode ``decelerate`` is reported until it is feasible.

Non-finite values in any input array or in speed_scale give mode ``fault``: the previous
command is ramped toward zero at the deceleration limit in the same way (to zero when the
previous command itself is not finite). Wrong shapes, or dt not finite and > 0, are programming
errors and raise ValueError.
"""
from __future__ import annotations

from dataclasses import dataclass, field, replace
from types import MappingProxyType
from typing import Mapping

import numpy as np

#: Limit names, in tie-break order.
LIMITS = ("position_envelope", "joint_velocity", "tool_linear_speed", "camera_linear_speed",
          "angular_speed", "joint_acceleration")
#: Counters kept by :class:`Limiter` besides the limits.
EVENTS = ("previous_infeasible", "fault")
#: Reduced-speed ceiling at the tool in manual mode, m/s: ISO 10218-1 (from memory).
ISO_REDUCED_SPEED = 0.25
#: Relative tolerance when judging the previous command feasible.
FEASIBLE_TOL = 1e-9


@dataclass(frozen=True)
class LimitSet:
    """Every limit the command must meet.

    ``velocity`` (n,): URDF velocity limits (rad/s); ``velocity_scale`` in (0, 1] scales them.
    ``acceleration`` (n,): rad/s^2, required (URDF has none, so there is no default).
    ``lower``/``upper`` (n,): position limits (rad; +-inf for continuous joints).
    ``tool_linear_max``, ``camera_linear_max`` (m/s): default 0.10; approach speeds of tens of
    mm/s are common practice (no source). They may not exceed ISO_REDUCED_SPEED unless
    ``allow_above_reduced_speed`` is set. ``angular_max`` (rad/s): default 0.5 (common
    practice, no source).
    """

    velocity: np.ndarray
    acceleration: np.ndarray
    lower: np.ndarray
    upper: np.ndarray
    velocity_scale: float = 1.0
    tool_linear_max: float = 0.10
    camera_linear_max: float = 0.10
    angular_max: float = 0.5
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
        elif np.any(np.isnan(self.lower) | np.isnan(self.upper) | (self.lower >= self.upper)):
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

    ``mode``: "track" (stepped toward the desired command), "decelerate" (previous command
    infeasible) or "fault" (non-finite input). ``scale``: in track mode the fraction s of the
    step toward the desired command, else the multiple of the previous command kept.
    ``acted``: limits that cut the command; ``winner`` (and ``winner_joint`` for per-joint
    limits): the one that cut it most. ``counts``: cumulative counts (filled by
    :class:`Limiter`, empty from :func:`limit_command`).
    """

    mode: str
    scale: float
    acted: tuple[str, ...]
    winner: str | None
    winner_joint: int | None
    fault: str | None = None
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
    m = np.where((m + 1) * (m + 2) / 2 <= D, m + 1, m)      # guard round-off of the sqrt
    m = np.where(m * (m + 1) / 2 > D, m - 1, m)
    r = (D - m * (m + 1) / 2) / (m + 1)
    return np.where(np.isposinf(distance), np.inf, (m + r) * step)


# --------------------------------------------------------------------------------------------
# Step fractions in closed form
# --------------------------------------------------------------------------------------------
def _box_fraction(base: np.ndarray, delta: np.ndarray, lo: np.ndarray, hi: np.ndarray
                  ) -> tuple[float, int | None]:
    """Largest s >= 0 with lo <= base + s delta <= hi, and the joint that sets it."""
    with np.errstate(divide="ignore", invalid="ignore"):
        s = np.where(delta > 0, (hi - base) / delta,
                     np.where(delta < 0, (lo - base) / delta, np.inf))
    s = np.maximum(s, 0.0)
    joint = int(np.argmin(s))
    return float(s[joint]), joint


def _ball_fraction(A: np.ndarray, base: np.ndarray, delta: np.ndarray, radius: float) -> float:
    """Largest s >= 0 with ||A (base + s delta)|| <= radius (larger root of a quadratic)."""
    a, b = A @ delta, A @ base
    aa, ab, slack = a @ a, a @ b, radius * radius - b @ b
    if aa == 0.0:
        return np.inf
    slack = max(slack, 0.0)
    root = np.sqrt(ab * ab + aa * slack)
    # Two algebraically equal forms of the same root; each avoids cancellation on its side.
    return float((root - ab) / aa) if ab <= 0 else float(slack / (ab + root))


@dataclass(frozen=True)
class _StaticSet:
    """The static (previous-independent) constraints for one call."""

    lo_velocity: np.ndarray
    hi_velocity: np.ndarray
    lo_envelope: np.ndarray
    hi_envelope: np.ndarray
    balls: tuple[tuple[str, np.ndarray, float], ...]

    def fractions(self, base: np.ndarray, delta: np.ndarray) -> dict[str, tuple[float, int | None]]:
        """Per limit, the largest step fraction from base along delta (base assumed inside)."""
        out = {"position_envelope": _box_fraction(base, delta, self.lo_envelope, self.hi_envelope),
               "joint_velocity": _box_fraction(base, delta, self.lo_velocity, self.hi_velocity)}
        for name, A, radius in self.balls:
            out[name] = (_ball_fraction(A, base, delta, radius), None)
        return out


def _static_set(q, dt, limits: LimitSet, tool_point_jac, camera_point_jac, angular_jac,
                speed_scale) -> _StaticSet:
    vmax = limits.velocity_max * speed_scale
    return _StaticSet(
        lo_velocity=-vmax, hi_velocity=vmax,
        lo_envelope=-stopping_speed(q - limits.lower, limits.acceleration, dt),
        hi_envelope=stopping_speed(limits.upper - q, limits.acceleration, dt),
        balls=(("tool_linear_speed", tool_point_jac, limits.tool_linear_max * speed_scale),
               ("camera_linear_speed", camera_point_jac, limits.camera_linear_max * speed_scale),
               ("angular_speed", angular_jac, limits.angular_max * speed_scale)))


def _decelerated(previous: np.ndarray, accel: np.ndarray, dt: float) -> float:
    """Smallest multiple c of ``previous`` reachable with each joint changing <= a_i dt."""
    speed = np.abs(previous)
    moving = speed > 0
    if not np.any(moving):
        return 0.0
    return max(0.0, 1.0 - float(np.min(accel[moving] * dt / speed[moving])))


def _winner(fractions: dict[str, tuple[float, int | None]]) -> tuple[str, int | None, float]:
    name = min(LIMITS, key=lambda k: fractions.get(k, (np.inf, None))[0])  # first on ties
    value, joint = fractions[name]
    return name, joint, value


def _acted(fractions: dict[str, tuple[float, int | None]]) -> tuple[str, ...]:
    return tuple(k for k in LIMITS if k in fractions and fractions[k][0] < 1.0)


# --------------------------------------------------------------------------------------------
# The limiter
# --------------------------------------------------------------------------------------------
def limit_command(desired, previous, q, dt: float, limits: LimitSet, tool_point_jac,
                  camera_point_jac, angular_jac, speed_scale: float = 1.0
                  ) -> tuple[np.ndarray, LimitReport]:
    """The command (n,) closest to ``desired`` along the step from ``previous`` meeting every
    limit, and a report (see the module docstring).

    ``desired``, ``previous`` (n,) rad/s; ``q`` (n,) rad, the position at the start of the
    cycle; ``dt`` (s) the cycle over which the command is held; Jacobians (3 x n);
    ``speed_scale`` in [0, 1] scales every speed limit (not accelerations); 0 brings the arm to
    rest at the deceleration limit.
    """
    n = limits.n
    arrays = {"desired": desired, "previous": previous, "q": q, "tool_point_jac": tool_point_jac,
              "camera_point_jac": camera_point_jac, "angular_jac": angular_jac}
    arrays = {k: np.asarray(v, dtype=float) for k, v in arrays.items()}
    _check_shapes(arrays, n, dt, speed_scale)
    previous = arrays["previous"]

    bad = [k for k, v in arrays.items() if not np.all(np.isfinite(v))]
    if not np.isfinite(speed_scale):
        bad.append("speed_scale")
    if bad:
        what = "non-finite " + ", ".join(bad)
        if not np.all(np.isfinite(previous)):
            return np.zeros(n), LimitReport("fault", 0.0, (), None, None,
                                            what + "; previous command unknown, output zero")
        c = _decelerated(previous, limits.acceleration, dt)
        return c * previous, LimitReport("fault", c, (), None, None,
                                         what + "; ramping down at the deceleration limit")

    static = _static_set(arrays["q"], dt, limits, arrays["tool_point_jac"],
                         arrays["camera_point_jac"], arrays["angular_jac"], speed_scale)
    zero = np.zeros(n)
    along_previous = static.fractions(zero, previous)
    if min(f for f, _ in along_previous.values()) < 1.0 - FEASIBLE_TOL:
        name, joint, c_feasible = _winner(along_previous)
        c = max(c_feasible, _decelerated(previous, limits.acceleration, dt))
        return c * previous, LimitReport("decelerate", c, _acted(along_previous), name, joint)

    delta = arrays["desired"] - previous
    fractions = static.fractions(previous, delta)
    with np.errstate(divide="ignore"):
        s_accel = np.where(delta != 0, limits.acceleration * dt / np.abs(delta), np.inf)
    joint = int(np.argmin(s_accel))
    fractions["joint_acceleration"] = (float(s_accel[joint]), joint)
    name, joint, s_min = _winner(fractions)
    if s_min >= 1.0:
        return previous + delta, LimitReport("track", 1.0, (), None, None)
    return previous + s_min * delta, LimitReport("track", s_min, _acted(fractions), name, joint)


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
    (e.g. lowered); a previous command that no longer fits is decelerated.
    """

    def __init__(self, limits: LimitSet):
        self.limits = limits
        self.previous = np.zeros(limits.n)
        self.counts = dict.fromkeys(LIMITS + EVENTS, 0)

    def step(self, desired, q, dt: float, tool_point_jac, camera_point_jac, angular_jac,
             speed_scale: float = 1.0) -> tuple[np.ndarray, LimitReport]:
        command, report = limit_command(desired, self.previous, q, dt, self.limits,
                                        tool_point_jac, camera_point_jac, angular_jac,
                                        speed_scale)
        for name in report.acted:
            self.counts[name] += 1
        if report.mode == "decelerate":
            self.counts["previous_infeasible"] += 1
        elif report.mode == "fault":
            self.counts["fault"] += 1
        self.previous = command
        return command, replace(report, counts=MappingProxyType(dict(self.counts)))
