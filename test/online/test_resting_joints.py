"""Joints at rest in the filter step (safety_filter.online.resting_joints).

References: Coulomb's law of dry friction (a body at rest stays while the applied force is
within the friction level, and slides against a force f_c otherwise: textbook mechanics,
e.g. any statics text; common practice) for one joint; for coupled joints, the stick-slip
accelerations are the minimiser of the convex problem
``min 1/2 a^T M a - b^T a + sum_rest f_c |a_i|`` (its optimality conditions are the law),
solved here by cvxpy as the outside reference.
"""

from __future__ import annotations

import numpy as np
import pytest

from safety_filter.online.resting_joints import RestingJoints


def _random_mass(rng: np.random.Generator, n: int) -> np.ndarray:
    root = rng.normal(size=(n, n))
    return root @ root.T + n * np.eye(n)


def _stick_slip_reference(mass: np.ndarray, force: np.ndarray, coulomb: np.ndarray,
                          at_rest: np.ndarray) -> np.ndarray:
    cvxpy = pytest.importorskip('cvxpy')
    a = cvxpy.Variable(len(force))
    friction = cvxpy.sum(cvxpy.multiply(coulomb * at_rest, cvxpy.abs(a)))
    problem = cvxpy.Problem(cvxpy.Minimize(0.5 * cvxpy.quad_form(a, mass) - force @ a
                                           + friction))
    problem.solve()
    return np.asarray(a.value)


def test_one_joint_at_rest_follows_coulombs_law() -> None:
    resting = RestingJoints(np.array([2.0]), deadband=np.array([1e-9]))
    assert resting.observe(np.array([0.0]))
    inertia = np.array([[0.5]])
    # 1.5 N m against 2 N m of friction: it stays; 3 N m: it slides with 1 N m net.
    assert resting.predicted(inertia, np.array([1.5 / 0.5]))[0] == 0.0
    assert resting.predicted(inertia, np.array([3.0 / 0.5]))[0] == pytest.approx(1.0 / 0.5)
    assert resting.predicted(inertia, np.array([-3.0 / 0.5]))[0] == pytest.approx(-2.0)


def test_a_moving_joint_is_left_to_the_model() -> None:
    resting = RestingJoints(np.array([2.0, 1.0]), deadband=np.array([1e-9, 1e-9]))
    assert not resting.observe(np.array([0.1, -1e-12]))
    planned = np.array([0.3, -0.2])
    assert resting.predicted(np.eye(2), planned) is planned
    torque = np.array([1.0, 2.0])
    resting.add_breakaway(torque, planned)
    np.testing.assert_array_equal(torque, [1.0, 2.0])
    np.testing.assert_array_equal(resting.breakaway, 0.0)


def test_without_coulomb_friction_nothing_changes() -> None:
    resting = RestingJoints(np.zeros(3), deadband=np.full(3, 1e-9))
    assert not resting.active
    assert not resting.observe(np.zeros(3))


@pytest.mark.parametrize('seed', range(6))
def test_the_predicted_accelerations_are_the_stick_slip_minimiser(seed: int) -> None:
    rng = np.random.default_rng(seed)
    n = 5
    mass = _random_mass(rng, n)
    coulomb = rng.uniform(0.5, 3.0, n)
    v = np.where(rng.random(n) < 0.6, 0.0, rng.normal(size=n))
    force = rng.normal(scale=4.0, size=n)
    resting = RestingJoints(coulomb, deadband=np.full(n, 1e-9))
    resting.observe(v)
    predicted = resting.predicted(mass, np.linalg.solve(mass, force))
    reference = _stick_slip_reference(mass, force, coulomb, (v == 0.0).astype(float))
    np.testing.assert_allclose(predicted, reference, atol=1e-4)


@pytest.mark.parametrize('seed', range(6))
def test_the_breakaway_torque_makes_the_arm_do_the_plan(seed: int) -> None:
    """Whatever the plan asks of the joints at rest, the torque with the breakaway added is
    one under which the stick-slip law gives back the plan (joints it does not start stay)."""
    rng = np.random.default_rng(100 + seed)
    n = 5
    mass = _random_mass(rng, n)
    coulomb = rng.uniform(0.5, 3.0, n)
    v = np.where(rng.random(n) < 0.6, 0.0, rng.normal(size=n))
    deadband = np.full(n, 1e-3)
    plan = rng.normal(size=n)
    plan[rng.random(n) < 0.3] = 0.0  # some resting joints are asked to stay
    resting = RestingJoints(coulomb, deadband=deadband)
    resting.observe(v)
    torque = mass @ plan  # the model's torque for the plan (bias left out: it cancels)
    resting.add_breakaway(torque, plan)
    at_rest = v == 0.0
    np.testing.assert_array_equal(resting.breakaway[~at_rest], 0.0)
    reference = _stick_slip_reference(mass, torque, coulomb, at_rest.astype(float))
    np.testing.assert_allclose(reference, plan, atol=1e-4)
