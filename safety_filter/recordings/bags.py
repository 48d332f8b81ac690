"""The one bag reader, and the package's bag API (no ROS: the ``rosbags`` library).

The demo records its runs with :class:`~safety_filter.recordings.bag_writer.BagWriter`; replay,
the demo report and the gravity check read them back here. The topics and message types
are in :mod:`safety_filter.recordings.bag_format` (and importable from here, as the writer
is). Bags are rosbag2 folders in MCAP or SQLite 3 storage, or bare ``.mcap`` / ``.db3``
files (:func:`open_bag`, :func:`find_bags`).

Reading: :func:`topic_summary`, :func:`read_messages`, :func:`read_joint_states`,
:func:`read_float64_arrays`, :func:`read_status` and :func:`read_diagnostics` return numpy
arrays in time order; to read several topics in one pass, :func:`read_topics` and the
matching ``*_series`` / ``*_records`` functions. Status records: bags of earlier releases
have no ``status_fields`` topic; their status records name the fields in
``layout.dim[0].label``. :func:`read_status` and :func:`status_records` read both.

Times: every message has a log time (receipt on the recorder's clock) [ns];
``JointState`` also has its ``header.stamp``.
"""

from __future__ import annotations

import os
from collections.abc import Iterable, Iterator, Sequence
from dataclasses import dataclass
from pathlib import Path
from typing import Any

import numpy as np

from safety_filter.errors import BagError
from safety_filter.online.status_layout import StatusLayoutError, decode_fields, fields_topic
from safety_filter.recordings.bag_format import (  # noqa: F401 (the package's bag API)
    BAG_SUFFIXES,
    BAG_VERSION,
    DIAGNOSTIC_ARRAY,
    FLOAT64_ARRAY,
    JOINT_STATE,
    LATCHED_TOPICS,
    STORAGES,
    STRING,
    TOPIC_COMMAND,
    TOPIC_DIAGNOSTICS,
    TOPIC_JOINT_STATES,
    TOPIC_NOMINAL,
    TOPIC_STATUS,
    TOPIC_STATUS_FIELDS,
    TOPIC_TYPES,
    float64_array_message,
    joint_state_message,
    latched_qos,
    string_message,
    typestore,
)
from safety_filter.recordings.bag_writer import BagWriter, describe_error  # noqa: F401


@dataclass(frozen=True)
class TopicInfo:
    """A topic of a bag: its message type and count."""

    topic: str
    msgtype: str
    count: int


def bag_location(path: str | Path) -> Path:
    """What to open for ``path``: the rosbag2 folder of a storage file inside one, else
    ``path`` itself."""
    path = Path(path)
    if path.is_file() and path.suffix in BAG_SUFFIXES and (path.parent / 'metadata.yaml').exists():
        return path.parent
    return path


def open_bag(path: str | Path) -> Any:
    """The one way the package opens a bag for reading: an opened ``rosbags`` ``AnyReader``
    on a rosbag2 folder, a storage file inside one, or a bare ``.mcap`` / ``.db3`` file,
    with the Jazzy typestore. Close it when done. Input bags are only ever read (SQLite
    files are opened ``immutable``).

    Raises:
        BagError: no such bag, not a bag, or a bag that cannot be read (truncated, foreign).
    """
    from rosbags.highlevel import AnyReader

    path = Path(path)
    if not path.exists():
        raise BagError(f'{path}: no such bag', path)
    if path.is_dir() and not (path / 'metadata.yaml').exists():
        raise BagError(f'{path}: not a bag (a folder without metadata.yaml is not a rosbag2 '
                       'folder)', path)
    if path.is_file() and path.suffix not in BAG_SUFFIXES:
        raise BagError(f'{path}: not a bag (expected a rosbag2 folder, .mcap or .db3 file)',
                       path)
    reader = AnyReader([bag_location(path)], default_typestore=typestore())
    try:
        reader.open()
    except Exception as err:  # rosbags raises many types for truncated or foreign files
        raise BagError(f'{path}: cannot read the bag: {describe_error(err)}', path) from err
    return reader


def close_quietly(reader: Any) -> None:
    """Close a reader; one that failed half-way may not close cleanly, which is ignored."""
    try:
        reader.close()
    except Exception:
        pass


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
        raise BagError(f'{path}: no such file or folder', path)
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


def topic_summary(path: str | Path) -> dict[str, TopicInfo]:
    """Topics of a bag with their message type and count."""
    reader = open_bag(path)
    try:
        summary: dict[str, TopicInfo] = {}
        for connection in reader.connections:
            old = summary.get(connection.topic)
            count = connection.msgcount + (old.count if old else 0)
            summary[connection.topic] = TopicInfo(connection.topic, connection.msgtype, count)
        return summary
    finally:
        reader.close()


def read_messages(path: str | Path, topic: str) -> Iterator[tuple[int, Any]]:
    """``(log_time_ns, message)`` of one topic in log-time order (deserialised)."""
    reader = open_bag(path)
    try:
        store = typestore()
        connections = [c for c in reader.connections if c.topic == topic]
        if not connections:  # (rosbags reads every topic when given none)
            return
        for connection, log_time, data in reader.messages(connections=connections):
            yield log_time, store.deserialize_cdr(data, connection.msgtype)
    finally:
        reader.close()


def read_topics(path: str | Path, topics: Sequence[str] | None = None
                ) -> dict[str, list[tuple[int, Any]]]:
    """``{topic: [(log_time_ns, message), ...]}`` of several topics in one pass over the bag
    (default: every topic); topics absent from the bag are absent from the result."""
    reader = open_bag(path)
    try:
        store = typestore()
        connections = [c for c in reader.connections if topics is None or c.topic in topics]
        found: dict[str, list[tuple[int, Any]]] = {c.topic: [] for c in connections}
        if connections:
            for connection, log_time, data in reader.messages(connections=connections):
                found[connection.topic].append(
                    (log_time, store.deserialize_cdr(data, connection.msgtype)))
        return found
    finally:
        reader.close()


@dataclass
class JointStateSeries:
    """Joint states of a bag, arrays in time order, columns in ``joint_names`` order.

    Attributes:
        stamp_ns: (T,) ``header.stamp`` [ns] (int64); log_time_ns: (T,) receipt time [ns];
        joint_names: columns; position, velocity, effort: (T, n) (NaN where absent).

    Times stay integer nanoseconds: as float seconds since the epoch they would keep only
    about a quarter of a microsecond; :attr:`stamp_s` and :attr:`log_time_s` are the float
    forms.
    """

    stamp_ns: np.ndarray
    log_time_ns: np.ndarray
    joint_names: list[str]
    position: np.ndarray
    velocity: np.ndarray
    effort: np.ndarray

    @property
    def stamp_s(self) -> np.ndarray:
        """``header.stamp`` [s]."""
        return 1e-9 * self.stamp_ns

    @property
    def log_time_s(self) -> np.ndarray:
        """Receipt time [s]."""
        return 1e-9 * self.log_time_ns


def read_joint_states(path: str | Path, joint_names: Sequence[str] | None = None,
                      topic: str = TOPIC_JOINT_STATES) -> JointStateSeries:
    """The joint states of a bag, matched by joint name (default: the first message's)."""
    return joint_state_series(read_messages(path, topic), joint_names, topic)


def joint_state_series(messages: Iterable[tuple[int, Any]],
                       joint_names: Sequence[str] | None = None,
                       topic: str = TOPIC_JOINT_STATES) -> JointStateSeries:
    """:class:`JointStateSeries` of ``(log_time_ns, JointState)`` pairs (see
    :func:`read_joint_states`)."""
    stamps, logs, rows = [], [], []
    names: list[str] | None = list(joint_names) if joint_names is not None else None
    for log_time, msg in messages:
        if names is None:
            names = list(msg.name)
        index = {name: i for i, name in enumerate(msg.name)}
        missing = [name for name in names if name not in index]
        if missing:
            raise BagError(f'{topic} at {log_time} ns lacks joints {missing}')
        columns = [index[name] for name in names]

        def pick(values: np.ndarray, columns: list[int] = columns) -> np.ndarray:
            values = np.asarray(values, dtype=float)
            return values[columns] if values.size == len(index) else np.full(len(columns),
                                                                             np.nan)

        stamps.append(msg.header.stamp.sec * 1_000_000_000 + msg.header.stamp.nanosec)
        logs.append(log_time)
        rows.append((pick(msg.position), pick(msg.velocity), pick(msg.effort)))
    names = names or []
    n = len(names)
    position, velocity, effort = (np.array([row[k] for row in rows]).reshape(len(rows), n)
                                  for k in range(3))
    return JointStateSeries(np.array(stamps, dtype=np.int64), np.array(logs, dtype=np.int64),
                            names, position, velocity, effort)


@dataclass
class ArraySeries:
    """``Float64MultiArray`` messages of one topic: log_time_ns (T,) [ns, int64],
    data (T, m), the first layout dimension's label."""

    log_time_ns: np.ndarray
    data: np.ndarray
    label: str

    @property
    def log_time_s(self) -> np.ndarray:
        """Receipt time [s]."""
        return 1e-9 * self.log_time_ns


def read_float64_arrays(path: str | Path, topic: str) -> ArraySeries:
    """All ``Float64MultiArray`` messages of a topic; messages of another length than the
    first are skipped (an invalid command)."""
    return float64_array_series(read_messages(path, topic))


def float64_array_series(messages: Iterable[tuple[int, Any]]) -> ArraySeries:
    """:class:`ArraySeries` of ``(log_time_ns, Float64MultiArray)`` pairs (see
    :func:`read_float64_arrays`)."""
    times, rows = [], []
    label = ''
    width = None
    for log_time, msg in messages:
        data = np.asarray(msg.data, dtype=float)
        if width is None:
            width = data.size
            label = msg.layout.dim[0].label if msg.layout.dim else ''
        if data.size != width:
            continue
        times.append(log_time)
        rows.append(data)
    width = width or 0
    return ArraySeries(np.array(times, dtype=np.int64), np.array(rows).reshape(len(rows), width),
                       label)


def read_status(path: str | Path, topic: str = TOPIC_STATUS,
                joint_names: Sequence[str] | None = None) -> dict[str, np.ndarray]:
    """The filter's status records as ``{field name: (T,) array}`` plus ``'log_time_ns'``.

    Field names (``stamp_s``, ``mode``, ``margin.<joint>``, ...) come from the
    ``<topic>_fields`` message recorded with them, or from each record's layout label (bags
    of earlier releases), or else from ``joint_names`` (the certificate's) when given;
    empty dict when the topic is absent.
    """
    found = read_topics(path, [topic, fields_topic(topic)])
    return status_records(found.get(topic, []), topic,
                          fields=last_text(found.get(fields_topic(topic), [])),
                          joint_names=joint_names)


def last_text(messages: Iterable[tuple[int, Any]]) -> str | None:
    """The text of the last ``std_msgs/String`` of ``(log_time_ns, String)`` pairs (None
    when there is none)."""
    text = None
    for _, msg in messages:
        text = str(msg.data)
    return text


def status_records(messages: Iterable[tuple[int, Any]], topic: str = TOPIC_STATUS, *,
                   fields: str | Sequence[str] | None = None,
                   joint_names: Sequence[str] | None = None) -> dict[str, np.ndarray]:
    """The status records of ``(log_time_ns, Float64MultiArray)`` pairs (see
    :func:`read_status`).

    Args:
        messages: the records.
        topic: their topic (for errors).
        fields: the field names published on ``<topic>_fields`` (text or names), if any.
        joint_names: the chain's joints, to derive the names when neither the records nor
            ``fields`` give them.

    Raises:
        BagError: no field names, or not one per value.
    """
    series = float64_array_series(messages)
    if series.data.shape[0] == 0:
        return {}
    try:
        names = decode_fields(series.label, series.data.shape[1], fields, joint_names,
                              source=topic)
    except StatusLayoutError as err:
        raise BagError(str(err)) from err
    status = {name: series.data[:, i] for i, name in enumerate(names)}
    status['log_time_ns'] = series.log_time_ns
    return status


@dataclass(frozen=True)
class DiagnosticRecord:
    """One ``DiagnosticStatus`` of a bag."""

    log_time_s: float
    name: str
    level: int
    message: str
    values: dict[str, str]


def read_diagnostics(path: str | Path, topic: str = TOPIC_DIAGNOSTICS
                     ) -> list[DiagnosticRecord]:
    """Every status of every ``DiagnosticArray`` on ``topic``, in time order."""
    return diagnostic_records(read_messages(path, topic))


def diagnostic_records(messages: Iterable[tuple[int, Any]]) -> list[DiagnosticRecord]:
    """The statuses of ``(log_time_ns, DiagnosticArray)`` pairs (see
    :func:`read_diagnostics`)."""
    records = []
    for log_time, msg in messages:
        for status in msg.status:
            level = status.level
            level = int.from_bytes(level, 'little') if isinstance(level, bytes) else int(level)
            records.append(DiagnosticRecord(1e-9 * log_time, status.name, level,
                                            status.message,
                                            {kv.key: kv.value for kv in status.values}))
    return records
