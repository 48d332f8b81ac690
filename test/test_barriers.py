"""Areas of the safe set and of the braking set (barriers.safe_set_area, braking_set_area).

References: the integrals in closed form (elementary calculus): for the linear family the
slice of S is a band of width gamma r, area ``gamma r^2``; the braking set without a speed
limit has area ``2 * integral_0^r sqrt(2 e x) dx = (4/3) sqrt(2 e) r^(3/2)``; a speed limit
below every braking speed leaves the rectangle ``2 vmax r``.
"""

from __future__ import annotations

import math

import pytest

from safety_filter.alphas import ClassK
from safety_filter.barriers import braking_set_area, safe_set_area


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
