"""The filter's health verdict: the level, message and key values of its diagnostics.

The filter node publishes one diagnostic status (``/diagnostics``) at its diagnostics rate;
this module computes it without ROS, from what happened since the last report (counted by
:class:`FilterHealth`) and the inputs' ages. The levels are the ``diagnostic_msgs``
values: OK 0, WARN 1, ERROR 2, STALE 3; the most severe reason wins (ERROR > STALE > WARN >
OK; the message lists the reasons in that order):

* ERROR: the joint-state watchdog has tripped (key ``watchdog_tripped`` = ``'true'``: the
  monitor reads this key, not the message), or steps were rejected or recovering since the
  last report.
* STALE: inactive, no valid joint state received yet, or the nominal is stale or missing.
* WARN: fallback steps since the last report, a barrier margin below ``thin_margin``, or a
  measured step period longer than the certified hold by more than
  :data:`STEP_PERIOD_TOLERANCE` (judged on :data:`STEP_PERIOD_MIN_SAMPLES` periods or more).

The key values are listed in docs/node.md ("/diagnostics").
"""

from __future__ import annotations

import math
from collections import Counter
from collections.abc import Sequence
from dataclasses import dataclass

import numpy as np

from safety_filter.online.filter_output import FilterOutput
from safety_filter.online.input_supervision import InputDecision
from safety_filter.online.mode_codes import (
    MODE_FALLBACK,
    MODE_NAMES,
    MODE_RECOVERING,
    MODE_REJECTED,
)

# diagnostic_msgs/DiagnosticStatus levels.
LEVEL_OK, LEVEL_WARN, LEVEL_ERROR, LEVEL_STALE = 0, 1, 2, 3
LEVEL_NAMES = {LEVEL_OK: 'OK', LEVEL_WARN: 'WARN', LEVEL_ERROR: 'ERROR', LEVEL_STALE: 'STALE'}
# The key saying whether the joint-state watchdog has tripped ('true' / 'false').
WATCHDOG_KEY = 'watchdog_tripped'
# Diagnostics WARN when the median step period exceeds the certified hold by more than this
# fraction, judged on at least STEP_PERIOD_MIN_SAMPLES periods. The tolerance leaves room
# for the clock of a real driver (a few per cent) and for a median taken over receipt
# times, and is still far below the factor 2 of a loop at half rate.
STEP_PERIOD_TOLERANCE = 0.1
STEP_PERIOD_MIN_SAMPLES = 5


def format_number(value: float | None) -> str:
    """A key value's text: 6 significant digits, ``'nan'`` for None, NaN or infinity."""
    return 'nan' if value is None or not math.isfinite(value) else f'{value:.6g}'


@dataclass(frozen=True, slots=True)
class HealthVerdict:
    """One diagnostic status, without ROS.

    Attributes:
        level: :data:`LEVEL_OK`, :data:`LEVEL_WARN`, :data:`LEVEL_ERROR` or
            :data:`LEVEL_STALE`.
        message: the reasons, ``'; '``-joined (``'filtering'`` when all is well).
        values: the key values, in order.
    """

    level: int
    message: str
    values: tuple[tuple[str, str], ...]

    @property
    def watchdog_tripped(self) -> bool:
        """The joint-state watchdog has tripped."""
        return dict(self.values).get(WATCHDOG_KEY) == 'true'


class FilterHealth:
    """What the node counts for its diagnostics.

    Per report window (cleared by :meth:`reset_window` after each report): step counts per
    mode code, reasons, solve times, largest intervention, smallest margins, step periods.
    Since activation (cleared by :meth:`reset`): the step count, the invalid messages and
    their last problem, the last output and mode code, the time of the last step.

    Args:
        joint_names: the chain's joints (the margins' order).
    """

    def __init__(self, joint_names: Sequence[str]) -> None:
        self.joint_names = tuple(joint_names)
        self.reset()

    def reset(self) -> None:
        """Clear everything (activation)."""
        self.steps = 0
        self.invalid_joint_states = 0
        self.invalid_nominals = 0
        self.last_joint_state_problem = ''
        self.last_nominal_problem = ''
        self.last_output: FilterOutput | None = None
        self.last_code = -1
        self.last_step_time: float | None = None
        self.reset_window()

    def reset_window(self) -> None:
        """Start a new report window."""
        self.counts = [0] * len(MODE_NAMES)
        self.slow_set_steps = 0  # steps kept in a slow design's set (docs/method.md)
        self.reasons: Counter[str] = Counter()
        self.solve_times: list[float] = []
        self.intervention = 0.0
        self.margin = np.full(len(self.joint_names), math.inf)
        self.periods: list[float] = []

    def invalid_joint_state(self, problem: str) -> None:
        """Count an invalid joint-state message."""
        self.invalid_joint_states += 1
        self.last_joint_state_problem = problem

    def invalid_nominal(self, problem: str) -> None:
        """Count an invalid nominal message."""
        self.invalid_nominals += 1
        self.last_nominal_problem = problem

    def record_step(self, now: float, code: int, reason: str, output: FilterOutput) -> None:
        """Count a published step at ``now`` (the steady clock [s]) of mode ``code``."""
        self.counts[code] += 1
        self.slow_set_steps += bool(output.slow_set)
        if reason:
            self.reasons[reason] += 1
        if output.solve_time_s > 0.0:
            self.solve_times.append(output.solve_time_s)
        if output.intervention > self.intervention:
            self.intervention = output.intervention
        np.fmin(self.margin, output.barrier_margin, out=self.margin)
        self.last_output = output
        self.last_code = code
        if self.last_step_time is not None:  # the measured step period (hold) [s]
            self.periods.append(now - self.last_step_time)
        self.last_step_time = now

    def verdict(self, *, active: bool, has_joint_state: bool, decision: InputDecision,
                thin_margin: float, certified_hold_s: float, trigger: str,
                certificate_id: str, disturbance_estimate: np.ndarray | None = None
                ) -> HealthVerdict:
        """The diagnostic status now.

        Args:
            active: the node is filtering.
            has_joint_state: a valid joint state came since activation.
            decision: the input decision now (its ages and staleness).
            thin_margin: margins below this give WARN (barrier units).
            certified_hold_s: the longest hold the certificate covers
                (``control_period_s * sampling_factor``) [s].
            trigger: the node's trigger (reported).
            certificate_id: the certificate's id (reported).
            disturbance_estimate: the disturbance observer's estimate [N m], if any.
        """
        errors: list[str] = []
        stale: list[str] = []
        warnings: list[str] = []
        counts = self.counts
        joint_state_age = decision.joint_state_age_s
        nominal_age = decision.nominal_age_s
        tripped = False
        if not active:
            stale.append('inactive: not filtering, nothing published')
        else:
            if not has_joint_state:
                stale.append('no valid joint state received yet: nothing published')
            elif decision.joint_state_stale:
                tripped = True
                errors.append(f'joint-state watchdog tripped: last valid joint state '
                              f'{joint_state_age * 1e3:.0f} ms ago; sending the hold command')
            if not math.isfinite(nominal_age):
                stale.append('no nominal received yet: holding still')
            elif decision.nominal_stale:
                stale.append(f'nominal stale ({nominal_age * 1e3:.0f} ms old): holding still')
            if counts[MODE_REJECTED] or self.last_code == MODE_REJECTED:
                errors.append(f'{counts[MODE_REJECTED]} rejected steps (invalid input)')
            if counts[MODE_RECOVERING] or self.last_code == MODE_RECOVERING:
                errors.append(f'{counts[MODE_RECOVERING]} recovering steps (state outside the '
                              'safe set)')
            if counts[MODE_FALLBACK]:
                warnings.append(f'{counts[MODE_FALLBACK]} fallback steps')
            finite = self.margin[np.isfinite(self.margin)]
            if finite.size and float(finite.min()) < thin_margin:
                warnings.append(f'barrier margin down to {float(finite.min()):.4g}')
        hold_ms = certified_hold_s * 1e3
        periods = np.array(self.periods) * 1e3
        period_ms = jitter_ms = math.nan
        if periods.size >= STEP_PERIOD_MIN_SAMPLES:
            period_ms = float(np.median(periods))
            jitter_ms = float(np.percentile(periods, 99.0)) - period_ms
            if active and period_ms > hold_ms * (1.0 + STEP_PERIOD_TOLERANCE):
                warnings.append(
                    f'step period {period_ms:.3g} ms exceeds the certified hold '
                    f'{hold_ms:.3g} ms by more than {STEP_PERIOD_TOLERANCE:.0%}: the '
                    'certificate does not cover this loop')
        if errors:
            level, parts = LEVEL_ERROR, errors + stale + warnings
        elif stale:
            level, parts = LEVEL_STALE, stale + warnings
        elif warnings:
            level, parts = LEVEL_WARN, warnings
        else:
            level, parts = LEVEL_OK, ['filtering']

        values = [('mode', MODE_NAMES[self.last_code] if self.last_code >= 0 else 'none'),
                  ('active', str(active).lower()),
                  (WATCHDOG_KEY, str(tripped).lower())]
        last = self.last_output
        values.append(('intervention.last',
                       format_number(last.intervention) if last is not None else 'nan'))
        values.append(('intervention.max', format_number(self.intervention)))
        for joint, margin in zip(self.joint_names, self.margin.tolist()):
            values.append((f'margin.{joint}', format_number(margin)))
        values.append(('active_constraints', active_constraints(self.joint_names, last)))
        # What the arm needs beyond the model (payload, inertia and friction errors, the
        # driver's torque error), as the disturbance observer sees it [N m].
        for index, joint in enumerate(self.joint_names):
            values.append((f'model_error.{joint}',
                           format_number(float(disturbance_estimate[index]))
                           if disturbance_estimate is not None else 'nan'))
        times = np.array(self.solve_times) * 1e6
        values.append(('solves', str(times.size)))
        for label, value in (('median', 50.0), ('p99', 99.0)):
            values.append((f'solve_time.{label}_us',
                           format_number(float(np.percentile(times, value)))
                           if times.size else 'nan'))
        values.append(('solve_time.max_us',
                       format_number(float(times.max())) if times.size else 'nan'))
        values.append(('steps', str(sum(counts))))
        values.append(('step_period.median_ms', format_number(period_ms)))
        values.append(('step_period.jitter_ms', format_number(jitter_ms)))
        values.append(('step_period.certified_hold_ms', format_number(hold_ms)))
        for name, count in zip(MODE_NAMES, counts):
            values.append((f'count.{name}', str(count)))
        values.append(('count.slow_set', str(self.slow_set_steps)))
        values.append(('reasons', '; '.join(f'{reason} (x{count})' for reason, count
                                            in self.reasons.most_common(5)) or 'none'))
        values.append(('age.joint_state_ms', format_number(joint_state_age * 1e3)))
        values.append(('age.nominal_ms', format_number(nominal_age * 1e3)))
        values.append(('invalid.joint_state', str(self.invalid_joint_states)))
        values.append(('invalid.nominal', str(self.invalid_nominals)))
        if self.invalid_joint_states:
            values.append(('invalid.joint_state_last', self.last_joint_state_problem))
        if self.invalid_nominals:
            values.append(('invalid.nominal_last', self.last_nominal_problem))
        values.append(('trigger', trigger))
        values.append(('certificate_id', certificate_id))
        return HealthVerdict(level, '; '.join(parts), tuple(values))


def active_constraints(joint_names: Sequence[str], output: FilterOutput | None) -> str:
    """The constraints active in ``output``: ``'<joint>:accel_upper'``,
    ``'<joint>:accel_lower'``, ``'<joint>:torque'``, comma-separated (``'none'``)."""
    if output is None:
        return 'none'
    active = []
    for i, joint in enumerate(joint_names):
        if output.active_upper[i]:
            active.append(f'{joint}:accel_upper')
        if output.active_lower[i]:
            active.append(f'{joint}:accel_lower')
        if output.torque_saturated[i]:
            active.append(f'{joint}:torque')
    return ', '.join(active) or 'none'
