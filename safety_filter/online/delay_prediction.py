"""Planning for the state at which a torque will act: the measured state advanced over the
declared delay.

A torque the filter sends at ``t`` acts from ``t + D`` (``D`` the delay between measurement and
torque that the certificate declares, ``prediction_s``). Until then the torques already sent
act, and the filter knows them. So with a certificate that records ``prediction_s`` the step
predicts the state at ``t + D`` from the measured one, with ``M`` and ``h`` (net of the
disturbance estimate) frozen at the measurement, piece by piece over those torques, and
plans there: the sampled-data margin then covers one hold from the planned state, not the
delay as well (docs/method.md, "Where we depart from the plain form").
"""

from __future__ import annotations

import math

import numpy as np

from safety_filter.online import kernels as _kernels
from safety_filter.online.disturbance_observer import DisturbanceObserver
from safety_filter.online.step_dynamics import StepDynamics


class DelayPrediction:
    """The planned state and its barrier rows, filled by :meth:`plan`.

    Args:
        horizon_s: the declared delay [s] (> 0).
        dynamics: the filter's step dynamics.
        barrier_arguments: the certificate's constants for ``kernels.barrier_rows``.
        coulomb_friction: the model's Coulomb friction per joint [N m].
    """

    def __init__(self, horizon_s: float, dynamics: StepDynamics,
                 barrier_arguments: tuple, coulomb_friction: np.ndarray) -> None:
        n = len(coulomb_friction)
        self.horizon_s = float(horizon_s)
        self._dyn = dynamics
        self._barrier_arguments = barrier_arguments
        self._sticking = np.asarray(coulomb_friction, dtype=float) > 0.0
        self.state = np.empty((2, n))  # [q; v] at the end of the delay
        self.smallest = np.empty(n)  # each joint's smallest barrier there

    def plan(self, q: np.ndarray, v: np.ndarray, mass: np.ndarray, bias: np.ndarray,
             observer: DisturbanceObserver, period_s: float | None,
             rows: np.ndarray) -> float | None:
        """Predict the state at the end of the delay, then write ``M``, ``h`` (net of the
        estimate) and the barrier rows there into ``mass``, ``bias`` and ``rows``.

        ``mass`` and ``bias`` hold ``M`` and ``h - d_hat`` at the measured ``(q, v)`` on entry.
        Returns the smallest barrier at the predicted state, or None (nothing changed) when
        the torques acting over the delay are not all known yet (after a reset or a rejected
        input) or the prediction is not finite.
        """
        pieces = observer.acting_ahead(self.horizon_s, period_s)
        if not pieces:
            return None
        q_ahead, v_ahead = self.state[0], self.state[1]
        q_ahead[:] = q
        v_ahead[:] = v
        disturbance = observer.disturbance
        for duration, torque in pieces:
            # M and h frozen at the measurement: the rollouts that size the margin predict
            # the same way, so what this misses is in the margin.
            accel = self._dyn.nominal_acceleration(q, v, torque, mass, bias, disturbance)
            q_ahead += duration * v_ahead + (0.5 * duration * duration) * accel
            v_ahead += duration * accel
        if not math.isfinite(float(q_ahead @ q_ahead + v_ahead @ v_ahead)):
            return None
        stop_at_rest(q, v, q_ahead, v_ahead, self._sticking, self.horizon_s)
        self._dyn.mass_and_bias(q_ahead, v_ahead, mass, bias)
        bias -= disturbance
        worst, _ = _kernels.barrier_rows(q_ahead, v_ahead, *self._barrier_arguments, rows,
                                         self.smallest)
        return worst


def stop_at_rest(q: np.ndarray, v: np.ndarray, q_ahead: np.ndarray, v_ahead: np.ndarray,
                 sticking: np.ndarray, horizon_s: float) -> None:
    """Joints with Coulomb friction (``sticking``) that are at rest, or whose velocity
    predicted ``horizon_s`` ahead crossed zero, are predicted at rest (in place; batches of
    shape (..., n) allowed).

    The prediction holds the friction at its direction at the measurement; friction cannot
    carry a joint through zero speed (it sticks it, or turns to oppose the new direction),
    and on a light joint with strong friction the held direction would predict a fast
    reversal that does not happen. A joint at rest is then planned as the step plans one
    (online/resting_joints.py): stuck until the torque planned now breaks it away. A joint
    that crossed is taken to have stopped where its speed, falling linearly, reached zero.
    """
    crossed = sticking & ((v == 0.0) | (v * v_ahead < 0.0))
    if not np.any(crossed):
        return
    # the time its speed took to reach zero, linearly from v to v_ahead over the horizon
    to_zero = horizon_s * np.where(crossed, v / np.where(crossed, v - v_ahead, 1.0), 0.0)
    q_ahead[...] = np.where(crossed, q + 0.5 * v * to_zero, q_ahead)
    v_ahead[...] = np.where(crossed, 0.0, v_ahead)
