"""Nominal command sources that try to break the limits (for tests, simulation and demos).

Each policy is a callable ``policy(t, q, v) -> u_nom`` [N m] in full-torque terms. They
emulate what a careless operator or an untrusted program might command: torques banging
between the limits, a PD controller dragging the arm toward targets beyond its range, large
sinusoids, or nothing at all while gravity pulls the arm down. :class:`SafeTracking` is the
benign one: a well-behaved controller tracking a motion well inside the limits.
"""

from __future__ import annotations

import numpy as np

from safety_filter.core.dynamics import Dynamics
from safety_filter.core.robot_model import RobotModel
from safety_filter.errors import InvalidValue


class BangBang:
    """Every joint at +-its torque limit, switching sign every ``period_s`` (per-joint phase)."""

    def __init__(self, model: RobotModel, period_s: float = 0.6, seed: int = 0) -> None:
        rng = np.random.default_rng(seed)
        self.effort = np.array(model.effort_limit)
        self.period_s = period_s
        self.phase = rng.uniform(0.0, period_s, model.n_joints)

    def __call__(self, t: float, q: np.ndarray, v: np.ndarray) -> np.ndarray:
        sign = np.where(((t + self.phase) // self.period_s) % 2 == 0, 1.0, -1.0)
        return sign * self.effort


class PDBeyondLimits:
    """A PD controller toward targets past the position limits, with gravity feedforward.

    Targets alternate between ``overshoot`` beyond the upper and the lower limit every
    ``period_s``. Gains are scaled to each joint's effort limit.
    """

    def __init__(self, model: RobotModel, overshoot: float = 0.5, period_s: float = 2.0,
                 gravity: object | None = None) -> None:
        self.lower = np.array(model.position_lower)
        self.upper = np.array(model.position_upper)
        self.effort = np.array(model.effort_limit)
        self.overshoot = overshoot
        self.period_s = period_s
        self.kp = 2.0 * self.effort / np.maximum(self.upper - self.lower, 1e-6)
        self.kd = 0.2 * self.kp
        self.gravity = gravity  # optional callable q -> g(q)

    def __call__(self, t: float, q: np.ndarray, v: np.ndarray) -> np.ndarray:
        upward = (t // self.period_s) % 2 == 0
        target = np.where(upward, self.upper + self.overshoot, self.lower - self.overshoot)
        u = self.kp * (target - q) - self.kd * v
        if self.gravity is not None:
            u = u + self.gravity(q)  # type: ignore[operator]
        return u


class LargeSinusoid:
    """Sinusoidal torques of amplitude ``scale`` times the effort limit."""

    def __init__(self, model: RobotModel, scale: float = 1.5, frequency_hz: float = 0.7,
                 seed: int = 0) -> None:
        rng = np.random.default_rng(seed)
        self.amplitude = scale * np.array(model.effort_limit)
        self.omega = 2.0 * np.pi * frequency_hz * rng.uniform(0.6, 1.4, model.n_joints)
        self.phase = rng.uniform(0.0, 2.0 * np.pi, model.n_joints)

    def __call__(self, t: float, q: np.ndarray, v: np.ndarray) -> np.ndarray:
        return self.amplitude * np.sin(self.omega * t + self.phase)


class ZeroTorque:
    """No command at all: gravity alone acts (in the full-torque convention)."""

    def __init__(self, model: RobotModel) -> None:
        self.zero = np.zeros(model.n_joints)

    def __call__(self, t: float, q: np.ndarray, v: np.ndarray) -> np.ndarray:
        return self.zero.copy()


class SafeTracking:
    """Computed-torque tracking of per-joint sinusoids that stay well inside the limits.

    Joint ``i`` follows ``q_d = c_i + A_i sin(w_i t + phi_i)`` with ``c_i`` the middle of its
    range, ``A_i = (0.5 - inset) * range_i`` (so the reference stays ``inset`` of the range
    inside each position limit) and ``w_i = speed_fraction * velocity_limit_i / A_i`` (its
    peak speed is ``speed_fraction`` of the rated speed); the phases ``phi_i`` are seeded.
    The command is ``u = M(q) (a_d + kp (q_d - q) + kd (v_d - v)) + h(q, v)`` with the
    dynamics of ``model`` carrying ``payload_mass`` (default: the middle of the model's
    payload range), ``kp = bandwidth^2`` and ``kd = 2 bandwidth`` (critically damped error).

    Args:
        model: the model the controller computes with (the filter's, in the stress test).
        payload_mass: payload of that model [kg].
        speed_fraction: peak reference speed as a fraction of the rated speed.
        inset: fraction of each joint's range kept free inside each position limit.
        bandwidth: natural frequency of the tracking error [rad/s].
        seed: seed of the phases.
    """

    def __init__(self, model: RobotModel, payload_mass: float | None = None,
                 speed_fraction: float = 0.5, inset: float = 0.1, bandwidth: float = 30.0,
                 seed: int = 0) -> None:
        if not 0.0 <= inset < 0.5:
            raise InvalidValue('inset', inset, 'in [0, 0.5)')
        if not speed_fraction > 0.0:
            raise InvalidValue('speed_fraction', speed_fraction, 'a positive number')
        if payload_mass is None:
            payload_mass = 0.5 * (model.payload.mass_min + model.payload.mass_max)
        rng = np.random.default_rng(seed)
        lower, upper = np.array(model.position_lower), np.array(model.position_upper)
        self.centre = 0.5 * (lower + upper)
        self.amplitude = (0.5 - inset) * (upper - lower)
        self.omega = speed_fraction * np.array(model.velocity_limit) / self.amplitude
        self.phase = rng.uniform(0.0, 2.0 * np.pi, model.n_joints)
        self.kp = bandwidth ** 2
        self.kd = 2.0 * bandwidth
        self.dynamics = Dynamics(model, payload_mass)

    def reference(self, t: float) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
        """``(q_d, v_d, a_d)`` at time ``t`` [s]."""
        angle = self.omega * t + self.phase
        sine, cosine = np.sin(angle), np.cos(angle)
        return (self.centre + self.amplitude * sine, self.amplitude * self.omega * cosine,
                -self.amplitude * self.omega ** 2 * sine)

    def __call__(self, t: float, q: np.ndarray, v: np.ndarray) -> np.ndarray:
        q_d, v_d, a_d = self.reference(t)
        mass, bias = self.dynamics.mass_and_bias(q, v)
        return mass @ (a_d + self.kp * (q_d - q) + self.kd * (v_d - v)) + bias
