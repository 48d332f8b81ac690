"""Compiled inner loops of the filter step (private; numba, compiled on first use).

Why this module exists: at a 7-joint step the arithmetic is tiny (a 7 x 7 matrix product, a
few dozen comparisons) and the cost of the step written as numpy calls was the calls
themselves, about a microsecond each, fifty to a hundred of them per step. Each kernel here
does one stage of :meth:`SafetyFilter.step` or :meth:`AccelerationQP.solve` in one call.

Every kernel is a plain Python function under ``njit``: with ``NUMBA_DISABLE_JIT=1`` they run
as Python, which is how a reader can step through them. They write into arrays the caller
preallocated and never raise on bad numbers (``error_model='numpy'``: a division by zero
gives inf or NaN, which the checks downstream reject). The tests compare each kernel with
the numpy formulas it replaces (test/online/test_kernels.py). Compiled code is cached on disk
(``cache=True``), so only the first process after an install pays the compile time (a few
seconds).

Class-K families are passed as integer codes (:data:`ALPHA_CODES`).
"""

from __future__ import annotations

import math
from typing import Any

import numpy as np
from numba import njit

ALPHA_CODES = {'linear': 0, 'atan': 1, 'tanh': 2, 'cubic': 3, 'sqrt': 4, 'parabola': 5}

# Flags returned by stage_inputs (bit per problem).
NONFINITE_Q = 1
NONFINITE_V = 2
NONFINITE_U = 4
HUGE_VALUE = 8
HUGE_LIMIT = 1e150  # beyond this the products in the step could overflow

_JIT = {'cache': True, 'nogil': True, 'error_model': 'numpy'}


def barrier_arguments(certificate: Any) -> tuple[Any, ...]:
    """The certificate's constants as :func:`barrier_rows` and :func:`stage_and_bound` take
    them, after the state: ``(lower, upper, gamma, beta, margin, speed_bound, speed_beta,
    accel_bound, code1, scale1, code2, scale2)``. Writable float64 copies, the one array type
    the kernels are compiled for.
    """
    c = certificate
    arrays = tuple(np.array(values, dtype=float) for values in (
        c.position_lower, c.position_upper, c.gamma, c.beta, c.sampling_margin,
        c.velocity_bound, c.velocity_beta, c.acceleration_bound))
    return arrays + (ALPHA_CODES[c.alpha1.kind], float(c.alpha1.scale),
                     ALPHA_CODES[c.alpha2.kind], float(c.alpha2.scale))


@njit(**_JIT)
def stage_inputs(q: np.ndarray, v: np.ndarray, u: np.ndarray, inputs: np.ndarray) -> int:
    """Copy ``q, v, u`` into the rows of ``inputs`` (3, n); return the problem flags (0: ok)."""
    flags = 0
    n = inputs.shape[1]
    for i in range(n):
        a = q[i]
        b = v[i]
        c = u[i]
        inputs[0, i] = a
        inputs[1, i] = b
        inputs[2, i] = c
        if not math.isfinite(a):
            flags |= NONFINITE_Q
        elif abs(a) > HUGE_LIMIT:
            flags |= HUGE_VALUE
        if not math.isfinite(b):
            flags |= NONFINITE_V
        elif abs(b) > HUGE_LIMIT:
            flags |= HUGE_VALUE
        if not math.isfinite(c):
            flags |= NONFINITE_U
        elif abs(c) > HUGE_LIMIT:
            flags |= HUGE_VALUE
    return flags


@njit(**_JIT)
def _alpha(code: int, scale: float, x: float) -> float:
    if code == 0:
        return x
    if code == 1:
        return scale * math.atan(x / scale)
    if code == 2:
        return scale * math.tanh(x / scale)
    if code == 4:
        root = math.sqrt(2.0 * (abs(x) + scale)) - math.sqrt(2.0 * scale)
        return root if x >= 0.0 else -root
    if code == 5:
        size = abs(x)
        if size <= 2.0 * scale:
            root = size / math.sqrt(2.0 * scale)
        else:
            root = math.sqrt(2.0 * (size - scale))
        return root if x >= 0.0 else -root
    return x * x * x


@njit(**_JIT)
def _alpha_slope(code: int, scale: float, x: float) -> float:
    if code == 0:
        return 1.0
    if code == 1:
        r = x / scale
        return 1.0 / (1.0 + r * r)
    if code == 2:
        t = math.tanh(x / scale)
        return 1.0 - t * t
    if code == 4:
        return 1.0 / math.sqrt(2.0 * (abs(x) + scale))
    if code == 5:
        return 1.0 / math.sqrt(2.0 * max(abs(x) - scale, scale))
    return 3.0 * x * x


@njit(**_JIT)
def barrier_rows(q: np.ndarray, v: np.ndarray, lower: np.ndarray, upper: np.ndarray,
                 gamma: np.ndarray, beta: np.ndarray, margin: np.ndarray,
                 speed_bound: np.ndarray, speed_beta: np.ndarray, accel_bound: np.ndarray,
                 code1: int, scale1: float, code2: int, scale2: float,
                 rows: np.ndarray, smallest: np.ndarray) -> tuple[float, float]:
    """Barrier rows ``[hp; hn; bp; bn; Ap; An; sp; sn]`` into ``rows`` (8, n) (docs/method.md).

    The same formulas, in the same order, as :func:`safety_filter.core.barriers.evaluate_barriers`:
    where ``speed_beta > 0`` the velocity barriers ``sp = vS - v``, ``sn = vS + v`` bound
    ``Ap`` by ``speed_beta sp - margin`` and ``An`` by ``-speed_beta sn + margin``; elsewhere
    ``sp = sn = inf``. Outside S on a side, moving toward that limit,
    ``Ap <= -v^2 / (2 hp) - margin`` (``An >= v^2 / (2 hn) + margin``): the braking curve.
    ``Ap <= accel_bound``, ``An >= -accel_bound`` where the barriers' bounds leave room
    (outside S a push back may need more); inf: no bound. ``smallest[i]`` is the smallest of
    the joint's barriers. Returns the smallest of those over all joints and the smallest
    position margin ``min(hp, hn)``.
    """
    worst = math.inf
    deepest = math.inf
    for i in range(rows.shape[1]):
        hp = upper[i] - q[i]
        hn = q[i] - lower[i]
        g = gamma[i]
        bp = g * _alpha(code1, scale1, hp) - v[i]
        bn = g * _alpha(code1, scale1, hn) + v[i]
        ap = beta[i] * _alpha(code2, scale2, bp) - g * _alpha_slope(code1, scale1, hp) * v[i] \
            - margin[i]
        an = -beta[i] * _alpha(code2, scale2, bn) - g * _alpha_slope(code1, scale1, hn) * v[i] \
            + margin[i]
        sp = math.inf
        sn = math.inf
        if speed_beta[i] > 0.0:
            sp = speed_bound[i] - v[i]
            sn = speed_bound[i] + v[i]
            ap = min(ap, speed_beta[i] * sp - margin[i])
            an = max(an, -speed_beta[i] * sn + margin[i])
        # Outside S also the deceleration that stops the joint at its limit (v^2 / 2h): the
        # barriers' own return need not keep the position (docs/method.md, recovery).
        if v[i] > 0.0 and hp > 0.0 and (bp < 0.0 or sp < 0.0):
            ap = min(ap, -v[i] * v[i] / (2.0 * hp) - margin[i])
        elif v[i] < 0.0 and hn > 0.0 and (bn < 0.0 or sn < 0.0):
            an = max(an, v[i] * v[i] / (2.0 * hn) + margin[i])
        # The bound limits what the barriers do not ask for: outside S a barrier's push
        # back may need more (then the bound gives way).
        bound = accel_bound[i]
        ap, an = min(ap, max(bound, an)), max(an, min(-bound, ap))
        rows[0, i] = hp
        rows[1, i] = hn
        rows[2, i] = bp
        rows[3, i] = bn
        rows[4, i] = ap
        rows[5, i] = an
        rows[6, i] = sp
        rows[7, i] = sn
        position = min(hp, hn)
        least = min(min(position, min(bp, bn)), min(sp, sn))
        smallest[i] = least
        worst = min(worst, least)
        deepest = min(deepest, position)
    return worst, deepest


@njit(**_JIT)
def stage_and_bound(q: np.ndarray, v: np.ndarray, u: np.ndarray, inputs: np.ndarray,
                    lower: np.ndarray, upper: np.ndarray, gamma: np.ndarray, beta: np.ndarray,
                    margin: np.ndarray, speed_bound: np.ndarray, speed_beta: np.ndarray,
                    accel_bound: np.ndarray, code1: int, scale1: float, code2: int,
                    scale2: float,
                    rows: np.ndarray, smallest: np.ndarray) -> tuple[int, float, float]:
    """:func:`stage_inputs` then, if the inputs are usable, :func:`barrier_rows` on the
    staged ``q, v`` (one call instead of two on the per-step path).

    Returns ``(flags, worst, deepest)``; ``worst`` and ``deepest`` are NaN when ``flags``
    is not 0 (the rows are then not computed).
    """
    flags = stage_inputs(q, v, u, inputs)
    if flags:
        return flags, math.nan, math.nan
    worst, deepest = barrier_rows(inputs[0], inputs[1], lower, upper, gamma, beta, margin,
                                  speed_bound, speed_beta, accel_bound, code1, scale1, code2,
                                  scale2, rows, smallest)
    return 0, worst, deepest


@njit(**_JIT)
def mirror_upper(source: np.ndarray, mass: np.ndarray) -> None:
    """``mass`` = the symmetric matrix whose upper triangle is that of ``source``."""
    n = mass.shape[0]
    for i in range(n):
        for j in range(i, n):
            value = source[i, j]
            mass[i, j] = value
            mass[j, i] = value


@njit(**_JIT)
def add_friction(v: np.ndarray, viscous: np.ndarray, coulomb: np.ndarray,
                 friction: np.ndarray, bias: np.ndarray) -> None:
    """``friction = viscous v + coulomb sign(v)``; ``bias += friction``."""
    # An inline copy of safety_filter.core.friction.friction_torque (the one home of the
    # formula): a compiled kernel cannot call the numpy function without leaving for Python
    # in the control step. test_dynamics checks the two agree.
    for i in range(v.shape[0]):
        s = 0.0
        if v[i] > 0.0:
            s = 1.0
        elif v[i] < 0.0:
            s = -1.0
        f = viscous[i] * v[i] + coulomb[i] * s
        friction[i] = f
        bias[i] += f


@njit(**_JIT)
def within_box(values: np.ndarray, bound: np.ndarray) -> bool:
    """``|values| <= bound`` everywhere (NaN fails)."""
    for i in range(values.shape[0]):
        if not abs(values[i]) <= bound[i]:
            return False
    return True


@njit(**_JIT)
def within_bounds(values: np.ndarray, lower: np.ndarray, upper: np.ndarray) -> bool:
    """``lower <= values <= upper`` everywhere (NaN fails)."""
    for i in range(values.shape[0]):
        if not (lower[i] <= values[i] <= upper[i]):
            return False
    return True


@njit(**_JIT)
def fill_qp_acceleration(mass: np.ndarray, bias: np.ndarray, accel_nominal: np.ndarray,
                         accel_lower: np.ndarray, accel_upper: np.ndarray,
                         sqrt_weights: np.ndarray, torque_limit: np.ndarray,
                         p_rows: np.ndarray, p_cols: np.ndarray, scale: np.ndarray,
                         inv_scale: np.ndarray, p_data: np.ndarray, a_data: np.ndarray,
                         cost: np.ndarray, lower: np.ndarray, upper: np.ndarray) -> None:
    """The scaled OSQP data of the acceleration objective ``sum_j w_j (a_j - a_nom_j)^2``.

    With ``a = D y``, ``d_j = 1 / sqrt(w_j)`` (``scale``; ``inv_scale`` = ``sqrt(w)``): ``P = I``,
    ``cost_j = -sqrt(w_j) a_nom_j``, both divided by ``max(1, max |cost|)``; ``a_data`` =
    A = [I; U^-1 M D] in CSC order; ``lower``, ``upper`` as in :func:`fill_qp`.
    """
    n = mass.shape[0]
    for j in range(n):
        inv_scale[j] = sqrt_weights[j]
        scale[j] = 1.0 / sqrt_weights[j]
        cost[j] = -sqrt_weights[j] * accel_nominal[j]
    factor = _normalise_cost(cost)
    for k in range(p_rows.shape[0]):
        p_data[k] = factor if p_rows[k] == p_cols[k] else 0.0
    _constraint_rows(mass, bias, accel_lower, accel_upper, torque_limit, scale, inv_scale,
                     a_data, lower, upper)


@njit(**_JIT)
def _normalise_cost(cost: np.ndarray) -> float:
    """Divide ``cost`` by ``max(1, max |cost|)`` (a common factor of the cost does not change
    the minimiser; OSQP converges better on unit-sized data); returns the factor, which P is
    multiplied by too."""
    largest = 0.0
    for j in range(cost.shape[0]):
        largest = max(largest, abs(cost[j]))
    factor = 1.0
    if largest > 1.0 and math.isfinite(largest):
        factor = 1.0 / largest
    for j in range(cost.shape[0]):
        cost[j] *= factor
    return factor


@njit(**_JIT)
def _constraint_rows(mass: np.ndarray, bias: np.ndarray, accel_lower: np.ndarray,
                     accel_upper: np.ndarray, torque_limit: np.ndarray, scale: np.ndarray,
                     inv_scale: np.ndarray, a_data: np.ndarray, lower: np.ndarray,
                     upper: np.ndarray) -> None:
    """A = [I; U^-1 M D] in CSC order (column j: a 1, then column j of U^-1 M D) and the
    scaled bounds ``[An / d; -1 - h / umax]``, ``[Ap / d; 1 - h / umax]`` (both objectives)."""
    n = mass.shape[0]
    k = 0
    for j in range(n):
        a_data[k] = 1.0
        k += 1
        for i in range(n):
            a_data[k] = mass[i, j] * scale[j] / torque_limit[i]
            k += 1
    for j in range(n):
        lower[j] = accel_lower[j] * inv_scale[j]
        upper[j] = accel_upper[j] * inv_scale[j]
        ratio = bias[j] / torque_limit[j]
        lower[n + j] = -1.0 - ratio
        upper[n + j] = 1.0 - ratio


@njit(**_JIT)
def fill_qp(mass: np.ndarray, bias: np.ndarray, torque_nominal: np.ndarray,
            accel_lower: np.ndarray, accel_upper: np.ndarray, sqrt_weights: np.ndarray,
            torque_limit: np.ndarray, p_rows: np.ndarray, p_cols: np.ndarray,
            root: np.ndarray, scale: np.ndarray, inv_scale: np.ndarray, p_data: np.ndarray,
            a_data: np.ndarray, cost: np.ndarray, lower: np.ndarray, upper: np.ndarray) -> None:
    """The scaled OSQP data of :class:`safety_filter.online.qp_solver.AccelerationQP` at one state.

    ``root = W^(1/2) M D`` with ``d_j = 1 / ||column j of W^(1/2) M||`` (``scale``; its inverse
    in ``inv_scale``); ``p_data`` = P's upper triangle in CSC order (``p_rows``, ``p_cols``);
    ``a_data`` = A = [I; U^-1 M D] in CSC order (column j: a 1, then column j of U^-1 M D);
    ``cost`` = ``D M W (h - u_nom)``; both divided by ``max(1, max |cost|)``; ``lower`` and
    ``upper`` the scaled bounds. See the class docstring for the derivation.
    """
    n = mass.shape[0]
    for j in range(n):
        total = 0.0
        for i in range(n):
            w = sqrt_weights[i] * mass[i, j]
            root[i, j] = w
            total += w * w
        norm = math.sqrt(total)
        inv_scale[j] = norm
        scale[j] = 1.0 / norm
    for j in range(n):
        d = scale[j]
        for i in range(n):
            root[i, j] *= d
    # Cost vector before the common factor.
    for j in range(n):
        total = 0.0
        for i in range(n):
            total += root[i, j] * sqrt_weights[i] * (bias[i] - torque_nominal[i])
        cost[j] = total
    factor = _normalise_cost(cost)
    for k in range(p_rows.shape[0]):
        r = p_rows[k]
        c = p_cols[k]
        total = 0.0
        for i in range(n):
            total += root[i, r] * root[i, c]
        p_data[k] = total * factor
    _constraint_rows(mass, bias, accel_lower, accel_upper, torque_limit, scale, inv_scale,
                     a_data, lower, upper)


@njit(**_JIT)
def unscale(x: np.ndarray, scale: np.ndarray, out: np.ndarray) -> None:
    """``out = x * scale`` (the QP variable back to accelerations)."""
    for i in range(out.shape[0]):
        out[i] = x[i] * scale[i]


CHECK_PASSED = 0
CHECK_TORQUE = 1
CHECK_ACCELERATION = 2
CHECK_REASONS = {  # the reason a step gives for each check result
    CHECK_PASSED: '',
    CHECK_TORQUE: 'answer failed the check: torque outside the box',
    CHECK_ACCELERATION: 'answer failed the check: acceleration bound violated',
}


@njit(**_JIT)
def torque_and_check(mass: np.ndarray, bias: np.ndarray, acceleration: np.ndarray,
                     accel_lower: np.ndarray, accel_upper: np.ndarray,
                     torque_bound: np.ndarray, accel_tolerance: np.ndarray,
                     torque: np.ndarray) -> int:
    """``torque = M a + h``; then the answer check (docs/method.md, the filter step).

    Returns :data:`CHECK_PASSED`, :data:`CHECK_TORQUE` (some ``|torque| > torque_bound``) or
    :data:`CHECK_ACCELERATION` (some ``a`` outside ``[An - tol, Ap + tol]``). NaN fails.
    """
    n = mass.shape[0]
    for i in range(n):
        total = bias[i]
        for j in range(n):
            total += mass[i, j] * acceleration[j]
        torque[i] = total
    for i in range(n):
        if not abs(torque[i]) <= torque_bound[i]:
            return CHECK_TORQUE
    for i in range(n):
        a = acceleration[i]
        tol = accel_tolerance[i]
        if not (accel_lower[i] - tol <= a <= accel_upper[i] + tol):
            return CHECK_ACCELERATION
    return CHECK_PASSED


@njit(**_JIT)
def constructive(acceleration_nominal: np.ndarray, accel_lower: np.ndarray,
                 accel_upper: np.ndarray, authority: np.ndarray, rows: np.ndarray,
                 out: np.ndarray) -> None:
    """:func:`safety_filter.online.barrier_filter.constructive_acceleration` for one state
    (docs/method.md).

    The side to push back from, where the interval is empty, is the one whose barrier is
    more negative: ``min(hp, bp, sp) < min(hn, bn, sn)`` (rows as :func:`barrier_rows`
    writes them).
    """
    for i in range(out.shape[0]):
        e = authority[i]
        low = max(accel_lower[i], -e)
        high = min(accel_upper[i], e)
        if low > high:
            if min(min(rows[0, i], rows[2, i]), rows[6, i]) < \
                    min(min(rows[1, i], rows[3, i]), rows[7, i]):
                out[i] = max(high, -e)
            else:
                out[i] = min(low, e)
        else:
            out[i] = min(max(acceleration_nominal[i], low), high)


@njit(**_JIT)
def finish(torque: np.ndarray, torque_full_nominal: np.ndarray, acceleration: np.ndarray,
           accel_lower: np.ndarray, accel_upper: np.ndarray, torque_limit: np.ndarray,
           accel_tolerance: np.ndarray, saturation_level: np.ndarray, gravity: np.ndarray,
           subtract_gravity: bool, flags: np.ndarray) -> float:
    """Clip ``torque`` (full) to the box, flag active bounds and saturation, convert.

    ``flags`` (3, n) gets ``[a >= Ap - tol; a <= An + tol; |torque| >= saturation_level]``.
    Returns the intervention ``||torque - torque_full_nominal||`` (full-torque terms); then
    subtracts ``gravity`` from ``torque`` when ``subtract_gravity`` (driver-compensated).
    """
    total = 0.0
    for i in range(torque.shape[0]):
        limit = torque_limit[i]
        t = min(max(torque[i], -limit), limit)
        d = t - torque_full_nominal[i]
        total += d * d
        a = acceleration[i]
        flags[0, i] = a - accel_upper[i] >= -accel_tolerance[i]
        flags[1, i] = accel_lower[i] - a >= -accel_tolerance[i]
        flags[2, i] = abs(t) >= saturation_level[i]
        if subtract_gravity:
            t -= gravity[i]
        torque[i] = t
    return math.sqrt(total)
