"""Certification: per-joint gains for which the barrier QP is feasible everywhere in S.

The steps (METHOD section 4, with the additions of section 5):

1. bounds on the dynamics over the joint box and the payload range (``bounds``);
2. a search over a common scale ``s`` of the velocity limits: for the velocity box
   ``s * vmax`` the acceleration authority ``e`` of each joint from the row-sum LP, or from
   the torque-coupling condition (``rho - nu``), whichever certifies with larger authority;
3. ``gamma* = sqrt(e / max alpha1' alpha1)``; ``gamma`` at a margin below it and below the
   velocity-lemma bound ``s vmax / alpha1(range)``; the scale maximising the smallest
   certified velocity fraction wins;
4. the sampled-data margin ``delta`` from rollouts (``sampling``), taken out of the
   authority; ``gamma`` recomputed until the margin is stable;
5. ``beta*`` from a dense grid of each joint's slice of S, refined locally; ``beta`` above it,
   above a floor that keeps the arm from freezing, below the sampled-data cap;
6. the falsifier (``falsify``), independent of all the above, on states sampled in S.

When a step fails, the reason names the joint, the limit and the shortfall.
"""

from __future__ import annotations

import datetime as _dt
import time
from collections.abc import Callable
from dataclasses import asdict, dataclass, field
from typing import Any

import numpy as np
from scipy.optimize import linprog, minimize

from safety_filter._version import __version__
from safety_filter.alphas import ALPHA1_KINDS, ALPHA2_KINDS, ClassK
from safety_filter.bounds import BoundSettings, DynamicsBounds, estimate_bounds
from safety_filter.certificate import DEFAULT_OBSERVER_PERIODS, Certificate
from safety_filter.errors import SafetyFilterError
from safety_filter.model import RobotModel
from safety_filter.sampling import Gains, estimate_sampling_margin
from safety_filter.uncertainty import DisturbanceBound, disturbance_bound, payload_error

ProgressCallback = Callable[[str, float], None]
_BETA_MIN_MARGIN = 1.02  # beta may sit at the cap if that is still 2 % above beta*


@dataclass(frozen=True)
class CertifySettings:
    """Choices and margins of the certification (all recorded in the certificate).

    Attributes:
        alpha1, alpha2: class-K families (alpha1: linear, atan, tanh; alpha2: linear,
            cubic, atan, tanh).
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
    """

    alpha1: ClassK = ClassK('linear')
    alpha2: ClassK = ClassK('linear')
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

    def __post_init__(self) -> None:
        if self.alpha1.kind not in ALPHA1_KINDS:
            raise SafetyFilterError(f'alpha1 must be one of {ALPHA1_KINDS}')
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

    @property
    def hold_period_s(self) -> float:
        """Longest hold period the margin covers [s]."""
        return self.sampling_factor / self.control_rate_hz

    def record(self) -> dict[str, Any]:
        """Plain form for the certificate's provenance."""
        plain = asdict(self)
        plain['alpha1'] = self.alpha1.to_dict()
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
    falsifier: Any = None  # safety_filter.falsify.FalsifierResult

    @property
    def certified(self) -> bool:
        """Whether every check passed."""
        return self.certificate.certified


# ---------------------------------------------------------------------- authorities
def authority_row_sums(mass_max: np.ndarray, bias_max: np.ndarray, effort: np.ndarray,
                       weights: np.ndarray) -> np.ndarray | None:
    """Acceleration authority from the row-sum condition (METHOD 4.2), or None.

    Solves ``max t`` s.t. ``Mbar e + hbar <= umax``, ``e >= t w``, then, with ``t`` fixed at
    its optimum, spends the remaining slack: ``max sum e_i / w_i``. Every ``a`` with
    ``|a_i| <= e_i`` then maps to a torque inside the box at every state of the boxes.
    """
    n = len(effort)
    room = effort - bias_max
    if np.any(room <= 0.0):
        return None
    # Variables (e_1..e_n, t). Phase 1: maximise t.
    a_ub = np.vstack([np.hstack([mass_max, np.zeros((n, 1))]),
                      np.hstack([-np.eye(n), weights[:, None]])])
    b_ub = np.concatenate([room, np.zeros(n)])
    c = np.zeros(n + 1)
    c[-1] = -1.0
    first = linprog(c, A_ub=a_ub, b_ub=b_ub, bounds=[(0, None)] * (n + 1), method='highs')
    if first.status != 0 or first.x[-1] <= 0.0:
        return None
    t_best = first.x[-1] * (1.0 - 1e-9)
    # Phase 2: keep every e_i >= t_best w_i, maximise the weighted sum.
    second = linprog(-1.0 / weights, A_ub=mass_max, b_ub=room,
                     bounds=[(t_best * w, None) for w in weights], method='highs')
    authority = second.x if second.status == 0 else first.x[:n]
    # Guard against LP round-off: scale down until the inequality holds exactly.
    usage = mass_max @ authority
    scale = min(1.0, float(np.min(room / np.maximum(usage, 1e-300))))
    return authority * scale


def authority_torque_coupling(inverse_mass_max: np.ndarray, coupling_min: np.ndarray,
                              bias_max: np.ndarray) -> np.ndarray | None:
    """Authority ``rho - nu`` of the torque-coupling condition (METHOD 4.2), or None."""
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
                 margin: float, alpha1: ClassK, alpha2: ClassK) -> np.ndarray:
    """The ratio whose maximum over joint i's slice of S is beta*.

    ``x = hp`` in [0, r] and ``t`` in [0, 1] parametrise the slice: v runs from
    ``-gamma alpha1(hn)`` (bn = 0) to ``gamma alpha1(hp)`` (bp = 0).
    """
    hp, hn = x, r - x
    a1p, a1n = alpha1.value(hp), alpha1.value(hn)
    v = gamma * (-a1n + t * (a1p + a1n))
    bp, bn = gamma * a1p - v, gamma * a1n + v
    psi_p = gamma * alpha1.derivative(hp) * v - e_eff
    psi_n = -gamma * alpha1.derivative(hn) * v - e_eff
    a2p, a2n = alpha2.value(bp), alpha2.value(bn)
    with np.errstate(divide='ignore', invalid='ignore'):
        ratio_p = np.where(a2p > 0.0, psi_p / a2p, np.where(psi_p < 0.0, -np.inf, np.inf))
        ratio_n = np.where(a2n > 0.0, psi_n / a2n, np.where(psi_n < 0.0, -np.inf, np.inf))
        # An + delta <= Ap - delta: beta (alpha2(bp) + alpha2(bn)) >= 2 delta + ...
        gap = 2.0 * margin + gamma * v * (alpha1.derivative(hp) - alpha1.derivative(hn))
        ratio_c = gap / (a2p + a2n)
    return np.maximum(np.maximum(ratio_p, ratio_n), ratio_c)


def beta_star(position_range: float, effective_authority: float, gamma: float, margin: float,
              alpha1: ClassK, alpha2: ClassK, grid: int = 401) -> tuple[float, float, float]:
    """``beta*`` for one joint: dense grid over its slice of S, then local refinement.

    Returns ``(beta*, hp, t)`` with the maximiser's coordinates (``inf`` when some state on
    the boundary cannot be made feasible by any beta: gamma is too large).
    """
    r = float(position_range)
    xs = np.linspace(0.0, r, grid)
    ts = np.linspace(0.0, 1.0, grid)
    x, t = np.meshgrid(xs, ts, indexing='ij')
    values = _slice_ratio(x, t, r, effective_authority, gamma, margin, alpha1, alpha2)
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
                                       gamma, margin, alpha1, alpha2))

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


def model_error_bound(model: RobotModel, bounds: DynamicsBounds, velocity_box: np.ndarray,
                      settings: CertifySettings) -> DisturbanceBound:
    """The declared uncertainty set's torque bound at a velocity box (see
    :func:`safety_filter.uncertainty.disturbance_bound`)."""
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


def _design_for_scale(model: RobotModel, bounds: DynamicsBounds, settings: CertifySettings,
                      scale: float, margin: np.ndarray, exact_model: bool = False
                      ) -> tuple[_Design | None, dict]:
    velocity_box = scale * np.array(model.velocity_limit)
    mass, bias, disturbance = authority_problem(model, bounds, settings, velocity_box,
                                                exact_model)
    umax = np.array(model.effort_limit)
    weights = umax / np.diag(bounds.mass_max)
    candidates: dict[str, np.ndarray | None] = {}
    if settings.condition in ('auto', 'acceleration_authority'):
        candidates['acceleration_authority'] = authority_row_sums(mass, bias, umax, weights)
    if settings.condition in ('auto', 'torque_coupling'):
        coupled = authority_torque_coupling(bounds.inverse_mass_max, bounds.coupling_min, bias)
        if coupled is not None:  # one step of e = rho - nu - Winv I e (conservative)
            coupled = coupled - bounds.inverse_mass_max @ disturbance.inertial_total @ coupled
            coupled = coupled if np.all(coupled > 0.0) else None
        candidates['torque_coupling'] = coupled
    best: _Design | None = None
    r = np.array(model.position_range)
    reach = np.array([settings.alpha1.value(x) for x in r], dtype=float)
    for condition, authority in candidates.items():
        if authority is None:
            continue
        usable = authority - margin
        if np.any(usable <= 0.0):
            continue
        g_star = gamma_star(usable, r, settings.alpha1)
        gamma = np.minimum(settings.gamma_margin * g_star, velocity_box / reach)
        design = _Design(scale, condition, authority, velocity_box, g_star, gamma, disturbance)
        if best is None or _score(model, design, settings) > _score(model, best, settings):
            best = design
    return best, candidates


def _score(model: RobotModel, design: _Design, settings: CertifySettings) -> float:
    """Smallest certified velocity fraction over the joints (velocity lemma bound / vmax)."""
    reach = np.array([settings.alpha1.value(x) for x in model.position_range], dtype=float)
    return float(np.min(design.gamma * reach / np.array(model.velocity_limit)))


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
    from safety_filter.falsify import falsify

    settings = settings or CertifySettings()
    report = progress or (lambda _stage, _fraction: None)
    n = model.n_joints
    names = list(model.joint_names)
    umax = np.array(model.effort_limit)
    vmax = np.array(model.velocity_limit)
    r = np.array(model.position_range)
    seconds: dict[str, float] = {}
    reasons: list[str] = []
    notes: list[str] = []

    clock = time.perf_counter()
    bounds = estimate_bounds(model, settings.bounds, progress=lambda s, f: report(
        'bounds: ' + s, f))
    seconds['bounds'] = time.perf_counter() - clock

    # ---- velocity scale search, authority and the sampled-data margin
    # Without a margin the best scale s0 maximises the smallest certified velocity fraction.
    # The margin (estimated from rollouts, which depend on the gains) only shrinks what a
    # scale can certify, and shrinks less at smaller scales (the drift is mostly driven by
    # velocity), so: at a given scale iterate margin -> gains -> margin until it settles,
    # and bisect for the largest scale below s0 at which that succeeds.
    clock = time.perf_counter()
    scales = np.linspace(1.0, 1.0 / settings.velocity_scales, settings.velocity_scales)
    best_scale, best_score, candidates = None, -np.inf, {}
    for scale in scales:
        design, found = _design_for_scale(model, bounds, settings, scale, np.zeros(n))
        if design is not None and _score(model, design, settings) > best_score + 1e-12:
            best_scale, best_score, candidates = scale, _score(model, design, settings), found
    report('authority', 1.0)
    seconds['authority'] = time.perf_counter() - clock

    clock = time.perf_counter()
    rounds = {'count': 0}

    def settle(scale: float) -> tuple[_Design | None, np.ndarray, _Design | None]:
        margin = np.zeros(n)
        design, _ = _design_for_scale(model, bounds, settings, scale, margin)
        last = design
        for _ in range(6):
            if design is None:
                return None, margin, last
            beta = _choose_beta(design, margin, r, settings)[3]
            gains = Gains(design.gamma, beta, settings.alpha1, settings.alpha2)
            new_margin = estimate_sampling_margin(
                model, gains, settings.hold_period_s, settings.margin_samples,
                inflation=settings.margin_inflation, current_margin=margin,
                seed=settings.seed)  # same draws each round: the margin settles monotonically
            rounds['count'] += 1
            report('sampling margin', min(0.95, rounds['count'] / 12))
            if np.all(new_margin <= margin * (1.0 + 1e-9)):
                return design, margin, design
            # The margin and the gains approach their fixed point geometrically; stepping 5 %
            # past each new estimate lets the next estimate fall inside and settle.
            margin = np.maximum(margin, 1.05 * new_margin)
            last = design
            design, _ = _design_for_scale(model, bounds, settings, scale, margin)
        return None, margin, last

    design, margin, last_design = (None, np.zeros(n), None)
    if best_scale is not None:
        design, margin, last_design = settle(best_scale)
        if design is None:
            low = 1.0 / settings.velocity_scales
            low_design, low_margin, low_last = settle(low)
            if low_design is None:
                margin, last_design = low_margin, low_last
            else:
                design, margin, high = low_design, low_margin, best_scale
                for step in range(4):
                    middle = 0.5 * (low + high)
                    trial, trial_margin, _ = settle(middle)
                    if trial is not None:
                        design, margin, low = trial, trial_margin, middle
                    else:
                        high = middle
            if design is not None:
                candidates = _design_for_scale(model, bounds, settings, design.scale,
                                               margin)[1]
    report('sampling margin', 1.0)
    seconds['sampling margin'] = time.perf_counter() - clock

    # ---- beta* and beta, and what fails
    clock = time.perf_counter()
    if design is None:
        reasons.extend(_explain_no_design(model, bounds, settings, margin, last_design))
        b_star = b_floor = b_cap = beta = np.zeros(n)
        if last_design is not None:
            # Keep the numbers of the last attempt: they show which joint ran short.
            gamma, g_star, authority = (last_design.gamma, last_design.gamma_star,
                                        last_design.authority)
            velocity_box, condition = last_design.velocity_box, last_design.condition
            scale = last_design.scale
        else:
            gamma = g_star = authority = velocity_box = np.zeros(n)
            condition, scale = 'acceleration_authority', 0.0
    else:
        gamma, g_star, authority = design.gamma, design.gamma_star, design.authority
        velocity_box, condition, scale = design.velocity_box, design.condition, design.scale
        b_star, b_floor, b_cap, beta = _choose_beta(design, margin, r, settings)
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
        fraction = gamma * np.array([settings.alpha1.value(x) for x in r]) / vmax
        for i in np.flatnonzero(fraction < settings.min_velocity_fraction):
            reasons.append(
                f'joint {names[i]!r}: only {100 * fraction[i]:.1f} % of its rated velocity '
                f'{vmax[i]:g} can be certified (minimum {100 * settings.min_velocity_fraction:g}'
                f' %): the torque limits leave too little authority; see the authority table')
    seconds['gains'] = time.perf_counter() - clock

    if design is None or reasons:
        gamma = np.where(gamma > 0, gamma, 0.0)
    certified = not reasons
    provenance = {
        **bounds.record(),
        'certify': settings.record(),
        'velocity_scale': float(scale),
        'authority_row_sums': _plain(candidates.get('acceleration_authority')),
        'authority_torque_coupling': _plain(candidates.get('torque_coupling')),
        'torque_coupling_rho': _plain(bounds.coupling_min),
        'notes': notes,
        'uncertainty': model.uncertainty.record(),
        'observer_time_constants_s': _plain(observer_time_constants(model, bounds, settings)),
        **_model_error_record(model, bounds, settings, design or last_design),
    }
    certificate = Certificate(
        joint_names=names,
        position_lower=model.position_lower,
        position_upper=model.position_upper,
        velocity_limit=vmax,
        effort_limit=umax,
        velocity_bound=velocity_box,
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
        alpha1=settings.alpha1,
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
    # the uncertainty, each at its own best velocity scale.
    for label, exact_model in (('with', False), ('without', True)):
        best = None
        for scale in np.linspace(1.0, 1.0 / settings.velocity_scales, settings.velocity_scales):
            found, _ = _design_for_scale(model, bounds, settings, scale, np.zeros(len(umax)),
                                         exact_model=exact_model)
            if found is not None and (best is None or _score(model, found, settings)
                                      > _score(model, best, settings)):
                best = found
        reach = np.array([settings.alpha1.value(x) for x in model.position_range])
        record[f'velocity_fraction_{label}_uncertainty'] = (
            None if best is None
            else _plain(best.gamma * reach / np.array(model.velocity_limit)))
    return record


def _plain(values: np.ndarray | None) -> list[float] | None:
    return None if values is None else [float(x) for x in values]


def _choose_beta(design: _Design, margin: np.ndarray, r: np.ndarray, settings: CertifySettings
                 ) -> tuple[np.ndarray, np.ndarray, np.ndarray, np.ndarray]:
    """``(beta*, floor, cap, beta)`` per joint (METHOD 4.3).

    The floor is the beta at which the bound at rest mid-range equals the authority (below
    it the filter brakes needlessly early; ``beta = 0`` would freeze the arm); the cap keeps
    ``beta * max(alpha2(b)/b) * T_hold`` at ``beta_sampling_limit``. ``beta`` is the larger
    of ``beta_margin * beta*`` and the floor, never above the cap.
    """
    n = len(r)
    usable = design.authority - margin
    hold = settings.hold_period_s
    b_star = np.zeros(n)
    b_cap = np.zeros(n)
    mid = settings.alpha2.value(design.gamma * settings.alpha1.value(0.5 * r))
    # At rest mid-range the upper bound is beta alpha2(b) - margin: make it reach e.
    b_floor = (design.authority + margin) / np.maximum(mid, 1e-300)
    for i in range(n):
        b_star[i], _, _ = beta_star(r[i], usable[i], design.gamma[i], margin[i],
                                    settings.alpha1, settings.alpha2)
        b_max = 2.0 * design.gamma[i] * float(settings.alpha1.value(r[i]))
        b_cap[i] = settings.beta_sampling_limit / (
            hold * settings.alpha2.max_ratio_to_identity(b_max))
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
        return [f'joint {names[i]!r}: within one hold period of '
                f'{1000 * settings.hold_period_s:.3g} ms its acceleration drifts by up to '
                f'{margin[i]:.4g} rad/s^2, more than its authority '
                f'{last_design.authority[i]:.4g} rad/s^2 (fast damping on a light link, or a '
                f'slow control rate); raise the control rate above '
                f'{settings.control_rate_hz * margin[i] / last_design.authority[i]:.0f} Hz or '
                'reduce the viscous damping' for i in short]
    return ['no velocity envelope gives positive authority to every joint: the Coriolis and '
            'gravity bounds exceed the effort limits; lower the velocity limits or raise the '
            'effort limits']
