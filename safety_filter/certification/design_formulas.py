"""The design formulas of certification: gamma*, beta*, the class-K family, the velocity
barriers' rate and the choice of beta (``docs/method.md``, Certification, steps 3 and 5).

A :class:`Design` holds one candidate: a velocity box with its authority and gains.
"""

from __future__ import annotations

from dataclasses import dataclass, field

import numpy as np

from safety_filter.certification.certify_settings import CertifySettings
from safety_filter.core.class_k import BRAKING_FAMILIES, ClassK
from safety_filter.core.model_uncertainty import DisturbanceBound

BETA_MIN_MARGIN = 1.02  # beta may sit at the cap if that is still 2 % above beta*
# beta*'s refinement: pattern searches from this many of the grid's best points, with this
# stencil width, halving the step this many times.
_REFINE_STARTS, _REFINE_STENCIL, _REFINE_ROUNDS = 5, 7, 24


@dataclass
class Design:
    """One candidate design: the velocity box, the authority and the gains it gives, the
    class-K family and, once known, the velocity barriers and the acceleration bound."""

    scale: float
    condition: str
    authority: np.ndarray
    velocity_box: np.ndarray
    gamma_star: np.ndarray
    gamma: np.ndarray
    disturbance: DisturbanceBound | None = None
    alpha1: ClassK = field(default_factory=ClassK)
    speed_beta: np.ndarray | None = None  # rate of the velocity barriers (None: lemma)
    usable: np.ndarray | None = None  # authority - margin
    fractions: np.ndarray | None = None  # velocity box / rated speed
    accel_bound: np.ndarray | None = None  # |a| the filter allows (None: any)

    @property
    def has_speed_rows(self) -> bool:
        """Whether the design keeps the velocity box by velocity barriers."""
        return self.speed_beta is not None and bool(np.any(self.speed_beta > 0.0))


def gamma_star(authority: np.ndarray, position_range: np.ndarray, alpha1: ClassK
               ) -> np.ndarray:
    """``gamma* = sqrt(e / max_{0<=x<=r} alpha1'(x) alpha1(x))`` per joint."""
    peak = np.array([alpha1.max_value_times_slope(r) for r in position_range])
    return np.sqrt(np.maximum(authority, 0.0) / peak)


def slice_ratio(x: np.ndarray, t: np.ndarray, r: float, e_eff: float, gamma: float,
                 margin: float, alpha1: ClassK, alpha2: ClassK, speed_bound: float = np.inf,
                 speed_beta: float = 0.0) -> np.ndarray:
    """The ratio whose maximum over joint i's slice of S is beta*.

    ``x = hp`` in [0, r] and ``t`` in [0, 1] parametrise the slice: v runs from
    ``max(-gamma alpha1(hn), -vS)`` to ``min(gamma alpha1(hp), vS)`` (``vS = speed_bound``
    when the velocity box has barriers of its own, ``speed_beta > 0``).
    """
    hp, hn = x, r - x
    a1p, a1n = alpha1.value(hp), alpha1.value(hn)
    top, bottom = gamma * a1p, -gamma * a1n
    rows = speed_beta > 0.0
    if rows:
        top, bottom = np.minimum(top, speed_bound), np.maximum(bottom, -speed_bound)
    v = bottom + t * (top - bottom)
    bp, bn = gamma * a1p - v, gamma * a1n + v
    slope_p, slope_n = gamma * alpha1.derivative(hp) * v, gamma * alpha1.derivative(hn) * v
    a2p, a2n = alpha2.value(bp), alpha2.value(bn)

    def needed(numerator: np.ndarray, denominator: np.ndarray) -> np.ndarray:
        # beta alpha2(b) >= numerator; at alpha2(b) = 0 only a non-positive one is met.
        with np.errstate(divide='ignore', invalid='ignore'):
            return np.where(denominator > 0.0, numerator / denominator,
                            np.where(numerator <= 0.0, -np.inf, np.inf))

    # Ap >= -e and An <= e (with the margin reserved), An + delta <= Ap - delta.
    ratio = np.maximum(needed(slope_p - e_eff, a2p), needed(-slope_n - e_eff, a2n))
    with np.errstate(divide='ignore', invalid='ignore'):
        gap = (2.0 * margin + gamma * v * (alpha1.derivative(hp) - alpha1.derivative(hn))) \
            / (a2p + a2n)
    ratio = np.maximum(ratio, gap)
    if rows:
        # The velocity barriers' bounds against the position barriers' (docs/method.md):
        # -beta_v (vS + v) + delta <= Ap - delta and An + delta <= beta_v (vS - v) - delta.
        ratio = np.maximum(ratio, needed(2.0 * margin + slope_p - speed_beta * (speed_bound + v),
                                         a2p))
        ratio = np.maximum(ratio, needed(2.0 * margin - slope_n - speed_beta * (speed_bound - v),
                                         a2n))
    return ratio


def beta_star(position_range: float, effective_authority: float, gamma: float, margin: float,
              alpha1: ClassK, alpha2: ClassK, grid: int = 201, speed_bound: float = np.inf,
              speed_beta: float = 0.0) -> tuple[float, float, float]:
    """``beta*`` for one joint: dense grid over its slice of S, then local refinement.

    The refinement is a pattern search from the grid's best points: a 7 x 7 stencil around
    each, recentred on its best value and halved, down to 2^-24 of a grid cell. It needs
    no gradient, so the kinks of the ratio (a maximum of several bounds) do not stall it.

    Returns ``(beta*, hp, t)`` with the maximiser's coordinates (``inf`` when some state on
    the boundary cannot be made feasible by any beta: gamma is too large). ``speed_bound``
    and ``speed_beta`` describe the velocity barriers when S has them.
    """
    r = float(position_range)
    x, t = np.meshgrid(np.linspace(0.0, r, grid), np.linspace(0.0, 1.0, grid), indexing='ij')
    extra = (float(speed_bound), float(speed_beta))
    values = slice_ratio(x, t, r, effective_authority, gamma, margin, alpha1, alpha2, *extra)
    k = np.unravel_index(int(np.argmax(values)), values.shape)
    best = float(values[k])
    if not np.isfinite(best):
        return (float(best), float(x[k]), float(t[k]))
    order = np.argsort(values, axis=None)[::-1][:_REFINE_STARTS]
    starts = np.arange(len(order))
    at_x, at_t, at_value = x.ravel()[order], t.ravel()[order], values.ravel()[order]
    step_x, step_t = r / (grid - 1), 1.0 / (grid - 1)
    stencil = np.linspace(-1.0, 1.0, _REFINE_STENCIL)
    for _ in range(_REFINE_ROUNDS):
        near_x, near_t = np.broadcast_arrays(
            np.clip(at_x[:, None, None] + step_x * stencil[None, :, None], 0.0, r),
            np.clip(at_t[:, None, None] + step_t * stencil[None, None, :], 0.0, 1.0))
        near = slice_ratio(near_x, near_t, r, effective_authority, gamma, margin, alpha1,
                           alpha2, *extra).reshape(len(starts), -1)
        near = np.where(np.isfinite(near), near, -np.inf)
        pick = np.argmax(near, axis=1)
        better = near[starts, pick] > at_value
        at_x = np.where(better, near_x.reshape(len(starts), -1)[starts, pick], at_x)
        at_t = np.where(better, near_t.reshape(len(starts), -1)[starts, pick], at_t)
        at_value = np.where(better, near[starts, pick], at_value)
        step_x, step_t = 0.5 * step_x, 0.5 * step_t
    i = int(np.argmax(at_value))
    if at_value[i] > best:
        return max(float(at_value[i]), 0.0), float(at_x[i]), float(at_t[i])
    return max(best, 0.0), float(x[k]), float(t[k])


def class_k_for_family(settings: CertifySettings, kind: str, usable: np.ndarray,
                position_range: np.ndarray) -> ClassK:
    """The class-K function of family ``kind`` for a design with usable authority ``usable``.

    An explicit ``settings.alpha1`` is used as given. The automatic ``sqrt`` family takes
    ``eps`` from the hold period: the slope term ``gamma alpha1'(h) v`` of the bounds may
    drift by ``gamma alpha1'(0) e T = sqrt(e) e T / sqrt(2 eps)`` over a hold ``T`` at
    ``gamma ~ sqrt(e)``; ``eps = (sqrt(e) T / share)^2 / 2`` keeps that at ``share`` of the
    authority (``docs/method.md``, the braking-curve barrier). The term also drifts with the
    motion, by ``gamma |alpha1''| v^2 T <= gamma^3 c alpha1'(0) T`` on the boundary of S
    (``c = ClassK.boundary_curvature``: 4/27 for ``sqrt``, 1 for ``parabola``): the
    ``parabola`` family takes the eps at which the two drifts together are those of
    ``sqrt``, ``((1 + c) / (1 + 4/27))^2`` times its eps.
    """
    if settings.alpha1 is not None:
        return settings.alpha1
    if kind not in BRAKING_FAMILIES:
        return ClassK(kind)
    hold = settings.gain_hold_s
    eps = float(np.max(0.5 * (np.sqrt(np.maximum(usable, 0.0)) * hold
                              / settings.braking_slope_share) ** 2))
    reference = ClassK('sqrt').boundary_curvature()
    eps *= ((1.0 + ClassK(kind).boundary_curvature()) / (1.0 + reference)) ** 2
    return ClassK(kind, float(np.clip(eps, 1e-6, 0.1 * float(np.min(position_range)))))


def velocity_barrier_rate(authority: np.ndarray, margin: np.ndarray, velocity_box: np.ndarray,
                          settings: CertifySettings) -> np.ndarray:
    """Rate ``beta_v`` [1/s] of the velocity barriers per joint.

    Where the braking curve meets the velocity box (``v = vS``, ``bp = 0``) the position
    barrier asks for a deceleration up to about the authority, while the lower velocity
    barrier allows at most ``beta_v (vS + v) = 2 beta_v vS``: so ``beta_v >= (e + 2 delta) /
    vS``, at least ``beta_sampling_limit / T`` (that of beta). At most ``1 / (2 T)``: the
    velocity barriers stay invariant under a held acceleration for ``beta_v T <= 1``
    (``docs/method.md``); beyond, ``beta*`` says the box is too slow for the authority.
    """
    hold = settings.gain_hold_s
    wanted = (authority + 2.0 * margin) / np.maximum(velocity_box, 1e-300)
    return np.clip(wanted, settings.beta_sampling_limit / hold, 0.5 / hold)


def choose_beta(design: Design, margin: np.ndarray, r: np.ndarray, settings: CertifySettings
                 ) -> tuple[np.ndarray, np.ndarray, np.ndarray, np.ndarray]:
    """``(beta*, floor, cap, beta)`` per joint (docs/method.md).

    The floor is the beta at which the bound at rest mid-range equals the authority (below
    it the filter brakes needlessly early; ``beta = 0`` would freeze the arm); the cap keeps
    ``beta * max(alpha2(b)/b) * T_hold`` at ``beta_sampling_limit``. ``beta`` is the largest
    of ``beta_margin * beta*``, the floor and ``cap_share`` of the cap, never above the
    cap: a larger ``beta`` lets ``b`` fall faster inside S, so the bounds bind only near its
    boundary (docs/method.md).
    """
    n = len(r)
    alpha1, alpha2 = design.alpha1, settings.alpha2
    usable = design.authority - margin
    hold = settings.gain_hold_s
    b_star = np.zeros(n)
    b_cap = np.zeros(n)
    mid = alpha2.value(design.gamma * alpha1.value(0.5 * r))
    # At rest mid-range the upper bound is beta alpha2(b) - margin: make it reach e.
    b_floor = (design.authority + margin) / np.maximum(mid, 1e-300)
    for i in range(n):
        speed = ((float(design.velocity_box[i]), float(design.speed_beta[i]))
                 if design.has_speed_rows else (np.inf, 0.0))
        b_star[i], _, _ = beta_star(r[i], usable[i], design.gamma[i], margin[i], alpha1, alpha2,
                                    speed_bound=speed[0], speed_beta=speed[1])
        b_max = 2.0 * design.gamma[i] * float(alpha1.value(r[i]))
        if design.has_speed_rows:
            b_max = min(b_max, design.gamma[i] * float(alpha1.value(r[i]))
                        + design.velocity_box[i])
        b_cap[i] = settings.beta_sampling_limit / (hold * alpha2.max_ratio_to_identity(b_max))
    least = np.maximum(settings.beta_margin * b_star, b_floor)
    beta = np.minimum(np.maximum(least, settings.cap_share * b_cap), b_cap)
    return b_star, b_floor, b_cap, beta
