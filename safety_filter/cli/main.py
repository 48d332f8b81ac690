"""Command line: ``safety-filter <command>``; builds the parser and dispatches.

Each command lives in a module of its own (``cli/<command>.py``: its options and its
handler); the option blocks several commands share are in :mod:`safety_filter.cli.robot_options`.
Building the parser imports no numeric library: handlers import what they need when they
run, so ``safety-filter --help`` and ``safety-filter <command> --help`` answer at once.

Exit codes are :class:`safety_filter.errors.ExitCode`: a handler returns one, and a command
that ends on an error of the package exits with that error's ``exit_code`` (2 for bad input).
"""

from __future__ import annotations

import argparse
import sys
from collections.abc import Sequence

from safety_filter._version import __version__
from safety_filter.errors import ExitCode, SafetyFilterError
from safety_filter.safety_notice import SAFETY_NOTICE

# name: (module under safety_filter.cli, function adding its parser, one-line help)
COMMANDS: dict[str, tuple[str, str, str]] = {
    'inspect': ('inspect_robot', 'add_inspect_parser',
                'load a robot and print its chain, limits and dynamics at a few states'),
    'certify': ('certify', 'add_certify_parser',
                'certify barrier gains for a robot; write the parameter file and a report'),
    'node': ('node', 'add_node_parser',
             'run the safety filter ROS 2 node (configured, inactive until activated)'),
    'replay': ('replay', 'add_replay_parser',
               'replay recorded bags through the filter; reports, comparisons'),
    'demo': ('demo', 'add_demo_parser',
             'the one-command demo: a careless operator on a simulated arm, without and with '
             'the filter, recorded and reported'),
    'run-graph': ('demo', 'add_run_graph_parser',
                  'start the node graph of a launch file without ros2 launch'),
    'monitor': ('monitor', 'add_monitor_parser',
                'watch a running filter live in the terminal; log its events'),
    'stress': ('stress', 'add_stress_parser',
               'closed-loop stress test against plants from the uncertainty set'),
    'check-gravity': ('check_gravity', 'add_check_gravity_parser',
                      "check the driver's gravity convention from joint efforts at rest (a "
                      'bag or a live topic)'),
}
_ALL = object()


class _CommandHelp:
    """The subparsers action as a command module sees it: the one-line help comes from
    :data:`COMMANDS`, so that the top-level ``--help`` needs no command module."""

    def __init__(self, commands: argparse._SubParsersAction) -> None:
        self._commands = commands

    def add_parser(self, name: str, **kwargs: object) -> argparse.ArgumentParser:
        kwargs.setdefault('help', COMMANDS[name][2])
        return self._commands.add_parser(name, **kwargs)


def build_parser(command: object = _ALL) -> argparse.ArgumentParser:
    """The argument parser of ``safety-filter``.

    Args:
        command: the command whose options to build; the others get their name and
            one-line help only, which is all ``safety-filter --help`` shows. By default
            every command is built.
    """
    import importlib

    parser = argparse.ArgumentParser(
        prog='safety-filter',
        description='Certified barrier safety filter for torque-controlled arms. '
        + SAFETY_NOTICE)
    parser.add_argument('--version', action='version', version=f'%(prog)s {__version__}',
                        help='print the package version and exit')
    commands = parser.add_subparsers(dest='command', required=True)
    for name, (module, adder, help_text) in COMMANDS.items():
        if command is _ALL or command == name:
            add_parser = getattr(importlib.import_module(f'safety_filter.cli.{module}'), adder)
            add_parser(_CommandHelp(commands))
        else:
            commands.add_parser(name, help=help_text)
    return parser


def _command_named(argv: Sequence[str]) -> str | None:
    """The command that ``argv`` names (its first word that is not an option), if any."""
    for word in argv:
        if not word.startswith('-'):
            return word if word in COMMANDS else None
    return None


def main(argv: Sequence[str] | None = None) -> int:
    """Entry point of the ``safety-filter`` command."""
    argv = sys.argv[1:] if argv is None else list(argv)
    parser = build_parser(_command_named(argv))
    try:
        args = parser.parse_args(argv)
    except SystemExit as err:  # argparse: --help (0) or bad options (2)
        return err.code if isinstance(err.code, int) else ExitCode.BAD_INPUT
    print(SAFETY_NOTICE, file=sys.stderr)
    try:
        return int(args.handler(args))
    except SafetyFilterError as err:
        print(f'error: {err}', file=sys.stderr)
        return int(err.exit_code)


if __name__ == '__main__':
    sys.exit(main())
