"""The constructive command of the filter step and its push back toward the safe set.

:func:`constructive_acceleration` is the closed-form command (docs/method.md, the filter
step) that the filter falls back to when the QP fails or its answer does not check, and
that recovers a state outside the safe set; :func:`push_back_harder` then pushes back as
far as the torque box allows. The compiled form for one state is
:func:`safety_filter.online.kernels.constructive`.
"""

from __future__ import annotations

import numpy as np

from safety_filter.online import kernels as _kernels


def constructive_acceleration(
    acceleration_nominal: np.ndarray,
    accel_lower: np.ndarray,
    accel_upper: np.ndarray,
    authority: np.ndarray,
    upper_side_worse: np.ndarray | None = None,
) -> np.ndarray:
    """The constructive command (docs/method.md, the filter step) (and the recovery outside S).

    ``a_i = clamp(a_nom_i, max(An_i, -e_i), min(Ap_i, e_i))``. Where the interval is empty
    (only possible outside S, or with a wrong certificate) the end that pushes back toward S
    is taken, within the authority: ``max(min(Ap_i, e_i), -e_i)`` when the upper side's
    barrier is the more negative one (``upper_side_worse``), ``min(max(An_i, -e_i), e_i)``
    otherwise (and when ``upper_side_worse`` is None).

    Args:
        acceleration_nominal: ``a_nom = M^-1 (u_nom - h)`` [rad/s^2], shape (n,).
        accel_lower, accel_upper: ``An``, ``Ap`` [rad/s^2].
        authority: usable authority ``e`` [rad/s^2], positive.
        upper_side_worse: bool per joint, see above.
    """
    low = np.maximum(accel_lower, -authority)
    high = np.minimum(accel_upper, authority)
    acceleration = np.minimum(np.maximum(acceleration_nominal, low), high)
    empty = low > high
    if empty.any():
        push_down = np.maximum(high, -authority)
        push_up = np.minimum(low, authority)
        side = (np.zeros_like(empty) if upper_side_worse is None
                else np.asarray(upper_side_worse, dtype=bool))
        acceleration = np.where(empty, np.where(side, push_down, push_up), acceleration)
    return acceleration


def push_back_harder(cautious: np.ndarray, nominal: np.ndarray, accel_lower: np.ndarray,
                     accel_upper: np.ndarray, rows: np.ndarray, mass: np.ndarray,
                     bias: np.ndarray, torque_limit: np.ndarray) -> np.ndarray:
    """Outside S, where the QP cannot meet the barriers' bounds: from the constructive
    command ``cautious`` (within the certified authority, which is what every joint is
    guaranteed at once in the worst configuration) toward what the bounds ask, as far as the
    torque box allows at this state (bisection on the segment between the two).

    Args:
        cautious: the constructive acceleration within the authority [rad/s^2].
        nominal: the nominal acceleration (``cautious`` when unknown) [rad/s^2].
        accel_lower, accel_upper: ``An``, ``Ap`` [rad/s^2].
        rows: the barrier rows ``[hp; hn; bp; bn; Ap; An; sp; sn]`` of the state, (8, n).
        mass, bias: ``M`` and ``h`` at the state.
        torque_limit: the torque box [N m].
    """
    wanted = np.empty(len(cautious))
    _kernels.constructive(nominal, accel_lower, accel_upper, np.full(len(cautious), np.inf),
                          rows, wanted)

    def fits(acceleration: np.ndarray) -> bool:
        return _kernels.within_box(mass @ acceleration + bias, torque_limit)

    if not fits(cautious):
        return cautious
    if fits(wanted):
        return wanted
    step = wanted - cautious
    low, high = 0.0, 1.0
    for _ in range(12):  # to 1/4096 of the way
        middle = 0.5 * (low + high)
        if fits(cautious + middle * step):
            low = middle
        else:
            high = middle
    return cautious + low * step
