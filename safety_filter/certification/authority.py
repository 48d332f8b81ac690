"""Acceleration authority: what each joint may be asked for everywhere in the boxes.

The row-sum LP (:func:`authority_row_sums`) and the torque-coupling condition
(:func:`authority_torque_coupling`) of ``docs/method.md``, the data they take at a velocity
box (:func:`authority_problem`: the dynamics bounds plus the declared model error), the
disturbance observer's time constants, and the authority beyond which a joint gains little
(:func:`useful_authority`).
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
from scipy.optimize import linprog

from safety_filter.certification.certify_settings import CertifySettings
from safety_filter.certification.dynamics_bounds import DynamicsBounds
from safety_filter.core.model_uncertainty import DisturbanceBound, disturbance_bound
from safety_filter.core.robot_model import RobotModel


def authority_row_sums(mass_max: np.ndarray, bias_max: np.ndarray, effort: np.ndarray,
                       weights: np.ndarray, cap: np.ndarray | None = None,
                       samples: tuple[np.ndarray, np.ndarray, np.ndarray] | None = None,
                       start_rows: set[int] | None = None) -> np.ndarray | None:
    """Acceleration authority from the row-sum condition (docs/method.md), or None.

    Solves ``max t`` s.t. ``Mbar e + hbar <= umax``, ``e >= t w``, then, with ``t`` fixed at
    its optimum, spends the remaining slack: ``max sum e_i / w_i``. Every ``a`` with
    ``|a_i| <= e_i`` then maps to a torque inside the box at every state of the boxes.
    With a ``cap``, a joint whose share ``t w_i`` would exceed its cap is held at the cap
    and the others share again (authority a joint has no use for goes to the others); the
    second phase keeps every ``e_i`` at most its cap.

    With ``samples = (mass (S, n, n), extra (n, n), bias (S, n))`` the rows are those of
    each sampled configuration, ``(mass_s + extra) e + bias_s <= umax`` for every ``s``,
    instead of the one row of maxima (:meth:`DynamicsBounds.row_samples`; ``extra`` is
    what the declared model error adds to every configuration's inertia); the linear
    program then takes them in as cuts: the rows that bind the answer so far, until every
    sample's rows hold. ``start_rows`` (flat indices ``s * n + i``) seeds them and receives
    the rows that bind the answer: a search over nearby velocity boxes binds on nearly the
    same configurations.
    """
    if samples is None:
        return _row_sum_lp(mass_max, effort - bias_max, weights, cap)
    mass, extra, bias = samples
    count, n = bias.shape
    room = (effort - bias).reshape(-1)  # (S n,)
    if np.any(room <= 0.0):
        return None
    rows = mass.reshape(count * n, n)  # row s n + i: joint i at sample s (plus extra[i])

    def usage(authority: np.ndarray) -> np.ndarray:
        return rows @ authority + np.tile(extra @ authority, count)

    picked = set() if start_rows is None else set(start_rows)
    if not picked:
        # each row's most loaded samples: largest bias, largest inertia at the weights
        load = (mass @ weights).T  # (n, S)
        for i in range(n):
            for column in (bias[:, i], load[i]):
                picked.update(int(s) * n + i for s in np.argpartition(column, -4)[-4:])
    tolerance = 1e-9 * np.tile(effort, count)
    authority = None
    for _ in range(100):
        active = np.fromiter(picked, dtype=int)
        authority = _row_sum_lp(rows[active] + extra[active % n], room[active], weights, cap)
        if authority is None:
            return None
        excess = usage(authority) - room
        broken = excess > tolerance
        if not broken.any():
            break
        # the most broken samples of each joint's row
        per_joint = excess.reshape(count, n).T
        for i in range(n):
            worst = np.argpartition(per_joint[i], -4)[-4:]
            picked.update(int(s) * n + i for s in worst if per_joint[i, s] > 0.0)
    # Guard against LP round-off and an unfinished loop: scale down until every row holds.
    used = usage(authority)
    scale = min(1.0, float(np.min(room / np.maximum(used, 1e-300))))
    if start_rows is not None:  # keep the rows that bind this answer for the next box
        start_rows.clear()
        start_rows.update(np.flatnonzero(room - used * scale <= 1e-6 * np.tile(effort, count)
                                         ).tolist())
    return authority * scale


def _row_sum_lp(rows: np.ndarray, room: np.ndarray, weights: np.ndarray,
                cap: np.ndarray | None) -> np.ndarray | None:
    """The two-phase program of :func:`authority_row_sums` for ``rows e <= room`` (any
    number of rows, all entries non-negative: bounds of absolute values).

    Phase 1 needs no solver: with non-negative rows the largest ``t`` is reached at
    ``e = t w`` (a larger ``e`` only uses more of each row), so ``t`` is the smallest
    ``(room - rows e_held) / (rows w_free)``. Phase 2 is a linear program (HiGHS).
    """
    n = rows.shape[1]
    if np.any(room <= 0.0):
        return None
    held = np.zeros(n, dtype=bool)  # joints held at their cap
    cap = np.full(n, np.inf) if cap is None else np.asarray(cap, dtype=float)
    t_best = 0.0
    for _ in range(n + 1):
        fixed = rows @ np.where(held, cap, 0.0)
        slope = rows @ np.where(held, 0.0, weights)
        left = room - fixed
        if np.any(left < 0.0):
            return None
        if held.all():  # every joint at its cap, and the caps fit (left >= 0 above)
            break
        loaded = slope > 0.0
        if not loaded.any():
            return None  # nothing bounds t: no row uses the authority
        t_best = float(np.min(left[loaded] / slope[loaded])) * (1.0 - 1e-9)
        if t_best <= 0.0:
            return None
        over = ~held & (t_best * weights > cap)
        if not over.any():
            break
        held |= over
    floor = np.where(held, cap, t_best * weights)
    # Phase 2: keep every e_i >= its phase-1 share, maximise the weighted sum.
    second = linprog(-1.0 / weights, A_ub=rows, b_ub=room,
                     bounds=[(lo, None if not np.isfinite(hi) else max(hi, lo))
                             for lo, hi in zip(floor, cap)], method='highs')
    authority = second.x if second.status == 0 else floor
    # Guard against LP round-off: scale down until the inequality holds exactly.
    usage = rows @ authority
    scale = min(1.0, float(np.min(room / np.maximum(usage, 1e-300))))
    return authority * scale


def authority_torque_coupling(inverse_mass_max: np.ndarray, coupling_min: np.ndarray,
                              bias_max: np.ndarray) -> np.ndarray | None:
    """Authority ``rho - nu`` of the torque-coupling condition (docs/method.md), or None."""
    nu = inverse_mass_max @ bias_max
    authority = coupling_min - nu
    return authority if np.all(authority > 0.0) else None


@dataclass
class RowSumProblem:
    """The row-sum condition's data at a velocity box: ``mass @ e + bias <= umax`` with the
    separate maxima, and per sampled configuration (``samples``: the inertia per sample
    ``(S, n, n)``, what model error adds to each ``(n, n)``, the bias per sample ``(S, n)``;
    or None) when the bounds keep them; ``disturbance`` is the declared model error's
    bound, already added to both."""

    mass: np.ndarray
    bias: np.ndarray
    disturbance: DisturbanceBound
    samples: tuple[np.ndarray, np.ndarray, np.ndarray] | None


def authority_problem(model: RobotModel, bounds: DynamicsBounds, settings: CertifySettings,
                      velocity_box: np.ndarray, exact_model: bool = False) -> RowSumProblem:
    """The row-sum condition's data at a velocity box (``docs/method.md``).

    The filter's QP uses ``h - d_hat`` with ``d_hat`` inside the range of the plants' model
    error at the state, so its bias is some plant's bias: the payload is already inside the
    bounds (they cover the payload range); every other kind adds to them, and the inertial
    part grows with the acceleration. ``exact_model`` leaves the uncertainty out.
    """
    disturbance = (DisturbanceBound({}, {}) if exact_model
                   else model_error_bound(model, bounds, velocity_box, settings))
    outside = disturbance.without('payload', static_only=True)
    viscous, coulomb = np.array(model.viscous_friction), np.array(model.coulomb_friction)
    bias = bounds.bias_max(velocity_box, viscous, coulomb) + outside.static_total
    # With a lookahead c the filter's torque for a is M a + h + c J a (lookahead_position):
    # J's bound adds to the inertial rows.
    inertial = np.asarray(outside.inertial_total, dtype=float) + (
        settings.lookahead_s * bounds.coriolis_jacobian_max(velocity_box))
    mass = bounds.mass_max + inertial
    rows = bounds.row_samples(velocity_box, viscous, coulomb)
    samples = None if rows is None else (
        rows[0], np.broadcast_to(inertial, mass.shape), rows[1] + outside.static_total)
    return RowSumProblem(mass, bias, disturbance, samples)


def model_error_bound(model: RobotModel, bounds: DynamicsBounds, velocity_box: np.ndarray,
                      settings: CertifySettings) -> DisturbanceBound:
    """The declared uncertainty set's torque bound at a velocity box (see
    :func:`safety_filter.core.model_uncertainty.disturbance_bound`)."""
    return disturbance_bound(
        model, model.uncertainty, gravity_max=bounds.gravity_max,
        coriolis_max=bounds.coriolis_max(velocity_box), mass_max=bounds.mass_max,
        payload_gravity_max=bounds.payload_gravity_max,
        payload_coriolis_max=np.einsum('ijk,j,k->i', bounds.payload_christoffel_max,
                                       velocity_box, velocity_box),
        payload_mass_max=bounds.payload_mass_max,
        velocity_box=(velocity_box if settings.friction_error_box is None
                      else np.maximum(velocity_box, settings.friction_error_box)),
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


def useful_authority(model: RobotModel, settings: CertifySettings) -> np.ndarray:
    """Authority beyond which a joint gains little: at its rated speed it then brakes within
    ``braking_distance_share`` of its range, ``vmax^2 / (2 share r)``. More only enlarges the
    accelerations the filter lets through, and with them the sampled-data margin (through
    damping and the coupling of light links), without enlarging S noticeably."""
    vmax = np.array(model.velocity_limit)
    return vmax ** 2 / (2.0 * settings.braking_distance_share * np.array(model.position_range))


def margin_reserve(margin: np.ndarray, settings: CertifySettings) -> np.ndarray:
    """What the margin-reserving row-sum authority sets aside before sharing out the rest
    (docs/method.md, Certification, 2.): the sampled-data margin and the drift it covers
    (the margin over its inflation), so that the usable authority ``e - margin`` exceeds
    that drift and a joint outside S is brought back (``barriers.recovery_time_bound``)."""
    return np.asarray(margin, dtype=float) * (1.0 + 1.0 / max(settings.margin_inflation, 1.0))
