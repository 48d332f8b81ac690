"""``safety-filter demo``: a careless operator on a simulated arm, without and with the filter.

One command does it all, in an output folder (default ``out/demo``):

1. **Certificate.** ``<arm>_certificate.yaml`` is reused when it is certified, belongs to
   the arm (model hash) and matches the demo's control rate; otherwise the arm is certified
   by ``safety-filter certify`` with its defaults but :data:`DEMO_FALSIFIER_STATES`
   falsifier states (see there), in a subprocess that runs beside the unfiltered run (which
   needs no certificate), and its report is written to ``certificate_report/``.
2. **Two runs** of the simulated graph
   (:func:`safety_filter.ros.graph_specs.sim_demo_graph`), each for the same simulated
   duration with the same operator seed: the *unfiltered* run (the operator's torque
   straight to the simulated arm; a graph without the filter that exists only here, around
   the simulated arm: the filter node has no bypass) and the *filtered* run (operator ->
   filter -> arm). Both are recorded to rosbag2 bags in ``bags/``.
3. **Report.** ``report/demo_report.html`` with PNG plots and ``report/demo_summary.json``
   (:mod:`safety_filter.reports.demo_report`), and a terminal summary of the limit violations per
   joint for each run.

The graph runs on an isolated DDS domain with discovery limited to this machine, so the
simulated arm's joint states cannot reach a real robot's nodes.
"""

from __future__ import annotations

import random
import shutil
import subprocess
import sys
import time
from dataclasses import dataclass
from pathlib import Path
from typing import Any

import yaml

from safety_filter.core.certificate import Certificate
from safety_filter.core.robot_model import RobotModel
from safety_filter.errors import InvalidValue, RunFailed
from safety_filter.recordings import bags
from safety_filter.reports.demo_report import (
    RunData,
    broken_limits,
    format_summary,
    load_run,
    run_violations,
    write_demo_report,
)
from safety_filter.simulation.careless_operator import CarelessOperator
from safety_filter.simulation.demo_arms import DEMO_ARMS, demo_arm_files, load_demo_arm
from safety_filter.simulation.demo_certificate import (
    DEMO_FALSIFIER_STATES,
    reusable_certificate,
)

DEFAULT_FALSIFIER_STATES = 100_000
RUNS = ('unfiltered', 'filtered')
DEFAULT_OUTPUT = Path('out/demo')
DEFAULT_DURATION_S = 10.0

@dataclass
class DemoOptions:
    """Options of :func:`run_demo`.

    Attributes:
        arm: the demo arm (:data:`safety_filter.simulation.demo_arms.DEMO_ARMS`).
        output: the output folder.
        duration_s: simulated seconds of motion per run.
        seed: the operator's seed (None: the parameter file's).
        processes: one process per node (else all in one process).
        executor: ``'events'``, ``'single_threaded'`` or ``'multi_threaded'`` (see the
            runner).
        domain_id: DDS domain of the graph (None: a random one in 150..199).
        storage: bag storage, ``'mcap'`` or ``'sqlite3'``.
        recertify: certify even when a valid certificate exists.
        falsifier_states: falsifier states of a new certification.
        log_level: the nodes' log level (``'warn'``; ``'info'`` shows their info logs).
        wall_timeout_s: give up a run after this many wall seconds (0: no limit).
        progress: print what is going on.
    """

    arm: str = 'bench6'
    output: Path = DEFAULT_OUTPUT
    duration_s: float = DEFAULT_DURATION_S
    seed: int | None = None
    processes: bool = False
    executor: str = 'events'
    domain_id: int | None = None
    storage: str = 'mcap'
    recertify: bool = False
    falsifier_states: int = DEMO_FALSIFIER_STATES
    log_level: str = 'warn'
    wall_timeout_s: float = 600.0
    progress: bool = True


@dataclass
class DemoResult:
    """What :func:`run_demo` produced."""

    certificate_path: Path
    certificate_reused: bool
    runs: dict[str, RunData]
    violations: dict[str, dict[str, Any]]
    report: Path
    summary: str
    wall_s: dict[str, float]

    @property
    def filtered_kept_all(self) -> bool:
        """The filtered run kept every limit."""
        return broken_limits(self.violations['filtered']) == 0

    @property
    def unfiltered_broke_some(self) -> bool:
        """The unfiltered run broke at least one limit."""
        return broken_limits(self.violations['unfiltered']) > 0


def _say(options: DemoOptions, text: str) -> None:
    if options.progress:
        print(text, flush=True)


def _demo_config(path: Path) -> dict[str, Any]:
    document = yaml.safe_load(path.read_text(encoding='utf-8')) or {}
    # Keys are '/**/<node name>' (any namespace) or plain node names: by node name.
    return {str(node).rsplit('/', 1)[-1]: (section or {}).get('ros__parameters', {})
            for node, section in document.items() if isinstance(section, dict)}


class _BackgroundCertification:
    """``safety-filter certify`` in a subprocess, so that it runs beside the unfiltered run
    (which needs no certificate) on the other core."""

    def __init__(self, arm: str, path: Path, control_rate_hz: float, falsifier_states: int,
                 report_dir: Path, log: Path) -> None:
        command = [sys.executable, '-m', 'safety_filter.cli.main', 'certify', '--demo', arm,
                   '--output', str(path), '--report-dir', str(report_dir),
                   '--control-rate', repr(float(control_rate_hz)),
                   '--falsifier-states', str(int(falsifier_states)), '--quiet']
        self.log = log
        self.path = path
        self.start = time.monotonic()
        log.parent.mkdir(parents=True, exist_ok=True)
        with open(log, 'wb') as output:
            self.process = subprocess.Popen(command, stdout=output, stderr=subprocess.STDOUT)

    def wait(self, model: RobotModel) -> tuple[Certificate, float]:
        """Wait for it; the certificate and the seconds it took."""
        code = self.process.wait()
        seconds = time.monotonic() - self.start
        tail = '\n'.join(self.log.read_text(encoding='utf-8', errors='replace')
                         .strip().splitlines()[-12:])
        if code != 0:
            raise RunFailed(f'certification failed (exit code {code}; log '
                            f'{self.log}):\n{tail}')
        return Certificate.load(self.path, model), seconds

    def stop(self) -> None:
        if self.process.poll() is None:
            self.process.kill()
            self.process.wait()


def _fresh_bag_path(path: Path) -> Path:
    """Remove a previous demo bag at ``path`` (only a rosbag2 folder or an empty one)."""
    if path.exists():
        if path.is_dir() and ((path / 'metadata.yaml').is_file() or not any(path.iterdir())):
            shutil.rmtree(path)
        else:
            raise InvalidValue('--output-dir', str(path.parent),
                               detail=f'{path} exists and is not a bag of a previous demo; '
                               'move it away or choose another --output-dir')
    return path


def run_demo(options: DemoOptions) -> DemoResult:
    """Certify (or reuse), run both graphs, write the report (see the module docstring)."""
    from safety_filter.ros.graph_specs import SIM_DEMO_CONFIG, config_file, sim_demo_graph
    from safety_filter.ros.runner import run_graph

    if options.arm not in DEMO_ARMS:
        raise InvalidValue('demo arm', options.arm, f'one of {", ".join(DEMO_ARMS)}')
    if not options.duration_s > 0.0:
        raise InvalidValue('duration', options.duration_s, 'a positive number')
    output = Path(options.output)
    output.mkdir(parents=True, exist_ok=True)
    model = load_demo_arm(options.arm)
    urdf, limits = demo_arm_files(options.arm)
    config = config_file(SIM_DEMO_CONFIG)
    parameters = _demo_config(config)
    sim_parameters = parameters.get('sim_arm', {})
    operator_parameters = parameters.get('careless_operator', {})
    control_rate = float(sim_parameters.get('control_rate_hz', 1000.0))
    seed = int(options.seed if options.seed is not None else operator_parameters.get('seed', 0))
    domain = (options.domain_id if options.domain_id is not None
              else random.SystemRandom().randint(150, 199))

    certificate_path = output / f'{options.arm}_certificate.yaml'
    certificate, note = (None, 'certification asked for') if options.recertify else \
        reusable_certificate(model, certificate_path, control_rate)
    reused = certificate is not None
    background = None
    if certificate is None:
        if options.falsifier_states < 1:
            raise InvalidValue('falsifier_states', options.falsifier_states, '>= 1',
                               detail='the certificate needs the falsifier')
        log = output / 'certify.log'
        _say(options, f'certifying {options.arm} at {control_rate:g} Hz in the background '
                      f'({note}; log {log}) ...')
        background = _BackgroundCertification(
            options.arm, certificate_path, control_rate, options.falsifier_states,
            output / 'certificate_report', log)
    else:
        _say(options, f'certificate {certificate_path}: {note}')

    runs: dict[str, RunData] = {}
    violations: dict[str, dict[str, Any]] = {}
    results = {}
    wall: dict[str, float] = {}
    try:
        for label in RUNS:
            filtered = label == 'filtered'
            if filtered and background is not None:
                _say(options, 'waiting for the certification ...')
                certificate, seconds = background.wait(model)
                wall['certification'] = seconds
                note = f'certified now in {seconds:.0f} s (in the background)'
                _say(options, f'certificate {certificate_path}: {note}')
            bag = _fresh_bag_path(output / 'bags' / label)
            specs = sim_demo_graph(
                urdf_path=urdf, limits_path=limits,
                certificate=certificate_path if filtered else None, filtered=filtered,
                duration_s=options.duration_s, seed=seed, bag_path=bag,
                storage=options.storage, config=config, control_rate_hz=control_rate)
            _say(options, f'{label} run: {options.duration_s:g} s of simulated motion '
                          f'(ROS domain {domain}) ...')
            start = time.monotonic()
            result = run_graph(specs, processes=options.processes, executor=options.executor,
                               domain_id=domain, localhost_only=True,
                               log_level=options.log_level,
                               log_dir=output / 'logs' / label if options.processes else None,
                               wall_timeout_s=options.wall_timeout_s)
            wall[label] = time.monotonic() - start
            if result.interrupted:  # SIGINT/SIGTERM: stop like any interrupted command
                raise KeyboardInterrupt
            if not result.finished:
                raise RunFailed(f'the {label} run did not finish within '
                                f'{options.wall_timeout_s:g} s of wall time')
            results[label] = result
            command_topic = bags.TOPIC_COMMAND if filtered else bags.TOPIC_NOMINAL
            runs[label] = load_run(bag, model, label, command_topic)
            violations[label] = run_violations(model, runs[label])
            _say(options, f'{label} run: done in {wall[label]:.1f} s of wall time')
    finally:
        if background is not None:
            background.stop()
    if certificate is None:  # cannot happen: set by the reuse check or the certification
        raise RunFailed('no certificate')

    pairs = [(runs[label], violations[label]) for label in RUNS]
    summary = format_summary(model, pairs)
    operator = CarelessOperator(
        model, seed=seed, segment_s=(float(operator_parameters.get('segment_min_s', 2.0)),
                                     float(operator_parameters.get('segment_max_s', 4.0))))
    longest = max(run.duration_s for run in runs.values())
    schedule = operator.schedule(longest + 1.0)
    offsets = [float(run.nominal_time_s[0]) if run.nominal_time_s.size else 0.0
               for run in runs.values()]
    rate_factor = {label: runs[label].duration_s / max(results[label].wall_s, 1e-9)
                   for label in RUNS}
    falsifier_states = certificate.settings.get('certify', {}).get('falsifier_states', '?')
    internal_rate = float(sim_parameters.get('internal_rate_hz', 0.0)) or 10 * control_rate
    facts = [
        ('arm', _simulated_arm_text(model, sim_parameters, parameters.get('safety_filter', {}))),
        ('certificate', f'{certificate_path} (id {certificate.certificate_id}, '
                        f'{"reused" if reused else "new"}): {note}'),
        ('certification settings',
         f'{falsifier_states} falsifier states (the default of safety-filter certify is '
         f'{DEFAULT_FALSIFIER_STATES}; the demo uses {DEMO_FALSIFIER_STATES} to save time), '
         'other settings the defaults; the certificate passed every check (certified)'),
        ('control rate', f'{control_rate:g} Hz, simulation RK4 at {internal_rate:g} Hz'),
        ('operator', f'careless_operator, seed {seed}, '
                     f'{float(operator_parameters.get("rate_hz", 100.0)):g} Hz'),
        ('simulated motion per run', f'{options.duration_s:g} s'),
        ('wall time', ', '.join(f'{k} {v:.1f} s' for k, v in wall.items())
         + (' (the certification ran beside the unfiltered run)' if background else '')),
        ('simulated / wall time', ', '.join(f'{k} {v:.2f}' for k, v in rate_factor.items())
         + ' (lockstep in the filtered run: the arm waits for each command)'),
        ('graph', f'{"one process per node" if options.processes else "one process"}, '
                  f'{options.executor} executor, ROS domain {domain} (localhost only)'),
    ]
    for label in RUNS:
        stats = results[label].sim_stats
        if stats:
            facts.append((f'simulated driver, {label} run',
                          f'{stats["ticks"]} ticks, {stats["stale_ticks"]} at zero torque '
                          f'(stale command), {stats["invalid_commands"]} invalid commands, '
                          f'{stats["lockstep_timeouts"]} lockstep timeouts (a tick with the '
                          'held command because no answer came in time)'))
    certificate_page = output / 'certificate_report' / 'certificate_report.html'
    report = write_demo_report(
        output / 'report', model, certificate, pairs, schedule, facts, offsets,
        '../certificate_report/certificate_report.html' if certificate_page.is_file() else None)
    return DemoResult(certificate_path, reused, runs, violations, report, summary, wall)


def _simulated_arm_text(model: Any, sim: dict[str, Any], filter_parameters: dict[str, Any]
                        ) -> str:
    """How the simulated arm differs from the filter's model, in words."""
    payload = float(sim.get('payload_mass', 0.0))
    if payload < 0.0:
        payload = model.payload.mass_max
    scale = float(sim.get('link_mass_scale', 1.0))
    told = float(filter_parameters.get('payload_mass', -1.0))
    filter_text = (f'the filter is told {told:g} kg' if told >= 0.0 else
                   'not told to the filter, whose model carries '
                   f'{0.5 * (model.payload.mass_min + model.payload.mass_max):g} kg')
    links = ('links as in the URDF' if scale == 1.0 else
             f'every link mass and inertia {100 * (scale - 1):+.0f} % off the URDF')
    return (f'{model.name} ({model.n_joints} joints), payload {payload:g} kg ({filter_text}), '
            f'{links}')
