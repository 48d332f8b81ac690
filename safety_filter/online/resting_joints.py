"""Joints at rest under Coulomb friction, as the filter step predicts and commands them.

A joint at rest sticks while its Coulomb friction can hold it (the stick-slip law of
:mod:`safety_filter.core.friction`). The model's friction ``f_c sign(v)`` is zero there, so
without this the step would predict that a resting joint moves under any torque and plan
the other joints' torques for that motion; when the joint sticks instead, the coupling
through ``M`` moves the others differently from the plan (docs/method.md, "Joints at rest").
Two things keep the plan and the arm consistent:

* the nominal's acceleration is the stick-slip answer (:func:`rest_accelerations`): a
  resting joint whose torque its friction can hold is predicted to stay;
* a planned acceleration that starts a resting joint gets the torque that breaks it away,
  ``f_c sign(a)``: then the arm's stick-slip answer is the plan itself (a joint that slips
  feels ``f_c`` against its acceleration).

A joint is at rest where its measured speed is zero: there the model's ``f_c sign(v)`` is
zero and wrong (the friction of a joint at rest is anything up to ``f_c``); at any other
speed it is the friction the moving joint feels. (A driver that reports a joint at rest as
exactly zero speed, as a velocity deadband does, gives the step this view on a real arm.)
"""

from __future__ import annotations

import numpy as np

from safety_filter.core.friction import rest_accelerations


class RestingJoints:
    """The filter step's view of joints at rest (only for a model with Coulomb friction).

    Args:
        coulomb: the model's Coulomb friction levels ``f_c`` [N m], shape (n,).
        deadband: per joint, the planned accelerations small enough to count as none
            [rad/s^2] (the step's acceleration tolerance).
    """

    def __init__(self, coulomb: np.ndarray, deadband: np.ndarray) -> None:
        self.coulomb = np.array(coulomb, dtype=float)
        self.deadband = np.array(deadband, dtype=float)
        self._has_coulomb = self.coulomb > 0.0
        self.active = bool(self._has_coulomb.any())
        self._resting = np.zeros(len(self.coulomb), dtype=bool)
        self._any = False
        self.breakaway = np.zeros(len(self.coulomb))

    def observe(self, v: np.ndarray) -> bool:
        """Note which joints rest at the measured velocities; whether any does."""
        self.breakaway[:] = 0.0
        if not self.active:
            return False
        np.equal(v, 0.0, out=self._resting)
        self._resting &= self._has_coulomb
        self._any = bool(self._resting.any())
        return self._any

    def predicted(self, mass: np.ndarray, acceleration: np.ndarray) -> np.ndarray:
        """The stick-slip accelerations of a torque whose friction-free answer is
        ``acceleration`` (``M a`` is every torque but the resting joints' friction)."""
        if not self._any:
            return acceleration
        return rest_accelerations(mass, mass @ acceleration, self.coulomb, self._resting)[0]

    def add_breakaway(self, torque: np.ndarray, acceleration: np.ndarray) -> np.ndarray:
        """Add to ``torque`` (in place) what starts the resting joints the plan moves; the
        torques added are kept in :attr:`breakaway`."""
        self.breakaway[:] = 0.0
        if self._any:
            moving = self._resting & (np.abs(acceleration) > self.deadband)
            self.breakaway[moving] = self.coulomb[moving] * np.sign(acceleration[moving])
            torque += self.breakaway
        return torque
