"""``safety-filter node``: run the safety filter's lifecycle node in this process, with the
certificate, the robot and the operational parameters of config/filter.yaml."""

from __future__ import annotations

import argparse
import tempfile
from pathlib import Path
from types import ModuleType

from safety_filter.cli.robot_options import (
    GRAVITY_CONVENTION_HELP,
    add_certificate_argument,
    add_gravity_convention_argument,
    add_payload_mass_argument,
    namespace_argument,
)
from safety_filter.errors import FileFormatError, InvalidValue
from safety_filter.simulation.demo_arms import DEMO_ARMS


def command_node(args: argparse.Namespace) -> int:
    """Run ``safety-filter node``: the node's exit code (0 on a clean stop, 1 when it
    failed), or an input error (2)."""
    from safety_filter.ros.availability import import_ros_module
    from safety_filter.simulation.demo_arms import demo_arm_files

    filter_node = import_ros_module('safety_filter.ros.filter_node', 'the node')
    # No fallback to a demo arm: the robot, its limits and its certificate are required
    # (--demo <arm> names a demo arm explicitly).
    given = [flag for flag, value in (('--demo', args.demo), ('--urdf', args.urdf),
                                      ('--robot-description', args.robot_description),
                                      ('--robot-description-topic',
                                       args.robot_description_topic))
             if value is not None]
    if len(given) > 1:
        raise InvalidValue(given[1], getattr(args, given[1][2:].replace('-', '_')),
                           detail=f'give one of --urdf, --robot-description, '
                           f'--robot-description-topic or --demo, not {" and ".join(given)}')
    description = None
    if args.demo is not None:
        if args.limits:
            raise InvalidValue('--limits', args.limits,
                               detail='--demo brings its own limits file; drop --limits')
        urdf, limits = demo_arm_files(args.demo)
    elif not given or not args.limits:
        missing = [text for text, absent in (
            ('--urdf ARM.urdf (or --robot-description URDF_XML, or '
             '--robot-description-topic TOPIC)', not given),
            ('--limits ARM_LIMITS.yaml', not args.limits)) if absent]
        raise InvalidValue(
            'robot', 'not given', detail=f'the robot is required: give {" and ".join(missing)} '
            '(the robot the certificate was computed for), or --demo <arm> for a demo arm')
    else:
        urdf, limits = (Path(args.urdf) if args.urdf else None), Path(args.limits)
        description = args.robot_description
        if urdf is not None and not urdf.is_file():
            raise FileFormatError(f'URDF file not found: {urdf}', urdf)
        if not limits.is_file():
            raise FileFormatError(f'limits file not found: {limits}', limits)
    certificate = Path(args.certificate)
    if not certificate.is_file():
        raise FileFormatError(f'certificate file not found: {certificate}', certificate)
    from safety_filter.ros.graph_specs import FILTER_CONFIG, config_file

    # The operational parameters of config/filter.yaml (trigger joint_state, timeouts), as
    # the hardware launch file loads them; options and --ros-args given later win.
    ros_args = ['--ros-args', '--params-file', str(certificate),
                '--params-file', str(config_file(FILTER_CONFIG))]
    with tempfile.TemporaryDirectory(prefix='safety_filter_node_') as folder:
        if description is not None:
            # The URDF text through a parameter file: no shell or YAML quoting of XML.
            import yaml

            path = Path(folder) / 'robot_description.yaml'
            path.write_text(yaml.safe_dump({'/**': {'ros__parameters': {
                'robot_description': description}}}), encoding='utf-8')
            ros_args += ['--params-file', str(path)]
        elif args.robot_description_topic is not None:
            ros_args += ['-p', f'robot_description_topic:={args.robot_description_topic}']
        else:
            ros_args += ['-p', f'urdf_path:={Path(urdf).resolve()}']
        ros_args += ['-p', f'limits_path:={Path(limits).resolve()}']
        if args.namespace:
            ros_args += ['-r', f'__ns:={args.namespace}']
        return _run_node(filter_node, args, ros_args)


def _run_node(filter_node: ModuleType, args: argparse.Namespace, ros_args: list[str]) -> int:
    if args.gravity_convention is not None:
        ros_args += ['-p', f'gravity_convention:={args.gravity_convention}']
    if args.payload_mass is not None:
        ros_args += ['-p', f'payload_mass:={float(args.payload_mass)!r}']
    ros_args += list(args.ros_args or [])
    if args.no_autostart and args.activate_at_start:
        raise InvalidValue('--no-autostart', True,
                           detail='give --no-autostart or --activate-at-start, not both')
    start = ('--autostart' if args.activate_at_start
             else [] if args.no_autostart else '--configure-at-start')
    own = ['--executor', args.executor] + ([start] if start else [])
    return filter_node.main(['safety-filter-node', *own, *ros_args])


def add_node_parser(commands: argparse._SubParsersAction) -> None:
    """Add ``safety-filter node``."""
    node = commands.add_parser(
        'node',
        description='Run the safety_filter lifecycle node in this process, with the '
        'certificate parameter file, the URDF and the limits file, and the operational '
        'parameters of config/filter.yaml (one filter step per joint state). It configures '
        'itself at start-up and stays inactive (publishing no torque) until activated with '
        '`ros2 lifecycle set /safety_filter activate` (/<namespace>/safety_filter with '
        '--namespace), or at once with --activate-at-start; '
        'SIGINT or SIGTERM end it cleanly. Topics: '
        'joint_states, nominal_torque in, filtered_torque, ~/status, /diagnostics out (remap '
        'with --ros-args -r filtered_torque:=/driver/commands). Exit code 0 on a clean stop, 1 '
        'when configure/activate failed (reason in the log) or rclpy is not installed, 2 on '
        'bad options.')
    add_certificate_argument(node)
    robot = node.add_argument_group('robot')
    robot.add_argument('--urdf', help='path of the robot URDF, or a .xacro file when the '
                       'xacro package is installed (required, or --robot-description, '
                       '--robot-description-topic or --demo)')
    robot.add_argument('--robot-description', metavar='URDF_XML',
                       help='the URDF as XML text, instead of --urdf')
    robot.add_argument('--robot-description-topic', metavar='TOPIC', default=None,
                       help='read the URDF at configure from this std_msgs/String topic '
                       '(transient-local, as robot_state_publisher publishes '
                       'robot_description; relative names resolve in --namespace), instead '
                       'of --urdf; configure waits up to 10 s for it')
    robot.add_argument('--limits', help='limits file (YAML; also selects the chain); required '
                       'with --urdf, --robot-description or --robot-description-topic')
    robot.add_argument('--demo', choices=DEMO_ARMS, default=None,
                       help='a built-in demo arm instead (its URDF and limits)')
    node.add_argument('--namespace', type=namespace_argument, default='', metavar='NS',
                      help="the node's ROS namespace, e.g. /arm1 (default: the root): its "
                      'topics, ~/status and lifecycle services resolve in it (the same as '
                      '--ros-args -r __ns:=/arm1)')
    add_gravity_convention_argument(node, default=None, help=GRAVITY_CONVENTION_HELP)
    add_payload_mass_argument(node)
    node.add_argument('--activate-at-start', action='store_true',
                      help='activate at start-up: the node starts commanding the driver as '
                      'soon as joint states arrive (default: configured and inactive)')
    node.add_argument('--no-autostart', action='store_true',
                      help='start unconfigured; drive it with the lifecycle services')
    node.add_argument('--executor', choices=('single_threaded', 'events'),
                      default='single_threaded',
                      help="rclpy executor (default single_threaded: rclpy's "
                      "SingleThreadedExecutor; 'events': rclpy.experimental.EventsExecutor, "
                      'experimental in Jazzy)')
    node.add_argument('--ros-args', dest='ros_args', nargs=argparse.REMAINDER, default=[],
                      metavar='ROS_ARGS', help='everything after this goes to ROS, e.g. '
                      '--ros-args -r filtered_torque:=/arm/commands -p payload_mass:=0.5')
    node.set_defaults(handler=command_node)
