"""The safety filter as a managed (lifecycle) ROS 2 node, between a command source and a driver.

Wiring (topic names are relative, so remap them)::

    teleop / policy --nominal_torque--> [safety_filter] --filtered_torque--> driver
    driver ---------------joint_states--^

The executable (``ros2 run safety_filter filter_node``); the node itself is
:class:`safety_filter.ros.filter_node_lifecycle.SafetyFilterNode`, a thin ROS adapter: it
converts messages, asks
:mod:`safety_filter.online.input_supervision` what to do with late or missing inputs, calls
:meth:`SafetyFilter.step` (the ROS-free numeric core), packs the ``~/status`` record
(:mod:`safety_filter.online.status_layout`), and publishes the diagnostics verdict of
:mod:`safety_filter.online.health_verdict`. Its parameters are declared and read in
:mod:`safety_filter.ros.filter_node_parameters`.

The node's reference (topics, QoS, executor, timeouts and the watchdog, parameters,
lifecycle, executables) is docs/node.md.
"""

from __future__ import annotations

import argparse
import signal
import sys
from collections.abc import Sequence
from typing import Any

import rclpy
from rclpy.executors import SingleThreadedExecutor
from rclpy.lifecycle import TransitionCallbackReturn
from rclpy.signals import SignalHandlerOptions
from rclpy.utilities import remove_ros_args

from safety_filter.errors import ExitCode
from safety_filter.online.mode_codes import (  # noqa: F401 - re-exported: the status codes
    MODE_CODES,
    MODE_FALLBACK,
    MODE_FILTERED,
    MODE_NAMES,
    MODE_RECOVERING,
    MODE_REJECTED,
    MODE_STALE,
)
from safety_filter.online.status_layout import (  # noqa: F401 - re-exported: the node's interface
    DIAGNOSTIC_NAME_SUFFIX,
    STATUS_JOINT_FIELDS,
    STATUS_SCALAR_FIELDS,
    diagnostic_name,
    status_field_names,
)
from safety_filter.ros.filter_node_lifecycle import (  # noqa: F401 - re-exported
    STATUS_FIELDS_TOPIC,
    STATUS_TOPIC,
    SafetyFilterNode,
    control_qos,
)
from safety_filter.ros.filter_node_parameters import (  # noqa: F401 - re-exported
    CERTIFICATE_PARAMETERS,
    CONFIGURE_TIME_PARAMETERS,
    JOINT_STATE_TIMEOUT_S,
    MODEL_PARAMETERS,
    SAFETY_PARAMETERS,
    TIMEOUT_PARAMETERS,
    TRIGGERS,
)

EXECUTORS = ('single_threaded', 'events')  # of safety_filter.ros.names.EXECUTORS


# ---------------------------------------------------------------------- executable
def own_argument_parser() -> argparse.ArgumentParser:
    """The parser of the executable's own options (those before ``--ros-args``)."""
    parser = argparse.ArgumentParser(
        prog='filter_node',
        description='The safety_filter lifecycle node. ROS arguments go after --ros-args, '
        'e.g. --ros-args --params-file certificate.yaml -p urdf_path:=arm.urdf')
    parser.add_argument('--autostart', action='store_true',
                        help='configure and activate at start-up (no lifecycle manager needed)')
    parser.add_argument('--configure-at-start', action='store_true',
                        help='configure at start-up and stay inactive (a lifecycle manager or '
                        '`ros2 lifecycle set` activates it)')
    parser.add_argument('--executor', choices=EXECUTORS, default='single_threaded',
                        help="rclpy executor: 'single_threaded' (default; rclpy's "
                        "SingleThreadedExecutor) or 'events' (rclpy.experimental."
                        'EventsExecutor, experimental in Jazzy; measure it with '
                        'benchmarks/bench_node_latency.py first)')
    return parser


def _parse_own_arguments(arguments: Sequence[str]) -> argparse.Namespace:
    return own_argument_parser().parse_args(list(arguments))


def make_executor(kind: str, context: Any) -> Any:
    """An rclpy executor of kind ``'single_threaded'`` or ``'events'``."""
    if kind == 'events':
        from rclpy.experimental import EventsExecutor

        return EventsExecutor(context=context)
    return SingleThreadedExecutor(context=context)


def _raise_keyboard_interrupt(signum: int, frame: Any) -> None:
    raise KeyboardInterrupt


def main(args: Sequence[str] | None = None) -> int:
    """Run the node until SIGINT or SIGTERM (both end it cleanly: shutdown transition).

    Args:
        args: the command line like ``sys.argv`` (program name first); default ``sys.argv``.
            ``--autostart`` configures and activates the node at start-up; the node spins
            with rclpy's SingleThreadedExecutor unless ``--executor events`` (rclpy's
            experimental EventsExecutor) is given.

    Returns:
        :attr:`ExitCode.OK` on a clean exit, :attr:`ExitCode.FAILED` when the transitions
        at start failed.
    """
    argv = list(sys.argv if args is None else args)
    own = _parse_own_arguments(remove_ros_args(argv)[1:])
    context = rclpy.context.Context()
    # Our own signal handling: SIGINT/SIGTERM raise KeyboardInterrupt in the spin loop, so the
    # node can run its shutdown transition before the context goes away.
    rclpy.init(args=argv, context=context, signal_handler_options=SignalHandlerOptions.NO)
    previous = {number: signal.signal(number, _raise_keyboard_interrupt)
                for number in (signal.SIGINT, signal.SIGTERM)}
    node: SafetyFilterNode | None = None
    code = ExitCode.OK
    try:
        node = SafetyFilterNode(context=context)
        if own.autostart or own.configure_at_start:
            if node.trigger_configure() != TransitionCallbackReturn.SUCCESS:
                node.get_logger().fatal('configure at start failed (see above)')
                return ExitCode.FAILED
        if own.autostart:
            if node.trigger_activate() != TransitionCallbackReturn.SUCCESS:
                node.get_logger().fatal('autostart: activate failed')
                return ExitCode.FAILED
        executor = make_executor(own.executor, context)
        executor.add_node(node)
        while context.ok():
            executor.spin_once(timeout_sec=0.1)
    except KeyboardInterrupt:
        pass
    finally:
        for number, handler in previous.items():
            signal.signal(number, handler)
        if node is not None:
            try:
                node.trigger_shutdown()
            except Exception as err:  # noqa: BLE001 - best effort on the way out
                node.get_logger().warning(f'shutdown transition failed: {err}')
            node.destroy_node()
        context.try_shutdown()
    return code


if __name__ == '__main__':
    sys.exit(main())
