"""The dynamics the filter step needs, computed into preallocated arrays.

:class:`StepDynamics` gives ``M(q)``, ``h(q, v)``, ``g(q)`` and ``M^-1 (u - h)`` for one
state at the control rate: with Pinocchio behind :class:`Dynamics` it calls Pinocchio's
algorithms directly into the filter's buffers (:attr:`Dynamics.pinocchio_handles`); else it
uses :class:`Dynamics`' own methods. :func:`kernel_input` prepares an input array for the
compiled kernels.
"""

from __future__ import annotations

from typing import Any

import numpy as np

from safety_filter.core.dynamics import Dynamics, hold_mass_matrix
from safety_filter.core.friction import friction_torque
from safety_filter.online import kernels as _kernels


class StepDynamics:
    """``M(q)`` and ``h(q, v)`` written into preallocated arrays (the filter step's).

    With Pinocchio behind :class:`Dynamics` it calls CRBA and the nonlinear effects directly:
    :meth:`Dynamics.mass_and_bias` returns new arrays and symmetrises with ``np.triu`` twice,
    which costs several times the dynamics themselves at a 7-joint step. The tests check
    that both give the same numbers.
    """

    def __init__(self, dynamics: Dynamics, hold_s: float | None = None,
                 lookahead_s: float | None = None,
                 position_limits: tuple[np.ndarray, np.ndarray] | None = None) -> None:
        self.dynamics = dynamics
        # the accelerations are means over this hold (hold_mass_matrix), if set
        self.hold_s = hold_s
        n = dynamics.n
        # M and h are evaluated this far ahead along the velocity, within the position
        # limits (the certificate's lookahead_s; docs/method.md, "Lookahead")
        self.lookahead_s = float(lookahead_s or 0.0)
        if self.lookahead_s > 0.0 and position_limits is None:
            raise ValueError('a lookahead needs the position limits')
        self._limits = position_limits
        self._evaluated = np.zeros(n)  # the position of the last mass_and_bias call
        self._zero = np.zeros(n)
        self._viscous = np.array(dynamics.model.viscous_friction)
        self._coulomb = np.array(dynamics.model.coulomb_friction)
        self._has_friction = bool(np.any(self._viscous != 0.0) or np.any(self._coulomb != 0.0))
        self._friction = np.zeros(n)
        handles = dynamics.pinocchio_handles
        self._pin: Any = None
        if handles is not None:
            self._pin, self._pin_model, self._pin_data = handles

    @property
    def accelerated(self) -> bool:
        """True when the direct Pinocchio path is used."""
        return self._pin is not None

    def evaluation_position(self, q: np.ndarray, v: np.ndarray) -> np.ndarray:
        """Where :meth:`mass_and_bias` evaluates ``M`` and ``h`` for the state ``(q, v)``:
        ``q + lookahead v`` within the position limits (``q`` itself without a lookahead);
        kept as :attr:`evaluated`."""
        evaluated = self._evaluated
        if self.lookahead_s > 0.0:
            np.multiply(v, self.lookahead_s, out=evaluated)
            evaluated += q
            np.clip(evaluated, self._limits[0], self._limits[1], out=evaluated)
        else:
            evaluated[:] = q
        return evaluated

    @property
    def evaluated(self) -> np.ndarray:
        """The position at which the last :meth:`mass_and_bias` call evaluated ``M`` and
        ``h``."""
        return self._evaluated

    def mass_and_bias(self, q: np.ndarray, v: np.ndarray, mass_out: np.ndarray,
                      bias_out: np.ndarray) -> None:
        """``M`` and ``h`` for the state ``(q, v)`` into the buffers: at
        :meth:`evaluation_position` and ``v``, ``M`` as the hold's (``hold_mass_matrix``)
        when the accelerations are means over it."""
        q = self.evaluation_position(q, v)
        if self._pin is None:
            mass, bias = self.dynamics.mass_and_bias(q, v)
            mass_out[...] = mass
            bias_out[...] = bias
        else:
            _kernels.mirror_upper(self._pin.crba(self._pin_model, self._pin_data, q), mass_out)
            bias_out[...] = self._pin.nonLinearEffects(self._pin_model, self._pin_data, q, v)
            if self._has_friction:
                _kernels.add_friction(v, self._viscous, self._coulomb, self._friction,
                                      bias_out)
        if self.hold_s is not None:
            mass_out[...] = hold_mass_matrix(mass_out, self._viscous, self.hold_s)
        if self.lookahead_s > 0.0:
            # the velocity ahead too: h(q_ahead, v + c a) = h(q_ahead, v) + c J a to first
            # order, J = d(C v)/dv; the torque for a is then the one for the hold's middle
            mass_out += self.lookahead_s * self.coriolis_jacobian(q, v)

    def coriolis_jacobian(self, q: np.ndarray, v: np.ndarray) -> np.ndarray:
        """``d(C(q, v) v)/dv`` (``2 Gamma(q) v``; Pinocchio's RNEA derivative when it is
        behind the dynamics)."""
        if self._pin is None:
            return 2.0 * self.dynamics.coriolis_matrix(q, v)
        self._pin.computeRNEADerivatives(self._pin_model, self._pin_data, q, v, self._zero)
        return self._pin_data.dtau_dv

    def nominal_acceleration(self, q: np.ndarray, v: np.ndarray, torque: np.ndarray,
                             mass: np.ndarray, bias: np.ndarray,
                             disturbance: np.ndarray | None = None) -> np.ndarray:
        """``M^-1 (torque - h)`` at the state of the last :meth:`mass_and_bias` call (``bias``
        already net of ``disturbance``, which the Pinocchio path adds back to the torque;
        ``q`` is taken as that call's :attr:`evaluated` position).

        Pinocchio's articulated-body algorithm takes a few microseconds where
        ``np.linalg.solve`` takes tens for these sizes; friction is moved to the torque side.
        """
        if self._pin is None or self.hold_s is not None or self.lookahead_s > 0.0:
            return np.linalg.solve(mass, torque - bias)
        effort = torque - self._friction if self._has_friction else torque
        if disturbance is not None:
            effort = effort + disturbance
        return np.array(self._pin.aba(self._pin_model, self._pin_data, self._evaluated, v,
                                      effort))

    def rigid_bias(self, q: np.ndarray, v: np.ndarray) -> np.ndarray:
        """``g(q) + C(q, v) v`` without friction."""
        if self._pin is None:
            return self.dynamics.gravity_torque(q) + self.dynamics.coriolis_torque(q, v)
        return np.array(self._pin.nonLinearEffects(self._pin_model, self._pin_data, q, v))

    @property
    def has_friction(self) -> bool:
        """Whether the model has any viscous or Coulomb friction."""
        return self._has_friction

    def friction(self, v: np.ndarray) -> np.ndarray:
        """The model's friction torque at ``v``."""
        return friction_torque(v, self._viscous, self._coulomb)

    def gravity(self, q: np.ndarray) -> np.ndarray:
        if self._pin is None:
            return self.dynamics.gravity_torque(q)
        return np.array(self._pin.computeGeneralizedGravity(self._pin_model, self._pin_data, q))


def kernel_input(values: Any) -> np.ndarray:
    """``values`` as a writable C-contiguous float64 array (copied only if it is not one):
    the kernels are compiled for that array type, and any other type would cost a
    compilation inside the control loop."""
    # Not np.ascontiguousarray: it makes a scalar a (1,) array, which would then pass the
    # shape check of a one-joint arm.
    array = np.asarray(values, dtype=float)
    if array.flags.c_contiguous and array.flags.writeable:
        return array
    return array.copy(order='C')
