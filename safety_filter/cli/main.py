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

SAFETY_NOTICE = (
    'CAUTION: safety_filter is not a certified safety function. It does not replace '
    'hardware emergency stops, safety-rated monitoring or a risk assessment; local '
    'regulations and qualified safety engineers have the last word.')


def build_parser() -> argparse.ArgumentParser:
    """The argument parser of ``safety-filter``."""
    from safety_filter.cli.certify import add_certify_parser
    from safety_filter.cli.check_gravity import add_check_gravity_parser
    from safety_filter.cli.demo import add_demo_parser, add_run_graph_parser
    from safety_filter.cli.inspect_robot import add_inspect_parser
    from safety_filter.cli.monitor import add_monitor_parser
    from safety_filter.cli.node import add_node_parser
    from safety_filter.cli.replay import add_replay_parser
    from safety_filter.cli.stress import add_stress_parser

    parser = argparse.ArgumentParser(
        prog='safety-filter',
        description='Certified barrier safety filter for torque-controlled arms. '
        + SAFETY_NOTICE)
    parser.add_argument('--version', action='version', version=f'%(prog)s {__version__}',
                        help='print the package version and exit')
    commands = parser.add_subparsers(dest='command', required=True)
    for add_parser in (add_inspect_parser, add_certify_parser, add_node_parser,
                       add_replay_parser, add_demo_parser, add_run_graph_parser,
                       add_monitor_parser, add_stress_parser, add_check_gravity_parser):
        add_parser(commands)
    return parser


def main(argv: Sequence[str] | None = None) -> int:
    """Entry point of the ``safety-filter`` command."""
    parser = build_parser()
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
