"""Open-loop replay: the recorded inputs through the filter at the recorded times.

Engineers record bags during trials; this module answers from a :class:`Trial`
(:mod:`safety_filter.replay.trial`): what did the filter do, what would it have done with
other gains or limits, where were the margins thin, was any limit broken.

Pairing rule (the node's default ``trigger='nominal'``): every nominal torque message is
filtered with the newest joint state whose bag time is not later than the nominal's. With
``trigger='joint_state'`` every joint state is filtered with the newest nominal before it.
Stale inputs are handled by the node's own policy
(:mod:`safety_filter.online.input_supervision`, with the bag times as the clock): a nominal
older than ``nominal_timeout_s`` is replaced by the hold command; a step whose joint state
is older than ``joint_state_timeout_s`` is reported as an input gap and filtered as the
node's watchdog does (the hold command at the last position, gravity compensation only).

:func:`replay_open_loop` gives a :class:`ReplayResult`; :func:`summarize` its key figures,
:func:`agreement` how it matches the recorded filtered torques, :func:`compare` several
certificates on the same trial.
"""

from __future__ import annotations

from dataclasses import dataclass
from typing import Any

import numpy as np

from safety_filter.core.certificate import Certificate
from safety_filter.core.robot_model import RobotModel
from safety_filter.online.barrier_filter import SafetyFilter
from safety_filter.online.input_supervision import (
    InputSupervisor,
    check_trigger,
    supervised_step,
)
from safety_filter.online.mode_codes import MODE_NAMES, MODE_STALE, NON_FILTERED_MODE_NAMES
from safety_filter.replay.trial import Trial, stamps_ns
from safety_filter.simulation.plant import limit_violations


@dataclass
class ReplayResult:
    """The filter's answer at every replayed step.

    Attributes:
        time: (T,) step times [s]; q, v, nominal, torque: (T, n); mode: (T,) mode names
        ('stale' for watchdog steps); margin: (T, n); intervention, solve_time_s: (T,);
        active: (T, n) bool (either acceleration bound active); state_age: (T,) age of the
        joint state used [s]; recorded: (T, n) recorded filtered torque matched to each step
        (NaN where none); gaps: input gaps [(start, end, topic)].
        stamp_ns: (T,) step times [ns]; nominal_age: (T,) age of the nominal used [s] (inf
        when none); hold_nominal: (T,) bool, the hold command replaced a stale nominal;
        joint_names: the columns' joints.
    """

    time: np.ndarray
    q: np.ndarray
    v: np.ndarray
    nominal: np.ndarray
    torque: np.ndarray
    mode: np.ndarray
    margin: np.ndarray
    intervention: np.ndarray
    solve_time_s: np.ndarray
    active: np.ndarray
    state_age: np.ndarray
    recorded: np.ndarray
    gaps: list[tuple[float, float, str]]
    stamp_ns: np.ndarray | None = None
    nominal_age: np.ndarray | None = None
    hold_nominal: np.ndarray | None = None
    joint_names: tuple[str, ...] = ()

    @property
    def published(self) -> np.ndarray:
        """(T,) bool: the node would have published a torque (it had a joint state)."""
        return np.all(np.isfinite(self.q), axis=1)


def _gaps(stamps_ns: np.ndarray, limit: float, topic: str) -> list[tuple[float, float, str]]:
    jumps = np.flatnonzero(np.diff(stamps_ns) * 1e-9 > limit)
    return [(float(stamps_ns[k] * 1e-9), float(stamps_ns[k + 1] * 1e-9), topic)
            for k in jumps]


def replay_open_loop(
    trial: Trial,
    model: RobotModel,
    certificate: Certificate,
    *,
    trigger: str = 'nominal',
    joint_state_timeout_s: float = 0.05,
    nominal_timeout_s: float = 0.1,
    **filter_options: Any,
) -> ReplayResult:
    """Feed the recorded states and nominals through the filter at the recorded times.

    ``filter_options`` go to :class:`SafetyFilter` (gravity convention, payload mass, ...).
    """
    check_trigger(trigger)
    filt = SafetyFilter(model, certificate, **filter_options)
    state_ns = stamps_ns(trial.state_time, trial.state_stamp_ns)
    nominal_ns = stamps_ns(trial.nominal_time, trial.nominal_stamp_ns)
    if trigger == 'nominal':
        stamps = nominal_ns
        times = trial.nominal_time
        state_index = np.searchsorted(state_ns, stamps, side='right') - 1
        nominal = trial.nominal
        nominal_age = np.zeros(len(times))
        nominal_fresh = np.ones(len(times), dtype=bool)
    else:
        stamps = state_ns
        times = trial.state_time
        state_index = np.arange(len(times))
        nominal_index = np.searchsorted(nominal_ns, stamps, side='right') - 1
        has_nominal = nominal_index >= 0
        nominal = trial.nominal[np.maximum(nominal_index, 0)]
        nominal_age = np.where(has_nominal,
                               (stamps - nominal_ns[np.maximum(nominal_index, 0)]) * 1e-9, np.inf)
        nominal_fresh = has_nominal & (nominal_age <= nominal_timeout_s)
    count = len(times)
    n = model.n_joints
    result = ReplayResult(
        np.array(times, dtype=float), np.full((count, n), np.nan), np.full((count, n), np.nan),
        np.array(nominal, dtype=float), np.zeros((count, n)), np.empty(count, dtype=object),
        np.full((count, n), np.nan), np.full(count, np.nan), np.zeros(count),
        np.zeros((count, n), dtype=bool), np.full(count, np.inf), np.full((count, n), np.nan),
        _gaps(state_ns, joint_state_timeout_s, 'joint_states')
        + _gaps(nominal_ns, nominal_timeout_s, 'nominal'),
        stamp_ns=np.array(stamps, dtype=np.int64), nominal_age=np.array(nominal_age),
        hold_nominal=~nominal_fresh, joint_names=tuple(model.joint_names))
    # The node's input policy, with the bag times as its clock.
    supervisor = InputSupervisor(joint_state_timeout_s, nominal_timeout_s, trigger)
    for k in range(count):
        s = state_index[k]
        if s < 0:
            result.mode[k] = MODE_NAMES[MODE_STALE]
            continue  # no joint state yet: the node publishes nothing
        q, v = trial.q[s], trial.v[s]
        result.q[k], result.v[k] = q, v
        now = stamps[k] * 1e-9
        decision = supervisor.decide(now, state_ns[s] * 1e-9,
                                     now - nominal_age[k] if nominal_fresh[k] else None)
        result.state_age[k] = (stamps[k] - state_ns[s]) * 1e-9
        step = supervised_step(filt, decision, q, v, result.nominal[k], q)
        if not decision.joint_state_stale:
            result.nominal[k] = step.nominal  # the hold command where the nominal was stale
        result.torque[k] = step.output.torque
        result.mode[k] = MODE_NAMES[step.mode_code]
        if decision.joint_state_stale:
            continue  # the watchdog's hold: no QP, no margins to report
        out = step.output
        result.margin[k] = out.barrier_margin
        result.intervention[k] = out.intervention
        result.solve_time_s[k] = out.solve_time_s
        result.active[k] = out.active_upper | out.active_lower
    if len(trial.filtered_time):
        # The recorded output of each step is the first filtered message after its inputs.
        filtered_ns = stamps_ns(trial.filtered_time, trial.filtered_stamp_ns)
        match = np.searchsorted(filtered_ns, stamps, side='left')
        ok = match < len(filtered_ns)
        result.recorded[ok] = trial.filtered[match[ok]]
    return result


def agreement(result: ReplayResult) -> dict[str, float]:
    """How closely the replayed torques match the recorded ones (where both exist)."""
    both = np.all(np.isfinite(result.recorded), axis=1) & (result.mode != 'stale')
    if not both.any():
        return {'matched_steps': 0}
    diff = np.abs(result.torque[both] - result.recorded[both])
    return {'matched_steps': int(both.sum()), 'max_abs_diff': float(diff.max()),
            'rms_diff': float(np.sqrt(np.mean(diff ** 2))),
            'p99_abs_diff': float(np.quantile(diff.max(axis=1), 0.99))}


def summarize(result: ReplayResult, model: RobotModel) -> dict[str, Any]:
    """Key figures of a replay: interventions, margins, modes, episodes, gaps, violations."""
    valid = result.mode != 'stale'
    names = list(model.joint_names)
    summary: dict[str, Any] = {'steps': int(len(result.time))}
    modes, counts = np.unique(result.mode.astype(str), return_counts=True)
    summary['modes'] = {str(m): int(c) for m, c in zip(modes, counts)}
    if valid.any():
        intervention = np.where(valid, result.intervention, np.nan)
        if np.isfinite(intervention).any():
            k = int(np.nanargmax(intervention))
            summary['intervention'] = {
                'mean': float(np.nanmean(intervention)),
                'p95': float(np.nanquantile(intervention, 0.95)),
                'max': float(intervention[k]), 'max_at_s': float(result.time[k])}
        margin = np.where(valid[:, None], result.margin, np.nan)
        if np.isfinite(margin).any():
            smallest = np.nanmin(np.where(np.isfinite(margin), margin, np.inf), axis=1)
            k = int(np.argmin(smallest))
            summary['smallest_margin'] = {'value': float(smallest[k]),
                                          'at_s': float(result.time[k]),
                                          'joint': names[int(np.nanargmin(margin[k]))]}
        summary['time_active_fraction'] = {
            name: float(np.mean(result.active[valid, i])) for i, name in enumerate(names)}
        summary['time_any_active_fraction'] = float(np.mean(np.any(result.active[valid],
                                                                   axis=1)))
        solve = result.solve_time_s[valid & (result.solve_time_s > 0)]
        if len(solve):
            summary['solve_time_us'] = {'median': float(np.median(solve) * 1e6),
                                        'p99': float(np.quantile(solve, 0.99) * 1e6),
                                        'max': float(np.max(solve) * 1e6)}
    summary['episodes'] = {mode: _episodes(result.time, result.mode == mode)
                           for mode in NON_FILTERED_MODE_NAMES}
    summary['gaps'] = [{'from_s': a, 'to_s': b, 'topic': topic} for a, b, topic in result.gaps]
    finite = np.all(np.isfinite(result.q), axis=1)
    if finite.any():
        violations = limit_violations(model, result.q[finite], result.v[finite],
                                      result.torque[finite])
        summary['recorded_state_violations'] = {
            kind: {name: float(value[i]) for i, name in enumerate(names)}
            for kind, value in violations.items()}
    return summary


def _episodes(time: np.ndarray, mask: np.ndarray) -> list[dict[str, float]]:
    """Contiguous runs of ``mask`` as (start, end, steps)."""
    if not mask.any():
        return []
    edges = np.diff(np.concatenate([[0], mask.astype(int), [0]]))
    starts, ends = np.flatnonzero(edges == 1), np.flatnonzero(edges == -1) - 1
    return [{'from_s': float(time[a]), 'to_s': float(time[b]), 'steps': int(b - a + 1)}
            for a, b in zip(starts, ends)]


def compare(trial: Trial, model: RobotModel, certificates: dict[str, Certificate],
            **filter_options: Any) -> dict[str, dict[str, Any]]:
    """Replay one trial with several certificates and summarise each (same inputs)."""
    return {label: summarize(replay_open_loop(trial, model, cert, **filter_options), model)
            for label, cert in certificates.items()}
