"""The stress test's matrix: plants x nominals x control rates, and the pushes.

Before an arm runs on hardware, ``safety-filter stress`` tries its model, certificate and
filter against arms that differ from the model as much as the limits file says they may
(:mod:`safety_filter.core.model_uncertainty`). The matrix is plants x nominals x control rates:

* **plants** (:func:`build_plants`): ``exact`` (the filter's own model, no noise, no delay,
  no torque error: the baseline), ``nominal`` (the model's inertias with the set's noise,
  delay and torque error), the payload at both ends of its range, every link's mass and
  rotational inertia all at ``+link_mass_error`` / ``-link_mass_error`` (and
  ``link_inertia_error``), and ``K`` random draws
  (:func:`safety_filter.core.model_uncertainty.draw_plant`). Every plant but ``exact`` has the
  set's measurement noise, delay and driver torque error (the non-random plants take the
  torque gain and offset at the ends of their ranges, with seeded signs per joint);
* **nominals** (:func:`make_nominal`): the adversarial sources of
  :mod:`safety_filter.simulation.command_sources` (bang-bang, a PD toward targets beyond the
  limits with gravity feedforward from the filter's model, large sinusoids, zero torque),
  the benign :class:`~safety_filter.simulation.command_sources.SafeTracking`, and ``pushes``:
  SafeTracking while external torque impulses act on the arm (:func:`make_pushes`);
* **rates** (:func:`control_rates`): the certificate's control rate, and
  ``control_rate_hz / sampling_factor`` when the certificate's margin covers longer hold
  periods (``sampling_factor > 1``).

The runs are in :mod:`safety_filter.campaigns.stress_runs`, their verdict in
:mod:`safety_filter.campaigns.stress_verdict`.
"""

from __future__ import annotations

import math
from collections.abc import Callable, Sequence
from dataclasses import dataclass

import numpy as np

from safety_filter.campaigns.defaults import DEFAULT_DURATION_S, DEFAULT_PLANTS
from safety_filter.core.certificate import Certificate
from safety_filter.core.model_uncertainty import (
    Plant,
    draw_plant,
    model_with_inertials,
    nominal_plant,
)
from safety_filter.core.robot_model import RobotModel
from safety_filter.core.uncertainty_set import UncertaintySet
from safety_filter.errors import InvalidValue
from safety_filter.simulation.plant import NominalPolicy, Push

NOMINALS = ('bang_bang', 'pd_beyond_limits', 'large_sinusoid', 'zero_torque',
            'safe_tracking', 'pushes')


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
        """Raise :class:`InvalidValue` on a setting that makes no sense."""
        if not (math.isfinite(self.duration_s) and self.duration_s > 0.0):
            raise InvalidValue('--duration', self.duration_s, '> 0')
        if self.plants < 0:
            raise InvalidValue('--plants', self.plants, '>= 0')
        if self.pushes < 0:
            raise InvalidValue('--pushes', self.pushes, '>= 0')
        if not (0.0 <= self.push_fraction <= 10.0):
            raise InvalidValue('--push-fraction', self.push_fraction, 'in [0, 10]')
        if self.pushes and self.push_duration_s * self.pushes >= self.duration_s:
            raise InvalidValue('--duration', self.duration_s,
                               f'> {self.pushes} pushes x {self.push_duration_s:g} s',
                               detail='the pushes do not fit in --duration')
        if not (0.0 < self.speed_fraction <= 1.0):
            raise InvalidValue('--speed-fraction', self.speed_fraction, 'in (0, 1]')


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


def make_nominal(name: str, model: RobotModel, settings: StressSettings, payload_mass: float,
                 gravity: Callable[[np.ndarray], np.ndarray]) -> NominalPolicy:
    """The nominal controller ``name`` (one of :data:`NOMINALS`), seeded by ``settings``.

    Args:
        payload_mass: the payload the filter assumes [kg] (SafeTracking plans with it).
        gravity: the filter model's gravity torque ``g(q)`` (the PD's feedforward).
    """
    from safety_filter.simulation.command_sources import (
        BangBang,
        LargeSinusoid,
        PDBeyondLimits,
        SafeTracking,
        ZeroTorque,
    )

    seed = settings.seed
    if name == 'bang_bang':
        return BangBang(model, seed=seed)
    if name == 'pd_beyond_limits':
        return PDBeyondLimits(model, gravity=gravity)
    if name == 'large_sinusoid':
        return LargeSinusoid(model, seed=seed)
    if name == 'zero_torque':
        return ZeroTorque(model)
    if name in ('safe_tracking', 'pushes'):
        return SafeTracking(model, payload_mass, settings.speed_fraction, seed=seed)
    raise InvalidValue('nominal', name, f'one of {", ".join(NOMINALS)}')
