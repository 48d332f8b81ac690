"""The stress test's judging: what one run did, and whether it passes.

:func:`summarize_run` measures a closed-loop run (excursions past the limits with and without
the steps a push disturbed, torque past the box, time outside S, recovery after each push);
:func:`return_time_bounds` states, per push, the return time the certificate promises;
:func:`run_failures` holds the verdict rules (one small function, so they can be adjusted)
and :func:`severity` orders runs worst first. Plain numbers in, plain numbers out: the runs
themselves are in :mod:`safety_filter.campaigns.stress_runs`.
"""

from __future__ import annotations

import math
from collections.abc import Sequence
from dataclasses import dataclass
from typing import Any

import numpy as np

from safety_filter.core.certificate import Certificate
from safety_filter.core.limit_tolerance import LIMIT_TOLERANCE
from safety_filter.core.robot_model import RobotModel
from safety_filter.simulation.plant import PlantLog, Push, limit_violations

POSITION_TOLERANCE = LIMIT_TOLERANCE  # [rad or m]: float round-off, not an allowance
TORQUE_TOLERANCE = 1e-6  # relative, times max(1, effort limit), as the filter's check


# ---------------------------------------------------------------------- measuring a run
def recovery_times(log: PlantLog, pushes: Sequence[Push], period_s: float,
                   tolerance: float = 0.0) -> list[float | None]:
    """Per push: seconds from its end until the true state is first back in S (every barrier
    value at least ``-tolerance``: the stress test passes the declared velocity noise, as
    for the velocity rule).

    The window of a push runs from its end to the next push's start (or the end of the run).
    The recovery time is ``t_first_inside - t_end`` for the first control step of the window
    that is inside S after the push left it; 0 when the state is in S when the push ends;
    None when it does not come back within the window. Later excursions in the window (the
    nominal may lead the state out of S again) are not part of the push's recovery: the
    run's time outside S counts them.
    """
    del period_s  # the steps' own times are used
    inside = np.all(log.margin >= -tolerance, axis=1)
    times = log.time_s
    starts = sorted(p.start_s for p in pushes)
    result: list[float | None] = []
    for push in pushes:
        later = [s for s in starts if s > push.start_s + 1e-12]
        window_end = later[0] if later else math.inf
        rows = np.flatnonzero((times >= push.end_s - 1e-9) & (times < window_end - 1e-9))
        back = rows[inside[rows]] if rows.size else rows
        if back.size == 0:
            result.append(None)
        elif back[0] == rows[0]:
            result.append(0.0)  # in S when the push ended
        else:
            result.append(max(float(times[back[0]] - push.end_s), 0.0))
    return result


def disturbed_steps(log: PlantLog, pushes: Sequence[Push],
                    recovery: Sequence[float | None], settle_s: float = 0.0) -> np.ndarray:
    """Mask of the control steps from each push's start until the state is back in S and
    ``settle_s`` has passed since the push ended (to the next push or the end of the run
    when it does not come back): the disturbance observer still carries the push for about
    its time constant after the push stops, so the filter's model of the arm is off by the
    push's torque until then."""
    times = log.time_s
    mask = np.zeros(len(times), dtype=bool)
    starts = sorted(p.start_s for p in pushes)
    for push, seconds in zip(pushes, recovery):
        later = [s for s in starts if s > push.start_s + 1e-12]
        end = ((later[0] if later else math.inf) if seconds is None
               else push.end_s + max(seconds, settle_s))
        mask |= (times >= push.start_s - 1e-9) & (times < end - 1e-9)
    return mask


def _excursions(model: RobotModel, log: PlantLog, rows: np.ndarray
                ) -> tuple[np.ndarray, np.ndarray]:
    n = model.n_joints
    if not np.any(rows):
        return np.zeros(n), np.zeros(n)
    kept = limit_violations(model, log.q[rows], log.v[rows], log.applied[rows])
    return kept['position'], kept['velocity']


def summarize_run(log: PlantLog, model: RobotModel, period_s: float,
                  pushes: Sequence[Push] = (), tolerance: float = 0.0,
                  settle_s: float = 0.0) -> dict[str, Any]:
    """The figures of one run (plain numbers; per-joint lists in joint order).

    Keys: ``position_excursion`` / ``velocity_excursion`` [rad, rad/s]: largest past a
    limit (0 when kept; ``*_per_joint`` too), over the steps NOT disturbed by a push (see
    :func:`disturbed_steps`); ``push_position_excursion`` / ``push_velocity_excursion``: the
    same over the disturbed steps (what the push itself did, reported, not judged);
    ``command_excess`` (the filter's command past the torque box, every step),
    ``applied_excess`` (the applied torque past the box: 0 by construction, the driver
    saturates), ``driver_saturation`` (the driver's ``gain u + offset`` past the box before
    saturation), ``time_outside_s`` (control steps with the true state outside S, times T,
    pushes included), ``min_margin``, ``recovery_s`` (per push, None: not back in S),
    ``modes`` (fraction of steps per filter mode).
    """
    umax = np.array(model.effort_limit)
    recovery = recovery_times(log, pushes, period_s, tolerance) if pushes else []
    disturbed = disturbed_steps(log, pushes, recovery, settle_s)
    position, velocity = _excursions(model, log, ~disturbed)
    push_position, push_velocity = _excursions(model, log, disturbed)
    applied = np.maximum(np.max(np.abs(log.applied) - umax, axis=0), 0.0)
    command = np.maximum(np.max(np.abs(log.command) - umax, axis=0), 0.0)
    demand = np.maximum(np.max(np.abs(log.demand) - umax, axis=0), 0.0)
    finite = bool(np.all(np.isfinite(log.margin)))
    outside = ~np.all(log.margin >= 0.0, axis=1) if finite else \
        np.zeros(len(log.time_s), dtype=bool)
    modes, counts = np.unique(log.mode.astype(str), return_counts=True)
    steps = max(len(log.time_s), 1)
    return {
        'position_excursion': float(position.max()),
        'position_excursion_per_joint': position.tolist(),
        'velocity_excursion': float(velocity.max()),
        'velocity_excursion_per_joint': velocity.tolist(),
        'push_position_excursion': float(push_position.max()),
        'push_velocity_excursion': float(push_velocity.max()),
        'command_excess': float(command.max()),
        'applied_excess': float(applied.max()),
        'driver_saturation': float(demand.max()),
        'time_outside_s': float(np.count_nonzero(outside) * period_s),
        'disturbed_s': float(np.count_nonzero(disturbed) * period_s),
        'min_margin': float(np.nanmin(log.margin)) if np.any(np.isfinite(log.margin))
        else None,
        'recovery_s': recovery,
        'modes': {str(m): float(c) / steps for m, c in zip(modes, counts)},
    }


@dataclass(frozen=True)
class VerdictRules:
    """What a run must meet to pass (see :func:`run_failures`).

    Attributes:
        position_tolerance: allowed position excursion [rad or m] (round-off only).
        velocity_allowance: allowed velocity excursion [rad/s or m/s]: the declared
            velocity noise (the filter cannot see the velocity better than that).
        torque_tolerance: allowed torque excess, relative, times ``max(1, effort limit)``.
        recovery_time_s: after each push the state must be back in S within this time, if
            given; else within the certified return time of each push where it applies
            (``recovery_bound_s`` of the summary, see :func:`return_time_bounds`).
    """

    position_tolerance: float = POSITION_TOLERANCE
    velocity_allowance: float = 0.0
    torque_tolerance: float = TORQUE_TOLERANCE
    recovery_time_s: float | None = None


def run_failures(summary: dict[str, Any], rules: VerdictRules, effort_limit: np.ndarray
                 ) -> list[str]:
    """The verdict rules: the reasons a run fails (empty: it passes).

    1. no position-limit violation (beyond round-off);
    2. velocity excursion at most the declared velocity noise;

    (1 and 2 over the steps not disturbed by a push: a push may drive the arm past a limit
    by itself; what is judged after it is rule 4);
    3. torque within the box: the applied torque, and the filter's command (the driver
       saturates, so the applied torque alone could not show a command outside the box);
    4. after each push, back in S within ``recovery_time_s`` when it is given, else within
       the certified return time where one applies (``summary['recovery_bound_s']``).
    """
    reasons = []
    if summary['position_excursion'] > rules.position_tolerance:
        reasons.append(f'position limit exceeded by {summary["position_excursion"]:.3g}')
    if summary['velocity_excursion'] > rules.velocity_allowance:
        reasons.append(f'velocity limit exceeded by {summary["velocity_excursion"]:.3g} '
                       f'(allowance {rules.velocity_allowance:g})')
    torque_tol = rules.torque_tolerance * max(1.0, float(np.max(effort_limit)))
    excess = max(summary['command_excess'], summary['applied_excess'])
    if excess > torque_tol:
        reasons.append(f'torque outside the box by {excess:.3g}')
    bounds = summary.get('recovery_bound_s') or [None] * len(summary['recovery_s'])
    for k, seconds in enumerate(summary['recovery_s']):
        allowed = rules.recovery_time_s if rules.recovery_time_s is not None else bounds[k]
        if allowed is not None and (seconds is None or seconds > allowed):
            took = 'not back in S' if seconds is None else f'{seconds:.3g} s'
            reasons.append(f'push {k + 1}: {took} (allowed {allowed:.3g} s)')
    return reasons


def return_time_bounds(log: PlantLog, pushes: Sequence[Push], certificate: Certificate,
                       recovery: Sequence[float | None], period_s: float, allowance_s: float,
                       tolerance: float = 0.0) -> list[float | None]:
    """Per push: the time from its end within which the certificate says the state is back
    in S (:meth:`Certificate.recovery_time`), or None where that statement does not apply.

    The statement holds from any state outside S within the certified domain (speeds within
    ``velocity_bound``, where the authority is certified), whether the QP meets the bounds
    or the push-back acts. It is applied at every step from the push's end, or from the step
    a push that left the speeds beyond the domain has them back within it for good, until
    the state is back (``recovery``, or the window's end): the bound is the largest of the
    step's time after the push plus its recovery time, plus ``allowance_s`` (the delay) and
    one period. It does not apply when, on the way, a position is past a limit or a state
    beyond the braking set (no time stated there), when the speeds are not back within the
    domain by then, or when the state is in S at the push's end (None). ``tolerance``: the
    velocity tolerance of "back in S" (``recovery_times``), allowed on the domain too.
    """
    times = log.time_s
    starts = sorted(p.start_s for p in pushes)
    result: list[float | None] = []
    for push, back in zip(pushes, recovery):
        later = [s for s in starts if s > push.start_s + 1e-12]
        end = push.end_s + back if back is not None else (later[0] if later else math.inf)
        rows = np.flatnonzero((times >= push.end_s - 1e-9) & (times <= end + 1e-9))
        if rows.size == 0 or back == 0.0:
            result.append(None)
            continue
        q, v = log.q[rows], log.v[rows]
        if np.any((q < certificate.position_lower) | (q > certificate.position_upper)):
            result.append(None)
            continue
        # A push can leave the speeds beyond the certified domain for a few steps: the
        # statement applies from the step the state is back within it for good.
        within = np.all(np.abs(v) <= certificate.velocity_bound + tolerance, axis=1)
        if not within[-1]:
            result.append(None)
            continue
        later_out = np.flatnonzero(~within)
        first = int(later_out[-1]) + 1 if later_out.size else 0
        rows, q, v = rows[first:], q[first:], v[first:]
        needed = np.max(certificate.recovery_time(q, v), axis=1)
        if not np.all(np.isfinite(needed)):  # a step from which no time is stated
            result.append(None)
            continue
        result.append(float(np.max(times[rows] - push.end_s + needed)) + allowance_s
                      + period_s)
    return result


def severity(summary: dict[str, Any]) -> tuple[float, ...]:
    """Sort key, larger is worse: failed first, then position, velocity and torque
    excursions, time outside S, and the thinnest true barrier margin."""
    margin = summary['min_margin']
    return (0.0 if summary['passed'] else 1.0, summary['position_excursion'],
            summary['velocity_excursion'],
            max(summary['command_excess'], summary['applied_excess']),
            summary['time_outside_s'], -(margin if margin is not None else 0.0))

