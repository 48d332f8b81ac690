"""The filter QP (safety_filter.online.qp_solver) against an independent solver.

Outside source for the answers: the same QP written in *torque* variables (``u`` directly,
the acceleration bounds through ``M^-1`` from numpy's ``inv``) and solved by Clarabel, an
interior-point solver, through CVXPY (METHOD 6: "a second, independent solver as reference
for the QP"). Our code solves the acceleration form with OSQP (ADMM with polishing) after
its own scaling, so the two share no formulation code.
"""

from __future__ import annotations

import numpy as np
import pytest
from filter_fixtures import demo_arm_and_certificate, random_nominal, random_state_in_safe_set

from safety_filter.errors import SafetyFilterError
from safety_filter.online.barrier_filter import FilterMode, SafetyFilter
from safety_filter.online.qp_solver import (
    ACCURATE_EPS,
    DEFAULT_EPS,
    STATUS_SOLVED,
    STATUS_SOLVED_INACCURATE,
    AccelerationQP,
    QPResult,
    check_acceleration,
)

cp = pytest.importorskip('cvxpy', reason='reference solver missing: pip install cvxpy clarabel')
if 'CLARABEL' not in cp.installed_solvers():
    pytest.skip('Clarabel missing: pip install clarabel', allow_module_level=True)

ARMS = ('planar2', 'bench6', 'reach7')
STATES_PER_ARM = 40
AGREEMENT = 1e-6  # max |u - u_ref| / umax


def solve_tightly(problem: cp.Problem) -> None:
    """Solve with Clarabel at tolerances far below the agreement checked; must be optimal."""
    problem.solve(solver=cp.CLARABEL, tol_gap_abs=1e-12, tol_gap_rel=1e-12, tol_feas=1e-12,
                  tol_ktratio=1e-10, max_iter=500)
    assert problem.status == cp.OPTIMAL, problem.status


class TorqueFormReference:
    """``min (u - u_nom)^T W (u - u_nom)  s.t.  |u| <= umax, An <= M^-1 (u - h) <= Ap``
    in CVXPY (parameters, so the problem is compiled once), solved by Clarabel."""

    def __init__(self, n: int, umax: np.ndarray, weights: np.ndarray | None = None) -> None:
        weights = np.ones(n) if weights is None else np.asarray(weights, dtype=float)
        self.u = cp.Variable(n)
        self.inverse = cp.Parameter((n, n))
        self.offset = cp.Parameter(n)
        self.lower = cp.Parameter(n)
        self.upper = cp.Parameter(n)
        self.nominal = cp.Parameter(n)
        acceleration = self.inverse @ self.u - self.offset
        cost = cp.sum(cp.multiply(weights, cp.square(self.u - self.nominal)))
        self.problem = cp.Problem(cp.Minimize(cost), [
            self.u <= umax, self.u >= -umax,
            acceleration <= self.upper, acceleration >= self.lower])

    def solve(self, mass: np.ndarray, bias: np.ndarray, nominal: np.ndarray,
              lower: np.ndarray, upper: np.ndarray) -> np.ndarray:
        inverse = np.linalg.inv(mass)
        self.inverse.value = inverse
        self.offset.value = inverse @ bias
        self.lower.value = lower
        self.upper.value = upper
        self.nominal.value = nominal
        solve_tightly(self.problem)
        return np.array(self.u.value)


class AccelerationFormReference:
    """``min sum_j w_j (a_j - a_nom_j)^2  s.t.  An <= a <= Ap, |M a + h| <= umax`` with
    ``a_nom = M^-1 (u_nom - h)`` (numpy's solve), written in CVXPY in the acceleration (the
    torque form of this objective needs M^-1 twice and is badly scaled for Clarabel on light
    wrists) and solved by Clarabel: the filter's default objective. Returns the torque."""

    def __init__(self, n: int, umax: np.ndarray, weights: np.ndarray) -> None:
        root = np.sqrt(np.asarray(weights, dtype=float) / np.max(weights))
        self.a = cp.Variable(n)
        self.mass = cp.Parameter((n, n))
        self.bias = cp.Parameter(n)
        self.target = cp.Parameter(n)
        self.lower = cp.Parameter(n)
        self.upper = cp.Parameter(n)
        torque = self.mass @ self.a + self.bias
        cost = cp.sum_squares(cp.multiply(root, self.a - self.target))
        self.problem = cp.Problem(cp.Minimize(cost), [
            torque <= umax, torque >= -umax, self.a <= self.upper, self.a >= self.lower])

    def solve(self, mass: np.ndarray, bias: np.ndarray, nominal: np.ndarray,
              lower: np.ndarray, upper: np.ndarray) -> np.ndarray:
        self.mass.value = mass
        self.bias.value = bias
        self.target.value = np.linalg.solve(mass, nominal - bias)
        self.lower.value = lower
        self.upper.value = upper
        solve_tightly(self.problem)
        return mass @ np.array(self.a.value) + bias


# The filters here step through unrelated random states, which the disturbance observer
# would read as model error: it is off (test_observer.py covers it).

def state_data(filt: SafetyFilter, q: np.ndarray, v: np.ndarray
               ) -> tuple[np.ndarray, np.ndarray, np.ndarray, np.ndarray]:
    """``M, h`` from the public Dynamics API and ``An, Ap`` from evaluate_barriers."""
    mass, bias = filt.dynamics.mass_and_bias(q, v)
    bounds = filt.constraint_bounds(q, v)
    return mass, bias, np.array(bounds.accel_lower), np.array(bounds.accel_upper)


@pytest.mark.parametrize(('arm', 'eps'), [(arm, DEFAULT_EPS) for arm in ARMS]
                         + [('reach7', 0.3)])
def test_qp_matches_reference_solver(arm: str, eps: float) -> None:
    """OSQP's answer equals Clarabel's (torque form) to 1e-6 of the torque limit, on random
    states in S with nominals inside, 5x and 1000x outside the box. With a first-attempt
    tolerance so loose (0.3) that polishing often fails, the retry at ACCURATE_EPS must
    still give the reference's answers."""
    model, certificate = demo_arm_and_certificate(arm)
    filt = SafetyFilter(model, certificate, observer_time_constant_s=0.0)
    qp = AccelerationQP(filt.torque_limit, eps=eps)
    polish_failures = 0
    reference = TorqueFormReference(filt.n, filt.torque_limit)
    rng = np.random.default_rng(11)
    worst = 0.0
    for _ in range(STATES_PER_ARM):
        q, v = random_state_in_safe_set(rng, certificate)
        nominal = random_nominal(rng, certificate)
        mass, bias, lower, upper = state_data(filt, q, v)
        qp._retry = False  # the first attempt alone, to count its polishing failures
        qp.solve(mass, bias, nominal, lower, upper)
        polish_failures += qp._inner.info.status_polish != 1
        qp._retry = eps > ACCURATE_EPS
        qp.reset_warm_start()
        result = qp.solve(mass, bias, nominal, lower, upper)
        assert result.solved, result
        torque = mass @ result.acceleration + bias
        expected = reference.solve(mass, bias, nominal, lower, upper)
        worst = max(worst, float(np.max(np.abs(torque - expected) / filt.torque_limit)))
    assert worst <= AGREEMENT, f'{arm}: worst relative torque difference {worst:.2e}'
    if eps > 0.1:
        assert polish_failures >= 5, 'the retry path was not exercised'
    assert qp._inner.get_settings().eps_abs == eps  # the first-attempt tolerance is back


@pytest.mark.parametrize('arm', ARMS)
def test_filter_step_matches_reference_solver(arm: str) -> None:
    """Through SafetyFilter.step (warm-started sequence): every step inside S is 'filtered'
    and its torque equals Clarabel's answer to 1e-6 of the torque limit."""
    model, certificate = demo_arm_and_certificate(arm)
    filt = SafetyFilter(model, certificate, observer_time_constant_s=0.0)
    assert filt.objective == 'acceleration'
    reference = AccelerationFormReference(filt.n, filt.torque_limit,
                                          1.0 / filt.usable_authority ** 2)
    rng = np.random.default_rng(12)
    for _ in range(STATES_PER_ARM):
        q, v = random_state_in_safe_set(rng, certificate)
        nominal = random_nominal(rng, certificate)
        out = filt.step(q, v, nominal)
        assert out.mode is FilterMode.FILTERED, (out.mode, out.reason)
        mass, bias, lower, upper = state_data(filt, q, v)
        expected = reference.solve(mass, bias, nominal, lower, upper)
        error = np.max(np.abs(out.torque - expected) / filt.torque_limit)
        assert error <= AGREEMENT, (arm, error, out.solver_status)
        assert out.intervention == pytest.approx(np.linalg.norm(expected - nominal),
                                                 rel=1e-6, abs=1e-6 * filt.torque_limit.max())


@pytest.mark.parametrize('arm', ARMS)
def test_acceleration_objective_matches_reference_solver(arm: str) -> None:
    """The acceleration objective (weights 1/e^2) against Clarabel, and its point: where
    the torque box does not bind, each joint's acceleration is its nominal one clamped to
    [An, Ap] (the other joints keep theirs)."""
    model, certificate = demo_arm_and_certificate(arm)
    filt = SafetyFilter(model, certificate, observer_time_constant_s=0.0)
    weights = 1.0 / filt.usable_authority ** 2
    qp = AccelerationQP(filt.torque_limit, acceleration_weights=weights)
    reference = AccelerationFormReference(filt.n, filt.torque_limit, weights)
    rng = np.random.default_rng(13)
    clamped = 0
    for _ in range(STATES_PER_ARM):
        q, v = random_state_in_safe_set(rng, certificate)
        nominal = random_nominal(rng, certificate)
        mass, bias, lower, upper = state_data(filt, q, v)
        result = qp.solve(mass, bias, nominal, lower, upper)
        assert result.solved, result
        torque = mass @ result.acceleration + bias
        expected = reference.solve(mass, bias, nominal, lower, upper)
        assert np.max(np.abs(torque - expected) / filt.torque_limit) <= AGREEMENT
        a_nom = np.linalg.solve(mass, nominal - bias)
        clamp = np.clip(a_nom, lower, upper)
        if np.all(np.abs(mass @ clamp + bias) <= filt.torque_limit * (1 - 1e-6)):
            clamped += 1
            np.testing.assert_allclose(result.acceleration, clamp, rtol=1e-6,
                                       atol=1e-6 * np.abs(clamp).max())
    assert clamped >= 5  # the case was exercised


def test_weighted_qp_matches_reference_solver() -> None:
    """Non-uniform torque weights: Clarabel with the same weights agrees to 1e-6."""
    model, certificate = demo_arm_and_certificate('reach7')
    weights = np.linspace(0.2, 5.0, model.n_joints)
    filt = SafetyFilter(model, certificate, torque_weights=weights,
                         observer_time_constant_s=0.0)
    reference = TorqueFormReference(filt.n, filt.torque_limit, weights)
    rng = np.random.default_rng(13)
    for _ in range(20):
        q, v = random_state_in_safe_set(rng, certificate)
        nominal = random_nominal(rng, certificate)
        out = filt.step(q, v, nominal)
        assert out.mode is FilterMode.FILTERED
        mass, bias, lower, upper = state_data(filt, q, v)
        expected = reference.solve(mass, bias, nominal, lower, upper)
        assert np.max(np.abs(out.torque - expected) / filt.torque_limit) <= AGREEMENT


def test_matrix_data_reproduce_the_scaled_problem() -> None:
    """The CSC data written per step (P's upper triangle, A = [I; U^-1 M D]) rebuild, via
    scipy.sparse, the dense matrices of the class docstring's scaled problem, with the
    Jacobi scaling d_j = 1 / sqrt((M W M)_jj) written out here from its definition."""
    import scipy.sparse as sparse

    model, certificate = demo_arm_and_certificate('reach7')
    filt = SafetyFilter(model, certificate, observer_time_constant_s=0.0)
    n = filt.n
    weights = np.linspace(0.5, 2.0, n)
    qp = AccelerationQP(filt.torque_limit, weights)
    rng = np.random.default_rng(3)
    q, v = random_state_in_safe_set(rng, certificate)
    mass, bias, lower, upper = state_data(filt, q, v)
    nominal = random_nominal(rng, certificate)
    qp.solve(mass, bias, nominal, lower, upper)
    mwm = mass @ np.diag(weights) @ mass
    scale = np.diag(1.0 / np.sqrt(np.diag(mwm)))
    p_dense = scale @ mwm @ scale
    np.testing.assert_allclose(np.diag(p_dense), 1.0, rtol=1e-12)
    c_dense = scale @ mass @ np.diag(weights) @ (bias - nominal)
    cost_scale = max(1.0, np.abs(c_dense).max())
    rows = np.concatenate([np.arange(j + 1) for j in range(n)])
    indptr = np.concatenate([[0], np.cumsum(np.arange(1, n + 1))])
    p_rebuilt = sparse.csc_matrix((qp._px, rows, indptr), shape=(n, n)).toarray()
    np.testing.assert_allclose(p_rebuilt, np.triu(p_dense) / cost_scale, rtol=1e-12,
                               atol=1e-15)
    np.testing.assert_allclose(qp._c, c_dense / cost_scale, rtol=1e-12, atol=1e-15)
    a_indices = np.concatenate([[j, *range(n, 2 * n)] for j in range(n)])
    a_rebuilt = sparse.csc_matrix((qp._ax, a_indices, np.arange(0, n * (n + 1) + 1, n + 1)),
                                  shape=(2 * n, n)).toarray()
    expected = np.vstack([np.eye(n), np.diag(1 / filt.torque_limit) @ mass @ scale])
    np.testing.assert_allclose(a_rebuilt, expected, rtol=1e-12, atol=1e-15)
    np.testing.assert_allclose(qp._lower[:n], lower / np.diag(scale), rtol=1e-12)
    np.testing.assert_allclose(qp._upper[n:], (filt.torque_limit - bias) / filt.torque_limit,
                               rtol=1e-12)


def test_answer_is_independent_of_warm_start() -> None:
    """The same problem solved cold and after unrelated solves gives the same answer (to the
    agreement tolerance): warm starting changes the path, not the minimiser."""
    model, certificate = demo_arm_and_certificate('bench6')
    filt = SafetyFilter(model, certificate, observer_time_constant_s=0.0)
    rng = np.random.default_rng(4)
    q, v = random_state_in_safe_set(rng, certificate)
    data = state_data(filt, q, v)
    nominal = 1000.0 * filt.torque_limit
    qp = AccelerationQP(filt.torque_limit)
    cold = qp.solve(data[0], data[1], nominal, data[2], data[3]).acceleration
    for _ in range(5):
        q2, v2 = random_state_in_safe_set(rng, certificate)
        other = state_data(filt, q2, v2)
        qp.solve(other[0], other[1], random_nominal(rng, certificate), other[2], other[3])
    warm = qp.solve(data[0], data[1], nominal, data[2], data[3]).acceleration
    qp.reset_warm_start()
    reset = qp.solve(data[0], data[1], nominal, data[2], data[3]).acceleration
    torque = [data[0] @ a + data[1] for a in (cold, warm, reset)]
    for other in torque[1:]:
        assert np.max(np.abs(other - torque[0]) / filt.torque_limit) <= AGREEMENT


def test_solver_failure_is_a_status() -> None:
    """An iteration cap of 1 (OSQP cannot converge in one iteration) gives a result whose
    status says so and which is not 'solved'; nothing is raised (STYLE: a solve returns a
    result object)."""
    model, certificate = demo_arm_and_certificate('reach7')
    filt = SafetyFilter(model, certificate, observer_time_constant_s=0.0)
    qp = AccelerationQP(filt.torque_limit, max_iter=1)
    rng = np.random.default_rng(5)
    q, v = random_state_in_safe_set(rng, certificate)
    mass, bias, lower, upper = state_data(filt, q, v)
    result = qp.solve(mass, bias, 1000.0 * filt.torque_limit, lower, upper)
    assert not result.solved
    assert 'iter' in result.status
    assert result.acceleration.shape == (filt.n,)


def test_status_codes() -> None:
    """OSQP's documented codes: 1 solved and 2 solved inaccurate (0.6 and 1.x) count as
    solved; e.g. -2 (0.6) / 7 (1.x), maximum iterations, does not."""
    a = np.zeros(2)
    assert QPResult(a, 'solved', STATUS_SOLVED, 10, 0.0).solved
    assert QPResult(a, 'solved inaccurate', STATUS_SOLVED_INACCURATE, 10, 0.0).solved
    for code in (-2, 7, 3, -3, 8, -6):
        assert not QPResult(a, 'x', code, 10, 0.0).solved


def test_check_acceleration() -> None:
    """Hand-made 2-joint cases: inside passes, each violated row is named, NaN fails."""
    mass = np.array([[2.0, 0.5], [0.5, 1.0]])
    bias = np.array([1.0, -1.0])
    lower, upper = np.array([-1.0, -1.0]), np.array([1.0, 1.0])
    umax = np.array([10.0, 10.0])
    tol = 1e-9
    assert check_acceleration(mass, bias, np.array([0.5, -0.5]), lower, upper, umax,
                              tol, tol) == ''
    assert 'acceleration' in check_acceleration(mass, bias, np.array([1.1, 0.0]), lower,
                                                upper, umax, tol, tol)
    assert 'torque' in check_acceleration(mass, bias, np.array([0.9, 0.9]), lower, upper,
                                          np.array([1.0, 1.0]), tol, tol)
    assert check_acceleration(mass, bias, np.array([np.nan, 0.0]), lower, upper, umax,
                              tol, tol) != ''


@pytest.mark.parametrize(('kwargs', 'match'), [
    ({'torque_limit': [1.0, -1.0]}, 'torque_limit'),
    ({'torque_limit': [1.0, np.inf]}, 'torque_limit'),
    ({'torque_limit': [1.0, 1.0], 'torque_weights': [1.0, -2.0]}, 'torque_weights'),
    ({'torque_limit': [1.0, 1.0], 'torque_weights': [1.0]}, 'torque_weights'),
    ({'torque_limit': [1.0, 1.0], 'time_limit_s': 0.0}, 'time_limit_s'),
    ({'torque_limit': [1.0, 1.0], 'max_iter': 0}, 'max_iter'),
    ({'torque_limit': []}, 'torque_limit|at least one joint'),
])
def test_invalid_setup_raises(kwargs: dict, match: str) -> None:
    """Configuration errors are exceptions of the package (STYLE: errors) that say which
    setting is wrong."""
    with pytest.raises(SafetyFilterError, match=match):
        AccelerationQP(**kwargs)
