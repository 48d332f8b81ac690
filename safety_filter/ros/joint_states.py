"""Listen to ``sensor_msgs/JointState`` for a while and keep every message (the live source
of ``safety-filter check-gravity``; the check is :mod:`safety_filter.replay.gravity_check`).

A plain node, ``safety_filter_check_gravity_<pid>``, in an rclpy context of its own,
subscribes best-effort (which matches reliable and best-effort publishers alike), keep-last
1000, and stores ``(receipt_time_ns, message)`` with a monotonic receipt time. SIGINT and
SIGTERM end the listening early; what came until then is returned.
"""

from __future__ import annotations

import os
import signal
import time
from collections.abc import Sequence
from typing import Any

import rclpy
from rclpy.executors import SingleThreadedExecutor
from rclpy.node import Node
from rclpy.qos import DurabilityPolicy, HistoryPolicy, QoSProfile, ReliabilityPolicy
from rclpy.signals import SignalHandlerOptions
from sensor_msgs.msg import JointState

from safety_filter.replay.gravity_check import JointStateSamples, pair_samples, require_chain


def listen_qos() -> QoSProfile:
    """Best-effort, volatile, keep-last 1000: takes what any publisher sends."""
    return QoSProfile(history=HistoryPolicy.KEEP_LAST, depth=1000,
                      reliability=ReliabilityPolicy.BEST_EFFORT,
                      durability=DurabilityPolicy.VOLATILE)


def collect_joint_states(topic: str, duration_s: float, domain_id: int | None = None,
                         node_name: str | None = None) -> list[tuple[int, Any]]:
    """``(receipt_time_ns, JointState)`` of ``topic`` heard during ``duration_s`` [s]."""
    received: list[tuple[int, Any]] = []
    stop = {'raised': False}

    def on_signal(signum: int, frame: Any) -> None:
        stop['raised'] = True

    previous = {signum: signal.signal(signum, on_signal)
                for signum in (signal.SIGINT, signal.SIGTERM)}
    context = rclpy.context.Context()
    node = None
    executor = None
    try:
        rclpy.init(args=['check_gravity'], context=context, domain_id=domain_id,
                   signal_handler_options=SignalHandlerOptions.NO)
        node = Node(node_name or f'safety_filter_check_gravity_{os.getpid()}',
                    context=context)
        node.create_subscription(
            JointState, topic, lambda msg: received.append((time.monotonic_ns(), msg)),
            listen_qos())
        executor = SingleThreadedExecutor(context=context)
        executor.add_node(node)
        deadline = time.monotonic() + duration_s
        while context.ok() and not stop['raised'] and time.monotonic() < deadline:
            executor.spin_once(timeout_sec=0.05)
    finally:
        for signum, handler in previous.items():
            signal.signal(signum, handler)
        if executor is not None:
            executor.shutdown(timeout_sec=1.0)
        if node is not None:
            node.destroy_node()
        context.try_shutdown()
    return received


def listen_chain_samples(topic: str, duration_s: float, joint_names: Sequence[str],
                         domain_id: int | None = None) -> tuple[JointStateSamples, str]:
    """The joint states heard on ``topic`` during ``duration_s`` [s], mapped onto the chain
    ``joint_names``, and where they came from (``'<topic> (live, <duration> s)'``).

    Raises:
        BagError: no joint state heard, or none carrying every chain joint.
    """
    messages = collect_joint_states(topic, duration_s, domain_id=domain_id)
    where = f'{topic} (live, {duration_s:g} s)'
    return require_chain(pair_samples(messages, joint_names), where), where
