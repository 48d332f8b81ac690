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
