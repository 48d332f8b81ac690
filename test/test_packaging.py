"""The package's own promises about itself: commands, versions, installed files."""

from __future__ import annotations

import ast
import re
import xml.etree.ElementTree as ElementTree
from pathlib import Path

import pytest

import safety_filter

REPO = Path(__file__).resolve().parent.parent


def _readme_commands() -> list[str]:
    text = (REPO / 'README.md').read_text(encoding='utf-8')
    return [line.strip() for line in text.splitlines() if line.startswith('    python3 -m pip')]


def test_readme_test_command_is_what_ci_runs() -> None:
    commands = _readme_commands()
    tests = [c for c in commands if 'pytest' in c]
    assert len(tests) == 1, commands
    ci = (REPO / '.ci' / 'run').read_text(encoding='utf-8').splitlines()
    assert tests[0] in [line.strip() for line in ci]


def test_readme_main_job_command_uses_an_existing_cli_command() -> None:
    from safety_filter.cli.main import build_parser

    main_jobs = [c for c in _readme_commands() if 'safety-filter' in c]
    assert main_jobs, 'README must give the main-job command'
    command = main_jobs[0].split('&&', 1)[1].split()
    assert command[0] == 'safety-filter'
    build_parser().parse_args(command[1:])  # exits (fails the test) on unknown options


def _readme_section(title: str) -> str:
    text = (REPO / 'README.md').read_text(encoding='utf-8')
    start = text.index(f'\n## {title}\n')
    end = text.find('\n## ', start + 1)
    return text[start:end if end >= 0 else len(text)]


def _indented_commands(section: str, program: str) -> list[str]:
    """The indented (code block) command lines of a README section that run ``program``,
    with backslash continuations joined."""
    commands: list[str] = []
    lines = section.splitlines()
    k = 0
    while k < len(lines):
        line = lines[k]
        if line.startswith('    ') and line.strip().startswith(program + ' '):
            command = line.strip()
            while command.endswith('\\') and k + 1 < len(lines):
                k += 1
                command = command[:-1].rstrip() + ' ' + lines[k].strip()
            commands.append(command)
        k += 1
    return commands


def test_readme_commissioning_commands_parse() -> None:
    # Every `safety-filter ...` line of the commissioning steps parses with the real parser
    # (nothing runs: parse_args only).
    import shlex

    from safety_filter.cli.main import build_parser

    commands = _indented_commands(_readme_section('Commissioning an arm'), 'safety-filter')
    used = {shlex.split(command)[1] for command in commands}
    assert {'inspect', 'certify', 'stress', 'check-gravity', 'node', 'monitor'} <= used, used
    parser = build_parser()
    for command in commands:
        words = shlex.split(command)
        assert words[0] == 'safety-filter', command
        args = parser.parse_args(words[1:])  # exits (fails the test) on unknown options
        assert args.command == words[1]


def _colcon_style_install(prefix: Path, build: Path) -> dict[str, str]:
    """Install the package into ``prefix`` the way ``colcon build`` does for an ament_python
    package, and return the environment a sourced ``install/setup.bash`` would give.

    The command is colcon-core's (its python build task, without ``--symlink-install``):
    ``setup.py egg_info ... build ... install --record ... --install-scripts <setup.cfg's
    install_scripts> --single-version-externally-managed install_data``, with the prefix
    given by ``--prefix`` (colcon sets it through a sitecustomize; the layout is the same).
    The environment follows colcon's hooks: the prefix's site-packages on PYTHONPATH, the
    prefix on AMENT_PREFIX_PATH, and ``<prefix>/bin`` on PATH only if it holds a file (so
    ``safety-filter`` is found there or not at all, not through this machine's own
    install).
    """
    import configparser
    import os
    import subprocess
    import sys
    import sysconfig

    build.mkdir(parents=True, exist_ok=True)  # egg_info needs its base to exist
    config = configparser.ConfigParser()
    config.read(REPO / 'setup.cfg')
    install_scripts = config.get('install', 'install_scripts')
    command = [sys.executable, 'setup.py', 'egg_info', '--egg-base', str(build),
               'build', '--build-base', str(build / 'build'),
               'install', '--record', str(build / 'install.log'),
               '--install-scripts', install_scripts, '--single-version-externally-managed',
               '--prefix', str(prefix), 'install_data']
    done = subprocess.run(command, cwd=REPO, capture_output=True, text=True)
    assert done.returncode == 0, done.stdout[-2000:] + done.stderr[-2000:]
    site = Path(sysconfig.get_path('purelib', vars={'base': str(prefix)}))
    env = dict(os.environ)
    env['PYTHONPATH'] = os.pathsep.join([str(site)] + [p for p in [env.get('PYTHONPATH')]
                                                       if p])
    env['AMENT_PREFIX_PATH'] = os.pathsep.join(
        [str(prefix)] + [p for p in [env.get('AMENT_PREFIX_PATH')] if p])
    # Only the install's bin and the system folders: this machine's own safety-filter (an
    # editable pip install) must not be what the test finds.
    system = [p for p in env.get('PATH', '').split(os.pathsep)
              if p and not (Path(p) / 'safety-filter').exists()]
    bin_dir = prefix / 'bin'
    has_file = bin_dir.is_dir() and any(f.is_file() for f in bin_dir.iterdir())
    env['PATH'] = os.pathsep.join(([str(bin_dir)] if has_file else []) + system)
    env['PYTHONDONTWRITEBYTECODE'] = '1'
    return env


@pytest.mark.slow
def test_readme_commissioning_commands_run_in_a_colcon_install_layout(tmp_path: Path) -> None:
    """After `colcon build` and `source install/setup.bash`, the README's commissioning
    commands find `safety-filter` on PATH (not only through `ros2 run`), every subcommand
    they use answers --help, and the file-only steps (inspect, certify) run as written, on a
    copy of the planar2 demo arm named as in the README."""
    import shlex
    import shutil
    import subprocess
    import sys

    from safety_filter.simulation.demo_arms import demo_arm_files

    prefix = tmp_path / 'install' / 'safety_filter'
    env = _colcon_style_install(prefix, tmp_path / 'build')
    found = shutil.which('safety-filter', path=env['PATH'])
    assert found == str(prefix / 'bin' / 'safety-filter'), found
    for executable in ('safety-filter', 'filter_node'):  # `ros2 run safety_filter <exe>`
        assert (prefix / 'lib' / 'safety_filter' / executable).is_file(), executable
    record = (tmp_path / 'build' / 'install.log').read_text(encoding='utf-8')
    assert str(prefix / 'bin' / 'safety-filter') in record  # colcon can uninstall it
    work = tmp_path / 'work'
    work.mkdir()
    urdf, limits = demo_arm_files('planar2')
    shutil.copy(urdf, work / 'arm.urdf')
    shutil.copy(limits, work / 'arm_limits.yaml')

    def run(words: list[str]) -> subprocess.CompletedProcess[str]:
        return subprocess.run(words, cwd=work, env=env, capture_output=True, text=True,
                              timeout=300)

    where = run([sys.executable, '-c', 'import safety_filter, sys; '
                 'from safety_filter.ros.graph_specs import config_file; '
                 'print(safety_filter.__file__); print(config_file("filter.yaml"))'])
    assert where.returncode == 0, where.stderr
    module, config = where.stdout.split()
    assert Path(module).is_relative_to(prefix) and Path(config).is_relative_to(prefix), \
        where.stdout  # the installed package and its share folder, not the source tree
    assert run(['safety-filter', '--version']).stdout.strip() == \
        f'safety-filter {safety_filter.__version__}'

    commands = [shlex.split(c) for c in
                _indented_commands(_readme_section('Commissioning an arm'), 'safety-filter')]
    assert commands
    for subcommand in sorted({words[1] for words in commands}):
        answer = run(['safety-filter', subcommand, '--help'])
        text = ' '.join(answer.stdout.split())  # argparse wraps the description
        assert answer.returncode == 0 and 'Exit code' in text, (subcommand, answer.stderr)
    for words in commands:
        if words[1] in ('inspect', 'certify'):  # the steps that need only the arm's files
            done = run(words)
            assert done.returncode == 0, (words, done.stdout[-1500:], done.stderr[-1500:])
    assert (work / 'arm_certificate.yaml').is_file()


def test_readme_opens_with_the_job_and_carries_the_cautions() -> None:
    text = (REPO / 'README.md').read_text(encoding='utf-8')
    first = text.split('\n\n')[1]
    assert 'torque-controlled' in first and 'limits' in first
    for phrase in ('not a certified safety function', 'emergency stop', 'risk assessment',
                   'qualified safety'):
        assert phrase in text


def test_versions_agree() -> None:
    package_xml = ElementTree.parse(REPO / 'package.xml').getroot()
    xml_version = package_xml.findtext('version')
    setup_tree = ast.parse((REPO / 'setup.py').read_text(encoding='utf-8'))
    setup_version = next(
        keyword.value.value for node in ast.walk(setup_tree) if isinstance(node, ast.Call)
        for keyword in node.keywords if keyword.arg == 'version')
    assert xml_version == setup_version == safety_filter.__version__


def test_package_xml_declares_ros_dependencies_and_build_type() -> None:
    root = ElementTree.parse(REPO / 'package.xml').getroot()
    assert root.get('format') == '3'
    depends = {e.text for e in root.findall('exec_depend')}
    for name in ('rclpy', 'sensor_msgs', 'std_msgs', 'diagnostic_msgs', 'std_srvs',
                 'lifecycle_msgs', 'python3-numpy', 'python3-yaml'):
        assert name in depends
    assert root.find('export/build_type').text == 'ament_python'


def test_ros_run_finds_executables_in_lib() -> None:
    # `ros2 run` looks in lib/<package>; setup.cfg must put console scripts there.
    text = (REPO / 'setup.cfg').read_text(encoding='utf-8')
    assert re.search(r'install_scripts\s*=\s*\$base/lib/safety_filter', text)
    assert re.search(r'script_dir\s*=\s*\$base/lib/safety_filter', text)
    assert (REPO / 'resource' / 'safety_filter').is_file()


def test_code_style_is_clean() -> None:
    # The ROS 2 linters' defaults (99 columns, single quotes, ordered imports), via ruff.
    import shutil
    import subprocess
    import sys

    import pytest

    if shutil.which('ruff') is None:
        pytest.skip('ruff is not installed (python3 -m pip install ruff)')
    result = subprocess.run([sys.executable, '-m', 'ruff', 'check', 'safety_filter', 'test',
                             'benchmarks'], cwd=REPO, capture_output=True, text=True)
    assert result.returncode == 0, result.stdout + result.stderr


# The modules `import safety_filter` must not load: the solvers, the compiled kernels, the
# optional backends and the report and bag libraries load on first use of a name that needs
# them, so `--help`, `--version` and the ROS entry points start quickly.
HEAVY_MODULES = ('scipy', 'osqp', 'numba', 'pinocchio', 'matplotlib', 'rosbags')


def test_package_root_is_lazy_and_every_public_name_resolves() -> None:
    import json
    import subprocess
    import sys

    probe = (
        'import json, sys\n'
        'import safety_filter\n'
        f'heavy = sorted(m for m in sys.modules if m.split(".")[0] in {HEAVY_MODULES!r})\n'
        'names = list(safety_filter.__all__)\n'
        'missing = [n for n in names if getattr(safety_filter, n, None) is None]\n'
        'print(json.dumps({"heavy": heavy, "names": names, "missing": missing,\n'
        '                  "dir": sorted(set(names) - set(dir(safety_filter)))}))\n'
    )
    done = subprocess.run([sys.executable, '-c', probe], cwd=REPO, capture_output=True,
                          text=True, timeout=300)
    assert done.returncode == 0, done.stderr[-2000:]
    found = json.loads(done.stdout.splitlines()[-1])
    assert found['heavy'] == [], f'import safety_filter loads {found["heavy"]}'
    assert found['missing'] == [] and found['dir'] == [], found
    assert {'RobotModel', 'Certificate', 'SafetyFilter', 'certify'} <= set(found['names'])
    assert len(found['names']) == len(set(found['names']))


def test_package_root_refuses_unknown_names() -> None:
    with pytest.raises(AttributeError, match='no attribute'):
        safety_filter.NoSuchName  # noqa: B018
