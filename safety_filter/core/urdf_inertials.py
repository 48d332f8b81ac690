"""The inertial checks of a URDF chain, and the URDF's joint frames and axes.

A link's ``<inertial>`` must be physical (a positive semidefinite tensor whose principal
moments satisfy the triangle inequality; a massless link has none), and every chain joint
must move some inertia, or the joint-space mass matrix is singular
(:func:`check_bodies_move_inertia`). Used by :mod:`safety_filter.core.urdf_reader`.
"""

from __future__ import annotations

import math
from collections.abc import Mapping, Sequence
from typing import Any

import numpy as np

from safety_filter.core.spatial_algebra import inertia_about_origin, rpy_to_matrix
from safety_filter.errors import InvalidInertia, RobotDescriptionError

INERTIA_TOLERANCE = 1e-9  # relative slack for the triangle inequality of principal moments


def urdf_origin(element: Any) -> tuple[np.ndarray, np.ndarray]:
    """Rotation and translation of a URDF <origin> (identity when absent)."""
    if element is None:
        return np.eye(3), np.zeros(3)
    xyz = np.array(element.xyz if element.xyz is not None else [0, 0, 0], dtype=float)
    rpy = np.array(element.rpy if element.rpy is not None else [0, 0, 0], dtype=float)
    return rpy_to_matrix(rpy), xyz


def joint_axis(joint: Any) -> np.ndarray:
    axis = np.array(joint.axis if joint.axis is not None else [1.0, 0.0, 0.0], dtype=float)
    norm = float(np.linalg.norm(axis))
    if not math.isfinite(norm) or norm < 1e-9:
        raise RobotDescriptionError(f'joint {joint.name!r} has a zero or invalid axis {axis}')
    return axis / norm


def validated_inertial(link: Any) -> tuple[float, np.ndarray, np.ndarray]:
    """Mass, centre of mass and inertia about it, in the link frame; checks physics.

    A massless link (mass 0, a frame such as a flange or a tool point) is valid when its
    inertia tensor is zero. A link with mass needs a positive semidefinite inertia whose
    principal moments satisfy the triangle inequality; a point mass (zero inertia) is valid.
    """
    inertial = link.inertial
    mass = inertial.mass
    try:
        mass = float(mass)
    except (TypeError, ValueError):
        raise InvalidInertia(link.name, f'mass must be a finite number >= 0, got {mass}') \
            from None
    if not math.isfinite(mass) or mass < 0.0:
        raise InvalidInertia(link.name, f'mass must be a finite number >= 0, got {mass}')
    if inertial.inertia is None:
        raise InvalidInertia(link.name, 'the <inertial> has no <inertia>')
    inertia = np.array(inertial.inertia.to_matrix(), dtype=float)
    if not np.all(np.isfinite(inertia)):
        raise InvalidInertia(link.name, 'the inertia tensor has non-finite entries')
    rotation, com = urdf_origin(inertial.origin)
    if mass == 0.0:
        if np.any(inertia != 0.0):
            raise InvalidInertia(
                link.name, 'mass is 0 but the inertia tensor is not zero: a massless link '
                'has no rotational inertia (give its mass, or zero its inertia)')
        return 0.0, com, np.zeros((3, 3))
    principal = np.linalg.eigvalsh(inertia)
    slack = INERTIA_TOLERANCE * float(np.abs(principal).sum())
    if principal[0] < -slack:
        raise InvalidInertia(
            link.name, f'the inertia tensor is not positive semidefinite '
            f'(principal moments {np.array2string(principal, precision=6)} kg m^2)')
    # Principal moments of a real body satisfy I1 + I2 >= I3 (mass distribution has
    # non-negative second moments along each principal axis).
    if principal[0] + principal[1] < principal[2] - slack:
        raise InvalidInertia(
            link.name, 'the principal moments break the triangle inequality '
            f'({principal[0]:.6g} + {principal[1]:.6g} < {principal[2]:.6g} kg m^2)')
    return mass, com, rotation @ inertia @ rotation.T


def _motion_in_body(joint: Any) -> np.ndarray:
    """Spatial motion axis (angular; linear at the origin) of a joint in its child frame."""
    axis = joint_axis(joint)
    if joint.type == 'prismatic':
        return np.concatenate([np.zeros(3), axis])
    return np.concatenate([axis, np.zeros(3)])


def check_bodies_move_inertia(
    selected: list[Any],
    placements: Mapping[int, tuple[np.ndarray, np.ndarray]],
    body_mass: Sequence[float],
    body_com: Sequence[np.ndarray],
    body_inertia: Sequence[np.ndarray],
) -> None:
    """Refuse a chain whose joint-space mass matrix could be singular (massless bodies).

    The rule, for the merged body ``k`` that chain joint ``k`` moves (its child link and
    everything rigidly attached to it through fixed or locked joints), from the base out:

    (a) the body has inertia along its own joint's motion: for a prismatic joint, mass > 0;
        for a revolute joint, a moment of inertia about the joint's axis line > 0; or
    (b) it has none (a massless link between two joints, or a point mass on the axis), and
        the next body has a positive definite spatial inertia (mass > 0 and a positive
        definite rotational inertia about its centre of mass) while the next joint's motion
        axis is not parallel to this joint's (not coaxial revolute joints, not parallel
        prismatic ones); joint ``k + 1`` is then settled too and the check goes on at
        ``k + 2``.

    Why it is sufficient: the mass matrix is singular only if some joint velocity ``qd != 0``
    gives zero kinetic energy, i.e. every body's spatial velocity ``V_k`` lies in the null
    space of its spatial inertia. Going out from the fixed base with ``qd_1 .. qd_(k-1) = 0``,
    ``V_k = S_k qd_k``, so (a) forces ``qd_k = 0``; under (b), ``V_(k+1) = S_k qd_k +
    S_(k+1) qd_(k+1)`` must vanish, and since both axes are fixed in body ``k`` and
    independent, ``qd_k = qd_(k+1) = 0``. Both tests use quantities fixed in body ``k``,
    so the result holds in every configuration. Outboard inertia further away is not used:
    with two or more massless bodies in a row the mass matrix can be singular in some
    configurations only (a wrist whose first and last axes line up), which a structural
    check cannot rule out. "Has mass or outboard inertia about the axis" is not enough:
    two coaxial revolute joints with a massless body between them move the outboard body
    the same way, and a point mass on a revolute axis has mass but no inertia about it.
    """
    n = len(selected)
    k = 0
    while k < n:
        joint = selected[k]
        mass = float(body_mass[k])
        com = np.asarray(body_com[k])
        inertia = np.asarray(body_inertia[k])
        if joint.type == 'prismatic':
            own = mass
            scale = mass
        else:
            axis = joint_axis(joint)
            about_origin = inertia_about_origin(mass, com, inertia)
            own = float(axis @ about_origin @ axis)
            scale = float(np.trace(about_origin))
        if own > 0.0 and own > INERTIA_TOLERANCE * scale:
            k += 1
            continue
        if k + 1 < n and _positive_definite_body(body_mass[k + 1], body_inertia[k + 1]):
            rotation, translation = placements[k + 1]
            motion = _motion_in_body(selected[k + 1])
            angular = rotation @ motion[:3]
            linear = rotation @ motion[3:] + np.cross(translation, angular)
            pair = np.column_stack([_motion_in_body(joint), np.concatenate([angular, linear])])
            if np.linalg.matrix_rank(pair, tol=1e-9) == 2:
                k += 2
                continue
        what = ('mass' if joint.type == 'prismatic'
                else 'moment of inertia about the joint axis')
        raise InvalidInertia(
            joint.child,
            f'moved by joint {joint.name!r}, but neither this link nor anything rigidly '
            f'attached to it has {what} (massless links or no <inertial>), and the next '
            'chain body does not take it up (it needs a positive definite inertia and a '
            'joint axis not parallel to this one): the joint would move nothing and the '
            'mass matrix would be singular. Give the link its mass and inertia, or leave '
            'the joint out of the chain')


def _positive_definite_body(mass: float, inertia: np.ndarray) -> bool:
    """Mass > 0 and a positive definite rotational inertia about the centre of mass."""
    if not mass > 0.0:
        return False
    principal = np.linalg.eigvalsh(np.asarray(inertia))
    return bool(principal[0] > INERTIA_TOLERANCE * max(float(principal.sum()), 0.0)
                and principal[0] > 0.0)
