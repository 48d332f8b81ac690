"""Areas of the safe set and of the braking set (barriers.safe_set_area, braking_set_area).

References: the integrals in closed form (elementary calculus): for the linear family the
slice of S is a band of width gamma r, area ``gamma r^2``; the braking set without a speed
limit has area ``2 * integral_0^r sqrt(2 e x) dx = (4/3) sqrt(2 e) r^(3/2)``; a speed limit
below every braking speed leaves the rectangle ``2 vmax r``.
"""

from __future__ import annotations

import math

import pytest

from safety_filter.core.barriers import braking_set_area, safe_set_area
from safety_filter.core.class_k import ClassK


@pytest.mark.parametrize('r, gamma', [(1.0, 0.5), (5.8, 0.116), (0.3, 4.0)])
def test_linear_safe_set_area_is_gamma_r_squared(r: float, gamma: float) -> None:
    assert safe_set_area(r, gamma, ClassK('linear')) == pytest.approx(gamma * r * r, rel=1e-9)


def test_atan_safe_set_area_matches_its_closed_form() -> None:
    """integral_0^r s atan(x / s) dx = s (r atan(r/s) - (s/2) ln(1 + r^2/s^2)), twice."""
    r, s, gamma = 2.0, 0.5, 0.7
    one_side = s * (r * math.atan(r / s) - 0.5 * s * math.log(1.0 + (r / s) ** 2))
    assert safe_set_area(r, gamma, ClassK('atan', s)) == pytest.approx(2 * gamma * one_side,
                                                                       rel=1e-6)


@pytest.mark.parametrize('r, e', [(1.0, 2.0), (5.8, 0.35)])
def test_braking_set_area_without_a_speed_limit(r: float, e: float) -> None:
    expected = 4.0 / 3.0 * math.sqrt(2.0 * e) * r ** 1.5
    assert braking_set_area(r, e, 1e9) == pytest.approx(expected, rel=1e-4)


def test_braking_set_area_under_a_low_speed_limit_is_nearly_the_box() -> None:
    """With vmax far below sqrt(2 e r) only thin corners near the limits are cut off: each
    corner loses vmax^3 / (6 e)."""
    r, e, vmax = 2.0, 100.0, 1.0
    expected = 2.0 * vmax * r - 2.0 * vmax ** 3 / (6.0 * e)
    assert braking_set_area(r, e, vmax) == pytest.approx(expected, rel=1e-4)


@pytest.mark.parametrize('r, gamma, speed', [(5.8, 0.5, 1.2), (2.0, 3.0, 0.9)])
def test_linear_safe_set_area_under_velocity_barriers(r: float, gamma: float,
                                                      speed: float) -> None:
    """Each side is a ramp up to x = vS / gamma, then the box: ``vS r - vS^2 / (2 gamma)``."""
    assert speed / gamma < r
    expected = 2.0 * (speed * r - speed ** 2 / (2.0 * gamma))
    assert safe_set_area(r, gamma, ClassK('linear'), speed) == pytest.approx(expected,
                                                                             rel=1e-5)


@pytest.mark.parametrize('r, e, speed', [(5.8, 0.35, 2.0), (2.0, 30.0, 1.5), (4.0, 2.0, 9.0)])
def test_sqrt_safe_set_reaches_the_braking_set(r: float, e: float, speed: float) -> None:
    """With gamma = sqrt(e) and eps -> 0, ``gamma alpha1(h) = sqrt(2 e h)``: S is the braking
    set of a joint decelerating at e (constant-deceleration kinematics, v^2 = 2 e d) cut by
    the velocity box."""
    area = safe_set_area(r, math.sqrt(e), ClassK('sqrt', 1e-12), speed, samples=200_001)
    assert area == pytest.approx(braking_set_area(r, e, speed, samples=200_001), rel=1e-4)
    # A larger eps takes area near the limits only: less, but most of it.
    coarse = safe_set_area(r, math.sqrt(e), ClassK('sqrt', 1e-3), speed)
    assert 0.85 * area < coarse < area


def test_sqrt_family_values_and_slopes() -> None:
    """alpha(x) = sqrt(2 (x + eps)) - sqrt(2 eps), odd; alpha' and alpha'' against central
    differences; alpha' alpha = 1 - sqrt(eps / (x + eps)) (elementary calculus)."""
    import numpy as np

    eps = 0.02
    alpha = ClassK('sqrt', eps)
    x = np.linspace(-3.0, 3.0, 2001)
    assert float(alpha.value(0.0)) == 0.0
    np.testing.assert_allclose(alpha.value(-x), -alpha.value(x), atol=1e-15)
    step = 1e-6
    inner = x[np.abs(x) > 1e-3]
    np.testing.assert_allclose(alpha.derivative(inner),
                               (alpha.value(inner + step) - alpha.value(inner - step))
                               / (2 * step), rtol=1e-6)
    np.testing.assert_allclose(alpha.second_derivative(inner),
                               (alpha.derivative(inner + step) - alpha.derivative(inner - step))
                               / (2 * step), rtol=1e-5)
    positive = x[x >= 0.0]
    np.testing.assert_allclose(alpha.derivative(positive) * alpha.value(positive),
                               1.0 - np.sqrt(eps / (positive + eps)), atol=1e-12)
    assert alpha.max_ratio_to_identity(3.0) == pytest.approx(1.0 / math.sqrt(2 * eps))


def test_parabola_family_values_and_slopes() -> None:
    """alpha(x) = x / sqrt(2 eps) up to 2 eps, sqrt(2 (x - eps)) beyond, odd: continuous
    with a continuous slope at 2 eps; alpha' and alpha'' against central differences away
    from the kink of alpha''; alpha' alpha = x / (2 eps) on the tangent and 1 beyond
    (elementary calculus)."""
    import numpy as np

    eps = 0.02
    alpha = ClassK('parabola', eps)
    x = np.linspace(-3.0, 3.0, 2001)
    assert float(alpha.value(0.0)) == 0.0
    np.testing.assert_allclose(alpha.value(-x), -alpha.value(x), atol=1e-15)
    joint = 2.0 * eps
    assert float(alpha.value(joint)) == pytest.approx(math.sqrt(2 * eps), rel=1e-12)
    assert float(alpha.value(joint + 1e-9)) == pytest.approx(math.sqrt(2 * eps), rel=1e-6)
    assert float(alpha.derivative(joint + 1e-9)) == pytest.approx(
        float(alpha.derivative(joint - 1e-9)), rel=1e-6)
    step = 1e-6
    inner = x[np.abs(np.abs(x) - joint) > 1e-3]
    np.testing.assert_allclose(alpha.derivative(inner),
                               (alpha.value(inner + step) - alpha.value(inner - step))
                               / (2 * step), rtol=1e-6, atol=1e-9)
    np.testing.assert_allclose(alpha.second_derivative(inner),
                               (alpha.derivative(inner + step) - alpha.derivative(inner - step))
                               / (2 * step), rtol=1e-5, atol=1e-6)
    positive = x[x >= 0.0]
    np.testing.assert_allclose(alpha.derivative(positive) * alpha.value(positive),
                               np.minimum(positive / (2 * eps), 1.0), atol=1e-12)
    assert alpha.max_ratio_to_identity(3.0) == pytest.approx(1.0 / math.sqrt(2 * eps))


@pytest.mark.parametrize('eps', [0.02, 0.003])
def test_parabola_is_the_largest_alpha_under_the_slope_and_braking_bounds(eps: float) -> None:
    """Brute force: march ``alpha`` up on a fine grid, each step as far as both bounds allow
    (``alpha' <= 1 / sqrt(2 eps)``, the sqrt family's slope at 0, and ``alpha' alpha <= 1``,
    what gamma* = sqrt(e) needs). The marched function is the pointwise largest with both
    properties; the parabola family matches it, and the sqrt family with the same slope
    bound stays below it, by ``sqrt(2 eps) + sqrt(2 (x - eps)) - sqrt(2 (x + eps))`` past
    the tangent (about ``sqrt(2 eps)``)."""
    import numpy as np

    x, dx = np.linspace(0.0, 2.0, 400_001, retstep=True)
    marched = np.empty_like(x)
    marched[0] = 0.0
    k = 1.0 / math.sqrt(2.0 * eps)
    for i in range(1, len(x)):  # explicit Euler on the tighter bound
        a = marched[i - 1]
        marched[i] = a + dx * (k if a * k <= 1.0 else 1.0 / a)
    parabola = ClassK('parabola', eps).value(x)
    np.testing.assert_allclose(parabola, marched, atol=1e-4)
    sqrt_family = ClassK('sqrt', eps).value(x)
    assert np.all(sqrt_family <= parabola + 1e-12)
    assert float(parabola[-1] - sqrt_family[-1]) == pytest.approx(
        math.sqrt(2 * eps) + math.sqrt(2 * (2.0 - eps)) - math.sqrt(2 * (2.0 + eps)), rel=1e-9)


@pytest.mark.parametrize('kind', ['sqrt', 'parabola'])
def test_boundary_curvature_against_a_dense_grid(kind: str) -> None:
    """``max |alpha''| alpha^2 / alpha'(0)`` on a dense grid: 4/27 (sqrt), 1 (parabola)."""
    import numpy as np

    alpha = ClassK(kind, 0.004)
    x = np.linspace(1e-9, 3.0, 3_000_001)
    grid = float(np.max(np.abs(alpha.second_derivative(x)) * alpha.value(x) ** 2)
                 / alpha.derivative(0.0))
    assert alpha.boundary_curvature() == pytest.approx(grid, rel=1e-6)


@pytest.mark.parametrize('r, gamma, eps', [(5.8, 0.5, 0.01), (2.0, 3.0, 0.003)])
def test_parabola_safe_set_area_matches_its_closed_form(r: float, gamma: float,
                                                        eps: float) -> None:
    """One side: ``gamma (eps sqrt(2 eps) + ((2 (r - eps))^1.5 - (2 eps)^1.5) / 3)``
    (the tangent's triangle, then the integral of sqrt(2 (x - eps))), twice."""
    one_side = gamma * (eps * math.sqrt(2 * eps)
                        + ((2 * (r - eps)) ** 1.5 - (2 * eps) ** 1.5) / 3.0)
    assert safe_set_area(r, gamma, ClassK('parabola', eps), samples=400_001) == \
        pytest.approx(2 * one_side, rel=1e-6)


# ---------------------------------------------------------------------- recovery time
def _least_deceleration_return(q0: float, v0: float, lower: float, upper: float, gamma: float,
                               beta: float, alpha1: ClassK, alpha2: ClassK, authority: float,
                               margin: float, speed_bound: float, speed_beta: float) -> float:
    """The time one joint takes back into S when the filter gives it the least deceleration
    it may, ``max(Ap(q, v), -e)`` (the bounds when they ask for at most ``e``, else ``e``),
    and the arm takes the largest drift the margin allows (two thirds of it) off that,
    integrated by SciPy's ``solve_ivp`` (RK45, tight tolerances) up to the event 'every
    barrier of the joint is non-negative'."""
    import numpy as np
    from scipy.integrate import solve_ivp

    from safety_filter.core.barriers import evaluate_barriers

    def state(q: float, v: float):  # noqa: ANN202
        return evaluate_barriers(np.array([q]), np.array([v]), np.array([lower]),
                                 np.array([upper]), np.array([gamma]), np.array([beta]),
                                 alpha1, alpha2, margin, np.array([speed_bound]),
                                 np.array([speed_beta]))

    def rhs(_t: float, x: np.ndarray) -> list[float]:
        bounds = state(x[0], x[1])
        drift = 2.0 / 3.0 * margin
        if x[1] >= 0.0:
            return [x[1], max(float(bounds.accel_upper[0]), -authority) + drift]
        return [x[1], min(float(bounds.accel_lower[0]), authority) - drift]

    def back(_t: float, x: np.ndarray) -> float:
        return float(state(x[0], x[1]).smallest[0])

    back.terminal, back.direction = True, 1.0
    solution = solve_ivp(rhs, (0.0, 60.0), [q0, v0], events=back, rtol=1e-9, atol=1e-12,
                         max_step=1e-3)
    assert solution.t_events[0].size == 1, 'the joint never came back'
    assert np.all((solution.y[0] >= lower) & (solution.y[0] <= upper))
    return float(solution.t_events[0][0])


@pytest.mark.parametrize('kind, scale', [('linear', 1.0), ('sqrt', 0.005), ('atan', 0.5)])
def test_recovery_time_bound_holds_for_the_slowest_return(kind: str, scale: float) -> None:
    """barriers.recovery_time_bound is an upper bound of the return time of a joint that gets
    the least deceleration the filter may give outside S, integrated by SciPy's solve_ivp
    (reference), over random states outside S within the braking set of the authority (the
    position is kept on the way: the bounds ask for the braking curve); it is 0 inside S and
    inf past a limit."""
    import numpy as np

    from safety_filter.core.barriers import recovery_time_bound, safe_velocity_interval

    rng = np.random.default_rng(7)
    alpha1, alpha2 = ClassK(kind, scale), ClassK('linear', 1.0)
    lower, upper, authority, margin = -1.0, 1.5, 12.0, 0.6
    gamma = math.sqrt(authority) if kind == 'sqrt' else 2.0
    beta, speed_bound, speed_beta = 25.0, 3.0, 40.0
    checked, ratios = 0, []
    while checked < 12:
        q = rng.uniform(lower + 0.05, upper - 0.05)
        sign = rng.choice([-1.0, 1.0])
        distance = upper - q if sign > 0 else q - lower
        low, high = safe_velocity_interval(np.array([q]), np.array([lower]),
                                           np.array([upper]), np.array([gamma]), alpha1,
                                           np.array([speed_bound]), np.array([speed_beta]))
        edge = float(high[0] if sign > 0 else -low[0])
        reach = min(math.sqrt(2.0 * (authority - margin) * distance), speed_bound * 1.3)
        if reach <= edge + 1e-3:
            continue
        v = sign * rng.uniform(edge + 1e-3, reach)
        bound = float(recovery_time_bound(
            np.array([q]), np.array([v]), np.array([lower]), np.array([upper]),
            np.array([gamma]), np.array([beta]), alpha1, alpha2, np.array([authority]),
            np.array([margin]), np.array([speed_bound]), np.array([speed_beta]))[0])
        taken = _least_deceleration_return(q, v, lower, upper, gamma, beta, alpha1, alpha2,
                                           authority, margin, speed_bound, speed_beta)
        assert 0.0 < taken <= bound * (1.0 + 1e-3), (q, v, taken, bound)
        ratios.append(bound / taken)
        checked += 1
    assert min(ratios) < 3.0  # not a bound so loose that it says nothing
    inside = recovery_time_bound(np.array([0.0, 2.0]), np.array([0.0, 0.0]),
                                 np.array([lower] * 2), np.array([upper] * 2),
                                 np.array([gamma] * 2), np.array([beta] * 2), alpha1, alpha2,
                                 np.array([authority] * 2), np.array([margin] * 2))
    assert inside[0] == 0.0 and math.isinf(inside[1])


def test_worst_recovery_time_is_the_integral_of_the_slowest_floor() -> None:
    """barriers.worst_recovery_time for the linear family without velocity barriers and no
    drift is integral_0^V dw / min(e, margin + gamma w): SciPy's quad (reference), and the
    closed form ln((margin + gamma V) / margin) / gamma while gamma V + margin <= e; with a
    drift share s, integral_0^V dw / min(e - s margin, (1 - s) margin + gamma w)."""
    import numpy as np
    from scipy.integrate import quad

    from safety_filter.core.barriers import worst_recovery_time

    gamma, e, margin = np.array([1.5, 0.8]), np.array([20.0, 2.0]), np.array([0.5, 0.3])
    speed = np.array([4.0, 5.0])
    found = worst_recovery_time(speed, np.array([2.0, 3.0]), gamma, np.array([10.0, 10.0]),
                                ClassK('linear'), ClassK('linear'), e, margin, drift_share=0.0,
                                samples=4001)
    for i in range(2):
        expected = quad(lambda w, i=i: 1.0 / min(e[i], margin[i] + gamma[i] * w), 0.0,
                        speed[i], points=[(e[i] - margin[i]) / gamma[i]])[0]
        assert found[i] == pytest.approx(expected, rel=1e-4)
    assert found[0] == pytest.approx(math.log((0.5 + 1.5 * 4.0) / 0.5) / 1.5, rel=1e-4)
    # the drift takes its share of the margin off both the spare margin and the authority
    half = worst_recovery_time(speed, np.array([2.0, 3.0]), gamma, np.array([10.0, 10.0]),
                               ClassK('linear'), ClassK('linear'), e, margin, drift_share=0.5,
                               samples=4001)
    expected = quad(lambda w: 1.0 / min(2.0 - 0.15, 0.15 + 0.8 * w), 0.0, 5.0,
                    points=[(1.85 - 0.15) / 0.8])[0]
    assert half[1] == pytest.approx(expected, rel=1e-4)


def test_outside_s_the_bounds_ask_for_the_braking_curve() -> None:
    """Outside S, moving toward a limit, the acceleration bound is at most
    ``-v^2 / (2h) - margin`` (the constant deceleration that stops at the limit, a
    kinematic closed form); inside S, moving away, or past the limit the bound is the
    barriers' own."""
    import numpy as np

    from safety_filter.core.barriers import evaluate_barriers

    lower, upper = np.array([-1.0]), np.array([1.0])
    gamma, beta, margin = np.array([1.0]), np.array([0.5]), 0.1
    alpha = ClassK('linear')

    def bounds(q: float, v: float):  # noqa: ANN202
        return evaluate_barriers(np.array([q]), np.array([v]), lower, upper, gamma, beta,
                                 alpha, alpha, margin)

    plain = lambda q, v: 0.5 * (gamma[0] * (1.0 - q) - v) - gamma[0] * v - margin  # noqa: E731
    outside = bounds(0.9, 1.0)  # h = 0.1, bp = -0.9: the barrier asks for 0.9 less than that
    assert outside.barrier_upper[0] < 0.0
    assert outside.accel_upper[0] == pytest.approx(-1.0 / 0.2 - margin)
    assert plain(0.9, 1.0) > outside.accel_upper[0]
    inside = bounds(0.0, 0.5)
    assert inside.accel_upper[0] == pytest.approx(plain(0.0, 0.5))
    mirrored = bounds(-0.9, -1.0)
    assert mirrored.accel_lower[0] == pytest.approx(1.0 / 0.2 + margin)
    past = bounds(1.1, 1.0)
    assert past.accel_upper[0] == pytest.approx(plain(1.1, 1.0))


def test_no_recovery_time_where_the_drift_may_take_the_authority() -> None:
    """With the usable authority below the drift the margin covers (two thirds of it), no
    deceleration is guaranteed at the authority: recovery_time_bound and worst_recovery_time
    give inf (no statement); well above it they are finite."""
    import numpy as np

    from safety_filter.core.barriers import recovery_time_bound, worst_recovery_time

    alpha = ClassK('linear')
    q, v = np.array([0.5, 0.5]), np.array([0.6, 0.6])  # outside S: gamma h = 0.5
    authority = np.array([1.9, 4.0])  # against 2/3 of a margin of 3: 2.0
    margin = np.array([3.0, 3.0])
    found = recovery_time_bound(q, v, np.array([-1.0, -1.0]), np.array([1.0, 1.0]),
                                np.array([1.0, 1.0]), np.array([20.0, 20.0]), alpha, alpha,
                                authority, margin)
    assert math.isinf(found[0]) and math.isfinite(found[1]) and found[1] > 0.0
    worst = worst_recovery_time(np.array([0.6, 0.6]), np.array([2.0, 2.0]),
                                np.array([1.0, 1.0]), np.array([20.0, 20.0]), alpha, alpha,
                                authority, margin)
    assert math.isinf(worst[0]) and math.isfinite(worst[1])
