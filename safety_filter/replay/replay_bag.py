"""The replay bag: a copy of the input bag with the replayed torques and status added.

:func:`write_replay_bag` writes it with the package's one bag writer
(:class:`safety_filter.recordings.bag_writer.BagWriter`), reading the input with its one
reader (:func:`safety_filter.recordings.bags.open_bag`); the input is only ever read.
"""

from __future__ import annotations

import heapq
from collections.abc import Iterator, Sequence
from pathlib import Path
from typing import Any

import numpy as np

from safety_filter.errors import BagError
from safety_filter.online import status_layout as _status_layout
from safety_filter.online.mode_codes import MODE_CODES
from safety_filter.recordings.bags import (
    FLOAT64_ARRAY,
    STRING,
    BagWriter,
    bag_location,
    close_quietly,
    describe_error,
    float64_array_message,
    open_bag,
    string_message,
    typestore,
)
from safety_filter.replay.open_loop import ReplayResult
from safety_filter.replay.trial import stamps_ns

REPLAY_FILTERED_TOPIC = '/replay/filtered_torque'
REPLAY_STATUS_TOPIC = '/replay/status'
REPLAY_STATUS_FIELDS_TOPIC = _status_layout.fields_topic(REPLAY_STATUS_TOPIC)
REPLAY_TOPICS = (REPLAY_FILTERED_TOPIC, REPLAY_STATUS_TOPIC, REPLAY_STATUS_FIELDS_TOPIC)


def status_field_names(joint_names: Sequence[str]) -> list[str]:
    """Field names of a ``/replay/status`` record, in order (the node's status layout,
    :func:`safety_filter.online.status_layout.status_field_names`)."""
    return _status_layout.status_field_names(joint_names)


def _replay_records(result: ReplayResult, filtered_connection: Any, status_connection: Any,
                    fields_connection: Any = None) -> Iterator[tuple[int, int, Any, bytes]]:
    """``(stamp_ns, order, connection, cdr)`` of the replay topics, in step order: the field
    names once (on ``fields_connection``, at the first step), then per step the torque and
    the status record (values only, as the node sends them)."""
    store = typestore()
    n = result.torque.shape[1]
    names = list(result.joint_names) or [f'joint{i}' for i in range(n)]
    fields = status_field_names(names)
    torque_label = ','.join(names)
    stamps = stamps_ns(result.time, result.stamp_ns)
    nominal_age = (result.nominal_age if result.nominal_age is not None
                   else np.zeros(len(result.time)))
    hold = (result.hold_nominal if result.hold_nominal is not None
            else np.zeros(len(result.time), dtype=bool))
    row = np.empty(len(fields))
    step = 0
    for k in np.flatnonzero(result.published):
        stamp = int(stamps[k])
        if step == 0 and fields_connection is not None:
            text = string_message(_status_layout.format_fields(fields))
            yield stamp, 1, fields_connection, store.serialize_cdr(text, STRING)
        filtered = float64_array_message(result.torque[k], torque_label)
        yield stamp, 1, filtered_connection, store.serialize_cdr(filtered, FLOAT64_ARRAY)
        _status_layout.pack_status(
            row, stamp_s=stamp * 1e-9, step=step,
            mode=MODE_CODES.get(str(result.mode[k]), np.nan), hold_nominal=bool(hold[k]),
            intervention=result.intervention[k], solve_time_s=result.solve_time_s[k],
            joint_state_age_s=result.state_age[k], nominal_age_s=nominal_age[k],
            margin=result.margin[k], torque=result.torque[k], nominal=result.nominal[k],
            position=result.q[k], velocity=result.v[k])
        status = float64_array_message(row)
        yield stamp, 2, status_connection, store.serialize_cdr(status, FLOAT64_ARRAY)
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
      :data:`safety_filter.online.mode_codes.MODE_CODES` (0 filtered, 1 fallback,
      2 recovering, 3 rejected, 4 stale).
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
    source = Path(trial_path)
    out = Path(out_path)
    if out.exists():
        raise BagError(f'{out} exists already; a replay bag is always written to a new folder',
                       out)
    source_root = bag_location(source).resolve()
    target = out.resolve()
    if target == source_root or source_root in target.parents:
        raise BagError(f'{out} lies inside the input bag {source}; write it elsewhere', out)
    reader = open_bag(source)
    writer: BagWriter | None = None
    try:
        writer = BagWriter(out, storage, latched=(REPLAY_STATUS_FIELDS_TOPIC,))
        mapping: dict[int, Any] = {}
        dropped = []
        for connection in reader.connections:
            if connection.topic in REPLAY_TOPICS:
                dropped.append(connection.topic)
                continue
            mapping[connection.id] = writer.copy_connection(connection, reader.typestore)
        filtered_connection = writer.add_connection(REPLAY_FILTERED_TOPIC, FLOAT64_ARRAY)
        status_connection = writer.add_connection(REPLAY_STATUS_TOPIC, FLOAT64_ARRAY)
        fields_connection = writer.add_connection(REPLAY_STATUS_FIELDS_TOPIC, STRING)
        recorded = ((int(stamp), 0, mapping[c.id], raw)
                    for c, stamp, raw in reader.messages() if c.id in mapping)
        replayed = _replay_records(result, filtered_connection, status_connection,
                                   fields_connection)
        for stamp, _, connection, raw in heapq.merge(recorded, replayed,
                                                     key=lambda m: (m[0], m[1])):
            writer.write_raw(connection, stamp, raw)
        names = list(result.joint_names) or [f'joint{i}' for i in range(result.torque.shape[1])]
        writer.set_custom_data('safety_filter.replay_of', str(source))
        writer.set_custom_data('safety_filter.status_fields', ','.join(status_field_names(names)))
        if dropped:
            writer.set_custom_data('safety_filter.dropped_topics', ','.join(sorted(set(dropped))))
        for key, value in (custom_data or {}).items():
            writer.set_custom_data(str(key), str(value))
        writer.close()
        writer = None
    except BagError:
        raise
    except Exception as err:
        raise BagError(f'cannot write the replay bag {out}: {describe_error(err)}', out) from err
    finally:
        close_quietly(reader)
        if writer is not None:
            writer.discard()  # our own half-written folder
    return out
