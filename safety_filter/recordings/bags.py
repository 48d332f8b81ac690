"""Writing and reading rosbag2 files of our topics, without ROS (the ``rosbags`` library).

The demo records its runs with these helpers and replay reads them back. Bags are rosbag2
folders (``metadata.yaml`` plus the storage file) in MCAP (default) or SQLite 3 storage,
with the ROS 2 Jazzy message definitions and type hashes, so that ``ros2 bag``, Foxglove and
``rosbags`` itself can read them.

Topics of a safety-filter graph (:data:`TOPIC_TYPES`):

* ``/joint_states`` (``sensor_msgs/msg/JointState``): the arm's state;
* ``/nominal_torque`` (``std_msgs/msg/Float64MultiArray``): the command source's torque;
* ``/sim_effort_command`` (``std_msgs/msg/Float64MultiArray``): what the driver was sent (the
  filter's ``filtered_torque``, remapped);
* ``/diagnostics`` (``diagnostic_msgs/msg/DiagnosticArray``): the filter's diagnostics;
* ``/safety_filter/status`` (``std_msgs/msg/Float64MultiArray``): one record per filter
  step, values only;
* ``/safety_filter/status_fields`` (``std_msgs/msg/String``): their field names, sent once
  by the node (transient-local; :mod:`safety_filter.online.status_layout`). Bags of earlier
  releases have no such topic: their status records name the fields in
  ``layout.dim[0].label``. :func:`read_status` and :func:`status_records` read both.

Writing: :class:`BagWriter` takes either messages built with the Jazzy typestore
(:func:`joint_state_message`, :func:`float64_array_message`, or any ``typestore().types``
class), serialised here with :meth:`Typestore.serialize_cdr`, or CDR bytes a subscriber
received (the same bytes rosbag2 stores). Reading: :func:`topic_summary`,
:func:`read_messages`, :func:`read_joint_states`, :func:`read_float64_arrays`,
:func:`read_status` and :func:`read_diagnostics` return numpy arrays in time order; to read
several topics in one pass, :func:`read_topics` and the matching ``*_series`` /
``*_records`` functions.

Latched topics (``latched`` of :class:`BagWriter`; the status field names) are written with
the transient-local offered QoS they were published with, so that ``ros2 bag play`` offers
them to late subscribers as the node did.

Times: every message has a log time (receipt on the recorder's clock) [ns];
``JointState`` also has its ``header.stamp``.
"""

from __future__ import annotations

import functools
from collections.abc import Iterable, Iterator, Sequence
from dataclasses import dataclass
from pathlib import Path
from typing import Any

import numpy as np

from safety_filter.errors import BagError
from safety_filter.online.status_layout import StatusLayoutError, decode_fields, fields_topic

TOPIC_JOINT_STATES = '/joint_states'
TOPIC_NOMINAL = '/nominal_torque'
TOPIC_COMMAND = '/sim_effort_command'
TOPIC_DIAGNOSTICS = '/diagnostics'
TOPIC_STATUS = '/safety_filter/status'
TOPIC_STATUS_FIELDS = fields_topic(TOPIC_STATUS)  # '/safety_filter/status_fields'

JOINT_STATE = 'sensor_msgs/msg/JointState'
FLOAT64_ARRAY = 'std_msgs/msg/Float64MultiArray'
DIAGNOSTIC_ARRAY = 'diagnostic_msgs/msg/DiagnosticArray'
STRING = 'std_msgs/msg/String'

TOPIC_TYPES = {
    TOPIC_JOINT_STATES: JOINT_STATE,
    TOPIC_NOMINAL: FLOAT64_ARRAY,
    TOPIC_COMMAND: FLOAT64_ARRAY,
    TOPIC_DIAGNOSTICS: DIAGNOSTIC_ARRAY,
    TOPIC_STATUS: FLOAT64_ARRAY,
    TOPIC_STATUS_FIELDS: STRING,
}
# Topics published once with transient-local durability (recorded with that offered QoS).
LATCHED_TOPICS = (TOPIC_STATUS_FIELDS,)
STORAGES = ('mcap', 'sqlite3')
BAG_VERSION = 9  # the rosbag2 metadata version of ROS 2 Jazzy



@functools.lru_cache(maxsize=1)
def typestore() -> Any:
    """The ``rosbags`` typestore of ROS 2 Jazzy (message classes, definitions, hashes)."""
    from rosbags.typesys import Stores, get_typestore

    return get_typestore(Stores.ROS2_JAZZY)


def _split_ns(nanoseconds: int) -> tuple[int, int]:
    seconds, rest = divmod(int(nanoseconds), 1_000_000_000)
    return seconds, rest


def joint_state_message(stamp_ns: int, names: Sequence[str], position: Sequence[float],
                        velocity: Sequence[float] = (), effort: Sequence[float] = (),
                        frame_id: str = '') -> Any:
    """A ``sensor_msgs/msg/JointState`` of the Jazzy typestore.

    Args:
        stamp_ns: ``header.stamp`` [ns]; names: joint names; position [rad or m],
        velocity [rad/s or m/s], effort [N m or N]: one entry per name, or empty.
    """
    types = typestore().types
    sec, nanosec = _split_ns(stamp_ns)
    header = types['std_msgs/msg/Header'](
        stamp=types['builtin_interfaces/msg/Time'](sec=sec, nanosec=nanosec),
        frame_id=frame_id)
    return types[JOINT_STATE](
        header=header, name=[str(x) for x in names],
        position=np.asarray(position, dtype=np.float64).reshape(-1),
        velocity=np.asarray(velocity, dtype=np.float64).reshape(-1),
        effort=np.asarray(effort, dtype=np.float64).reshape(-1))


def latched_qos() -> Any:
    """The offered QoS of a latched topic as rosbag2 records it: reliable, transient-local,
    keep-last 1 (a ``rosbags`` ``Qos``)."""
    from rosbags.rosbag2.metadata import (
        Qos,
        QosDurability,
        QosHistory,
        QosLiveliness,
        QosReliability,
        QosTime,
    )

    forever = QosTime(sec=0x7FFFFFFF, nsec=0xFFFFFFFF)  # rosbag2's "infinite" duration
    return Qos(history=QosHistory.KEEP_LAST, depth=1, reliability=QosReliability.RELIABLE,
               durability=QosDurability.TRANSIENT_LOCAL, deadline=forever, lifespan=forever,
               liveliness=QosLiveliness.AUTOMATIC, liveliness_lease_duration=forever,
               avoid_ros_namespace_conventions=False)


def string_message(text: str) -> Any:
    """A ``std_msgs/msg/String`` of the Jazzy typestore."""
    return typestore().types[STRING](data=str(text))


def float64_array_message(values: Sequence[float], label: str = '') -> Any:
    """A ``std_msgs/msg/Float64MultiArray`` with one layout dimension named ``label``."""
    types = typestore().types
    data = np.asarray(values, dtype=np.float64).reshape(-1)
    layout = types['std_msgs/msg/MultiArrayLayout'](
        dim=[types['std_msgs/msg/MultiArrayDimension'](
            label=label, size=int(data.size), stride=int(data.size))] if label else [],
        data_offset=0)
    return types[FLOAT64_ARRAY](layout=layout, data=data)


class BagWriter:
    """Writes one rosbag2 bag; connections are added on the first message of each topic.

    Args:
        path: the bag folder to create (must not exist).
        storage: ``'mcap'`` or ``'sqlite3'``.
        latched: topics recorded with the transient-local offered QoS of a latched topic
            (default :data:`LATCHED_TOPICS`).

    Use as a context manager, or call :meth:`close` (the bag is unreadable until then).
    """

    def __init__(self, path: str | Path, storage: str = 'mcap',
                 latched: Sequence[str] = LATCHED_TOPICS) -> None:
        from rosbags.rosbag2 import StoragePlugin, Writer

        if storage not in STORAGES:
            raise BagError(f'storage must be one of {STORAGES}, got {storage!r}')
        self.path = Path(path)
        if self.path.exists():
            raise BagError(f'{self.path} exists already; rosbag2 writes a new folder')
        self.path.parent.mkdir(parents=True, exist_ok=True)
        plugin = StoragePlugin.MCAP if storage == 'mcap' else StoragePlugin.SQLITE3
        self.storage = storage
        self._writer = Writer(self.path, version=BAG_VERSION, storage_plugin=plugin)
        try:
            self._writer.open()
        except Exception as err:
            raise BagError(f'cannot open {self.path} for writing: {err}') from err
        self._connections: dict[str, Any] = {}
        self._types: dict[str, str] = {}
        self._latched = frozenset(latched)
        self.counts: dict[str, int] = {}
        self._open = True

    def __enter__(self) -> BagWriter:
        return self

    def __exit__(self, *exc: object) -> None:
        self.close()

    def _connection(self, topic: str, msgtype: str) -> Any:
        connection = self._connections.get(topic)
        if connection is None:
            store = typestore()
            if msgtype not in store.types:
                raise BagError(f'unknown message type {msgtype!r} (not in the Jazzy typestore)')
            qos = [latched_qos()] if topic in self._latched else []
            connection = self._writer.add_connection(topic, msgtype, typestore=store,
                                                     offered_qos_profiles=qos)
            self._connections[topic] = connection
            self._types[topic] = msgtype
            self.counts[topic] = 0
        elif self._types[topic] != msgtype:
            raise BagError(f'topic {topic} was written as {self._types[topic]}, not {msgtype}')
        return connection

    def write_cdr(self, topic: str, msgtype: str, log_time_ns: int,
                  data: bytes | memoryview) -> None:
        """Write a CDR-serialised message (as a ROS 2 subscriber receives it) [ns]."""
        if not self._open:
            raise BagError(f'{self.path} is closed')
        self._writer.write(self._connection(topic, msgtype), int(log_time_ns), data)
        self.counts[topic] += 1

    def write(self, topic: str, log_time_ns: int, message: Any) -> None:
        """Serialise a typestore message with the Jazzy typestore and write it [ns]."""
        msgtype = getattr(message, '__msgtype__', None)
        if not isinstance(msgtype, str):
            raise BagError(f'not a typestore message: {type(message).__name__}')
        self.write_cdr(topic, msgtype, log_time_ns, typestore().serialize_cdr(message, msgtype))

    def write_joint_state(self, topic: str, log_time_ns: int, stamp_ns: int,
                          names: Sequence[str], position: Sequence[float],
                          velocity: Sequence[float] = (), effort: Sequence[float] = ()) -> None:
        """Write a ``JointState`` (see :func:`joint_state_message`)."""
        self.write(topic, log_time_ns,
                   joint_state_message(stamp_ns, names, position, velocity, effort))

    def write_float64_array(self, topic: str, log_time_ns: int, values: Sequence[float],
                            label: str = '') -> None:
        """Write a ``Float64MultiArray`` (see :func:`float64_array_message`)."""
        self.write(topic, log_time_ns, float64_array_message(values, label))

    def close(self) -> None:
        """Finish the bag (writes ``metadata.yaml``); idempotent."""
        if self._open:
            self._open = False
            self._writer.close()


# ---------------------------------------------------------------------- reading
@dataclass(frozen=True)
class TopicInfo:
    """A topic of a bag: its message type and count."""

    topic: str
    msgtype: str
    count: int


def _reader(path: str | Path) -> Any:
    from rosbags.rosbag2 import Reader

    path = Path(path)
    if not (path / 'metadata.yaml').is_file():
        raise BagError(f'{path} is not a rosbag2 folder (no metadata.yaml)')
    try:
        reader = Reader(path)
        reader.open()
    except Exception as err:
        raise BagError(f'cannot read the bag {path}: {err}') from err
    return reader


def topic_summary(path: str | Path) -> dict[str, TopicInfo]:
    """Topics of a bag with their message type and count."""
    reader = _reader(path)
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
    reader = _reader(path)
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
    reader = _reader(path)
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
