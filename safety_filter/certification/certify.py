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
6. the falsifier (``falsify``), independent of all the above, checks it on states in S;
7. with a slow box, the same steps certify the slow design (velocity boxes of at most that
   share of the rated speeds), which the certificate carries when it enlarges S
   (docs/method.md, "The slow set").

When a step fails, the reason names the joint, the limit and the shortfall.

This module runs the steps; the formulas are in :mod:`~safety_filter.certification.authority`
(step 2's authority), :mod:`~safety_filter.certification.velocity_boxes` (step 2's box search),
:mod:`~safety_filter.certification.design_formulas` (steps 3 and 5) and
:mod:`~safety_filter.certification.shortfall_reasons` (the reasons); the settings in
:mod:`~safety_filter.certification.certify_settings`.

Kept in one module: the loop over designs (family, acceleration form, lookahead) and what
it records of each attempt share the stages' state (bounds per form, the attempts, the
stage timings), which split modules would have to pass back and forth.
"""

from __future__ import annotations

import datetime as _dt
import time
from collections.abc import Callable
from dataclasses import dataclass, field, replace
from typing import Any

import numpy as np

from safety_filter._version import __version__
from safety_filter.certification.authority import (
    authority_row_sums,
    observer_time_constants,
)
from safety_filter.certification.certify_settings import (
    LEMMA_SUFFIX,
    CertifySettings,
    split_family,
)
from safety_filter.certification.design_formulas import (
    BETA_MIN_MARGIN,
    Design,
    choose_beta,
)
from safety_filter.certification.dynamics_bounds import DynamicsBounds, estimate_bounds
from safety_filter.certification.sampled_data_margin import Gains, estimate_sampling_margin
from safety_filter.certification.shortfall_reasons import explain_no_design, what_limits_the_box
from safety_filter.certification.velocity_boxes import (
    design_for_box,
    design_score,
    envelope_fraction,
    safe_set_areas,
    search_velocity_box,
    search_with_margin,
)
from safety_filter.core.certificate import Certificate
from safety_filter.core.class_k import BRAKING_FAMILIES, ClassK
from safety_filter.core.model_uncertainty import draw_plant, model_with_inertials, payload_error
from safety_filter.core.robot_model import RobotModel

ProgressCallback = Callable[[str, float], None]
# A slow design is kept when the union enlarges some joint's slice of S by this share at
# least: a second design costs a second QP on the steps it may serve.
MIN_SLOW_GROWTH = 0.01


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


def certify(model: RobotModel, settings: CertifySettings | None = None,
            progress: ProgressCallback | None = None) -> Certificate:
    """Certify gains for ``model``; returns the :class:`Certificate` (check ``.certified``).

    See :func:`certify_with_evidence` for the bounds, timings and falsifier result.
    """
    return certify_with_evidence(model, settings, progress).certificate


def certify_with_evidence(model: RobotModel, settings: CertifySettings | None = None,
                          progress: ProgressCallback | None = None) -> CertificationOutcome:
    """Run every certification stage and keep the evidence (see the module docstring).

    With a slow box (``settings.slow_box_share``) the main design is certified first, then
    the slow design for its family, acceleration form and lookahead
    (:func:`_add_slow_design`).
    """
    settings = settings or CertifySettings()
    if settings.slow_box_share <= 0.0:
        return _certify_design(model, replace(settings, slow_box=0.0), progress)
    report = progress or (lambda _stage, _fraction: None)
    main = _certify_design(model, replace(settings, slow_box=0.0),
                           lambda stage, f: report(stage, 0.7 * f))
    if not main.certified:
        return main
    return _add_slow_design(model, settings, main,
                            lambda stage, f: report('slow design: ' + stage, 0.7 + 0.3 * f))


def _add_slow_design(model: RobotModel, settings: CertifySettings, main: CertificationOutcome,
                     progress: ProgressCallback) -> CertificationOutcome:
    """Certify the slow design beside the certified ``main`` and attach it when it holds.

    The slow design keeps the main design's family, acceleration form and lookahead, with
    velocity boxes of at most ``slow_box`` of the rated speeds. One disturbance observer
    serves both designs and keeps its estimate in the main design's range; the slow design
    counts the friction spreads at the main design's box, so with its larger authority its
    own range contains the main one (checked). A slow design that does not certify,
    enlarges no joint's slice of S by ``MIN_SLOW_GROWTH`` or more, or whose range does not
    contain the main one is left out, and the main certificate's notes say why. The main
    certificate's record of the settings keeps the slow box asked for.
    """
    first = main.certificate
    family = first.alpha1.kind + ('' if first.has_velocity_barriers else LEMMA_SUFFIX)
    form = replace(settings, slow_box=0.0, alpha1=None, families=(family,),
                   mean_over_hold=first.acceleration_hold_s is not None,
                   lookahead=first.lookahead_s is not None,
                   velocity_headroom=1.0 - settings.slow_box_share,
                   friction_error_box=tuple(float(x) for x in first.velocity_bound))
    slow = _certify_design(model, form, progress, model_error_records=False)
    seconds = {stage: main.stage_seconds.get(stage, 0.0) + slow.stage_seconds.get(stage, 0.0)
               for stage in {*main.stage_seconds, *slow.stage_seconds}}
    second = slow.certificate
    why = ''
    if not second.certified:
        why = 'it does not certify: ' + '; '.join(second.reasons)
    else:
        alone = first.slice_areas()
        growth = replace(first, slow_design=second).slice_areas() / np.maximum(alone, 1e-300)
        if not np.any(growth >= 1.0 + MIN_SLOW_GROWTH):
            why = (f"it enlarges no joint's safe set by {100 * MIN_SLOW_GROWTH:g} % or more "
                   f'(at most {100 * (float(np.max(growth)) - 1.0):.1f} %)')
    ranges = [c.settings.get('disturbance_constant') for c in (first, second)]
    if not why and None not in ranges and \
            np.any(np.array(ranges[1]) < np.array(ranges[0]) * (1.0 - 1e-9)):
        why = ("its range of the disturbance estimate does not contain the main design's "
               '(the filter keeps the estimate in the main one)')
    if why:
        notes = list(first.settings.get('notes', [])) + [f'slow design left out: {why}']
        certificate = replace(first, settings={**first.settings, 'notes': notes})
    else:
        certificate = replace(first, slow_design=second)
    certificate = replace(certificate, settings={
        **certificate.settings, 'stage_seconds': {k: round(v, 3) for k, v in seconds.items()},
        'certify': {**certificate.settings.get('certify', {}),
                    'slow_box': settings.slow_box_share}})
    return CertificationOutcome(certificate, main.bounds, main.velocity_scale,
                                main.authority_by_condition, seconds, main.falsifier)


def _certify_design(model: RobotModel, settings: CertifySettings,
                    progress: ProgressCallback | None = None,
                    model_error_records: bool = True) -> CertificationOutcome:
    """Certify one design (every stage but the slow design)."""
    from safety_filter.certification.falsifier import falsify

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
    # With the lookahead unless it is set off; then, when it is left to certification, the
    # chosen family and form without it (docs/method.md, "Lookahead").
    combinations = [(mean, settings.lookahead is not False) for mean in forms]
    attempts: list[_Attempt] = []
    all_bounds: dict[bool, DynamicsBounds] = {}
    for stage in ('bounds', 'authority', 'sampling margin', 'gains'):
        seconds[stage] = 0.0
    chosen: _Attempt | None = None
    for index_combination, (mean, ahead) in enumerate(combinations):
        form = replace(settings, mean_over_hold=bool(mean), lookahead=ahead)
        if bool(mean) not in all_bounds:
            clock = time.perf_counter()
            all_bounds[bool(mean)] = estimate_bounds(
                model, settings.bounds, progress=lambda s, f: report('bounds: ' + s, f),
                hold_s=form.acceleration_hold_s(model))
            seconds['bounds'] += time.perf_counter() - clock
        bounds = all_bounds[bool(mean)]
        kinds_now = kinds if chosen is None else (chosen.kind,)
        for index, kind in enumerate(kinds_now):
            attempt = _attempt_family(
                model, bounds, form, kind,
                lambda stage, f, k=index: report(stage, (k + f) / len(kinds_now)), seconds)
            attempt.mean_over_hold = bool(mean)
            attempt.lookahead = ahead
            attempts.append(attempt)
        certifiable = [a for a in attempts if a.design is not None and not a.reasons]
        chosen = (max(certifiable, key=lambda a: design_score(model, a.design))
                  if certifiable else None)
        if settings.lookahead is None and index_combination == len(forms) - 1:
            combinations.append((chosen.mean_over_hold if chosen else forms[-1], False))
    certifiable = [a for a in attempts if a.design is not None and not a.reasons]
    chosen = chosen or attempts[0]
    settings = replace(settings, mean_over_hold=chosen.mean_over_hold,
                       lookahead=chosen.lookahead)
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
        first = split_family(kinds[0])[0]
        alpha1 = settings.alpha1 or ClassK(first, 0.01 if first in BRAKING_FAMILIES else 1.0)

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
        **_model_error_record(model, bounds, settings, design or last_design,
                              model_error_records),
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
        prediction_s=settings.prediction_s or None,
        lookahead_s=settings.lookahead_s or None,
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

    # ---- independent check (its findings make a new certificate: the id covers them)
    falsifier_result = None
    falsifier_summary: dict[str, Any] = {}
    if certified:
        clock = time.perf_counter()
        if settings.falsifier_states <= 0:
            reasons.append('the falsifier was skipped (falsifier_states = 0): not certified')
        else:
            falsifier_result = falsify(model, certificate, states=settings.falsifier_states,
                                       seed=settings.seed + 101,
                                       progress=lambda f: report('falsifier', f))
            falsifier_summary = falsifier_result.summary()
            if falsifier_result.infeasible:
                reasons.append(
                    f'the falsifier found {falsifier_result.infeasible} infeasible states of '
                    f'{falsifier_result.states} (worst torque slack '
                    f'{falsifier_result.min_slack:.3g}): the dynamics bounds were '
                    'underestimated; raise bound samples or inflation')
        seconds['falsifier'] = time.perf_counter() - clock
    certificate = replace(
        certificate, falsifier=falsifier_summary or certificate.falsifier,
        certified=not reasons, reasons=reasons,
        settings={**certificate.settings,
                  'stage_seconds': {k: round(v, 3) for k, v in seconds.items()}})
    return CertificationOutcome(certificate, bounds, float(scale), candidates, seconds,
                                falsifier_result)


@dataclass(eq=False)
class _Attempt:
    """One class-K family taken through the velocity box search, the sampled-data margin and
    the choice of beta."""

    kind: str
    design: Design | None = None
    last_design: Design | None = None
    mean_over_hold: bool = False
    lookahead: bool = False
    margin: np.ndarray | None = None
    candidates: dict = field(default_factory=dict)
    betas: tuple = ()
    reasons: list[str] = field(default_factory=list)
    notes: list[str] = field(default_factory=list)
    box_limits: list[str] = field(default_factory=list)

    def record(self, model: RobotModel) -> dict[str, Any]:
        """Plain summary for the certificate (the report's table of designs tried)."""
        shown = self.design or self.last_design
        entry: dict[str, Any] = {'alpha1': self.kind, 'mean_over_hold': self.mean_over_hold,
                                 'lookahead': self.lookahead}
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

    def settle(fractions: np.ndarray) -> tuple[Design | None, np.ndarray, Design | None]:
        margin = np.zeros(n)
        design, _ = design_for_box(model, bounds, settings, fractions, margin, kind)
        last = design
        for _ in range(6):
            if design is None:
                return None, margin, last
            beta = choose_beta(design, margin, r, settings)[3]
            gains = Gains(design.gamma, beta, design.alpha1, settings.alpha2,
                          design.velocity_box, design.speed_beta, design.accel_bound)
            new_margin = estimate_sampling_margin(
                model, gains, settings.hold_period_s, settings.margin_samples,
                inflation=settings.margin_inflation, current_margin=margin,
                seed=settings.seed,  # same draws each round: the margin settles monotonically
                plants=plants, acceleration_hold_s=settings.acceleration_hold_s(model),
                prediction_s=settings.prediction_s, lookahead_s=settings.lookahead_s,
                delay_s=settings.delay_bound_s)
            rounds['count'] += 1
            report('sampling margin', 0.2 + 0.7 * min(1.0, rounds['count'] / 12))
            if np.all(new_margin <= margin * (1.0 + 1e-9)):
                design.fractions = fractions
                return design, margin, design
            # The margin and the gains approach their fixed point geometrically; stepping 5 %
            # past each new estimate lets the next estimate fall inside and settle.
            margin = np.maximum(margin, 1.05 * new_margin)
            last = design
            design, _ = design_for_box(model, bounds, settings, fractions, margin, kind)
        return None, margin, last

    design, margin, last_design = None, np.zeros(n), None
    if start is not None:
        top = start.fractions
        design, margin, last_design = settle(top)
        if design is None:
            found = search_with_margin(model, bounds, settings, kind, settle, margin)
            if found is not None:
                top, design, margin, last_design = found
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
            attempt.candidates = design_for_box(model, bounds, settings, design.fractions,
                                                 margin, kind)[1]
    attempt.design, attempt.margin, attempt.last_design = design, margin, last_design
    seconds['sampling margin'] = (seconds.get('sampling margin', 0.0) + time.perf_counter()
                                  - clock)
    clock = time.perf_counter()
    if design is not None and start is not None:
        attempt.box_limits = what_limits_the_box(model, bounds, settings, kind, start, design,
                                                  margin)
    reasons, notes = attempt.reasons, attempt.notes
    if design is None:
        reasons.extend(explain_no_design(model, bounds, settings, margin, last_design))
        attempt.betas = (np.zeros(n),) * 4
        return attempt
    b_star, b_floor, b_cap, beta = choose_beta(design, margin, r, settings)
    seconds['gains'] = seconds.get('gains', 0.0) + time.perf_counter() - clock
    attempt.betas = (b_star, b_floor, b_cap, beta)
    for i in np.flatnonzero(b_floor > b_cap):
        notes.append(f'joint {names[i]!r}: beta is held at the sampled-data cap '
                     f'{b_cap[i]:.4g}, below the floor {b_floor[i]:.4g} at which the bound '
                     'at rest mid-range reaches the authority: the filter brakes this joint '
                     'earlier than it needs to (a faster control rate raises the cap)')
    for i in range(n):
        if np.isfinite(b_star[i]) and b_star[i] * BETA_MIN_MARGIN <= b_cap[i] \
                < settings.beta_margin * b_star[i]:
            notes.append(f'joint {names[i]!r}: beta is held at the sampled-data cap '
                         f'{b_cap[i]:.4g}, only {100 * (b_cap[i] / b_star[i] - 1):.1f} % '
                         f'above beta* = {b_star[i]:.4g} (wanted '
                         f'{100 * (settings.beta_margin - 1):.0f} %)')
        elif not np.isfinite(b_star[i]) or b_star[i] * BETA_MIN_MARGIN > b_cap[i]:
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
                        design: Design | None, envelopes: bool = True) -> dict[str, Any]:
    """What the declared uncertainty costs, for the certificate and its report: the torque
    bound per joint (the filter clips its disturbance estimate to it), its share per kind,
    and the authority and velocity envelope the same scale would give without it (the
    envelopes only with ``envelopes``: two more box searches)."""
    if design is None or design.disturbance is None:
        return {}
    by_kind = design.disturbance.by_kind(design.authority)
    viscous, coulomb = np.array(model.viscous_friction), np.array(model.coulomb_friction)
    bias = bounds.bias_max(design.velocity_box, viscous, coulomb)
    umax = np.array(model.effort_limit)
    rows = bounds.row_samples(design.velocity_box, viscous, coulomb)
    exact = authority_row_sums(bounds.mass_max, bias, umax, umax / np.diag(bounds.mass_max),
                               samples=None if rows is None else (
                                   rows[0], np.zeros_like(bounds.mass_max), rows[1]))
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
    for label, exact_model in ((('with', False), ('without', True)) if envelopes else ()):
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
                  plants=margin_plants(model, settings), prediction_s=settings.prediction_s,
                  lookahead_s=settings.lookahead_s, delay_s=settings.delay_bound_s)
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
