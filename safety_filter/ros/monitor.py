"""Watch a running filter live: a terminal monitor over DDS, and an event log.

``safety-filter monitor`` (or the ``filter_monitor`` executable) starts a plain node,
``safety_filter_monitor_<pid>``, that subscribes to the filter node's ``/diagnostics``
status ``'<fully qualified node name>: filter'`` (or ``'<base name>: filter'``, the name of
earlier releases), its ``~/status`` array and that array's field names on
``~/status_fields`` (all documented in :mod:`safety_filter.ros.filter_node`) and redraws a
screen at ``--refresh-rate`` (4 Hz): state (diagnostics level) and mode; per joint position,
velocity and torque against their limits (bars and percentages) and the barrier margin;
intervention; solve times; fallback and recovery counts; input ages; certificate id; the
last events. Alarm lines start with ``!!`` (red on a terminal): a margin below
``--thin-margin``, the joint-state watchdog tripped, level ERROR or STALE, a certificate
other than ``--certificate``.

The limits come from ``--certificate`` (the certificate parameter file) or, without it, from
the filter node's parameters (read once through its ``get_parameters`` service when it
appears). Without either, values are shown with ``?`` for bars and percentages.

The screen is drawn with Rich (:mod:`safety_filter.monitor.screen`): on a terminal it is
repainted in place and follows the window's size; it needs no mouse or special terminal
features, so it works over SSH and in tmux. When stdout is not a terminal (or ``TERM`` is
dumb, or with ``--plain``) each frame is printed after a separator line, without escape
codes. When nothing is heard from the filter for ``--absent-after`` (2 s) the screen says so
and waits.

The monitor is meant to cost the filter nothing: ``~/status`` is subscribed best-effort (no
acknowledgements or resends asked of the filter's publisher), ``/diagnostics`` with the
default reliable QoS of diagnostics.

Events (:mod:`safety_filter.monitor.state` lists the kinds and keys) go to ``--event-log``
as JSON lines, flushed as they happen (:mod:`safety_filter.recordings.event_log`).
``--duration`` stops after that many seconds; Ctrl-C (SIGINT) and SIGTERM stop cleanly.
"""

from __future__ import annotations

import argparse
import os
import signal
import sys
import time
from collections.abc import Sequence
from typing import IO, Any

import rclpy
from diagnostic_msgs.msg import DiagnosticArray
from rcl_interfaces.srv import GetParameters
from rclpy.clock import Clock, ClockType
from rclpy.node import Node
from rclpy.parameter import parameter_value_to_python
from rclpy.qos import DurabilityPolicy, HistoryPolicy, QoSProfile, ReliabilityPolicy
from rclpy.signals import SignalHandlerOptions
from std_msgs.msg import Float64MultiArray, String

from safety_filter.errors import ExitCode, SafetyFilterError
from safety_filter.monitor.screen import MonitorFrame, Screen, plain_output
from safety_filter.monitor.snapshots import (
    DiagnosticSnapshot,
    JointLimits,
    StatusLayout,
    StatusSnapshot,
    diagnostic_name,
    split_node_name,
    status_topic,
)
from safety_filter.monitor.state import MonitorState
from safety_filter.online.status_layout import decode_fields, fields_topic, legacy_diagnostic_name
from safety_filter.recordings.event_log import EventLogWriter, MonitorEvent
from safety_filter.ros._common import make_executor

LIMIT_PARAMETERS = ('joint_names', 'position_lower', 'position_upper', 'velocity_limit',
                    'effort_limit', 'certificate_id')
PARAMETER_RETRY_S = 3.0


def status_qos() -> QoSProfile:
    """Best-effort, keep-last 100, volatile: takes every status the filter sends without
    asking its publisher for acknowledgements or resends."""
    return QoSProfile(history=HistoryPolicy.KEEP_LAST, depth=100,
                      reliability=ReliabilityPolicy.BEST_EFFORT,
                      durability=DurabilityPolicy.VOLATILE)


class FilterMonitorNode(Node):
    """The monitor's node: subscriptions feed a :class:`MonitorState`; a steady timer polls
    it, writes events and draws the screen.

    Args:
        state: what the monitor knows (its node name selects the filter).
        screen: where frames go (None: no screen, e.g. for tests).
        event_log: where events go (None: nowhere).
        rate_hz: frames per second.
        diagnostics_topic: the diagnostics topic.
        status_topic_name: the filter's status topic (default ``/<node>/status``).
        read_parameters: read the limits from the node's parameters when ``state`` has none.
        **kwargs: passed to :class:`rclpy.node.Node` (``context``, ...).
    """

    def __init__(self, state: MonitorState, screen: Screen | None = None,
                 event_log: EventLogWriter | None = None, rate_hz: float = 4.0,
                 diagnostics_topic: str = '/diagnostics',
                 status_topic_name: str | None = None, read_parameters: bool = True,
                 node_name: str | None = None, **kwargs: Any) -> None:
        super().__init__(node_name or f'safety_filter_monitor_{os.getpid()}', **kwargs)
        self.state = state
        self.screen = screen
        self.event_log = event_log
        self.rate_hz = rate_hz
        self.diagnostics_topic = diagnostics_topic
        self.frames = 0
        # The node's diagnostic name (its fully qualified name), or the base-name form of
        # earlier releases.
        self._diagnostic_names = {diagnostic_name(state.node_name),
                                  legacy_diagnostic_name(state.node_name)}
        self._layout: StatusLayout | None = None
        self._layout_key: tuple[str, str | None, int] | None = None
        self._announced_fields: str | None = None
        self._read_parameters = read_parameters
        self._parameter_future: Any = None
        self._parameter_asked_at = -1e9
        topic = status_topic_name or status_topic(state.node_name)
        self.create_subscription(DiagnosticArray, diagnostics_topic, self._on_diagnostics, 50)
        self.create_subscription(Float64MultiArray, topic, self._on_status, status_qos())
        self._status_topic = topic
        # The field names, sent once by the node (transient-local: received on joining).
        self.create_subscription(String, fields_topic(topic), self._on_status_fields,
                                 QoSProfile(history=HistoryPolicy.KEEP_LAST, depth=1,
                                            reliability=ReliabilityPolicy.RELIABLE,
                                            durability=DurabilityPolicy.TRANSIENT_LOCAL))
        self._parameters_client = self.create_client(
            GetParameters, split_node_name(state.node_name)[1] + '/get_parameters')
        self.create_timer(1.0 / rate_hz, self._on_timer,
                          clock=Clock(clock_type=ClockType.STEADY_TIME))

    # ---- inputs
    def _on_status_fields(self, msg: String) -> None:
        self._announced_fields = str(msg.data)

    def _decode_status(self, msg: Float64MultiArray, now: float) -> StatusSnapshot | None:
        """The one place that knows the ``~/status`` wire format: values in ``data``, field
        names announced once on ``~/status_fields`` (or, from earlier releases, in each
        message's ``layout.dim[0].label``; or, failing both, derived from the certificate's
        joints), see :func:`safety_filter.online.status_layout.decode_fields`. The layout is built
        once per distinct (label, announced names, length). None while no usable field
        names are known."""
        dims = msg.layout.dim
        label = dims[0].label if dims else ''
        key = (label, self._announced_fields, len(msg.data))
        if key != self._layout_key:
            self._layout_key = key
            limits = self.state.limits
            try:
                fields = decode_fields(label, len(msg.data), self._announced_fields,
                                       limits.joint_names if limits is not None else None,
                                       source=self._status_topic)
                self._layout = StatusLayout.from_label(','.join(fields))
            except SafetyFilterError as err:
                self.get_logger().warning(f'status without usable field names: {err}',
                                          throttle_duration_sec=5.0)
                self._layout = None
        if self._layout is None:
            return None
        return StatusSnapshot(self._layout, msg.data, now)

    def _on_status(self, msg: Float64MultiArray) -> None:
        snapshot = self._decode_status(msg, time.time())
        if snapshot is not None:
            self._record(self.state.add_status(snapshot))

    def _on_diagnostics(self, msg: DiagnosticArray) -> None:
        now = time.time()
        stamp = msg.header.stamp.sec + msg.header.stamp.nanosec * 1e-9
        for status in msg.status:
            if status.name not in self._diagnostic_names:
                continue
            level = status.level
            level = level[0] if isinstance(level, (bytes, bytearray)) else int(level)
            snapshot = DiagnosticSnapshot(
                level=level, message=status.message,
                values={kv.key: kv.value for kv in status.values}, received_s=now,
                stamp_s=stamp if stamp > 0.0 else None)
            self._record(self.state.add_diagnostic(snapshot))

    def _record(self, events: Sequence[MonitorEvent]) -> None:
        if events and self.event_log is not None:
            self.event_log.write(events)

    # ---- limits from the node's parameters
    def _maybe_read_parameters(self, now: float) -> None:
        if (not self._read_parameters or self.state.limits is not None
                or not self.state.present or self._parameter_future is not None
                or now - self._parameter_asked_at < PARAMETER_RETRY_S):
            return
        if not self._parameters_client.service_is_ready():
            return
        self._parameter_asked_at = now
        request = GetParameters.Request()
        request.names = list(LIMIT_PARAMETERS)
        self._parameter_future = self._parameters_client.call_async(request)
        self._parameter_future.add_done_callback(self._on_parameters)

    def _on_parameters(self, future: Any) -> None:
        self._parameter_future = None
        try:
            response = future.result()
            values = {name: parameter_value_to_python(value)
                      for name, value in zip(LIMIT_PARAMETERS, response.values)}
            self.state.limits = JointLimits.from_parameters(
                values, f'parameters of {split_node_name(self.state.node_name)[1]}')
        except Exception as err:  # noqa: BLE001 - retried later; the screen says limits unknown
            self.get_logger().debug(f'cannot read the limits from the node: {err}')

    # ---- the screen
    def _on_timer(self) -> None:
        now = time.time()
        self._record(self.state.poll(now))
        self._maybe_read_parameters(now)
        if self.screen is not None:
            self.screen.show(MonitorFrame(self.state, now, rate_hz=self.rate_hz,
                                          diagnostics_topic=self.diagnostics_topic))
        self.frames += 1


# ---------------------------------------------------------------------- executable
class _StopRequest:
    """SIGINT/SIGTERM set a flag that the spin loop checks (at least every 50 ms): raising
    from the handler could land inside a callback called from the executor's C++ code."""

    def __init__(self) -> None:
        self.raised = False

    def __call__(self, signum: int, frame: Any) -> None:
        self.raised = True


def run(args: argparse.Namespace, stream: IO[str] | None = None) -> int:
    """Run the monitor with parsed options (those of
    :func:`safety_filter.cli.monitor.add_monitor_arguments`, checked by
    :func:`safety_filter.cli.monitor.check_monitor_arguments`).

    Returns:
        0 on a clean stop (Ctrl-C, SIGTERM or ``--duration``).

    Raises:
        InputError: an unreadable certificate or event log.
    """
    stream = stream if stream is not None else sys.stdout
    limits = JointLimits.from_certificate_file(args.certificate) if args.certificate else None
    state = MonitorState(args.node_name, thin_margin=args.thin_margin, limits=limits,
                         absent_after_s=args.absent_after,
                         expected_certificate_id=limits.certificate_id if limits else None)
    plain = plain_output(stream, bool(args.plain))
    # NO_COLOR is honoured by Rich itself.
    screen = Screen(stream, plain=plain, color=not args.no_color)
    event_log = (EventLogWriter(args.event_log, split_node_name(args.node_name)[0],
                                args.event_time) if args.event_log else None)
    stop = _StopRequest()
    previous = {signum: signal.signal(signum, stop)
                for signum in (signal.SIGINT, signal.SIGTERM)}
    context = rclpy.context.Context()
    node = None
    executor = None
    try:
        ros_args = ['filter_monitor', '--ros-args', *list(getattr(args, 'ros_args', []) or [])]
        rclpy.init(args=ros_args, context=context, domain_id=args.domain_id,
                   signal_handler_options=SignalHandlerOptions.NO)
        node = FilterMonitorNode(state, screen, event_log, rate_hz=args.refresh_rate,
                                 diagnostics_topic=args.diagnostics_topic,
                                 status_topic_name=args.status_topic,
                                 read_parameters=limits is None, context=context)
        executor = make_executor('events', context)
        executor.add_node(node)
        deadline = time.monotonic() + args.duration if args.duration > 0 else None
        while context.ok() and not stop.raised:
            if deadline is not None and time.monotonic() >= deadline:
                break
            executor.spin_once(timeout_sec=0.05)
    finally:
        for signum, handler in previous.items():
            signal.signal(signum, handler)
        screen.close()  # leaves the terminal as it was, the last frame printed on it
        if event_log is not None:
            event_log.close()
        if executor is not None:
            executor.shutdown(timeout_sec=1.0)
        if node is not None:
            node.destroy_node()
        context.try_shutdown()
    return ExitCode.OK

