"""The filter step's checks of a measured position: usable at all, and a plausible motion.

:func:`valid_position` says whether a position can be held at (the hold command's
position); :class:`PositionJumpCheck` tells a sensor fault (a position that jumped farther
than the velocity allows since the last valid sample) from a real motion or a re-homed
encoder. The checks of shapes and finite values are in the step's first compiled kernel
(:func:`safety_filter.online.kernels.stage_and_bound`).
"""

from __future__ import annotations

import math
from collections.abc import Sequence
from typing import Any

import numpy as np

JUMP_PERIODS = 10.0  # a position may move this many periods at speed between two samples
JUMP_CONFIRM = 3  # agreeing samples after which a jumped position is accepted


def valid_position(q: Any, lower: np.ndarray, upper: np.ndarray,
                   rejection_distance: float) -> np.ndarray | None:
    """``q`` as a new float array when it has the limits' shape, is finite and lies within
    ``rejection_distance`` of the limits; else None."""
    try:
        position = np.array(q, dtype=float)
    except (TypeError, ValueError):
        return None
    if position.shape != lower.shape or not np.all(np.isfinite(position)):
        return None
    if np.any(position < lower - rejection_distance) \
            or np.any(position > upper + rejection_distance):
        return None
    return position


class PositionJumpCheck:
    """Whether a position can follow the last valid one.

    Between two samples a joint moves at most :data:`JUMP_PERIODS` periods at the larger of
    its rated and measured speed, per period since the last valid sample, plus ten times the
    declared position noise. A position beyond that is a sensor fault unless it stays: after
    :data:`JUMP_CONFIRM` samples that agree with each other it is accepted (a re-homed
    encoder).

    Args:
        joint_names: the chain's joints (for the reason).
        velocity_limit: the rated speed per joint [rad/s or m/s].
        position_noise: the declared position noise [rad or m].
        control_period_s: the period assumed when a step gives none [s].
    """

    def __init__(self, joint_names: Sequence[str], velocity_limit: np.ndarray,
                 position_noise: float, control_period_s: float) -> None:
        self.joint_names = tuple(joint_names)
        self._velocity_limit = np.array(velocity_limit, dtype=float)
        self._position_noise = float(position_noise)
        self.control_period_s = float(control_period_s)
        self._candidate: tuple[np.ndarray, int] | None = None

    def reset(self) -> None:
        """Forget a jumped position waiting for confirmation."""
        self._candidate = None

    def check(self, q: np.ndarray, v: np.ndarray, last_q: np.ndarray,
              steps_since_valid: int, period_s: float | None) -> tuple[str, bool]:
        """``(reason, accepted)``: why ``q`` cannot follow ``last_q`` ('' when it can), and
        whether a jump was just confirmed (the motion then starts afresh: the caller
        restarts its disturbance observer).

        Args:
            q, v: the measured state.
            last_q: the last valid position.
            steps_since_valid: steps rejected since ``last_q``.
            period_s: time since the last step [s] (None: the control period).
        """
        period = self.control_period_s if period_s is None else float(period_s)
        if not (math.isfinite(period) and period > 0.0):
            return '', False
        speed = np.maximum(self._velocity_limit, np.abs(v))
        allowed = (JUMP_PERIODS * period * (1 + steps_since_valid) * speed
                   + 10.0 * self._position_noise)
        if np.all(np.abs(q - last_q) <= allowed):
            self._candidate = None
            return '', False
        candidate = self._candidate
        if candidate is not None and np.all(np.abs(q - candidate[0]) <= allowed):
            self._candidate = (q.copy(), candidate[1] + 1)
        else:
            self._candidate = (q.copy(), 1)
        if self._candidate[1] >= JUMP_CONFIRM:
            self._candidate = None
            return '', True
        joints = [self.joint_names[i] for i in np.flatnonzero(np.abs(q - last_q) > allowed)]
        return (f'position jumped at {", ".join(joints)} farther than the velocity allows '
                'since the last valid sample (a sensor fault unless it stays)'), False
