"""Simulated arm and closed-loop runs: the plant the filter is tried against.

:class:`ArmSimulator` integrates the model's dynamics with a fixed-step RK4 at an internal
rate well above the control rate, holding the torque between control steps and saturating
it to the effort limits as a driver does. It shares the dynamics with the filter (one
dynamics in the package); the tests check it against SciPy's ``solve_ivp``.

:func:`run_closed_loop` wires a nominal command source, a filter step and the simulator
together at a control rate, and returns a :class:`ClosedLoopLog`; :func:`limit_violations`
measures how far a log went past each limit.
"""

from __future__ import annotations

from collections.abc import Callable
from dataclasses import dataclass

import numpy as np

from safety_filter.dynamics import Dynamics
from safety_filter.model import RobotModel

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
    """Run nominal -> filter step -> simulated arm at ``control_rate_hz``.

    Args:
        step: a filter step ``step(q, v, u_nom)`` returning an object with ``torque``, ``mode``
            and ``barrier_margin`` (a :class:`safety_filter.SafetyFilter` ``step``), or None to
            pass the nominal straight to the arm (the unfiltered baseline, simulation only).
        nominal: the command source ``nominal(t, q, v) -> u_nom``.
    """
    simulator = ArmSimulator(model, payload_mass, internal_rate_hz)
    simulator.reset(q0, v0)
    period = 1.0 / control_rate_hz
    steps = int(round(duration_s * control_rate_hz))
    n = model.n_joints
    log = ClosedLoopLog(np.zeros(steps), np.zeros((steps, n)), np.zeros((steps, n)),
                        np.zeros((steps, n)), np.zeros((steps, n)),
                        np.empty(steps, dtype=object), np.full((steps, n), np.nan))
    for k in range(steps):
        t, q, v = simulator.time_s, simulator.q, simulator.v
        u_nom = np.asarray(nominal(t, q, v), dtype=float)
        if step is None:
            torque, mode, margin = u_nom, 'unfiltered', np.full(n, np.nan)
        else:
            out = step(q, v, u_nom)
            torque = np.array(out.torque)  # type: ignore[attr-defined]
            mode = str(out.mode)  # type: ignore[attr-defined]
            margin = np.array(out.barrier_margin)  # type: ignore[attr-defined]
        log.time_s[k], log.q[k], log.v[k] = t, q, v
        log.nominal[k], log.torque[k], log.mode[k], log.margin[k] = u_nom, torque, mode, margin
        simulator.advance(torque, period)
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
