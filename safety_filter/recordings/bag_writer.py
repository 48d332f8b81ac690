"""The one bag writer: :class:`BagWriter` writes a new rosbag2 bag (no ROS needed).

It takes either messages built with the Jazzy typestore
(:func:`~safety_filter.recordings.bag_format.joint_state_message`,
:func:`~safety_filter.recordings.bag_format.float64_array_message`, or any
``typestore().types`` class), serialised here, or CDR bytes a subscriber received (the same
bytes rosbag2 stores). It can also copy another bag's connections and messages as they are
(:meth:`BagWriter.copy_connection`, :meth:`BagWriter.write_raw`): the replay bag is a copy
of the input bag with topics added (:mod:`safety_filter.replay.replay_bag`).

Latched topics (``latched``; the status field names) are written with the transient-local
offered QoS they were published with, so that ``ros2 bag play`` offers them to late
subscribers as the node did.
"""

from __future__ import annotations

import shutil
from collections.abc import Sequence
from pathlib import Path
from typing import Any

from safety_filter.errors import BagError
from safety_filter.recordings.bag_format import (
    BAG_VERSION,
    LATCHED_TOPICS,
    STORAGES,
    float64_array_message,
    joint_state_message,
    latched_qos,
    typestore,
)


def describe_error(err: BaseException) -> str:
    """``'Type: message'`` of an exception a library raised (rosbags raises many types)."""
    text = str(err).strip() or 'no detail'
    return f'{type(err).__name__}: {text}'


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
            raise BagError(f'storage must be one of {STORAGES}, got {storage!r}', path)
        self.path = Path(path)
        if self.path.exists():
            raise BagError(f'{self.path} exists already; rosbag2 writes a new folder',
                           self.path)
        self.path.parent.mkdir(parents=True, exist_ok=True)
        plugin = StoragePlugin.MCAP if storage == 'mcap' else StoragePlugin.SQLITE3
        self.storage = storage
        self._writer = Writer(self.path, version=BAG_VERSION, storage_plugin=plugin)
        try:
            self._writer.open()
        except Exception as err:
            raise BagError(f'cannot open {self.path} for writing: {err}', self.path) from err
        self._connections: dict[str, Any] = {}
        self._copied: dict[tuple[str, str, str, str], Any] = {}
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
                raise BagError(f'unknown message type {msgtype!r} (not in the Jazzy typestore)',
                               self.path)
            qos = [latched_qos()] if topic in self._latched else []
            connection = self._writer.add_connection(topic, msgtype, typestore=store,
                                                     offered_qos_profiles=qos)
            self._connections[topic] = connection
            self._types[topic] = msgtype
            self.counts[topic] = 0
        elif self._types[topic] != msgtype:
            raise BagError(f'topic {topic} was written as {self._types[topic]}, not {msgtype}',
                           self.path)
        return connection

    def write_cdr(self, topic: str, msgtype: str, log_time_ns: int,
                  data: bytes | memoryview) -> None:
        """Write a CDR-serialised message (as a ROS 2 subscriber receives it) [ns]."""
        self._check_open()
        self._writer.write(self._connection(topic, msgtype), int(log_time_ns), data)
        self.counts[topic] += 1

    def _check_open(self) -> None:
        if not self._open:
            raise BagError(f'{self.path} is closed', self.path)

    def copy_connection(self, connection: Any, source_typestore: Any) -> Any:
        """A connection of this bag like ``connection`` of another bag (its topic, type,
        definition, serialisation and offered QoS); connections that differ in none of
        these share one. ``source_typestore`` rebuilds a definition older bags did not
        store. Returns the new connection, for :meth:`write_raw`."""
        ext = connection.ext
        serialization = getattr(ext, 'serialization_format', 'cdr')
        qos = list(getattr(ext, 'offered_qos_profiles', []) or [])
        key = (connection.topic, connection.msgtype, serialization, repr(qos))
        if key not in self._copied:
            msgdef, digest = connection.msgdef.data, connection.digest
            if not msgdef or not digest:  # older bags store no definition: rebuild it
                msgdef, _ = source_typestore.generate_msgdef(connection.msgtype, ros_version=2)
                digest = source_typestore.hash_rihs01(connection.msgtype)
            self._copied[key] = self._writer.add_connection(
                connection.topic, connection.msgtype, msgdef=msgdef, rihs01=digest,
                serialization_format=serialization, offered_qos_profiles=qos)
        return self._copied[key]

    def add_connection(self, topic: str, msgtype: str) -> Any:
        """The connection of ``topic`` (a Jazzy type; latched topics with the latched QoS),
        for :meth:`write_raw`."""
        return self._connection(topic, msgtype)

    def write_raw(self, connection: Any, log_time_ns: int, data: bytes | memoryview) -> None:
        """Write serialised bytes on a connection of :meth:`copy_connection` or
        :meth:`add_connection` [ns]."""
        self._check_open()
        self._writer.write(connection, int(log_time_ns), data)
        self.counts[connection.topic] = self.counts.get(connection.topic, 0) + 1

    def set_custom_data(self, key: str, value: str) -> None:
        """A ``custom_data`` entry of the bag's metadata (strings)."""
        self._writer.set_custom_data(str(key), str(value))

    def discard(self) -> None:
        """Close and delete the bag (a write that failed half-way); never raises."""
        try:
            self.close()
        except Exception:  # a writer that failed half-way may not close cleanly
            pass
        shutil.rmtree(self.path, ignore_errors=True)

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
