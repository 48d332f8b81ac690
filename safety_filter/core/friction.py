"""Joint friction: viscous and Coulomb torque, and the stick-slip law of Coulomb friction.

One home for the friction formulas that the dynamics, the filter, certification, the
falsifier and the simulator use. Per joint, with viscous coefficient ``D_i`` [N m s/rad]
and Coulomb level ``f_c_i`` [N m]::

    friction_i = D_i v_i + f_c_i s_i,      s_i = sign(v_i), or a held direction

(the equation of motion is ``M a + C v + g + friction = u``; ``docs/method.md``).

The model of the filter and of certification takes ``s = sign(v)``. The simulator treats
Coulomb friction as the physical stick-slip law instead (:data:`COULOMB_LAWS`): a joint at
rest sticks while its friction can hold it and breaks away otherwise, decided for all the
joints at rest together by :func:`rest_accelerations`.

The filter's compiled kernel (``safety_filter.online.kernels.add_friction``) keeps an inline
copy of :func:`friction_torque` (numba compiles it into the control step without a call into
Python); ``test/core/test_dynamics.py`` checks the two agree.
"""

from __future__ import annotations

import numpy as np

# How the simulator treats Coulomb friction: 'stick_slip' (the physical law, the default) or
# 'sign' (f_c sign(v) as the model has it; chatters near zero speed under a fixed step).
COULOMB_LAWS = ('stick_slip', 'sign')


def friction_torque(v: np.ndarray, viscous: np.ndarray, coulomb: np.ndarray,
                    direction: np.ndarray | None = None) -> np.ndarray:
    """Viscous plus Coulomb friction ``D v + f_c s`` [N m], per joint (batched over leading
    axes of ``v``).

    Args:
        v: joint velocities [rad/s or m/s], shape (..., n).
        viscous, coulomb: ``D`` [N m s/rad] and ``f_c`` [N m] per joint, shape (n,).
        direction: ``s``, the direction Coulomb friction opposes (held over a step, e.g.);
            None: ``sign(v)``.
    """
    v = np.asarray(v, dtype=float)
    s = np.sign(v) if direction is None else direction
    return viscous * v + coulomb * s


def rest_accelerations(mass: np.ndarray, rest_force: np.ndarray, coulomb: np.ndarray,
                       at_rest: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """Accelerations of an arm some of whose joints are at rest, under Coulomb friction.

    Solves ``M a = b - f`` where ``b`` is every torque on the joints but the Coulomb
    friction of the joints at rest (drive, gravity, Coriolis, damping, and the friction of
    the moving joints), and for each joint ``i`` at rest either it sticks (``a_i = 0`` and
    the friction it needs, ``|f_i| <= f_c_i``) or it slips (``f_i = f_c_i sign(a_i)``).
    This is the optimality condition of the strictly convex problem
    ``min 1/2 a^T M a - b^T a + sum_rest f_c_i |a_i|``, so the answer is unique; it is
    found by an active set: every joint at rest stuck at first, the one whose holding
    torque exceeds its Coulomb level most released in the direction of that torque, a
    released joint that would accelerate against its friction stuck again.

    Args:
        mass: ``M(q)``, shape (n, n), positive definite.
        rest_force: ``b``, shape (n,) [N m].
        coulomb: Coulomb friction levels ``f_c``, shape (n,) [N m].
        at_rest: joints at rest (zero velocity), shape (n,) bool.

    Returns:
        ``(a, direction)``: the accelerations [rad/s^2] and, per joint at rest, the sign of
        its motion (0: it sticks; +-1: it slips that way, its friction ``f_c`` against it).
    """
    n = len(rest_force)
    stuck = np.asarray(at_rest, dtype=bool) & (np.asarray(coulomb) > 0.0)
    released = np.zeros(n, dtype=bool)
    direction = np.zeros(n)
    a = np.zeros(n)
    for _ in range(4 * n + 4):  # each round changes one joint; the problem is convex
        force = rest_force - coulomb * direction
        free = ~stuck
        a = np.zeros(n)
        if free.any():
            a[free] = np.linalg.solve(mass[np.ix_(free, free)], force[free])
        # The friction a stuck joint must supply to hold it: row i of M a = b - f with a_i = 0.
        hold = force - mass @ a
        excess = np.where(stuck, np.abs(hold) - coulomb * (1.0 + 1e-12), -np.inf)
        backward = np.where(released, -direction * a, -np.inf)
        if excess.max(initial=-np.inf) > 0.0:
            i = int(np.argmax(excess))
            stuck[i], released[i], direction[i] = False, True, np.sign(hold[i])
        elif backward.max(initial=-np.inf) > 0.0:
            i = int(np.argmax(backward))
            stuck[i], released[i], direction[i] = True, False, 0.0
        else:
            break
    a[stuck] = 0.0
    return a, direction
