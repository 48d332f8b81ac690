#!/usr/bin/env python3
"""Benchmark of what the filter costs the user, beside a common-practice speed clamp.

Usage::

    python3 benchmarks/bench_permissiveness.py [--quick] [--arm bench6 reach7]
        [--duration 8] [--reach-duration 20]

Three controllers sit between the same nominal commands and the same simulated arm (the
package's closed loop ``run_closed_loop``: the model's dynamics with the filter's payload,
RK4 at 10 kHz, torque held and saturated by the driver, control at the certificate's rate):

* ``unfiltered``: the nominal straight to the arm (the reference; simulation only);
* ``braking clamp``: the uncertified per-joint speed clamp that drivers' software limits
  commonly apply (:class:`BrakingCurveClamp`): each joint's velocity is kept below
  ``min(rated speed, sqrt(2 e d))`` toward the limit ahead (``d`` its distance, ``e`` the
  certificate's usable authority ``authority - sampling_margin``, with a slow design the
  larger of the two designs') by a per-joint
  acceleration limit, turned into torque with the diagonal of the mass matrix plus gravity,
  then clipped to the torque box. It ignores the coupling between joints;
* ``certified filter``: :class:`safety_filter.SafetyFilter` with the certificate of
  :func:`safety_filter.certification.certify` (default settings; cached on disk in the temp
  directory).

Columns, one row per arm and controller:

* ``pos over``, ``vel over``: the largest excursion past a position [rad] and a velocity
  [rad/s] limit over the adversarial nominals (bang-bang torques, a PD toward targets beyond
  the limits, large sinusoidal torques), any joint;
* ``err NN%``: normalised tracking error of computed-torque tracking of sinusoids that stay
  10 % of the range inside every limit and peak at NN % of the rated speed: per joint the RMS
  of ``q - q_ref`` over the RMS of ``q_ref`` about its mean, averaged over the joints (every
  joint starts at rest on its reference, at a turning point of the sinusoid, so no start-up
  transient counts); in brackets its ratio to the unfiltered run's error;
* ``chg NN%``: share of the control steps of that tracking run whose torque differs from the
  nominal (by more than 1e-9 of the larger of the nominal and the torque limit, per joint);
* ``reach [s]``: time from rest at mid-range to within 5 % of the range of a limit, while
  the nominal tracks a ramp at the rated speed toward a target just past that limit (one
  joint at a time, the others held at mid-range; every joint, both limits), averaged; in
  brackets its ratio to the unfiltered time. ``>`` marks a mean in which some joint did not
  get there within the run (counted at the run's length).

Above the table, per arm: the certified velocity box, the clamp's authority, and the nearest
to each limit that the filter lets a joint come to rest (its bounds at rest, not a run).
Below the table: every run in which the braking clamp or the certified filter went past a
limit (arm, nominal, joint, amount); the reach time per joint, and where a joint did not get
within 5 % the nearest it came; and the largest motion of the joints that the nominal holds
at mid-range while another one jogs (what a correction on one joint costs the others). No
timing of the code here: the figures are what the closed loop did, not machine speed.
"""

from __future__ import annotations

import argparse
import hashlib
import math
import sys
import tempfile
from collections.abc import Callable
from dataclasses import dataclass, replace
from pathlib import Path

import numpy as np

ROOT = Path(__file__).resolve().parent.parent
try:
    import safety_filter  # noqa: F401
except ImportError:  # run from a source checkout without installing
    sys.path.insert(0, str(ROOT))
    import safety_filter  # noqa: F401

from safety_filter import SafetyFilter  # noqa: E402
from safety_filter.certification.certify import CertifySettings, certify  # noqa: E402
from safety_filter.certification.dynamics_bounds import BoundSettings  # noqa: E402
from safety_filter.core.certificate import Certificate, CertificateError  # noqa: E402
from safety_filter.core.dynamics import Dynamics  # noqa: E402
from safety_filter.core.robot_model import RobotModel  # noqa: E402
from safety_filter.simulation.command_sources import (  # noqa: E402
    BangBang,
    LargeSinusoid,
    PDBeyondLimits,
    SafeTracking,
)
from safety_filter.simulation.demo_arms import DEMO_ARMS, load_demo_arm  # noqa: E402
from safety_filter.simulation.plant import ClosedLoopLog, limit_violations, run_closed_loop  # noqa: E402

UNFILTERED, CLAMP, FILTER = 'unfiltered', 'braking clamp', 'certified filter'
CONTROLLERS = (UNFILTERED, CLAMP, FILTER)
SPEED_FRACTIONS = (0.25, 0.5, 0.8)
TRACKING_INSET = 0.1  # the tracked sinusoids stay this share of the range inside each limit
REACH_SHARE = 0.05  # "at the limit": within this share of the range
REACH_OVERSHOOT = 0.02  # the jog's target lies this share of the range past the limit
CHANGE_TOLERANCE = 1e-9
BANDWIDTH = 30.0  # [rad/s] of the computed-torque loops (as SafeTracking's default)

Step = Callable[[np.ndarray, np.ndarray, np.ndarray], object]
Nominal = Callable[[float, np.ndarray, np.ndarray], np.ndarray]


# ---------------------------------------------------------------------- the baseline
@dataclass
class ClampOutput:
    """One step of :class:`BrakingCurveClamp`, shaped as the closed loop reads a filter step.

    Attributes:
        torque: the torque to send [N m]; mode: ``'clamped'`` or ``'passed'``;
        barrier_margin: NaN per joint (the clamp has no barriers).
    """

    torque: np.ndarray
    mode: str
    barrier_margin: np.ndarray


class BrakingCurveClamp:
    """Per-joint braking-curve speed clamp with torque clipping (uncertified baseline).

    Each joint ``i`` may move at most at ``min(vmax_i, sqrt(2 e_i d_i))`` toward either limit,
    ``d_i`` the distance to that limit and ``e_i`` the certificate's usable authority. The
    clamp turns the two speed caps into an acceleration interval, ``(cap - v) / tau`` on each
    side, and that into a torque interval ``M_ii a + g_i`` with the diagonal of the mass
    matrix and gravity only, as a joint-level driver that knows its link's inertia would. The
    nominal is clipped to that interval, then to the torque box. The coupling through the
    off-diagonal inertia and the velocity terms is ignored: that is what it does not certify.

    Args:
        model: the robot model.
        certificate: the certificate whose usable authority sets the braking curves.
        payload_mass: payload of the clamp's model [kg].
        time_constant_periods: ``tau`` in control periods. Not 1: a dead-beat gain
            ``M_ii / T`` meets a joint whose actual gain ``(M^-1)_ii M_ii`` exceeds 2
            (strong coupling) with chatter, which no driver would ship.
    """

    def __init__(self, model: RobotModel, certificate: Certificate, payload_mass: float,
                 time_constant_periods: float = 3.0) -> None:
        self.dynamics = Dynamics(model, payload_mass)
        self.lower = np.array(model.position_lower, dtype=float)
        self.upper = np.array(model.position_upper, dtype=float)
        self.speed = np.array(model.velocity_limit, dtype=float)
        self.effort = np.array(model.effort_limit, dtype=float)
        # the certificate's usable authority; with a slow design the larger of the two
        # designs' per joint (the clamp gets what the filter knows)
        self.authority = np.array(usable_authority(certificate))
        self.tau = time_constant_periods / certificate.control_rate_hz
        self.nan = np.full(model.n_joints, np.nan)

    def speed_caps(self, q: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
        """The velocity interval ``[low, high]`` [rad/s] the clamp allows at ``q``."""
        # Past a limit the distance counts as zero: the clamp stops the joint there but, as
        # such clamps do, does not push it back.
        ahead_up = np.maximum(self.upper - q, 0.0)
        ahead_down = np.maximum(q - self.lower, 0.0)
        high = np.minimum(self.speed, np.sqrt(2.0 * self.authority * ahead_up))
        low = -np.minimum(self.speed, np.sqrt(2.0 * self.authority * ahead_down))
        return low, high

    def step(self, q: np.ndarray, v: np.ndarray, u_nom: np.ndarray) -> ClampOutput:
        """The clamped torque for the nominal ``u_nom`` at the state ``(q, v)``."""
        low, high = self.speed_caps(q)
        diagonal = np.diag(self.dynamics.mass_matrix(q))
        gravity = self.dynamics.gravity_torque(q)
        torque_low = diagonal * (low - v) / self.tau + gravity
        torque_high = diagonal * (high - v) / self.tau + gravity
        torque = np.clip(np.clip(u_nom, torque_low, torque_high), -self.effort, self.effort)
        mode = 'clamped' if changed(torque, u_nom, self.effort) else 'passed'
        return ClampOutput(torque, mode, self.nan)


# ---------------------------------------------------------------------- nominals
class JogToLimit:
    """Computed-torque tracking of a ramp at the rated speed toward a target past a limit.

    Joint ``joint`` follows a reference that leaves ``start`` at ``t = 0`` at its rated speed
    toward ``REACH_OVERSHOOT`` of its range past its upper (``direction = +1``) or lower
    (``-1``) limit and stops there; the other joints hold ``start``. The command is
    ``M (a_d + kp e + kd de) + h`` with ``a_d = 0`` (the ramp's corners are steps of speed,
    as a jog button gives).
    """

    def __init__(self, model: RobotModel, payload_mass: float, start: np.ndarray, joint: int,
                 direction: int, bandwidth: float = BANDWIDTH) -> None:
        lower, upper = np.array(model.position_lower), np.array(model.position_upper)
        span = upper[joint] - lower[joint]
        limit = upper[joint] if direction > 0 else lower[joint]
        self.start = np.array(start, dtype=float)
        self.joint = joint
        self.target = limit + direction * REACH_OVERSHOOT * span
        self.speed = float(model.velocity_limit[joint])
        self.kp, self.kd = bandwidth ** 2, 2.0 * bandwidth
        self.dynamics = Dynamics(model, payload_mass)

    def reference(self, t: float) -> tuple[np.ndarray, np.ndarray]:
        """``(q_d, v_d)`` at time ``t`` [s]."""
        q_d, v_d = self.start.copy(), np.zeros_like(self.start)
        distance = self.target - self.start[self.joint]
        travel = self.speed * t
        if travel < abs(distance):
            q_d[self.joint] += math.copysign(travel, distance)
            v_d[self.joint] = math.copysign(self.speed, distance)
        else:
            q_d[self.joint] = self.target
        return q_d, v_d

    def __call__(self, t: float, q: np.ndarray, v: np.ndarray) -> np.ndarray:
        q_d, v_d = self.reference(t)
        mass, bias = self.dynamics.mass_and_bias(q, v)
        return mass @ (self.kp * (q_d - q) + self.kd * (v_d - v)) + bias


def adversarial_nominals(model: RobotModel, payload_mass: float, quick: bool
                         ) -> list[tuple[str, Nominal]]:
    """(label, nominal) of the commands that try to break the limits."""
    gravity = Dynamics(model, payload_mass).gravity_torque
    nominals: list[tuple[str, Nominal]] = [
        ('bang-bang', BangBang(model)),
        ('PD beyond limits', PDBeyondLimits(model, gravity=gravity)),
        ('large sinusoid', LargeSinusoid(model)),
    ]
    return nominals[:1] if quick else nominals


# ---------------------------------------------------------------------- measures
def changed(torque: np.ndarray, nominal: np.ndarray, effort: np.ndarray) -> np.ndarray | bool:
    """Whether a torque differs from its nominal (rows of a batch, or one step)."""
    # Relative to the larger of the nominal and the limit, so a zero nominal that comes back
    # as round-off is not counted as a change.
    scale = np.maximum(np.abs(nominal), effort)
    return np.any(np.abs(torque - nominal) > CHANGE_TOLERANCE * scale, axis=-1)


def tracking_error(log: ClosedLoopLog, nominal: SafeTracking) -> float:
    """Mean over the joints of RMS(q - q_ref) / RMS(q_ref - mean q_ref) over the run."""
    reference = np.array([nominal.reference(t)[0] for t in log.time_s])
    error = np.sqrt(np.mean((log.q - reference) ** 2, axis=0))
    spread = np.sqrt(np.mean((reference - reference.mean(axis=0)) ** 2, axis=0))
    return float(np.mean(error / spread))


def reach_time(log: ClosedLoopLog, model: RobotModel, joint: int, direction: int
               ) -> tuple[float, float]:
    """First time [s] the joint is within ``REACH_SHARE`` of its range of the limit (inf:
    never), and the nearest it came to the limit (share of the range; negative: past it)."""
    lower, upper = model.position_lower[joint], model.position_upper[joint]
    q = log.q[:, joint]
    distance = (upper - q if direction > 0 else q - lower) / (upper - lower)
    hits = np.flatnonzero(distance <= REACH_SHARE)
    return (float(log.time_s[hits[0]]) if hits.size else math.inf), float(np.min(distance))


@dataclass
class Excursion:
    """A run that went past a limit: what, where and by how much."""

    arm: str
    controller: str
    run: str
    kind: str  # 'position' or 'velocity'
    amounts: dict[str, float]


@dataclass
class Row:
    """The figures of one arm and controller."""

    position_over: float = 0.0
    velocity_over: float = 0.0
    errors: tuple[float, ...] = ()
    change_shares: tuple[float, ...] = ()
    reach: np.ndarray | None = None  # (joints, 2): toward the lower, the upper limit [s]
    closest: np.ndarray | None = None  # (joints, 2): nearest approach, share of the range
    drift: tuple[float, str, str] = (0.0, '', '')  # largest held-joint motion, joint, jog


# ---------------------------------------------------------------------- certificate
def _source_digest() -> str:
    """Digest of the package's sources, so a cached certificate follows any code change."""
    digest = hashlib.sha256()
    for path in sorted(Path(safety_filter.__file__).parent.rglob('*.py')):
        digest.update(path.read_bytes())
    return digest.hexdigest()[:12]


def certificate_for(arm: str, model: RobotModel, settings: CertifySettings) -> Certificate:
    """The arm's certificate for ``settings``, certified once and cached in the temp dir."""
    folder = Path(tempfile.gettempdir()) / 'safety_filter_bench_certificates'
    key = hashlib.sha256(repr(settings).encode()).hexdigest()[:12]
    path = folder / f'{arm}-{model.content_hash()[:16]}-{key}-{_source_digest()}.yaml'
    if path.is_file():
        try:
            cached = Certificate.load(path, model)
            if cached.certified:
                return cached
        except CertificateError:
            pass  # stale or damaged: certify again
    print(f'certifying {arm} (once; cached in {folder}) ...', flush=True)
    certificate = certify(model, settings)
    if certificate.certified:
        # Write then rename, so a concurrent or killed run never reads half a file.
        partial = path.with_suffix('.partial')
        certificate.save(partial)
        partial.replace(path)
    return certificate


# ---------------------------------------------------------------------- runs
@dataclass
class Setup:
    """What every run of one arm shares."""

    arm: str
    model: RobotModel
    certificate: Certificate
    payload: float
    rate: float

    def step(self, controller: str) -> Step | None:
        """A fresh controller step (the filter's observer starts anew in every run)."""
        if controller == UNFILTERED:
            return None
        if controller == CLAMP:
            return BrakingCurveClamp(self.model, self.certificate, self.payload).step
        return SafetyFilter(self.model, self.certificate, payload_mass=self.payload).step

    def run(self, controller: str, nominal: Nominal, duration: float, q0: np.ndarray,
            v0: np.ndarray | None = None) -> ClosedLoopLog:
        """One closed loop on the model itself."""
        return run_closed_loop(self.model, self.step(controller), nominal, duration, self.rate,
                               q0, v0, payload_mass=self.payload)


def usable_authority(certificate: Certificate) -> np.ndarray:
    """Per joint, the certificate's usable authority ``authority - sampling_margin``
    [rad/s^2]; with a slow design, the larger of the two designs'."""
    designs = [certificate] + ([certificate.slow_design] if certificate.slow_design else [])
    return np.max([np.asarray(d.authority) - d.sampling_margin for d in designs], axis=0)


def nearest_rest(setup: Setup) -> np.ndarray:
    """Per joint and side (lower, upper), the nearest a joint can come to its limit and stay
    at rest under the filter, as a share of the range (the others at mid-range).

    At rest the filter's bound toward a limit is what the barrier allows less the
    sampled-data margin; closer to the limit than where that reaches zero, the filter brakes
    the joint before it gets there. With a slow design, the nearer of the two designs'. The
    grid's step is 0.05 % of the range.
    """
    model = setup.model
    designs = [setup.certificate] + ([setup.certificate.slow_design]
                                     if setup.certificate.slow_design else [])
    found = [_nearest_rest(setup, SafetyFilter(model, replace(design, slow_design=None),
                                               payload_mass=setup.payload))
             for design in designs]
    return np.nanmin(np.array(found), axis=0)


def _nearest_rest(setup: Setup, probe: SafetyFilter) -> np.ndarray:
    model = setup.model
    lower, upper = np.array(model.position_lower), np.array(model.position_upper)
    middle, span = 0.5 * (lower + upper), upper - lower
    shares = np.linspace(0.0, 0.5, 1001)
    nearest = np.full((model.n_joints, 2), np.nan)
    for joint in range(model.n_joints):
        for side, sign in ((0, -1.0), (1, 1.0)):
            q = np.tile(middle, (shares.size, 1))
            q[:, joint] = (upper[joint] if sign > 0 else lower[joint]) - sign * shares * span[
                joint]
            bounds = probe.constraint_bounds(q, np.zeros_like(q))
            toward = (bounds.accel_upper if sign > 0 else -bounds.accel_lower)[:, joint]
            allowed = np.flatnonzero(toward >= 0.0)
            if allowed.size:
                nearest[joint, side] = shares[allowed[0]]
    return nearest


def record_excursions(setup: Setup, controller: str, run: str, log: ClosedLoopLog,
                      found: list[Excursion]) -> dict[str, np.ndarray]:
    """The run's excursions past the position and velocity limits (appended to ``found``)."""
    broken = limit_violations(setup.model, log.q, log.v, log.torque)
    for kind in ('position', 'velocity'):
        over = {name: float(x) for name, x in zip(setup.model.joint_names, broken[kind])
                if x > 0.0}
        if over:
            found.append(Excursion(setup.arm, controller, run, kind, over))
    return broken


class TurningPointTracking(SafeTracking):
    """:class:`SafeTracking` whose every joint starts at a turning point of its sinusoid.

    The run then starts at rest exactly on the reference, inside the safe set (10 % of the
    range from a limit, at rest): no controller pays for a start-up transient, so the
    tracking error measures only what each does to the motion itself. Which turning point
    (upper or lower) is seeded per joint.
    """

    def __init__(self, model: RobotModel, payload_mass: float, speed_fraction: float,
                 seed: int = 0) -> None:
        super().__init__(model, payload_mass, speed_fraction, inset=TRACKING_INSET,
                         bandwidth=BANDWIDTH, seed=seed)
        side = np.random.default_rng(seed).integers(0, 2, model.n_joints)
        self.phase = np.where(side == 1, 0.5 * np.pi, -0.5 * np.pi)


def measure_arm(setup: Setup, quick: bool, duration: float, reach_duration: float,
                found: list[Excursion]) -> tuple[dict[str, Row], dict[str, int]]:
    """Every run of one arm; returns the rows and how many runs each measure took."""
    model = setup.model
    middle = 0.5 * (np.array(model.position_lower) + np.array(model.position_upper))
    effort = np.array(model.effort_limit)
    rows = {controller: Row() for controller in CONTROLLERS}
    adversarial = adversarial_nominals(model, setup.payload, quick)
    jogs = ([(model.n_joints - 1, +1)] if quick
            else [(j, d) for j in range(model.n_joints) for d in (-1, +1)])
    for controller in CONTROLLERS:
        row = rows[controller]
        for label, nominal in adversarial:
            log = setup.run(controller, nominal, duration, middle)
            broken = record_excursions(setup, controller, label, log, found)
            row.position_over = max(row.position_over, float(np.max(broken['position'])))
            row.velocity_over = max(row.velocity_over, float(np.max(broken['velocity'])))
        errors, shares = [], []
        for fraction in SPEED_FRACTIONS:
            tracker = TurningPointTracking(model, setup.payload, fraction)
            q0, v0, _ = tracker.reference(0.0)
            log = setup.run(controller, tracker, duration, q0, v0)
            record_excursions(setup, controller, f'tracking {100 * fraction:.0f} %', log, found)
            errors.append(tracking_error(log, tracker))
            shares.append(float(np.mean(changed(log.torque, log.nominal, effort))))
        row.errors, row.change_shares = tuple(errors), tuple(shares)
        row.reach = np.full((model.n_joints, 2), np.nan)
        row.closest = np.full((model.n_joints, 2), np.nan)
        for joint, direction in jogs:
            jog = JogToLimit(model, setup.payload, middle, joint, direction)
            log = setup.run(controller, jog, reach_duration, middle)
            label = f'jog {model.joint_names[joint]} to {"upper" if direction > 0 else "lower"}'
            record_excursions(setup, controller, label, log, found)
            side = int(direction > 0)
            row.reach[joint, side], row.closest[joint, side] = reach_time(log, model, joint,
                                                                          direction)
            # The other joints are asked to hold still: how far they moved anyway is what a
            # correction on the jogged joint costs them.
            held = np.max(np.abs(log.q - middle), axis=0)
            held[joint] = 0.0
            worst = int(np.argmax(held))
            if held[worst] > row.drift[0]:
                row.drift = (float(held[worst]), model.joint_names[worst], label)
    return rows, {'adversarial': len(adversarial), 'jogs': len(jogs)}


# ---------------------------------------------------------------------- printing
def ratio(value: float, reference: float) -> str:
    """``value / reference`` as ``N.NNx`` (``-`` when it means nothing)."""
    if not (math.isfinite(value) and math.isfinite(reference)) or reference <= 0.0:
        return '-'
    share = value / reference
    return f'{share:.0f}x' if share >= 100.0 else f'{share:.2f}x'


def mean_reach(reach: np.ndarray, duration: float) -> tuple[float, bool]:
    """Mean over the jogs run, unreached ones counted at the run's length; and whether any
    was unreached."""
    times = reach[np.isfinite(reach) | np.isinf(reach)]
    missed = bool(np.any(np.isinf(times)))
    return float(np.mean(np.where(np.isinf(times), duration, times))), missed


HEADER = (f'{"arm":<7} {"controller":<16} {"pos over":>8} {"vel over":>8}  '
          + ' '.join(f'{f"err {100 * f:.0f}%":>15}' for f in SPEED_FRACTIONS) + '  '
          + ' '.join(f'{f"chg {100 * f:.0f}%":>7}' for f in SPEED_FRACTIONS)
          + f'  {"reach [s]":>15}')


def format_row(arm: str, controller: str, row: Row, reference: Row, reach_duration: float
               ) -> str:
    """One line of the table."""
    errors = ' '.join(f'{f"{e:.4f} ({ratio(e, r)})":>15}'
                      for e, r in zip(row.errors, reference.errors))
    shares = ' '.join(f'{f"{100 * s:.1f}%":>7}' for s in row.change_shares)
    reach, missed = mean_reach(row.reach, reach_duration)
    base, _ = mean_reach(reference.reach, reach_duration)
    reach_text = f'{">" if missed else ""}{reach:.2f} ({ratio(reach, base)})'
    return (f'{arm:<7} {controller:<16} {row.position_over:8.3g} {row.velocity_over:8.3g}  '
            f'{errors}  {shares}  {reach_text:>15}')


def print_details(setups: list[Setup], results: dict[str, dict[str, Row]],
                  found: list[Excursion], reach_duration: float) -> None:
    """The excursions of the clamp and the filter, and the reach time per joint."""
    print()
    print('limits broken by the braking clamp or the certified filter (any run):')
    listed = [x for x in found if x.controller != UNFILTERED]
    for x in listed:
        unit = 'rad' if x.kind == 'position' else 'rad/s'
        joints = ', '.join(f'{name} {amount:.3g}' for name, amount in x.amounts.items())
        print(f'  {x.arm:<7} {x.controller:<16} {x.run:<28} {x.kind:<8} [{unit}] {joints}')
    if not listed:
        print('  none')
    print()
    print(f'reach time per joint [s], lower / upper limit (- not run; stop N%: not within '
          f'{100 * REACH_SHARE:g} % in {reach_duration:g} s, the nearest it came, as a share of '
          'the range):')
    for setup in setups:
        for controller in CONTROLLERS:
            row = results[setup.arm][controller]
            cells = []
            for name, times, nearest in zip(setup.model.joint_names, row.reach, row.closest):
                text = '/'.join('-' if math.isnan(t) else f'stop {100 * d:.1f}%'
                                if math.isinf(t) else f'{t:.2f}' for t, d in zip(times, nearest))
                cells.append(f'{name} {text}')
            print(f'  {setup.arm:<7} {controller:<16} ' + '  '.join(cells))
    print()
    print('largest motion of a joint asked to hold still at mid-range while another jogged:')
    for setup in setups:
        for controller in CONTROLLERS:
            amount, joint, jog = results[setup.arm][controller].drift
            print(f'  {setup.arm:<7} {controller:<16} {amount:.3g} rad'
                  + (f' ({joint}, {jog})' if joint else ''))


def main(argv: list[str] | None = None) -> int:
    """Run the benchmark; exit code 0, or 1 when an arm does not certify."""
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument('--arm', nargs='+', choices=DEMO_ARMS, default=None,
                        help='demo arms (default: bench6 reach7; bench6 with --quick)')
    parser.add_argument('--duration', type=float, default=8.0,
                        help='seconds per adversarial and tracking run (default: 8)')
    parser.add_argument('--reach-duration', type=float, default=20.0,
                        help='seconds per run toward a limit (default: 20)')
    parser.add_argument('--quick', action='store_true',
                        help='a smoke run: bench6, one adversarial nominal, one jog, 1.5 s '
                             'runs, and a certificate of fewer samples')
    args = parser.parse_args(argv)
    arms = args.arm or (['bench6'] if args.quick else ['bench6', 'reach7'])
    duration = 1.5 if args.quick else args.duration
    reach_duration = 2.0 if args.quick else args.reach_duration
    # The quick run certifies with fewer samples and rollouts (a fifth of the time): its
    # certificate still passes every check, but its figures are not the default design's.
    settings = (CertifySettings(falsifier_states=2000, bounds=BoundSettings(samples=512),
                                margin_samples=200, velocity_scales=12)
                if args.quick else CertifySettings())
    setups = []
    for arm in arms:
        model = load_demo_arm(arm)
        certificate = certificate_for(arm, model, settings)
        if not certificate.certified:
            print(f'{arm} did not certify: {certificate.reasons}')
            return 1
        low, high = certificate.payload_mass_range
        setups.append(Setup(arm, model, certificate, 0.5 * (low + high),
                            certificate.control_rate_hz))
    found: list[Excursion] = []
    results: dict[str, dict[str, Row]] = {}
    counts: dict[str, int] = {}
    for setup in setups:
        results[setup.arm], counts = measure_arm(setup, args.quick, duration, reach_duration,
                                                 found)
    rate = setups[0].rate
    print(f'closed loop on the model (payload at the middle of its range), control at '
          f'{rate:g} Hz, RK4 at 10 kHz; {"quick run, " if args.quick else ""}'
          f'{duration:g} s per adversarial ({counts["adversarial"]} '
          f'nominal{"s" if counts["adversarial"] > 1 else ""}) and tracking '
          f'run, {reach_duration:g} s per jog ({counts["jogs"]} per arm)')
    for setup in setups:
        c = setup.certificate
        usable = usable_authority(c)
        slow = '' if c.slow_design is None else ' (slow design: ' + ' '.join(
            f'{100 * f:.0f}%' for f in c.slow_design.velocity_bound / c.velocity_limit) + ')'
        print(f'{setup.arm}: certified velocity box '
              + ' '.join(f'{100 * f:.0f}%' for f in c.velocity_bound / c.velocity_limit)
              + f' of rated{slow}; clamp authority [rad/s^2] '
              + ' '.join(f'{e:.2g}' for e in usable))
        print(f'{setup.arm}: nearest rest to the lower/upper limit the filter allows '
              '(share of the range) '
              + ' '.join(f'{name} {100 * down:.1f}/{100 * up:.1f}%' for name, (down, up)
                         in zip(setup.model.joint_names, nearest_rest(setup))))
    print()
    print(HEADER)
    for setup in setups:
        reference = results[setup.arm][UNFILTERED]
        for controller in CONTROLLERS:
            print(format_row(setup.arm, controller, results[setup.arm][controller], reference,
                             reach_duration))
    print_details(setups, results, found, reach_duration)
    return 0


if __name__ == '__main__':
    sys.exit(main())
