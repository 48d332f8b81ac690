"""The velocity box of a design: per joint, the speeds whose authority is certified.

:func:`design_for_box` builds the best design (over the sufficient conditions) for one
box; :func:`search_velocity_box` searches a common fraction of the rated speeds, then each
joint's own, for the most permissive safe set; the safe-set areas and permissiveness that
the search compares are here too.
"""

from __future__ import annotations

from collections.abc import Callable

import numpy as np

from safety_filter.certification.authority import (
    RowSumProblem,
    authority_problem,
    authority_row_sums,
    authority_torque_coupling,
    margin_reserve,
    useful_authority,
)
from safety_filter.certification.certify_settings import CertifySettings, split_family
from safety_filter.certification.design_formulas import (
    Design,
    class_k_for_family,
    gamma_star,
    velocity_barrier_rate,
)
from safety_filter.certification.dynamics_bounds import DynamicsBounds
from safety_filter.core.barriers import braking_set_area, safe_set_area
from safety_filter.core.model_uncertainty import DisturbanceBound
from safety_filter.core.robot_model import RobotModel


def design_for_box(model: RobotModel, bounds: DynamicsBounds, settings: CertifySettings,
                    fractions: np.ndarray, margin: np.ndarray, kind: str,
                    exact_model: bool = False) -> tuple[Design | None, dict]:
    """The best design (over the sufficient conditions) for the velocity box
    ``fractions * vmax`` and the class-K family ``kind``, with ``margin`` reserved."""
    kind, rows = split_family(kind)
    rows = rows and settings.velocity_barrier
    fractions = np.broadcast_to(np.asarray(fractions, dtype=float), (model.n_joints,))
    margin = np.broadcast_to(np.asarray(margin, dtype=float), (model.n_joints,))
    velocity_box = fractions * np.array(model.velocity_limit)
    disturbance, candidates = _authority_candidates(model, bounds, settings, velocity_box,
                                                    exact_model, rows)
    trials = list(candidates.items())
    if np.any(margin > 0.0) and 'acceleration_authority' in candidates:
        # The same row-sum condition, its authority shared out with the margin already
        # reserved (docs/method.md, Certification, 2.): a joint whose margin takes most of
        # its authority then gets usable authority from the others.
        trials.append(('acceleration_authority', _authority_with_margin_reserved(
            model, bounds, settings, velocity_box, exact_model, rows, margin)))
    best: Design | None = None
    chosen: np.ndarray | None = None
    r = np.array(model.position_range)
    for condition, authority in trials:
        if authority is None:
            continue
        usable = authority - margin
        if np.any(usable <= 0.0):
            continue
        alpha1 = class_k_for_family(settings, kind, usable, r)
        g_star = gamma_star(usable, r, alpha1)
        gamma = settings.gamma_share * g_star
        speed_beta = np.zeros(model.n_joints)
        if rows:
            speed_beta = velocity_barrier_rate(usable + margin, margin, velocity_box,
                                               settings)
        else:  # the velocity lemma: S inside the box by gamma alone
            reach = np.array([alpha1.value(x) for x in r], dtype=float)
            gamma = np.minimum(gamma, velocity_box / reach)
        design = Design(float(np.min(fractions)), condition, authority, velocity_box, g_star,
                         gamma, disturbance, alpha1, speed_beta, usable)
        if rows and settings.acceleration_bound_factor > 0.0:
            design.accel_bound = settings.acceleration_bound_factor * authority
        if best is None or design_score(model, design) > design_score(model, best):
            best, chosen = design, authority
    if best is not None and best.condition == 'acceleration_authority':
        candidates = {**candidates, 'acceleration_authority': chosen}
    return best, candidates


def _authority_candidates(model: RobotModel, bounds: DynamicsBounds,
                          settings: CertifySettings, velocity_box: np.ndarray,
                          exact_model: bool, rows: bool
                          ) -> tuple[DisturbanceBound, dict[str, np.ndarray | None]]:
    """The model-error bound and the authority of each sufficient condition at a velocity
    box. They do not depend on the class-K family, and the families' searches visit the
    same boxes: the bounds keep them (``DynamicsBounds.authority_cache``)."""
    key = (velocity_box.tobytes(), exact_model, rows, repr(settings))
    if key in bounds.authority_cache:
        return bounds.authority_cache[key]
    problem = _row_sum_problem(model, bounds, settings, velocity_box, exact_model)
    mass, bias, disturbance = problem.mass, problem.bias, problem.disturbance
    umax = np.array(model.effort_limit)
    weights = umax / np.diag(bounds.mass_max)
    candidates: dict[str, np.ndarray | None] = {}
    if settings.condition in ('auto', 'acceleration_authority'):
        candidates['acceleration_authority'] = authority_row_sums(
            mass, bias, umax, weights, useful_authority(model, settings) if rows else None,
            samples=problem.samples, start_rows=bounds.binding_rows)
    if settings.condition in ('auto', 'torque_coupling'):
        coupled = authority_torque_coupling(bounds.inverse_mass_max, bounds.coupling_min, bias)
        if coupled is not None and rows:
            coupled = np.minimum(coupled, np.maximum(useful_authority(model, settings),
                                                     1e-9 * coupled))
        if coupled is not None:  # one step of e = rho - nu - Winv I e (conservative)
            inertial = mass - bounds.mass_max  # model error's and the lookahead's
            coupled = coupled - bounds.inverse_mass_max @ inertial @ coupled
            coupled = coupled if np.all(coupled > 0.0) else None
        candidates['torque_coupling'] = coupled
    bounds.authority_cache[key] = (disturbance, candidates)
    return disturbance, candidates


def _row_sum_problem(model: RobotModel, bounds: DynamicsBounds, settings: CertifySettings,
                     velocity_box: np.ndarray, exact_model: bool) -> RowSumProblem:
    """:func:`authority_problem`, kept in ``bounds.authority_cache``: the plain and the
    margin-reserving authority take the same rows at a box."""
    key = ('row-sum problem', velocity_box.tobytes(), exact_model, repr(settings))
    if key not in bounds.authority_cache:
        bounds.authority_cache[key] = authority_problem(model, bounds, settings, velocity_box,
                                                        exact_model)
    return bounds.authority_cache[key]


def _authority_with_margin_reserved(model: RobotModel, bounds: DynamicsBounds,
                                    settings: CertifySettings, velocity_box: np.ndarray,
                                    exact_model: bool, rows: bool, margin: np.ndarray
                                    ) -> np.ndarray | None:
    """The row-sum authority ``e = reserve + s`` whose spare part ``s`` the linear program
    shares out (its smallest share first) once ``reserve`` (:func:`margin_reserve`: the
    margin and the drift it covers) is set aside: the rows hold
    ``|M| (reserve + s) + bias <= umax``, solved for ``s``, and the cap on ``e`` becomes one
    on ``s``. The plain program shares out ``e`` itself, which leaves a joint whose margin
    is most of its authority almost nothing usable. Both are authorities of the same
    condition; the design keeps the one with the larger safe set."""
    key = ('margin reserved', velocity_box.tobytes(), margin.tobytes(), exact_model, rows,
           repr(settings))
    if key in bounds.authority_cache:
        return bounds.authority_cache[key]
    problem = _row_sum_problem(model, bounds, settings, velocity_box, exact_model)
    umax = np.array(model.effort_limit)
    weights = umax / np.diag(bounds.mass_max)
    reserve = margin_reserve(margin, settings)
    cap = useful_authority(model, settings) - reserve if rows else None
    authority = None
    if cap is None or np.all(cap > 0.0):
        samples = None
        if problem.samples is not None:
            mass, extra, bias = problem.samples
            samples = (mass, extra, bias + mass @ reserve + extra @ reserve)
        cuts = bounds.authority_cache.setdefault('margin reserved rows', set())
        spare = authority_row_sums(problem.mass, problem.bias + problem.mass @ reserve, umax,
                                   weights, cap, samples=samples, start_rows=cuts)
        authority = None if spare is None else spare + reserve
    bounds.authority_cache[key] = authority
    return authority


def design_for_scale(model: RobotModel, bounds: DynamicsBounds, settings: CertifySettings,
                      scale: float, margin: np.ndarray, exact_model: bool = False,
                      kind: str = 'linear') -> tuple[Design | None, dict]:
    """:func:`design_for_box` with one common velocity fraction ``scale``."""
    return design_for_box(model, bounds, settings, np.full(model.n_joints, scale), margin,
                           kind, exact_model)


def safe_set_areas(model: RobotModel, design: Design) -> np.ndarray:
    """Area of each joint's slice of S in its (q, v) plane (``barriers.safe_set_area``)."""
    r = np.array(model.position_range)
    box = design.velocity_box if design.has_speed_rows else None
    return np.array([safe_set_area(r[i], float(design.gamma[i]), design.alpha1,
                                   None if box is None else float(box[i]))
                     for i in range(len(r))])


def permissiveness(model: RobotModel, design: Design, reference_authority: np.ndarray
                   ) -> np.ndarray:
    """Per joint: the area of S over the area of the braking set at ``reference_authority``
    and the rated speed (1: S is as large as any set a joint braking at that authority can
    be kept in)."""
    r = np.array(model.position_range)
    vmax = np.array(model.velocity_limit)
    reference = np.array([braking_set_area(r[i], float(reference_authority[i]), vmax[i])
                          for i in range(len(r))])
    return safe_set_areas(model, design) / np.maximum(reference, 1e-300)


def design_score(model: RobotModel, design: Design) -> float:
    """How permissive a design is: the mean over the joints of the log of the area of S
    (designs for one robot compare by the geometric mean of their safe-set areas)."""
    return float(np.mean(np.log(np.maximum(safe_set_areas(model, design), 1e-300))))


def envelope_fraction(model: RobotModel, design: Design) -> np.ndarray:
    """Fastest speed in each joint's slice of S over its rated speed."""
    r = np.array(model.position_range)
    reach = design.gamma * np.array([design.alpha1.value(x) for x in r], dtype=float)
    if design.has_speed_rows:
        reach = np.minimum(reach, design.velocity_box)
    return reach / np.array(model.velocity_limit)


def search_velocity_box(model: RobotModel, bounds: DynamicsBounds, settings: CertifySettings,
                        kind: str, exact_model: bool = False,
                        margin: np.ndarray | None = None) -> tuple[Design | None, dict]:
    """The most permissive velocity box for family ``kind`` with ``margin`` reserved from
    the authority (default none: before the sampled-data margin is known).

    A common fraction of the rated speeds first (the grid of ``velocity_scales``), then,
    when ``per_joint_envelopes``, a coordinate search on each joint's fraction: the Coriolis
    bound couples the joints, but a light joint need not be slowed to a heavy one's pace.
    The objective is :func:`permissiveness` against the braking set at the authority of
    the slowest box tried (a fixed reference for the whole search), as a geometric mean.
    """
    n = model.n_joints
    reserved = np.zeros(n) if margin is None else np.asarray(margin, dtype=float)
    floor = 1.0 / settings.velocity_scales
    slow, _ = design_for_scale(model, bounds, settings, floor, reserved, exact_model, kind)
    if slow is None:
        return None, {}
    reference = slow.usable

    def score(design: Design | None) -> float:
        if design is None:
            return -np.inf
        share = permissiveness(model, design, reference)
        return float(np.mean(np.log(np.maximum(share, 1e-12))))

    best, best_found, best_value = slow, {}, -np.inf
    best_fractions = np.full(n, floor)
    top = settings.top_velocity_fraction
    for scale in np.linspace(top, floor, settings.velocity_scales):
        design, found = design_for_scale(model, bounds, settings, scale, reserved, exact_model,
                                          kind)
        value = score(design)
        if value > best_value + 1e-12:
            best, best_found, best_value = design, found, value
            best_fractions = np.full(n, scale)
    if settings.per_joint_envelopes and split_family(kind)[1] and settings.velocity_barrier:
        step = 0.2
        while step > 0.01:
            improved = False
            for i in range(n):
                for sign in (1.0, -1.0):
                    trial = best_fractions.copy()
                    trial[i] = float(np.clip(trial[i] * (1.0 + sign * step), floor, top))
                    if trial[i] == best_fractions[i]:
                        continue
                    design, found = design_for_box(model, bounds, settings, trial, reserved,
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


Settle = Callable[[np.ndarray], tuple[Design | None, np.ndarray, Design | None]]


def search_with_margin(model: RobotModel, bounds: DynamicsBounds, settings: CertifySettings,
                       kind: str, settle: Settle, margin: np.ndarray
                       ) -> tuple[np.ndarray, Design, np.ndarray, Design | None] | None:
    """The box the search chose did not settle with its sampled-data margin ``margin``:
    search again with that margin reserved, and settle there. Returns ``(fractions, design,
    margin, last design)`` of the best box that settles, or None.

    The margin hardly depends on the box but the authority does (the Coriolis bound is
    quadratic in it), so each joint then gives up only the speed its own margin costs,
    instead of every box shrinking by one common factor. A failed attempt leaves a larger
    margin estimate, which the next search reserves; the margin found at a faster box
    overstates that of a slower one, so once a box settles the search runs again with its
    own margin while that enlarges S, trying halfway when the faster box does not settle.
    ``settle(fractions)`` returns ``(design or None, margin, last design)``.
    """
    best: tuple[np.ndarray, Design, np.ndarray, Design | None] | None = None
    reserved = margin
    for _ in range(3):
        again, _ = search_velocity_box(model, bounds, settings, kind, margin=reserved)
        if again is None or (best is not None and np.allclose(again.fractions,
                                                              best[0], rtol=0.02)):
            break
        fractions = again.fractions
        design, found_margin, last = settle(fractions)
        if design is None and best is not None:
            fractions = np.sqrt(fractions * best[0])  # halfway to the box that settled
            design, found_margin, last = settle(fractions)
            if design is None:
                break
        if design is None:
            reserved = np.maximum(reserved, found_margin)
            continue
        if best is not None and design_score(model, design) <= design_score(model, best[1]):
            break
        best = (fractions, design, found_margin, last)
        reserved = found_margin
    return best
