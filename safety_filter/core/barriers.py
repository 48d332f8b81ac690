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

Outside S on a side, moving toward that limit, the bounds also ask for the braking curve:
``Ap <- min(Ap, -v^2 / (2 hp) - margin)`` (``An <- max(An, v^2 / (2 hn) + margin)``).

The safe set S is where every barrier (hp, hn, bp, bn and, if present, sp, sn) is
non-negative.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from safety_filter.core.class_k import ClassK


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
        sp = sn = np.inf
    else:
        active = np.asarray(speed_beta) > 0.0
        ap = np.where(active, np.minimum(ap, speed_beta * (speed_bound - v) - accel_margin), ap)
        an = np.where(active, np.maximum(an, -speed_beta * (speed_bound + v) + accel_margin),
                      an)
        sp = np.where(active, speed_bound - v, np.inf)
        sn = np.where(active, speed_bound + v, np.inf)
    ap, an = _with_braking_curve(v, hp, hn, bp, bn, sp, sn, ap, an, accel_margin)
    ap, an = _within_acceleration_bound(ap, an, accel_bound)  # after the other rows
    return BarrierState(hp, hn, bp, bn, ap, an, sp, sn)


def _with_braking_curve(v: np.ndarray, hp: np.ndarray, hn: np.ndarray, bp: np.ndarray,
                        bn: np.ndarray, sp: np.ndarray | float, sn: np.ndarray | float,
                        ap: np.ndarray, an: np.ndarray, margin: np.ndarray | float
                        ) -> tuple[np.ndarray, np.ndarray]:
    """Outside S on a side, moving toward that limit and short of it: at least the
    deceleration ``v^2 / (2h)`` that stops the joint at the limit (a constant deceleration
    from the sampled state does exactly that over a hold), plus the margin as for every
    bound, since the barriers' own return need not keep the position."""
    with np.errstate(divide='ignore', invalid='ignore'):
        stop_upper = -v * v / (2.0 * hp) - margin
        stop_lower = v * v / (2.0 * hn) + margin
    upper = (v > 0.0) & (hp > 0.0) & ((bp < 0.0) | (sp < 0.0))
    lower = (v < 0.0) & (hn > 0.0) & ((bn < 0.0) | (sn < 0.0))
    return (np.where(upper, np.minimum(ap, stop_upper), ap),
            np.where(lower, np.maximum(an, stop_lower), an))


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


def recovery_time_bound(q: np.ndarray, v: np.ndarray, lower: np.ndarray, upper: np.ndarray,
                        gamma: np.ndarray, beta: np.ndarray, alpha1: ClassK, alpha2: ClassK,
                        authority: np.ndarray, margin: np.ndarray,
                        speed_bound: np.ndarray | None = None,
                        speed_beta: np.ndarray | None = None, drift_share: float = 2.0 / 3.0,
                        samples: int = 400) -> np.ndarray:
    """Per joint: the time [s] within which a joint outside S is back in S, whichever way the
    filter returns it (``docs/method.md``, recovery); 0 where the joint is in S, inf where its
    position is past a limit or the bound below cannot show that it stops before the limit
    (no statement). Arrays broadcast; the last axis is the joint.

    A joint outside S on its upper side moves toward the upper limit (``v > 0``). At every
    step either the bounds ask for a deceleration of at least the authority ``e`` (the QP
    meets it, or the push-back gives ``e``, which the torque box allows anywhere in the
    certified domain), or they ask for less and the command meets them. Over the hold the
    arm's acceleration drifts from the commanded one by up to ``drift_share`` of the margin
    (the margin is the sampled drift inflated, so the rest is to spare): the authority gives
    ``e - drift``, a met bound its ask plus the spare margin. The bounds ask at
    least ``v^2 / (2h)`` (the braking curve), ``gamma alpha1'(h) v + beta alpha2(-bp) +
    margin`` while ``bp < 0`` and ``beta_v (v - vS) + margin`` while ``v > vS``. ``v`` and
    ``h`` only shrink, so with ``alpha1`` concave ``alpha1'(h) >= alpha1'(h0)``,
    ``-bp >= v - gamma alpha1(h0)`` and ``h <= h0``: ``v`` falls at least at
    ``g(v) = min(e, ...)``, a function of the speed alone (:class:`_DecelerationFloor`).
    From speed ``v0`` down to ``w`` the joint travels at most
    ``D(w) = integral_w^v0 u / g(u) du``; and when ``r0 = v0^2 / (2 h0) <= e`` the braking
    curve keeps ``v^2 / (2h) <= r0`` (it cannot grow under a deceleration of at least
    ``v^2 / (2h)``), so ``h >= w^2 / (2 r0)``. With ``H(w)`` the larger of the two lower
    bounds of ``h``, the joint is in S at the first speed ``w`` with
    ``w <= min(vS, gamma alpha1(H(w)))``, which it reaches within
    ``integral_w^v0 du / g(u)``; the statement needs ``H(w) >= 0`` (the position kept). A
    joint back in S stays there (the bounds at the boundary of S are within the authority).
    Where the drift may take the whole authority (``e <= drift``) there is no statement.
    """
    q, v = np.asarray(q, dtype=float), np.asarray(v, dtype=float)
    speed = np.abs(v)
    distance = np.where(v > 0.0, upper - q, q - lower)
    inside_limits = (q <= upper) & (q >= lower)
    h0 = np.maximum(distance, 0.0)
    floor = _DecelerationFloor(gamma * alpha1.derivative(h0), gamma * alpha1.value(h0), h0,
                               beta, alpha2, authority, margin, drift_share, speed_bound,
                               speed_beta, samples)
    with np.errstate(divide='ignore', invalid='ignore'):
        w = speed[..., None] * floor.fraction
        rate = floor.rate(w)
        # time and distance from v0 down to each grid speed (trapezoids, summed from the top)
        time_left = _integral_from_top(1.0 / rate, w)
        travelled = _integral_from_top(w / rate, w)
        stop_rate = speed * speed / (2.0 * h0)
        curve = np.where((stop_rate <= floor.authority)[..., None],
                         w * w / (2.0 * stop_rate[..., None]), -np.inf)
        least_h = np.maximum(h0[..., None] - travelled, curve)
        inside = w <= np.minimum(floor.box[..., None],
                                 gamma[..., None] * alpha1.value(np.maximum(least_h, 0.0)))
        inside &= least_h >= 0.0
        # the first grid speed below v0 at which the joint is surely back (w = 0 at worst)
        first = samples - 1 - np.argmax(inside[..., ::-1], axis=-1)
        found = np.take_along_axis(inside, first[..., None], axis=-1)[..., 0]
        # where the drift may eat the whole authority, nothing is guaranteed
        found &= floor.authority > 0.0
        time = np.take_along_axis(time_left, first[..., None], axis=-1)[..., 0]
    low, high = safe_velocity_interval(q, lower, upper, gamma, alpha1, speed_bound, speed_beta)
    in_s = (v >= low) & (v <= high) & inside_limits
    return np.where(in_s, 0.0, np.where(inside_limits & found, time, np.inf))


def _integral_from_top(values: np.ndarray, grid: np.ndarray) -> np.ndarray:
    """``integral_{grid[k]}^{grid[-1]} values`` for every ``k`` (trapezoids, last axis)."""
    pieces = 0.5 * (values[..., 1:] + values[..., :-1]) * np.diff(grid, axis=-1)
    tail = np.cumsum(pieces[..., ::-1], axis=-1)[..., ::-1]
    return np.concatenate([tail, np.zeros(tail.shape[:-1] + (1,))], axis=-1)


def worst_recovery_time(speed: np.ndarray, position_range: np.ndarray, gamma: np.ndarray,
                        beta: np.ndarray, alpha1: ClassK, alpha2: ClassK,
                        authority: np.ndarray, margin: np.ndarray,
                        speed_bound: np.ndarray | None = None,
                        speed_beta: np.ndarray | None = None, drift_share: float = 2.0 / 3.0,
                        samples: int = 400) -> np.ndarray:
    """An upper bound of :func:`recovery_time_bound` over the positions within the limits at
    speeds up to ``speed``: the slowest deceleration floor (``alpha1'`` at the full range,
    no credit for the depth of ``bp``) taken from ``speed`` down to a stop; inf where the
    drift may take the whole authority."""
    floor = _DecelerationFloor(gamma * alpha1.derivative(np.asarray(position_range, float)),
                               np.inf, np.inf, beta, alpha2, authority, margin, drift_share,
                               speed_bound, speed_beta, samples)
    speed = np.asarray(speed, dtype=float)
    with np.errstate(divide='ignore', invalid='ignore'):
        time = floor.time(np.zeros_like(speed), speed)
    return np.where(floor.authority > 0.0, time, np.inf)


class _DecelerationFloor:
    """The least deceleration ``g(w)`` of a joint outside S at speed ``w`` toward the limit
    (see :func:`recovery_time_bound`) and the integrals of it that bound the return."""

    def __init__(self, slope: np.ndarray, reach: np.ndarray | float,
                 distance: np.ndarray | float, beta: np.ndarray,
                 alpha2: ClassK, authority: np.ndarray, margin: np.ndarray,
                 drift_share: float, speed_bound: np.ndarray | None,
                 speed_beta: np.ndarray | None, samples: int) -> None:
        if speed_bound is not None and speed_beta is not None:
            active = np.asarray(speed_beta) > 0.0
            box = np.where(active, speed_bound, np.inf)
            box_rate = np.where(active, speed_beta, 0.0)
        else:
            box, box_rate = np.inf, 0.0
        # reach: gamma alpha1(h0), the largest speed bp >= 0 allows on the way; distance: h0
        margin = np.asarray(margin, dtype=float)
        # what the arm surely gives: the authority less the drift, a met bound's ask plus the
        # margin the drift leaves
        (self.slope, self.reach, self.distance_left, self.beta, self.authority, self.spare,
         self.box, self.box_rate) = np.broadcast_arrays(
            slope, reach, distance, np.asarray(beta, dtype=float),
            np.asarray(authority, dtype=float) - drift_share * margin,
            (1.0 - drift_share) * margin, box, box_rate)
        self.alpha2 = alpha2
        self.fraction = np.linspace(0.0, 1.0, samples)

    def rate(self, w: np.ndarray) -> np.ndarray:
        box, reach = self.box[..., None], self.reach[..., None]
        # bp < 0 is certain below the box (else the joint would be in S) and above the reach
        velocity_row = np.where(
            (w <= box) | (w > reach),
            self.slope[..., None] * w
            + self.beta[..., None] * self.alpha2.value(np.maximum(w - reach, 0.0)), 0.0)
        box_row = np.where(w > box, self.box_rate[..., None] * (w - box), 0.0)
        with np.errstate(divide='ignore', invalid='ignore'):
            braking = w * w / (2.0 * self.distance_left[..., None])  # v^2 / 2h >= this
        braking = np.where(np.isnan(braking), 0.0, braking)
        spare = self.spare[..., None]
        return np.minimum(self.authority[..., None],
                          spare + np.maximum(np.maximum(velocity_row, box_row), braking))

    def time(self, start: np.ndarray, speed: np.ndarray) -> np.ndarray:
        """The longest time to slow from ``speed`` to ``start``: the integral of ``1 / g``."""
        start = np.asarray(start)
        w = start[..., None] + (np.asarray(speed) - start)[..., None] * self.fraction
        return np.trapezoid(1.0 / self.rate(w), w, axis=-1)


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
