"""Quantities affine in the payload mass, evaluated for many payload masses at once.

The payload is a point mass on the tip link; the rigid-body dynamics is linear in the
inertial parameters, so ``M(q)``, ``g(q)``, the Christoffel symbols and any rigid-body
inverse dynamics ``M a + C v + g`` are affine in the payload mass ``m``:
``f(m) = f(0) + m (f(1) - f(0))``. Evaluating ``f`` at zero and unit payload once gives it
for every mass, where a payload per configuration would otherwise need one model each.
Certification's dynamics bounds and its batched plant use this.
"""

from __future__ import annotations

from collections.abc import Callable

import numpy as np

from safety_filter.core.robot_model import RobotModel


def payload_affine_batch(function: Callable[..., np.ndarray], model: RobotModel,
                         *arrays: np.ndarray, payload_mass: np.ndarray | float
                         ) -> np.ndarray:
    """``function(model, *arrays, payload_mass=m)`` with a payload mass ``m`` [kg] per
    configuration, from two evaluations (zero and unit payload).

    Args:
        function: a batched function of the dynamics taking ``payload_mass=`` (e.g.
            ``mass_matrix_batch``, ``christoffel_batch``, ``rnea_batch``) that is affine in
            the payload mass.
        model: the robot model.
        arrays: its batched arguments, leading axes ``payload_mass.shape``.
        payload_mass: payload masses, shape of the batch (or a scalar).
    Returns:
        The values, shape of ``function``'s result.
    """
    mass = np.asarray(payload_mass, dtype=float)
    base = function(model, *arrays, payload_mass=0.0)
    if not np.any(mass != 0.0):
        return base
    unit = function(model, *arrays, payload_mass=1.0) - base
    return base + mass.reshape(mass.shape + (1,) * (base.ndim - mass.ndim)) * unit
