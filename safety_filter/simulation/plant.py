"""Simulated arm and closed-loop runs: the plant the filter is tried against.

:class:`ArmSimulator` integrates the model's dynamics with a fixed-step RK4 at an internal
rate well above the control rate, holding the torque between control steps and saturating
it to the effort limits as a driver does. It shares the dynamics with the filter (one
dynamics in the package); the tests check it against SciPy's ``solve_ivp``.

Coulomb friction is simulated as the physical stick-slip law by default
(``coulomb_law='stick_slip'``): a moving joint feels ``f_c`` against its motion; when its
velocity reaches zero it stops there (the instant is found within the integration step),
and a joint at rest stays at rest while the torque the rest of the arm would need from its
friction to hold it stays within ``f_c``; beyond that it breaks away, with ``f_c`` against
the direction it starts in. With several joints at rest at once, which of them stick is
decided together (:func:`rest_accelerations`). The plain law ``f_c sign(v)``
(``coulomb_law='sign'``) is kept for comparison: integrated with a fixed step it makes a
joint near zero velocity chatter, accelerating it through zero by up to ``f_c`` over its
inertia within each step. Arms without Coulomb friction are integrated the same way under
either law.

:func:`run_plant_loop` wires a nominal command source, a filter step and a plant (a
:class:`safety_filter.core.model_uncertainty.Plant`: its own inertias, payload, driver torque
error,
measurement noise and delay, and optional external pushes) together at a control rate;
:func:`run_closed_loop` is the same loop with the model itself as the plant, returning a
:class:`ClosedLoopLog`. :func:`limit_violations` measures how far a log went past each
limit.
"""

from __future__ import annotations

from collections.abc import Callable, Sequence
from dataclasses import dataclass, replace

import numpy as np

from safety_filter.core.dynamics import Dynamics
from safety_filter.core.friction import COULOMB_LAWS, rest_accelerations
from safety_filter.core.model_uncertainty import Plant, model_with_inertials, nominal_plant
from safety_filter.core.robot_model import RobotModel
from safety_filter.errors import InvalidValue, NonFiniteValue, ShapeMismatch

NominalPolicy = Callable[[float, np.ndarray, np.ndarray], np.ndarray]
# Zero crossings of a joint's velocity found within one integration step: at most this many
# per joint and step (a joint stops, breaks away and stops again); past it the rest of the
# step is integrated with its joints' friction directions held.
_EVENTS_PER_JOINT = 4
_STOP_ITERATIONS = 12  # regula falsi steps to find the instant a joint stops
# A joint counts as stopped once its velocity is within this [rad/s or m/s] (relative to
# 1 + its speed at the step's start) of zero; the rest is set to zero. Far below any
# velocity that matters (encoder noise is about 1e-2 rad/s) and than RK4's own error.
_STOP_TOLERANCE = 1e-9


class ArmSimulator:
    """Fixed-step RK4 simulation of the arm under a held, saturated torque.

    Args:
        model: the robot model.
        payload_mass: payload on the tip [kg].
        internal_rate_hz: integration rate [Hz] (RK4 steps per second).
        backend: dynamics backend (see :class:`Dynamics`).
        coulomb_law: ``'stick_slip'`` (default: joints stop at zero velocity and stick while
            their Coulomb friction can hold them; see the module docstring) or ``'sign'``
            (``f_c sign(v)`` at every RK4 stage).

    Attributes:
        external: an external torque [N m] added to the drive torque after saturation (a
            push); zero unless set.
        stops: how many times a joint's velocity came to zero under the stick-slip law.
    """

    def __init__(self, model: RobotModel, payload_mass: float = 0.0,
                 internal_rate_hz: float = 10_000.0, backend: str = 'auto',
                 coulomb_law: str = 'stick_slip') -> None:
        if not internal_rate_hz > 0.0:
            raise InvalidValue('internal_rate_hz', internal_rate_hz, 'a positive number')
        if coulomb_law not in COULOMB_LAWS:
            raise InvalidValue('coulomb_law', coulomb_law, f'one of {", ".join(COULOMB_LAWS)}')
        self.model = model
        self.dynamics = Dynamics(model, payload_mass=payload_mass, backend=backend)
        self.internal_period_s = 1.0 / internal_rate_hz
        self.effort_limit = np.array(model.effort_limit)
        self.coulomb_law = coulomb_law
        n = model.n_joints
        self.q = 0.5 * (np.array(model.position_lower) + np.array(model.position_upper))
        self.v = np.zeros(n)
        self.time_s = 0.0
        self.external = np.zeros(n)
        self.stops = 0
        self._coulomb = np.array(model.coulomb_friction, dtype=float)
        self._stick_slip = coulomb_law == 'stick_slip' and bool(np.any(self._coulomb > 0.0))
        if self._stick_slip:
            # The dynamics without Coulomb friction: the stick-slip step adds its own.
            self._smooth = Dynamics(model_with_inertials(model, coulomb_friction=np.zeros(n)),
                                    payload_mass=payload_mass, backend=self.dynamics.backend)

    def reset(self, q: np.ndarray, v: np.ndarray | None = None, time_s: float = 0.0) -> None:
        """Set the state [rad, rad/s] and the clock [s]."""
        q = np.asarray(q, dtype=float)
        v = np.zeros_like(q) if v is None else np.asarray(v, dtype=float)
        if q.shape != (self.model.n_joints,) or v.shape != q.shape:
            raise ShapeMismatch('state', self.model.n_joints, q.shape if q.shape != (
                self.model.n_joints,) else v.shape)
        if not (np.all(np.isfinite(q)) and np.all(np.isfinite(v))):
            raise NonFiniteValue('state')
        self.q, self.v, self.time_s = q.copy(), v.copy(), float(time_s)

    def _derivative(self, q: np.ndarray, v: np.ndarray, u: np.ndarray
                    ) -> tuple[np.ndarray, np.ndarray]:
        return v, self.dynamics.forward_dynamics(q, v, u + self.external)

    def advance(self, torque: np.ndarray, duration_s: float) -> None:
        """Hold ``torque`` (saturated to the effort limits) for ``duration_s`` seconds."""
        u = np.clip(np.asarray(torque, dtype=float), -self.effort_limit, self.effort_limit)
        if u.shape != self.q.shape:
            raise ShapeMismatch('torque', self.q.shape, u.shape)
        if not np.all(np.isfinite(u)):
            raise NonFiniteValue('torque', u.tolist())
        steps = max(1, int(round(duration_s / self.internal_period_s)))
        dt = duration_s / steps
        q, v = self.q, self.v
        if self._stick_slip:
            drive = u + self.external
            for _ in range(steps):
                q, v = self._stick_slip_step(q, v, drive, dt)
        else:
            for _ in range(steps):
                k1q, k1v = self._derivative(q, v, u)
                k2q, k2v = self._derivative(q + 0.5 * dt * k1q, v + 0.5 * dt * k1v, u)
                k3q, k3v = self._derivative(q + 0.5 * dt * k2q, v + 0.5 * dt * k2v, u)
                k4q, k4v = self._derivative(q + dt * k3q, v + dt * k3v, u)
                q = q + dt / 6.0 * (k1q + 2.0 * k2q + 2.0 * k3q + k4q)
                v = v + dt / 6.0 * (k1v + 2.0 * k2v + 2.0 * k3v + k4v)
        self.q, self.v = q, v
        self.time_s += duration_s

    # ------------------------------------------------------------------ stick-slip
    def _modes(self, q: np.ndarray, v: np.ndarray, drive: np.ndarray
               ) -> tuple[np.ndarray, np.ndarray, np.ndarray | None]:
        """Per joint, the direction its Coulomb friction acts against over the next step
        (+-1 moving or breaking away, 0 otherwise) and whether it sticks; and the
        acceleration at this state when deciding that needed it (else None)."""
        direction = np.sign(v)
        at_rest = (v == 0.0) & (self._coulomb > 0.0)
        if not at_rest.any():
            return direction, at_rest, None
        mass, bias = self._smooth.mass_and_bias(q, v)
        accel, start = rest_accelerations(mass, drive - bias - self._coulomb * direction,
                                          self._coulomb, at_rest)
        direction = np.where(at_rest, start, direction)
        return direction, at_rest & (direction == 0.0), accel

    def _acceleration(self, q: np.ndarray, v: np.ndarray, force: np.ndarray,
                      stuck: np.ndarray) -> np.ndarray:
        """Acceleration under ``force`` (drive minus Coulomb friction), stuck joints held."""
        if not stuck.any():
            return self._smooth.forward_dynamics(q, v, force)
        mass, bias = self._smooth.mass_and_bias(q, v)
        free = ~stuck
        a = np.zeros(len(v))
        if free.any():
            a[free] = np.linalg.solve(mass[np.ix_(free, free)], (force - bias)[free])
        return a

    def _rk4(self, q: np.ndarray, v: np.ndarray, force: np.ndarray, stuck: np.ndarray,
             dt: float, k1v: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
        """One RK4 step with the friction directions held (smooth dynamics within it);
        ``k1v`` is the acceleration at its start (shared by every trial step from there)."""
        k2v = self._acceleration(q + 0.5 * dt * v, v + 0.5 * dt * k1v, force, stuck)
        k2q = v + 0.5 * dt * k1v
        k3v = self._acceleration(q + 0.5 * dt * k2q, v + 0.5 * dt * k2v, force, stuck)
        k3q = v + 0.5 * dt * k2v
        k4v = self._acceleration(q + dt * k3q, v + dt * k3v, force, stuck)
        k4q = v + dt * k3v
        q_next = q + dt / 6.0 * (v + 2.0 * k2q + 2.0 * k3q + k4q)
        v_next = v + dt / 6.0 * (k1v + 2.0 * k2v + 2.0 * k3v + k4v)
        v_next[stuck] = 0.0  # exactly: a stuck joint does not creep by round-off
        return q_next, v_next

    def _stick_slip_step(self, q: np.ndarray, v: np.ndarray, drive: np.ndarray, dt: float
                         ) -> tuple[np.ndarray, np.ndarray]:
        """Advance ``dt`` under the stick-slip law: RK4 with each joint's friction
        direction held, cut at the first instant a moving joint's velocity reaches zero,
        where that joint is stopped and the directions are decided again."""
        remaining = dt
        for _ in range(_EVENTS_PER_JOINT * len(v) + 1):
            direction, stuck, k1v = self._modes(q, v, drive)
            force = drive - self._coulomb * direction
            if k1v is None:
                k1v = self._acceleration(q, v, force, stuck)
            q_end, v_end = self._rk4(q, v, force, stuck, remaining, k1v)
            moving = (direction != 0.0) & (self._coulomb > 0.0)
            crossed = moving & (direction * v_end <= 0.0)
            if not crossed.any():
                return q_end, v_end
            q, v, spent = self._to_first_stop(q, v, force, stuck, k1v, direction, crossed,
                                              v_end, remaining)
            remaining -= spent
            if remaining <= 1e-15 * dt:
                return q, v
        # Too many events in one step (should not happen at sensible rates): finish it with
        # the directions held and stop any joint that reached zero (friction only brakes).
        direction, stuck, _ = self._modes(q, v, drive)
        force = drive - self._coulomb * direction
        q, v = self._rk4(q, v, force, stuck, remaining, self._acceleration(q, v, force, stuck))
        v[(direction != 0.0) & (direction * v < 0.0)] = 0.0
        return q, v

    def _to_first_stop(self, q: np.ndarray, v: np.ndarray, force: np.ndarray,
                       stuck: np.ndarray, k1v: np.ndarray, direction: np.ndarray,
                       crossed: np.ndarray, v_end: np.ndarray, span: float
                       ) -> tuple[np.ndarray, np.ndarray, float]:
        """State at the first instant within ``span`` at which a moving joint stops (its
        velocity zero, set exactly), and that instant."""
        start = direction * v
        finish = direction * v_end
        slope = direction * k1v
        # When each crossing joint stops, from the quadratic through its velocity and
        # acceleration at the start and its velocity at the end of the step; the first one
        # is then found precisely.
        guess = np.full(len(v), np.inf)
        for i in np.flatnonzero(crossed):
            curve = (finish[i] - start[i] - slope[i] * span) / span ** 2
            roots = np.roots([curve, slope[i], start[i]])
            real = roots[(np.abs(roots.imag) <= 1e-12 * span) & (roots.real > 0.0)
                         & (roots.real <= span)].real
            linear = span * start[i] / max(start[i] - finish[i], 1e-300)
            guess[i] = real.min() if len(real) else linear
        j = int(np.argmin(guess))
        if not start[j] > 0.0:
            # It started this step at rest, broke away and came back within the step: take
            # half the step and decide again from there.
            t = 0.5 * span
            q_t, v_t = self._rk4(q, v, force, stuck, t, k1v)
        else:
            # Regula falsi (Illinois variant) on the joint's velocity along its RK4 step,
            # from the guess.
            lo, f_lo, hi, f_hi = 0.0, start[j], span, finish[j]
            t, side = float(np.clip(guess[j], 0.0, span)), 0
            for _ in range(_STOP_ITERATIONS):
                q_t, v_t = self._rk4(q, v, force, stuck, t, k1v)
                f_t = direction[j] * v_t[j]
                if abs(f_t) <= _STOP_TOLERANCE * (1.0 + start[j]):
                    break
                if f_t > 0.0:
                    lo, f_lo = t, f_t
                    if side == 1:
                        f_hi *= 0.5
                    side = 1
                else:
                    hi, f_hi = t, f_t
                    if side == -1:
                        f_lo *= 0.5
                    side = -1
                t = float(np.clip((lo * f_hi - hi * f_lo) / (f_hi - f_lo), lo, hi))
        # The first joint, and any other that reached zero as well by then, stop.
        stopped = crossed & (direction * v_t <= 0.0)
        if start[j] > 0.0:
            stopped[j] = True
        v_t = v_t.copy()
        v_t[stopped] = 0.0
        self.stops += int(np.count_nonzero(stopped))
        return q_t, v_t, t


@dataclass
class ClosedLoopLog:
    """Samples of a closed-loop run, one row per control step.

    Attributes:
        time_s: (T,) step times [s]; q, v: (T, n) measured state; nominal, torque: (T, n)
        nominal and applied torque; mode: (T,) filter mode names; margin: (T, n) smallest
        barrier value per joint.
    """

    time_s: np.ndarray
    q: np.ndarray
    v: np.ndarray
    nominal: np.ndarray
    torque: np.ndarray
    mode: np.ndarray
    margin: np.ndarray


def run_closed_loop(
    model: RobotModel,
    step: Callable[[np.ndarray, np.ndarray, np.ndarray], object] | None,
    nominal: NominalPolicy,
    duration_s: float,
    control_rate_hz: float,
    q0: np.ndarray,
    v0: np.ndarray | None = None,
    payload_mass: float = 0.0,
    internal_rate_hz: float = 10_000.0,
    coulomb_law: str = 'stick_slip',
    delay_periods: int = 0,
) -> ClosedLoopLog:
    """Run nominal -> filter step -> simulated arm at ``control_rate_hz``: the plant loop of
    :func:`run_plant_loop` with ``model`` itself as the plant (no noise or torque error; the
    command acts ``delay_periods`` control periods after its step). The applied torque is the
    step's output saturated by the simulator.

    Args:
        step: a filter step ``step(q, v, u_nom)`` returning an object with ``torque``, ``mode``
            and ``barrier_margin`` (a :class:`safety_filter.SafetyFilter` ``step``), or None to
            pass the nominal straight to the arm (the unfiltered baseline, simulation only).
        nominal: the command source ``nominal(t, q, v) -> u_nom``.
        coulomb_law: the simulator's Coulomb friction law (:class:`ArmSimulator`).
    """
    margins: list[np.ndarray] = []

    def recorded(q: np.ndarray, v: np.ndarray, u_nom: np.ndarray) -> object:
        out = step(q, v, u_nom)  # type: ignore[misc]
        margins.append(np.array(out.barrier_margin))  # type: ignore[attr-defined]
        return out

    plant = replace(nominal_plant(model, payload_mass), delay_periods=int(delay_periods))
    log = run_plant_loop(plant, None if step is None else recorded, nominal, duration_s,
                         control_rate_hz, q0, v0, internal_rate_hz=internal_rate_hz,
                         coulomb_law=coulomb_law)
    n = model.n_joints
    margin = np.array(margins) if margins else np.full((len(log.time_s), n), np.nan)
    return ClosedLoopLog(log.time_s, log.q, log.v, log.nominal, log.command, log.mode, margin)


# ---------------------------------------------------------------------- plants unlike the model
@dataclass(frozen=True)
class Push:
    """An external torque ``torque`` [N m] on the plant from ``start_s`` for ``duration_s``.

    It acts at the control steps whose time lies in ``[start_s, start_s + duration_s)``
    (held over each such control period, like the drive torque).
    """

    start_s: float
    duration_s: float
    torque: np.ndarray

    @property
    def end_s(self) -> float:
        return self.start_s + self.duration_s


@dataclass
class PlantLog:
    """Samples of one run, one row per control step (arrays (T,) or (T, n)).

    Attributes:
        time_s: step times [s]; q, v: the true state; measured_q, measured_v: what the
            filter and the nominal saw (true state + noise); nominal: the nominal torque;
            command: the filter's output (full-torque convention); applied: the torque the
            driver applied (delayed command, gain and offset, saturated); demand: the
            driver's ``gain * u + offset`` before saturation; external: push torque;
            mode: filter mode names; margin: smallest barrier value per joint of the TRUE
            state (NaN when no barrier function was given).
    """

    time_s: np.ndarray
    q: np.ndarray
    v: np.ndarray
    measured_q: np.ndarray
    measured_v: np.ndarray
    nominal: np.ndarray
    command: np.ndarray
    applied: np.ndarray
    demand: np.ndarray
    external: np.ndarray
    mode: np.ndarray
    margin: np.ndarray


def run_plant_loop(
    plant: Plant,
    step: Callable[[np.ndarray, np.ndarray, np.ndarray], object] | None,
    nominal: NominalPolicy,
    duration_s: float,
    control_rate_hz: float,
    q0: np.ndarray,
    v0: np.ndarray | None = None,
    *,
    rng: np.random.Generator | None = None,
    pushes: Sequence[Push] = (),
    barrier: Callable[[np.ndarray, np.ndarray], np.ndarray] | None = None,
    internal_rate_hz: float = 10_000.0,
    coulomb_law: str = 'stick_slip',
) -> PlantLog:
    """Closed loop of a plant, a nominal and a filter step, with the plant's imperfections.

    At each control step ``k`` (time ``t_k = k T``):

    1. the filter and the nominal see the measured state: the true state plus noise drawn
       uniformly within ``+-plant.position_noise`` and ``+-plant.velocity_noise``;
    2. ``nominal(t_k, q_meas, v_meas)`` gives ``u_nom``; ``step(q_meas, v_meas, u_nom)``
       gives the command ``u_k`` (``step=None``: the nominal itself, simulation only);
    3. the command acts ``plant.delay_periods = d`` periods later (a FIFO): the driver
       applies ``clip(gain * u_{k-d} + offset, -effort_limit, effort_limit)``. Before the
       first command arrives (``k < d``) the driver applies the FIRST command ``u_0``, as if
       the arm had been under this control before the run began;
    4. the plant (:class:`ArmSimulator` with the plant's model and payload, RK4 at
       ``internal_rate_hz``, Coulomb friction by ``coulomb_law``) holds that torque, plus
       any active push, for one period.

    Args:
        plant: the arm (see :class:`safety_filter.core.model_uncertainty.Plant`).
        step: a filter step (``SafetyFilter.step``) or None.
        nominal: the command source ``nominal(t, q, v)``.
        rng: the noise generator (default: seeded with 0).
        pushes: external torque impulses.
        barrier: ``barrier(q, v) -> smallest barrier value per joint`` (batched over rows),
            evaluated on the true states, e.g. ``certificate.safe_set_margins``.
    """
    if not (control_rate_hz > 0.0 and duration_s > 0.0):
        raise InvalidValue('control rate and duration', (control_rate_hz, duration_s),
                           'both positive')
    model = plant.model
    n = model.n_joints
    rng = np.random.default_rng(0) if rng is None else rng
    arm = ArmSimulator(model, plant.payload_mass, internal_rate_hz, coulomb_law=coulomb_law)
    arm.reset(q0, v0)
    period = 1.0 / control_rate_hz
    steps = int(round(duration_s * control_rate_hz))
    delay = int(plant.delay_periods)
    umax = np.array(model.effort_limit)
    gain, offset = np.asarray(plant.torque_gain, float), np.asarray(plant.torque_offset, float)
    pos_noise, vel_noise = float(plant.position_noise), float(plant.velocity_noise)

    def empty() -> np.ndarray:
        return np.zeros((steps, n))

    log = PlantLog(np.zeros(steps), empty(), empty(), empty(), empty(), empty(), empty(),
                   empty(), empty(), empty(), np.empty(steps, dtype=object),
                   np.full((steps, n), np.nan))
    zero = np.zeros(n)
    for k in range(steps):
        t, q, v = k * period, arm.q, arm.v
        q_meas = q + rng.uniform(-pos_noise, pos_noise, n) if pos_noise > 0.0 else q.copy()
        v_meas = v + rng.uniform(-vel_noise, vel_noise, n) if vel_noise > 0.0 else v.copy()
        u_nom = np.asarray(nominal(t, q_meas, v_meas), dtype=float)
        if step is None:
            command, mode = u_nom, 'unfiltered'
        else:
            out = step(q_meas, v_meas, u_nom)
            command = np.array(out.torque)  # type: ignore[attr-defined]
            mode = str(out.mode)  # type: ignore[attr-defined]
        log.command[k] = command
        demand = gain * log.command[max(k - delay, 0)] + offset
        applied = np.clip(demand, -umax, umax)
        external = zero
        for push in pushes:
            if push.start_s - 1e-9 <= t < push.end_s - 1e-9:
                external = external + push.torque
        log.time_s[k], log.q[k], log.v[k] = t, q, v
        log.measured_q[k], log.measured_v[k], log.nominal[k] = q_meas, v_meas, u_nom
        log.applied[k], log.demand[k], log.external[k], log.mode[k] = (applied, demand,
                                                                     external, mode)
        arm.external = external
        arm.advance(applied, period)
    if barrier is not None and steps:
        log.margin = np.asarray(barrier(log.q, log.v), dtype=float)
    return log


def limit_violations(model: RobotModel, q: np.ndarray, v: np.ndarray, torque: np.ndarray
                     ) -> dict[str, np.ndarray]:
    """Largest excursion past each limit per joint (0 when kept) over a run.

    Returns a dict with 'position' [rad or m], 'velocity' [rad/s or m/s] and 'torque'
    [N m or N], each of shape (n,).
    """
    lower, upper = np.array(model.position_lower), np.array(model.position_upper)
    position = np.maximum(np.max(q - upper, axis=0), np.max(lower - q, axis=0))
    velocity = np.max(np.abs(v) - np.array(model.velocity_limit), axis=0)
    effort = np.max(np.abs(torque) - np.array(model.effort_limit), axis=0)
    return {'position': np.maximum(position, 0.0), 'velocity': np.maximum(velocity, 0.0),
            'torque': np.maximum(effort, 0.0)}
