"""The simulated arm: its RK4 against SciPy's solve_ivp, driver-like saturation, violations.

References: ``scipy.integrate.solve_ivp`` (DOP853, rtol 1e-10) on the same equations of
motion; for planar2 the right-hand side is the textbook closed form of the two-link arm
(``certify_fixtures.PlanarTwoLink``, Spong et al.), which shares no code with the package;
for bench6 it is the package's own ``Dynamics`` (so that case checks the integrator only).
"""

from __future__ import annotations

import numpy as np
import pytest
from certify_fixtures import PlanarTwoLink
from scipy.integrate import solve_ivp

from safety_filter.core.dynamics import Dynamics
from safety_filter.simulation.demo_arms import load_demo_arm
from safety_filter.simulation.plant import ArmSimulator, limit_violations

DURATION_S = 0.5


def _reference_rhs(name: str, payload: float, torque: np.ndarray):  # noqa: ANN202
    if name == 'planar2':
        return PlanarTwoLink(payload).state_derivative(torque)
    dynamics = Dynamics(load_demo_arm(name), payload)
    n = dynamics.n

    def rhs(_t: float, x: np.ndarray) -> np.ndarray:
        return np.concatenate([x[n:], dynamics.forward_dynamics(x[:n], x[n:], torque)])
    return rhs


@pytest.mark.parametrize('name', ['planar2', 'bench6'])
def test_rk4_matches_solve_ivp_under_constant_torque(name: str) -> None:
    model = load_demo_arm(name)
    payload = model.payload.mass_max
    n = model.n_joints
    rng = np.random.default_rng(3)
    mid = 0.5 * (model.position_lower + model.position_upper)
    q0 = mid + 0.3 * model.position_range * rng.uniform(-1, 1, n)
    v0 = 0.3 * model.velocity_limit * rng.uniform(-1, 1, n)
    # Gravity at the start plus a fifth of the effort limits: the arm moves by tenths of a
    # radian and the torque stays inside the box (no saturation in this test).
    torque = Dynamics(model, payload).gravity_torque(q0) + 0.2 * model.effort_limit * \
        rng.uniform(-1, 1, n)
    torque = np.clip(torque, -model.effort_limit, model.effort_limit)
    simulator = ArmSimulator(model, payload_mass=payload)
    simulator.reset(q0, v0)
    times = np.linspace(0.0, DURATION_S, 11)
    states = [np.concatenate([q0, v0])]
    for start, end in zip(times[:-1], times[1:]):
        simulator.advance(torque, end - start)
        states.append(np.concatenate([simulator.q, simulator.v]))
    reference = solve_ivp(_reference_rhs(name, payload, torque), (0.0, DURATION_S),
                          np.concatenate([q0, v0]), method='DOP853', rtol=1e-10, atol=1e-12,
                          t_eval=times)
    assert reference.success, reference.message
    moved = np.max(np.abs(reference.y[:n, -1] - q0))
    assert moved > 0.05, f'the test motion is too small to tell anything ({moved:.3g} rad)'
    error = np.max(np.abs(np.array(states) - reference.y.T))
    assert error < 1e-6, f'{name}: RK4 vs DOP853 differ by {error:.3g}'
    assert simulator.time_s == pytest.approx(DURATION_S)


@pytest.mark.parametrize('name', ['planar2', 'bench6'])
def test_torque_is_saturated_like_a_driver(name: str) -> None:
    model = load_demo_arm(name)
    n = model.n_joints
    signs = np.where(np.arange(n) % 2 == 0, 1.0, -1.0)
    umax = np.array(model.effort_limit)
    at_limit, beyond, inside = (ArmSimulator(model, internal_rate_hz=2000.0) for _ in range(3))
    q0 = 0.5 * (model.position_lower + model.position_upper)
    for simulator in (at_limit, beyond, inside):
        simulator.reset(q0)
    at_limit.advance(signs * umax, 0.2)
    beyond.advance(10.0 * signs * umax, 0.2)
    inside.advance(0.5 * signs * umax, 0.2)
    np.testing.assert_array_equal(beyond.q, at_limit.q)
    np.testing.assert_array_equal(beyond.v, at_limit.v)
    assert np.max(np.abs(inside.q - at_limit.q)) > 1e-3  # saturation is not a no-op


def test_saturation_is_per_joint() -> None:
    model = load_demo_arm('planar2')
    umax = np.array(model.effort_limit)
    mixed, clipped = (ArmSimulator(model, internal_rate_hz=2000.0) for _ in range(2))
    # shoulder 10x beyond its limit, elbow inside: only the shoulder is clipped.
    mixed.advance(np.array([10.0 * umax[0], 0.3 * umax[1]]), 0.1)
    clipped.advance(np.array([umax[0], 0.3 * umax[1]]), 0.1)
    np.testing.assert_array_equal(mixed.q, clipped.q)
    np.testing.assert_array_equal(mixed.v, clipped.v)


def test_limit_violations_on_hand_made_arrays() -> None:
    model = load_demo_arm('planar2')  # shoulder [-2.6, 2.6], 3 rad/s, 40 N m; elbow 2.4, 3.5, 20
    q = np.array([[0.0, 0.0], [2.7, -2.3], [-2.65, -2.45], [2.6, 2.4]])
    v = np.array([[0.0, 0.0], [-3.25, 3.5], [2.0, -3.6], [3.0, 0.0]])
    u = np.array([[0.0, 0.0], [40.0, -21.0], [-45.0, 20.0], [39.0, 19.0]])
    found = limit_violations(model, q, v, u)
    np.testing.assert_allclose(found['position'], [0.1, 0.05], atol=1e-12)
    np.testing.assert_allclose(found['velocity'], [0.25, 0.1], atol=1e-12)
    np.testing.assert_allclose(found['torque'], [5.0, 1.0], atol=1e-12)
    kept = limit_violations(model, q[[0, 3]], v[[0, 3]], u[[0, 3]])
    for what in ('position', 'velocity', 'torque'):
        np.testing.assert_array_equal(kept[what], [0.0, 0.0])  # exactly at a limit is kept
