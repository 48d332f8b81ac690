"""The filter step's dynamics with a lookahead: where ``M`` and ``h`` are evaluated, the
velocity term, and what it buys over one hold.

References: Pinocchio (package ``pin``) for the derivative of the recursive Newton-Euler
torque with respect to the velocity (``computeRNEADerivatives``); the planar elbow arm in
closed form (Spong et al., ``certify_fixtures.PlanarTwoLink``) integrated by SciPy's
``solve_ivp`` for the motion over a hold.
"""

from __future__ import annotations

import numpy as np
import pytest
from certify_fixtures import PlanarTwoLink
from scipy.integrate import solve_ivp

from safety_filter.core.dynamics import Dynamics, hold_mass_matrix
from safety_filter.online.step_dynamics import StepDynamics
from safety_filter.simulation.demo_arms import load_demo_arm


def _limits(model) -> tuple[np.ndarray, np.ndarray]:  # noqa: ANN001
    return np.array(model.position_lower), np.array(model.position_upper)


@pytest.mark.parametrize('backend', ['numpy', 'pinocchio'])
def test_lookahead_evaluates_ahead_within_the_limits(backend: str) -> None:
    """``M`` and ``h`` at ``clip(q + c v)``, the hold's matrix plus ``c dC v/dv``; a joint
    near its limit moving toward it is evaluated at the limit, not beyond."""
    if backend == 'pinocchio':
        pytest.importorskip('pinocchio')
    model = load_demo_arm('reach7')
    dynamics = Dynamics(model, 0.5, backend=backend)
    lookahead, hold = 5e-4, 1e-3
    step = StepDynamics(dynamics, hold, lookahead, _limits(model))
    rng = np.random.default_rng(3)
    q = rng.uniform(model.position_lower, model.position_upper)
    v = rng.uniform(-2.0, 2.0, model.n_joints)
    q[2] = model.position_upper[2] - 1e-4
    v[2] = 1.0  # would be 4e-4 beyond the limit
    mass, bias = np.empty((7, 7)), np.empty(7)
    step.mass_and_bias(q, v, mass, bias)
    ahead = np.clip(q + lookahead * v, model.position_lower, model.position_upper)
    assert ahead[2] == model.position_upper[2]
    np.testing.assert_array_equal(step.evaluated, ahead)
    reference = Dynamics(model, 0.5, backend='numpy')
    expected = (hold_mass_matrix(reference.mass_matrix(ahead), model.viscous_friction, hold)
                + lookahead * 2.0 * reference.coriolis_matrix(ahead, v))
    np.testing.assert_allclose(mass, expected, rtol=1e-9, atol=1e-12)
    np.testing.assert_allclose(bias, reference.bias_torque(ahead, v), rtol=1e-9, atol=1e-12)


def test_velocity_term_matches_pinocchio_rnea_derivative() -> None:
    """``d(C v)/dv = 2 Gamma v`` from the package's own Christoffel symbols against
    Pinocchio's ``computeRNEADerivatives`` (``dtau_dv`` at zero acceleration, no friction)."""
    pin = pytest.importorskip('pinocchio')
    model = load_demo_arm('reach7')
    own = StepDynamics(Dynamics(model, 0.3, backend='numpy'))
    twin = Dynamics(model, 0.3, backend='pinocchio')
    handles = twin.pinocchio_handles
    rng = np.random.default_rng(5)
    for _ in range(5):
        q = rng.uniform(model.position_lower, model.position_upper)
        v = rng.uniform(-2.0, 2.0, model.n_joints)
        pin.computeRNEADerivatives(handles[1], handles[2], q, v, np.zeros(model.n_joints))
        np.testing.assert_allclose(own.coriolis_jacobian(q, v), handles[2].dtau_dv,
                                   rtol=1e-8, atol=1e-10)


def test_lookahead_plans_the_hold_to_second_order() -> None:
    """planar2 moving fast, a torque held for one period, the accelerations as means over
    it (the damping's exact response, ``hold_mass_matrix``). Planned for the mean
    acceleration ``a`` with ``M`` and ``h`` at the state, the velocity change over the hold
    misses ``a T`` by a first-order drift (halving the hold halves it); with the lookahead of
    half the hold (``M`` and ``h`` at ``q + T/2 v``, plus ``T/2 dC v/dv``) by a second-order
    one: at least a hundred times less at 1 ms (measured 4.0e-5 against 5.0e-2 rad/s^2),
    and a fourth when the hold halves."""
    model = load_demo_arm('planar2')
    payload = 0.5 * (model.payload.mass_min + model.payload.mass_max)
    plant = PlanarTwoLink(payload)
    dynamics = Dynamics(model, payload)
    q0, v0, a = np.array([0.3, 1.1]), np.array([2.5, -3.0]), np.array([4.0, -6.0])
    misses = {}
    for hold in (1e-3, 5e-4):
        for lookahead in (0.0, 0.5 * hold):
            step = StepDynamics(dynamics, hold, lookahead or None, _limits(model))
            mass, bias = np.empty((2, 2)), np.empty(2)
            step.mass_and_bias(q0, v0, mass, bias)
            torque = mass @ a + bias
            end = solve_ivp(plant.state_derivative(torque), (0.0, hold), np.r_[q0, v0],
                            rtol=1e-12, atol=1e-14).y[:, -1]
            misses[hold, lookahead > 0.0] = np.max(np.abs((end[2:] - v0) / hold - a))
    assert misses[1e-3, True] < misses[1e-3, False] / 100.0, misses
    assert 3.0 < misses[1e-3, True] / misses[5e-4, True] < 5.0, misses
    assert 1.5 < misses[1e-3, False] / misses[5e-4, False] < 2.5, misses


def test_lookahead_needs_the_limits() -> None:
    model = load_demo_arm('planar2')
    with pytest.raises(ValueError, match='position limits'):
        StepDynamics(Dynamics(model, 0.0), None, 5e-4, None)
