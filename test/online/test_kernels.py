"""The compiled kernels of the step against the numpy formulas they replace.

References: the barrier rows against :func:`safety_filter.core.barriers.evaluate_barriers` (METHOD
2) for every class-K family; the QP data against the scaled QP of the
:class:`safety_filter.online.qp_solver.AccelerationQP` docstring written out in numpy and against
SciPy's
sparse matrices; the answer check against
:func:`safety_filter.online.qp_solver.check_acceleration`; the
constructive command against :func:`safety_filter.online.barrier_filter.constructive_acceleration`.
"""

from __future__ import annotations

import math

import numpy as np
import pytest
import scipy.sparse as sparse

from safety_filter.core.barriers import evaluate_barriers
from safety_filter.core.class_k import ClassK
from safety_filter.online import kernels as _kernels
from safety_filter.online.constructive import constructive_acceleration
from safety_filter.online.qp_solver import AccelerationQP, check_acceleration


def random_spd(rng: np.random.Generator, n: int) -> np.ndarray:
    """A symmetric positive definite matrix with entries over a few orders of magnitude."""
    factor = rng.normal(size=(n, n)) * np.logspace(0, -2, n)[None, :]
    return factor @ factor.T + 1e-3 * np.eye(n)


@pytest.mark.parametrize('kind1', ['linear', 'atan', 'tanh', 'sqrt', 'parabola'])
@pytest.mark.parametrize('kind2', ['linear', 'cubic', 'atan', 'tanh'])
@pytest.mark.parametrize('speed_rows', [False, True])
def test_barrier_rows_match_evaluate_barriers(kind1: str, kind2: str, speed_rows: bool) -> None:
    rng = np.random.default_rng(1)
    n = 5
    lower, upper = -rng.uniform(0.5, 2.0, n), rng.uniform(0.5, 2.0, n)
    gamma, beta = rng.uniform(0.5, 5.0, n), rng.uniform(0.5, 50.0, n)
    margin = rng.uniform(0.0, 0.5, n)
    speed_bound = rng.uniform(0.5, 3.0, n)
    # Some joints without velocity barriers or acceleration bound (0 and inf mean none).
    speed_beta = np.where(rng.random(n) < 0.7, rng.uniform(10.0, 500.0, n), 0.0) \
        if speed_rows else np.zeros(n)
    accel_bound = np.where(rng.random(n) < 0.7, rng.uniform(1.0, 30.0, n), np.inf) \
        if speed_rows else np.full(n, np.inf)
    alpha1, alpha2 = ClassK(kind1, 0.7), ClassK(kind2, 1.3)
    rows = np.empty((8, n))
    smallest = np.empty(n)
    for _ in range(50):
        q = rng.uniform(lower - 0.3, upper + 0.3)
        v = rng.normal(scale=2.0, size=n)
        worst, deepest = _kernels.barrier_rows(
            q, v, lower, upper, gamma, beta, margin, speed_bound, speed_beta, accel_bound,
            _kernels.ALPHA_CODES[kind1], 0.7, _kernels.ALPHA_CODES[kind2], 1.3, rows, smallest)
        state = evaluate_barriers(q, v, lower, upper, gamma, beta, alpha1, alpha2, margin,
                                  speed_bound, speed_beta, accel_bound)
        expected = np.array([state.margin_upper, state.margin_lower, state.barrier_upper,
                             state.barrier_lower, state.accel_upper, state.accel_lower,
                             np.broadcast_to(state.speed_upper, (n,)),
                             np.broadcast_to(state.speed_lower, (n,))])
        np.testing.assert_allclose(rows, expected, rtol=1e-13, atol=1e-13)
        np.testing.assert_allclose(smallest, state.smallest, rtol=1e-13, atol=1e-13)
        assert worst == pytest.approx(state.smallest.min(), abs=1e-13)
        assert deepest == pytest.approx(min(state.margin_upper.min(),
                                            state.margin_lower.min()), abs=1e-13)


def test_stage_inputs_flags() -> None:
    inputs = np.empty((3, 3))
    ok = np.array([1.0, -2.0, 3.0])
    assert _kernels.stage_inputs(ok, 2 * ok, 3 * ok, inputs) == 0
    np.testing.assert_array_equal(inputs, [ok, 2 * ok, 3 * ok])
    bad = np.array([1.0, math.nan, 0.0])
    assert _kernels.stage_inputs(bad, ok, ok, inputs) == _kernels.NONFINITE_Q
    inf = np.array([math.inf, 0.0, 0.0])
    assert _kernels.stage_inputs(ok, inf, -inf, inputs) == (_kernels.NONFINITE_V
                                                            | _kernels.NONFINITE_U)
    huge = np.array([0.0, 2e150, 0.0])
    assert _kernels.stage_inputs(ok, ok, huge, inputs) == _kernels.HUGE_VALUE


@pytest.mark.parametrize('weighted', [False, True])
def test_fill_qp_matches_the_scaled_qp(weighted: bool) -> None:
    """The OSQP data equal the scaled QP of the AccelerationQP docstring, written in numpy:
    P = D M W M D / c, q = D M W (h - u_nom) / c, A = [I; U^-1 M D], the scaled bounds."""
    rng = np.random.default_rng(2)
    n = 6
    umax = rng.uniform(5.0, 200.0, n)
    weights = rng.uniform(0.2, 5.0, n) if weighted else np.ones(n)
    qp = AccelerationQP(umax, weights)
    for _ in range(20):
        mass = random_spd(rng, n)
        bias = rng.normal(scale=20.0, size=n)
        nominal = rng.normal(scale=300.0, size=n)
        lower, upper = -rng.uniform(1, 50, n), rng.uniform(1, 50, n)
        _kernels.fill_qp(mass, bias, nominal, lower, upper, qp._sqrt_weights, qp._umax,
                         qp._p_rows, qp._p_cols, qp._root, qp._scale, qp._inv_scale, qp._px,
                         qp._ax, qp._c, qp._lower, qp._upper)
        w = np.diag(weights)
        d = 1.0 / np.sqrt(np.diag(mass @ w @ mass))
        big_d = np.diag(d)
        cost = big_d @ mass @ w @ (bias - nominal)
        c = max(1.0, np.abs(cost).max())
        p_full = big_d @ mass @ w @ mass @ big_d / c
        a_full = np.vstack([np.eye(n), np.diag(1.0 / umax) @ mass @ big_d])
        np.testing.assert_allclose(qp._scale, d, rtol=1e-12)
        np.testing.assert_allclose(qp._c, cost / c, rtol=1e-10, atol=1e-12)
        p_csc = sparse.csc_matrix((qp._px, qp._p_rows, np.concatenate(
            [[0], np.cumsum(np.arange(1, n + 1))])), shape=(n, n)).toarray()
        np.testing.assert_allclose(p_csc, np.triu(p_full), rtol=1e-10, atol=1e-12)
        a_indices = np.concatenate([[j, *range(n, 2 * n)] for j in range(n)])
        a_csc = sparse.csc_matrix((qp._ax, a_indices, np.arange(0, n * (n + 1) + 1, n + 1)),
                                  shape=(2 * n, n)).toarray()
        np.testing.assert_allclose(a_csc, a_full, rtol=1e-10, atol=1e-12)
        np.testing.assert_allclose(qp._lower, np.concatenate([lower / d, -1 - bias / umax]),
                                   rtol=1e-12)
        np.testing.assert_allclose(qp._upper, np.concatenate([upper / d, 1 - bias / umax]),
                                   rtol=1e-12)


def test_torque_and_check_matches_check_acceleration() -> None:
    rng = np.random.default_rng(3)
    n = 4
    umax = np.full(n, 50.0)
    tol_a, tol_u = np.full(n, 1e-6), 1e-6 * umax
    codes = set()
    for _ in range(300):
        mass = random_spd(rng, n)
        bias = rng.normal(scale=10.0, size=n)
        acceleration = rng.normal(scale=30.0, size=n)
        lower, upper = -rng.uniform(1, 60, n), rng.uniform(1, 60, n)
        torque = np.empty(n)
        code = _kernels.torque_and_check(mass, bias, acceleration, lower, upper,
                                         umax + tol_u, tol_a, torque)
        np.testing.assert_allclose(torque, mass @ acceleration + bias, rtol=1e-12, atol=1e-12)
        reason = check_acceleration(mass, bias, acceleration, lower, upper, umax, tol_a, tol_u)
        expected = {'': _kernels.CHECK_PASSED,
                    'answer failed the check: torque outside the box': _kernels.CHECK_TORQUE,
                    'answer failed the check: acceleration bound violated':
                        _kernels.CHECK_ACCELERATION}[reason]
        assert code == expected
        codes.add(code)
    assert codes == {0, 1, 2}  # every outcome was exercised
    nan = np.array([math.nan, 0.0, 0.0, 0.0])
    assert _kernels.torque_and_check(np.eye(n), np.zeros(n), nan, -np.ones(n), np.ones(n),
                                     umax, tol_a, np.empty(n)) != _kernels.CHECK_PASSED


def test_constructive_matches_public_function() -> None:
    rng = np.random.default_rng(4)
    n = 6
    authority = rng.uniform(1.0, 10.0, n)
    out = np.empty(n)
    empties = 0
    for _ in range(300):
        rows = rng.normal(size=(8, n))  # [hp; hn; bp; bn; Ap; An; sp; sn]
        lower = rng.normal(scale=8.0, size=n)
        upper = lower + rng.normal(loc=2.0, scale=6.0, size=n)  # sometimes empty
        a_nom = rng.normal(scale=20.0, size=n)
        _kernels.constructive(a_nom, lower, upper, authority, rows, out)
        upper_worse = np.minimum(np.minimum(rows[0], rows[2]), rows[6]) \
            < np.minimum(np.minimum(rows[1], rows[3]), rows[7])
        expected = constructive_acceleration(a_nom, lower, upper, authority, upper_worse)
        np.testing.assert_array_equal(out, expected)
        empties += int(np.any(np.maximum(lower, -authority) > np.minimum(upper, authority)))
    assert empties > 20


def test_finish_clips_flags_and_converts() -> None:
    rng = np.random.default_rng(5)
    n = 5
    limit = np.full(n, 10.0)
    tol = np.full(n, 1e-6)
    for driver in (False, True):
        torque = rng.normal(scale=15.0, size=n)
        original = torque.copy()
        nominal = rng.normal(scale=15.0, size=n)
        acceleration = rng.normal(size=n)
        lower, upper = acceleration - rng.choice([0.0, 1.0], n), acceleration + rng.choice(
            [0.0, 1.0], n)
        gravity = rng.normal(size=n)
        flags = np.empty((3, n), dtype=bool)
        intervention = _kernels.finish(torque, nominal, acceleration, lower, upper, limit,
                                       tol, limit - tol, gravity, driver, flags)
        clipped = np.clip(original, -limit, limit)
        assert intervention == pytest.approx(np.linalg.norm(clipped - nominal), rel=1e-12)
        np.testing.assert_array_equal(flags[0], acceleration - upper >= -tol)
        np.testing.assert_array_equal(flags[1], lower - acceleration >= -tol)
        np.testing.assert_array_equal(flags[2], np.abs(clipped) >= limit - tol)
        np.testing.assert_allclose(torque, clipped - gravity if driver else clipped,
                                   rtol=1e-15)


def test_mirror_upper_and_friction() -> None:
    rng = np.random.default_rng(6)
    source = rng.normal(size=(4, 4))
    mass = np.empty((4, 4))
    _kernels.mirror_upper(source, mass)
    np.testing.assert_array_equal(mass, np.triu(source) + np.triu(source, 1).T)
    v = np.array([0.5, -2.0, 0.0, 1.0])
    viscous, coulomb = rng.uniform(size=4), rng.uniform(size=4)
    bias = np.ones(4)
    friction = np.empty(4)
    _kernels.add_friction(v, viscous, coulomb, friction, bias)
    np.testing.assert_allclose(friction, viscous * v + coulomb * np.sign(v), rtol=1e-15)
    np.testing.assert_allclose(bias, 1.0 + friction, rtol=1e-15)


def test_box_and_bounds_reject_nan() -> None:
    bound = np.ones(2)
    assert _kernels.within_box(np.array([0.5, -1.0]), bound)
    assert not _kernels.within_box(np.array([0.5, -1.5]), bound)
    assert not _kernels.within_box(np.array([math.nan, 0.0]), bound)
    assert _kernels.within_bounds(np.zeros(2), -bound, bound)
    assert not _kernels.within_bounds(np.array([0.0, math.nan]), -bound, bound)
    assert not _kernels.within_bounds(np.array([0.0, 2.0]), -bound, bound)


def test_stage_and_bound_is_stage_then_rows() -> None:
    rng = np.random.default_rng(7)
    n = 3
    lower, upper = -np.ones(n), np.ones(n)
    gamma, beta, margin = np.full(n, 2.0), np.full(n, 5.0), np.full(n, 0.1)
    rows, smallest = np.empty((8, n)), np.empty(n)
    rows_ref, smallest_ref = np.empty((8, n)), np.empty(n)
    speed_bound, speed_beta, accel_bound = np.full(n, 1.5), np.full(n, 100.0), np.full(n, 9.0)
    inputs = np.empty((3, n))
    q, v, u = rng.normal(size=n), rng.normal(size=n), rng.normal(size=n)
    flags, worst, deepest = _kernels.stage_and_bound(q, v, u, inputs, lower, upper, gamma, beta,
                                                     margin, speed_bound, speed_beta,
                                                     accel_bound, 2, 0.5, 3, 1.0, rows,
                                                     smallest)
    expected = _kernels.barrier_rows(q, v, lower, upper, gamma, beta, margin, speed_bound,
                                     speed_beta, accel_bound, 2, 0.5, 3, 1.0, rows_ref,
                                     smallest_ref)
    assert flags == 0 and (worst, deepest) == expected
    np.testing.assert_array_equal(rows, rows_ref)
    np.testing.assert_array_equal(inputs, [q, v, u])
    q[1] = math.nan
    flags, worst, deepest = _kernels.stage_and_bound(q, v, u, inputs, lower, upper, gamma, beta,
                                                     margin, speed_bound, speed_beta,
                                                     accel_bound, 2, 0.5, 3, 1.0, rows,
                                                     smallest)
    assert flags == _kernels.NONFINITE_Q and math.isnan(worst) and math.isnan(deepest)
