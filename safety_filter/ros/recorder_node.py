"""A bag recorder node (``bag_recorder``) for the demo's topics, without ``rosbag2_py``.

It subscribes to each topic it is given and writes every message to a rosbag2 bag through
:class:`safety_filter.recordings.bags.BagWriter` (MCAP by default, SQLite 3 on request), with the
ROS 2 Jazzy message definitions and type hashes of the ``rosbags`` typestore, so that
``ros2 bag``, Foxglove and ``rosbags`` read it. Subscriptions are *raw*: the node stores
the CDR bytes it receives, which are the bytes ``ros2 bag record`` would store, without
deserialising and serialising every message again (at 1 kHz in Python that would cost a
good part of a core).

Log times are the receipt times on the node's clock (simulated time under
``use_sim_time``). Queues are deep (1000) and reliable so that nothing is lost when the
node falls behind for a moment. Latched topics (sent once, transient-local: the filter's
``~/status_fields``) are subscribed transient-local, so that their message arrives even when
it was sent before the recorder subscribed, and recorded with that offered QoS.

Parameters (read at start): ``bag_path`` (the bag folder to create; must not exist),
``storage`` (``'mcap'`` or ``'sqlite3'``), ``topics`` (absolute topic names; default
:data:`safety_filter.recordings.bags.TOPIC_TYPES`), ``types`` (their message types, same order;
may be
left empty for the known topics), ``latched_topics`` (those of ``topics`` that are latched;
default :data:`safety_filter.recordings.bags.LATCHED_TOPICS`).
"""

from __future__ import annotations

import importlib
import sys
from collections.abc import Sequence
from typing import Any

from rclpy.node import Node
from rclpy.qos import DurabilityPolicy, HistoryPolicy, QoSProfile, ReliabilityPolicy

from safety_filter.errors import InvalidValue, ShapeMismatch
from safety_filter.recordings.bags import LATCHED_TOPICS, TOPIC_TYPES, BagWriter
from safety_filter.ros._common import describe, spin_node

NODE_NAME = 'bag_recorder'
QUEUE_DEPTH = 1000


def message_class(msgtype: str) -> Any:
    """The rclpy message class of a type name like ``sensor_msgs/msg/JointState``."""
    parts = msgtype.split('/')
    if len(parts) != 3 or parts[1] != 'msg':
        raise InvalidValue('message type', msgtype, 'a name like sensor_msgs/msg/JointState')
    try:
        return getattr(importlib.import_module(f'{parts[0]}.msg'), parts[2])
    except (ImportError, AttributeError) as err:
        raise InvalidValue('message type', msgtype, 'an installed message type',
                           detail=f'message type {msgtype} is not installed') from err


class BagRecorderNode(Node):
    """The node ``bag_recorder`` (see the module docstring); call :meth:`close` to finish
    the bag (the executable does so on SIGINT/SIGTERM).

    Raises:
        InvalidValue: invalid parameters.
        BagError: the bag cannot be created.
    """

    def __init__(self, node_name: str = NODE_NAME, **kwargs: Any) -> None:
        super().__init__(node_name, **kwargs)
        self.declare_parameter('bag_path', '', describe('bag folder to create'))
        self.declare_parameter('storage', 'mcap', describe("'mcap' or 'sqlite3'"))
        self.declare_parameter('topics', list(TOPIC_TYPES), describe('topics to record'))
        self.declare_parameter('types', [''], describe(
            'message types of the topics (same order); empty for the known topics'))
        self.declare_parameter('latched_topics', list(LATCHED_TOPICS) or [''], describe(
            'topics of topics published once, transient-local (subscribed and recorded so)'))
        path = str(self.get_parameter('bag_path').value)
        if not path:
            raise InvalidValue('bag_path', path, 'a bag folder to create',
                               detail='bag_path is not set')
        topics = [str(t) for t in self.get_parameter('topics').value]
        types = [str(t) for t in self.get_parameter('types').value if str(t)]
        if types and len(types) != len(topics):
            raise ShapeMismatch('types', len(topics), len(types),
                                detail=f'{len(types)} types for {len(topics)} topics')
        if not types:
            unknown = [t for t in topics if t not in TOPIC_TYPES]
            if unknown:
                raise InvalidValue('types', types, f'the types of {unknown}',
                                   detail=f'give the types of {unknown} (parameter types)')
            types = [TOPIC_TYPES[t] for t in topics]
        classes = [message_class(t) for t in types]
        latched = [str(t) for t in self.get_parameter('latched_topics').value if str(t)]
        self.writer = BagWriter(path, str(self.get_parameter('storage').value),
                                latched=latched)
        qos = QoSProfile(history=HistoryPolicy.KEEP_LAST, depth=QUEUE_DEPTH,
                         reliability=ReliabilityPolicy.RELIABLE,
                         durability=DurabilityPolicy.VOLATILE)
        # Transient-local only where the publisher offers it: a transient-local subscription
        # does not match a volatile publisher.
        latched_qos = QoSProfile(history=HistoryPolicy.KEEP_LAST, depth=1,
                                 reliability=ReliabilityPolicy.RELIABLE,
                                 durability=DurabilityPolicy.TRANSIENT_LOCAL)
        for topic, msgtype, cls in zip(topics, types, classes):
            self.create_subscription(cls, topic, self._callback(topic, msgtype),
                                     latched_qos if topic in latched else qos, raw=True)
        self.get_logger().info(f'recording {topics} to {path}')

    def _callback(self, topic: str, msgtype: str) -> Any:
        write = self.writer.write_cdr
        clock = self.get_clock()

        def on_message(data: bytes) -> None:
            write(topic, msgtype, clock.now().nanoseconds, data)

        return on_message

    @property
    def counts(self) -> dict[str, int]:
        """Messages written per topic so far."""
        return dict(self.writer.counts)

    def close(self) -> None:
        """Finish the bag (idempotent)."""
        self.writer.close()


def main(args: Sequence[str] | None = None) -> int:
    """Record until SIGINT/SIGTERM, then finish the bag."""
    return spin_node(lambda context: BagRecorderNode(context=context), args)


if __name__ == '__main__':
    sys.exit(main())
