"""Rigid-body dynamics of the actuated chain: M(q), h(q, v), g(q), C(q, v), Christoffel symbols.

Equation of motion (docs/method.md)::

    M(q) a + C(q, v) v + D v + g(q) + f_c sign(v) = u,      h(q, v) = C v + D v + g + f_c sign(v)

The reference implementation is the recursive Newton-Euler algorithm in spatial-vector form
(Featherstone, *Rigid Body Dynamics Algorithms*, 2008, ch. 5), written with numpy so that it
evaluates any number of configurations at once: the certification samples thousands of them.
The mass matrix comes from the same recursion with unit accelerations (one column per joint,
all columns in one batched pass), and the Christoffel symbols of the first kind from the
velocity-quadratic part of the recursion by polarisation, so they are exact, not finite
differences.

:class:`Dynamics` is the per-step interface used by the filter, the simulator and replay. It
uses Pinocchio (package ``pin``) as an accelerated backend when it is installed and the numpy
recursion otherwise; the tests cross-check the two.
"""

from __future__ import annotations

import weakref
from typing import Any

import numpy as np

from safety_filter.core.friction import friction_torque
from safety_filter.core.pinocchio_backend import PinocchioChain, pinocchio_available
from safety_filter.core.robot_model import RobotModel
from safety_filter.core.spatial_algebra import axis_angle_matrix
from safety_filter.errors import InvalidValue, ShapeMismatch

BACKENDS = ('auto', 'numpy', 'pinocchio')
# The Pinocchio twins of each model, per payload mass, for the batched functions. Kept here,
# keyed weakly by the model, rather than on the (immutable) model: a twin is derived data of
# this module, and it cannot be pickled (a model sent to a worker process carries none; the
# worker builds its own on first use).
_PINOCCHIO_TWINS: weakref.WeakKeyDictionary[RobotModel, dict[float, PinocchioChain]] = \
    weakref.WeakKeyDictionary()
_TWINS_PER_MODEL = 16  # payload masses kept per model before the cache starts over


class _ChainArrays:
    """The model's arrays with a payload merged into the last body (private)."""

    def __init__(self, model: RobotModel, payload_mass: float) -> None:
        self.n = model.n_joints
        self.rotation = np.array(model.joint_rotation)
        self.translation = np.array(model.joint_translation)
        self.axis = np.array(model.joint_axis)
        self.prismatic = np.array(model.is_prismatic)
        self.mass, self.com, self.inertia = model.body_inertials(payload_mass)
        self.gravity = np.array(model.gravity)


def _cross(a: np.ndarray, b: np.ndarray) -> np.ndarray:
    # np.cross is slow for small batches; this explicit form broadcasts the same way.
    a0, a1, a2 = a[..., 0], a[..., 1], a[..., 2]
    b0, b1, b2 = b[..., 0], b[..., 1], b[..., 2]
    out = np.empty(np.broadcast_shapes(a.shape, b.shape))
    out[..., 0] = a1 * b2 - a2 * b1
    out[..., 1] = a2 * b0 - a0 * b2
    out[..., 2] = a0 * b1 - a1 * b0
    return out


def _rotate_to_child(rot: np.ndarray, x: np.ndarray) -> np.ndarray:
    """``rot^T x`` for batched rotations and vectors.

    Written out as multiply-adds: for 3x3 blocks this is several times faster than einsum or
    matmul, which loop over tiny matrices.
    """
    return rot[..., 0, :] * x[..., 0:1] + rot[..., 1, :] * x[..., 1:2] \
        + rot[..., 2, :] * x[..., 2:3]


def _rotate_to_parent(rot: np.ndarray, x: np.ndarray) -> np.ndarray:
    """``rot x`` for batched rotations and vectors."""
    return rot[..., :, 0] * x[..., 0:1] + rot[..., :, 1] * x[..., 1:2] \
        + rot[..., :, 2] * x[..., 2:3]


def _rnea(
    chain: _ChainArrays,
    q: np.ndarray,
    v: np.ndarray | None,
    a: np.ndarray | None,
    with_gravity: bool,
) -> np.ndarray:
    """Rigid-body joint torques for positions q, velocities v, accelerations a (batched).

    Arrays of shape ``(..., n)`` broadcast against each other; ``None`` means zero. Friction
    is not included. Spatial vectors are kept as (angular, linear) 3-vector pairs expressed
    in each body's frame at its origin.
    """
    n = chain.n
    shape = np.broadcast_shapes(*(x.shape for x in (q, v, a) if x is not None))[:-1]
    zero3 = np.zeros(shape + (3,))
    omega, vel = zero3, zero3
    alpha = zero3
    lin_acc = zero3 - chain.gravity if with_gravity else zero3
    rotations, translations, forces, torques_ang = [], [], [], []
    for i in range(n):
        qi = q[..., i]
        axis = chain.axis[i]
        if chain.prismatic[i]:
            rot = np.broadcast_to(chain.rotation[i], qi.shape + (3, 3))
            trans = chain.translation[i] + np.einsum('ij,j->i', chain.rotation[i], axis) \
                * qi[..., None]
        else:
            rot = chain.rotation[i] @ axis_angle_matrix(axis, qi)
            trans = np.broadcast_to(chain.translation[i], qi.shape + (3,))
        # Parent -> child coordinates: x_child = rot^T x_parent.
        omega_c = _rotate_to_child(rot, omega)
        vel_c = _rotate_to_child(rot, vel + _cross(omega, trans))
        alpha_c = _rotate_to_child(rot, alpha)
        lin_acc_c = _rotate_to_child(rot, lin_acc + _cross(alpha, trans))
        if v is not None:
            joint_rate = axis * v[..., i, None]
            if chain.prismatic[i]:
                vel_c = vel_c + joint_rate
                lin_acc_c = lin_acc_c + _cross(omega_c, joint_rate)
            else:
                omega_c = omega_c + joint_rate
                alpha_c = alpha_c + _cross(omega_c, joint_rate)
                lin_acc_c = lin_acc_c + _cross(vel_c, joint_rate)
        if a is not None:
            joint_acc = axis * a[..., i, None]
            if chain.prismatic[i]:
                lin_acc_c = lin_acc_c + joint_acc
            else:
                alpha_c = alpha_c + joint_acc
        omega, vel, alpha, lin_acc = omega_c, vel_c, alpha_c, lin_acc_c
        # Body force = I a + v x* (I v), with I the spatial inertia about the body origin.
        m, c, inertia = chain.mass[i], chain.com[i], chain.inertia[i]
        momentum = m * (vel + _cross(omega, c))
        ang_momentum = omega @ inertia.T + _cross(c, momentum)
        force = m * (lin_acc + _cross(alpha, c))
        torque = alpha @ inertia.T + _cross(c, force)
        force = force + _cross(omega, momentum)
        torque = torque + _cross(omega, ang_momentum) + _cross(vel, momentum)
        rotations.append(rot)
        translations.append(trans)
        forces.append(force)
        torques_ang.append(torque)
    tau = np.empty(np.broadcast_shapes(shape + (n,), q.shape))
    for i in range(n - 1, -1, -1):
        force, torque = forces[i], torques_ang[i]
        tau[..., i] = (force if chain.prismatic[i] else torque) @ chain.axis[i]
        if i > 0:
            force_p = _rotate_to_parent(rotations[i], force)
            torque_p = _rotate_to_parent(rotations[i], torque) \
                + _cross(translations[i], force_p)
            forces[i - 1] = forces[i - 1] + force_p
            torques_ang[i - 1] = torques_ang[i - 1] + torque_p
    return tau


def _as_batch(q: Any, n: int, name: str = 'q') -> np.ndarray:
    array = np.asarray(q, dtype=float)
    if array.ndim == 0 or array.shape[-1] != n:
        raise ShapeMismatch(name, (n,), array.shape,
                            detail=f'a batch of shape (..., {n}): joints on the last axis')
    return array


# ---------------------------------------------------------------------- batched API
def _resolve_backend(backend: str) -> str:
    if backend not in BACKENDS:
        raise InvalidValue('backend', backend, 'one of ' + ', '.join(BACKENDS))
    if backend == 'auto':
        return 'pinocchio' if pinocchio_available() else 'numpy'
    if backend == 'pinocchio' and not pinocchio_available():
        raise ImportError('the pinocchio backend needs the package pin '
                          '(python3 -m pip install pin)')
    return backend


def _pinocchio_chain(model: RobotModel, payload_mass: float) -> PinocchioChain:
    """The model's Pinocchio twin for a payload mass, cached per model (private)."""
    cache = _PINOCCHIO_TWINS.setdefault(model, {})
    key = float(payload_mass)
    if key not in cache:
        if len(cache) > _TWINS_PER_MODEL:
            cache.clear()
        cache[key] = PinocchioChain(_ChainArrays(model, key))
    return cache[key]


def _loop(function: Any, arrays: list[np.ndarray], n: int, out_tail: tuple[int, ...]
          ) -> np.ndarray:
    """Apply a per-configuration function over broadcast batches of (..., n) arrays."""
    shape = np.broadcast_shapes(*(x.shape for x in arrays))[:-1]
    flat = [np.ascontiguousarray(np.broadcast_to(x, shape + (n,)).reshape(-1, n))
            for x in arrays]
    out = np.empty((len(flat[0]),) + out_tail)
    for index, row in enumerate(zip(*flat)):
        out[index] = function(*row)
    return out.reshape(shape + out_tail)


def rnea_batch(
    model: RobotModel,
    q: np.ndarray,
    v: np.ndarray | None = None,
    a: np.ndarray | None = None,
    *,
    payload_mass: float = 0.0,
    with_gravity: bool = True,
    backend: str = 'auto',
) -> np.ndarray:
    """Rigid-body inverse dynamics ``M a + C v + g`` (no friction) over a batch.

    Args:
        q, v, a: arrays of shape ``(..., n)`` [rad, rad/s, rad/s^2]; ``None`` is zero.
        payload_mass: point payload on the tip [kg].
        with_gravity: include ``g(q)``.
        backend: 'numpy' (vectorised recursion), 'pinocchio' (a loop over Pinocchio calls,
            faster per configuration) or 'auto'.
    Returns:
        Torques of shape ``(..., n)`` [N m or N].
    """
    n = model.n_joints
    q = _as_batch(q, n)
    v = None if v is None else _as_batch(v, n, 'v')
    a = None if a is None else _as_batch(a, n, 'a')
    if _resolve_backend(backend) == 'pinocchio':
        twin = _pinocchio_chain(model, payload_mass)
        zero = np.zeros(n)
        return _loop(lambda x, y, z: twin.rnea(x, y, z, with_gravity),
                     [q, zero if v is None else v, zero if a is None else a], n, (n,))
    chain = _ChainArrays(model, payload_mass)
    return _rnea(chain, q, v, a, with_gravity)


def mass_matrix_batch(model: RobotModel, q: np.ndarray, *, payload_mass: float = 0.0,
                      backend: str = 'auto') -> np.ndarray:
    """Joint-space inertia matrices ``M(q)`` for ``q`` of shape ``(..., n)`` -> ``(..., n, n)``."""
    n = model.n_joints
    q = _as_batch(q, n)
    if _resolve_backend(backend) == 'pinocchio':
        twin = _pinocchio_chain(model, payload_mass)
        flat = np.ascontiguousarray(q.reshape(-1, n))
        return twin.mass_matrix_batch(flat).reshape(q.shape + (n,))
    chain = _ChainArrays(model, payload_mass)
    columns = _rnea(chain, q[..., None, :], None, np.eye(n), with_gravity=False)
    # columns[..., j, :] is M e_j, i.e. column j; symmetrise away rounding.
    return 0.5 * (columns + np.swapaxes(columns, -1, -2))


def gravity_torque_batch(model: RobotModel, q: np.ndarray, *, payload_mass: float = 0.0,
                         backend: str = 'auto') -> np.ndarray:
    """Gravity torques ``g(q)`` for ``q`` of shape ``(..., n)`` -> ``(..., n)``."""
    return rnea_batch(model, q, payload_mass=payload_mass, backend=backend)


def christoffel_batch(model: RobotModel, q: np.ndarray, *, payload_mass: float = 0.0,
                      backend: str = 'auto') -> np.ndarray:
    """Christoffel symbols of the first kind, ``Gamma[..., i, j, k]``, shape ``(..., n, n, n)``.

    ``Gamma_ijk = 1/2 (dM_ij/dq_k + dM_ik/dq_j - dM_jk/dq_i)``, so that
    ``(C v)_i = sum_jk Gamma_ijk v_j v_k`` and ``C_ij = sum_k Gamma_ijk v_k``.
    The numpy backend takes them exactly from the velocity-quadratic term of the recursion
    by polarisation; the Pinocchio backend from its Coriolis matrix at unit velocities
    (Pinocchio builds ``C`` from the same symbols). The tests check that the two agree.
    """
    n = model.n_joints
    q = _as_batch(q, n)
    if _resolve_backend(backend) == 'pinocchio':
        twin = _pinocchio_chain(model, payload_mass)
        return _loop(twin.christoffel, [q], n, (n, n, n))
    chain = _ChainArrays(model, payload_mass)
    rows, cols = np.triu_indices(n)
    velocities = np.zeros((len(rows), n))
    velocities[np.arange(len(rows)), rows] = 1.0  # e_j + e_k, or e_j when j == k
    velocities[np.arange(len(rows)), cols] = 1.0
    quad = _rnea(chain, q[..., None, :], velocities, None, with_gravity=False)  # (..., P, n)
    diagonal = quad[..., rows == cols, :]  # c(e_j) = Gamma_.jj, in order j = 0..n-1
    gamma = np.empty(q.shape[:-1] + (n, n, n))
    for p, (j, k) in enumerate(zip(rows, cols)):
        if j == k:
            gamma[..., :, j, j] = diagonal[..., j, :]
        else:
            value = 0.5 * (quad[..., p, :] - diagonal[..., j, :] - diagonal[..., k, :])
            gamma[..., :, j, k] = value
            gamma[..., :, k, j] = value
    return gamma


# ---------------------------------------------------------------------- per-step API
def hold_mass_matrix(mass: np.ndarray, viscous: np.ndarray, hold_s: float) -> np.ndarray:
    """The mass matrix of the mean acceleration over a zero-order hold of ``hold_s``
    (docs/method.md, dissipation): ``M_hold = M g(A T)``, ``A = M^-1 D``,
    ``g(x) = x / (1 - exp(-x))``, ``D = diag(viscous)``.

    With ``M``, the rigid bias and the Coulomb friction frozen over the hold, a torque ``u``
    held for ``T`` moves ``v`` exactly by ``T abar`` with ``u = M_hold abar + h(q, v0)``: the
    same bias as the instantaneous form, only the mass grows (``M + D T / 2 + ...``, equal to
    ``M`` without damping). Symmetric positive definite: ``L g(S T) L^T`` with ``M = L L^T``
    and ``S = L^-1 D L^-T``. Batched over leading axes.
    """
    mass = np.asarray(mass, dtype=float)
    damping = np.asarray(viscous, dtype=float)
    if hold_s <= 0.0 or not np.any(damping > 0.0):
        return mass.copy()
    # x / (1 - exp(-x)) = 1 + x/2 + x^2/12 - x^4/720 + ...: for ||A T|| <= 0.1 the first
    # three terms are exact to 2e-7 of M and cost one solve instead of an eigenproblem
    decay = np.linalg.solve(mass, np.broadcast_to(np.diag(damping), mass.shape)) * hold_s
    if float(np.max(np.sum(np.abs(decay), axis=-1))) <= 0.1:
        step = damping[:, None] * decay  # D A T^2 ... as D M^-1 D T^2
        return mass + 0.5 * hold_s * np.diag(damping) + step / 12.0 * hold_s
    lower = np.linalg.cholesky(mass)
    inverse = np.linalg.inv(lower)
    scaled = np.einsum('...ij,j,...kj->...ik', inverse, damping, inverse)
    rates, vectors = np.linalg.eigh(0.5 * (scaled + np.swapaxes(scaled, -1, -2)))
    x = np.maximum(rates, 0.0) * hold_s
    with np.errstate(divide='ignore', invalid='ignore'):
        growth = np.where(x < 1e-8, 1.0 + 0.5 * x, x / -np.expm1(-x))
    basis = lower @ vectors
    return np.einsum('...ij,...j,...kj->...ik', basis, growth, basis)


class Dynamics:
    """Per-state dynamics of a :class:`RobotModel`, with a fixed payload mass.

    Args:
        model: the robot model.
        payload_mass: point payload on the tip link [kg] (at the model's payload point).
        backend: ``'numpy'`` (the reference recursion), ``'pinocchio'`` (needs ``pin``) or
            ``'auto'`` (Pinocchio when installed).

    All methods take 1-D arrays of length ``n`` in the model's joint order and return new
    arrays. Torques are in [N m] (revolute) or [N] (prismatic).
    """

    def __init__(self, model: RobotModel, payload_mass: float = 0.0, backend: str = 'auto'
                 ) -> None:
        backend = _resolve_backend(backend)
        self.model = model
        self.payload_mass = float(payload_mass)
        self.backend = backend
        self.n = model.n_joints
        self._chain = _ChainArrays(model, self.payload_mass)
        self._viscous = np.array(model.viscous_friction)
        self._coulomb = np.array(model.coulomb_friction)
        self._pin: Any = None
        if backend == 'pinocchio':
            self._pin = PinocchioChain(self._chain)

    def _check(self, x: Any, name: str) -> np.ndarray:
        array = np.asarray(x, dtype=float)
        if array.shape != (self.n,):
            raise ShapeMismatch(name, (self.n,), array.shape)
        return array

    @property
    def pinocchio_handles(self) -> tuple[Any, Any, Any] | None:
        """``(pinocchio module, pinocchio model, its data)`` of the Pinocchio backend; None
        with the numpy backend.

        For a caller that runs Pinocchio's algorithms into its own preallocated arrays at the
        control rate (the filter step), where the methods here, which return new arrays,
        would cost more than the dynamics. The model includes the payload and gravity, not
        friction. ``data`` is this object's workspace: use it from one thread.
        """
        if self._pin is None:
            return None
        return self._pin._pin, self._pin.model, self._pin.data

    def mass_matrix(self, q: np.ndarray) -> np.ndarray:
        """Joint-space inertia matrix ``M(q)``, shape (n, n)."""
        q = self._check(q, 'q')
        if self._pin is not None:
            return self._pin.mass_matrix(q)
        columns = _rnea(self._chain, q[None, :], None, np.eye(self.n), with_gravity=False)
        return 0.5 * (columns + columns.T)

    def gravity_torque(self, q: np.ndarray) -> np.ndarray:
        """Gravity torque ``g(q)``, shape (n,)."""
        q = self._check(q, 'q')
        if self._pin is not None:
            return self._pin.gravity(q)
        return _rnea(self._chain, q, None, None, with_gravity=True)

    def coriolis_torque(self, q: np.ndarray, v: np.ndarray) -> np.ndarray:
        """Coriolis and centrifugal torque ``C(q, v) v``, shape (n,)."""
        q, v = self._check(q, 'q'), self._check(v, 'v')
        if self._pin is not None:
            return self._pin.nonlinear(q, v) - self._pin.gravity(q)
        return _rnea(self._chain, q, v, None, with_gravity=False)

    def friction_torque(self, v: np.ndarray) -> np.ndarray:
        """Viscous plus Coulomb friction ``D v + f_c sign(v)``, shape (n,)."""
        v = self._check(v, 'v')
        return friction_torque(v, self._viscous, self._coulomb)

    def bias_torque(self, q: np.ndarray, v: np.ndarray) -> np.ndarray:
        """``h(q, v) = C v + D v + g + f_c sign(v)``, shape (n,)."""
        q, v = self._check(q, 'q'), self._check(v, 'v')
        if self._pin is not None:
            rigid = self._pin.nonlinear(q, v)
        else:
            rigid = _rnea(self._chain, q, v, None, with_gravity=True)
        return rigid + friction_torque(v, self._viscous, self._coulomb)

    def mass_and_bias(self, q: np.ndarray, v: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
        """``(M(q), h(q, v))`` in one call, as the filter step needs them."""
        return self.mass_matrix(q), self.bias_torque(q, v)

    def christoffel(self, q: np.ndarray) -> np.ndarray:
        """Christoffel symbols of the first kind ``Gamma[i, j, k]``, shape (n, n, n)."""
        q = self._check(q, 'q')
        return christoffel_batch(self.model, q, payload_mass=self.payload_mass,
                                 backend=self.backend)

    def coriolis_matrix(self, q: np.ndarray, v: np.ndarray) -> np.ndarray:
        """``C(q, v)`` built from the Christoffel symbols (so ``dM/dt - 2C`` is skew)."""
        v = self._check(v, 'v')
        return self.christoffel(q) @ v

    def inverse_dynamics(self, q: np.ndarray, v: np.ndarray, a: np.ndarray) -> np.ndarray:
        """Torque ``u = M a + h`` that produces acceleration ``a``."""
        a = self._check(a, 'a')
        mass, bias = self.mass_and_bias(q, v)
        return mass @ a + bias

    def forward_dynamics(self, q: np.ndarray, v: np.ndarray, u: np.ndarray) -> np.ndarray:
        """Acceleration ``a = M^-1 (u - h)`` under torque ``u``."""
        u = self._check(u, 'u')
        if self._pin is not None:
            q, v = self._check(q, 'q'), self._check(v, 'v')
            # The articulated-body algorithm with friction moved to the torque side.
            return self._pin.forward(q, v, u - friction_torque(v, self._viscous, self._coulomb))
        mass, bias = self.mass_and_bias(q, v)
        factor = np.linalg.cholesky(mass)
        return np.linalg.solve(factor.T, np.linalg.solve(factor, u - bias))

    def kinetic_energy(self, q: np.ndarray, v: np.ndarray) -> float:
        """``1/2 v^T M(q) v`` [J]."""
        v = self._check(v, 'v')
        return 0.5 * float(v @ self.mass_matrix(q) @ v)
