"""Stress test: the filter in closed loop with plants drawn from the declared uncertainty set.

Before an arm runs on hardware, ``safety-filter stress`` tries its model, certificate and
filter against arms that differ from the model as much as the limits file says they may
(:mod:`safety_filter.core.model_uncertainty`). The matrix is plants x nominals x control rates:

* **plants**: ``exact`` (the filter's own model, no noise, no delay, no torque error: the
  baseline), ``nominal`` (the model's inertias with the set's noise, delay and torque error),
  the payload at both ends of its range, every link's mass and rotational inertia all at
  ``+link_mass_error`` / ``-link_mass_error`` (and ``link_inertia_error``), and ``K`` random
  draws (:func:`safety_filter.core.model_uncertainty.draw_plant`). Every plant but ``exact`` has
  the
  set's measurement noise, delay and driver torque error (the non-random plants take the
  torque gain and offset at the ends of their ranges, with seeded signs per joint);
* **nominals**: the adversarial sources of :mod:`safety_filter.simulation.command_sources`
  (bang-bang, a PD
  toward targets beyond the limits with gravity feedforward from the filter's model, large
  sinusoids, zero torque), the benign
  :class:`~safety_filter.simulation.command_sources.SafeTracking`, and
  ``pushes``: SafeTracking while external torque impulses act on the arm;
* **rates**: the certificate's control rate, and ``control_rate_hz / sampling_factor`` when
  the certificate's margin covers longer hold periods (``sampling_factor > 1``).

One run is :func:`run_plant_loop`; :func:`summarize_run` measures it and
:func:`run_failures` holds the verdict rules (one small function, so they can be adjusted).
:func:`run_stress` runs the matrix in worker processes. The command line is
:func:`add_stress_parser` / :func:`command_stress`; the report is in
:mod:`safety_filter.reports.stress_report`. No ROS here.
"""

from __future__ import annotations

import argparse
import functools
import math
import os
import sys
import time
from collections.abc import Callable, Sequence
from dataclasses import asdict, dataclass, field
from pathlib import Path
from typing import Any

import numpy as np

from safety_filter.cli.robot_options import deprecated
from safety_filter.core.certificate import Certificate
from safety_filter.core.model_uncertainty import (
    Plant,
    UncertaintySet,
    draw_plant,
    model_with_inertials,
    nominal_plant,
)
from safety_filter.core.robot_model import RobotModel
from safety_filter.errors import SafetyFilterError
from safety_filter.simulation.plant import (  # noqa: F401 (Push, PlantLog: part of this API too)
    NominalPolicy,
    PlantLog,
    Push,
    limit_violations,
    run_plant_loop,
)

EXIT_OK = 0
EXIT_BAD_INPUT = 2
EXIT_NOT_CERTIFIED = 3
EXIT_STRESS_FAILED = 5  # distinct from every other exit code of safety-filter
DEFAULT_OUT = Path('out') / 'stress'
DEFAULT_DURATION_S = 5.0
DEFAULT_PLANTS = 8
DEFAULT_JOBS = os.cpu_count() or 1
DEMO_CONTROL_RATE_HZ = 1000.0
DEMO_FALSIFIER_STATES = 20_000  # as `safety-filter demo` certifies
NOMINALS = ('bang_bang', 'pd_beyond_limits', 'large_sinusoid', 'zero_torque',
            'safe_tracking', 'pushes')
POSITION_TOLERANCE = 1e-6  # [rad or m]: float round-off, not an allowance
TORQUE_TOLERANCE = 1e-6  # relative, times max(1, effort limit), as the filter's check


# ---------------------------------------------------------------------- measuring a run
def recovery_times(log: PlantLog, pushes: Sequence[Push], period_s: float,
                   tolerance: float = 0.0) -> list[float | None]:
    """Per push: seconds from its end until the true state is first back in S (every barrier
    value at least ``-tolerance``: the stress test passes the declared velocity noise, as
    for the velocity rule).

    The window of a push runs from its end to the next push's start (or the end of the run).
    The recovery time is ``t_first_inside - t_end`` for the first control step of the window
    that is inside S after the push left it; 0 when the state is in S when the push ends;
    None when it does not come back within the window. Later excursions in the window (the
    nominal may lead the state out of S again) are not part of the push's recovery: the
    run's time outside S counts them.
    """
    del period_s  # the steps' own times are used
    inside = np.all(log.margin >= -tolerance, axis=1)
    times = log.time_s
    starts = sorted(p.start_s for p in pushes)
    result: list[float | None] = []
    for push in pushes:
        later = [s for s in starts if s > push.start_s + 1e-12]
        window_end = later[0] if later else math.inf
        rows = np.flatnonzero((times >= push.end_s - 1e-9) & (times < window_end - 1e-9))
        back = rows[inside[rows]] if rows.size else rows
        if back.size == 0:
            result.append(None)
        elif back[0] == rows[0]:
            result.append(0.0)  # in S when the push ended
        else:
            result.append(max(float(times[back[0]] - push.end_s), 0.0))
    return result


def disturbed_steps(log: PlantLog, pushes: Sequence[Push],
                    recovery: Sequence[float | None], settle_s: float = 0.0) -> np.ndarray:
    """Mask of the control steps from each push's start until the state is back in S and
    ``settle_s`` has passed since the push ended (to the next push or the end of the run
    when it does not come back): the disturbance observer still carries the push for about
    its time constant after the push stops, so the filter's model of the arm is off by the
    push's torque until then."""
    times = log.time_s
    mask = np.zeros(len(times), dtype=bool)
    starts = sorted(p.start_s for p in pushes)
    for push, seconds in zip(pushes, recovery):
        later = [s for s in starts if s > push.start_s + 1e-12]
        end = ((later[0] if later else math.inf) if seconds is None
               else push.end_s + max(seconds, settle_s))
        mask |= (times >= push.start_s - 1e-9) & (times < end - 1e-9)
    return mask


def _excursions(model: RobotModel, log: PlantLog, rows: np.ndarray
                ) -> tuple[np.ndarray, np.ndarray]:
    n = model.n_joints
    if not np.any(rows):
        return np.zeros(n), np.zeros(n)
    kept = limit_violations(model, log.q[rows], log.v[rows], log.applied[rows])
    return kept['position'], kept['velocity']


def summarize_run(log: PlantLog, model: RobotModel, period_s: float,
                  pushes: Sequence[Push] = (), tolerance: float = 0.0,
                  settle_s: float = 0.0) -> dict[str, Any]:
    """The figures of one run (plain numbers; per-joint lists in joint order).

    Keys: ``position_excursion`` / ``velocity_excursion`` [rad, rad/s]: largest past a
    limit (0 when kept; ``*_per_joint`` too), over the steps NOT disturbed by a push (see
    :func:`disturbed_steps`); ``push_position_excursion`` / ``push_velocity_excursion``: the
    same over the disturbed steps (what the push itself did, reported, not judged);
    ``command_excess`` (the filter's command past the torque box, every step),
    ``applied_excess`` (the applied torque past the box: 0 by construction, the driver
    saturates), ``driver_saturation`` (the driver's ``gain u + offset`` past the box before
    saturation), ``time_outside_s`` (control steps with the true state outside S, times T,
    pushes included), ``min_margin``, ``recovery_s`` (per push, None: not back in S),
    ``modes`` (fraction of steps per filter mode).
    """
    umax = np.array(model.effort_limit)
    recovery = recovery_times(log, pushes, period_s, tolerance) if pushes else []
    disturbed = disturbed_steps(log, pushes, recovery, settle_s)
    position, velocity = _excursions(model, log, ~disturbed)
    push_position, push_velocity = _excursions(model, log, disturbed)
    applied = np.maximum(np.max(np.abs(log.applied) - umax, axis=0), 0.0)
    command = np.maximum(np.max(np.abs(log.command) - umax, axis=0), 0.0)
    demand = np.maximum(np.max(np.abs(log.demand) - umax, axis=0), 0.0)
    finite = bool(np.all(np.isfinite(log.margin)))
    outside = ~np.all(log.margin >= 0.0, axis=1) if finite else \
        np.zeros(len(log.time_s), dtype=bool)
    modes, counts = np.unique(log.mode.astype(str), return_counts=True)
    steps = max(len(log.time_s), 1)
    return {
        'position_excursion': float(position.max()),
        'position_excursion_per_joint': position.tolist(),
        'velocity_excursion': float(velocity.max()),
        'velocity_excursion_per_joint': velocity.tolist(),
        'push_position_excursion': float(push_position.max()),
        'push_velocity_excursion': float(push_velocity.max()),
        'command_excess': float(command.max()),
        'applied_excess': float(applied.max()),
        'driver_saturation': float(demand.max()),
        'time_outside_s': float(np.count_nonzero(outside) * period_s),
        'disturbed_s': float(np.count_nonzero(disturbed) * period_s),
        'min_margin': float(np.nanmin(log.margin)) if np.any(np.isfinite(log.margin))
        else None,
        'recovery_s': recovery,
        'modes': {str(m): float(c) / steps for m, c in zip(modes, counts)},
    }


@dataclass(frozen=True)
class VerdictRules:
    """What a run must meet to pass (see :func:`run_failures`).

    Attributes:
        position_tolerance: allowed position excursion [rad or m] (round-off only).
        velocity_allowance: allowed velocity excursion [rad/s or m/s]: the declared
            velocity noise (the filter cannot see the velocity better than that).
        torque_tolerance: allowed torque excess, relative, times ``max(1, effort limit)``.
        recovery_time_s: after each push the state must be back in S within this time, if
            given; else within the certified return time of each push where it applies
            (``recovery_bound_s`` of the summary, see :func:`return_time_bounds`).
    """

    position_tolerance: float = POSITION_TOLERANCE
    velocity_allowance: float = 0.0
    torque_tolerance: float = TORQUE_TOLERANCE
    recovery_time_s: float | None = None


def run_failures(summary: dict[str, Any], rules: VerdictRules, effort_limit: np.ndarray
                 ) -> list[str]:
    """The verdict rules: the reasons a run fails (empty: it passes).

    1. no position-limit violation (beyond round-off);
    2. velocity excursion at most the declared velocity noise;

    (1 and 2 over the steps not disturbed by a push: a push may drive the arm past a limit
    by itself; what is judged after it is rule 4);
    3. torque within the box: the applied torque, and the filter's command (the driver
       saturates, so the applied torque alone could not show a command outside the box);
    4. after each push, back in S within ``recovery_time_s`` when it is given, else within
       the certified return time where one applies (``summary['recovery_bound_s']``).
    """
    reasons = []
    if summary['position_excursion'] > rules.position_tolerance:
        reasons.append(f'position limit exceeded by {summary["position_excursion"]:.3g}')
    if summary['velocity_excursion'] > rules.velocity_allowance:
        reasons.append(f'velocity limit exceeded by {summary["velocity_excursion"]:.3g} '
                       f'(allowance {rules.velocity_allowance:g})')
    torque_tol = rules.torque_tolerance * max(1.0, float(np.max(effort_limit)))
    excess = max(summary['command_excess'], summary['applied_excess'])
    if excess > torque_tol:
        reasons.append(f'torque outside the box by {excess:.3g}')
    bounds = summary.get('recovery_bound_s') or [None] * len(summary['recovery_s'])
    for k, seconds in enumerate(summary['recovery_s']):
        allowed = rules.recovery_time_s if rules.recovery_time_s is not None else bounds[k]
        if allowed is not None and (seconds is None or seconds > allowed):
            took = 'not back in S' if seconds is None else f'{seconds:.3g} s'
            reasons.append(f'push {k + 1}: {took} (allowed {allowed:.3g} s)')
    return reasons


def return_time_bounds(log: PlantLog, pushes: Sequence[Push], certificate: Certificate,
                       recovery: Sequence[float | None], period_s: float, allowance_s: float,
                       tolerance: float = 0.0) -> list[float | None]:
    """Per push: the time from its end within which the certificate says the state is back
    in S (:meth:`Certificate.recovery_time`), or None where that statement does not apply.

    The statement holds from any state outside S within the certified domain (speeds within
    ``velocity_bound``, where the authority is certified), whether the QP meets the bounds
    or the push-back acts. It is applied at every step from the push's end, or from the step
    a push that left the speeds beyond the domain has them back within it for good, until
    the state is back (``recovery``, or the window's end): the bound is the largest of the
    step's time after the push plus its recovery time, plus ``allowance_s`` (the delay) and
    one period. It does not apply when, on the way, a position is past a limit or a state
    beyond the braking set (no time stated there), when the speeds are not back within the
    domain by then, or when the state is in S at the push's end (None). ``tolerance``: the
    velocity tolerance of "back in S" (``recovery_times``), allowed on the domain too.
    """
    times = log.time_s
    starts = sorted(p.start_s for p in pushes)
    result: list[float | None] = []
    for push, back in zip(pushes, recovery):
        later = [s for s in starts if s > push.start_s + 1e-12]
        end = push.end_s + back if back is not None else (later[0] if later else math.inf)
        rows = np.flatnonzero((times >= push.end_s - 1e-9) & (times <= end + 1e-9))
        if rows.size == 0 or back == 0.0:
            result.append(None)
            continue
        q, v = log.q[rows], log.v[rows]
        if np.any((q < certificate.position_lower) | (q > certificate.position_upper)):
            result.append(None)
            continue
        # A push can leave the speeds beyond the certified domain for a few steps: the
        # statement applies from the step the state is back within it for good.
        within = np.all(np.abs(v) <= certificate.velocity_bound + tolerance, axis=1)
        if not within[-1]:
            result.append(None)
            continue
        later_out = np.flatnonzero(~within)
        first = int(later_out[-1]) + 1 if later_out.size else 0
        rows, q, v = rows[first:], q[first:], v[first:]
        needed = np.max(certificate.recovery_time(q, v), axis=1)
        if not np.all(np.isfinite(needed)):  # a step from which no time is stated
            result.append(None)
            continue
        result.append(float(np.max(times[rows] - push.end_s + needed)) + allowance_s
                      + period_s)
    return result


# ---------------------------------------------------------------------- the matrix
@dataclass(frozen=True)
class StressSettings:
    """How to stress (the same for every run).

    Attributes:
        duration_s: simulated seconds per run.
        plants: random plants drawn from the set (besides the fixed ones).
        seed: seed of the plants, nominals, noise and pushes.
        pushes: pushes per ``pushes`` run, spread evenly over it.
        push_fraction: largest joint torque of a push (a force on the payload point), as a
            fraction of that joint's effort limit.
        push_duration_s: duration of each push [s].
        speed_fraction: peak speed of SafeTracking, as a fraction of the rated speed.
        internal_rate_hz: integration rate of the plant (RK4) [Hz].
    """

    duration_s: float = DEFAULT_DURATION_S
    plants: int = DEFAULT_PLANTS
    seed: int = 0
    pushes: int = 2
    push_fraction: float = 0.2
    push_duration_s: float = 0.02
    speed_fraction: float = 0.5
    internal_rate_hz: float = 10_000.0

    def check(self) -> None:
        """Raise SafetyFilterError on a setting that makes no sense."""
        if not (math.isfinite(self.duration_s) and self.duration_s > 0.0):
            raise SafetyFilterError(f'--duration must be positive, got {self.duration_s}')
        if self.plants < 0:
            raise SafetyFilterError(f'--plants must be >= 0, got {self.plants}')
        if self.pushes < 0:
            raise SafetyFilterError(f'--pushes must be >= 0, got {self.pushes}')
        if not (0.0 <= self.push_fraction <= 10.0):
            raise SafetyFilterError(f'--push-fraction must be in [0, 10], got '
                                    f'{self.push_fraction}')
        if self.pushes and self.push_duration_s * self.pushes >= self.duration_s:
            raise SafetyFilterError('the pushes do not fit in --duration')
        if not (0.0 < self.speed_fraction <= 1.0):
            raise SafetyFilterError(f'--speed-fraction must be in (0, 1], got '
                                    f'{self.speed_fraction}')


@dataclass(frozen=True)
class RunSpec:
    """One cell of the matrix: plant (index into the plant list), nominal, control rate."""

    index: int
    plant: int
    plant_name: str
    nominal: str
    rate_hz: float


def _torque_error_at_ends(model: RobotModel, payload: float, uncertainty: UncertaintySet,
                          rng: np.random.Generator) -> Plant:
    n = model.n_joints
    gain = 1.0 + uncertainty.torque_error_relative * rng.choice([-1.0, 1.0], n)
    offset = (uncertainty.torque_error_absolute * np.array(model.effort_limit)
              * rng.choice([-1.0, 1.0], n))
    return Plant(model_with_inertials(model, payload_mass=payload), float(payload), gain,
                 offset, uncertainty.position_noise, uncertainty.velocity_noise,
                 int(uncertainty.delay_periods))


def build_plants(model: RobotModel, uncertainty: UncertaintySet, count: int, seed: int,
                 filter_payload: float) -> list[tuple[str, Plant]]:
    """The plants of the matrix, named (see the module docstring), in a fixed order."""
    rng = np.random.default_rng([seed, 7])
    plants = [('exact', nominal_plant(model, filter_payload))]
    plants.append(('nominal', _torque_error_at_ends(model, filter_payload, uncertainty, rng)))
    for name, payload in (('payload_min', model.payload.mass_min),
                          ('payload_max', model.payload.mass_max)):
        plants.append((name, _torque_error_at_ends(model, payload, uncertainty, rng)))
    e_m, e_i = uncertainty.link_mass_error, uncertainty.link_inertia_error
    for sign in (1.0, -1.0):
        scaled = model_with_inertials(
            model, body_mass=np.array(model.body_mass) * (1.0 + sign * e_m),
            body_inertia=np.array(model.body_inertia) * (1.0 + sign * e_i),
            payload_mass=filter_payload)
        label = f'links_{"+" if sign > 0 else "-"}{100 * max(e_m, e_i):g}%'
        plants.append((label, _torque_error_at_ends(scaled, filter_payload, uncertainty,
                                                    rng)))
    draws = np.random.default_rng([seed, 11])
    for k in range(count):
        plants.append((f'random_{k + 1}', draw_plant(model, uncertainty, draws)))
    return plants


def control_rates(certificate: Certificate) -> list[float]:
    """The certificate's rate, and rate / sampling_factor when sampling_factor > 1."""
    rates = [float(certificate.control_rate_hz)]
    if certificate.sampling_factor > 1.0:
        rates.append(float(certificate.control_rate_hz) / float(certificate.sampling_factor))
    return rates


def run_specs(plants: Sequence[tuple[str, Plant]], rates: Sequence[float]) -> list[RunSpec]:
    """Every cell: rates x plants x nominals, numbered in that order."""
    specs = []
    for rate in rates:
        for p, (name, _plant) in enumerate(plants):
            for nominal in NOMINALS:
                specs.append(RunSpec(len(specs), p, name, nominal, rate))
    return specs


def make_pushes(model: RobotModel, settings: StressSettings, rng: np.random.Generator,
                configuration: Callable[[float], np.ndarray] | None = None) -> list[Push]:
    """``settings.pushes`` pushes spread over the run: each a force on the payload point in a
    seeded random direction, turned into joint torques ``J(q)^T F`` at the configuration
    ``configuration(t)`` expected when it starts (the benign motion's reference), and scaled
    so that its largest joint torque is ``push_fraction`` of that joint's effort limit (as a
    bump on the tool would: light wrist joints feel it through short lever arms). Without a
    configuration the middle of the ranges is used."""
    umax = np.array(model.effort_limit)
    window = settings.duration_s / max(settings.pushes, 1)
    middle = 0.5 * (np.array(model.position_lower) + np.array(model.position_upper))
    pushes = []
    for k in range(settings.pushes):
        start = (k + 0.3) * window
        q = middle if configuration is None else configuration(start)
        direction = rng.normal(size=3)
        direction /= max(float(np.linalg.norm(direction)), 1e-12)
        torque = tip_force_torque(model, q, direction)
        scale = float(np.max(np.abs(torque) / umax))
        if scale < 1e-12:  # the point cannot be pushed that way here: push the joints
            torque, scale = umax * rng.normal(size=model.n_joints), 1.0
            scale = float(np.max(np.abs(torque) / umax))
        pushes.append(Push(start, settings.push_duration_s,
                           settings.push_fraction * torque / scale))
    return pushes


def tip_force_torque(model: RobotModel, q: np.ndarray, force: np.ndarray) -> np.ndarray:
    """Joint torques ``J(q)^T F`` [N m] of a force ``F`` [N] on the payload point.

    A force ``F`` on a point mass acts as gravity ``F / m`` does on it, so the torque is minus
    the generalized gravity of one kilogram of payload under the gravity vector ``F``
    (evaluated with the package's own dynamics).
    """
    from safety_filter.core.dynamics import Dynamics

    pushed = model_with_inertials(model, gravity=np.asarray(force, dtype=float))
    with_payload = Dynamics(pushed, payload_mass=1.0).gravity_torque(q)
    without = Dynamics(pushed, payload_mass=0.0).gravity_torque(q)
    return -(with_payload - without)


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
            if np.all(self.filter.constraint_bounds(q0, v0).smallest > 0.0):
                break
            v0 = 0.5 * v0
        self.q0, self.v0 = q0, v0

    def barrier(self, q: np.ndarray, v: np.ndarray) -> np.ndarray:
        return self.filter.constraint_bounds(q, v).smallest

    def nominal(self, name: str) -> NominalPolicy:
        from safety_filter.simulation.command_sources import (
            BangBang,
            LargeSinusoid,
            PDBeyondLimits,
            SafeTracking,
            ZeroTorque,
        )

        model, seed = self.model, self.settings.seed
        if name == 'bang_bang':
            return BangBang(model, seed=seed)
        if name == 'pd_beyond_limits':
            return PDBeyondLimits(model, gravity=self.filter.dynamics.gravity_torque)
        if name == 'large_sinusoid':
            return LargeSinusoid(model, seed=seed)
        if name == 'zero_torque':
            return ZeroTorque(model)
        if name in ('safe_tracking', 'pushes'):
            return SafeTracking(model, self.filter.payload_mass, self.settings.speed_fraction,
                                seed=seed)
        raise SafetyFilterError(f'unknown nominal {name!r}')

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


def severity(summary: dict[str, Any]) -> tuple[float, ...]:
    """Sort key, larger is worse: failed first, then position, velocity and torque
    excursions, time outside S, and the thinnest true barrier margin."""
    margin = summary['min_margin']
    return (0.0 if summary['passed'] else 1.0, summary['position_excursion'],
            summary['velocity_excursion'],
            max(summary['command_excess'], summary['applied_excess']),
            summary['time_outside_s'], -(margin if margin is not None else 0.0))


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
        raise SafetyFilterError(f'--jobs must be >= 1, got {jobs}')
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
        import multiprocessing
        from concurrent.futures import ProcessPoolExecutor, as_completed

        from safety_filter.replay.batch import portable_model

        method = 'forkserver' if 'forkserver' in multiprocessing.get_all_start_methods() \
            else 'spawn'
        with ProcessPoolExecutor(max_workers=min(jobs, total),
                                 mp_context=multiprocessing.get_context(method),
                                 initializer=_init_worker,
                                 initargs=(portable_model(model), certificate, uncertainty,
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


# ---------------------------------------------------------------------- command line
_DESCRIPTION = (
    'Stress-test an arm before hardware: run its model, certificate and filter in closed '
    'loop against plants drawn from the declared uncertainty set (payload ends, link masses '
    'and inertias at their error bounds, random draws; with the measurement noise, delay '
    'and driver torque error applied), adversarial and benign nominals, the control rates '
    'the certificate covers, and external torque pushes. Prints a table (worst run first) '
    'and a verdict; writes stress_summary.json and stress_report.html with plots of the '
    'worst run. Exit code 0: every run passed; 5: some run failed the verdict; 3: the demo '
    "arm's certification failed; 2: bad input (options, robot, certificate).")


def add_stress_parser(commands: argparse._SubParsersAction) -> None:
    """Add the ``stress`` subcommand to ``safety-filter``'s subparsers."""
    from safety_filter.cli.main import add_robot_arguments

    stress = commands.add_parser(
        'stress', help='closed-loop stress test against plants from the uncertainty set',
        description=_DESCRIPTION)
    add_robot_arguments(stress)
    filt = stress.add_argument_group('filter')
    filt.add_argument('--certificate', metavar='PATH',
                      help='certificate parameter file written by `safety-filter certify`; '
                      'required with --urdf; a demo arm without it is certified first (20000 '
                      'falsifier states, as the demo) or its certificate in --output-dir is '
                      'reused')
    runs = stress.add_argument_group('runs')
    runs.add_argument('--duration', type=float, default=DEFAULT_DURATION_S, metavar='S',
                      help=f'simulated seconds per run (default: {DEFAULT_DURATION_S:g})')
    runs.add_argument('--plants', type=int, default=DEFAULT_PLANTS, metavar='K',
                      help='random plants drawn from the uncertainty set, besides the fixed '
                      f'ones (default: {DEFAULT_PLANTS})')
    runs.add_argument('--pushes', type=int, default=2, metavar='N',
                      help='external torque pushes per push run (default: 2)')
    runs.add_argument('--push-fraction', type=float, default=0.2, metavar='F',
                      help="a push's largest joint torque as a fraction of that joint's "
                      'effort limit (default: 0.2; each push lasts 20 ms)')
    runs.add_argument('--seed', type=int, default=0,
                      help='seed of plants, nominals, noise and pushes (default: 0)')
    output = stress.add_argument_group('output')
    output.add_argument('--output-dir', '--out', dest='output_dir', default=str(DEFAULT_OUT),
                        metavar='DIR', help=deprecated(f'output folder (default: {DEFAULT_OUT})',
                                                       '--out'))
    output.add_argument('--jobs', type=int, default=DEFAULT_JOBS, metavar='N',
                        help='runs in parallel (processes; default: the number of cores, '
                        f'{DEFAULT_JOBS} here)')
    output.add_argument('--no-plots', action='store_true',
                        help='report without plots (JSON and tables only)')
    output.add_argument('--no-progress', action='store_true', help='no progress bar')
    output.add_argument('--quiet', action='store_true',
                        help='print only the verdict and the files written (no table; '
                        'implies --no-progress)')
    stress.set_defaults(handler=command_stress)


def _demo_certificate(model: RobotModel, name: str, out: Path,
                      progress: Callable[[str, float], None]) -> tuple[Certificate, str]:
    """A demo arm's certificate: reused from ``out`` when valid, else certified now."""
    from safety_filter.certification.certify import CertifySettings, certify_with_evidence
    from safety_filter.ros.demo_graph import reusable_certificate

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
        raise SafetyFilterError(f'cannot write {path}: {err}') from err
    return outcome.certificate, f'{path} (certified now, {DEMO_FALSIFIER_STATES} falsifier ' \
        'states)'


def command_stress(args: argparse.Namespace) -> int:
    """Run ``safety-filter stress`` (see the parser's description for the exit codes)."""
    from safety_filter.cli.main import _ProgressBar, load_robot
    from safety_filter.reports.stress_report import format_table, write_report

    settings = StressSettings(duration_s=args.duration, plants=args.plants, seed=args.seed,
                              pushes=args.pushes, push_fraction=args.push_fraction)
    settings.check()
    if args.jobs < 1:
        raise SafetyFilterError(f'--jobs must be >= 1, got {args.jobs}')
    if args.urdf is not None and args.certificate is None:
        raise SafetyFilterError('--certificate is required with --urdf (write one with '
                                '`safety-filter certify`)')
    model = load_robot(args)
    out = Path(args.output_dir)
    try:
        out.mkdir(parents=True, exist_ok=True)
    except OSError as err:
        raise SafetyFilterError(f'cannot create --output-dir {out}: {err}') from err
    bar = _ProgressBar(enabled=not (args.quiet or args.no_progress))
    try:
        if args.certificate is not None:
            if not Path(args.certificate).is_file():
                raise SafetyFilterError(f'certificate file not found: {args.certificate}')
            certificate = Certificate.load(args.certificate, model)
            source = str(args.certificate)
        else:
            certificate, source = _demo_certificate(model, args.demo or 'bench6', out, bar)
            if not certificate.certified:
                bar.close()
                print(f'the demo arm could not be certified: {"; ".join(certificate.reasons)}')
                return EXIT_NOT_CERTIFIED
        uncertainty = getattr(model, 'uncertainty', None) or UncertaintySet()
        result = run_stress(model, certificate, uncertainty, settings, jobs=args.jobs,
                            progress=bar)
    finally:
        bar.close()
    table = format_table(result, source)
    if args.quiet:
        print('\n'.join(line for line in table.splitlines() if line.startswith('verdict:')))
    else:
        print(table)
    try:
        page, summary = write_report(out, result, source, plots=not args.no_plots)
    except OSError as err:
        raise SafetyFilterError(f'cannot write the report in {out}: {err}') from err
    print(f'\nsummary: {summary.resolve()}\nreport: {page.resolve()}')
    print(f'wall time: {result.wall_s:.1f} s', file=sys.stderr)
    return EXIT_OK if result.passed else EXIT_STRESS_FAILED


def settings_record(settings: StressSettings) -> dict[str, Any]:
    """Plain form of the settings for the JSON summary."""
    return asdict(settings)
