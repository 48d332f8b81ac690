"""The stress test's runs: one run of the matrix, all of them in worker processes.

:class:`StressContext` holds what every run of a matrix shares (model, certificate, filter,
plants, start state) and runs one cell (:meth:`StressContext.run`: the closed loop of
:func:`safety_filter.simulation.plant.run_plant_loop`, measured and judged by
:mod:`safety_filter.campaigns.stress_verdict`). :func:`run_stress` runs the whole matrix
(:mod:`safety_filter.campaigns.stress_matrix`) in worker processes and keeps the worst
run's log. :func:`demo_arm_certificate` gives a demo arm the certificate the demo uses.
The command line is :mod:`safety_filter.cli.stress`; the report is
:mod:`safety_filter.reports.stress_report`. No ROS here.
"""

from __future__ import annotations

import functools
import time
from collections.abc import Callable
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

import numpy as np

from safety_filter.campaigns.defaults import DEFAULT_JOBS
from safety_filter.campaigns.stress_matrix import (
    RunSpec,
    StressSettings,
    build_plants,
    control_rates,
    make_nominal,
    make_pushes,
    run_specs,
)
from safety_filter.campaigns.stress_verdict import (
    VerdictRules,
    return_time_bounds,
    run_failures,
    severity,
    summarize_run,
)
from safety_filter.campaigns.worker_processes import worker_context
from safety_filter.core.certificate import Certificate
from safety_filter.core.robot_model import RobotModel
from safety_filter.core.uncertainty_set import UncertaintySet
from safety_filter.errors import FileFormatError, InvalidValue
from safety_filter.simulation.demo_certificate import (
    DEMO_CONTROL_RATE_HZ,
    DEMO_FALSIFIER_STATES,
    reusable_certificate,
)
from safety_filter.simulation.plant import NominalPolicy, PlantLog, Push, run_plant_loop


class StressContext:
    """What every run of a matrix shares: model, certificate, filter, plants, start state.

    Built once per process (the main one and each worker); deterministic in its inputs.
    """

    def __init__(self, model: RobotModel, certificate: Certificate,
                 uncertainty: UncertaintySet, settings: StressSettings) -> None:
        from safety_filter.online.barrier_filter import SafetyFilter
        from safety_filter.simulation.command_sources import SafeTracking

        self.model, self.certificate = model, certificate
        self.uncertainty, self.settings = uncertainty, settings
        self.filter = SafetyFilter(model, certificate)
        # Three of the observer's slowest time constants: how long a push's torque stays in
        # its estimate after the push stops (see disturbed_steps).
        self.observer_settle_s = 3.0 * float(np.max(certificate.observer_time_constants_s))
        self.plants = build_plants(model, uncertainty, settings.plants, settings.seed,
                                   self.filter.payload_mass)
        self.rates = control_rates(certificate)
        self.specs = run_specs(self.plants, self.rates)
        self.rules = VerdictRules(velocity_allowance=uncertainty.velocity_noise)
        tracking = SafeTracking(model, self.filter.payload_mass, settings.speed_fraction,
                                seed=settings.seed)
        self.tracking = tracking
        q0, v0, _ = tracking.reference(0.0)
        for _ in range(60):  # start inside S: slow the reference's start velocity if needed
            if np.all(certificate.safe_set_margins(q0, v0) > 0.0):
                break
            v0 = 0.5 * v0
        self.q0, self.v0 = q0, v0

    def barrier(self, q: np.ndarray, v: np.ndarray) -> np.ndarray:
        return self.filter.certificate.safe_set_margins(q, v)

    def nominal(self, name: str) -> NominalPolicy:
        """The nominal controller ``name`` of the matrix (:func:`make_nominal`)."""
        return make_nominal(name, self.model, self.settings, self.filter.payload_mass,
                            self.filter.dynamics.gravity_torque)

    def run(self, spec: RunSpec) -> tuple[dict[str, Any], PlantLog, list[Push]]:
        """One run: its summary (with verdict), its log and its pushes."""
        settings = self.settings
        name, plant = self.plants[spec.plant]
        rng = np.random.default_rng([settings.seed, spec.index])
        pushes = (make_pushes(self.model, settings, rng, lambda t: self.tracking.reference(t)[0])
                  if spec.nominal == 'pushes' else [])
        self.filter.reset()
        # the disturbance observer measures over the period this run's loop has
        step = functools.partial(self.filter.step, period_s=1.0 / spec.rate_hz)
        log = run_plant_loop(plant, step, self.nominal(spec.nominal),
                             settings.duration_s, spec.rate_hz, self.q0, self.v0, rng=rng,
                             pushes=pushes, barrier=self.barrier,
                             internal_rate_hz=settings.internal_rate_hz)
        summary = summarize_run(log, self.model, 1.0 / spec.rate_hz, pushes,
                                tolerance=self.uncertainty.velocity_noise,
                                settle_s=self.observer_settle_s)
        summary['recovery_bound_s'] = return_time_bounds(
            log, pushes, self.certificate, summary['recovery_s'], 1.0 / spec.rate_hz,
            plant.delay_periods / spec.rate_hz, tolerance=self.uncertainty.velocity_noise)
        failures = run_failures(summary, self.rules, np.array(self.model.effort_limit))
        summary.update(index=spec.index, plant=name, nominal=spec.nominal,
                       rate_hz=spec.rate_hz, passed=not failures, failures=failures,
                       plant_payload=plant.payload_mass,
                       plant_delay_periods=plant.delay_periods,
                       pushes=[{'start_s': p.start_s, 'duration_s': p.duration_s,
                                'torque': p.torque.tolist()} for p in pushes])
        return summary, log, pushes


_WORKER: dict[str, Any] = {}


def _init_worker(model: RobotModel, certificate: Certificate, uncertainty: UncertaintySet,
                 settings: StressSettings) -> None:
    _WORKER['context'] = StressContext(model, certificate, uncertainty, settings)


def _work(index: int) -> dict[str, Any]:
    context: StressContext = _WORKER['context']
    return context.run(context.specs[index])[0]


@dataclass
class StressResult:
    """The runs' summaries (worst first), the worst run's log and the overall verdict."""

    summaries: list[dict[str, Any]]
    worst: dict[str, Any]
    worst_log: PlantLog
    worst_pushes: list[Push]
    context: StressContext
    wall_s: float
    passed: bool = field(init=False)

    def __post_init__(self) -> None:
        self.passed = all(s['passed'] for s in self.summaries)


def run_stress(model: RobotModel, certificate: Certificate, uncertainty: UncertaintySet,
               settings: StressSettings, *, jobs: int = DEFAULT_JOBS,
               progress: Callable[[str, float], None] | None = None) -> StressResult:
    """Run the whole matrix, ``jobs`` runs at a time in worker processes (``jobs == 1``: in
    this process), then re-run the worst one here to keep its log."""
    settings.check()
    if jobs < 1:
        raise InvalidValue('--jobs', jobs, '>= 1')
    start = time.monotonic()
    report = progress or (lambda _stage, _fraction: None)
    context = StressContext(model, certificate, uncertainty, settings)
    total = len(context.specs)
    summaries: list[dict[str, Any] | None] = [None] * total
    report('stress runs', 0.0)
    if jobs == 1 or total <= 1:
        for spec in context.specs:
            summaries[spec.index] = context.run(spec)[0]
            report('stress runs', (spec.index + 1) / total)
    else:
        from concurrent.futures import ProcessPoolExecutor, as_completed

        with ProcessPoolExecutor(max_workers=min(jobs, total), mp_context=worker_context(),
                                 initializer=_init_worker,
                                 initargs=(model, certificate, uncertainty,
                                           settings)) as pool:
            futures = {pool.submit(_work, spec.index): spec.index for spec in context.specs}
            done = 0
            for future in as_completed(futures):
                summaries[futures[future]] = future.result()
                done += 1
                report('stress runs', done / total)
    ordered = sorted((s for s in summaries if s is not None), key=severity, reverse=True)
    worst = ordered[0]
    again, log, pushes = context.run(context.specs[worst['index']])
    return StressResult(ordered, again, log, pushes, context, time.monotonic() - start)


def demo_arm_certificate(model: RobotModel, name: str, out: Path,
                         progress: Callable[[str, float], None]) -> tuple[Certificate, str]:
    """A demo arm's certificate and where it came from: the one in ``out`` when the demo
    could reuse it (:func:`reusable_certificate`), else certified now as the demo certifies
    and saved there.

    Raises:
        FileFormatError: the certificate cannot be written into ``out``.
    """
    from safety_filter.certification.certify import CertifySettings, certify_with_evidence

    path = out / f'{name}_certificate.yaml'
    certificate, note = reusable_certificate(model, path, DEMO_CONTROL_RATE_HZ)
    if certificate is not None:
        return certificate, f'{path} ({note})'
    outcome = certify_with_evidence(
        model, CertifySettings(falsifier_states=DEMO_FALSIFIER_STATES,
                               control_rate_hz=DEMO_CONTROL_RATE_HZ), progress=progress)
    try:
        outcome.certificate.save(path)
    except OSError as err:
        raise FileFormatError(f'cannot write {path}: {err}', path) from err
    return outcome.certificate, f'{path} (certified now, {DEMO_FALSIFIER_STATES} falsifier ' \
        'states)'
