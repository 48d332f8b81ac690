"""Extended class-K functions used by the barriers (docs/method.md).

``alpha1`` shapes the velocity barrier ``b = gamma * alpha1(h) - v`` from the position
margin ``h`` [rad or m]; ``alpha2`` shapes the ZCBF rate condition
``db/dt >= -beta * alpha2(b)``. Each family is odd, strictly increasing and zero at zero.
A ``scale`` sets where the saturating families (atan, tanh) bend, in the units of their
argument; the linear and cubic families ignore it.

The ``sqrt`` family ``alpha(x) = sqrt(2 (x + eps)) - sqrt(2 eps)`` (odd extension for
``x < 0``, ``eps`` = ``scale``) makes the velocity barrier's boundary the braking parabola:
``alpha' alpha = 1 - sqrt(eps / (x + eps)) < 1``, so ``gamma* = sqrt(e)`` up to that factor
and ``v <= gamma alpha(h)`` approaches ``v <= sqrt(2 e h)``; ``eps`` bounds its slope
``alpha'(0) = 1 / sqrt(2 eps)`` (``docs/method.md``, the braking-curve barrier).

The ``parabola`` family enters the same parabola along its tangent through the origin:
``alpha(x) = x / sqrt(2 eps)`` for ``0 <= x <= 2 eps``, ``sqrt(2 (x - eps))`` beyond (odd
extension). It has the same slope bound ``alpha'(0) = 1 / sqrt(2 eps)`` and the same
curvature bound ``|alpha''| <= (2 eps)^-1.5`` as ``sqrt``, and ``alpha' alpha <= 1``; of
all functions with those two properties it is the largest at every ``x`` (``alpha <= x k``
from the slope bound, ``alpha^2 <= alpha(x1)^2 + 2 (x - x1)`` from the product bound), so
it gives up about ``eps / sqrt(2 x)`` of the braking speed where ``sqrt`` gives up about
``sqrt(2 eps)`` (docs/method.md).
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from safety_filter.errors import InvalidValue

ALPHA_KINDS = ('linear', 'atan', 'tanh', 'cubic', 'sqrt', 'parabola')
# concave on [0, inf): the gamma* formula applies
ALPHA1_KINDS = ('linear', 'atan', 'tanh', 'sqrt', 'parabola')
ALPHA2_KINDS = ('linear', 'cubic', 'atan', 'tanh')
# the families whose boundary approaches the braking parabola; their scale is eps
BRAKING_FAMILIES = ('sqrt', 'parabola')


@dataclass(frozen=True)
class ClassK:
    """One extended class-K function ``alpha(x)`` with its first two derivatives."""

    kind: str = 'linear'
    scale: float = 1.0

    def __post_init__(self) -> None:
        if self.kind not in ALPHA_KINDS:
            raise InvalidValue('class-K family', self.kind, 'one of ' + ', '.join(ALPHA_KINDS),
                               detail='unknown class-K family')
        if not (np.isfinite(self.scale) and self.scale > 0.0):
            raise InvalidValue('class-K scale', self.scale, 'a finite number > 0')

    def value(self, x: np.ndarray | float) -> np.ndarray:
        """``alpha(x)``."""
        x = np.asarray(x, dtype=float)
        s = self.scale
        if self.kind == 'linear':
            return x.copy()
        if self.kind == 'atan':
            return s * np.arctan(x / s)
        if self.kind == 'tanh':
            return s * np.tanh(x / s)
        if self.kind == 'sqrt':
            return np.sign(x) * (np.sqrt(2.0 * (np.abs(x) + s)) - np.sqrt(2.0 * s))
        if self.kind == 'parabola':
            size = np.abs(x)
            return np.sign(x) * np.where(size <= 2.0 * s, size / np.sqrt(2.0 * s),
                                         np.sqrt(2.0 * np.maximum(size - s, s)))
        return x ** 3

    def derivative(self, x: np.ndarray | float) -> np.ndarray:
        """``alpha'(x)``."""
        x = np.asarray(x, dtype=float)
        s = self.scale
        if self.kind == 'linear':
            return np.ones_like(x)
        if self.kind == 'atan':
            return 1.0 / (1.0 + (x / s) ** 2)
        if self.kind == 'tanh':
            return 1.0 - np.tanh(x / s) ** 2
        if self.kind == 'sqrt':
            return 1.0 / np.sqrt(2.0 * (np.abs(x) + s))
        if self.kind == 'parabola':
            return 1.0 / np.sqrt(2.0 * np.maximum(np.abs(x) - s, s))
        return 3.0 * x ** 2

    def second_derivative(self, x: np.ndarray | float) -> np.ndarray:
        """``alpha''(x)``."""
        x = np.asarray(x, dtype=float)
        s = self.scale
        if self.kind == 'linear':
            return np.zeros_like(x)
        if self.kind == 'atan':
            return -2.0 * x / s ** 2 / (1.0 + (x / s) ** 2) ** 2
        if self.kind == 'tanh':
            t = np.tanh(x / s)
            return -2.0 / s * t * (1.0 - t ** 2)
        if self.kind == 'sqrt':
            return -np.sign(x) * (2.0 * (np.abs(x) + s)) ** -1.5
        if self.kind == 'parabola':
            size = np.abs(x)
            return np.where(size <= 2.0 * s, 0.0,
                            -np.sign(x) * (2.0 * np.maximum(size - s, s)) ** -1.5)
        return 6.0 * x

    def max_value_times_slope(self, upper: float, samples: int = 4001) -> float:
        """``max_{0 <= x <= upper} alpha'(x) alpha(x)``, the quantity behind gamma*.

        Closed form for the linear family (= upper); a dense grid plus golden-section polish
        otherwise (the product is smooth and unimodal on [0, upper] for atan and tanh).
        """
        if self.kind == 'linear':
            return float(upper)
        if self.kind == 'sqrt':  # 1 - sqrt(eps / (x + eps)), increasing in x
            return 1.0 - float(np.sqrt(self.scale / (float(upper) + self.scale)))
        if self.kind == 'parabola':  # x / (2 eps) on the tangent, 1 on the parabola
            return min(float(upper) / (2.0 * self.scale), 1.0)
        grid = np.linspace(0.0, upper, samples)
        product = self.derivative(grid) * self.value(grid)
        k = int(np.argmax(product))
        lo, hi = grid[max(k - 1, 0)], grid[min(k + 1, samples - 1)]
        ratio = (np.sqrt(5.0) - 1.0) / 2.0
        for _ in range(60):
            a = hi - ratio * (hi - lo)
            b = lo + ratio * (hi - lo)
            fa = float(self.derivative(a) * self.value(a))
            fb = float(self.derivative(b) * self.value(b))
            if fa < fb:
                lo = a
            else:
                hi = b
        x = 0.5 * (lo + hi)
        return max(float(product[k]), float(self.derivative(x) * self.value(x)))

    def max_ratio_to_identity(self, upper: float) -> float:
        """``sup_{0 < x <= upper} alpha(x) / x``: the slope that the sampled-data cap uses."""
        if self.kind in ('linear', 'atan', 'tanh'):
            return 1.0  # concave through the origin with slope 1 there
        if self.kind in BRAKING_FAMILIES:
            return float(self.derivative(0.0))  # concave: the slope at 0, 1 / sqrt(2 eps)
        return float(upper) ** 2  # cubic: x^3 / x = x^2, largest at the upper end

    def boundary_curvature(self) -> float:
        """``max_{x > 0} |alpha''(x)| alpha(x)^2 / alpha'(0)`` for the braking families (0 for
        the others, whose eps no rule sets): with ``v = gamma alpha(h)`` on the boundary of
        S, the slope term ``gamma alpha'(h) v`` of the bounds moves with the motion at up to
        ``gamma^3`` times this times ``alpha'(0)``. ``sqrt``: ``y0 (y - y0)^2 / y^3`` with
        ``y = sqrt(2 (x + eps))``, largest at ``y = 3 y0``: 4/27. ``parabola``:
        ``sqrt(2 eps / (2 (x - eps)))`` past the tangent, largest where it starts: 1."""
        if self.kind == 'sqrt':
            return 4.0 / 27.0
        if self.kind == 'parabola':
            return 1.0
        return 0.0

    def to_dict(self) -> dict[str, float | str]:
        """Plain form for files."""
        return {'kind': self.kind, 'scale': float(self.scale)}
