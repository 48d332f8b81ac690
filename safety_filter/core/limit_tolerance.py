"""The one tolerance for "a limit was broken", and the count of broken limits.

Every report and run that says whether a joint kept its position, velocity or torque limit
(the demo report, the replay report's closed-loop re-simulation, the stress test's verdict,
the simulated arm of a node graph) compares the excursion past the limit with
:data:`LIMIT_TOLERANCE`, so that the same motion is judged the same everywhere.
"""

from __future__ import annotations

from collections.abc import Iterable, Mapping

import numpy as np

LIMIT_TOLERANCE = 1e-6
"""Largest excursion past a limit [rad, rad/s, m, m/s or N m] still counted as kept.

It is float round-off of the integration and of the limits' own arithmetic, not an
allowance: a filtered run that passes a limit by more than this broke it."""


def limit_broken(excursion: float) -> bool:
    """Whether an excursion past a limit (0 when kept) counts as a broken limit."""
    return float(excursion) > LIMIT_TOLERANCE


def count_broken_limits(violations: Mapping[str, np.ndarray],
                        kinds: Iterable[str] | None = None) -> int:
    """How many (joint, limit) pairs were broken: excursions above :data:`LIMIT_TOLERANCE`.

    Args:
        violations: per limit kind (``'position'``, ``'velocity'``, ``'torque'``), the
            largest excursion past the limit per joint (0 when kept).
        kinds: the kinds to count (default: every kind in ``violations``).
    """
    chosen = violations.keys() if kinds is None else kinds
    return int(sum(np.count_nonzero(np.asarray(violations[k]) > LIMIT_TOLERANCE)
                   for k in chosen))
