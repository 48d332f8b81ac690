"""A recorded trial, read from a bag for replay: joint states, nominals, filtered torques.

:func:`read_trial` reads one bag (a rosbag2 folder, or an .mcap / .db3 file, through
:func:`safety_filter.recordings.bags.open_bag`) into a :class:`Trial`: arrays in the model's
joint order, sorted by bag time, duplicates dropped, with warnings saying what was repaired.
Times: bag (log) times, kept as integer nanoseconds for pairing and writing, and given as
float seconds in the arrays (``state_time``, ...).
"""

from __future__ import annotations

from collections.abc import Sequence
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

import numpy as np

from safety_filter.core.robot_model import RobotModel
from safety_filter.errors import BagError
from safety_filter.recordings.bags import close_quietly, describe_error, open_bag, typestore


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
        firsts = [int(stamps_ns(t, s)[0]) for t, s in (
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


def stamps_ns(times: np.ndarray, stamps: np.ndarray | None) -> np.ndarray:
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
    reader = open_bag(path)
    store = typestore()
    try:
        for connection in reader.connections:
            counts[connection.topic] = counts.get(connection.topic, 0) + connection.msgcount
        available = set(counts)
        for needed in (topics.joint_states, topics.nominal):
            if needed not in available:
                raise BagError(f'{path}: topic {needed} not in the bag '
                               f'(it has {sorted(available)})', path)
        if topics.filtered not in available:
            others = sorted(t for t in available if t not in (topics.joint_states,
                                                               topics.nominal))
            warnings.append(f'no recorded filtered torques on {topics.filtered}: no agreement '
                            f'check (other topics: {others}; see --filtered-topic)')
        wanted = [c for c in reader.connections
                  if c.topic in (topics.joint_states, topics.nominal, topics.filtered)]
        for connection, stamp_ns, raw in reader.messages(connections=wanted):
            message = store.deserialize_cdr(raw, connection.msgtype)
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
        raise BagError(f'{path}: cannot read the bag: {describe_error(err)}', path) from err
    finally:
        close_quietly(reader)
    if missing_joints:
        text = (f'joint states lack the chain joint(s) {sorted(missing_joints)} '
                f'(a message names {seen_names})')
        if not states:
            raise BagError(f'{path}: {text}; no usable joint state. The chain is {names}: '
                           'choose the chain with --joints/--base-link/--tip-link, or a '
                           'bag of this arm', path)
        warnings.append(f'{text}: {invalid["joint_states"]} such messages skipped')
    for label, count in invalid.items():
        if count and not (label == 'joint_states' and missing_joints):
            warnings.append(f'{label}: {count} invalid messages skipped (wrong length or '
                            'missing joints)')
    if not states and short_arrays:
        raise BagError(f'{path}: no usable joint states on {topics.joint_states}: their '
                       'position and velocity arrays do not have one entry per name (the '
                       'filter needs both)', path)
    if not states:
        raise BagError(f'{path}: no usable joint states on {topics.joint_states} (joint '
                       f'names in the model: {names})', path)
    if not nominal:
        raise BagError(f'{path}: no usable nominal torques on {topics.nominal} (each must '
                       f'have {n} entries, one per chain joint)', path)
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
