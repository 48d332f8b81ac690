"""The hold command: what the filter sends when it cannot filter (invalid input), and what
the node sends in place of a stale nominal, after its watchdog trips and on going inactive.

Gravity compensation plus damping toward rest, ``g(q) - hold_damping v``, clipped to the
torque box; no damping where the velocity is unknown (not finite, or not given).
"""

from __future__ import annotations

import math
from typing import Any

import numpy as np

from safety_filter.online.filter_output import FilterOutput
from safety_filter.online.mode_codes import FilterMode


def hold_command(gravity: np.ndarray, v: Any, hold_damping: np.ndarray,
                 torque_limit: np.ndarray) -> np.ndarray:
    """The full-torque hold command ``clip(g(q) - hold_damping v)`` [N m].

    Args:
        gravity: ``g(q)`` at the hold position, shape (n,).
        v: the velocity; entries that are not finite, or a ``v`` that is not (n,) numbers,
            count as unknown (no damping).
        hold_damping: damping per joint [N m s/rad].
        torque_limit: the torque box [N m].
    """
    n = len(gravity)
    damping = np.zeros(n)
    try:
        velocity = np.asarray(v, dtype=float)
        if velocity.shape == (n,):
            damping = np.where(np.isfinite(velocity), -hold_damping * velocity, 0.0)
    except (TypeError, ValueError):
        pass
    return np.clip(gravity + damping, -torque_limit, torque_limit)


def rejected_output(n: int, hold: tuple[np.ndarray, np.ndarray] | None, reason: str, *,
                    driver_compensated: bool, saturation: np.ndarray,
                    u_nom: np.ndarray | None = None,
                    barrier_margin: np.ndarray | None = None) -> FilterOutput:
    """The :class:`FilterOutput` of a rejected step.

    Args:
        n: the number of joints.
        hold: ``(full-torque hold command, g(q))`` at the hold position; None when there is
            no position to hold at (zero torque).
        reason: why the input was rejected.
        driver_compensated: the output is on top of gravity (the driver adds ``g(q)``).
        saturation: full torques at or beyond this count as saturated [N m].
        u_nom: the nominal in the driver's convention, when valid (for the intervention).
        barrier_margin: the barrier margins, when known (else NaN).
    """
    torque = np.zeros(n)
    saturated = np.zeros(n, dtype=bool)
    intervention = math.nan
    if hold is not None:
        full, gravity = hold
        if u_nom is not None:
            nominal_full = u_nom + gravity if driver_compensated else u_nom
            intervention = float(np.linalg.norm(full - nominal_full))
        saturated = np.abs(full) >= saturation
        torque = full - gravity if driver_compensated else full
    if barrier_margin is None:
        barrier_margin = np.full(n, math.nan)
    false = np.zeros(n, dtype=bool)
    return FilterOutput(torque, FilterMode.REJECTED, intervention, barrier_margin, false,
                        false.copy(), saturated, 0.0, 'not run', reason)
