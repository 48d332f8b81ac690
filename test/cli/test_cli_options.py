"""One option name per concept across every ``safety-filter`` subcommand.

Walks every subparser of :func:`safety_filter.cli.main.build_parser` and fails on an option
spelled another way than the table below says (an earlier spelling is allowed only as an
alias of the right option, marked deprecated in its help), on an option without help text,
and on a subcommand whose description does not give its exit codes. The launch files'
arguments and the filter node's thin-margin default follow the same concepts.
"""

from __future__ import annotations

import argparse
import ast
import re
from pathlib import Path

import pytest
import yaml

from safety_filter.cli.main import build_parser
from safety_filter.online.status_layout import THIN_MARGIN
from safety_filter.recordings.bags import STORAGES
from safety_filter.ros.names import EXECUTORS

REPO = Path(__file__).resolve().parents[2]

# concept -> its one spelling
CONCEPTS = {
    'demo arm': '--demo',
    'URDF': '--urdf',
    'limits file': '--limits',
    'one file written': '--output',
    'folder written': '--output-dir',
    'bag storage': '--storage',
    'executor': '--executor',
    'certified control rate': '--control-rate',
    'watchdog rate': '--watchdog-rate',
    'screen refresh rate': '--refresh-rate',
    'no progress bar': '--no-progress',
    'less output': '--quiet',
    "nodes' log level": '--log-level',
    'thin-margin threshold': '--thin-margin',
    'joint states topic': '--joint-states-topic',
    'ROS namespace': '--namespace',
    'robot description topic': '--robot-description-topic',
}
# known other spellings -> the concept's spelling (allowed only as deprecated aliases)
ALTERNATIVES = {
    '--arm': '--demo', '--robot': '--demo', '--demo-arm': '--demo',
    '--urdf-path': '--urdf', '--urdf-file': '--urdf',
    '--limits-path': '--limits', '--limits-file': '--limits',
    '--output-file': '--output', '--out-file': '--output',
    '--out': '--output-dir', '--out-dir': '--output-dir', '--outdir': '--output-dir',
    '--output-folder': '--output-dir', '--bag': '--output-dir', '--bag-dir': '--output-dir',
    '--bag-storage': '--storage', '--storage-id': '--storage',
    '--rate': '--refresh-rate', '--control-rate-hz': '--control-rate',
    '--watchdog-rate-hz': '--watchdog-rate',
    '--progress': '--no-progress', '--no-progress-bar': '--no-progress',
    '--silent': '--quiet', '--verbose': '--log-level',
    '--margin-warn': '--thin-margin', '--thin-margin-threshold': '--thin-margin',
    '--topic': '--joint-states-topic', '--joint-state-topic': '--joint-states-topic',
    '--ns': '--namespace', '--ros-namespace': '--namespace', '--node-namespace': '--namespace',
    '--description-topic': '--robot-description-topic',
    '--urdf-topic': '--robot-description-topic',
}
NO_PROGRESS_HELP = 'no progress bar'


def subcommands(parser: argparse.ArgumentParser) -> dict[str, argparse.ArgumentParser]:
    """``name -> subparser`` of ``parser``."""
    for action in parser._actions:
        if isinstance(action, argparse._SubParsersAction):
            return dict(action.choices)
    return {}


def option_problems(name: str, parser: argparse.ArgumentParser) -> list[str]:
    """What is wrong with the options and description of the subcommand ``name``."""
    problems = []
    description = parser.description or ''
    if not re.search(r'Exit codes? ', description) or not re.search(r'\b2\b', description):
        problems.append(f'{name}: the description does not give the exit codes (0 ... and '
                        '2: bad input)')
    for action in parser._actions:
        if isinstance(action, argparse._HelpAction):
            continue
        strings = list(action.option_strings)
        label = f'{name} {"/".join(strings) or action.dest}'
        text = action.help if isinstance(action.help, str) else ''
        if not text.strip() or action.help == argparse.SUPPRESS:
            problems.append(f'{label}: no help text')
        if not strings:
            continue  # a positional argument
        first = strings[0]
        if first in ALTERNATIVES and not ('deprecated' in text and first in text and any(
                ALTERNATIVES[first] in other.option_strings and other.dest == action.dest
                for other in parser._actions)):
            # (a deprecated option of its own, like --verbose, must set the new one's dest)
            problems.append(f'{label}: {first} is spelled {ALTERNATIVES[first]}')
        for alias in strings[1:]:
            if alias in ALTERNATIVES and not (ALTERNATIVES[alias] == first
                                              and 'deprecated' in text and alias in text):
                problems.append(f'{label}: {alias} is not a deprecated alias of '
                                f'{ALTERNATIVES[alias]}')
        if first == '--output' and action.metavar == 'DIR':
            problems.append(f'{label}: a folder is --output-dir DIR')
        if first == '--output-dir' and action.metavar != 'DIR':
            problems.append(f'{label}: --output-dir takes a DIR')
        if first == '--control-rate' and 'certif' not in text:
            problems.append(f'{label}: --control-rate is the certified control rate')
        if first == '--executor' and not set(action.choices or ()) <= set(EXECUTORS):
            problems.append(f'{label}: executors are {EXECUTORS}')
        if first == '--storage' and tuple(action.choices or ()) != STORAGES:
            problems.append(f'{label}: storages are {STORAGES}')
        if first == '--no-progress' and text != NO_PROGRESS_HELP:
            problems.append(f'{label}: --no-progress means {NO_PROGRESS_HELP!r}, nothing else')
        if first == '--quiet' and not text.startswith('print only'):
            problems.append(f'{label}: --quiet prints only the verdict (or summary) and files')
        if first == '--thin-margin' and action.default != THIN_MARGIN:
            problems.append(f'{label}: the default thin margin is status_layout.THIN_MARGIN')
    return problems


def _normal(option: str) -> str:
    """``--joint-states-topic`` and ``--joint-state-topic`` read the same."""
    return '-'.join(word.rstrip('s') for word in option.lstrip('-').split('-'))


COMMANDS = subcommands(build_parser())


def test_the_walk_finds_every_subcommand() -> None:
    assert {'inspect', 'certify', 'node', 'replay', 'demo', 'run-graph', 'monitor', 'stress',
            'check-gravity'} <= set(COMMANDS)


@pytest.mark.parametrize('name', sorted(COMMANDS))
def test_options_follow_the_table_have_help_and_exit_codes_are_given(name: str) -> None:
    assert option_problems(name, COMMANDS[name]) == []


def test_no_two_spellings_of_one_word_sequence_across_subcommands() -> None:
    spellings: dict[str, set[str]] = {}
    for parser in COMMANDS.values():
        for action in parser._actions:
            for option in action.option_strings:
                spellings.setdefault(_normal(option), set()).add(option)
    assert {k: v for k, v in spellings.items() if len(v) > 1} == {}


def test_every_concept_of_the_table_is_in_use() -> None:
    used = {o for p in COMMANDS.values() for a in p._actions for o in a.option_strings}
    assert set(CONCEPTS.values()) <= used
    assert not set(CONCEPTS.values()) & set(ALTERNATIVES)


def test_the_checker_catches_a_bad_subcommand() -> None:
    bad = argparse.ArgumentParser(description='Does things.')
    bad.add_argument('--out', metavar='DIR', help='output folder')
    bad.add_argument('--output', metavar='DIR', help='output folder')
    bad.add_argument('--demo', '--arm', help='a demo arm')  # alias not marked deprecated
    bad.add_argument('--control-rate', help="the watchdog's rate")
    bad.add_argument('--executor', choices=('single', 'events'), help='executor')
    bad.add_argument('--quiet', action='store_true', help='no progress bar')
    bad.add_argument('--seed')
    bad.add_argument('--log-level', help='log level')
    bad.add_argument('--verbose', action='store_true', help='deprecated: --verbose')
    problems = '\n'.join(option_problems('bad', bad))
    for expected in ('exit codes', '--out is spelled --output-dir', 'a folder is --output-dir',
                     '--arm is not a deprecated alias', 'certified control rate',
                     'executors are', '--quiet prints only', 'bad --seed: no help text',
                     '--verbose is spelled --log-level'):
        assert expected in problems, problems


def test_deprecated_spellings_still_parse_to_the_new_options() -> None:
    parser = build_parser()
    args = parser.parse_args(['run-graph', '--arm', 'planar2', '--bag', 'b', '--executor',
                              'single', '--verbose'])
    assert (args.demo, args.output_dir, args.executor, args.log_level) == (
        'planar2', 'b', 'single_threaded', 'info')
    args = parser.parse_args(['run-graph', '--executor', 'multi'])
    assert (args.executor, args.log_level) == ('multi_threaded', 'warn')
    args = parser.parse_args(['replay', 'x', '--certificate', 'c', '--out', 'o',
                              '--bag-storage', 'sqlite3'])
    assert (args.output_dir, args.storage) == ('o', 'sqlite3')
    assert parser.parse_args(['demo', '--arm', 'planar2']).demo == 'planar2'
    assert parser.parse_args(['monitor', '--rate', '2']).refresh_rate == 2.0
    assert parser.parse_args(['check-gravity', '--topic', 't']).joint_states_topic == 't'


def test_the_executables_own_options_have_help_too() -> None:
    """Beyond the safety-filter subcommands: the filter_node executable's own options and
    the --executor option every node executable takes."""
    pytest.importorskip('rclpy', reason="the node executables need rclpy: pip install -e "
                        "'.[ros]'")
    import inspect

    from safety_filter.ros import _common, filter_node

    assert option_problems('filter_node', _with_exit_codes(
        filter_node.own_argument_parser())) == []
    source = inspect.getsource(_common._executor_argument)
    assert "help='" in source and 'add_argument' in source


def test_every_option_in_the_repository_has_help() -> None:
    """Every add_argument call of the package and the benchmark scripts gives help text,
    read from the source (the scripts build their parsers inside main())."""
    missing = []
    for path in sorted([*(REPO / 'safety_filter').rglob('*.py'),
                        *(REPO / 'benchmarks').glob('*.py')]):
        for node in ast.walk(ast.parse(path.read_text(encoding='utf-8'))):
            if isinstance(node, ast.Call) and getattr(node.func, 'attr', '') == \
                    'add_argument' and not any(k.arg == 'help' for k in node.keywords):
                missing.append(f'{path.relative_to(REPO)}:{node.lineno}')
    assert missing == []


def _with_exit_codes(parser: argparse.ArgumentParser) -> argparse.ArgumentParser:
    # The executables document their exit codes in their main() docstrings, not in an
    # argparse description: check only the options here.
    parser.description = (parser.description or '') + ' Exit code 0, 2.'
    return parser


def test_namespace_option_takes_ros_namespaces_only() -> None:
    from safety_filter.errors import InvalidValue
    from safety_filter.ros.names import ros_namespace

    parser = build_parser()
    for command in (['run-graph'], ['node', '--certificate', 'c.yaml', '--demo', 'planar2']):
        assert parser.parse_args([*command, '--namespace', 'left']).namespace == '/left'
        assert parser.parse_args([*command, '--namespace', '/cell_2/left']).namespace == \
            '/cell_2/left'
        assert parser.parse_args(command).namespace == ''
        for bad in ('2arm', 'a b', '/a//b', 'left/', '~/x'):
            with pytest.raises(SystemExit):
                parser.parse_args([*command, '--namespace', bad])
    with pytest.raises(InvalidValue, match='not a ROS namespace'):
        ros_namespace('arm-1')
    assert ros_namespace('/') == ''


def test_run_graph_control_rate_is_gone_and_the_watchdog_rate_has_its_name() -> None:
    options = {o for a in COMMANDS['run-graph']._actions for o in a.option_strings}
    assert '--watchdog-rate' in options and '--control-rate' not in options
    assert build_parser().parse_args(['run-graph', '--watchdog-rate', '50']).watchdog_rate == 50


def test_one_thin_margin_for_the_node_and_the_monitor() -> None:
    from safety_filter.monitor.state import DEFAULT_THIN_MARGIN

    assert DEFAULT_THIN_MARGIN == THIN_MARGIN
    source = (REPO / 'safety_filter' / 'ros' / 'filter_node_parameters.py').read_text(
        encoding='utf-8')
    assert "declare_parameter('thin_margin', THIN_MARGIN," in source
    assert 'margin_warn' not in source
    config = yaml.safe_load((REPO / 'config' / 'filter.yaml').read_text(encoding='utf-8'))
    assert config['/**/safety_filter']['ros__parameters']['thin_margin'] == THIN_MARGIN


def _launch_arguments(path: Path) -> list[str]:
    tree = ast.parse(path.read_text(encoding='utf-8'))
    return [node.args[0].value for node in ast.walk(tree)
            if isinstance(node, ast.Call) and getattr(node.func, 'id', '') ==
            'DeclareLaunchArgument' and node.args and isinstance(node.args[0], ast.Constant)]


@pytest.mark.parametrize('launch', ['sim_demo.launch.py', 'hardware.launch.py'])
def test_launch_arguments_name_the_concepts_of_run_graph(launch: str) -> None:
    """Each launch argument is a ``run-graph`` option: ``urdf_path`` is ``--urdf``,
    ``watchdog_rate_hz`` is ``--watchdog-rate``, ``joint_states_topic`` is
    ``--joint-states-topic``."""
    options = {o for a in COMMANDS['run-graph']._actions for o in a.option_strings}
    arguments = _launch_arguments(REPO / 'launch' / launch)
    assert arguments
    for argument in arguments:
        option = '--' + re.sub(r'_(path|hz)$', '', argument).replace('_', '-')
        assert option not in ALTERNATIVES, argument
        assert option in options, f'launch argument {argument}: no run-graph {option}'


def test_the_gravity_conventions_offered_are_the_filters() -> None:
    from safety_filter.cli.robot_options import GRAVITY_CONVENTIONS
    from safety_filter.online.barrier_filter import GRAVITY_CONVENTIONS as FILTER_CONVENTIONS

    assert GRAVITY_CONVENTIONS == FILTER_CONVENTIONS


# What building the parser must not load: `safety-filter --help` and `safety-filter <command>
# --help` answer without the solver, the kernels, the plots, the bag reader or ROS.
HEAVY_LIBRARIES = ('scipy', 'osqp', 'numba', 'pinocchio', 'matplotlib', 'rosbags', 'rclpy',
                   'dask', 'plotly')


def test_help_loads_no_numeric_or_ros_library() -> None:
    import subprocess
    import sys

    script = ('import sys\n'
              'from safety_filter.cli.main import build_parser\n'
              'build_parser()\n'
              'loaded = {m.split(".")[0] for m in sys.modules}\n'
              f'print(sorted(loaded & set({HEAVY_LIBRARIES!r})))\n'
              'print(sorted(m for m in sys.modules if m.startswith("safety_filter.online.")\n'
              '             and m not in ("safety_filter.online.status_layout",\n'
              '                           "safety_filter.online.mode_codes")))\n')
    result = subprocess.run([sys.executable, '-c', script], capture_output=True, text=True,
                            check=True, cwd=REPO)
    libraries, filter_modules = result.stdout.splitlines()
    assert libraries == '[]', libraries
    assert filter_modules == '[]', filter_modules


def test_the_top_level_help_loads_no_command_module_and_no_numpy() -> None:
    # `safety-filter --help` needs the command names and their one-line help only.
    import subprocess
    import sys

    script = ('import sys\n'
              'from safety_filter.cli.main import main\n'
              'code = main(["--help"])\n'
              'print(code)\n'
              'print(sorted(m for m in sys.modules if m.startswith("safety_filter.cli.")\n'
              '             and m != "safety_filter.cli.main"))\n'
              'print("numpy" in sys.modules)\n')
    result = subprocess.run([sys.executable, '-c', script], capture_output=True, text=True,
                            check=True, cwd=REPO)
    *_, code, command_modules, numpy_loaded = result.stdout.splitlines()
    assert code == '0'
    assert command_modules == '[]', command_modules
    assert numpy_loaded == 'False'
    assert 'check-gravity' in result.stdout and 'certify barrier gains' in result.stdout


def test_a_command_named_builds_its_own_options_only() -> None:
    from safety_filter.cli.main import COMMANDS, build_parser

    parser = build_parser('certify')
    args = parser.parse_args(['certify', '--demo', 'planar2', '--control-rate', '500'])
    assert args.control_rate == 500.0
    with pytest.raises(SystemExit):  # the other commands are names only here
        parser.parse_args(['replay', 'some_bag', '--jobs', '2'])
    for name in COMMANDS:  # each command's options build on their own
        with pytest.raises(SystemExit) as stop:
            build_parser(name).parse_args([name, '--help'])
        assert stop.value.code == 0, name
