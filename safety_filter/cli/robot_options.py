"""The option blocks that several ``safety-filter`` commands share, one definition each.

Every subcommand names a concept the same way (``test/cli/test_cli_options.py`` walks the
parser and checks it):

* the robot: ``--demo NAME`` (a built-in demo arm) or ``--urdf FILE`` with ``--limits FILE``
  (:func:`add_robot_arguments`, :func:`load_robot`);
* what a command writes: ``--output FILE`` when it writes one file (``certify``'s
  certificate), ``--output-dir DIR`` when it writes a folder (``demo``, ``replay``,
  ``stress``; ``run-graph``'s recorded bag, a rosbag2 folder);
* bag storage: ``--storage {mcap,sqlite3}``
  (:data:`safety_filter.recordings.bags.STORAGES`);
* executors: ``single_threaded``, ``multi_threaded``, ``events``
  (:data:`safety_filter.ros.names.EXECUTORS`);
* rates: ``--control-rate`` is always the certified control rate, ``--watchdog-rate`` the
  filter's watchdog rate, ``--refresh-rate`` the monitor's screen refreshes;
* verbosity: ``--no-progress`` drops the progress bar and nothing else; ``--quiet`` prints
  only the verdict (or summary) and the files written, and implies ``--no-progress``;
  ``--log-level`` sets the ROS nodes' log level (:func:`add_graph_arguments`);
* the thin-margin threshold: :data:`safety_filter.online.status_layout.THIN_MARGIN`, shared
  by the filter node's diagnostics (parameter ``thin_margin``) and the monitor's alarm
  (``--thin-margin``);
* ROS names: ``--namespace NS`` the nodes' namespace (launch argument ``namespace``,
  checked by :func:`safety_filter.ros.names.ros_namespace`), ``--robot-description-topic
  TOPIC`` the robot from a topic instead of ``--urdf`` (launch argument
  ``robot_description_topic``), topics ``--<what>-topic TOPIC``.

Old spellings that were a plain rename stay accepted as argparse aliases whose help says
they are deprecated (:func:`deprecated`).

This module is imported to build the parser, so it imports nothing heavy at module level:
the robot model is loaded inside :func:`load_robot`.
"""

from __future__ import annotations

import argparse
from typing import TYPE_CHECKING

from safety_filter.errors import InvalidValue
from safety_filter.ros.names import EXECUTORS, executor_name, ros_namespace
from safety_filter.simulation.demo_arms import DEMO_ARMS

if TYPE_CHECKING:
    from safety_filter.core.robot_model import RobotModel

LOG_LEVELS = ('debug', 'info', 'warn', 'error')
# The conventions of safety_filter.online.barrier_filter.GRAVITY_CONVENTIONS (a test keeps
# them equal); spelled here so that building the parser does not load the filter.
GRAVITY_CONVENTIONS = ('full', 'driver_compensated')
CERTIFICATE_HELP = 'certificate parameter file written by `safety-filter certify`'
GRAVITY_CONVENTION_HELP = "what the driver takes (default: 'full' torque)"
PAYLOAD_MASS_HELP = 'payload mass of the model [kg] (default: middle of the certified range)'


def deprecated(help_text: str, *old: str) -> str:
    """``help_text`` followed by the note that the option strings ``old`` are deprecated."""
    plural = 's' if len(old) > 1 else ''
    return f'{help_text} ({", ".join(old)}: deprecated spelling{plural})'


def namespace_argument(value: str) -> str:
    """:func:`safety_filter.ros.names.ros_namespace` as an argparse ``type=`` (its error
    message kept)."""
    try:
        return ros_namespace(value)
    except InvalidValue as err:
        raise argparse.ArgumentTypeError(str(err)) from err


# ---------------------------------------------------------------------- the robot
def add_robot_arguments(parser: argparse.ArgumentParser) -> None:
    """Options that select the robot: a demo arm, or a URDF with limits and chain."""
    group = parser.add_argument_group('robot')
    group.add_argument('--demo', choices=DEMO_ARMS, default=None,
                       help='a built-in demo arm (default: bench6 when no --urdf is given)')
    group.add_argument('--urdf', help='path of the robot URDF')
    group.add_argument('--limits', help='limits file (YAML) overriding URDF limits')
    add_chain_arguments(group)


def add_chain_arguments(group: argparse._ActionsContainer,
                        base_help: str = 'first link of the chain (default: URDF root)'
                        ) -> None:
    """``--base-link``, ``--tip-link`` and ``--joints``: the chain within the URDF."""
    group.add_argument('--base-link', help=base_help)
    group.add_argument('--tip-link', help='last link of the chain')
    group.add_argument('--joints', help='comma-separated chain joints, base to tip')


def load_robot(args: argparse.Namespace) -> RobotModel:
    """The robot model that the robot options describe.

    Raises:
        InvalidValue: options that do not go together (--limits without --urdf, --demo and
            --urdf).
        InputError: a URDF or limits file that cannot be used.
    """
    from safety_filter.core.robot_model import RobotModel
    from safety_filter.simulation.demo_arms import load_demo_arm

    if args.urdf is None:
        given = [(flag, value) for flag, value in (
            ('--limits', args.limits), ('--base-link', args.base_link),
            ('--tip-link', args.tip_link), ('--joints', args.joints)) if value]
        if given:
            raise InvalidValue(*given[0], detail='--limits, --base-link, --tip-link and '
                               '--joints need --urdf')
        return load_demo_arm(args.demo or 'bench6')
    if args.demo is not None:
        raise InvalidValue('--demo', args.demo, detail='give either --demo or --urdf, not both')
    joints = [j.strip() for j in args.joints.split(',') if j.strip()] if args.joints else None
    return RobotModel.from_urdf(args.urdf, limits=args.limits, base_link=args.base_link,
                                tip_link=args.tip_link, joints=joints)


def add_certificate_argument(parser: argparse._ActionsContainer, required: bool = True
                             ) -> None:
    """``--certificate PATH``: the certificate parameter file a command runs the filter with."""
    parser.add_argument('--certificate', required=required, metavar='PATH',
                        help=CERTIFICATE_HELP)


def add_gravity_convention_argument(parser: argparse._ActionsContainer,
                                    default: str | None = 'full',
                                    help: str = GRAVITY_CONVENTION_HELP) -> None:
    """``--gravity-convention {full,driver_compensated}``."""
    parser.add_argument('--gravity-convention', choices=GRAVITY_CONVENTIONS, default=default,
                        help=help)


def add_payload_mass_argument(parser: argparse._ActionsContainer,
                              help: str = PAYLOAD_MASS_HELP) -> None:
    """``--payload-mass KG``: the payload the model carries (default None: the command's
    default, said in ``help``)."""
    parser.add_argument('--payload-mass', type=float, default=None, metavar='KG', help=help)


# ---------------------------------------------------------------------- verbosity
def add_progress_arguments(parser: argparse._ActionsContainer, quiet_help: str) -> None:
    """``--no-progress`` (no progress bar) and ``--quiet`` (``quiet_help``: what it still
    prints; it implies ``--no-progress``)."""
    parser.add_argument('--no-progress', action='store_true', help='no progress bar')
    parser.add_argument('--quiet', action='store_true', help=quiet_help)


# ---------------------------------------------------------------------- ROS graphs
def add_graph_arguments(parser: argparse.ArgumentParser) -> None:
    """How ``demo`` and ``run-graph`` run their node graph: processes, executor, domain,
    log level."""
    group = parser.add_argument_group('how the graph runs')
    group.add_argument('--processes', action='store_true',
                       help='one process per node (default: every node in one process)')
    group.add_argument('--executor', type=executor_name, choices=EXECUTORS, default=None,
                       help="executor of the nodes: 'events' (rclpy's EventsExecutor, "
                       "experimental in Jazzy; the demo's and sim graph's default), "
                       "'single_threaded' (rclpy's SingleThreadedExecutor; the hardware "
                       "graph's default: the filter on a real arm's safety path) or "
                       "'multi_threaded' ('single' and 'multi': deprecated spellings)")
    group.add_argument('--domain-id', type=int, default=None, metavar='N',
                       help='ROS domain of the graph (demo and sim graph default: a random '
                       'one in 150..199, discovery on this machine only; hardware graph '
                       'default: ROS_DOMAIN_ID)')
    group.add_argument('--log-level', choices=LOG_LEVELS, default='warn',
                       help="the nodes' log level (default: warn)")
    group.add_argument('--verbose', dest='log_level', action='store_const', const='info',
                       help=deprecated('the same as --log-level info', '--verbose'))
