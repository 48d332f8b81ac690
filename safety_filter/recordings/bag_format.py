"""The bag format of our topics: topic names, message types, the Jazzy typestore, messages.

What a bag of a safety-filter graph holds, shared by the writer
(:mod:`safety_filter.recordings.bag_writer`) and the reader (:mod:`safety_filter.recordings.bags`):

* ``/joint_states`` (``sensor_msgs/msg/JointState``): the arm's state;
* ``/nominal_torque`` (``std_msgs/msg/Float64MultiArray``): the command source's torque;
* ``/sim_effort_command`` (``std_msgs/msg/Float64MultiArray``): what the driver was sent (the
  filter's ``filtered_torque``, remapped);
* ``/diagnostics`` (``diagnostic_msgs/msg/DiagnosticArray``): the filter's diagnostics;
* ``/safety_filter/status`` (``std_msgs/msg/Float64MultiArray``): one record per filter
  step, values only;
* ``/safety_filter/status_fields`` (``std_msgs/msg/String``): their field names, sent once
  by the node (transient-local; :mod:`safety_filter.online.status_layout`).

Bags are rosbag2 folders (``metadata.yaml`` plus the storage file) in MCAP (default) or
SQLite 3 storage, with the ROS 2 Jazzy message definitions and type hashes, so that
``ros2 bag``, Foxglove and ``rosbags`` itself can read them; bare ``.mcap`` / ``.db3``
files are read too (:data:`BAG_SUFFIXES`).
"""

from __future__ import annotations

import functools
from collections.abc import Sequence
from typing import Any

import numpy as np

from safety_filter.online.status_layout import fields_topic

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
BAG_SUFFIXES = ('.mcap', '.db3')  # storage files that are bags by themselves



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
