"""Nominal command sources that try to break the limits (for tests, simulation and demos).

Each policy is a callable ``policy(t, q, v) -> u_nom`` [N m] in full-torque terms. They
emulate what a careless operator or an untrusted program might command: torques banging
between the limits, a PD controller dragging the arm toward targets beyond its range, large
sinusoids, or nothing at all while gravity pulls the arm down.
"""

from __future__ import annotations

import numpy as np

from safety_filter.model import RobotModel


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
