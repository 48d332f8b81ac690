"""Replay recorded trials through the filter: open loop, closed loop, comparisons.

Engineers record bags during trials (rosbag2, sqlite3 or MCAP storage). This module reads
them with the ``rosbags`` library (no ROS install needed) and answers: what did the filter
do, what would it have done with other gains or limits, where were the margins thin, was
any limit broken. Input bags are only ever opened for reading.

Pairing rule (the node's default ``trigger='nominal'``): every nominal torque message is
filtered with the newest joint state whose bag time is not later than the nominal's. With
``trigger='joint_state'`` every joint state is filtered with the newest nominal before it; a
nominal older than ``nominal_timeout_s`` is then replaced by the hold command, as the node
does. Steps whose joint state is older than ``joint_state_timeout_s`` are reported as input
gaps and filtered like the node's watchdog would (the hold command).
"""

from __future__ import annotations

from collections.abc import Sequence
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

import numpy as np

from safety_filter.certificate import Certificate
from safety_filter.errors import SafetyFilterError
from safety_filter.filter import FilterMode, SafetyFilter
from safety_filter.model import RobotModel
from safety_filter.simulate import ArmSimulator, limit_violations

MODE_CODES = {FilterMode.FILTERED.value: 0, FilterMode.FALLBACK.value: 1,
              FilterMode.RECOVERING.value: 2, FilterMode.REJECTED.value: 3, 'stale': 4}


class BagError(SafetyFilterError):
    """A bag that cannot be replayed (missing, truncated, wrong topics or joints)."""


@dataclass(frozen=True)
class ReplayTopics:
    """Topic names to read (defaults match the filter node's topics)."""

    joint_states: str = '/joint_states'
    nominal: str = '/nominal_torque'
    filtered: str = '/filtered_torque'


@dataclass
class Trial:
    """Arrays read from one bag, in the model's joint order. Times are bag times [s].

    Attributes:
        state_time, q, v: joint states (sorted, duplicates dropped).
        nominal_time, nominal: nominal torques.
        filtered_time, filtered: recorded filtered torques (empty when not recorded).
        warnings: what was repaired or looks odd (unsorted, duplicates, gaps).
    """

    path: Path
    state_time: np.ndarray
    q: np.ndarray
    v: np.ndarray
    nominal_time: np.ndarray
    nominal: np.ndarray
    filtered_time: np.ndarray
    filtered: np.ndarray
    warnings: list[str] = field(default_factory=list)


def _clean_series(times: np.ndarray, values: np.ndarray, label: str, warnings: list[str]
                  ) -> tuple[np.ndarray, np.ndarray]:
    """Sort by time and drop duplicated stamps, saying so."""
    if len(times) == 0:
        return times, values
    if np.any(np.diff(times) < 0.0):
        warnings.append(f'{label}: timestamps out of order; sorted')
        order = np.argsort(times, kind='stable')
        times, values = times[order], values[order]
    duplicate = np.concatenate([[False], np.diff(times) == 0.0])
    if duplicate.any():
        warnings.append(f'{label}: {int(duplicate.sum())} messages with a duplicated '
                        'timestamp dropped (the first kept)')
        times, values = times[~duplicate], values[~duplicate]
    return times, values


def read_trial(path: str | Path, model: RobotModel, topics: ReplayTopics | None = None
               ) -> Trial:
    """Read one bag (a rosbag2 folder, or an .mcap / .db3 file) for replay.

    Raises:
        BagError: the bag is missing, unreadable or truncated, lacks the joint-state or
            nominal topic, or its joint names do not cover the model's chain.
    """
    from rosbags.highlevel import AnyReader
    from rosbags.typesys import Stores, get_typestore

    topics = topics or ReplayTopics()
    path = Path(path)
    if not path.exists():
        raise BagError(f'{path}: no such bag')
    bag_path = path.parent if path.is_file() and path.suffix in ('.mcap', '.db3') \
        and (path.parent / 'metadata.yaml').exists() else path
    names = list(model.joint_names)
    n = len(names)
    warnings: list[str] = []
    states: list[tuple[float, np.ndarray, np.ndarray]] = []
    nominal: list[tuple[float, np.ndarray]] = []
    filtered: list[tuple[float, np.ndarray]] = []
    invalid = {'joint_states': 0, 'nominal': 0, 'filtered': 0}
    try:
        with AnyReader([bag_path], default_typestore=get_typestore(Stores.ROS2_JAZZY)) as reader:
            available = {c.topic for c in reader.connections}
            for needed in (topics.joint_states, topics.nominal):
                if needed not in available:
                    raise BagError(f'{path}: topic {needed} not in the bag '
                                   f'(it has {sorted(available)})')
            wanted = [c for c in reader.connections
                      if c.topic in (topics.joint_states, topics.nominal, topics.filtered)]
            for connection, stamp_ns, raw in reader.messages(connections=wanted):
                message = reader.deserialize(raw, connection.msgtype)
                t = stamp_ns * 1e-9
                if connection.topic == topics.joint_states:
                    row = _joint_state_row(message, names)
                    if row is None:
                        invalid['joint_states'] += 1
                        missing = sorted(set(names) - set(message.name))
                        if missing and invalid['joint_states'] == 1:
                            warnings.append(f'joint states lack chain joints {missing}')
                        continue
                    states.append((t, *row))
                else:
                    data = np.asarray(message.data, dtype=float)
                    if data.shape != (n,):
                        invalid['nominal' if connection.topic == topics.nominal
                                else 'filtered'] += 1
                        continue
                    (nominal if connection.topic == topics.nominal else filtered).append((t, data))
    except BagError:
        raise
    except Exception as err:  # rosbags raises many types for truncated or foreign files
        raise BagError(f'{path}: cannot read the bag: {type(err).__name__}: {err}') from err
    for label, count in invalid.items():
        if count:
            warnings.append(f'{label}: {count} invalid messages skipped (wrong length or '
                            'missing joints)')
    if not states:
        raise BagError(f'{path}: no usable joint states (joint names in the model: {names})')
    if not nominal:
        raise BagError(f'{path}: no usable nominal torques on {topics.nominal}')
    state_time, q, v = (np.array(x) for x in zip(*states))
    state_time, qv = _clean_series(state_time, np.hstack([q, v]), 'joint states', warnings)
    nominal_time, nominal_values = _clean_series(
        *(np.array(x) for x in zip(*nominal)), 'nominal', warnings)
    if filtered:
        filtered_time, filtered_values = _clean_series(
            *(np.array(x) for x in zip(*filtered)), 'filtered', warnings)
    else:
        filtered_time, filtered_values = np.zeros(0), np.zeros((0, n))
    return Trial(path, state_time, qv[:, :n], qv[:, n:], nominal_time, nominal_values,
                 filtered_time, filtered_values, warnings)


def _joint_state_row(message: Any, names: Sequence[str]) -> tuple[np.ndarray, np.ndarray] | None:
    """Positions and velocities in chain order; None when the message is unusable."""
    msg_names = list(message.name)
    position = np.asarray(message.position, dtype=float)
    velocity = np.asarray(message.velocity, dtype=float)
    if len(position) != len(msg_names) or len(velocity) != len(msg_names):
        return None
    index = {name: i for i, name in enumerate(msg_names)}
    try:
        order = [index[name] for name in names]
    except KeyError:
        return None
    return position[order], velocity[order]


@dataclass
class ReplayResult:
    """The filter's answer at every replayed step.

    Attributes:
        time: (T,) step times [s]; q, v, nominal, torque: (T, n); mode: (T,) mode names
        ('stale' for watchdog steps); margin: (T, n); intervention, solve_time_s: (T,);
        active: (T, n) bool (either acceleration bound active); state_age: (T,) age of the
        joint state used [s]; recorded: (T, n) recorded filtered torque matched to each step
        (NaN where none); gaps: input gaps [(start, end, topic)].
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


def _gaps(times: np.ndarray, limit: float, topic: str) -> list[tuple[float, float, str]]:
    jumps = np.flatnonzero(np.diff(times) > limit)
    return [(float(times[k]), float(times[k + 1]), topic) for k in jumps]


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
    if trigger not in ('nominal', 'joint_state'):
        raise SafetyFilterError(f"trigger must be 'nominal' or 'joint_state', got {trigger!r}")
    filt = SafetyFilter(model, certificate, **filter_options)
    if trigger == 'nominal':
        times = trial.nominal_time
        state_index = np.searchsorted(trial.state_time, times, side='right') - 1
        nominal = trial.nominal
        nominal_fresh = np.ones(len(times), dtype=bool)
    else:
        times = trial.state_time
        state_index = np.arange(len(times))
        nominal_index = np.searchsorted(trial.nominal_time, times, side='right') - 1
        has_nominal = nominal_index >= 0
        nominal = trial.nominal[np.maximum(nominal_index, 0)]
        age = times - trial.nominal_time[np.maximum(nominal_index, 0)]
        nominal_fresh = has_nominal & (age <= nominal_timeout_s)
    count = len(times)
    n = model.n_joints
    result = ReplayResult(
        times.copy(), np.full((count, n), np.nan), np.full((count, n), np.nan),
        np.array(nominal, dtype=float), np.zeros((count, n)), np.empty(count, dtype=object),
        np.full((count, n), np.nan), np.full(count, np.nan), np.zeros(count),
        np.zeros((count, n), dtype=bool), np.full(count, np.inf), np.full((count, n), np.nan),
        _gaps(trial.state_time, joint_state_timeout_s, 'joint_states')
        + _gaps(trial.nominal_time, nominal_timeout_s, 'nominal'))
    for k in range(count):
        s = state_index[k]
        if s < 0:
            result.mode[k] = 'stale'
            continue  # no joint state yet: the node publishes nothing
        q, v = trial.q[s], trial.v[s]
        result.q[k], result.v[k] = q, v
        result.state_age[k] = times[k] - trial.state_time[s]
        if not nominal_fresh[k]:
            result.nominal[k] = filt.hold_torque(q, v)
        if result.state_age[k] > joint_state_timeout_s:
            result.torque[k] = filt.hold_torque(q, v)
            result.mode[k] = 'stale'
            continue
        out = filt.step(q, v, result.nominal[k])
        result.torque[k] = out.torque
        result.mode[k] = str(out.mode)
        result.margin[k] = out.barrier_margin
        result.intervention[k] = out.intervention
        result.solve_time_s[k] = out.solve_time_s
        result.active[k] = out.active_upper | out.active_lower
    if len(trial.filtered_time):
        # The recorded output of each step is the first filtered message after its inputs.
        match = np.searchsorted(trial.filtered_time, times, side='left')
        ok = match < len(trial.filtered_time)
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


@dataclass
class ClosedLoopResult:
    """A re-simulation driven by the recorded nominal commands."""

    time: np.ndarray
    q: np.ndarray
    v: np.ndarray
    torque: np.ndarray
    mode: np.ndarray
    violations: dict[str, np.ndarray]
    difference: dict[str, np.ndarray]  # vs the recorded motion: 'position_rms', 'position_max'


def resimulate(
    trial: Trial,
    model: RobotModel,
    certificate: Certificate,
    *,
    payload_mass: float | None = None,
    internal_rate_hz: float = 10_000.0,
    **filter_options: Any,
) -> ClosedLoopResult:
    """Start the simulated arm at the recorded initial state and drive it with the recorded
    nominal commands through ``certificate``'s filter, one step per recorded nominal."""
    if payload_mass is None:
        low, high = certificate.payload_mass_range
        payload_mass = 0.5 * (low + high)
    filt = SafetyFilter(model, certificate, payload_mass=payload_mass, **filter_options)
    simulator = ArmSimulator(model, payload_mass, internal_rate_hz)
    first = int(np.searchsorted(trial.state_time, trial.nominal_time[0], side='right')) - 1
    first = max(first, 0)
    simulator.reset(trial.q[first], trial.v[first], float(trial.nominal_time[0]))
    times = trial.nominal_time
    count, n = len(times), model.n_joints
    q_log, v_log, u_log = np.zeros((count, n)), np.zeros((count, n)), np.zeros((count, n))
    modes = np.empty(count, dtype=object)
    for k in range(count):
        q_log[k], v_log[k] = simulator.q, simulator.v
        out = filt.step(simulator.q, simulator.v, trial.nominal[k])
        u_log[k], modes[k] = out.torque, str(out.mode)
        hold = (times[k + 1] - times[k]) if k + 1 < count else float(np.median(np.diff(times)))
        simulator.advance(out.torque, max(hold, 1e-6))
    recorded_index = np.clip(np.searchsorted(trial.state_time, times, side='right') - 1, 0,
                             len(trial.state_time) - 1)
    delta = q_log - trial.q[recorded_index]
    return ClosedLoopResult(
        times.copy(), q_log, v_log, u_log, modes,
        limit_violations(model, q_log, v_log, u_log),
        {'position_rms': np.sqrt(np.mean(delta ** 2, axis=0)),
         'position_max': np.max(np.abs(delta), axis=0)})


def summarize(result: ReplayResult, model: RobotModel) -> dict[str, Any]:
    """Key figures of a replay: interventions, margins, modes, episodes, gaps, violations."""
    valid = result.mode != 'stale'
    names = list(model.joint_names)
    summary: dict[str, Any] = {'steps': int(len(result.time))}
    modes, counts = np.unique(result.mode.astype(str), return_counts=True)
    summary['modes'] = {str(m): int(c) for m, c in zip(modes, counts)}
    if valid.any():
        intervention = np.where(valid, result.intervention, np.nan)
        k = int(np.nanargmax(intervention))
        summary['intervention'] = {
            'mean': float(np.nanmean(intervention)), 'p95': float(np.nanquantile(intervention,
                                                                                  0.95)),
            'max': float(intervention[k]), 'max_at_s': float(result.time[k])}
        margin = np.where(valid[:, None], result.margin, np.nan)
        smallest = np.nanmin(margin, axis=1)
        k = int(np.nanargmin(smallest))
        summary['smallest_margin'] = {'value': float(smallest[k]),
                                      'at_s': float(result.time[k]),
                                      'joint': names[int(np.nanargmin(margin[k]))]}
        summary['time_active_fraction'] = {
            name: float(np.mean(result.active[valid, i])) for i, name in enumerate(names)}
        solve = result.solve_time_s[valid & (result.solve_time_s > 0)]
        if len(solve):
            summary['solve_time_us'] = {'median': float(np.median(solve) * 1e6),
                                        'p99': float(np.quantile(solve, 0.99) * 1e6),
                                        'max': float(np.max(solve) * 1e6)}
    summary['episodes'] = {mode: _episodes(result.time, result.mode == mode)
                           for mode in ('fallback', 'recovering', 'rejected', 'stale')}
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
