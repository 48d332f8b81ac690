"""The Pinocchio backend of the dynamics (package ``pin``, optional).

:class:`PinocchioChain` builds the actuated chain as a Pinocchio model and evaluates the
mass matrix, gravity, nonlinear effects, forward and inverse dynamics and the Christoffel
symbols with Pinocchio's algorithms. :mod:`safety_filter.core.dynamics` uses it when
``pin`` is installed; the tests cross-check it against the numpy recursion.
"""

from __future__ import annotations

from typing import Any

import numpy as np


def pinocchio_available() -> bool:
    """Whether the package ``pin`` is installed."""
    try:
        import pinocchio  # noqa: F401
    except ImportError:
        return False
    return True


class PinocchioChain:
    """The chain built as a Pinocchio model: the accelerated backend of
    :class:`~safety_filter.core.dynamics.Dynamics`.

    ``chain`` holds the chain's arrays with the payload merged into the last body
    (``n``, ``rotation``, ``translation``, ``axis``, ``prismatic``, ``mass``, ``com``,
    ``inertia``, ``gravity``; the dynamics module's ``_ChainArrays``).
    """

    def __init__(self, chain: Any) -> None:
        import pinocchio as pin

        self._pin = pin
        model = pin.Model()
        parent = 0
        for i in range(chain.n):
            placement = pin.SE3(chain.rotation[i], chain.translation[i])
            joint = (pin.JointModelPrismaticUnaligned(chain.axis[i]) if chain.prismatic[i]
                     else pin.JointModelRevoluteUnaligned(chain.axis[i]))
            parent = model.addJoint(parent, joint, placement, f'joint_{i}')
            model.appendBodyToJoint(
                parent, pin.Inertia(float(chain.mass[i]), chain.com[i], chain.inertia[i]),
                pin.SE3.Identity())
        model.gravity.linear = chain.gravity
        self.model = model
        self.data = model.createData()
        # A gravity-free copy for the velocity and acceleration terms alone.
        self.model_free = model.copy()
        self.model_free.gravity.linear = np.zeros(3)
        self.data_free = self.model_free.createData()
        self._zero = np.zeros(chain.n)
        self._unit = np.eye(chain.n)
        # crba fills the upper triangle only; the lower one is mirrored from it.
        self._lower = np.tril_indices(chain.n, -1)

    def mass_matrix(self, q: np.ndarray) -> np.ndarray:
        mass = np.array(self._pin.crba(self.model, self.data, q))
        mass[self._lower] = mass.T[self._lower]
        return mass

    def mass_matrix_batch(self, q: np.ndarray) -> np.ndarray:
        """``M(q)`` for ``q`` of shape ``(m, n)`` -> ``(m, n, n)``."""
        out = np.empty(q.shape + q.shape[-1:])
        crba = self._pin.crba
        for index, row in enumerate(q):
            out[index] = crba(self.model, self.data, row)
        rows, columns = self._lower
        out[:, rows, columns] = out[:, columns, rows]
        return out

    def gravity(self, q: np.ndarray) -> np.ndarray:
        return np.array(self._pin.computeGeneralizedGravity(self.model, self.data, q))

    def nonlinear(self, q: np.ndarray, v: np.ndarray) -> np.ndarray:
        return np.array(self._pin.nonLinearEffects(self.model, self.data, q, v))

    def forward(self, q: np.ndarray, v: np.ndarray, u: np.ndarray) -> np.ndarray:
        return np.array(self._pin.aba(self.model, self.data, q, v, u))

    def rnea(self, q: np.ndarray, v: np.ndarray, a: np.ndarray, with_gravity: bool
             ) -> np.ndarray:
        if with_gravity:
            return self._pin.rnea(self.model, self.data, q, v, a)
        return self._pin.rnea(self.model_free, self.data_free, q, v, a)

    def christoffel(self, q: np.ndarray) -> np.ndarray:
        # Pinocchio's Coriolis matrix is built from the same Christoffel symbols
        # (C_ij = sum_k Gamma_ijk v_k), so a unit velocity along joint k gives Gamma[:, :, k].
        n = len(q)
        gamma = np.empty((n, n, n))
        for k in range(n):
            gamma[:, :, k] = self._pin.computeCoriolisMatrix(
                self.model_free, self.data_free, q, self._unit[k])
        return gamma
