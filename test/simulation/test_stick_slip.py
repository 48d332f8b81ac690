"""Coulomb friction in the simulator as the stick-slip law (``ArmSimulator(coulomb_law=...)``).

References, named beside each check:

* **Closed forms** of one rigid body turning about a fixed vertical axis (no gravity torque)
  under a constant torque ``u``, Coulomb friction of level ``f_c`` (static level equal to
  the sliding one) and optionally viscous damping ``D``: the textbook kinetics of a body on
  a rough surface (Coulomb's law of dry friction with Newton's second law, the block on a
  rough plane of any undergraduate dynamics text), here in rotation:

  - at rest with ``|u| <= f_c`` it stays at rest;
  - at rest with ``|u| > f_c`` it accelerates at ``(u - f_c sign u) / I``;
  - coasting from ``v0`` under friction alone it stops at ``t* = I |v0| / f_c``, after
    ``I v0^2 / (2 f_c)``, and stays stopped;
  - with damping too (a linear first-order equation between the stops),
    ``v(t) = (v0 + f_c/D) exp(-D t / I) - f_c/D`` for ``v0 > 0`` until
    ``t* = (I/D) ln(1 + D v0 / f_c)``, and ``q(t) = (I/D)(v0 + f_c/D)(1 - exp(-D t/I))
    - f_c t / D``.

* **SciPy's stiff solver** (``solve_ivp``, Radau, rtol 1e-10) on the two-link planar arm in
  closed form (``certify_fixtures.PlanarTwoLink``, Spong et al.; it shares no code with the
  package) with the regularised law ``f_c clip(v / v_s, -1, 1)``: the regularised solution
  approaches the stick-slip one as ``v_s`` shrinks, in proportion to ``v_s``, so the
  regularisation does not matter and the stick-slip simulation is its limit.

* **SciPy's optimiser** (``minimize``, L-BFGS-B) on the convex problem whose optimality
  condition is the coupled rest problem that :func:`rest_accelerations` solves.
"""

from __future__ import annotations

import numpy as np
import pytest
from certify_fixtures import PlanarTwoLink
from scipy.integrate import solve_ivp
from scipy.optimize import minimize

from safety_filter.core.friction import rest_accelerations
from safety_filter.core.model_uncertainty import model_with_inertials
from safety_filter.core.robot_model import RobotModel
from safety_filter.errors import InvalidValue, SafetyFilterError
from safety_filter.simulation.demo_arms import load_demo_arm
from safety_filter.simulation.plant import ArmSimulator
from safety_filter.simulation.sim_driver import SimulatedDriver

INERTIA = 0.0021  # [kg m^2] about the joint axis
COULOMB = 0.8  # [N m]
RATE_HZ = 10_000.0  # the simulator's default internal rate


def _one_joint(damping: float = 0.0, coulomb: float = COULOMB) -> RobotModel:
    """A disc turning about a vertical axis: inertia INERTIA about it, no gravity torque."""
    return RobotModel.from_urdf(f"""<robot name="disc1"><link name="base"/>
      <joint name="spin" type="revolute"><parent link="base"/><child link="disc"/>
        <axis xyz="0 0 1"/><limit lower="-100" upper="100" velocity="50" effort="10"/>
        <dynamics damping="{damping}" friction="{coulomb}"/></joint>
      <link name="disc"><inertial><mass value="1.0"/>
        <inertia ixx="0.01" iyy="0.01" izz="{INERTIA}" ixy="0" ixz="0" iyz="0"/>
      </inertial></link></robot>""")


def _trajectory(simulator: ArmSimulator, torque: float, times: np.ndarray
                ) -> tuple[np.ndarray, np.ndarray]:
    """Positions and velocities of a one-joint simulator at ``times`` (from its clock)."""
    qs, vs = [simulator.q[0]], [simulator.v[0]]
    for start, end in zip(times[:-1], times[1:]):
        simulator.advance(np.array([torque]), end - start)
        qs.append(simulator.q[0])
        vs.append(simulator.v[0])
    return np.array(qs), np.array(vs)


@pytest.mark.parametrize('damping', [0.0, 0.5])
@pytest.mark.parametrize('torque', [0.0, 0.5 * COULOMB, -0.999 * COULOMB, COULOMB])
def test_joint_at_rest_sticks_below_the_coulomb_level(torque: float, damping: float) -> None:
    """Closed form (module docstring): at rest with |u| <= f_c it stays at rest, exactly."""
    simulator = ArmSimulator(_one_joint(damping), internal_rate_hz=RATE_HZ)
    simulator.reset(np.array([0.25]))
    q, v = _trajectory(simulator, torque, np.linspace(0.0, 0.2, 21))
    assert np.all(q == 0.25) and np.all(v == 0.0)
    assert simulator.stops == 0


@pytest.mark.parametrize('torque', [1.5 * COULOMB, -3.0 * COULOMB])
def test_joint_breaks_away_above_the_coulomb_level(torque: float) -> None:
    """Closed form: above f_c it accelerates at (u - f_c sign u) / I from rest."""
    simulator = ArmSimulator(_one_joint(), internal_rate_hz=RATE_HZ)
    simulator.reset(np.zeros(1))
    times = np.linspace(0.0, 0.1, 41)
    q, v = _trajectory(simulator, torque, times)
    accel = (torque - COULOMB * np.sign(torque)) / INERTIA
    np.testing.assert_allclose(v, accel * times, rtol=1e-9, atol=1e-12)
    np.testing.assert_allclose(q, 0.5 * accel * times ** 2, rtol=1e-9, atol=1e-12)


@pytest.mark.parametrize('v0', [2.3, -2.3])
def test_coasting_joint_stops_at_the_closed_form_time_and_stays(v0: float) -> None:
    """Closed form: stops at t* = I |v0| / f_c (here 6.04 ms, between internal steps) after
    I v0^2 / (2 f_c), and stays stopped."""
    simulator = ArmSimulator(_one_joint(), internal_rate_hz=RATE_HZ)
    simulator.reset(np.zeros(1), np.array([v0]))
    times = np.linspace(0.0, 0.05, 201)  # every 0.25 ms
    q, v = _trajectory(simulator, 0.0, times)
    stop = INERTIA * abs(v0) / COULOMB
    moving = np.minimum(times, stop)
    expected_v = np.sign(v0) * np.maximum(abs(v0) - COULOMB * times / INERTIA, 0.0)
    expected_q = np.sign(v0) * (abs(v0) * moving - 0.5 * COULOMB * moving ** 2 / INERTIA)
    np.testing.assert_allclose(v, expected_v, rtol=0.0, atol=1e-9)
    np.testing.assert_allclose(q, expected_q, rtol=0.0, atol=1e-12)
    after = times > stop
    assert np.all(v[after] == 0.0) and np.all(q[after] == q[after][0])
    assert q[-1] == pytest.approx(np.sign(v0) * INERTIA * v0 ** 2 / (2.0 * COULOMB), abs=1e-12)
    assert simulator.stops == 1


def test_coasting_joint_with_damping_matches_the_closed_form() -> None:
    """Closed form with viscous damping D (module docstring): the stop time
    t* = (I/D) ln(1 + D v0 / f_c) = 3.74 ms and the distance to it."""
    damping, v0 = 0.5, 2.3
    simulator = ArmSimulator(_one_joint(damping), internal_rate_hz=RATE_HZ)
    simulator.reset(np.zeros(1), np.array([v0]))
    times = np.linspace(0.0, 0.02, 81)
    q, v = _trajectory(simulator, 0.0, times)
    tau, level = INERTIA / damping, COULOMB / damping
    stop = tau * np.log(1.0 + v0 / level)
    moving = np.minimum(times, stop)
    expected_v = np.where(times < stop, (v0 + level) * np.exp(-times / tau) - level, 0.0)
    expected_q = tau * (v0 + level) * (1.0 - np.exp(-moving / tau)) - level * moving
    # RK4's own truncation error at dt / tau = 0.024 is about 1e-8 rad/s here.
    np.testing.assert_allclose(v, expected_v, rtol=0.0, atol=1e-7)
    np.testing.assert_allclose(q, expected_q, rtol=0.0, atol=1e-9)
    assert np.all(v[times > stop] == 0.0)
    assert simulator.stops == 1


def test_sign_law_does_not_stay_stopped() -> None:
    """Why the stick-slip law: with f_c sign(v) at every RK4 stage, the coasting joint of
    the closed form above does not stay at rest after t* (it creeps or chatters)."""
    simulator = ArmSimulator(_one_joint(), internal_rate_hz=RATE_HZ, coulomb_law='sign')
    simulator.reset(np.zeros(1), np.array([2.3]))
    times = np.linspace(0.0, 0.05, 201)
    q, v = _trajectory(simulator, 0.0, times)
    stop = INERTIA * 2.3 / COULOMB
    after = times > stop + 1e-3
    print(f'\nsign law after the stop: |v| up to {np.abs(v[after]).max():.3g} rad/s, '
          f'q moved {np.ptp(q[after]):.3g} rad')
    assert np.abs(v[after]).max() > 1e-3 or np.ptp(q[after]) > 1e-4


def test_arms_without_coulomb_friction_integrate_alike_under_both_laws() -> None:
    """planar2 has no Coulomb friction: both laws give the same trajectory, bit for bit."""
    model = load_demo_arm('planar2')
    runs = []
    for law in ('stick_slip', 'sign'):
        simulator = ArmSimulator(model, internal_rate_hz=2000.0, coulomb_law=law)
        simulator.reset(np.array([0.3, -0.4]), np.array([0.5, -1.0]))
        simulator.advance(np.array([5.0, -2.0]), 0.05)
        runs.append(np.concatenate([simulator.q, simulator.v]))
    np.testing.assert_array_equal(runs[0], runs[1])


def test_unknown_coulomb_law_is_refused() -> None:
    model = load_demo_arm('planar2')
    with pytest.raises(InvalidValue, match='coulomb_law'):
        ArmSimulator(model, coulomb_law='smooth')
    with pytest.raises(SafetyFilterError, match='coulomb_law'):
        SimulatedDriver(model, 1000.0, coulomb_law='smooth')


# ---------------------------------------------------------------------- coupled joints
def _convex_reference(mass: np.ndarray, force: np.ndarray, coulomb: np.ndarray,
                      at_rest: np.ndarray) -> np.ndarray:
    """argmin 1/2 a^T M a - b^T a + sum_rest f_c |a_i| with SciPy (L-BFGS-B), the rest
    joints' accelerations split into positive and negative parts to keep it smooth."""
    n = len(force)
    rest = np.flatnonzero(at_rest)

    def unpack(x: np.ndarray) -> np.ndarray:
        a = x[:n].copy()
        a[rest] = x[n:n + len(rest)] - x[n + len(rest):]
        return a

    def objective(x: np.ndarray) -> tuple[float, np.ndarray]:
        a = unpack(x)
        grad_a = mass @ a - force
        value = 0.5 * a @ mass @ a - force @ a + coulomb[rest] @ (x[n:n + len(rest)]
                                                                 + x[n + len(rest):])
        grad = np.concatenate([np.where(at_rest, 0.0, grad_a),
                               grad_a[rest] + coulomb[rest], -grad_a[rest] + coulomb[rest]])
        return value, grad

    bounds = [(None, None)] * n + [(0.0, None)] * (2 * len(rest))
    found = minimize(objective, np.zeros(n + 2 * len(rest)), jac=True, method='L-BFGS-B',
                     bounds=bounds, options={'ftol': 1e-15, 'gtol': 1e-12, 'maxiter': 10_000})
    return unpack(found.x)


def test_rest_accelerations_solve_the_coupled_friction_problem() -> None:
    """Random coupled instances (mass matrices of a spread of conditioning, about half the
    joints at rest, friction levels around the torques): the active set gives SciPy's
    minimiser of the convex problem (docstring of :func:`rest_accelerations`), and meets
    the friction law itself (each joint at rest sticks within f_c or slips with f_c against
    its motion)."""
    rng = np.random.default_rng(12)
    sticking = slipping = 0
    for _ in range(40):
        n = int(rng.integers(2, 7))
        basis = rng.normal(size=(n, n))
        mass = (basis @ basis.T * 10.0 ** rng.uniform(-3, 0)
                + np.diag(10.0 ** rng.uniform(-4, 0, n)))
        force = rng.normal(size=n)
        coulomb = np.abs(force) * rng.uniform(0.3, 3.0, n) + 0.05
        at_rest = rng.random(n) < 0.6
        a, direction = rest_accelerations(mass, force, coulomb, at_rest)
        reference = _convex_reference(mass, force, coulomb, at_rest)
        scale = np.abs(np.linalg.solve(mass, force)).max() + 1.0
        np.testing.assert_allclose(a, reference, rtol=0.0, atol=1e-6 * scale)
        friction = force - mass @ a  # what the rest joints' friction supplies
        assert np.all(np.abs(friction[~at_rest]) <= 1e-9 * (1.0 + np.abs(force).max()))
        for i in np.flatnonzero(at_rest):
            if direction[i] == 0.0:
                sticking += 1
                assert a[i] == 0.0 and abs(friction[i]) <= coulomb[i] * (1.0 + 1e-9)
            else:
                slipping += 1
                assert np.sign(a[i]) == direction[i]
                assert friction[i] == pytest.approx(coulomb[i] * direction[i], rel=1e-9)
    assert sticking > 10 and slipping > 10  # both cases were exercised


@pytest.mark.parametrize('smoothing', [1e-3, 1e-4])
def test_stick_slip_is_the_limit_of_the_regularised_law(smoothing: float) -> None:
    """planar2 turned so that gravity acts along its joint axes (no gravity torque), with
    Coulomb friction 3 and 1.5 N m: a torque pulse of 0.1 s, then nothing; the shoulder
    stops first and must stick while the elbow still swings (a coupled rest problem), then
    the elbow stops. Against SciPy's Radau on the closed-form arm with the regularised law
    at smoothing velocity v_s: positions agree within 0.2 v_s [rad] and velocities within
    1.2 v_s [rad/s] at every 10 ms (measured: 0.149 v_s and 0.875 v_s at both levels, and
    the same ratios at v_s = 1e-2: the gap shrinks in proportion to v_s, so the
    regularisation does not matter and the stick-slip law is its limit)."""
    coulomb = np.array([3.0, 1.5])
    model = model_with_inertials(load_demo_arm('planar2'), coulomb_friction=coulomb,
                                 gravity=np.array([0.0, 9.81, 0.0]))
    plant = PlanarTwoLink(0.0, gravity=0.0)
    q0, pulse, pulse_end, end = np.array([0.3, -0.5]), np.array([12.0, -6.0]), 0.1, 0.7
    times = np.linspace(0.0, end, 71)
    simulator = ArmSimulator(model, internal_rate_hz=RATE_HZ)
    simulator.reset(q0)
    states = [np.zeros(4)]
    states[0][:2] = q0
    for start, finish in zip(times[:-1], times[1:]):
        simulator.advance(pulse if start < pulse_end - 1e-12 else np.zeros(2), finish - start)
        states.append(np.concatenate([simulator.q, simulator.v]))
    switch = np.array(states)
    assert np.all(switch[-1, 2:] == 0.0)  # both joints came to rest and stuck
    assert simulator.stops >= 2

    def rhs(torque: np.ndarray):  # noqa: ANN202
        def derivative(_t: float, x: np.ndarray) -> np.ndarray:
            friction = coulomb * np.clip(x[2:] / smoothing, -1.0, 1.0)
            return np.concatenate([x[2:], plant.acceleration(x[:2], x[2:], torque - friction)])
        return derivative

    first = solve_ivp(rhs(pulse), (0.0, pulse_end), np.concatenate([q0, np.zeros(2)]),
                      method='Radau', rtol=1e-10, atol=1e-12, t_eval=times[times <= pulse_end])
    second = solve_ivp(rhs(np.zeros(2)), (pulse_end, end), first.y[:, -1], method='Radau',
                       rtol=1e-10, atol=1e-12, t_eval=times[times > pulse_end])
    assert first.success and second.success
    reference = np.vstack([first.y.T, second.y.T])
    position_gap = np.abs(reference[:, :2] - switch[:, :2]).max()
    velocity_gap = np.abs(reference[:, 2:] - switch[:, 2:]).max()
    print(f'\nv_s {smoothing:g}: positions within {position_gap:.3g} rad '
          f'({position_gap / smoothing:.3g} v_s), velocities within {velocity_gap:.3g} rad/s '
          f'({velocity_gap / smoothing:.3g} v_s)')
    assert np.ptp(switch[:, 0]) > 0.3 and np.ptp(switch[:, 1]) > 1.0  # it did move
    assert position_gap <= 0.2 * smoothing
    assert velocity_gap <= 1.2 * smoothing
