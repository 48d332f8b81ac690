"""What one filter step returns: :class:`FilterOutput` (the torque, the mode, the margins)."""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from safety_filter.online.mode_codes import FilterMode


@dataclass(slots=True)
class FilterOutput:
    """Result of one filter step. Arrays have shape (n,), in the model's joint order.

    Attributes:
        torque: torque to send, in the driver's convention [N m]; its full-torque form is
            always inside the torque box.
        mode: which branch produced it (:class:`FilterMode`).
        intervention: ``|u* - u_nom|`` (2-norm, full-torque terms) [N m]; NaN when the
            nominal was invalid.
        barrier_margin: smallest of ``hp, hn, bp, bn`` per joint (negative: outside S);
            NaN when the state was invalid.
        active_upper, active_lower: the acceleration bound ``Ap`` / ``An`` is active.
        torque_saturated: the full torque is at the box.
        solve_time_s: time spent in the QP update and solve [s] (0 when not run).
        solver_status: the solver's status text; ``'nominal feasible'`` when the nominal
            met every constraint (it is then the QP's minimiser and is sent unchanged, no
            solve needed); ``'not run'`` when recovering or rejected.
        reason: why the step was not ``'filtered'``; empty when it was.
        slow_set: the step kept the state in the slow design's set (certificates with a
            slow design; docs/method.md, "The slow set"); the barrier margins are then that
            design's.
    """

    torque: np.ndarray
    mode: FilterMode
    intervention: float
    barrier_margin: np.ndarray
    active_upper: np.ndarray
    active_lower: np.ndarray
    torque_saturated: np.ndarray
    solve_time_s: float
    solver_status: str
    reason: str
    slow_set: bool = False
