"""Position barriers, their backstepped velocity barriers, and the acceleration bounds.

For each joint (docs/method.md)::

    hp = q_hi - q,  hn = q - q_lo                       position margins [rad or m]
    bp = gamma alpha1(hp) - v,  bn = gamma alpha1(hn) + v   velocity barriers [rad/s]
    Ap = beta alpha2(bp) - gamma alpha1'(hp) v - margin    upper acceleration bound
    An = -beta alpha2(bn) - gamma alpha1'(hn) v + margin   lower acceleration bound

so that ``An <= a <= Ap`` keeps ``db/dt >= -beta alpha2(b)`` with ``margin`` [rad/s^2] to
spare, which the sampled-data design reserves for the drift over one hold period.

With a velocity bound ``vS`` and rate ``beta_v > 0`` (certificates that carry them), the
velocity box has barriers of its own, first-order ZCBFs on ``sp = vS - v`` and
``sn = vS + v``::

    Ap <- min(Ap, beta_v sp - margin),   An <- max(An, -beta_v sn + margin)

The safe set S is where every barrier (hp, hn, bp, bn and, if present, sp, sn) is
non-negative.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from safety_filter.alphas import ClassK


@dataclass(frozen=True)
class BarrierState:
    """Barrier values and acceleration bounds at one state (arrays of shape (n,))."""

    margin_upper: np.ndarray  # hp [rad or m]
    margin_lower: np.ndarray  # hn
    barrier_upper: np.ndarray  # bp [rad/s or m/s]
    barrier_lower: np.ndarray  # bn
    accel_upper: np.ndarray  # Ap [rad/s^2 or m/s^2]
    accel_lower: np.ndarray  # An
    speed_upper: np.ndarray | float = np.inf  # sp = vS - v (inf without a velocity barrier)
    speed_lower: np.ndarray | float = np.inf  # sn = vS + v

    @property
    def smallest(self) -> np.ndarray:
        """Smallest barrier value per joint (negative: outside S)."""
        return np.minimum(np.minimum(np.minimum(self.margin_upper, self.margin_lower),
                                     np.minimum(self.barrier_upper, self.barrier_lower)),
                          np.minimum(self.speed_upper, self.speed_lower))


def evaluate_barriers(
    q: np.ndarray,
    v: np.ndarray,
    lower: np.ndarray,
    upper: np.ndarray,
    gamma: np.ndarray,
    beta: np.ndarray,
    alpha1: ClassK,
    alpha2: ClassK,
    accel_margin: np.ndarray | float = 0.0,
    speed_bound: np.ndarray | None = None,
    speed_beta: np.ndarray | None = None,
    accel_bound: np.ndarray | None = None,
) -> BarrierState:
    """Barrier values and acceleration bounds; all arrays broadcast (batch allowed).

    ``speed_bound`` (vS) and ``speed_beta`` (beta_v) add the velocity barriers on the joints
    where ``speed_beta > 0`` (module docstring); ``accel_bound`` keeps ``|a|`` within it
    where the barriers leave room.
    """
    hp = upper - q
    hn = q - lower
    bp = gamma * alpha1.value(hp) - v
    bn = gamma * alpha1.value(hn) + v
    ap = beta * alpha2.value(bp) - gamma * alpha1.derivative(hp) * v - accel_margin
    an = -beta * alpha2.value(bn) - gamma * alpha1.derivative(hn) * v + accel_margin
    if speed_bound is None or speed_beta is None:
        ap, an = _within_acceleration_bound(ap, an, accel_bound)
        return BarrierState(hp, hn, bp, bn, ap, an)
    active = np.asarray(speed_beta) > 0.0
    sp = speed_bound - v
    sn = speed_bound + v
    ap = np.where(active, np.minimum(ap, speed_beta * sp - accel_margin), ap)
    an = np.where(active, np.maximum(an, -speed_beta * sn + accel_margin), an)
    ap, an = _within_acceleration_bound(ap, an, accel_bound)  # after the velocity rows
    return BarrierState(hp, hn, bp, bn, ap, an, np.where(active, sp, np.inf),
                        np.where(active, sn, np.inf))


def _within_acceleration_bound(ap: np.ndarray, an: np.ndarray,
                               accel_bound: np.ndarray | None) -> tuple[np.ndarray, np.ndarray]:
    """``Ap <= A``, ``An >= -A`` where the barriers leave room: outside S a push back that
    needs more than ``A`` keeps its bound (as the step's kernel does)."""
    if accel_bound is None:
        return ap, an
    bound = np.asarray(accel_bound)
    return np.minimum(ap, np.maximum(bound, an)), np.maximum(an, np.minimum(-bound, ap))


def safe_velocity_interval(q: np.ndarray, lower: np.ndarray, upper: np.ndarray,
                           gamma: np.ndarray, alpha1: ClassK,
                           speed_bound: np.ndarray | None = None,
                           speed_beta: np.ndarray | None = None
                           ) -> tuple[np.ndarray, np.ndarray]:
    """The velocities of S at positions ``q`` (inside the limits): ``(low, high)`` with
    ``bp, bn >= 0`` and, on joints with velocity barriers, ``|v| <= vS``."""
    high = gamma * alpha1.value(upper - q)
    low = -gamma * alpha1.value(q - lower)
    if speed_bound is not None and speed_beta is not None:
        box = np.where(np.asarray(speed_beta) > 0.0, speed_bound, np.inf)
        high, low = np.minimum(high, box), np.maximum(low, -box)
    return low, high


def return_time_bound(barrier: np.ndarray, beta: np.ndarray, margin: np.ndarray,
                      alpha2: ClassK, samples: int = 400) -> np.ndarray:
    """Time [s] within which a velocity barrier at ``barrier < 0`` is back at 0 while the
    filter meets its bounds (``docs/method.md``, recovery).

    Outside S the bounds give ``db/dt >= -beta alpha2(b) + margin = beta alpha2(|b|) + margin``
    (alpha2 is odd), so ``b`` climbs from ``-B`` to 0 within
    ``t(B) = integral_0^B dx / (beta alpha2(x) + margin)``: ``ln(1 + beta B / margin) / beta``
    for the linear family, a quadrature otherwise. 0 where ``barrier >= 0``; arrays broadcast.
    """
    depth = np.maximum(-np.asarray(barrier, dtype=float), 0.0)
    beta = np.asarray(beta, dtype=float)
    margin = np.asarray(margin, dtype=float)
    depth, beta, margin = np.broadcast_arrays(depth, beta, margin)
    if alpha2.kind == 'linear':
        with np.errstate(divide='ignore', invalid='ignore'):
            return np.where(depth > 0.0, np.log1p(beta * depth / margin) / beta, 0.0)
    fraction = np.linspace(0.0, 1.0, samples)
    x = depth[..., None] * fraction
    rate = beta[..., None] * alpha2.value(x) + margin[..., None]
    return np.trapezoid(1.0 / rate, x, axis=-1)


def safe_set_area(position_range: float, gamma: float, alpha1: ClassK,
                  speed_bound: float | None = None, samples: int = 4001) -> float:
    """Area of a joint's slice of S in its (q, v) plane [rad^2/s or m^2/s]:
    ``integral_0^r min(gamma alpha1(r - x), vS) + min(gamma alpha1(x), vS) dx`` with
    ``vS = speed_bound`` when S has velocity barriers (``gamma r^2`` for the linear family
    without them)."""
    x = np.linspace(0.0, float(position_range), samples)
    cap = np.inf if speed_bound is None else float(speed_bound)
    width = (np.minimum(gamma * alpha1.value(position_range - x), cap)
             + np.minimum(gamma * alpha1.value(x), cap))
    return float(np.trapezoid(width, x))


def braking_set_area(position_range: float, deceleration: float, speed_limit: float,
                     samples: int = 4001) -> float:
    """Area of the set from which a joint that can decelerate at ``deceleration`` stops before
    its limits without exceeding ``speed_limit``: ``|v| <= speed_limit`` and
    ``v^2 <= 2 deceleration d`` toward the nearer limit in the direction of motion (d its
    distance): ``integral_0^r min(sqrt(2 e (r - x)), vmax) + min(sqrt(2 e x), vmax) dx``."""
    x = np.linspace(0.0, float(position_range), samples)
    reach = np.sqrt(2.0 * max(float(deceleration), 0.0) * x)
    width = np.minimum(reach, speed_limit) + np.minimum(reach[::-1], speed_limit)
    return float(np.trapezoid(width, x))
