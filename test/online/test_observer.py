"""The disturbance observer of the filter step: the guarantee on an arm unlike its model.

Reference plant: Pinocchio (package ``pin``), built from a *perturbed copy of the URDF text*
(link masses and inertias scaled, centres of mass moved, the payload as an extra link), so
neither the plant's model nor its dynamics code is the filter's. Friction, which URDF
readers of Pinocchio ignore, is added from the limits as in the package's model.
"""

from __future__ import annotations

import re
import xml.etree.ElementTree as ET

import numpy as np
import pytest
from filter_fixtures import demo_arm_and_certificate

from safety_filter import SafetyFilter
from safety_filter.core.dynamics import Dynamics
from safety_filter.core.model_uncertainty import model_with_inertials
from safety_filter.online.disturbance_observer import DisturbanceObserver, narrow_by_lag
from safety_filter.online.step_dynamics import StepDynamics
from safety_filter.simulation.command_sources import BangBang, PDBeyondLimits
from safety_filter.simulation.demo_arms import demo_arm_files
from safety_filter.simulation.plant import ArmSimulator, limit_violations

pin = pytest.importorskip('pinocchio', reason='the reference plant needs pin')

CONTROL_RATE_HZ = 1000.0
PLANT_RATE_HZ = 10_000.0


def perturbed_urdf(urdf_text: str, scale: float, com_shift: float, tip_link: str,
                   payload_mass: float, payload_point: tuple[float, float, float]) -> str:
    """The URDF with every link's mass and inertia times ``scale``, every centre of mass moved
    by ``com_shift`` [m] along its link's x axis, and the payload as a point-like link fixed to
    the tip."""
    root = ET.fromstring(urdf_text)
    for link in root.iter('link'):
        inertial = link.find('inertial')
        if inertial is None:
            continue
        mass = inertial.find('mass')
        mass.set('value', repr(float(mass.get('value')) * scale))
        inertia = inertial.find('inertia')
        for key in ('ixx', 'ixy', 'ixz', 'iyy', 'iyz', 'izz'):
            inertia.set(key, repr(float(inertia.get(key, '0')) * scale))
        origin = inertial.find('origin')
        xyz = [float(x) for x in origin.get('xyz', '0 0 0').split()]
        xyz[0] += com_shift
        origin.set('xyz', ' '.join(repr(x) for x in xyz))
    if payload_mass > 0.0:
        link = ET.SubElement(root, 'link', name='reference_payload')
        inertial = ET.SubElement(link, 'inertial')
        ET.SubElement(inertial, 'origin', xyz='0 0 0', rpy='0 0 0')
        ET.SubElement(inertial, 'mass', value=repr(payload_mass))
        ET.SubElement(inertial, 'inertia', ixx='1e-9', ixy='0', ixz='0', iyy='1e-9', iyz='0',
                      izz='1e-9')
        joint = ET.SubElement(root, 'joint', name='reference_payload_mount', type='fixed')
        ET.SubElement(joint, 'parent', link=tip_link)
        ET.SubElement(joint, 'child', link='reference_payload')
        ET.SubElement(joint, 'origin', xyz=' '.join(repr(x) for x in payload_point),
                      rpy='0 0 0')
    return ET.tostring(root, encoding='unicode')


class PinocchioPlant:
    """RK4 of Pinocchio's ABA under a held torque, with the model's viscous friction."""

    def __init__(self, urdf_text: str, viscous: np.ndarray, gravity: np.ndarray) -> None:
        self.model = pin.buildModelFromXML(urdf_text)
        self.model.gravity.linear = np.asarray(gravity, dtype=float)
        self.data = self.model.createData()
        self.viscous = np.asarray(viscous, dtype=float)
        self.q = np.zeros(self.model.nq)
        self.v = np.zeros(self.model.nv)

    def _accel(self, q: np.ndarray, v: np.ndarray, u: np.ndarray) -> np.ndarray:
        return np.array(pin.aba(self.model, self.data, q, v, u - self.viscous * v))

    def advance(self, u: np.ndarray, duration_s: float) -> None:
        steps = int(round(duration_s * PLANT_RATE_HZ))
        dt = duration_s / steps
        q, v = self.q, self.v
        for _ in range(steps):
            k1v = self._accel(q, v, u)
            k2v = self._accel(q + 0.5 * dt * v, v + 0.5 * dt * k1v, u)
            k3v = self._accel(q + 0.5 * dt * (v + 0.5 * dt * k1v), v + 0.5 * dt * k2v, u)
            k4v = self._accel(q + dt * (v + 0.5 * dt * k2v), v + dt * k3v, u)
            q = q + dt * v + dt * dt / 6.0 * (k1v + k2v + k3v)
            v = v + dt / 6.0 * (k1v + 2.0 * k2v + 2.0 * k3v + k4v)
        self.q, self.v = q, v


class Tracking:
    """Computed-torque tracking, with the filter's model, of sinusoids that stay 10 % of the
    range inside each limit and reach half the rated speed: a motion that is itself safe."""

    def __init__(self, dynamics: Dynamics, lower: np.ndarray, upper: np.ndarray,
                 speed: np.ndarray) -> None:
        self.dynamics = dynamics
        self.middle = 0.5 * (lower + upper)
        self.amplitude = 0.4 * (upper - lower)
        self.omega = 0.5 * speed / self.amplitude
        self.phase = np.linspace(0.3, 2.0, len(lower))

    def reference(self, t: float) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
        angle = self.omega * t + self.phase
        return (self.middle + self.amplitude * np.sin(angle),
                self.amplitude * self.omega * np.cos(angle),
                -self.amplitude * self.omega ** 2 * np.sin(angle))

    def __call__(self, t: float, q: np.ndarray, v: np.ndarray) -> np.ndarray:
        qd, vd, ad = self.reference(t)
        mass, bias = self.dynamics.mass_and_bias(q, v)
        return mass @ (ad + 100.0 * (qd - q) + 20.0 * (vd - v)) + bias


def run(plant, filt: SafetyFilter, nominal, duration_s: float, q0: np.ndarray,
        v0: np.ndarray) -> tuple[np.ndarray, np.ndarray, np.ndarray, list[str]]:
    """Closed loop at the control rate; the applied torque saturates as a driver's does."""
    plant.q, plant.v = np.array(q0, dtype=float), np.array(v0, dtype=float)
    umax = np.array(filt.torque_limit)
    qs, vs, us, modes = [], [], [], []
    for k in range(int(duration_s * CONTROL_RATE_HZ)):
        t = k / CONTROL_RATE_HZ
        out = filt.step(plant.q, plant.v, nominal(t, plant.q, plant.v))
        torque = np.clip(out.torque, -umax, umax)
        qs.append(plant.q.copy())
        vs.append(plant.v.copy())
        us.append(torque)
        modes.append(str(out.mode))
        plant.advance(torque, 1.0 / CONTROL_RATE_HZ)
    return np.array(qs), np.array(vs), np.array(us), modes


# ---------------------------------------------------------------------- Pinocchio plants
PLANTS = [  # (link mass and inertia scale, centre-of-mass shift [m], payload: 'low' / 'high')
    (1.0, 0.0, 'low'), (1.0, 0.0, 'high'), (1.1, 0.005, 'high'), (0.9, -0.005, 'low')]


@pytest.mark.slow
@pytest.mark.parametrize('scale, shift, payload', PLANTS)
def test_filter_keeps_limits_on_perturbed_pinocchio_plants(scale: float, shift: float,
                                                          payload: str) -> None:
    """planar2, filter not told the payload (its model carries the middle of the range),
    against Pinocchio plants from perturbed URDFs (links 10 % heavier or lighter, centres of
    mass moved 5 mm, payload at either end of its range): under a safe tracking motion and
    two adversarial nominals every position and velocity limit holds (exactly: no noise
    here) and the applied torque stays in the box."""
    model, certificate = demo_arm_and_certificate('planar2')
    urdf_path, _ = demo_arm_files('planar2')
    mass = model.payload.mass_min if payload == 'low' else model.payload.mass_max
    text = perturbed_urdf(urdf_path.read_text(), scale, shift, model.tip_link, mass,
                          model.payload.point)
    plant = PinocchioPlant(text, model.viscous_friction, model.gravity)
    assert plant.model.nq == model.n_joints
    lower, upper = np.array(model.position_lower), np.array(model.position_upper)
    filter_model = Dynamics(model, 0.5 * (model.payload.mass_min + model.payload.mass_max))
    tracking = Tracking(filter_model, lower, upper, np.array(model.velocity_limit))
    nominals = {'tracking': tracking, 'bang-bang': BangBang(model, seed=3),
                'pd beyond limits': PDBeyondLimits(model, gravity=filter_model.gravity_torque)}
    for name, nominal in nominals.items():
        filt = SafetyFilter(model, certificate)  # payload not told: the middle of the range
        q0, v0 = (tracking.reference(0.0)[:2] if name == 'tracking'
                  else (0.5 * (lower + upper), np.zeros(model.n_joints)))
        q, v, u, modes = run(plant, filt, nominal, 2.0, q0, 0.2 * v0)
        broken = limit_violations(model, q, v, u)
        assert np.all(broken['position'] <= 1e-9), (name, broken)
        assert np.all(broken['velocity'] <= 1e-9), (name, broken)
        assert np.all(broken['torque'] == 0.0), (name, broken)
        assert 'rejected' not in modes, name


@pytest.mark.slow
def test_without_the_observer_the_same_plant_breaks_a_limit() -> None:
    """The check above can fail: bench6 (its light wrist feels the payload most), payload at
    the top of its range while the filter's model carries the middle, every link 10 %
    heavier, safe tracking motion: with the observer off a limit breaks; with it on, none
    does (plant: the package's own dynamics of the perturbed model, integrated with RK4 at
    10 kHz)."""
    model, certificate = demo_arm_and_certificate('bench6')
    heavy = model_with_inertials(model, body_mass=np.array(model.body_mass) * 1.1,
                                 body_inertia=np.array(model.body_inertia) * 1.1)
    lower, upper = np.array(model.position_lower), np.array(model.position_upper)
    filter_model = Dynamics(model, 0.5 * (model.payload.mass_min + model.payload.mass_max))
    tracking = Tracking(filter_model, lower, upper, np.array(model.velocity_limit))
    q0, v0, _ = tracking.reference(0.0)
    worst = {}
    for label, time_constant in (('off', 0.0), ('on', None)):
        plant = ArmSimulator(heavy, model.payload.mass_max, PLANT_RATE_HZ)
        filt = SafetyFilter(model, certificate, observer_time_constant_s=time_constant)
        q, v, u, _ = run(plant, filt, tracking, 2.0, q0, 0.2 * v0)
        broken = limit_violations(model, q, v, u)
        worst[label] = max(float(np.max(broken['position'])), float(np.max(broken['velocity'])))
    assert worst['off'] > 0.01, worst
    assert worst['on'] <= 1e-9, worst


def test_observer_estimates_a_constant_torque_offset() -> None:
    """A driver that adds a constant torque the model does not know: the estimate converges to
    it as a first-order low-pass does (error times (1 - T/(T + tau)) per step, a textbook
    discrete filter), to within 1 % after ten time constants; and the filtered motion then
    obeys the bounds as if there were no offset."""
    model, certificate = demo_arm_and_certificate('planar2')
    offset = np.array([3.0, -1.5])
    plant = ArmSimulator(model, 0.5 * (model.payload.mass_min + model.payload.mass_max),
                         PLANT_RATE_HZ)
    filt = SafetyFilter(model, certificate)
    tau = float(np.max(filt.observer_time_constant_s))
    np.testing.assert_allclose(filt.observer_time_constant_s,
                               certificate.observer_time_constants_s)
    q = 0.5 * (np.array(model.position_lower) + np.array(model.position_upper))
    plant.reset(q)
    hold = Dynamics(model, filt.payload_mass)
    steps = int(10 * tau * CONTROL_RATE_HZ)
    for _ in range(steps):
        out = filt.step(plant.q, plant.v, hold.gravity_torque(plant.q))
        plant.advance(np.array(out.torque) + offset, 1.0 / CONTROL_RATE_HZ)
    np.testing.assert_allclose(filt.disturbance_estimate, offset, rtol=0.01, atol=0.01)
    # the estimate has settled: it trails nothing (its rate has all but died out)
    assert np.all(np.abs(filt.disturbance_lag) < 0.05 * np.abs(offset))
    # reset forgets the estimate and its lag
    filt.reset()
    assert np.all(filt.disturbance_estimate == 0.0)
    assert np.all(filt.disturbance_lag == 0.0)


def test_observer_skips_samples_that_are_not_one_period_apart() -> None:
    """Two unrelated states in a row (a replay jump, a restart) would read as a huge torque;
    the observer skips a sample that needs more than twice the torque box."""
    model, certificate = demo_arm_and_certificate('planar2')
    filt = SafetyFilter(model, certificate)
    q = 0.5 * (np.array(model.position_lower) + np.array(model.position_upper))
    filt.step(q, np.zeros(2), np.zeros(2))
    filt.step(q, np.array([2.0, -2.0]), np.zeros(2))  # 2 rad/s within 1 ms: 2000 rad/s^2
    assert np.all(filt.disturbance_estimate == 0.0)


def test_position_beyond_a_limit_is_pushed_back_not_held() -> None:
    """A position 0.3 rad beyond a limit (an impact, a start outside S) is recovered from:
    the torque pushes the joint back (acceleration toward the range, recomputed with
    Dynamics.forward_dynamics) instead of the hold command."""
    model, certificate = demo_arm_and_certificate('planar2')
    filt = SafetyFilter(model, certificate, observer_time_constant_s=0.0)
    assert filt.rejection_distance > 0.3
    q = 0.5 * (np.array(model.position_lower) + np.array(model.position_upper))
    q[1] = model.position_upper[1] + 0.3
    out = filt.step(q, np.zeros(2), np.array(model.effort_limit))  # nominal pushes further
    assert str(out.mode) == 'recovering'
    accel = filt.dynamics.forward_dynamics(q, np.zeros(2), out.torque)
    assert accel[1] < 0.0


def test_invalid_observer_time_constant_is_refused() -> None:
    model, certificate = demo_arm_and_certificate('planar2')
    from safety_filter.errors import SafetyFilterError

    for bad in (-1.0, float('nan'), float('inf')):
        with pytest.raises(SafetyFilterError, match='observer_time_constant_s'):
            SafetyFilter(model, certificate, observer_time_constant_s=bad)


def test_perturbed_urdf_changes_what_it_says() -> None:
    """The perturbation helper itself: masses scale, and the payload link appears."""
    urdf_path, _ = demo_arm_files('planar2')
    text = perturbed_urdf(urdf_path.read_text(), 1.1, 0.0, 'tool', 0.5, (0.0, 0.0, 0.0))
    masses = [float(m) for m in re.findall(r'<mass value="([^"]+)"', text)]
    original = [float(m) for m in re.findall(r'<mass value="([^"]+)"',
                                             urdf_path.read_text())]
    assert masses[:len(original)] == pytest.approx([1.1 * m for m in original])
    assert masses[-1] == 0.5


@pytest.mark.parametrize('distance, excess', [(0.3, 0.3), (0.3, 1.2), (0.05, 0.3),
                                               (0.05, 0.95)])
def test_recovery_meets_the_certified_recovery_time(distance: float, excess: float) -> None:
    """planar2, exact model: the elbow started outside S (toward its upper limit, ``excess``
    rad/s faster than S allows, ``distance`` rad from the limit) under a nominal that pushes
    on at full effort is back in S within Certificate.recovery_time of the start (plus a
    control period), and its position never passes the limit. At 0.05 rad and 0.95 rad/s
    above S the barriers' own return would pass the limit by about 4 mrad: the braking-curve
    bound outside S keeps it."""
    model, certificate = demo_arm_and_certificate('planar2')
    filt = SafetyFilter(model, certificate, observer_time_constant_s=0.0)
    plant = ArmSimulator(model, filt.payload_mass, PLANT_RATE_HZ)
    q = 0.5 * (np.array(model.position_lower) + np.array(model.position_upper))
    q[1] = model.position_upper[1] - distance
    _, high = certificate.safe_velocity_interval(q)
    v = np.array([0.0, high[1] + excess])
    assert filt.constraint_bounds(q, v).smallest[1] < 0.0
    bound = float(np.max(certificate.recovery_time(q, v)))
    assert 0.0 < bound < np.inf
    plant.reset(q, v)
    push = np.array(model.effort_limit)
    back = None
    for k in range(int(1.5 * bound * CONTROL_RATE_HZ) + 10):
        out = filt.step(plant.q, plant.v, push)
        if back is None and np.all(filt.constraint_bounds(plant.q, plant.v).smallest >= 0.0):
            back = k / CONTROL_RATE_HZ
        assert plant.q[1] <= model.position_upper[1]
        plant.advance(np.clip(out.torque, -push, push), 1.0 / CONTROL_RATE_HZ)
    assert back is not None and back <= bound + 1.0 / CONTROL_RATE_HZ, (back, bound)


def test_a_position_jump_is_refused_until_it_stays() -> None:
    """One sample 0.5 rad off (a sensor glitch: ten periods at the rated speed allow 0.03 rad)
    is refused with the hold at the last valid position; the next good sample is filtered
    again; a jump that stays (three agreeing samples: a re-homed encoder) is accepted."""
    model, certificate = demo_arm_and_certificate('planar2')
    filt = SafetyFilter(model, certificate)
    q = 0.5 * (np.array(model.position_lower) + np.array(model.position_upper))
    v = np.zeros(2)
    hold = Dynamics(model, filt.payload_mass).gravity_torque(q)
    assert str(filt.step(q, v, hold).mode) == 'filtered'
    glitch = q + np.array([0.0, 0.5])
    out = filt.step(glitch, v, hold)
    assert str(out.mode) == 'rejected' and 'jumped' in out.reason and 'elbow' in out.reason
    np.testing.assert_allclose(out.torque, filt.hold_torque(q, v))
    assert str(filt.step(q, v, hold).mode) == 'filtered'
    modes = [str(filt.step(glitch, v, hold).mode) for _ in range(4)]
    assert modes == ['rejected', 'rejected', 'filtered', 'filtered'], modes
    # without the observer (unrelated states on purpose) there is no jump check
    plain = SafetyFilter(model, certificate, observer_time_constant_s=0.0)
    plain.step(q, v, hold)
    assert str(plain.step(glitch, v, hold).mode) != 'rejected'


def _observer(delay_periods: int, period_s: float, n: int = 2,
              time_constant_s: float = 1e-9, dynamics: StepDynamics | None = None
              ) -> DisturbanceObserver:
    """An observer with the torque box only (no certificate range) and so short a time
    constant that each estimate is the last period's residual (gain 1/3 at most)."""
    return DisturbanceObserver(np.full(n, time_constant_s), delay_periods, np.full(n, 100.0),
                               dynamics, None, None, period_s)


@pytest.mark.parametrize('loop_period_s, expected_mix', [(1e-3, (1.0, 0.0)),
                                                         (2e-3, (0.5, 0.5)),
                                                         (4e-3, (0.25, 0.75))])
def test_observer_keeps_the_declared_delay_as_a_time(loop_period_s: float,
                                                     expected_mix: tuple[float, float]) -> None:
    """A 1 ms delay declared at 1 kHz: at a loop period T the torque sent at the last step
    acts for the last T - 1 ms of the period and the one before for the first 1 ms. With a
    unit mass and no bias the measured motion is that mix exactly, so the estimate stays
    zero; taking the torque of one step before (the delay counted in the loop's periods)
    would read the change of command as a disturbance."""
    observer = _observer(1, 1e-3)
    rng = np.random.default_rng(4)
    sent = [np.zeros(2), np.zeros(2)]
    v = np.zeros(2)
    mass, zero = np.eye(2), np.zeros(2)
    for step in range(40):
        observer.observe(zero, v, mass, zero.copy(), loop_period_s)
        assert np.all(np.abs(observer.disturbance) < 1e-9), (step, observer.disturbance)
        command = rng.uniform(-5.0, 5.0, 2)
        observer.sent(command)
        sent.append(command)
        acted = expected_mix[0] * sent[-2] + expected_mix[1] * sent[-1]
        v = v + loop_period_s * acted  # what the unit mass does over the next period


def test_observer_measures_against_the_plan_made_at_the_start_of_the_period() -> None:
    """On the exact model (RK4 at 10 kHz as the plant) with the arm moving, the acceleration
    over a period drifts from the one planned at its start, as the state moves. The observer
    compares the motion with the plan made at the start (M and the rigid bias there, the
    model's friction at the new velocity, as the filter's step dynamics give it), so its
    estimate is the drift of the last period, and the next plan with it predicts the next
    period's mean acceleration at least three times better than the plan without it. With
    M and h at the end of the period instead, the estimate has the wrong sign and makes the
    plan worse."""
    model, certificate = demo_arm_and_certificate('planar2')
    payload = 0.5 * (model.payload.mass_min + model.payload.mass_max)
    dynamics = Dynamics(model, payload)
    plant = ArmSimulator(model, payload, PLANT_RATE_HZ)
    period = 1.0 / CONTROL_RATE_HZ
    observer = _observer(0, period, time_constant_s=1e-9, dynamics=StepDynamics(dynamics))
    q = 0.5 * (np.array(model.position_lower) + np.array(model.position_upper))
    plant.reset(q, np.array([2.0, -2.5]))
    with_estimate, without = [], []
    for step in range(60):
        mass, bias = dynamics.mass_and_bias(plant.q, plant.v)
        plain = bias.copy()
        observer.observe(plant.q, plant.v, mass, bias, period)  # bias is now h - d
        torque = bias + mass @ np.array([1.0, -2.0])  # plan: a = (1, -2) with the estimate
        v_before = plant.v.copy()
        observer.sent(torque)
        plant.advance(torque, period)
        mean = (plant.v - v_before) / period
        if step >= 5:
            with_estimate.append(np.abs(np.linalg.solve(mass, torque - bias) - mean))
            without.append(np.abs(np.linalg.solve(mass, torque - plain) - mean))
    with_estimate, without = np.max(with_estimate, axis=0), np.max(without, axis=0)
    assert np.all(without > 1e-3), without  # the drift is there to be seen
    assert np.all(with_estimate < without / 3.0), (with_estimate, without)


class _CoulombOnly:
    """What the observer takes from the step dynamics without a certificate range: the
    model's friction (here 1 N m of Coulomb friction only)."""

    has_friction = True

    @staticmethod
    def friction(v: np.ndarray) -> np.ndarray:
        return np.sign(v) * 1.0


def test_a_reversal_does_not_read_as_twice_the_friction() -> None:
    """A joint with 1 N m of Coulomb friction in the model reverses within a period, moving
    as the model says with the friction of its new direction (unit mass, no delay): the
    residual counts the friction as the next plan will (the new direction), so the estimate
    stays zero through the reversal; counted in the old direction it would read 2 N m."""
    period = 1e-3
    observer = DisturbanceObserver(np.full(1, 1e-9), 0, np.full(1, 100.0), _CoulombOnly(),
                                   None, None, period)
    mass = np.eye(1)
    v = np.array([0.001])
    for target in (0.001, -0.001, -0.003, -0.005):
        observer.observe(np.zeros(1), v, mass, np.sign(v) * 1.0, period)
        assert abs(observer.disturbance[0]) < 1e-9, (v, observer.disturbance)
        # the torque that moves the unit mass to ``target`` within the period, with the
        # friction of the direction it ends in
        torque = (target - v) / period + np.sign(target) * 1.0
        observer.sent(torque)
        v = np.array([target])
    observer.observe(np.zeros(1), v, mass, np.sign(v) * 1.0, period)
    assert abs(observer.disturbance[0]) < 1e-9, observer.disturbance



def test_lag_is_the_time_constant_times_the_drift_rate() -> None:
    """A torque the model misses that grows at a steady rate r: a first-order low-pass
    trails a ramp by r T (1 - l) / l, its time constant times r when the gain l is not
    capped (the steady-state error of a type-1 loop to a ramp; textbook control, e.g.
    the velocity error constant). The observer's ``lag`` says so once its rate has
    settled, the estimate trails the true torque by that much, and a constant torque
    leaves no lag."""
    period, tau, rate = 1e-3, 20e-3, 30.0
    observer = _observer(0, period, n=1, time_constant_s=tau)
    mass, zero = np.eye(1), np.zeros(1)
    v = np.zeros(1)
    steps = 3000  # the rate settles over several of its spans (16 time constants)
    for step in range(steps):
        observer.observe(zero, v, mass, zero.copy(), period)
        observer.sent(zero)
        disturbance = rate * step * period  # acts over the coming period
        v = v + period * disturbance
    true_now = rate * (steps - 1) * period  # what acted over the last period observed
    gain = period / (period + tau)
    expected = rate * period * (1.0 - gain) / gain
    assert expected == pytest.approx(rate * tau)
    assert true_now - observer.disturbance[0] == pytest.approx(expected, rel=0.05)
    assert observer.lag[0] == pytest.approx(expected, rel=0.02)

    steady = _observer(0, period, n=1, time_constant_s=tau)
    v = np.zeros(1)
    for _ in range(6000):
        steady.observe(zero, v, mass, zero.copy(), period)
        steady.sent(zero)
        v = v + period * 5.0
    assert steady.disturbance[0] == pytest.approx(5.0, rel=1e-6)
    assert abs(steady.lag[0]) < 1e-6


def test_narrowing_by_the_lag_keeps_a_feasible_point_inside_the_bounds() -> None:
    """Random bounds, lags and authorities: the narrowed interval lies inside the original,
    moves only on the side the lag pushes toward, by the lag where there is room, and keeps
    a point of [-e, e] wherever the original had one (so the clamp stays feasible)."""
    rng = np.random.default_rng(11)
    rows = np.zeros((8, 5000))
    upper, lower = rng.uniform(-3, 3, 5000), rng.uniform(-3, 3, 5000)
    rows[4], rows[5] = upper, lower
    lag = rng.normal(0.0, 1.0, 5000)
    authority = rng.uniform(0.1, 2.0, 5000)
    narrow_by_lag(rows, lag, authority)
    new_upper, new_lower = rows[4], rows[5]
    assert np.all(new_upper <= upper) and np.all(new_lower >= lower)
    assert np.all(new_upper[lag <= 0] == upper[lag <= 0])
    assert np.all(new_lower[lag >= 0] == lower[lag >= 0])
    had = np.maximum(lower, -authority) <= np.minimum(upper, authority)
    keeps = np.maximum(new_lower, -authority) <= np.minimum(new_upper, authority)
    assert np.all(keeps[had])
    room = had & (upper - lag >= np.maximum(lower, -authority)) & (lag > 0)
    assert room.sum() > 500
    np.testing.assert_allclose(new_upper[room], upper[room] - lag[room])


def test_the_filter_narrows_by_the_lag_at_most_by_the_margin() -> None:
    """At a state in S with the estimate trailing a drift: the upper acceleration bound
    moves down by ``M^-1 lag`` where that is below the design's sampling margin and by the
    margin where it is above (a noisy rate must not take the whole interval); the lower
    bound stays."""
    model, certificate = demo_arm_and_certificate('planar2')
    filt = SafetyFilter(model, certificate, observer_time_constant_s=0.02)
    q = 0.5 * (np.array(model.position_lower) + np.array(model.position_upper))
    v = np.zeros(2)
    hold = Dynamics(model, filt.payload_mass).gravity_torque(q)
    filt.step(q, v, hold)
    upper, lower = filt._accel_upper.copy(), filt._accel_lower.copy()
    mass = filt.dynamics.mass_matrix(q)
    margin = np.array(certificate.sampling_margin)
    for wanted in (0.5 * margin, 3.0 * margin):
        filt.reset()
        filt._observer.lag[:] = mass @ wanted  # as if the estimate trailed by that much
        filt.step(q, v, hold)
        np.testing.assert_allclose(upper - filt._accel_upper, np.minimum(wanted, margin),
                                   rtol=1e-9, atol=1e-12)
        np.testing.assert_array_equal(filt._accel_lower, lower)
    # a lag that is not finite leaves the bounds as they are
    filt.reset()
    filt._observer.lag[:] = np.nan
    out = filt.step(q, v, hold)
    np.testing.assert_array_equal(filt._accel_upper, upper)
    np.testing.assert_array_equal(filt._accel_lower, lower)
    assert np.all(np.isfinite(out.torque))
