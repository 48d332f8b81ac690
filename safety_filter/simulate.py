"""Simulated arm and closed-loop runs: the plant the filter is tried against.

:class:`ArmSimulator` integrates the model's dynamics with a fixed-step RK4 at an internal
rate well above the control rate, holding the torque between control steps and saturating
it to the effort limits as a driver does. It shares the dynamics with the filter (one
dynamics in the package); the tests check it against SciPy's ``solve_ivp``.

:func:`run_plant_loop` wires a nominal command source, a filter step and a plant (a
:class:`safety_filter.uncertainty.Plant`: its own inertias, payload, driver torque error,
measurement noise and delay, and optional external pushes) together at a control rate;
:func:`run_closed_loop` is the same loop with the model itself as the plant, returning a
:class:`ClosedLoopLog`. :func:`limit_violations` measures how far a log went past each
limit.
"""

from __future__ import annotations

from collections.abc import Callable, Sequence
from dataclasses import dataclass

import numpy as np

from safety_filter.dynamics import Dynamics
from safety_filter.errors import SafetyFilterError
from safety_filter.model import RobotModel
from safety_filter.uncertainty import Plant, nominal_plant

NominalPolicy = Callable[[float, np.ndarray, np.ndarray], np.ndarray]


class ArmSimulator:
    """Fixed-step RK4 simulation of the arm under a held, saturated torque.

    Args:
        model: the robot model.
        payload_mass: payload on the tip [kg].
        internal_rate_hz: integration rate [Hz] (RK4 steps per second).
        backend: dynamics backend (see :class:`Dynamics`).
    """

    def __init__(self, model: RobotModel, payload_mass: float = 0.0,
                 internal_rate_hz: float = 10_000.0, backend: str = 'auto') -> None:
        if not internal_rate_hz > 0.0:
            raise ValueError('internal_rate_hz must be positive')
        self.model = model
        self.dynamics = Dynamics(model, payload_mass=payload_mass, backend=backend)
        self.internal_period_s = 1.0 / internal_rate_hz
        self.effort_limit = np.array(model.effort_limit)
        n = model.n_joints
        self.q = 0.5 * (np.array(model.position_lower) + np.array(model.position_upper))
        self.v = np.zeros(n)
        self.time_s = 0.0

    def reset(self, q: np.ndarray, v: np.ndarray | None = None, time_s: float = 0.0) -> None:
        """Set the state [rad, rad/s] and the clock [s]."""
        q = np.asarray(q, dtype=float)
        v = np.zeros_like(q) if v is None else np.asarray(v, dtype=float)
        if q.shape != (self.model.n_joints,) or v.shape != q.shape:
            raise ValueError(f'state must have {self.model.n_joints} entries')
        if not (np.all(np.isfinite(q)) and np.all(np.isfinite(v))):
            raise ValueError('state must be finite')
        self.q, self.v, self.time_s = q.copy(), v.copy(), float(time_s)

    def _derivative(self, q: np.ndarray, v: np.ndarray, u: np.ndarray
                    ) -> tuple[np.ndarray, np.ndarray]:
        return v, self.dynamics.forward_dynamics(q, v, u)

    def advance(self, torque: np.ndarray, duration_s: float) -> None:
        """Hold ``torque`` (saturated to the effort limits) for ``duration_s`` seconds."""
        u = np.clip(np.asarray(torque, dtype=float), -self.effort_limit, self.effort_limit)
        if u.shape != self.q.shape or not np.all(np.isfinite(u)):
            raise ValueError('torque must be finite with one entry per joint')
        steps = max(1, int(round(duration_s / self.internal_period_s)))
        dt = duration_s / steps
        q, v = self.q, self.v
        for _ in range(steps):
            k1q, k1v = self._derivative(q, v, u)
            k2q, k2v = self._derivative(q + 0.5 * dt * k1q, v + 0.5 * dt * k1v, u)
            k3q, k3v = self._derivative(q + 0.5 * dt * k2q, v + 0.5 * dt * k2v, u)
            k4q, k4v = self._derivative(q + dt * k3q, v + dt * k3v, u)
            q = q + dt / 6.0 * (k1q + 2.0 * k2q + 2.0 * k3q + k4q)
            v = v + dt / 6.0 * (k1v + 2.0 * k2v + 2.0 * k3v + k4v)
        self.q, self.v = q, v
        self.time_s += duration_s


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
) -> ClosedLoopLog:
    """Run nominal -> filter step -> simulated arm at ``control_rate_hz``: the plant loop of
    :func:`run_plant_loop` with ``model`` itself as the plant (no noise, delay or torque
    error). The applied torque is the step's output saturated by the simulator.

    Args:
        step: a filter step ``step(q, v, u_nom)`` returning an object with ``torque``, ``mode``
            and ``barrier_margin`` (a :class:`safety_filter.SafetyFilter` ``step``), or None to
            pass the nominal straight to the arm (the unfiltered baseline, simulation only).
        nominal: the command source ``nominal(t, q, v) -> u_nom``.
    """
    margins: list[np.ndarray] = []

    def recorded(q: np.ndarray, v: np.ndarray, u_nom: np.ndarray) -> object:
        out = step(q, v, u_nom)  # type: ignore[misc]
        margins.append(np.array(out.barrier_margin))  # type: ignore[attr-defined]
        return out

    plant = nominal_plant(model, payload_mass)
    log = run_plant_loop(plant, None if step is None else recorded, nominal, duration_s,
                         control_rate_hz, q0, v0, internal_rate_hz=internal_rate_hz)
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
            state (NaN when no barrier function was given); pushback: the filter fell back
            to the constructive push-back (its QP could not meet the bounds in the box).
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
    pushback: np.ndarray | None = None


class _PushedArm(ArmSimulator):
    """:class:`ArmSimulator` with an external torque added after the driver's saturation."""

    def __init__(self, model: RobotModel, payload_mass: float, internal_rate_hz: float
                 ) -> None:
        super().__init__(model, payload_mass, internal_rate_hz)
        self.external = np.zeros(model.n_joints)

    def _derivative(self, q: np.ndarray, v: np.ndarray, u: np.ndarray
                    ) -> tuple[np.ndarray, np.ndarray]:
        return v, self.dynamics.forward_dynamics(q, v, u + self.external)


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
       ``internal_rate_hz``) holds that torque, plus any active push, for one period.

    Args:
        plant: the arm (see :class:`safety_filter.uncertainty.Plant`).
        step: a filter step (``SafetyFilter.step``) or None.
        nominal: the command source ``nominal(t, q, v)``.
        rng: the noise generator (default: seeded with 0).
        pushes: external torque impulses.
        barrier: ``barrier(q, v) -> smallest barrier value per joint`` (batched over rows),
            evaluated on the true states, e.g. ``lambda q, v:
            filt.constraint_bounds(q, v).smallest``.
    """
    if not (control_rate_hz > 0.0 and duration_s > 0.0):
        raise SafetyFilterError('the control rate and the duration must be positive')
    model = plant.model
    n = model.n_joints
    rng = np.random.default_rng(0) if rng is None else rng
    arm = _PushedArm(model, plant.payload_mass, internal_rate_hz)
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
    log.pushback = np.zeros(steps, dtype=bool)
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
            log.pushback[k] = 'constructive push-back' in str(getattr(out, 'reason', ''))
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
