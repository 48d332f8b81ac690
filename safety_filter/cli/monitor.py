"""``safety-filter monitor`` and the ``filter_monitor`` executable (the same options): their
options, their checks and their entry points. The monitor itself runs in
:func:`safety_filter.ros.monitor.run`, imported when the command runs; this module needs no
ROS, so ``safety-filter --help`` works without it."""

from __future__ import annotations

import argparse
import math
import sys
from collections.abc import Sequence

from safety_filter.cli.robot_options import deprecated
from safety_filter.errors import InvalidValue, SafetyFilterError
from safety_filter.monitor.snapshots import split_node_name
from safety_filter.monitor.state import DEFAULT_ABSENT_AFTER_S, DEFAULT_THIN_MARGIN
from safety_filter.recordings.event_log import DEFAULT_NODE_NAME, EVENT_TIMES

DEFAULT_RATE_HZ = 4.0


def add_monitor_arguments(parser: argparse.ArgumentParser) -> None:
    """The options of ``safety-filter monitor`` and ``filter_monitor``."""
    parser.add_argument('--node-name', default=DEFAULT_NODE_NAME, metavar='NAME',
                        help='the filter node to watch, e.g. safety_filter or '
                        '/arm1/safety_filter (default: safety_filter). Its diagnostics are '
                        "named by its fully qualified name ('/arm1/safety_filter: filter'), "
                        'so filters in different namespaces are told apart')
    parser.add_argument('--refresh-rate', '--rate', dest='refresh_rate', type=float,
                        default=DEFAULT_RATE_HZ, metavar='HZ', help=deprecated(
                            f'screen refreshes per second (default: {DEFAULT_RATE_HZ:g})',
                            '--rate'))
    parser.add_argument('--thin-margin', type=float, default=DEFAULT_THIN_MARGIN,
                        metavar='VALUE', help='alarm when a barrier margin falls below this '
                        f'(barrier units; default: {DEFAULT_THIN_MARGIN:g}, the filter '
                        "node's thin_margin default, below which its diagnostics WARN)")
    parser.add_argument('--certificate', metavar='PATH', default=None,
                        help='certificate parameter file: joint limits to show values against, '
                        'and the id the node must run (default: read the node parameters)')
    parser.add_argument('--event-log', metavar='PATH', default=None,
                        help='append events as JSON lines to this file (flushed as they '
                        'happen; read by safety-filter replay --event-log)')
    parser.add_argument('--event-time', choices=EVENT_TIMES, default='wall',
                        help="the event log's 't': wall clock (default) or the filter node's "
                        'clock (simulated time in the demo; what lines up with a bag)')
    parser.add_argument('--duration', type=float, default=0.0, metavar='S',
                        help='stop after this many seconds (default: until Ctrl-C)')
    parser.add_argument('--plain', action='store_true',
                        help='print frames one after another, 100 columns wide, without '
                        'escape codes (the default when stdout is not a terminal or TERM is '
                        'dumb)')
    parser.add_argument('--no-color', action='store_true',
                        help='no colours (also when NO_COLOR is set)')
    parser.add_argument('--absent-after', type=float, default=DEFAULT_ABSENT_AFTER_S,
                        metavar='S', help='no message for this long: the filter is gone '
                        f'(default: {DEFAULT_ABSENT_AFTER_S:g})')
    parser.add_argument('--diagnostics-topic', default='/diagnostics', metavar='TOPIC',
                        help='diagnostic_msgs/DiagnosticArray topic (default: /diagnostics)')
    parser.add_argument('--status-topic', default=None, metavar='TOPIC',
                        help="default: the node's ~/status, /<node name>/status")
    parser.add_argument('--domain-id', type=int, default=None, metavar='N',
                        help='ROS domain id (default: ROS_DOMAIN_ID or 0)')


def check_monitor_arguments(args: argparse.Namespace) -> None:
    """Check the monitor's option values.

    Raises:
        InvalidValue: an option value out of range, or a node name that is not one.
    """
    if not (math.isfinite(args.refresh_rate) and args.refresh_rate > 0):
        raise InvalidValue('--refresh-rate', args.refresh_rate, 'a positive number')
    if not math.isfinite(args.thin_margin):
        raise InvalidValue('--thin-margin', args.thin_margin, 'a finite number')
    if not (math.isfinite(args.duration) and args.duration >= 0):
        raise InvalidValue('--duration', args.duration, '>= 0')
    if not (math.isfinite(args.absent_after) and args.absent_after > 0):
        raise InvalidValue('--absent-after', args.absent_after, 'a positive number')
    split_node_name(args.node_name)


def command_monitor(args: argparse.Namespace) -> int:
    """Run ``safety-filter monitor``: exit code 0 on a clean stop, or an input error (2)."""
    from safety_filter.ros.availability import import_ros_module

    check_monitor_arguments(args)
    monitor = import_ros_module('safety_filter.ros.monitor', 'the monitor')
    return int(monitor.run(args))


def add_monitor_parser(commands: argparse._SubParsersAction) -> None:
    """Add ``safety-filter monitor`` to the subcommands of ``safety-filter``."""
    parser = commands.add_parser(
        'monitor',
        description="Subscribe to a running safety_filter node's /diagnostics and ~/status "
        'over DDS and show, a few times a second, its state and mode, each joint against its '
        'limits with the barrier margin, interventions, solve times, fallback and recovery '
        'counts, input ages and certificate id, with alarms (!!) for thin margins, the '
        'watchdog and stale states. On a terminal the screen is repainted in place and fits '
        "the window's size; plain frames when stdout is not a terminal. Ctrl-C quits. "
        'Exit code 0: stopped (Ctrl-C, SIGTERM or --duration); 1: rclpy or the ROS 2 '
        'messages not installed; 2: bad input (options, certificate file).')
    add_monitor_arguments(parser)
    parser.add_argument('--ros-args', dest='ros_args', nargs=argparse.REMAINDER, default=[],
                        metavar='ROS_ARGS', help='everything after this goes to ROS')
    parser.set_defaults(handler=command_monitor)


def filter_monitor_main(args: Sequence[str] | None = None) -> int:
    """Entry point of ``filter_monitor`` (the same options as ``safety-filter monitor``;
    ROS arguments after ``--ros-args``)."""
    argv = list(sys.argv if args is None else args)
    ros_part: list[str] = []
    own = argv[1:]
    if '--ros-args' in argv:  # everything after it goes to ROS
        at = argv.index('--ros-args')
        own, ros_part = argv[1:at], argv[at + 1:]
    parser = argparse.ArgumentParser(
        prog='filter_monitor', description='Watch a running safety_filter node live in the '
        'terminal and log its events (see safety-filter monitor --help).')
    add_monitor_arguments(parser)
    options = parser.parse_args(own)
    options.ros_args = ros_part
    try:
        return command_monitor(options)
    except SafetyFilterError as err:
        print(f'error: {err}', file=sys.stderr)
        return int(err.exit_code)


if __name__ == '__main__':
    sys.exit(filter_monitor_main())
