"""The filter's disturbance observer: the torque the model misses, from the measured motion.

The arm obeys ``M a + h = u + d`` in the filter's model, with ``d`` the torque that the model
misses (payload, inertia and friction errors, the driver's torque error). Over the last
period the measured velocity change gives ``d ~ M (v - v_prev) / T + h - u_prev``, with
``M`` and the rigid-body part of ``h`` taken where the period began (where its torque was
planned) and the friction at the new velocity (as the next plan counts it); a
first-order low-pass with the observer's time constant smooths it (its noise is
``M * velocity noise / time constant``, as for a momentum observer). The filter takes the
estimate out of ``h``, so ``u = M a + h - d`` gives the arm the acceleration ``a`` the
barrier bounds were checked for (docs/method.md).
"""

from __future__ import annotations

import math

import numpy as np

from safety_filter.core.model_uncertainty import state_disturbance_bound
from safety_filter.online import kernels as _kernels
from safety_filter.online.step_dynamics import StepDynamics

MAX_OBSERVER_GAIN = 1.0 / 3.0  # the disturbance observer's largest update per step
LAG_RATE_SPAN = 16.0  # the estimate's rate is low-passed over this many time constants


class DisturbanceObserver:
    """The estimate ``d`` and what it needs from step to step.

    Args:
        time_constants: the low-pass time constant per joint [s] (> 0).
        delay_periods: the declared delay between a step and its torque acting, in control
            periods of the certificate (``control_period_s``). It is kept as a time: at
            another loop period the torque that acted over the last period is the
            time-weighted mix of the two sent around that delay.
        torque_limit: the torque box [N m]; the estimate stays inside it.
        dynamics: the filter's step dynamics (friction and gravity for the bound, its
            friction for the residual), or None (no model friction, no bound).
        heavier: the same model one kilogram heavier (the payload's share of the bound), or
            None when ``disturbance_parameters`` is None.
        disturbance_parameters: ``(constant, link_error, payload_error)`` of the certificate
            (``state_disturbance_bound``): the range the estimate is kept in, where the
            certificate's authority accounts for it; None: the torque box only.
        control_period_s: the period assumed when a step gives none [s].
    """

    def __init__(self, time_constants: np.ndarray, delay_periods: int,
                 torque_limit: np.ndarray, dynamics: StepDynamics | None,
                 heavier: StepDynamics | None,
                 disturbance_parameters: tuple[np.ndarray, np.ndarray, np.ndarray] | None,
                 control_period_s: float) -> None:
        n = len(torque_limit)
        self.time_constants = time_constants
        self.delay_periods = int(delay_periods)
        self.control_period_s = float(control_period_s)
        self._torque_limit = np.array(torque_limit, dtype=float)
        self._plausible = 2.0 * self._torque_limit
        self._dyn = dynamics
        self._heavier = heavier
        self._parameters = disturbance_parameters
        self.disturbance = np.zeros(n)  # estimated torque beyond the model [N m]
        # How far the estimate trails a disturbance that drifts at its recent rate [N m]:
        # the low-pass's lag times its low-passed rate (docs/method.md, "Drift").
        self.lag = np.zeros(n)
        self._rate = np.zeros(n)  # low-passed rate of the estimate [N m/s]
        self._before = np.empty(n)
        # every joint's rate over the slowest joint's span: a light joint's fast estimate
        # reads stick-slip and coupling as rate, and its own lag is short anyway
        self._slowest = float(np.max(time_constants)) if n else 0.0
        self.delay_s = self.delay_periods * self.control_period_s
        # full torques sent, oldest first; two more than the delay at the certified period
        self._sent = np.zeros((self.delay_periods + 2, n))
        self._applied = np.zeros_like(self._sent)  # the same with the breakaway torques
        self._acted = np.empty(n)
        self._count = 0  # torques recorded since the last restart
        self._v = np.zeros(n)  # velocity at the last step
        # M and h at the last step: the period just ended started there, and the plan for it
        # was made with them (the residual over the period is measured against that plan).
        self._mass = np.zeros((n, n))
        self._bias = np.zeros(n)
        self._friction = (dynamics.friction if dynamics is not None and dynamics.has_friction
                          else None)
        self._valid = False  # _v belongs to the step before this one
        self._step = np.empty(n)

    def reset(self) -> None:
        """Forget the estimate and the history."""
        self.disturbance[:] = 0.0
        self._rate[:] = 0.0
        self.lag[:] = 0.0
        self.restart()

    def restart(self) -> None:
        """Start the history afresh (invalid input, a confirmed position jump); the estimate
        is kept."""
        self._valid = False
        self._count = 0

    def observe(self, q: np.ndarray, v: np.ndarray, mass: np.ndarray, bias: np.ndarray,
                period_s: float | None) -> None:
        """Update the estimate at ``(q, v)`` and take it out of ``bias`` (in place).

        ``mass`` and ``bias`` are ``M`` and ``h`` at the state; ``period_s`` the time since the
        last step (None: the control period).
        """
        period = self.control_period_s if period_s is None else float(period_s)
        usable = self._valid and math.isfinite(period) and period > 0.0
        self._before[:] = self.disturbance
        updated = False
        if usable:
            # Over the period just ended, the torque sent ``whole`` steps before the last one
            # acted for the last ``1 - part`` of it and the one before for the first ``part``.
            whole, part = divmod(self.delay_s / period, 1.0)
            whole = int(whole)
            if whole + 2 > len(self._sent):  # a loop faster than certified: the oldest kept
                whole, part = len(self._sent) - 2, 1.0
            usable = self._count > whole + (part > 0.0)
        if usable:
            acted = self._acted
            np.multiply(self._sent[-1 - whole], 1.0 - part, out=acted)
            if part > 0.0:
                acted += part * self._sent[-2 - whole]
            step = self._step
            np.subtract(v, self._v, out=step)
            step /= period
            measured = self._mass @ step
            measured += self._bias
            measured -= acted
            if self._friction is not None:
                # Friction as the next plan will count it, at the new velocity: where a
                # joint reversed or stuck within the period, the start's direction would put
                # twice its Coulomb friction into the estimate, which the next plan (already
                # counting the new direction) would then apply wrongly; and with a delay the
                # next command acts from a later velocity still, which a damped joint's
                # viscous torque follows within the period.
                measured += self._friction(v)
                measured -= self._friction(self._v)
            # A torque beyond twice the box cannot act on the arm: the two samples are not
            # one period apart (a gap, a reset, a replayed jump); skip them.
            if _kernels.within_box(measured, self._plausible):
                # At most 1/3 (a time constant of at least two of the actual periods): then
                # a delay one period longer or shorter than declared cannot make the
                # estimate oscillate (the loop's poles stay inside the unit circle).
                gain = np.minimum(period / (period + self.time_constants), MAX_OBSERVER_GAIN)
                self.disturbance += gain * (measured - self.disturbance)
                updated = True
        # Never beyond what a plant of the declared set can need at this state (so the
        # certified authority holds), and never beyond the torque box.
        limit = self.limit(q, v, bias)
        np.clip(self.disturbance, -limit, limit, out=self.disturbance)
        if updated:
            # A first-order low-pass trails a ramp of rate r by r T (1 - l) / l (its time
            # constant when the gain is not capped); the filter narrows its bounds by it.
            rate = (self.disturbance - self._before) / period
            span = LAG_RATE_SPAN * self._slowest
            self._rate += period / (period + span) * (rate - self._rate)
            np.multiply(self._rate, period * (1.0 - gain) / gain, out=self.lag)
        self._v[:] = v
        self._mass[:] = mass
        self._bias[:] = bias
        bias -= self.disturbance

    def limit(self, q: np.ndarray, v: np.ndarray, bias: np.ndarray) -> np.ndarray:
        """Bound of the model error at ``(q, v)`` [N m] (``state_disturbance_bound``)."""
        if self._parameters is None or self._heavier is None:
            return self._torque_limit
        constant, link_error, payload_error = self._parameters
        rigid = bias - self._dyn.friction(v)
        payload = self._heavier.rigid_bias(q, v) - rigid
        limit = state_disturbance_bound(constant, link_error, payload_error,
                                        self._dyn.gravity(q), rigid, payload)
        return np.minimum(limit, self._torque_limit)

    def acting_ahead(self, horizon_s: float, period_s: float | None
                     ) -> list[tuple[float, np.ndarray]] | None:
        """The torques that act from now over the next ``horizon_s`` (the declared delay):
        ``(duration [s], full torque)`` pieces in time order, with the loop period
        ``period_s`` (None: the control period) assumed to last. The torque sent ``m`` steps
        ago acts from ``horizon - m P`` to ``horizon - (m - 1) P`` after now. None when one of
        them was sent before the last restart (or never); views into the history."""
        period = self.control_period_s if period_s is None else float(period_s)
        if not (math.isfinite(period) and period > 0.0):
            return None
        pieces = []
        kept = len(self._sent)
        for ago in range(1, kept + 1):
            if ago > self._count:
                return None
            end = horizon_s - (ago - 1) * period
            # a loop faster than certified: the oldest torque kept stands for older ones
            start = max(0.0, horizon_s - ago * period) if ago < kept else 0.0
            pieces.append((end - start, self._applied[-ago]))
            if start <= 0.0:
                break
        pieces.reverse()
        return pieces

    def sent(self, torque_full: np.ndarray, breakaway: np.ndarray | None = None) -> None:
        """Record the full torque sent at this step (it acts over the next period), without
        the share ``breakaway`` that starts resting joints (which their static friction
        takes: the residual counts the friction at the new velocity); the prediction over
        the delay gets all of it."""
        for history, torque in ((self._sent, torque_full), (self._applied, torque_full)):
            if len(history) > 1:
                history[:-1] = history[1:]
            history[-1] = torque
        if breakaway is not None:
            self._sent[-1] -= breakaway
        self._count += 1
        self._valid = True


def narrow_by_lag(rows: np.ndarray, lag: np.ndarray, authority: np.ndarray) -> None:
    """Narrow the acceleration bounds ``rows[4]`` (upper) and ``rows[5]`` (lower) in place
    by the acceleration ``lag`` the estimate trails the model error by, each on the side it
    pushes toward (docs/method.md, "Drift").

    Only the side the lag pushes toward moves, and never past the lower bound (the upper
    bound) nor beyond the authority ``e``: the interval stays inside the original and keeps
    a point of ``[-e, e]`` wherever it had one, so the certificate's argument (any
    acceleration within the bounds keeps the state in S; the clamp is feasible) still holds.
    """
    upper, lower = rows[4], rows[5]
    floor = np.minimum(upper, np.maximum(lower, -authority))
    np.maximum(upper - np.maximum(lag, 0.0), floor, out=upper)
    ceiling = np.maximum(lower, np.minimum(upper, authority))
    np.minimum(lower + np.maximum(-lag, 0.0), ceiling, out=lower)
