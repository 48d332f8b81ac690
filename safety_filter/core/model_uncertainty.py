"""What is not known exactly about the arm: the declared uncertainty set, and plants drawn from it.

The filter computes with one model: the URDF's inertias, the limits file's friction, and
the middle of the payload range (unless it is told the payload). The arm it drives differs
from that model. The limits file declares by how much, in its ``uncertainty`` section (see
``docs/limits-file.md``, :class:`~safety_filter.core.uncertainty_set.UncertaintySet`);
certification and the stress test cover every plant in that set.

A *plant* is one arm the set allows: a :class:`RobotModel` whose link inertias and friction
differ from the nominal model's, a payload mass, a driver's torque gain and offset per
joint, and the measurement noise and delay that the control loop sees.
"""

from __future__ import annotations

import dataclasses
from dataclasses import dataclass

import numpy as np

from safety_filter.core.robot_model import RobotModel
from safety_filter.core.uncertainty_set import UncertaintySet


@dataclass(frozen=True)
class Plant:
    """One arm of the uncertainty set.

    Attributes:
        model: the arm's model: link inertias and friction as this plant has them, the
            payload range collapsed to ``payload_mass``.
        payload_mass: the payload it carries [kg].
        torque_gain: ``1 + e_r`` per joint; torque_offset: ``e_a`` per joint [N m]: the driver
            applies ``torque_gain * u + torque_offset`` (then saturates to the box).
        position_noise, velocity_noise: bounds of the uniform measurement noise.
        delay_periods: control periods between measurement and applied torque.
    """

    model: RobotModel
    payload_mass: float
    torque_gain: np.ndarray
    torque_offset: np.ndarray
    position_noise: float
    velocity_noise: float
    delay_periods: int


def model_with_inertials(model: RobotModel, *, body_mass: np.ndarray | None = None,
                         body_com: np.ndarray | None = None,
                         body_inertia: np.ndarray | None = None,
                         viscous_friction: np.ndarray | None = None,
                         coulomb_friction: np.ndarray | None = None,
                         payload_mass: float | None = None,
                         uncertainty: UncertaintySet | None = None,
                         gravity: np.ndarray | None = None) -> RobotModel:
    """A copy of ``model`` with other link inertials, friction, a fixed payload mass,
    another declared uncertainty set or another gravity vector [m/s^2].

    The copy has the same joints, limits and payload point; its content hash differs.
    """
    payload = model.payload
    if payload_mass is not None:
        payload = dataclasses.replace(payload, mass_min=float(payload_mass),
                                      mass_max=float(payload_mass))
    return type(model)(
        name=model.name, joint_names=model.joint_names, joint_kinds=model.joint_kinds,
        base_link=model.base_link, tip_link=model.tip_link,
        joint_rotation=model.joint_rotation, joint_translation=model.joint_translation,
        joint_axis=model.joint_axis,
        body_mass=model.body_mass if body_mass is None else body_mass,
        body_com=model.body_com if body_com is None else body_com,
        body_inertia=model.body_inertia if body_inertia is None else body_inertia,
        position_lower=model.position_lower, position_upper=model.position_upper,
        velocity_limit=model.velocity_limit, effort_limit=model.effort_limit,
        viscous_friction=model.viscous_friction if viscous_friction is None
        else viscous_friction,
        coulomb_friction=model.coulomb_friction if coulomb_friction is None
        else coulomb_friction,
        gravity=model.gravity if gravity is None else gravity, payload=payload,
        payload_point_in_body=model.payload_point_in_body,
        locked_positions=model.locked_positions, notes=model.notes,
        uncertainty=model.uncertainty if uncertainty is None else uncertainty)


def friction_ranges(model: RobotModel, uncertainty: UncertaintySet
                    ) -> tuple[np.ndarray, np.ndarray, np.ndarray, np.ndarray]:
    """``(viscous_low, viscous_high, coulomb_low, coulomb_high)`` per joint."""
    umax = np.array(model.effort_limit)
    vmax = np.array(model.velocity_limit)
    d_spread = uncertainty.viscous_friction_spread * umax / vmax
    c_spread = uncertainty.coulomb_friction_spread * umax
    d, c = np.array(model.viscous_friction), np.array(model.coulomb_friction)
    return (np.maximum(d - d_spread, 0.0), d + d_spread,
            np.maximum(c - c_spread, 0.0), c + c_spread)


def draw_plant(model: RobotModel, uncertainty: UncertaintySet, rng: np.random.Generator,
               *, extreme_fraction: float = 0.5, told_mass: float | None = None) -> Plant:
    """One plant from the set; each uncertain quantity sits at an end of its range with
    probability ``extreme_fraction`` (the worst cases are mostly at the ends), else uniform.
    """
    n = model.n_joints

    def pick(low: np.ndarray | float, high: np.ndarray | float, size: int | None = None
             ) -> np.ndarray:
        u = rng.random(size)
        ends = rng.random(size) < extreme_fraction
        u = np.where(ends, np.round(u), u)
        return np.asarray(low + u * (np.asarray(high) - low))

    low, high = uncertainty.payload_error_range(model, told_mass)
    payload = float(pick(low, high))
    e_m, e_i = uncertainty.link_mass_error, uncertainty.link_inertia_error
    mass = np.array(model.body_mass) * pick(1.0 - e_m, 1.0 + e_m, n)
    inertia = np.array(model.body_inertia) * pick(1.0 - e_i, 1.0 + e_i, n)[:, None, None]
    direction = rng.normal(size=(n, 3))
    direction /= np.linalg.norm(direction, axis=1, keepdims=True)
    com = np.array(model.body_com) + uncertainty.com_error * pick(0.0, 1.0, n)[:, None] \
        * direction
    d_lo, d_hi, c_lo, c_hi = friction_ranges(model, uncertainty)
    plant_model = model_with_inertials(
        model, body_mass=mass, body_com=com, body_inertia=inertia,
        viscous_friction=pick(d_lo, d_hi, n), coulomb_friction=pick(c_lo, c_hi, n),
        payload_mass=payload)
    e_r = uncertainty.torque_error_relative
    gain = pick(1.0 - e_r, 1.0 + e_r, n)
    e_a = uncertainty.torque_error_absolute * np.array(model.effort_limit)
    offset = pick(-e_a, e_a, n)
    return Plant(plant_model, payload, gain, offset, uncertainty.position_noise,
                 uncertainty.velocity_noise, int(uncertainty.delay_periods))


def nominal_plant(model: RobotModel, payload_mass: float) -> Plant:
    """The filter's own model as a plant: no error, no noise, no delay."""
    n = model.n_joints
    return Plant(model_with_inertials(model, payload_mass=payload_mass), float(payload_mass),
                 np.ones(n), np.zeros(n), 0.0, 0.0, 0)


@dataclass(frozen=True)
class DisturbanceBound:
    """How much torque the arm may need beyond the filter's model, per joint and per kind.

    ``static[kind]`` [N m], shape (n,), does not depend on the commanded acceleration;
    ``inertial[kind]`` [kg m^2], shape (n, n), multiplies ``|a|``: the torque error of an
    acceleration ``a`` is at most ``static + inertial @ |a|`` (see :func:`disturbance_bound`).
    """

    static: dict[str, np.ndarray]
    inertial: dict[str, np.ndarray]

    @property
    def static_total(self) -> np.ndarray | float:
        """Sum of the static parts [N m] (0 when there are none)."""
        return np.sum(list(self.static.values()), axis=0) if self.static else 0.0

    @property
    def inertial_total(self) -> np.ndarray | float:
        """Sum of the inertial parts [kg m^2] (0 when there are none)."""
        return np.sum(list(self.inertial.values()), axis=0) if self.inertial else 0.0

    def total(self, acceleration: np.ndarray) -> np.ndarray:
        """Bound for accelerations up to ``acceleration`` per joint [N m]."""
        return self.static_total + np.asarray(self.inertial_total) @ np.abs(acceleration) \
            if self.inertial else self.static_total + np.zeros(len(acceleration))

    def without(self, kind: str, static_only: bool = False) -> DisturbanceBound:
        """The same bound with one kind left out (only its static part: ``static_only``)."""
        return DisturbanceBound(
            {k: v for k, v in self.static.items() if k != kind},
            {k: v for k, v in self.inertial.items() if k != kind or static_only})

    def constant_part(self, acceleration: np.ndarray) -> np.ndarray:
        """The part of the bound that the filter does not recompute at each state [N m]:
        everything but the static payload and link terms (see :func:`state_disturbance_bound`).
        """
        return self.without('payload', static_only=True).without(
            'links', static_only=True).total(acceleration)

    def by_kind(self, acceleration: np.ndarray) -> dict[str, np.ndarray]:
        """Each kind's share of :meth:`total` [N m]."""
        kinds = list(dict.fromkeys([*self.static, *self.inertial]))
        n = len(acceleration)
        return {kind: self.static.get(kind, np.zeros(n))
                + self.inertial.get(kind, np.zeros((n, n))) @ np.abs(acceleration)
                for kind in kinds}


def disturbance_bound(model: RobotModel, uncertainty: UncertaintySet, *,
                      gravity_max: np.ndarray, coriolis_max: np.ndarray,
                      mass_max: np.ndarray, payload_gravity_max: np.ndarray,
                      payload_coriolis_max: np.ndarray, payload_mass_max: np.ndarray,
                      velocity_box: np.ndarray,
                      observer_time_constant_s: float | np.ndarray) -> DisturbanceBound:
    """Bound of the torque ``d`` that a plant of the set needs beyond the filter's model, and
    of the observer's noise, over the joint box and ``velocity_box`` (``docs/method.md``).

    Args:
        gravity_max, coriolis_max, mass_max: the model's bounds of ``|g_i|``, ``|(C v)_i|``
            [N m] and ``|M_ij|`` [kg m^2] over the boxes
            (``safety_filter.certification.dynamics_bounds``).
        payload_gravity_max, payload_coriolis_max, payload_mass_max: the same for one
            kilogram of payload.
        velocity_box: the certified velocity box [rad/s or m/s].
        observer_time_constant_s: the observer's time constant [s], scalar or per joint.

    Kinds: ``payload`` (the mass the filter is not told: half the range, or the told
    tolerance, times the per-kilogram bounds), ``links`` (the larger relative mass or inertia
    error times the model's bounds: rigid-body dynamics is linear in the inertias),
    ``centre of mass`` (each outboard link's mass, and the heaviest payload, moved by
    ``com_error`` under gravity: ``m |g x axis| com_error``, where only the first joint's
    axis is fixed; and the same lever on the inertia), ``friction`` (the declared spreads at
    the velocity box), ``driver`` (relative error at the torque limit plus the offset) and
    ``observer noise`` (``M * velocity_noise / time constant``).
    """
    n = model.n_joints
    umax = np.array(model.effort_limit)
    gravity = np.array(model.gravity)
    g_norm = float(np.linalg.norm(gravity))
    prismatic = np.array(model.is_prismatic, dtype=bool)
    high = model.payload.mass_max
    mass_error = payload_error(model, uncertainty)
    link_error = max(uncertainty.link_mass_error, uncertainty.link_inertia_error)
    mass = np.array(model.body_mass) * (1.0 + uncertainty.link_mass_error)
    outboard = np.array([float(np.sum(mass[i:])) + high for i in range(n)])
    # |g x axis| for the first joint, whose axis is fixed in the base frame; g for the others.
    first_axis = np.array(model.joint_rotation[0]) @ np.array(model.joint_axis[0])
    lever_factor = np.full(n, g_norm)
    lever_factor[0] = float(np.linalg.norm(np.cross(gravity, first_axis)))
    com_gravity = np.where(prismatic, 0.0, uncertainty.com_error * lever_factor * outboard)
    d_lo, d_hi, c_lo, c_hi = friction_ranges(model, uncertainty)
    d_nom, c_nom = np.array(model.viscous_friction), np.array(model.coulomb_friction)
    friction = (np.maximum(d_hi - d_nom, d_nom - d_lo) * np.asarray(velocity_box)
                + np.maximum(c_hi - c_nom, c_nom - c_lo))
    driver = (uncertainty.torque_error_relative + uncertainty.torque_error_absolute) * umax
    tau = np.broadcast_to(np.asarray(observer_time_constant_s, dtype=float), (n,))
    noise = (np.asarray(mass_max) @ np.full(n, uncertainty.velocity_noise) / tau
             if np.all(tau > 0.0) else np.zeros(n))
    static = {
        'payload': mass_error * (np.asarray(payload_gravity_max)
                                 + np.asarray(payload_coriolis_max)),
        'links': link_error * (np.asarray(gravity_max) + np.asarray(coriolis_max)),
        'centre of mass': com_gravity,
        'friction': friction,
        'driver': driver,
        'observer noise': noise,
    }
    inertial = {
        'payload': mass_error * np.asarray(payload_mass_max),
        'links': link_error * np.asarray(mass_max),
    }
    return DisturbanceBound(static, inertial)


def payload_error(model: RobotModel, uncertainty: UncertaintySet) -> float:
    """How far [kg] the payload may be from the filter model's: half the range when the
    filter is not told it, else the told tolerance (within the range)."""
    low, high = model.payload.mass_min, model.payload.mass_max
    if uncertainty.payload_told_within is None:
        return 0.5 * (high - low)
    return min(float(uncertainty.payload_told_within), high - low)


def state_disturbance_bound(constant: np.ndarray, link_error: float, payload_error: float,
                            gravity: np.ndarray, rigid_bias: np.ndarray,
                            payload_bias: np.ndarray) -> np.ndarray:
    """The bound of the torque the model misses at one state [N m], per joint.

    ``constant``: the certificate's state-independent part; ``link_error``: the relative
    inertia error; ``payload_error`` [kg]; ``gravity``, ``rigid_bias``: the model's ``g(q)`` and
    ``g + C v`` at the state; ``payload_bias``: what one kilogram of payload adds to them.
    Every kind of error is symmetric about the model, so the range is ``[-bound, bound]``.
    """
    coriolis = np.abs(rigid_bias - gravity)
    return (constant + link_error * (np.abs(gravity) + coriolis)
            + payload_error * np.abs(payload_bias))
