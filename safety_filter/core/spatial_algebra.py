"""Small rigid-body helpers shared by the model loader and the dynamics (private).

Rotations act on column vectors: ``p_parent = R @ p_child + t``. All functions accept
leading batch dimensions.
"""

from __future__ import annotations

import numpy as np


def rpy_to_matrix(rpy: np.ndarray) -> np.ndarray:
    """Rotation matrix of URDF roll-pitch-yaw angles (fixed axes x, y, z: R = Rz Ry Rx)."""
    roll, pitch, yaw = (float(x) for x in rpy)
    cr, sr = np.cos(roll), np.sin(roll)
    cp, sp = np.cos(pitch), np.sin(pitch)
    cy, sy = np.cos(yaw), np.sin(yaw)
    return np.array([
        [cy * cp, cy * sp * sr - sy * cr, cy * sp * cr + sy * sr],
        [sy * cp, sy * sp * sr + cy * cr, sy * sp * cr - cy * sr],
        [-sp, cp * sr, cp * cr],
    ])


def axis_angle_matrix(axis: np.ndarray, angle: np.ndarray) -> np.ndarray:
    """Rodrigues' formula, batched over ``angle`` (shape ``(...)``) for one unit ``axis``."""
    angle = np.asarray(angle, dtype=float)
    x, y, z = axis
    skew = np.array([[0.0, -z, y], [z, 0.0, -x], [-y, x, 0.0]])
    s = np.sin(angle)[..., None, None]
    c = np.cos(angle)[..., None, None]
    return np.eye(3) + s * skew + (1.0 - c) * (skew @ skew)


def inertia_about_origin(mass: float, com: np.ndarray, inertia_com: np.ndarray) -> np.ndarray:
    """Rotational inertia about the frame origin (parallel-axis theorem)."""
    return inertia_com + mass * (float(com @ com) * np.eye(3) - np.outer(com, com))


def combine_inertias(
    parts: list[tuple[float, np.ndarray, np.ndarray]],
) -> tuple[float, np.ndarray, np.ndarray]:
    """Sum rigid bodies given as (mass, com, inertia about com), all in one frame."""
    mass = sum(m for m, _, _ in parts)
    if mass <= 0.0:
        return 0.0, np.zeros(3), np.zeros((3, 3))
    com = sum(m * c for m, c, _ in parts) / mass
    inertia_origin = sum(inertia_about_origin(m, c, i) for m, c, i in parts)
    # Shift back from the origin to the combined centre of mass.
    inertia_com = inertia_origin - mass * (float(com @ com) * np.eye(3) - np.outer(com, com))
    return mass, com, 0.5 * (inertia_com + inertia_com.T)
