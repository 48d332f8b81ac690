"""Certification: per-joint gains for which the barrier QP is feasible everywhere in S.

The steps (docs/method.md, Certification), for each design family in turn (the ``sqrt``
and linear families with velocity barriers, the linear family with the velocity lemma):

1. bounds on the dynamics over the joint box and the payload range (``bounds``, once);
2. the velocity box: a common fraction ``s`` of the rated speeds, then per joint by a
   coordinate search; for each box the acceleration authority ``e`` of each joint from the
   row-sum LP, or from the torque-coupling condition (``rho - nu``), whichever gives the
   larger safe set;
3. ``gamma* = sqrt(e / max alpha1' alpha1)``; ``gamma`` at a margin below it (and, with the
   velocity lemma, below ``vS / alpha1(range)``); the velocity barriers' rate ``beta_v``;
4. the sampled-data margin ``delta`` from rollouts (``sampling``), taken out of the
   authority; the gains recomputed until the margin is stable, the box shrunk if it is not;
5. ``beta*`` from a dense grid of each joint's slice of S, refined locally; ``beta`` above it,
   above a floor that keeps the arm from freezing, below the sampled-data cap;

then the design with the largest safe set that certifies is kept, and
6. the falsifier (``falsify``), independent of all the above, checks it on states in S.

When a step fails, the reason names the joint, the limit and the shortfall.
"""

from __future__ import annotations

import datetime as _dt
import time
from collections.abc import Callable
from dataclasses import asdict, dataclass, field, replace
from typing import Any

import numpy as np
from scipy.optimize import linprog, minimize

from safety_filter._version import __version__
from safety_filter.certification.dynamics_bounds import (
    BoundSettings,
    DynamicsBounds,
    estimate_bounds,
)
from safety_filter.certification.sampled_data_margin import (
    Gains,
    estimate_sampling_margin,
    sampled_inverse_mass,
)
from safety_filter.core.barriers import braking_set_area, safe_set_area
from safety_filter.core.certificate import DEFAULT_OBSERVER_PERIODS, Certificate
from safety_filter.core.class_k import ALPHA1_KINDS, ALPHA2_KINDS, ClassK
from safety_filter.core.model_uncertainty import (
    DisturbanceBound,
    disturbance_bound,
    draw_plant,
    model_with_inertials,
    payload_error,
)
from safety_filter.core.robot_model import RobotModel
from safety_filter.errors import SafetyFilterError

ProgressCallback = Callable[[str, float], None]
LEMMA_SUFFIX = ':lemma'


def _split_family(name: str) -> tuple[str, bool]:
    """``(alpha1 kind, velocity barriers)`` of a family name (``'linear:lemma'``: none)."""
    if name.endswith(LEMMA_SUFFIX):
        return name[:-len(LEMMA_SUFFIX)], False
    return name, True
_BETA_MIN_MARGIN = 1.02  # beta may sit at the cap if that is still 2 % above beta*


@dataclass(frozen=True)
class CertifySettings:
    """Choices and margins of the certification (all recorded in the certificate).

    Attributes:
        alpha1, alpha2: class-K families (alpha1: linear, atan, tanh, sqrt; alpha2: linear,
            cubic, atan, tanh). ``alpha1 = None`` (the default) tries each of ``families``
            and keeps the one whose safe set is largest among those that certify.
        families: the alpha1 families tried when ``alpha1`` is None; a family named with
            the suffix ``:lemma`` keeps the velocity box by the velocity lemma (no velocity
            barriers), the others by velocity barriers of their own.
        velocity_barrier: for an explicit ``alpha1``: give the velocity box barriers of its
            own (then gamma is not held by the velocity lemma and S reaches the braking
            curve); False: the lemma.
        per_joint_envelopes: search each joint's velocity bound, not only a common scale.
        braking_slope_share: the automatic sqrt family's eps keeps the drift of its slope
            term over one hold at about this share of the authority.
        braking_distance_share: authority is not spent beyond what brakes a joint from its
            rated speed within this share of its range (``useful_authority``).
        acceleration_bound_factor: the filter keeps each joint's acceleration within this
            many times its authority (0: no bound); the sampled-data margin then covers
            only accelerations within it.
        gamma_margin: ``gamma <= gamma_margin * gamma*`` (< 1).
        beta_margin: ``beta >= beta_margin * beta*`` (> 1).
        beta_sampling_limit: cap ``beta * max(alpha2(b)/b) * T_hold <= beta_sampling_limit``.
        control_rate_hz: the filter's control rate [Hz].
        sampling_factor: the sampled-data margin covers hold periods of this many control
            periods (so the limits also hold at a rate this many times slower).
        margin_samples, margin_inflation: rollouts and inflation of the sampled-data margin.
        velocity_scales: how many common velocity scales to try in (0, 1].
        min_velocity_fraction: certification fails when the certified velocity bound of a
            joint is below this fraction of its rated limit.
        condition: 'auto', 'acceleration_authority' or 'torque_coupling'.
        falsifier_states: states the falsifier samples (0 skips it: not certified then).
        bounds: settings of the dynamics bounds.
        seed: random seed of every sampling stage.
        observer_periods: the slowest time constant of the filter's disturbance observer, in
            control periods; observer_noise_share: each joint's time constant is the fastest
            (at least two periods) whose velocity noise costs at most this share of the
            joint's torque limit (recorded per joint; the filter uses them).
        margin_plants: arms drawn from the declared uncertainty set that the sampled-data
            rollouts use besides the model (``margin_plants``).
        delay_periods: control periods between measurement and torque that the sampled-data
            margin covers on top of ``sampling_factor`` (None: the model's declared
            uncertainty, ``delay_periods``).
        mean_over_hold: on an arm with viscous damping, True: the filter bounds the mean
            acceleration over a control period (the exact zero-order-hold response of the
            damped joints, ``hold_mass_matrix``); False: the acceleration at the start of
            the hold; None (default): certification tries both and keeps the larger safe
            set.
    """

    alpha1: ClassK | None = None
    alpha2: ClassK = ClassK('linear')
    families: tuple[str, ...] = ('sqrt', 'linear', 'linear' + LEMMA_SUFFIX)
    velocity_barrier: bool = True
    per_joint_envelopes: bool = True
    braking_slope_share: float = 0.1
    braking_distance_share: float = 0.02
    acceleration_bound_factor: float = 1.5
    gamma_margin: float = 0.9
    beta_margin: float = 1.2
    beta_sampling_limit: float = 0.1
    control_rate_hz: float = 1000.0
    sampling_factor: float = 1.0
    margin_samples: int = 1000
    margin_inflation: float = 1.5
    velocity_scales: int = 40
    min_velocity_fraction: float = 0.05
    condition: str = 'auto'
    falsifier_states: int = 100_000
    bounds: BoundSettings = field(default_factory=BoundSettings)
    seed: int = 0
    observer_periods: float = DEFAULT_OBSERVER_PERIODS
    observer_noise_share: float = 0.01
    delay_periods: int | None = None
    margin_plants: int = 3
    mean_over_hold: bool | None = None

    def __post_init__(self) -> None:
        if self.alpha1 is not None and self.alpha1.kind not in ALPHA1_KINDS:
            raise SafetyFilterError(f'alpha1 must be one of {ALPHA1_KINDS}')
        if not self.families or any(_split_family(kind)[0] not in ALPHA1_KINDS
                                    for kind in self.families):
            raise SafetyFilterError(f'families must be a non-empty choice of {ALPHA1_KINDS}')
        if not 0.0 < self.braking_slope_share <= 1.0:
            raise SafetyFilterError('braking_slope_share must be in (0, 1]')
        if self.alpha2.kind not in ALPHA2_KINDS:
            raise SafetyFilterError(f'alpha2 must be one of {ALPHA2_KINDS}')
        if not 0.0 < self.gamma_margin < 1.0:
            raise SafetyFilterError('gamma_margin must be in (0, 1)')
        if not self.beta_margin > 1.0:
            raise SafetyFilterError('beta_margin must be > 1')
        if not self.control_rate_hz > 0.0 or not self.sampling_factor >= 1.0:
            raise SafetyFilterError('control_rate_hz must be > 0 and sampling_factor >= 1')
        if self.condition not in ('auto', 'acceleration_authority', 'torque_coupling'):
            raise SafetyFilterError(f'unknown condition {self.condition!r}')
        if not (np.isfinite(self.observer_periods) and self.observer_periods >= 2.0):
            raise SafetyFilterError('observer_periods must be finite and >= 2')
        if not (np.isfinite(self.observer_noise_share) and self.observer_noise_share > 0.0):
            raise SafetyFilterError('observer_noise_share must be finite and > 0')

    def acceleration_hold_s(self, model: RobotModel) -> float:
        """The hold whose mean acceleration the filter bounds [s]: one control period (what
        the driver holds each command for at the certified rate; the sampled-data margin
        covers the longer holds). 0: the acceleration at the start of the hold (no damping,
        or ``mean_over_hold`` off)."""
        damped = bool(np.any(np.array(model.viscous_friction) > 0.0))
        return 1.0 / self.control_rate_hz if self.mean_over_hold is True and damped else 0.0

    @property
    def hold_period_s(self) -> float:
        """Longest hold period the margin covers [s]: ``sampling_factor`` control periods
        plus the declared delay between measurement and torque."""
        return (self.sampling_factor + (self.delay_periods or 0)) / self.control_rate_hz

    def record(self) -> dict[str, Any]:
        """Plain form for the certificate's provenance."""
        plain = asdict(self)
        plain['alpha1'] = None if self.alpha1 is None else self.alpha1.to_dict()
        plain['families'] = list(self.families)
        plain['alpha2'] = self.alpha2.to_dict()
        return plain


@dataclass
class CertificationOutcome:
    """Everything certification found: the certificate and the evidence behind it."""

    certificate: Certificate
    bounds: DynamicsBounds | None
    velocity_scale: float
    authority_by_condition: dict[str, np.ndarray | None]
    stage_seconds: dict[str, float]
    falsifier: Any = None  # safety_filter.certification.falsifier.FalsifierResult

    @property
    def certified(self) -> bool:
        """Whether every check passed."""
        return self.certificate.certified


# ---------------------------------------------------------------------- authorities
def authority_row_sums(mass_max: np.ndarray, bias_max: np.ndarray, effort: np.ndarray,
                       weights: np.ndarray, cap: np.ndarray | None = None
                       ) -> np.ndarray | None:
    """Acceleration authority from the row-sum condition (docs/method.md), or None.

    Solves ``max t`` s.t. ``Mbar e + hbar <= umax``, ``e >= t w``, then, with ``t`` fixed at
    its optimum, spends the remaining slack: ``max sum e_i / w_i``. Every ``a`` with
    ``|a_i| <= e_i`` then maps to a torque inside the box at every state of the boxes.
    With a ``cap``, a joint whose share ``t w_i`` would exceed its cap is held at the cap
    and the others share again (authority a joint has no use for goes to the others); the
    second phase keeps every ``e_i`` at most its cap.
    """
    n = len(effort)
    room = effort - bias_max
    if np.any(room <= 0.0):
        return None
    held = np.zeros(n, dtype=bool)  # joints held at their cap
    cap = np.full(n, np.inf) if cap is None else np.asarray(cap, dtype=float)
    for _ in range(n + 1):
        # Variables (e_1..e_n, t). Phase 1: maximise t.
        share = np.where(held, 0.0, weights)
        a_ub = np.vstack([np.hstack([mass_max, np.zeros((n, 1))]),
                          np.hstack([-np.eye(n), share[:, None]])])
        b_ub = np.concatenate([room, np.where(held, -cap, 0.0)])
        c = np.zeros(n + 1)
        c[-1] = -1.0
        first = linprog(c, A_ub=a_ub, b_ub=b_ub, bounds=[(0, None)] * (n + 1),
                        method='highs')
        if first.status != 0 or first.x[-1] <= 0.0:
            return None
        t_best = first.x[-1] * (1.0 - 1e-9)
        over = ~held & (t_best * weights > cap)
        if not over.any():
            break
        held |= over
    floor = np.where(held, cap, t_best * weights)
    # Phase 2: keep every e_i >= its phase-1 share, maximise the weighted sum.
    second = linprog(-1.0 / weights, A_ub=mass_max, b_ub=room,
                     bounds=[(lo, None if not np.isfinite(hi) else max(hi, lo))
                             for lo, hi in zip(floor, cap)], method='highs')
    authority = second.x if second.status == 0 else first.x[:n]
    # Guard against LP round-off: scale down until the inequality holds exactly.
    usage = mass_max @ authority
    scale = min(1.0, float(np.min(room / np.maximum(usage, 1e-300))))
    return authority * scale


def authority_torque_coupling(inverse_mass_max: np.ndarray, coupling_min: np.ndarray,
                              bias_max: np.ndarray) -> np.ndarray | None:
    """Authority ``rho - nu`` of the torque-coupling condition (docs/method.md), or None."""
    nu = inverse_mass_max @ bias_max
    authority = coupling_min - nu
    return authority if np.all(authority > 0.0) else None


# ---------------------------------------------------------------------- gains
def gamma_star(authority: np.ndarray, position_range: np.ndarray, alpha1: ClassK
               ) -> np.ndarray:
    """``gamma* = sqrt(e / max_{0<=x<=r} alpha1'(x) alpha1(x))`` per joint."""
    peak = np.array([alpha1.max_value_times_slope(r) for r in position_range])
    return np.sqrt(np.maximum(authority, 0.0) / peak)


def _slice_ratio(x: np.ndarray, t: np.ndarray, r: float, e_eff: float, gamma: float,
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
              alpha1: ClassK, alpha2: ClassK, grid: int = 401, speed_bound: float = np.inf,
              speed_beta: float = 0.0) -> tuple[float, float, float]:
    """``beta*`` for one joint: dense grid over its slice of S, then local refinement.

    Returns ``(beta*, hp, t)`` with the maximiser's coordinates (``inf`` when some state on
    the boundary cannot be made feasible by any beta: gamma is too large). ``speed_bound``
    and ``speed_beta`` describe the velocity barriers when S has them.
    """
    r = float(position_range)
    xs = np.linspace(0.0, r, grid)
    ts = np.linspace(0.0, 1.0, grid)
    x, t = np.meshgrid(xs, ts, indexing='ij')
    extra = (float(speed_bound), float(speed_beta))
    values = _slice_ratio(x, t, r, effective_authority, gamma, margin, alpha1, alpha2, *extra)
    k = np.unravel_index(int(np.argmax(values)), values.shape)
    best = float(values[k])
    if not np.isfinite(best):
        return (float(best), float(x[k]), float(t[k]))
    best_x, best_t = float(x[k]), float(t[k])
    order = np.argsort(values, axis=None)[::-1][:3]
    for flat in order:
        i, j = np.unravel_index(int(flat), values.shape)

        def negative(z: np.ndarray) -> float:
            return -float(_slice_ratio(np.array(z[0]), np.array(z[1]), r, effective_authority,
                                       gamma, margin, alpha1, alpha2, *extra))

        found = minimize(negative, np.array([x[i, j], t[i, j]]), method='L-BFGS-B',
                         bounds=[(0.0, r), (0.0, 1.0)])
        if np.isfinite(found.fun) and -found.fun > best:
            best, best_x, best_t = -float(found.fun), float(found.x[0]), float(found.x[1])
    return max(best, 0.0), best_x, best_t


@dataclass
class _Design:
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
        return self.speed_beta is not None and bool(np.any(self.speed_beta > 0.0))


def model_error_bound(model: RobotModel, bounds: DynamicsBounds, velocity_box: np.ndarray,
                      settings: CertifySettings) -> DisturbanceBound:
    """The declared uncertainty set's torque bound at a velocity box (see
    :func:`safety_filter.core.model_uncertainty.disturbance_bound`)."""
    def coriolis(christoffel: np.ndarray) -> np.ndarray:
        return np.einsum('ijk,j,k->i', christoffel, velocity_box, velocity_box)

    return disturbance_bound(
        model, model.uncertainty, gravity_max=bounds.gravity_max,
        coriolis_max=coriolis(bounds.christoffel_max), mass_max=bounds.mass_max,
        payload_gravity_max=bounds.payload_gravity_max,
        payload_coriolis_max=coriolis(bounds.payload_christoffel_max),
        payload_mass_max=bounds.payload_mass_max, velocity_box=velocity_box,
        observer_time_constant_s=observer_time_constants(model, bounds, settings))


def observer_time_constants(model: RobotModel, bounds: DynamicsBounds,
                            settings: CertifySettings) -> np.ndarray:
    """The disturbance observer's time constant per joint [s]: the fastest whose velocity
    noise ``Mbar_ii v_noise / tau`` costs at most ``observer_noise_share`` of the joint's
    torque limit, between two control periods and ``observer_periods``. A light joint gets a
    fast observer: it feels a model error most, in acceleration, and its noise costs little
    torque."""
    period = 1.0 / settings.control_rate_hz
    noise = model.uncertainty.velocity_noise * np.diag(bounds.mass_max)
    wanted = noise / (settings.observer_noise_share * np.array(model.effort_limit))
    return np.clip(wanted, 2.0 * period, settings.observer_periods * period)


def authority_problem(model: RobotModel, bounds: DynamicsBounds, settings: CertifySettings,
                      velocity_box: np.ndarray, exact_model: bool = False
                      ) -> tuple[np.ndarray, np.ndarray, DisturbanceBound]:
    """The row-sum condition's data ``(mass bound, bias bound, model-error bound)`` at a
    velocity box: ``mass @ e + bias <= umax`` (``docs/method.md``).

    The filter's QP uses ``h - d_hat`` with ``d_hat`` inside the range of the plants' model
    error at the state, so its bias is some plant's bias: the payload is already inside the
    bounds (they cover the payload range); every other kind adds to them, and the inertial
    part grows with the acceleration. ``exact_model`` leaves the uncertainty out.
    """
    disturbance = (DisturbanceBound({}, {}) if exact_model
                   else model_error_bound(model, bounds, velocity_box, settings))
    outside = disturbance.without('payload', static_only=True)
    bias = bounds.bias_max(velocity_box, np.array(model.viscous_friction),
                           np.array(model.coulomb_friction)) + outside.static_total
    mass = bounds.mass_max + outside.inertial_total
    return mass, bias, disturbance


def _family_for(settings: CertifySettings, kind: str, usable: np.ndarray,
                position_range: np.ndarray) -> ClassK:
    """The class-K function of family ``kind`` for a design with usable authority ``usable``.

    An explicit ``settings.alpha1`` is used as given. The automatic ``sqrt`` family takes
    ``eps`` from the hold period: the slope term ``gamma alpha1'(h) v`` of the bounds may
    drift by ``gamma alpha1'(0) e T = sqrt(e) e T / sqrt(2 eps)`` over a hold ``T`` at
    ``gamma ~ sqrt(e)``; ``eps = (sqrt(e) T / share)^2 / 2`` keeps that at ``share`` of the
    authority (``docs/method.md``, the braking-curve barrier).
    """
    if settings.alpha1 is not None:
        return settings.alpha1
    if kind != 'sqrt':
        return ClassK(kind)
    hold = settings.hold_period_s
    eps = float(np.max(0.5 * (np.sqrt(np.maximum(usable, 0.0)) * hold
                              / settings.braking_slope_share) ** 2))
    return ClassK('sqrt', float(np.clip(eps, 1e-6, 0.1 * float(np.min(position_range)))))


def useful_authority(model: RobotModel, settings: CertifySettings) -> np.ndarray:
    """Authority beyond which a joint gains little: at its rated speed it then brakes within
    ``braking_distance_share`` of its range, ``vmax^2 / (2 share r)``. More only enlarges the
    accelerations the filter lets through, and with them the sampled-data margin (through
    damping and the coupling of light links), without enlarging S noticeably."""
    vmax = np.array(model.velocity_limit)
    return vmax ** 2 / (2.0 * settings.braking_distance_share * np.array(model.position_range))


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
    hold = settings.hold_period_s
    wanted = (authority + 2.0 * margin) / np.maximum(velocity_box, 1e-300)
    return np.clip(wanted, settings.beta_sampling_limit / hold, 0.5 / hold)


def _design_for_box(model: RobotModel, bounds: DynamicsBounds, settings: CertifySettings,
                    fractions: np.ndarray, margin: np.ndarray, kind: str,
                    exact_model: bool = False) -> tuple[_Design | None, dict]:
    """The best design (over the sufficient conditions) for the velocity box
    ``fractions * vmax`` and the class-K family ``kind``, with ``margin`` reserved."""
    kind, rows = _split_family(kind)
    rows = rows and settings.velocity_barrier
    fractions = np.broadcast_to(np.asarray(fractions, dtype=float), (model.n_joints,))
    velocity_box = fractions * np.array(model.velocity_limit)
    mass, bias, disturbance = authority_problem(model, bounds, settings, velocity_box,
                                                exact_model)
    umax = np.array(model.effort_limit)
    weights = umax / np.diag(bounds.mass_max)
    candidates: dict[str, np.ndarray | None] = {}
    if settings.condition in ('auto', 'acceleration_authority'):
        candidates['acceleration_authority'] = authority_row_sums(
            mass, bias, umax, weights, useful_authority(model, settings) if rows else None)
    if settings.condition in ('auto', 'torque_coupling'):
        coupled = authority_torque_coupling(bounds.inverse_mass_max, bounds.coupling_min, bias)
        if coupled is not None and rows:
            coupled = np.minimum(coupled, np.maximum(useful_authority(model, settings),
                                                     1e-9 * coupled))
        if coupled is not None:  # one step of e = rho - nu - Winv I e (conservative)
            coupled = coupled - bounds.inverse_mass_max @ disturbance.inertial_total @ coupled
            coupled = coupled if np.all(coupled > 0.0) else None
        candidates['torque_coupling'] = coupled
    best: _Design | None = None
    r = np.array(model.position_range)
    for condition, authority in candidates.items():
        if authority is None:
            continue
        usable = authority - margin
        if np.any(usable <= 0.0):
            continue
        alpha1 = _family_for(settings, kind, usable, r)
        g_star = gamma_star(usable, r, alpha1)
        gamma = settings.gamma_margin * g_star
        speed_beta = np.zeros(model.n_joints)
        if rows:
            speed_beta = velocity_barrier_rate(usable + margin, margin, velocity_box,
                                               settings)
        else:  # the velocity lemma: S inside the box by gamma alone
            reach = np.array([alpha1.value(x) for x in r], dtype=float)
            gamma = np.minimum(gamma, velocity_box / reach)
        design = _Design(float(np.min(fractions)), condition, authority, velocity_box, g_star,
                         gamma, disturbance, alpha1, speed_beta, usable)
        if rows and settings.acceleration_bound_factor > 0.0:
            design.accel_bound = settings.acceleration_bound_factor * authority
        if best is None or _design_score(model, design) > _design_score(model, best):
            best = design
    return best, candidates


def _design_for_scale(model: RobotModel, bounds: DynamicsBounds, settings: CertifySettings,
                      scale: float, margin: np.ndarray, exact_model: bool = False,
                      kind: str = 'linear') -> tuple[_Design | None, dict]:
    """:func:`_design_for_box` with one common velocity fraction ``scale``."""
    return _design_for_box(model, bounds, settings, np.full(model.n_joints, scale), margin,
                           kind, exact_model)


def safe_set_areas(model: RobotModel, design: _Design) -> np.ndarray:
    """Area of each joint's slice of S in its (q, v) plane (``barriers.safe_set_area``)."""
    r = np.array(model.position_range)
    box = design.velocity_box if design.has_speed_rows else None
    return np.array([safe_set_area(r[i], float(design.gamma[i]), design.alpha1,
                                   None if box is None else float(box[i]))
                     for i in range(len(r))])


def permissiveness(model: RobotModel, design: _Design, reference_authority: np.ndarray
                   ) -> np.ndarray:
    """Per joint: the area of S over the area of the braking set at ``reference_authority``
    and the rated speed (1: S is as large as any set a joint braking at that authority can
    be kept in)."""
    r = np.array(model.position_range)
    vmax = np.array(model.velocity_limit)
    reference = np.array([braking_set_area(r[i], float(reference_authority[i]), vmax[i])
                          for i in range(len(r))])
    return safe_set_areas(model, design) / np.maximum(reference, 1e-300)


def _design_score(model: RobotModel, design: _Design) -> float:
    """How permissive a design is: the mean over the joints of the log of the area of S
    (designs for one robot compare by the geometric mean of their safe-set areas)."""
    return float(np.mean(np.log(np.maximum(safe_set_areas(model, design), 1e-300))))


def envelope_fraction(model: RobotModel, design: _Design) -> np.ndarray:
    """Fastest speed in each joint's slice of S over its rated speed."""
    r = np.array(model.position_range)
    reach = design.gamma * np.array([design.alpha1.value(x) for x in r], dtype=float)
    if design.has_speed_rows:
        reach = np.minimum(reach, design.velocity_box)
    return reach / np.array(model.velocity_limit)


def search_velocity_box(model: RobotModel, bounds: DynamicsBounds, settings: CertifySettings,
                        kind: str, exact_model: bool = False
                        ) -> tuple[_Design | None, dict]:
    """The most permissive velocity box for family ``kind`` before the sampled-data margin.

    A common fraction of the rated speeds first (the grid of ``velocity_scales``), then,
    when ``per_joint_envelopes``, a coordinate search on each joint's fraction: the Coriolis
    bound couples the joints, but a light joint need not be slowed to a heavy one's pace.
    The objective is :func:`permissiveness` against the braking set at the authority of
    the slowest box tried (a fixed reference for the whole search), as a geometric mean.
    """
    n = model.n_joints
    zero = np.zeros(n)
    floor = 1.0 / settings.velocity_scales
    slow, _ = _design_for_scale(model, bounds, settings, floor, zero, exact_model, kind)
    if slow is None:
        return None, {}
    reference = slow.usable

    def score(design: _Design | None) -> float:
        if design is None:
            return -np.inf
        share = permissiveness(model, design, reference)
        return float(np.mean(np.log(np.maximum(share, 1e-12))))

    best, best_found, best_value = slow, {}, -np.inf
    best_fractions = np.full(n, floor)
    for scale in np.linspace(1.0, floor, settings.velocity_scales):
        design, found = _design_for_scale(model, bounds, settings, scale, zero, exact_model,
                                          kind)
        value = score(design)
        if value > best_value + 1e-12:
            best, best_found, best_value = design, found, value
            best_fractions = np.full(n, scale)
    if settings.per_joint_envelopes and _split_family(kind)[1] and settings.velocity_barrier:
        step = 0.2
        while step > 0.01:
            improved = False
            for i in range(n):
                for sign in (1.0, -1.0):
                    trial = best_fractions.copy()
                    trial[i] = float(np.clip(trial[i] * (1.0 + sign * step), floor, 1.0))
                    if trial[i] == best_fractions[i]:
                        continue
                    design, found = _design_for_box(model, bounds, settings, trial, zero,
                                                    kind, exact_model)
                    value = score(design)
                    if value > best_value + 1e-9:
                        best, best_found, best_value = design, found, value
                        best_fractions = trial
                        improved = True
                        break
            if not improved:
                step *= 0.5
    best.fractions = best_fractions
    return best, best_found


# ---------------------------------------------------------------------- driver
def certify(model: RobotModel, settings: CertifySettings | None = None,
            progress: ProgressCallback | None = None) -> Certificate:
    """Certify gains for ``model``; returns the :class:`Certificate` (check ``.certified``).

    See :func:`certify_with_evidence` for the bounds, timings and falsifier result.
    """
    return certify_with_evidence(model, settings, progress).certificate


def certify_with_evidence(model: RobotModel, settings: CertifySettings | None = None,
                          progress: ProgressCallback | None = None) -> CertificationOutcome:
    """Run every certification stage and keep the evidence (see the module docstring)."""
    from safety_filter.certification.falsifier import falsify

    settings = settings or CertifySettings()
    if settings.delay_periods is None:
        settings = replace(settings, delay_periods=int(model.uncertainty.delay_periods))
    report = progress or (lambda _stage, _fraction: None)
    n = model.n_joints
    names = list(model.joint_names)
    umax = np.array(model.effort_limit)
    seconds: dict[str, float] = {}
    reasons: list[str] = []
    notes: list[str] = []

    # ---- per family: velocity box, authority, the sampled-data margin, gains (the stage
    # times add up over the families). On a damped arm, with mean_over_hold None, the
    # families are taken through with the accelerations at the start of the hold and then
    # with their means over it: for the family chosen so far, or for all of them when none
    # certified (docs/method.md, dissipation).
    kinds = settings.families if settings.alpha1 is None else (
        settings.alpha1.kind + ('' if settings.velocity_barrier else LEMMA_SUFFIX),)
    damped = bool(np.any(np.array(model.viscous_friction) > 0.0))
    forms = [settings.mean_over_hold] if settings.mean_over_hold is not None or not damped \
        else [False, True]
    attempts: list[_Attempt] = []
    all_bounds: dict[bool, DynamicsBounds] = {}
    for stage in ('bounds', 'authority', 'sampling margin', 'gains'):
        seconds[stage] = 0.0
    chosen: _Attempt | None = None
    for mean in forms:
        form = replace(settings, mean_over_hold=bool(mean))
        clock = time.perf_counter()
        bounds = all_bounds[bool(mean)] = estimate_bounds(
            model, settings.bounds, progress=lambda s, f: report('bounds: ' + s, f),
            hold_s=form.acceleration_hold_s(model))
        seconds['bounds'] += time.perf_counter() - clock
        kinds_now = kinds if chosen is None else (chosen.kind,)
        for index, kind in enumerate(kinds_now):
            attempt = _attempt_family(
                model, bounds, form, kind,
                lambda stage, f, k=index: report(stage, (k + f) / len(kinds_now)), seconds)
            attempt.mean_over_hold = bool(mean)
            attempts.append(attempt)
        certifiable = [a for a in attempts if a.design is not None and not a.reasons]
        chosen = (max(certifiable, key=lambda a: _design_score(model, a.design))
                  if certifiable else None)
    certifiable = [a for a in attempts if a.design is not None and not a.reasons]
    chosen = chosen or attempts[0]
    settings = replace(settings, mean_over_hold=chosen.mean_over_hold)
    bounds = all_bounds[chosen.mean_over_hold]
    tried = []
    for attempt in attempts:
        entry = attempt.record(model)
        if attempt is chosen:
            entry['outcome'] = 'chosen'
        elif any(attempt is other for other in certifiable):
            entry['outcome'] = 'certifies, smaller safe set'
        else:
            entry['outcome'] = 'does not certify: ' + '; '.join(attempt.reasons)
        tried.append(entry)
    design, margin, last_design = chosen.design, chosen.margin, chosen.last_design
    box_limits = chosen.box_limits
    reasons.extend(chosen.reasons)
    notes.extend(chosen.notes)
    candidates = chosen.candidates
    b_star, b_floor, b_cap, beta = chosen.betas
    shown = design or last_design
    if shown is not None:
        # Keep the numbers of the last attempt when it failed: they show which joint ran short.
        gamma, g_star, authority = shown.gamma, shown.gamma_star, shown.authority
        velocity_box, condition, scale = shown.velocity_box, shown.condition, shown.scale
        alpha1 = shown.alpha1
        speed_beta = shown.speed_beta if shown.speed_beta is not None else np.zeros(n)
        accel_bound = shown.accel_bound
    else:
        gamma = g_star = authority = velocity_box = speed_beta = np.zeros(n)
        accel_bound = None
        condition, scale = 'acceleration_authority', 0.0
        first = _split_family(kinds[0])[0]
        alpha1 = settings.alpha1 or ClassK(first, 1.0 if first != 'sqrt' else 0.01)

    if design is None or reasons:
        gamma = np.where(gamma > 0, gamma, 0.0)
    certified = not reasons
    dissipation: dict[str, Any] = {}
    if design is not None:
        clock = time.perf_counter()
        dissipation = _dissipation_record(model, chosen, settings)
        seconds['sampling margin'] += time.perf_counter() - clock
    provenance = {
        **bounds.record(),
        'certify': settings.record(),
        'velocity_scale': float(scale),
        'designs_tried': tried,
        'velocity_box_limited_by': box_limits,
        'authority_row_sums': _plain(candidates.get('acceleration_authority')),
        'authority_torque_coupling': _plain(candidates.get('torque_coupling')),
        'torque_coupling_rho': _plain(bounds.coupling_min),
        'notes': notes,
        'uncertainty': model.uncertainty.record(),
        'observer_time_constants_s': _plain(observer_time_constants(model, bounds, settings)),
        **_model_error_record(model, bounds, settings, design or last_design),
        **dissipation,
    }
    certificate = Certificate(
        joint_names=names,
        position_lower=model.position_lower,
        position_upper=model.position_upper,
        velocity_limit=np.array(model.velocity_limit),
        effort_limit=umax,
        velocity_bound=velocity_box,
        velocity_beta=speed_beta,
        acceleration_bound=accel_bound,
        acceleration_hold_s=settings.acceleration_hold_s(model) or None,
        gamma=gamma,
        gamma_star=g_star,
        beta=beta,
        beta_star=b_star,
        beta_floor=b_floor,
        beta_cap=b_cap,
        authority=authority,
        sampling_margin=margin,
        viscous_friction=model.viscous_friction,
        coulomb_friction=model.coulomb_friction,
        condition=condition,
        alpha1=alpha1,
        alpha2=settings.alpha2,
        control_rate_hz=settings.control_rate_hz,
        sampling_factor=settings.sampling_factor,
        payload_mass_range=(model.payload.mass_min, model.payload.mass_max),
        payload_point=model.payload.point,
        model_hash=model.content_hash(),
        package_version=__version__,
        created=_dt.datetime.now(_dt.timezone.utc).isoformat(timespec='seconds'),
        settings=provenance,
        certified=certified,
        reasons=reasons,
    )

    # ---- independent check
    falsifier_result = None
    if certified:
        clock = time.perf_counter()
        if settings.falsifier_states <= 0:
            reasons.append('the falsifier was skipped (falsifier_states = 0): not certified')
        else:
            falsifier_result = falsify(model, certificate, states=settings.falsifier_states,
                                       seed=settings.seed + 101,
                                       progress=lambda f: report('falsifier', f))
            certificate.falsifier = falsifier_result.summary()
            if falsifier_result.infeasible:
                reasons.append(
                    f'the falsifier found {falsifier_result.infeasible} infeasible states of '
                    f'{falsifier_result.states} (worst torque slack '
                    f'{falsifier_result.min_slack:.3g}): the dynamics bounds were '
                    'underestimated; raise bound samples or inflation')
        certificate.certified = not reasons
        certificate.reasons = reasons
        seconds['falsifier'] = time.perf_counter() - clock
    certificate.settings['stage_seconds'] = {k: round(v, 3) for k, v in seconds.items()}
    return CertificationOutcome(certificate, bounds, float(scale), candidates, seconds,
                                falsifier_result)


@dataclass(eq=False)
class _Attempt:
    """One class-K family taken through the velocity box search, the sampled-data margin and
    the choice of beta."""

    kind: str
    design: _Design | None = None
    last_design: _Design | None = None
    mean_over_hold: bool = False
    margin: np.ndarray | None = None
    candidates: dict = field(default_factory=dict)
    betas: tuple = ()
    reasons: list[str] = field(default_factory=list)
    notes: list[str] = field(default_factory=list)
    box_limits: list[str] = field(default_factory=list)

    def record(self, model: RobotModel) -> dict[str, Any]:
        """Plain summary for the certificate (the report's table of designs tried)."""
        shown = self.design or self.last_design
        entry: dict[str, Any] = {'alpha1': self.kind, 'mean_over_hold': self.mean_over_hold}
        if shown is not None:
            entry['alpha1_scale'] = float(shown.alpha1.scale)
            entry['envelope_fraction'] = _plain(envelope_fraction(model, shown))
            entry['safe_set_area'] = _plain(safe_set_areas(model, shown))
        return entry


def margin_plants(model: RobotModel, settings: CertifySettings) -> list[tuple[RobotModel, float]]:
    """Arms of the declared uncertainty set that the sampled-data rollouts also use:
    ``margin_plants`` of them, drawn with the certification's seed (their quantities mostly
    at the ends of their ranges), with the payload anywhere in its range."""
    rng = np.random.default_rng(settings.seed + 7)
    drawn = [draw_plant(model, model.uncertainty, rng) for _ in range(settings.margin_plants)]
    # Coulomb friction only ever opposes the motion and cannot carry a joint through zero
    # velocity; its reversal at v = 0 is left out of the rollouts (docs/method.md,
    # dissipation), so each plant keeps the model's Coulomb friction.
    return [(model_with_inertials(plant.model, coulomb_friction=np.array(
        model.coulomb_friction)), plant.payload_mass) for plant in drawn]


ENVELOPE_REPORTED_BELOW = 0.8  # box fractions below this get a reason in the certificate


def _what_limits_the_box(model: RobotModel, bounds: DynamicsBounds, settings: CertifySettings,
                         kind: str, start: _Design, design: _Design, margin: np.ndarray
                         ) -> list[str]:
    """Per joint, why its velocity box is below ``ENVELOPE_REPORTED_BELOW`` of its rated
    speed ('' where it is not): the torque limits (at the rated speed the dynamics bounds
    leave some joint no authority), the coupling (a faster box for it costs the others more
    safe set than it adds), or the sampled-data margin (which shrank the box the search
    chose)."""
    limits = []
    shrunk = float(np.max(design.fractions / start.fractions))
    for i in range(model.n_joints):
        fraction = float(design.fractions[i])
        if fraction >= ENVELOPE_REPORTED_BELOW:
            limits.append('')
            continue
        trial = start.fractions.copy()
        trial[i] = 1.0
        faster, _ = _design_for_box(model, bounds, settings, trial, np.zeros(len(margin)),
                                    kind)
        if faster is None:
            text = ('torque: at its rated speed the Coriolis and gravity bounds leave some '
                    'joint no authority')
        else:
            text = ('coupling: a faster box for this joint takes more safe set from the '
                    'others than it adds')
        if shrunk < 0.999:
            text += (f'; then sampling: the sampled-data margin shrank the box the search '
                     f'chose ({100 * start.fractions[i]:.0f} %) by {100 * (1 - shrunk):.0f} %')
        limits.append(text)
    return limits


def _attempt_family(model: RobotModel, bounds: DynamicsBounds, settings: CertifySettings,
                    kind: str, report: ProgressCallback,
                    seconds: dict[str, float] | None = None) -> _Attempt:
    """Design, margin and gains for one class-K family (the module docstring's steps 2-5).

    The margin (estimated from rollouts, which depend on the gains) only shrinks what a box
    can certify, and shrinks less at slower boxes (the drift is mostly driven by velocity),
    so: at a given box iterate margin -> gains -> margin until it settles, and bisect on a
    common factor of the box for the largest one at which that succeeds.
    """
    n = model.n_joints
    names = list(model.joint_names)
    r = np.array(model.position_range)
    vmax = np.array(model.velocity_limit)
    attempt = _Attempt(kind)
    plants = margin_plants(model, settings)
    seconds = {} if seconds is None else seconds
    clock = time.perf_counter()
    start, candidates = search_velocity_box(model, bounds, settings, kind)
    seconds['authority'] = seconds.get('authority', 0.0) + time.perf_counter() - clock
    clock = time.perf_counter()
    report('authority', 0.2)
    attempt.candidates = candidates
    rounds = {'count': 0}

    def settle(fractions: np.ndarray) -> tuple[_Design | None, np.ndarray, _Design | None]:
        margin = np.zeros(n)
        design, _ = _design_for_box(model, bounds, settings, fractions, margin, kind)
        last = design
        for _ in range(6):
            if design is None:
                return None, margin, last
            beta = _choose_beta(design, margin, r, settings)[3]
            gains = Gains(design.gamma, beta, design.alpha1, settings.alpha2,
                          design.velocity_box, design.speed_beta, design.accel_bound)
            new_margin = estimate_sampling_margin(
                model, gains, settings.hold_period_s, settings.margin_samples,
                inflation=settings.margin_inflation, current_margin=margin,
                seed=settings.seed,  # same draws each round: the margin settles monotonically
                plants=plants, acceleration_hold_s=settings.acceleration_hold_s(model))
            rounds['count'] += 1
            report('sampling margin', 0.2 + 0.7 * min(1.0, rounds['count'] / 12))
            if np.all(new_margin <= margin * (1.0 + 1e-9)):
                design.fractions = fractions
                return design, margin, design
            # The margin and the gains approach their fixed point geometrically; stepping 5 %
            # past each new estimate lets the next estimate fall inside and settle.
            margin = np.maximum(margin, 1.05 * new_margin)
            last = design
            design, _ = _design_for_box(model, bounds, settings, fractions, margin, kind)
        return None, margin, last

    design, margin, last_design = None, np.zeros(n), None
    if start is not None:
        top = start.fractions
        design, margin, last_design = settle(top)
        if design is None:
            floor = 1.0 / settings.velocity_scales
            low_factor = float(np.max(floor / top))
            low_design, low_margin, low_last = settle(top * low_factor)
            if low_design is None:
                margin, last_design = low_margin, low_last
            else:
                design, margin, high = low_design, low_margin, 1.0
                low = low_factor
                for _ in range(4):
                    middle = 0.5 * (low + high)
                    trial, trial_margin, _ = settle(np.maximum(top * middle, floor))
                    if trial is not None:
                        design, margin, low = trial, trial_margin, middle
                    else:
                        high = middle
        if design is not None:
            attempt.candidates = _design_for_box(model, bounds, settings, design.fractions,
                                                 margin, kind)[1]
    attempt.design, attempt.margin, attempt.last_design = design, margin, last_design
    seconds['sampling margin'] = (seconds.get('sampling margin', 0.0) + time.perf_counter()
                                  - clock)
    clock = time.perf_counter()
    if design is not None and start is not None:
        attempt.box_limits = _what_limits_the_box(model, bounds, settings, kind, start, design,
                                                  margin)
    reasons, notes = attempt.reasons, attempt.notes
    if design is None:
        reasons.extend(_explain_no_design(model, bounds, settings, margin, last_design))
        attempt.betas = (np.zeros(n),) * 4
        return attempt
    b_star, b_floor, b_cap, beta = _choose_beta(design, margin, r, settings)
    seconds['gains'] = seconds.get('gains', 0.0) + time.perf_counter() - clock
    attempt.betas = (b_star, b_floor, b_cap, beta)
    for i in np.flatnonzero(b_floor > b_cap):
        notes.append(f'joint {names[i]!r}: beta is held at the sampled-data cap '
                     f'{b_cap[i]:.4g}, below the floor {b_floor[i]:.4g} at which the bound '
                     'at rest mid-range reaches the authority: the filter brakes this joint '
                     'earlier than it needs to (a faster control rate raises the cap)')
    for i in range(n):
        if np.isfinite(b_star[i]) and b_star[i] * _BETA_MIN_MARGIN <= b_cap[i] \
                < settings.beta_margin * b_star[i]:
            notes.append(f'joint {names[i]!r}: beta is held at the sampled-data cap '
                         f'{b_cap[i]:.4g}, only {100 * (b_cap[i] / b_star[i] - 1):.1f} % '
                         f'above beta* = {b_star[i]:.4g} (wanted '
                         f'{100 * (settings.beta_margin - 1):.0f} %)')
        elif not np.isfinite(b_star[i]) or b_star[i] * _BETA_MIN_MARGIN > b_cap[i]:
            factor = settings.beta_margin * b_star[i] / b_cap[i]
            reasons.append(
                f'joint {names[i]!r}: beta* = {b_star[i]:.4g} needs beta above the '
                f'sampled-data cap {b_cap[i]:.4g} at {settings.control_rate_hz:g} Hz; '
                f'raise the control rate to at least '
                f'{settings.control_rate_hz * factor:.0f} Hz, or lower gamma_margin')
    fraction = envelope_fraction(model, design)
    for i in np.flatnonzero(fraction < settings.min_velocity_fraction):
        reasons.append(
            f'joint {names[i]!r}: only {100 * fraction[i]:.1f} % of its rated velocity '
            f'{vmax[i]:g} can be certified (minimum {100 * settings.min_velocity_fraction:g}'
            f' %): the torque limits leave too little authority; see the authority table')
    return attempt


def _model_error_record(model: RobotModel, bounds: DynamicsBounds, settings: CertifySettings,
                        design: _Design | None) -> dict[str, Any]:
    """What the declared uncertainty costs, for the certificate and its report: the torque
    bound per joint (the filter clips its disturbance estimate to it), its share per kind,
    and the authority and velocity envelope the same scale would give without it."""
    if design is None or design.disturbance is None:
        return {}
    by_kind = design.disturbance.by_kind(design.authority)
    bias = bounds.bias_max(design.velocity_box, np.array(model.viscous_friction),
                           np.array(model.coulomb_friction))
    umax = np.array(model.effort_limit)
    exact = authority_row_sums(bounds.mass_max, bias, umax, umax / np.diag(bounds.mass_max))
    uncertainty = model.uncertainty
    record: dict[str, Any] = {
        'disturbance_constant': _plain(design.disturbance.constant_part(design.authority)),
        'disturbance_link_error': max(uncertainty.link_mass_error,
                                      uncertainty.link_inertia_error),
        'disturbance_payload_error': payload_error(model, uncertainty),
        'disturbance_bound': _plain(design.disturbance.total(design.authority)),
        'disturbance_by_kind': {kind: _plain(value) for kind, value in by_kind.items()},
        'authority_without_uncertainty': _plain(exact),
    }
    # The certified velocity fractions (before the sampled-data margin) with and without
    # the uncertainty, each at its own best velocity box, for the chosen family.
    for label, exact_model in (('with', False), ('without', True)):
        kind = design.alpha1.kind + ('' if design.has_speed_rows else LEMMA_SUFFIX)
        best, _ = search_velocity_box(model, bounds, settings, kind, exact_model)
        record[f'velocity_fraction_{label}_uncertainty'] = (
            None if best is None else _plain(envelope_fraction(model, best)))
    return record


def _dissipation_record(model: RobotModel, chosen: _Attempt, settings: CertifySettings
                        ) -> dict[str, Any]:
    """What the one-sided treatment of friction and damping gives back, for the report: the
    sampled-data margin the chosen design would need if Coulomb friction could push a joint
    on through zero velocity (``sign(v)`` re-evaluated within the hold), and, when the
    design bounds mean accelerations over the hold, if it bounded those at the start of the
    hold; one rollout pass each at the certified gains (docs/method.md, dissipation)."""
    design, margin = chosen.design, chosen.margin
    coulomb = np.any(np.array(model.coulomb_friction) > 0.0)
    if design is None or margin is None or not (coulomb or chosen.mean_over_hold):
        return {}
    gains = Gains(design.gamma, chosen.betas[3], design.alpha1, settings.alpha2,
                  design.velocity_box, design.speed_beta, design.accel_bound)
    common = dict(samples=settings.margin_samples, inflation=settings.margin_inflation,
                  current_margin=margin, seed=settings.seed,
                  plants=margin_plants(model, settings))
    record: dict[str, Any] = {}
    hold = settings.acceleration_hold_s(model)
    if coulomb:
        record['margin_if_friction_flipped'] = _plain(estimate_sampling_margin(
            model, gains, settings.hold_period_s, acceleration_hold_s=hold,
            coulomb_held=False, **common))
    if chosen.mean_over_hold:
        record['margin_at_start_of_hold'] = _plain(estimate_sampling_margin(
            model, gains, settings.hold_period_s, acceleration_hold_s=0.0, **common))
    return record


def _plain(values: np.ndarray | None) -> list[float] | None:
    return None if values is None else [float(x) for x in values]


def _choose_beta(design: _Design, margin: np.ndarray, r: np.ndarray, settings: CertifySettings
                 ) -> tuple[np.ndarray, np.ndarray, np.ndarray, np.ndarray]:
    """``(beta*, floor, cap, beta)`` per joint (docs/method.md).

    The floor is the beta at which the bound at rest mid-range equals the authority (below
    it the filter brakes needlessly early; ``beta = 0`` would freeze the arm); the cap keeps
    ``beta * max(alpha2(b)/b) * T_hold`` at ``beta_sampling_limit``. ``beta`` is the larger
    of ``beta_margin * beta*`` and the floor, never above the cap.
    """
    n = len(r)
    alpha1, alpha2 = design.alpha1, settings.alpha2
    usable = design.authority - margin
    hold = settings.hold_period_s
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
    beta = np.minimum(np.maximum(settings.beta_margin * b_star, b_floor), b_cap)
    return b_star, b_floor, b_cap, beta


def _explain_model_error_shortfall(model: RobotModel, bounds: DynamicsBounds,
                                   settings: CertifySettings) -> list[str]:
    """Joints whose effort limit the declared uncertainty uses up even at the slowest
    velocity box tried, with each kind's share (empty when it does not)."""
    names = list(model.joint_names)
    umax = np.array(model.effort_limit)
    box = np.array(model.velocity_limit) / settings.velocity_scales
    _, bias, disturbance = authority_problem(model, bounds, settings, box)
    exact_bias = authority_problem(model, bounds, settings, box, exact_model=True)[1]
    reasons = []
    for i in np.flatnonzero(bias >= umax):
        if exact_bias[i] >= umax[i]:
            continue  # the model itself is short there: the other reasons say so
        shares = {kind: float(value[i]) for kind, value in disturbance.static.items()
                  if kind != 'payload' and value[i] > 0.0}
        listed = ', '.join(f'{kind} {value:.3g}' for kind, value in
                           sorted(shares.items(), key=lambda item: -item[1]))
        reasons.append(
            f'joint {names[i]!r}: with the declared uncertainty its bias bound reaches '
            f'{bias[i]:.4g} N m against an effort limit of {umax[i]:.4g} (short by '
            f'{bias[i] - umax[i]:.4g} N m; the model alone needs {exact_bias[i]:.4g}): '
            f'model error [N m] {listed}; narrow the uncertainty section of the limits file '
            '(docs/limits-file.md) where you know better, or raise the effort limit')
    return reasons


def _margin_shortfall_reason(model: RobotModel, settings: CertifySettings, i: int,
                             margin: float, authority: float) -> str:
    """Why joint ``i`` lacks more than its authority within one hold, and what would help:
    the URDF's damping when a damping mode (the joint's own, or a coupled joint's through
    ``M^-1``) is faster than the hold, else the control rate that would do (or that none
    below 10 kHz would)."""
    names = list(model.joint_names)
    hold_ms = 1000 * settings.hold_period_s
    text = (f'joint {names[i]!r}: within one hold of {hold_ms:.3g} ms (one control period '
            f'and the declared delay) the state leaves S unless {margin:.4g} rad/s^2 is '
            f'reserved, more than its authority {authority:.4g} rad/s^2')
    viscous = np.array(model.viscous_friction)
    inverse = sampled_inverse_mass(model)
    coupling = np.max(np.abs(inverse[:, i, :]), axis=0) * viscous  # [1/s] per joint j
    j = int(np.argmax(coupling))
    if coupling[j] * settings.hold_period_s > 0.2:
        inertia = 1.0 / float(np.max(inverse[:, j, j]))
        source = ('its own damping' if j == i else
                  f'the damping of joint {names[j]!r}, through the coupling of the inertia '
                  f'matrix (|M^-1| up to {np.max(np.abs(inverse[:, i, j])):.4g})')
        return (text + f': {source}: the URDF gives {names[j]!r} {viscous[j]:.4g} N m s/rad '
                f'of viscous damping on as little as {inertia:.3g} kg m^2 of link inertia, a '
                f'time constant of {1000 * inertia / viscous[j]:.3g} ms against the '
                f'{hold_ms:.3g} ms hold, so the held torque acts differently by the end of it. '
                'A faster control rate '
                'helps little (the disturbance observer then costs more authority); check that '
                "damping value, and the inertia of the joint (a geared joint's rotor inertia "
                'is not in a URDF but slows this mode by the square of the gear ratio)')
    rate = settings.control_rate_hz * margin / authority
    if rate > 10_000.0:
        return (text + f': no control rate below 10 kHz would do (about {rate:.0f} Hz by '
                'scaling); lower the velocity limits or raise the effort limits')
    return text + f': raise the control rate above {rate:.0f} Hz'


def _explain_no_design(model: RobotModel, bounds: DynamicsBounds, settings: CertifySettings,
                       margin: np.ndarray, last_design: _Design | None) -> list[str]:
    """Per-joint reasons why no velocity scale gave positive authority, with numbers."""
    names = list(model.joint_names)
    umax = np.array(model.effort_limit)
    static = bounds.gravity_max + np.array(model.coulomb_friction)
    reasons = []
    for i in np.flatnonzero(static >= umax):
        text = (f'joint {names[i]!r}: the gravity load reaches {bounds.gravity_max[i]:.4g} N m '
                f'(with Coulomb friction {static[i]:.4g}) but the effort limit is '
                f'{umax[i]:.4g}: short by {static[i] - umax[i]:.4g} N m; raise the effort limit '
                f'above {static[i] * 1.1:.4g} or reduce the load')
        if model.payload.mass_max > 0.0:
            text += (f' (the payload range goes up to {model.payload.mass_max:g} kg; '
                     'a lighter maximum payload lowers the gravity load)')
        reasons.append(text)
    if reasons:
        return reasons
    reasons = _explain_model_error_shortfall(model, bounds, settings)
    if reasons:
        return reasons
    if last_design is not None:
        short = np.flatnonzero(margin >= last_design.authority)
        if len(short) == 0:
            # Every joint kept some authority, but the margin -> gains -> margin iteration did
            # not settle (each round re-estimates the margin from new rollouts).
            return [f'the sampled-data margin did not settle down to velocity scale '
                    f'{last_design.scale:.3g}: last margin per joint '
                    f'{", ".join(f"{names[i]!r} {margin[i]:.4g}" for i in range(len(names)))}'
                    f' rad/s^2; raise margin_samples (now {settings.margin_samples}) or the '
                    'control rate']
        return [_margin_shortfall_reason(model, settings, i, margin[i],
                                         last_design.authority[i]) for i in short]
    return ['no velocity envelope gives positive authority to every joint: the Coriolis and '
            'gravity bounds exceed the effort limits; lower the velocity limits or raise the '
            'effort limits']
