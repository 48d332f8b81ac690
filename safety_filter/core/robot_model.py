"""The joint-space robot model: the actuated serial chain of a URDF, its limits and inertias.

A :class:`RobotModel` is built once from a URDF (plus an optional limits file of ours) and is
immutable afterwards: every array it exposes is a read-only copy. It holds what the dynamics,
the certification and the filter need and nothing else:

* the actuated serial chain, joint by joint: the fixed placement of each joint in the frame of
  the previous moving body, its axis, and the inertia of the rigid body it moves (everything
  attached to that body through fixed joints, or through joints left out of the selection and
  locked at a position, is merged into it as rigid load);
* position, velocity and effort limits, viscous and Coulomb friction per joint;
* the payload range the certificate must cover and gravity in the base frame.

Units: SI throughout ([rad], [m], [rad/s], [N m], [N], [kg]).
"""

from __future__ import annotations

import hashlib
import json
import math
from collections.abc import Mapping, Sequence
from dataclasses import dataclass
from pathlib import Path
from typing import Any

import numpy as np

from safety_filter.core.spatial_algebra import combine_inertias
from safety_filter.core.uncertainty_set import UncertaintySet
from safety_filter.errors import InvalidValue, UnsupportedChain


def _frozen(values: Any, shape: tuple[int, ...] | None = None) -> np.ndarray:
    array = np.array(values, dtype=float)
    if shape is not None:
        array = array.reshape(shape)
    array.flags.writeable = False
    return array


@dataclass(frozen=True)
class PayloadRange:
    """Range of payload masses the certificate must cover, as a point mass on the tip link.

    Attributes:
        mass_min: smallest payload mass [kg].
        mass_max: largest payload mass [kg].
        point: position of the point mass in the tip link frame [m], shape (3,).
    """

    mass_min: float
    mass_max: float
    point: tuple[float, float, float]


class RobotModel:
    """Joint-space model of an arm's actuated serial chain. Build it with :meth:`from_urdf`.

    ``limits_source`` says where the limits came from (not part of :meth:`content_hash`):
    the limits file's path, ``'<limits mapping>'``, ``None`` when :meth:`from_urdf` got no
    limits (the URDF's alone), ``''`` when unknown (a model built otherwise).

    Immutable: every array is a read-only copy, and nothing is stored on a model after it
    is built (what is derived from a model and cached, such as the dynamics' Pinocchio twin,
    is kept by the module that derives it, keyed by the model).
    """

    def __init__(
        self,
        *,
        name: str,
        joint_names: Sequence[str],
        joint_kinds: Sequence[str],
        base_link: str,
        tip_link: str,
        joint_rotation: np.ndarray,
        joint_translation: np.ndarray,
        joint_axis: np.ndarray,
        body_mass: np.ndarray,
        body_com: np.ndarray,
        body_inertia: np.ndarray,
        position_lower: np.ndarray,
        position_upper: np.ndarray,
        velocity_limit: np.ndarray,
        effort_limit: np.ndarray,
        viscous_friction: np.ndarray,
        coulomb_friction: np.ndarray,
        gravity: np.ndarray,
        payload: PayloadRange,
        payload_point_in_body: np.ndarray,
        locked_positions: Mapping[str, float],
        notes: Sequence[str] = (),
        uncertainty: UncertaintySet | None = None,
        limits_source: str | None = '',
    ) -> None:
        n = len(joint_names)
        if n == 0:
            raise UnsupportedChain('the selected chain has no movable joint')
        self.name = name
        self.joint_names: tuple[str, ...] = tuple(joint_names)
        self.joint_kinds: tuple[str, ...] = tuple(joint_kinds)
        self.base_link = base_link
        self.tip_link = tip_link
        self.joint_rotation = _frozen(joint_rotation, (n, 3, 3))
        self.joint_translation = _frozen(joint_translation, (n, 3))
        self.joint_axis = _frozen(joint_axis, (n, 3))
        self.is_prismatic = _frozen([k == 'prismatic' for k in joint_kinds]).astype(bool)
        self.is_prismatic.flags.writeable = False
        self.body_mass = _frozen(body_mass, (n,))
        self.body_com = _frozen(body_com, (n, 3))
        self.body_inertia = _frozen(body_inertia, (n, 3, 3))
        self.position_lower = _frozen(position_lower, (n,))
        self.position_upper = _frozen(position_upper, (n,))
        self.velocity_limit = _frozen(velocity_limit, (n,))
        self.effort_limit = _frozen(effort_limit, (n,))
        self.viscous_friction = _frozen(viscous_friction, (n,))
        self.coulomb_friction = _frozen(coulomb_friction, (n,))
        self.gravity = _frozen(gravity, (3,))
        self.payload = payload
        self.payload_point_in_body = _frozen(payload_point_in_body, (3,))
        self.locked_positions = dict(locked_positions)
        self.notes: tuple[str, ...] = tuple(notes)
        self.uncertainty = uncertainty if uncertainty is not None else UncertaintySet()
        self.limits_source = limits_source

    # ------------------------------------------------------------------ construction
    @classmethod
    def from_urdf(
        cls,
        urdf: str | Path,
        limits: str | Path | Mapping[str, Any] | None = None,
        *,
        base_link: str | None = None,
        tip_link: str | None = None,
        joints: Sequence[str] | None = None,
        locked_positions: Mapping[str, float] | None = None,
    ) -> RobotModel:
        """Load the actuated chain of a URDF file (or URDF text) and its limits.

        Args:
            urdf: path of a URDF file, or the URDF XML text itself. A ``.xacro`` file is
                expanded first with the ``xacro`` package (``pip install xacro``) when it is
                installed; without it the error says how to expand the file.
            limits: optional limits file (path) or its parsed content; see ``docs`` for the
                format. Its ``chain`` and ``locked_joints`` entries are used unless the
                keyword arguments below are given.
            base_link, tip_link: select the chain as the movable joints on the path from
                ``base_link`` (default: the URDF root) to ``tip_link``.
            joints: select the chain by joint names instead (base to tip order).
            locked_positions: positions [rad or m] of movable joints left out of the chain;
                default 0 clamped into the joint's limits.

        Raises:
            RobotDescriptionError and its subclasses, InvalidLimits: with the joint or link.
        """
        from safety_filter.core.limits_file import read_limits
        from safety_filter.core.urdf_reader import build_model_fields, read_urdf_text

        xml_text, source = read_urdf_text(urdf)
        spec = read_limits(limits)
        chain = spec.get('chain', {})
        if joints is None and base_link is None and tip_link is None:
            joints = chain.get('joints')
            base_link = chain.get('base_link')
            tip_link = chain.get('tip_link')
        locked = dict(spec.get('locked_joints', {}))
        locked.update(locked_positions or {})
        fields = build_model_fields(xml_text, source, spec, base_link, tip_link, joints, locked)
        mass_min, mass_max, point = fields.pop('payload')
        return cls(**fields, payload=PayloadRange(mass_min, mass_max, point),
                   limits_source=(None if limits is None else '<limits mapping>'
                                  if isinstance(limits, Mapping) else str(limits)))

    # ------------------------------------------------------------------ queries
    @property
    def n_joints(self) -> int:
        """Number of actuated joints in the chain."""
        return len(self.joint_names)

    @property
    def position_range(self) -> np.ndarray:
        """``position_upper - position_lower`` per joint [rad or m]."""
        return self.position_upper - self.position_lower

    def body_inertials(self, payload_mass: float = 0.0
                       ) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
        """Mass [kg], centre of mass [m] and inertia about it [kg m^2] of each moving body,
        with a point payload of ``payload_mass`` added to the last body."""
        mass = np.array(self.body_mass)
        com = np.array(self.body_com)
        inertia = np.array(self.body_inertia)
        if payload_mass < 0.0 or not math.isfinite(payload_mass):
            raise InvalidValue('payload mass [kg]', payload_mass, 'a finite number >= 0')
        if payload_mass > 0.0:
            m, c, i = combine_inertias([
                (float(mass[-1]), com[-1], inertia[-1]),
                (payload_mass, np.array(self.payload_point_in_body), np.zeros((3, 3))),
            ])
            mass[-1], com[-1], inertia[-1] = m, c, i
        return mass, com, inertia

    def content_hash(self) -> str:
        """SHA-256 of everything that the dynamics and the limits depend on.

        Certificates store it; a certificate is only valid for a model with the same hash.
        """
        def rounded(values: np.ndarray) -> list[str]:
            return [format(float(x), '.12g') for x in np.ravel(values)]

        content = {
            'joints': list(self.joint_names),
            'kinds': list(self.joint_kinds),
            'rotation': rounded(self.joint_rotation),
            'translation': rounded(self.joint_translation),
            'axis': rounded(self.joint_axis),
            'mass': rounded(self.body_mass),
            'com': rounded(self.body_com),
            'inertia': rounded(self.body_inertia),
            'position_lower': rounded(self.position_lower),
            'position_upper': rounded(self.position_upper),
            'velocity': rounded(self.velocity_limit),
            'effort': rounded(self.effort_limit),
            'viscous': rounded(self.viscous_friction),
            'coulomb': rounded(self.coulomb_friction),
            'gravity': rounded(self.gravity),
            'payload': [format(self.payload.mass_min, '.12g'),
                        format(self.payload.mass_max, '.12g')]
            + rounded(self.payload_point_in_body),
            'uncertainty': {key: (None if value is None else format(float(value), '.12g'))
                            for key, value in self.uncertainty.record().items()},
        }
        text = json.dumps(content, sort_keys=True, separators=(',', ':'))
        return hashlib.sha256(text.encode()).hexdigest()

    def describe(self) -> str:
        """A human-readable summary of the chain and its limits."""
        unit = {True: ('m', 'm/s', 'N'), False: ('rad', 'rad/s', 'N m')}
        lines = [
            f'robot {self.name!r}: {self.n_joints} actuated joints, '
            f'base {self.base_link!r}, tip {self.tip_link!r}',
            f'gravity in base frame [m/s^2]: {np.array2string(self.gravity, precision=4)}',
            f'payload range [kg]: {self.payload.mass_min:g} .. {self.payload.mass_max:g} at '
            f'{list(self.payload.point)} m on {self.tip_link!r}',
            f'{"joint":<16} {"kind":<10} {"lower":>8} {"upper":>8} {"vel":>7} {"effort":>8} '
            f'{"visc":>6} {"coul":>6} {"mass[kg]":>9}',
        ]
        for i, name in enumerate(self.joint_names):
            pos_u, _, _ = unit[bool(self.is_prismatic[i])]
            lines.append(
                f'{name:<16} {self.joint_kinds[i]:<10} {self.position_lower[i]:8.3f} '
                f'{self.position_upper[i]:8.3f} {self.velocity_limit[i]:7.3f} '
                f'{self.effort_limit[i]:8.2f} {self.viscous_friction[i]:6.3f} '
                f'{self.coulomb_friction[i]:6.3f} {self.body_mass[i]:9.3f}  [{pos_u}]')
        if self.locked_positions:
            locked = ', '.join(f'{k}={v:g}' for k, v in sorted(self.locked_positions.items()))
            lines.append(f'locked joints (rigid load): {locked}')
        lines.extend(f'note: {note}' for note in self.notes)
        return '\n'.join(lines)

    def __repr__(self) -> str:
        return f'RobotModel({self.name!r}, joints={list(self.joint_names)})'

    def __setstate__(self, state: dict[str, Any]) -> None:
        self.__dict__.update(state)
        for value in state.values():
            if isinstance(value, np.ndarray):
                value.flags.writeable = False
