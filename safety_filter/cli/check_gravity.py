"""``safety-filter check-gravity``: which gravity convention the arm's driver uses, from
joint efforts at rest in a bag or heard live.

The check itself is :mod:`safety_filter.replay.gravity_check`.
"""

from __future__ import annotations

import argparse
import math

from safety_filter.cli.robot_options import add_chain_arguments, deprecated, load_robot
from safety_filter.errors import InvalidValue
from safety_filter.replay.gravity_check_defaults import (
    DEFAULT_DURATION_S,
    DEFAULT_MIN_SAMPLES,
    DEFAULT_REST_VELOCITY,
    DEFAULT_TOPIC,
    MIN_REST_S,
)
from safety_filter.simulation.demo_arms import DEMO_ARMS

_DESCRIPTION = (
    "Check which gravity convention the arm's driver uses, before the first filtered "
    "motion. Record the arm at rest, held by its driver's own controller or gravity "
    'compensation with the brakes released, from a few seconds to a minute, at one or more '
    'poses where the shoulder and elbow carry weight. The command reads sensor_msgs/'
    'JointState (from a bag, or live from --joint-states-topic for --duration seconds), '
    'keeps the '
    "samples at rest, maps joints by name to the model's chain and compares per joint the "
    "mean measured effort with the model's g(q) at the same positions: efforts equal to g "
    '(the driver reports total motor torque): gravity_convention full; efforts near zero '
    'while g is not (the driver compensates gravity itself and reports the rest): '
    'driver_compensated; otherwise inconclusive, with the reason. The check assumes the '
    'driver reports efforts in the convention of its commands. Exit code 0: consistent with '
    'one convention (printed); 6: inconclusive; 2: bad input; 1: listening live without '
    'rclpy.')


def add_check_gravity_parser(commands: argparse._SubParsersAction) -> None:
    """Add ``safety-filter check-gravity``."""
    parser = commands.add_parser(
        'check-gravity', description=_DESCRIPTION)
    parser.add_argument('bag', nargs='?', default=None, metavar='BAG',
                        help='a rosbag2 bag (folder, or its .mcap/.db3 file) of the arm at '
                        'rest; without it, listen live on --joint-states-topic for --duration '
                        'seconds')
    robot = parser.add_argument_group('robot (required: --urdf and --limits, or --demo)')
    robot.add_argument('--urdf', help='path of the robot URDF')
    robot.add_argument('--limits', help='limits file (YAML): chain, payload range, '
                       'uncertainty')
    robot.add_argument('--demo', choices=DEMO_ARMS, default=None,
                       help='a built-in demo arm instead of --urdf')
    add_chain_arguments(robot, base_help="first link of the chain (default: the limits "
                        "file's or the URDF root)")
    robot.add_argument('--payload-mass', type=float, default=None, metavar='KG',
                       help='payload mounted during the recording [kg] (default: the middle '
                       "of the limits file's payload range; give the real one, 0 without "
                       'payload)')
    source = parser.add_argument_group('joint states')
    source.add_argument('--joint-states-topic', '--topic', dest='joint_states_topic',
                        default=DEFAULT_TOPIC, metavar='TOPIC', help=deprecated(
                            'sensor_msgs/JointState topic, live or in the bag (default: '
                            f'{DEFAULT_TOPIC}; /{DEFAULT_TOPIC} in a bag)', '--topic'))
    source.add_argument('--duration', type=float, default=DEFAULT_DURATION_S, metavar='S',
                        help='live: seconds to listen (default: '
                        f'{DEFAULT_DURATION_S:g}); Ctrl-C stops early and checks what came')
    source.add_argument('--domain-id', type=int, default=None, metavar='N',
                        help='live: ROS domain id (default: ROS_DOMAIN_ID or 0)')
    check = parser.add_argument_group('check')
    check.add_argument('--rest-velocity', type=float, default=DEFAULT_REST_VELOCITY,
                       metavar='V', help='a sample is at rest when every joint has |v| below '
                       f'this [rad/s or m/s] for at least {MIN_REST_S:g} s (default: '
                       f'{DEFAULT_REST_VELOCITY:g}, twice the default declared velocity '
                       'noise)')
    check.add_argument('--tolerance', type=float, default=None, metavar='F',
                       help='a joint matches when its mean deviation is within F x its max '
                       '|g(q)| plus its declared Coulomb friction and driver torque offset '
                       '(default: max(0.15, link_mass_error + torque_error_relative) of the '
                       "limits file's uncertainty section)")
    check.add_argument('--min-samples', type=int, default=DEFAULT_MIN_SAMPLES, metavar='N',
                       help='fewest rest samples for a verdict (default: '
                       f'{DEFAULT_MIN_SAMPLES})')
    parser.set_defaults(handler=command_check_gravity)


def command_check_gravity(args: argparse.Namespace) -> int:
    """Run ``safety-filter check-gravity``: exit code 0 (one convention), 6 (inconclusive),
    or an input error (2)."""
    from safety_filter.replay.gravity_check import (
        bag_folder,
        bag_topic,
        check_gravity,
        read_bag_samples,
    )

    if args.urdf is None and args.demo is None:
        raise InvalidValue('robot', 'not given', detail='the robot is required: give --urdf '
                           'ARM.urdf --limits ARM_LIMITS.yaml (or --demo <arm>)')
    if not (math.isfinite(args.duration) and args.duration > 0):
        raise InvalidValue('--duration', args.duration, 'a positive number')
    if args.bag is not None:
        bag_folder(args.bag)  # bad paths before the model loads
    model = load_robot(args)
    if args.bag is not None:
        samples = read_bag_samples(args.bag, args.joint_states_topic, model.joint_names)
        where = f'{bag_topic(args.joint_states_topic)} in {bag_folder(args.bag)}'
    else:
        from safety_filter.ros.availability import import_ros_module

        joint_states = import_ros_module('safety_filter.ros.joint_states',
                                         'listening live (or give a bag)')
        topic = args.joint_states_topic
        print(f'listening on {topic} for {args.duration:g} s ...', flush=True)
        samples, where = joint_states.listen_chain_samples(
            topic, args.duration, model.joint_names, domain_id=args.domain_id)
    result = check_gravity(model, samples, payload_mass=args.payload_mass,
                           rest_velocity=args.rest_velocity, tolerance=args.tolerance,
                           min_samples=args.min_samples, source=where)
    print(result.format())
    return int(result.exit_code)
