"""Replay recorded trials through the filter: open loop, closed loop, comparisons.

Engineers record bags during trials (rosbag2, sqlite3 or MCAP storage). This module reads
them with the ``rosbags`` library (no ROS install needed) and answers: what did the filter
do, what would it have done with other gains or limits, where were the margins thin, was
any limit broken. Input bags are only ever opened for reading (SQLite files are opened
``immutable``); :func:`write_replay_bag` writes a new bag next to them, never into them.

Pairing rule (the node's default ``trigger='nominal'``): every nominal torque message is
filtered with the newest joint state whose bag time is not later than the nominal's. With
``trigger='joint_state'`` every joint state is filtered with the newest nominal before it; a
nominal older than ``nominal_timeout_s`` is then replaced by the hold command, as the node
does. Steps whose joint state is older than ``joint_state_timeout_s`` are reported as input
gaps and filtered like the node's watchdog would (the hold command at the last position,
gravity compensation only: the node computes no damping from a stale velocity).

Times: bag (log) times, kept as integer nanoseconds for pairing and writing, and given as
float seconds in the arrays (``time``, ``state_time``, ...).

Bags: :func:`find_bags` lists the bags of a folder (rosbag2 folders with ``metadata.yaml``
and bare ``.mcap`` / ``.db3`` files); :func:`write_replay_bag` writes a copy of a bag with
the replayed torques and a status record per step added.
"""

from __future__ import annotations

import heapq
import os
import shutil
from collections.abc import Iterable, Iterator, Sequence
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

import numpy as np

from safety_filter.core.certificate import Certificate
from safety_filter.core.robot_model import RobotModel
from safety_filter.errors import BagError, SafetyFilterError
from safety_filter.online import status_layout as _status_layout
from safety_filter.online.barrier_filter import FilterMode, SafetyFilter
from safety_filter.recordings import bags as _bags
from safety_filter.simulation.plant import ArmSimulator, limit_violations

MODE_CODES = {FilterMode.FILTERED.value: 0, FilterMode.FALLBACK.value: 1,
              FilterMode.RECOVERING.value: 2, FilterMode.REJECTED.value: 3, 'stale': 4}
BAG_SUFFIXES = ('.mcap', '.db3')
REPLAY_FILTERED_TOPIC = '/replay/filtered_torque'
REPLAY_STATUS_TOPIC = '/replay/status'
REPLAY_STATUS_FIELDS_TOPIC = _status_layout.fields_topic(REPLAY_STATUS_TOPIC)
# The layout of the filter node's ``~/status`` records (safety_filter.online.status_layout), so
# that one reader serves both: scalars, then one block per joint field.
STATUS_SCALAR_FIELDS = _status_layout.STATUS_SCALAR_FIELDS
STATUS_JOINT_FIELDS = _status_layout.STATUS_JOINT_FIELDS



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
        state_stamp_ns, nominal_stamp_ns, filtered_stamp_ns: the same times as integer bag
            times [ns] (None when the trial was built by hand: then derived from the floats).
        topics: message count of every topic in the bag.
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
    state_stamp_ns: np.ndarray | None = None
    nominal_stamp_ns: np.ndarray | None = None
    filtered_stamp_ns: np.ndarray | None = None
    topics: dict[str, int] = field(default_factory=dict)

    @property
    def start_stamp_ns(self) -> int:
        """Bag time of the first joint state or nominal [ns]."""
        firsts = [int(_stamps_ns(t, s)[0]) for t, s in (
            (self.state_time, self.state_stamp_ns), (self.nominal_time, self.nominal_stamp_ns))
            if len(t)]
        return min(firsts) if firsts else 0

    @property
    def start_time(self) -> float:
        """Bag time of the first joint state or nominal [s]."""
        return self.start_stamp_ns * 1e-9

    def relative_time(self, times: np.ndarray, stamps_ns: np.ndarray | None = None
                      ) -> np.ndarray:
        """Times since :attr:`start_time` [s], exact from ``stamps_ns`` when given."""
        start = self.start_stamp_ns
        if stamps_ns is not None and len(stamps_ns) == len(times):
            return (np.asarray(stamps_ns, dtype=np.int64) - start) * 1e-9
        return np.asarray(times, dtype=float) - start * 1e-9


def _stamps_ns(times: np.ndarray, stamps: np.ndarray | None) -> np.ndarray:
    """Integer bag times [ns]: the recorded ones, else rounded from the seconds."""
    if stamps is not None and len(stamps) == len(times):
        return np.asarray(stamps, dtype=np.int64)
    return np.round(np.asarray(times, dtype=float) * 1e9).astype(np.int64)


def _clean_series(stamps: np.ndarray, values: np.ndarray, label: str, warnings: list[str]
                  ) -> tuple[np.ndarray, np.ndarray]:
    """Sort by time [ns] and drop duplicated stamps, saying so."""
    if len(stamps) == 0:
        return stamps, values
    if np.any(np.diff(stamps) < 0):
        warnings.append(f'{label}: timestamps out of order; sorted')
        order = np.argsort(stamps, kind='stable')
        stamps, values = stamps[order], values[order]
    duplicate = np.concatenate([[False], np.diff(stamps) == 0])
    if duplicate.any():
        warnings.append(f'{label}: {int(duplicate.sum())} messages with a duplicated '
                        'timestamp dropped (the first kept)')
        stamps, values = stamps[~duplicate], values[~duplicate]
    return stamps, values


def _bag_location(path: Path) -> Path:
    """What to hand to the reader: the rosbag2 folder of a storage file inside one."""
    if path.is_file() and path.suffix in BAG_SUFFIXES and (path.parent / 'metadata.yaml').exists():
        return path.parent
    return path


def _open_reader(path: Path) -> Any:
    """An opened ``AnyReader`` on a bag (BagError when it cannot be opened)."""
    from rosbags.highlevel import AnyReader

    if not path.exists():
        raise BagError(f'{path}: no such bag')
    if path.is_dir() and not (path / 'metadata.yaml').exists():
        raise BagError(f'{path}: not a bag (a folder without metadata.yaml)')
    if path.is_file() and path.suffix not in BAG_SUFFIXES:
        raise BagError(f'{path}: not a bag (expected a rosbag2 folder, .mcap or .db3 file)')
    reader = AnyReader([_bag_location(path)], default_typestore=_bags.typestore())
    try:
        reader.open()
    except Exception as err:  # rosbags raises many types for truncated or foreign files
        raise BagError(f'{path}: cannot read the bag: {_describe_error(err)}') from err
    return reader


def _describe_error(err: BaseException) -> str:
    text = str(err).strip() or 'no detail'
    return f'{type(err).__name__}: {text}'


def read_trial(path: str | Path, model: RobotModel, topics: ReplayTopics | None = None
               ) -> Trial:
    """Read one bag (a rosbag2 folder, or an .mcap / .db3 file) for replay.

    Joint states are matched to the chain by joint name (any order; extra joints, such as a
    gripper's, are ignored). Messages that cannot be used (a chain joint missing, arrays of
    the wrong length) are skipped and counted in the warnings.

    Raises:
        BagError: the bag is missing, unreadable or truncated, lacks the joint-state or
            nominal topic, or its joint states never name every chain joint (the error
            names the missing ones).
    """
    topics = topics or ReplayTopics()
    path = Path(path)
    names = list(model.joint_names)
    n = len(names)
    warnings: list[str] = []
    states: list[tuple[int, np.ndarray, np.ndarray]] = []
    header_stamps: list[int] = []
    nominal: list[tuple[int, np.ndarray]] = []
    filtered: list[tuple[int, np.ndarray]] = []
    invalid = {'joint_states': 0, 'nominal': 0, 'filtered': 0}
    missing_joints: set[str] = set()
    short_arrays = 0  # joint states whose position or velocity array does not fit the names
    seen_names: list[str] = []
    counts: dict[str, int] = {}
    reader = _open_reader(path)
    try:
        for connection in reader.connections:
            counts[connection.topic] = counts.get(connection.topic, 0) + connection.msgcount
        available = set(counts)
        for needed in (topics.joint_states, topics.nominal):
            if needed not in available:
                raise BagError(f'{path}: topic {needed} not in the bag '
                               f'(it has {sorted(available)})')
        if topics.filtered not in available:
            others = sorted(t for t in available if t not in (topics.joint_states,
                                                               topics.nominal))
            warnings.append(f'no recorded filtered torques on {topics.filtered}: no agreement '
                            f'check (other topics: {others}; see --filtered-topic)')
        wanted = [c for c in reader.connections
                  if c.topic in (topics.joint_states, topics.nominal, topics.filtered)]
        for connection, stamp_ns, raw in reader.messages(connections=wanted):
            message = reader.deserialize(raw, connection.msgtype)
            if connection.topic == topics.joint_states:
                row = _joint_state_row(message, names)
                if row is None:
                    invalid['joint_states'] += 1
                    missing = set(names) - set(message.name)
                    if missing:
                        missing_joints |= missing
                        seen_names = list(message.name)
                    else:
                        short_arrays += 1
                    continue
                stamp = message.header.stamp
                header_stamps.append(int(stamp.sec) * 1_000_000_000 + int(stamp.nanosec))
                states.append((int(stamp_ns), *row))
            else:
                data = np.asarray(message.data, dtype=float)
                if data.shape != (n,):
                    invalid['nominal' if connection.topic == topics.nominal
                            else 'filtered'] += 1
                    continue
                (nominal if connection.topic == topics.nominal else filtered).append(
                    (int(stamp_ns), data))
    except BagError:
        raise
    except Exception as err:  # rosbags raises many types for truncated or foreign files
        raise BagError(f'{path}: cannot read the bag: {_describe_error(err)}') from err
    finally:
        try:
            reader.close()
        except Exception:  # a reader that failed half-way may not close cleanly
            pass
    if missing_joints:
        text = (f'joint states lack the chain joint(s) {sorted(missing_joints)} '
                f'(a message names {seen_names})')
        if not states:
            raise BagError(f'{path}: {text}; no usable joint state. The chain is {names}: '
                           'choose the chain with --joints/--base-link/--tip-link, or a '
                           'bag of this arm')
        warnings.append(f'{text}: {invalid["joint_states"]} such messages skipped')
    for label, count in invalid.items():
        if count and not (label == 'joint_states' and missing_joints):
            warnings.append(f'{label}: {count} invalid messages skipped (wrong length or '
                            'missing joints)')
    if not states and short_arrays:
        raise BagError(f'{path}: no usable joint states on {topics.joint_states}: their '
                       'position and velocity arrays do not have one entry per name (the '
                       'filter needs both)')
    if not states:
        raise BagError(f'{path}: no usable joint states on {topics.joint_states} (joint '
                       f'names in the model: {names})')
    if not nominal:
        raise BagError(f'{path}: no usable nominal torques on {topics.nominal} (each must '
                       f'have {n} entries, one per chain joint)')
    header = np.array(header_stamps, dtype=np.int64)
    backwards = int(np.sum(np.diff(header) < 0))
    if backwards:
        warnings.append(f'joint states: header stamps go backwards {backwards} times in '
                        'recording order (messages arrived out of order); replay uses the '
                        'bag times')
    state_ns = np.array([s[0] for s in states], dtype=np.int64)
    qv = np.array([np.concatenate(s[1:]) for s in states])
    state_ns, qv = _clean_series(state_ns, qv, 'joint states', warnings)
    nominal_ns, nominal_values = _clean_series(
        np.array([x[0] for x in nominal], dtype=np.int64), np.array([x[1] for x in nominal]),
        'nominal', warnings)
    if filtered:
        filtered_ns, filtered_values = _clean_series(
            np.array([x[0] for x in filtered], dtype=np.int64),
            np.array([x[1] for x in filtered]), 'filtered', warnings)
    else:
        filtered_ns, filtered_values = np.zeros(0, dtype=np.int64), np.zeros((0, n))
    return Trial(path, state_ns * 1e-9, qv[:, :n], qv[:, n:], nominal_ns * 1e-9,
                 nominal_values, filtered_ns * 1e-9, filtered_values, warnings,
                 state_ns, nominal_ns, filtered_ns, counts)


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
    if trigger not in ('nominal', 'joint_state'):
        raise SafetyFilterError(f"trigger must be 'nominal' or 'joint_state', got {trigger!r}")
    filt = SafetyFilter(model, certificate, **filter_options)
    state_ns = _stamps_ns(trial.state_time, trial.state_stamp_ns)
    nominal_ns = _stamps_ns(trial.nominal_time, trial.nominal_stamp_ns)
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
    for k in range(count):
        s = state_index[k]
        if s < 0:
            result.mode[k] = 'stale'
            continue  # no joint state yet: the node publishes nothing
        q, v = trial.q[s], trial.v[s]
        result.q[k], result.v[k] = q, v
        result.state_age[k] = (stamps[k] - state_ns[s]) * 1e-9
        if not nominal_fresh[k]:
            result.nominal[k] = filt.hold_torque(q, v)
        if result.state_age[k] > joint_state_timeout_s:
            # The node's watchdog: the hold command at the last position, gravity only
            # (no damping from a stale velocity).
            result.torque[k] = filt.hold_torque(q, None)
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
        filtered_ns = _stamps_ns(trial.filtered_time, trial.filtered_stamp_ns)
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
    nominal_timeout_s: float = 0.1,
    **filter_options: Any,
) -> ClosedLoopResult:
    """Start the simulated arm at the recorded initial state and drive it with the recorded
    nominal commands through ``certificate``'s filter, one step per recorded nominal.

    The driver holds each torque until the next step. Where the nominal topic falls silent
    for longer than a control period, the node's watchdog keeps stepping at the control rate
    (the last nominal while it is fresh, the hold command after ``nominal_timeout_s``); the
    re-simulation does the same, so those steps appear in the result too. With
    ``gravity_convention='driver_compensated'`` the simulated driver adds ``g(q)`` to the
    filter's output, and the logged torque is the full torque applied.
    """
    if payload_mass is None:
        low, high = certificate.payload_mass_range
        payload_mass = 0.5 * (low + high)
    filt = SafetyFilter(model, certificate, payload_mass=payload_mass, **filter_options)
    driver_compensated = filt.gravity_convention == 'driver_compensated'
    simulator = ArmSimulator(model, payload_mass, internal_rate_hz)
    first = int(np.searchsorted(trial.state_time, trial.nominal_time[0], side='right')) - 1
    first = max(first, 0)
    simulator.reset(trial.q[first], trial.v[first], float(trial.nominal_time[0]))
    period = certificate.control_period_s
    nominal_times = trial.nominal_time
    count = len(nominal_times)
    t_log: list[float] = []
    q_log: list[np.ndarray] = []
    v_log: list[np.ndarray] = []
    u_log: list[np.ndarray] = []
    modes: list[str] = []

    def step(t: float, nominal: np.ndarray, hold: float) -> None:
        q, v = simulator.q, simulator.v
        out = filt.step(q, v, nominal)
        applied = out.torque + filt.dynamics.gravity_torque(q) if driver_compensated \
            else out.torque
        t_log.append(t)
        q_log.append(q)
        v_log.append(v)
        u_log.append(np.array(applied))
        modes.append(str(out.mode))
        simulator.advance(applied, max(hold, 1e-6))

    for k in range(count):
        t = float(nominal_times[k])
        end = float(nominal_times[k + 1]) if k + 1 < count else t + period
        if end - t <= 1.5 * period:
            step(t, trial.nominal[k], end - t)
            continue
        # The nominal falls silent: the watchdog steps at the control rate.
        ticks = int(np.floor((end - t) / period + 1e-9))
        for j in range(ticks):
            start = t + j * period
            hold = period if j + 1 < ticks else end - start
            nominal = (trial.nominal[k] if start - t <= nominal_timeout_s
                       else filt.hold_torque(simulator.q, simulator.v))
            step(start, nominal, hold)
    times = np.array(t_log)
    q_arr, v_arr, u_arr = np.array(q_log), np.array(v_log), np.array(u_log)
    recorded_index = np.clip(np.searchsorted(trial.state_time, times, side='right') - 1, 0,
                             len(trial.state_time) - 1)
    delta = q_arr - trial.q[recorded_index]
    return ClosedLoopResult(
        times, q_arr, v_arr, u_arr, np.array(modes, dtype=object),
        limit_violations(model, q_arr, v_arr, u_arr),
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


# ---------------------------------------------------------------------- bags on disk
def _is_rosbag2_folder(path: Path) -> bool:
    return path.is_dir() and (path / 'metadata.yaml').is_file()


def find_bags(path: str | Path, *, exclude: Iterable[str | Path] = ()) -> list[Path]:
    """The bags at ``path``: itself when it is a bag, else every bag below it, sorted.

    A bag is a rosbag2 folder (with ``metadata.yaml``; its storage files are not listed
    again) or a bare ``.mcap`` / ``.db3`` file. A file given directly is returned as it is
    (reading it says whether it is a bag). Hidden folders and the folders in ``exclude``
    (e.g. the output folder of a replay) are not searched.

    Raises:
        BagError: ``path`` does not exist.
    """
    path = Path(path)
    if not path.exists():
        raise BagError(f'{path}: no such file or folder')
    if path.is_file() or _is_rosbag2_folder(path):
        return [path]
    skip = {Path(p).resolve() for p in exclude}
    found: list[Path] = []
    for root, folders, files in os.walk(path):
        here = Path(root)
        if here.resolve() in skip:
            folders[:] = []
            continue
        if (here / 'metadata.yaml').is_file():
            found.append(here)
            folders[:] = []
            continue
        folders[:] = sorted(f for f in folders if not f.startswith('.'))
        found += [here / name for name in sorted(files)
                  if Path(name).suffix in BAG_SUFFIXES and not name.startswith('.')]
    return sorted(found)


def status_field_names(joint_names: Sequence[str]) -> list[str]:
    """Field names of a ``/replay/status`` record, in order (the node's status layout,
    :func:`safety_filter.online.status_layout.status_field_names`)."""
    return _status_layout.status_field_names(joint_names)


def _replay_records(result: ReplayResult, filtered_connection: Any, status_connection: Any,
                    fields_connection: Any = None) -> Iterator[tuple[int, int, Any, bytes]]:
    """``(stamp_ns, order, connection, cdr)`` of the replay topics, in step order: the field
    names once (on ``fields_connection``, at the first step), then per step the torque and
    the status record (values only, as the node sends them)."""
    store = _bags.typestore()
    n = result.torque.shape[1]
    names = list(result.joint_names) or [f'joint{i}' for i in range(n)]
    fields = status_field_names(names)
    torque_label = ','.join(names)
    stamps = _stamps_ns(result.time, result.stamp_ns)
    nominal_age = (result.nominal_age if result.nominal_age is not None
                   else np.zeros(len(result.time)))
    hold = (result.hold_nominal if result.hold_nominal is not None
            else np.zeros(len(result.time), dtype=bool))
    row = np.empty(len(fields))
    step = 0
    for k in np.flatnonzero(result.published):
        stamp = int(stamps[k])
        if step == 0 and fields_connection is not None:
            text = _bags.string_message(_status_layout.format_fields(fields))
            yield stamp, 1, fields_connection, store.serialize_cdr(text, _bags.STRING)
        filtered = _bags.float64_array_message(result.torque[k], torque_label)
        yield stamp, 1, filtered_connection, store.serialize_cdr(filtered, _bags.FLOAT64_ARRAY)
        row[:8] = (stamp * 1e-9, step, MODE_CODES.get(str(result.mode[k]), np.nan),
                   float(hold[k]), result.intervention[k], result.solve_time_s[k],
                   result.state_age[k], nominal_age[k])
        row[8:] = np.concatenate([result.margin[k], result.torque[k], result.nominal[k],
                                  result.q[k], result.v[k]])
        status = _bags.float64_array_message(row)
        yield stamp, 2, status_connection, store.serialize_cdr(status, _bags.FLOAT64_ARRAY)
        step += 1


def write_replay_bag(trial_path: str | Path, result: ReplayResult, out_path: str | Path,
                     storage: str = 'mcap', *, custom_data: dict[str, str] | None = None
                     ) -> Path:
    """Write a NEW bag: the input bag's every connection and message plus the replay.

    Every recorded connection is copied with its type, definition, QoS and serialisation,
    and every message raw with its bag time. Added, at the replayed step times (steps at
    which the node would have published, i.e. once a joint state was known):

    * ``/replay/filtered_torque`` (``std_msgs/Float64MultiArray``): the replayed torque;
      ``layout.dim[0].label`` is the comma-separated joint names.
    * ``/replay/status`` (``std_msgs/Float64MultiArray``): one record per step, in the
      layout of the filter node's ``~/status`` (values only); ``mode`` is a code of
      :data:`MODE_CODES` (0 filtered, 1 fallback, 2 recovering, 3 rejected, 4 stale).
    * ``/replay/status_fields`` (``std_msgs/String``, once, at the first step, offered
      transient-local as the node offers ``~/status_fields``): the comma-separated field
      names of ``/replay/status`` (:func:`status_field_names`): ``stamp_s,step,mode,
      hold_nominal,intervention,solve_time_s,joint_state_age_s,nominal_age_s,
      margin.<joint>...,torque.<joint>...,nominal.<joint>...,position.<joint>...,
      velocity.<joint>...``. :func:`safety_filter.recordings.bags.read_status` reads the pair.

    Connections of a previous replay (``/replay/...`` topics of the input) are not copied.
    The input is only read; ``out_path`` must not exist (nor lie inside the input bag).

    Args:
        trial_path: the bag that was replayed (as given to :func:`read_trial`).
        result: its :func:`replay_open_loop` result.
        out_path: the rosbag2 folder to create.
        storage: ``'mcap'`` or ``'sqlite3'``.
        custom_data: extra ``custom_data`` entries of the metadata (strings).

    Returns:
        ``out_path``.

    Raises:
        BagError: the input cannot be read, or the output cannot be written.
    """
    from rosbags.rosbag2 import StoragePlugin, Writer

    if storage not in _bags.STORAGES:
        raise BagError(f'storage must be one of {_bags.STORAGES}, got {storage!r}')
    source = Path(trial_path)
    out = Path(out_path)
    if out.exists():
        raise BagError(f'{out} exists already; a replay bag is always written to a new folder')
    source_root = _bag_location(source).resolve()
    target = out.resolve()
    if target == source_root or source_root in target.parents:
        raise BagError(f'{out} lies inside the input bag {source}; write it elsewhere')
    reader = _open_reader(source)
    plugin = StoragePlugin.MCAP if storage == 'mcap' else StoragePlugin.SQLITE3
    out.parent.mkdir(parents=True, exist_ok=True)
    writer = Writer(out, version=_bags.BAG_VERSION, storage_plugin=plugin)
    finished = False
    try:
        writer.open()
        mapping: dict[int, Any] = {}
        added: dict[tuple[str, str, str, str], Any] = {}
        dropped = []
        for connection in reader.connections:
            if connection.topic in (REPLAY_FILTERED_TOPIC, REPLAY_STATUS_TOPIC,
                                    REPLAY_STATUS_FIELDS_TOPIC):
                dropped.append(connection.topic)
                continue
            ext = connection.ext
            serialization = getattr(ext, 'serialization_format', 'cdr')
            qos = list(getattr(ext, 'offered_qos_profiles', []) or [])
            key = (connection.topic, connection.msgtype, serialization, repr(qos))
            if key not in added:
                msgdef, digest = connection.msgdef.data, connection.digest
                if not msgdef or not digest:  # older bags store no definition: rebuild it
                    msgdef, _ = reader.typestore.generate_msgdef(connection.msgtype,
                                                                 ros_version=2)
                    digest = reader.typestore.hash_rihs01(connection.msgtype)
                added[key] = writer.add_connection(
                    connection.topic, connection.msgtype, msgdef=msgdef, rihs01=digest,
                    serialization_format=serialization, offered_qos_profiles=qos)
            mapping[connection.id] = added[key]
        store = _bags.typestore()
        filtered_connection = writer.add_connection(REPLAY_FILTERED_TOPIC,
                                                    _bags.FLOAT64_ARRAY, typestore=store)
        status_connection = writer.add_connection(REPLAY_STATUS_TOPIC, _bags.FLOAT64_ARRAY,
                                                  typestore=store)
        fields_connection = writer.add_connection(
            REPLAY_STATUS_FIELDS_TOPIC, _bags.STRING, typestore=store,
            offered_qos_profiles=[_bags.latched_qos()])
        recorded = ((int(stamp), 0, mapping[c.id], raw)
                    for c, stamp, raw in reader.messages() if c.id in mapping)
        replayed = _replay_records(result, filtered_connection, status_connection,
                                   fields_connection)
        for stamp, _, connection, raw in heapq.merge(recorded, replayed,
                                                     key=lambda m: (m[0], m[1])):
            writer.write(connection, stamp, raw)
        names = list(result.joint_names) or [f'joint{i}' for i in range(result.torque.shape[1])]
        writer.set_custom_data('safety_filter.replay_of', str(source))
        writer.set_custom_data('safety_filter.status_fields', ','.join(status_field_names(names)))
        if dropped:
            writer.set_custom_data('safety_filter.dropped_topics', ','.join(sorted(set(dropped))))
        for key, value in (custom_data or {}).items():
            writer.set_custom_data(str(key), str(value))
        writer.close()
        finished = True
    except BagError:
        raise
    except Exception as err:
        raise BagError(f'cannot write the replay bag {out}: {_describe_error(err)}') from err
    finally:
        try:
            reader.close()
        except Exception:
            pass
        if not finished:
            try:
                writer.close()
            except Exception:
                pass
            shutil.rmtree(out, ignore_errors=True)  # our own half-written folder
    return out
