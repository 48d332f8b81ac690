"""The package's commands, run once per test session as a user runs them: subprocesses.

Each function runs one command on the planar2 demo arm with settings that keep it to
seconds (a certificate from ``safety-filter certify`` with 2000 falsifier states, one to
three seconds of simulated motion) and caches the outcome, so that the solver-output tests
(``test_solver_output.py``) read what the command printed and the browser tests
(``test_report_pages.py``) open the report it wrote, without running it twice.

Output goes to a session folder under the system's temporary directory, removed at exit.
"""

from __future__ import annotations

import atexit
import functools
import os
import random
import shutil
import subprocess
import sys
import tempfile
from dataclasses import dataclass, replace
from pathlib import Path

import numpy as np
import pytest
from replay_fixtures import START_NS, RecordedRun, record_filtered_run, write_run_bag

from safety_filter.core.certificate import Certificate
from safety_filter.core.robot_model import RobotModel
from safety_filter.online.barrier_filter import SafetyFilter
from safety_filter.simulation.command_sources import PDBeyondLimits
from safety_filter.simulation.demo_arms import load_demo_arm

REPO = Path(__file__).resolve().parent.parent
ARM = 'planar2'
TIMEOUT_S = 600.0


@dataclass(frozen=True)
class CommandRun:
    """A finished command: what it was, its exit code and everything it printed.

    ``logs`` holds the text of the files its nodes wrote their output to (the demo with one
    process per node), by file name.
    """

    argv: tuple[str, ...]
    returncode: int
    stdout: str
    stderr: str
    output: Path
    logs: tuple[tuple[str, str], ...] = ()

    def describe(self) -> str:
        """The command line and its exit code, for assertion messages."""
        return f'{" ".join(self.argv)} (exit code {self.returncode})'


_FOLDER: list[Path] = []


def session_folder() -> Path:
    """A folder for this session's command output (removed at exit)."""
    if not _FOLDER:
        folder = Path(tempfile.mkdtemp(prefix='safety_filter_commands_'))
        atexit.register(shutil.rmtree, folder, ignore_errors=True)
        _FOLDER.append(folder)
    return _FOLDER[0]


def run_command(arguments: list[str], output: Path, env: dict[str, str] | None = None,
                timeout_s: float = TIMEOUT_S) -> CommandRun:
    """Run ``python -m safety_filter.cli.main <arguments>`` and keep what it printed."""
    argv = [sys.executable, '-m', 'safety_filter.cli.main', *arguments]
    environment = dict(os.environ if env is None else env)
    # The checkout first, so that the code under test is what runs.
    environment['PYTHONPATH'] = os.pathsep.join(
        [str(REPO), *filter(None, [environment.get('PYTHONPATH')])])
    result = subprocess.run(argv, cwd=session_folder(), env=environment, capture_output=True,
                            text=True, timeout=timeout_s, stdin=subprocess.DEVNULL)
    return CommandRun(tuple(argv), result.returncode, result.stdout, result.stderr, output)


@functools.lru_cache(maxsize=None)
def certify_run() -> CommandRun:
    """``safety-filter certify`` (its LPs through HiGHS) with its report folder."""
    folder = session_folder() / 'certify'
    folder.mkdir()
    run = run_command(['certify', '--demo', ARM, '--falsifier-states', '2000',
                       '--output', str(folder / f'{ARM}_certificate.yaml'),
                       '--report-dir', str(folder / 'report')], folder / 'report')
    if run.returncode != 0:
        pytest.fail(f'{run.describe()} failed:\n{run.stdout}\n{run.stderr}')
    return run


def certificate_path() -> Path:
    """The certificate written by :func:`certify_run`."""
    return certify_run().output.parent / f'{ARM}_certificate.yaml'


def _ros_environment() -> tuple[dict[str, str], int]:
    pytest.importorskip('rclpy', reason='rclpy is missing: install the ROS 2 wheels with '
                        "pip install -e '.[ros]' (or source a ROS 2 Jazzy install)")
    domain = random.SystemRandom().randint(100, 200)
    env = dict(os.environ, ROS_DOMAIN_ID=str(domain), ROS_AUTOMATIC_DISCOVERY_RANGE='LOCALHOST')
    return env, domain


@functools.lru_cache(maxsize=None)
def demo_run(processes: bool = False) -> CommandRun:
    """``safety-filter demo`` reusing the session's certificate: an unfiltered and a
    filtered run of the ROS graph (all nodes in the command's process, or one process per
    node) and the report."""
    env, domain = _ros_environment()
    folder = session_folder() / ('demo_processes' if processes else 'demo')
    folder.mkdir()
    shutil.copy(certificate_path(), folder / f'{ARM}_certificate.yaml')
    # One process per node takes seconds to start; a run shorter than that can end
    # before the graph runner has seen its simulated arm.
    duration = '3' if processes else '1'
    run = run_command(['demo', '--demo', ARM, '--duration', duration, '--output-dir',
                       str(folder), '--domain-id', str(domain),
                       *(['--processes'] if processes else [])], folder / 'report', env)
    logs = tuple((path.relative_to(folder).as_posix(), path.read_text(errors='replace'))
                 for path in sorted((folder / 'logs').rglob('*.log')))
    run = CommandRun(run.argv, run.returncode, run.stdout, run.stderr, run.output, logs)
    if run.returncode != 0:
        pytest.fail(f'{run.describe()} failed:\n{run.stdout}\n{run.stderr}')
    return run


def _marginal_run(model: RobotModel, certificate: Certificate, steps: int = 1000
                  ) -> RecordedRun:
    """The arm at rest while the nominal asks for an acceleration just past the first
    joint's bound (by 1e-9 to 1e-3 of it, seeded): the QP's answer lies on that bound, and
    OSQP's own test for active constraints misses it now and then, which is when OSQP 1.x
    prints its "no active set" line. (The filter's other steps skip the solver or leave
    OSQP a clear active set.) The recorded torques are a filter's answers to it all."""
    filt = SafetyFilter(model, certificate)
    rng = np.random.default_rng(0)
    lower, upper = np.array(model.position_lower), np.array(model.position_upper)
    q = np.tile(lower + (upper - lower) * np.linspace(0.0, 0.5, model.n_joints), (steps, 1))
    v = np.zeros((steps, model.n_joints))
    bounds = filt.constraint_bounds(q[0], v[0])
    mass, bias = filt.dynamics.mass_and_bias(q[0], v[0])
    accel_lower, accel_upper = np.array(bounds.accel_lower), np.array(bounds.accel_upper)
    nominal = np.zeros_like(q)
    torque = np.zeros_like(q)
    modes = []
    for k in range(steps):
        accel = 0.5 * (accel_lower + accel_upper)
        accel[0] = accel_upper[0] + 10.0 ** rng.uniform(-9, -3) * max(1.0, abs(accel_upper[0]))
        nominal[k] = mass @ accel + bias
        out = filt.step(q[k], v[k], nominal[k])
        torque[k] = out.torque
        modes.append(str(out.mode))
    return RecordedRun(list(model.joint_names), START_NS + 1_000_000 * np.arange(steps), q, v,
                       nominal, torque, modes)


@functools.lru_cache(maxsize=None)
def replay_run() -> CommandRun:
    """``safety-filter replay`` of a folder of two bags, in worker processes: a recorded
    filtered run (with a gap, an event log, a second certificate and the closed-loop
    re-simulation; its report is the one returned) and :func:`_marginal_run`."""
    folder = session_folder() / 'replay'
    bags = folder / 'bags'
    bags.mkdir(parents=True)
    model = load_demo_arm(ARM)
    certificate = Certificate.load(certificate_path(), model)
    # 1.5 s against a PD pulling past the limits every 0.3 s.
    run = record_filtered_run(model, certificate, PDBeyondLimits(model, period_s=0.3), 1.5,
                              internal_rate_hz=2000.0)
    write_run_bag(bags / 'trial.mcap', run, 'mcap', bare=True, gap=(400, 520))
    write_run_bag(bags / 'marginal.mcap', _marginal_run(model, certificate), 'mcap', bare=True)
    events = folder / 'events.jsonl'
    events.write_text(f'{{"t": {(START_NS + 100_000_000) * 1e-9}, "kind": "operator_stop"}}\n',
                      encoding='utf-8')
    softer = folder / f'{ARM}_softer.yaml'
    beta = np.maximum(certificate.beta_star * 1.05, 0.4 * certificate.beta)
    replace(certificate, beta=beta).save(softer)
    out = folder / 'out'
    result = run_command(['replay', str(bags), '--demo', ARM, '--certificate',
                          str(certificate_path()), '--compare', str(softer), '--closed-loop',
                          '--sim-rate', '2000', '--event-log', str(events), '--output-dir',
                          str(out), '--jobs', '2', '--no-progress'], out / 'trial')
    if result.returncode != 0:
        pytest.fail(f'{result.describe()} failed:\n{result.stdout}\n{result.stderr}')
    return result


@functools.lru_cache(maxsize=None)
def stress_run() -> CommandRun:
    """``safety-filter stress`` with the session's certificate, short runs, one random plant."""
    folder = session_folder() / 'stress'
    run = run_command(['stress', '--demo', ARM, '--certificate', str(certificate_path()),
                       '--duration', '0.4', '--plants', '1', '--jobs', '2', '--seed', '3',
                       '--output-dir', str(folder), '--no-progress'], folder)
    if run.returncode not in (0, 5):  # 5: some run failed the verdict, still a report
        pytest.fail(f'{run.describe()} failed:\n{run.stdout}\n{run.stderr}')
    return run
