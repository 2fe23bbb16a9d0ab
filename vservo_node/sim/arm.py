"""A simulated joint-velocity-controlled arm: what a drive does with the commands it gets.

The drives run on a fixed control clock (``cycle_s``, 1 ms by default). At every cycle each
joint's velocity loop receives a reference ``r`` and the joint velocity follows it as a
first-order lag of time constant ``tau`` (the exact solution of ``tau * dq' = r - dq`` for ``r``
held over the cycle; Ogata, Modern Control Engineering, 5th ed. 2010, sec. 5.2, unit-step
response of a first-order system), and the position integrates that velocity exactly. The
reference comes from the active command:

- **velocity** (``command_velocity``): the commanded joint velocities, clamped to the URDF
  velocity limits. If no new velocity command arrives for ``command_timeout_s`` the drives
  **brake**: all joints ramp linearly to zero together, no joint decelerating faster than its
  ``decel_limit`` (a controlled stop with power kept on, what IEC 60204-1:2016 sec. 9.2.2 calls
  stop category 2; from memory), then hold still.
- **position** (``command_position``): a single-point trajectory, as a trajectory controller
  with one point: a cubic from the current position and velocity to the goal at rest in
  ``duration`` seconds (never shorter than the velocity limits allow), followed with velocity
  feed-forward plus proportional position feedback, then held at the goal.

Joint positions stay inside the URDF limits: a joint reaching one stops there. Commands take
effect ``command_latency_s`` after the time they are given, at the next cycle boundary. Reported
joint states may carry Gaussian noise, drawn from a generator seeded by ``(seed, t)``, so the
state at a given time is the same however often and in whatever order it is asked for.

No clock and no threads: the caller advances time with :meth:`SimArm.step`. Units: rad, rad/s,
rad/s^2 (metres for prismatic joints); times in seconds.
"""
from __future__ import annotations

import bisect
import copy
import math
from collections import deque
from dataclasses import dataclass

import numpy as np

from vservo_node.sim import seeding


@dataclass(frozen=True)
class ArmDynamics:
    """How the simulated drives respond (see the module doc).

    - ``velocity_lag_s``: time constant ``tau`` of the velocity loops (0: ideal tracking).
    - ``command_latency_s``: delay between a command's time and the drives acting on it.
    - ``command_timeout_s``: velocity mode brakes when no command came for this long.
    - ``decel_limit``: braking deceleration limit, rad/s^2 (scalar or one per joint).
    - ``joint_noise_std``, ``velocity_noise_std``: noise of the reported joint state.
    - ``cycle_s``: the drives' control period.
    - ``history_s``: how far back :meth:`SimArm.state` can look.
    - ``seed``: seed of the joint-state noise.
    """

    velocity_lag_s: float = 0.02
    command_latency_s: float = 0.0
    command_timeout_s: float = 0.2
    decel_limit: float | tuple = 3.0
    joint_noise_std: float = 0.0
    velocity_noise_std: float = 0.0
    cycle_s: float = 1e-3
    history_s: float = 2.0
    seed: int = 0

    def __post_init__(self):
        for name in ("velocity_lag_s", "command_latency_s", "joint_noise_std",
                     "velocity_noise_std"):
            if not getattr(self, name) >= 0:
                raise ValueError(f"{name} must be >= 0, got {getattr(self, name)!r}")
        for name in ("command_timeout_s", "cycle_s", "history_s"):
            if not getattr(self, name) > 0:
                raise ValueError(f"{name} must be > 0, got {getattr(self, name)!r}")
        if not np.all(np.asarray(self.decel_limit, dtype=float) > 0):
            raise ValueError(f"decel_limit must be > 0 rad/s^2, got {self.decel_limit!r}")


@dataclass(frozen=True)
class _Cycle:
    """One control cycle from ``t0``: start state and how the velocity evolves over it.

    kind "lag": velocity follows reference ``r`` with time constant ``tau``;
    kind "brake": velocity is ``dq_b * max(0, 1 - (t - t_b) / T_b)`` (``brake`` holds
    ``(t_b, q_b, dq_b, T_b)``), evaluated from the brake's start for exactness.
    """

    t0: float
    q0: np.ndarray
    dq0: np.ndarray
    kind: str
    r: np.ndarray | None = None
    brake: tuple | None = None


class SimArm:
    """Joint-level simulation of an arm's drives.

    Args:
        model: ``vservo_node.control.kinematics.ArmModel`` (joint limits and names).
        q0: initial joint positions (n,), at rest.
        dynamics: :class:`ArmDynamics`.
        t0: initial time, seconds.
    """

    def __init__(self, model, q0, dynamics: ArmDynamics = ArmDynamics(), t0: float = 0.0):
        self.model = model
        self.dynamics = dynamics
        self.n = model.n
        self.joint_names = list(model.joint_names)
        self.lower, self.upper = np.asarray(model.lower), np.asarray(model.upper)
        self.vmax = np.asarray(model.velocity_limits, dtype=float)
        decel = np.asarray(dynamics.decel_limit, dtype=float)
        if decel.size not in (1, self.n):
            raise ValueError(f"decel_limit must be one value or {self.n} (one per joint), got "
                             f"{decel.size}")
        self.decel = np.broadcast_to(decel.ravel() if decel.size > 1 else decel, (self.n,)).copy()
        q0 = self._vector(q0, "q0")
        outside = (q0 < self.lower) | (q0 > self.upper)
        if outside.any():
            names = [self.joint_names[i] for i in np.flatnonzero(outside)]
            raise ValueError(f"q0 outside the joint limits for {', '.join(names)}")
        self.t = float(t0)
        self._cycle_index = 0  # cycles are t0 + k * cycle_s: no drift from summing floats
        self._t_origin = float(t0)
        self._q, self._dq = q0.copy(), np.zeros(self.n)
        self._pending = []  # (effective time, sequence, kind, payload), sorted
        self._sequence = 0
        self._mode = "hold"
        self._velocity_ref = np.zeros(self.n)
        self._last_velocity_time = -math.inf
        self._trajectory = None  # (t_start, q_start, dq_start, q_goal, duration)
        self._brake = None
        self._history = deque()
        self._history_t = deque()

    # ------------------------------------------------------------------ commands
    def _vector(self, value, name) -> np.ndarray:
        v = np.asarray(value, dtype=float)
        if v.shape != (self.n,) or not np.isfinite(v).all():
            raise ValueError(f"{name} must be {self.n} finite values in the order "
                             f"{', '.join(self.joint_names)}, got {np.asarray(value).tolist()}")
        return v

    def _queue(self, t, kind, payload):
        self._sequence += 1
        item = (float(t) + self.dynamics.command_latency_s, self._sequence, kind, payload)
        bisect.insort(self._pending, item)

    def command_velocity(self, dq, t: float) -> None:
        """Command joint velocities ``dq`` (n,) given at time ``t``; clamped to the URDF
        velocity limits when applied."""
        v = self._vector(dq, "dq")  # finite: the clamp as minimum(maximum()) is np.clip's value
        self._queue(t, "velocity", np.minimum(np.maximum(v, -self.vmax), self.vmax))

    def command_position(self, q, t: float, duration: float | None = None) -> None:
        """Command a move to joint positions ``q`` (n,) given at time ``t``, arriving at rest
        after ``duration`` seconds (default and minimum: as fast as the velocity limits allow
        for a cubic). Goals outside the position limits are clamped to them."""
        if duration is not None and not duration >= 0:
            raise ValueError(f"duration must be >= 0 seconds, got {duration!r}")
        goal = np.clip(self._vector(q, "q"), self.lower, self.upper)
        self._queue(t, "position", (goal, duration))

    # ------------------------------------------------------------------ stepping
    def step(self, dt: float) -> None:
        """Advance the simulation by ``dt`` >= 0 seconds.

        Consecutive cycles with one plan (the same velocity reference, the same brake ramp, or
        holding still: no command taking effect and no timeout in between) run as one stretch:
        the lag's and the brake's solutions are exact for any duration, so the state at the
        stretch's end is evaluated once from its start, the same motion as cycle by cycle up to
        float rounding. A stretch of lag cycles that could reach a position limit runs cycle by
        cycle, as a joint stopped there starts the next cycle at rest."""
        if not dt >= 0:
            raise ValueError(f"dt must be >= 0, got {dt!r}")
        t_end = self.t + dt
        h = self.dynamics.cycle_s
        while self._cycle_time(self._cycle_index + 1) <= t_end + 1e-12:
            k = self._cycle_index
            t0 = self._cycle_time(k)
            self._apply_commands(t0)
            cycle = self._plan_cycle(t0)
            m = self._stretch(k, t_end + 1e-12)
            if m > 1 and cycle.kind == "lag" and not self._lag_stays_inside(cycle, m * h):
                m = 1
            last = k + m - 1
            self._history.append(cycle)
            self._history_t.append(t0)
            cutoff = self._cycle_time(last) - self.dynamics.history_s
            while len(self._history_t) > 1 and self._history_t[1] <= cutoff:
                self._history.popleft()
                self._history_t.popleft()
            self._q, self._dq = self._evaluate(cycle, self._cycle_time(last) + h)
            self._cycle_index = last + 1
        self.t = t_end

    def _stretch(self, k: int, t_limit: float) -> int:
        """How many cycles from cycle ``k`` (already applied and planned) share its plan and
        end by ``t_limit``: the later ones apply no command, start no brake and end no
        brake (the tests of :meth:`_apply_commands` and :meth:`_plan_cycle`)."""
        mode = self._mode
        if mode == "position":
            return 1
        pending = self._pending[0][0] if self._pending else math.inf
        if mode == "velocity":
            until = self._last_velocity_time + self.dynamics.command_timeout_s
        elif mode == "brake":
            until = self._brake[0] + self._brake[3]
        else:
            until = math.inf
        m = 1
        while self._cycle_time(k + m + 1) <= t_limit:
            t_j = self._cycle_time(k + m)
            if pending <= t_j + 1e-12 or t_j >= until - 1e-12:
                break
            m += 1
        return m

    def _lag_stays_inside(self, cycle: "_Cycle", duration: float) -> bool:
        """Whether a lag stretch of ``duration`` seconds keeps every joint strictly inside its
        limits: the velocity moves between dq0 and r, so no joint travels further than
        max(|dq0|, |r|) * duration."""
        reach = np.maximum(np.abs(cycle.dq0), np.abs(cycle.r)) * duration
        return bool((cycle.q0 - reach > self.lower).all()
                    and (cycle.q0 + reach < self.upper).all())

    def _cycle_time(self, k: int) -> float:
        return self._t_origin + k * self.dynamics.cycle_s

    def _history_floor(self) -> float:
        """Start of the oldest cycle kept: the cycles starting ``history_s`` or less before the
        last one run."""
        h = self.dynamics.cycle_s
        cutoff = self._cycle_time(self._cycle_index - 1) - self.dynamics.history_s
        j = max(0, math.ceil((cutoff - self._t_origin) / h))
        while j > 0 and self._cycle_time(j - 1) >= cutoff:
            j -= 1
        while self._cycle_time(j) < cutoff:
            j += 1
        return self._cycle_time(j)

    def _apply_commands(self, t0):
        while self._pending and self._pending[0][0] <= t0 + 1e-12:
            t_eff, _, kind, payload = self._pending.pop(0)
            if kind == "velocity":
                self._mode, self._velocity_ref = "velocity", payload
                self._last_velocity_time = t_eff
            else:
                goal, duration = payload
                self._mode = "position"
                self._trajectory = (t0, self._q.copy(), self._dq.copy(), goal,
                                    self._move_duration(goal, duration))
        if (self._mode == "velocity"
                and t0 >= self._last_velocity_time + self.dynamics.command_timeout_s - 1e-12):
            self._start_brake(t0)

    def _start_brake(self, t0):
        # Synchronised stop: the joint needing longest sets the ramp time for all.
        T_b = float(np.max(np.abs(self._dq) / self.decel))
        self._mode = "brake" if T_b > 0 else "hold"
        self._brake = (t0, self._q.copy(), self._dq.copy(), T_b)

    def _move_duration(self, goal, duration):
        """A cubic with zero end velocities peaks at 1.5 * distance / duration."""
        fastest = float(np.max(1.5 * np.abs(goal - self._q) / self.vmax))
        return max(fastest, duration or 0.0)

    def _plan_cycle(self, t0) -> _Cycle:
        if self._mode == "brake":
            t_b, _, _, T_b = self._brake
            if t0 >= t_b + T_b - 1e-12:
                self._mode = "hold"
                self._dq = np.zeros(self.n)
            else:
                return _Cycle(t0, self._q, self._dq, "brake", brake=self._brake)
        if self._mode == "velocity":
            r = self._velocity_ref
        elif self._mode == "position":
            r = self._position_reference(t0)
        else:
            r = np.zeros(self.n)
        return _Cycle(t0, self._q, self._dq, "lag", r=r)

    def _position_reference(self, t0):
        """Velocity reference of a trajectory cycle: the cubic's mean velocity over the cycle
        plus position feedback; the gain 1/(4 tau) makes the loop with the lag critically
        damped (poles of s^2 tau + s + k)."""
        h = self.dynamics.cycle_s
        feedforward = (self._trajectory_point(t0 + h) - self._trajectory_point(t0)) / h
        gain = 1.0 / (4.0 * max(self.dynamics.velocity_lag_s, h))
        r = feedforward + gain * (self._trajectory_point(t0) - self._q)
        return np.clip(r, -self.vmax, self.vmax)

    def _trajectory_point(self, t):
        """Cubic Hermite from (q_start, dq_start) to (q_goal, 0) (Siciliano et al. 2009,
        Robotics: Modelling, Planning and Control, sec. 4.2.1, cubic polynomial)."""
        t_start, q_start, dq_start, goal, duration = self._trajectory
        if duration <= 0 or t >= t_start + duration:
            return goal
        s = (t - t_start) / duration
        h00, h10, h01 = 2 * s**3 - 3 * s**2 + 1, s**3 - 2 * s**2 + s, -2 * s**3 + 3 * s**2
        return h00 * q_start + h10 * duration * dq_start + h01 * goal

    def _evaluate(self, cycle: _Cycle, t):
        """Exact state at time ``t`` within ``cycle``; joints stop at their position limits."""
        if cycle.kind == "brake":
            t_b, q_b, dq_b, T_b = cycle.brake
            u = min(t - t_b, T_b)
            q = q_b + dq_b * (u - u * u / (2.0 * T_b))
            dq = dq_b * max(0.0, 1.0 - (t - t_b) / T_b)
        else:
            tau = self.dynamics.velocity_lag_s
            dt = t - cycle.t0
            if tau > 0:
                decay = math.exp(-dt / tau)
                q = cycle.q0 + cycle.r * dt + (cycle.dq0 - cycle.r) * tau * (1.0 - decay)
                dq = cycle.r + (cycle.dq0 - cycle.r) * decay
            else:
                q, dq = cycle.q0 + cycle.r * dt, cycle.r.copy()
        if (q > self.lower).all() and (q < self.upper).all():
            return q, dq  # inside every limit: nothing to clip or stop
        stopped = ((q <= self.lower) & (dq <= 0)) | ((q >= self.upper) & (dq >= 0))
        return np.clip(q, self.lower, self.upper), np.where(stopped, 0.0, dq)

    # ------------------------------------------------------------------ state
    def true_state(self, t: float | None = None):
        """Noise-free ``(q, dq)`` at time ``t`` (default: now); ``t`` may lie up to
        ``history_s`` in the past but not in the future."""
        t = self.t if t is None else float(t)
        if t > self.t + 1e-9:
            raise ValueError(f"state asked for t={t:.6f} s, after the simulation time "
                             f"{self.t:.6f} s: step first")
        current_start = self._cycle_time(self._cycle_index)
        if t >= current_start - 1e-12:
            return self._preview(current_start, t)
        i = bisect.bisect_right(self._history_t, t) - 1
        if i < 0 or t < self._history_floor():
            raise ValueError(f"state asked for t={t:.6f} s, older than the kept history "
                             f"({self.dynamics.history_s} s)")
        return self._evaluate(self._history[i], t)

    def _preview(self, t0, t):
        """State at ``t`` inside the cycle starting at ``t0``, without running it: a shallow
        copy decides the cycle (its command handling only rebinds attributes)."""
        if t <= t0 + 1e-12:
            return self._q.copy(), self._dq.copy()
        shadow = copy.copy(self)
        shadow._pending = list(self._pending)
        shadow._apply_commands(t0)
        return self._evaluate(shadow._plan_cycle(t0), t)

    def state(self, t: float | None = None):
        """Reported ``(q, dq)`` at time ``t`` (default: now): the true state plus the joint-state
        noise of :class:`ArmDynamics`, the same for the same ``t`` on every call."""
        t = self.t if t is None else float(t)
        q, dq = self.true_state(t)
        d = self.dynamics
        if d.joint_noise_std > 0 or d.velocity_noise_std > 0:
            rng = np.random.default_rng(seeding.seed_material(d.seed, seeding.JOINT_NOISE, t))
            q = q + rng.normal(0.0, d.joint_noise_std, self.n)
            if d.velocity_noise_std > 0:  # (a draw with std 0 adds zeros)
                dq = dq + rng.normal(0.0, d.velocity_noise_std, self.n)
        return q, dq

    @property
    def mode(self) -> str:
        """``hold``, ``velocity``, ``position`` or ``brake`` (as of the last cycle run)."""
        return self._mode
