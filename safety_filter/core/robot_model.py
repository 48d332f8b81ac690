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
from collections.abc import Iterable, Mapping, Sequence
from dataclasses import dataclass
from pathlib import Path
from typing import Any

import numpy as np

from safety_filter.core.model_uncertainty import UncertaintySet
from safety_filter.core.spatial_algebra import (
    axis_angle_matrix,
    combine_inertias,
    inertia_about_origin,
    rpy_to_matrix,
)
from safety_filter.core.yaml_files import read_yaml_file
from safety_filter.errors import (
    InvalidInertia,
    InvalidLimits,
    RobotDescriptionError,
    UnknownJoint,
    UnknownLink,
    UnsupportedChain,
)

LIMITS_FORMAT = 'safety_filter/limits-1'
STANDARD_GRAVITY = (0.0, 0.0, -9.80665)  # [m/s^2], ISO 80000-3 standard acceleration
_MOVABLE = ('revolute', 'continuous', 'prismatic')
_INERTIA_TOLERANCE = 1e-9  # relative slack for the triangle inequality of principal moments


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
    """

    limits_source: str | None = ''

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
        xml_text, source = _read_urdf_text(urdf)
        spec = _read_limits(limits)
        chain = spec.get('chain', {})
        if joints is None and base_link is None and tip_link is None:
            joints = chain.get('joints')
            base_link = chain.get('base_link')
            tip_link = chain.get('tip_link')
        locked = dict(spec.get('locked_joints', {}))
        locked.update(locked_positions or {})
        model = _build_model(xml_text, source, spec, base_link, tip_link, joints, locked)
        model.limits_source = (None if limits is None else '<limits mapping>'
                               if isinstance(limits, Mapping) else str(limits))
        return model

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
            raise InvalidLimits(f'payload mass must be finite and >= 0, got {payload_mass}')
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

    def __getstate__(self) -> dict[str, Any]:
        # The dynamics cache a Pinocchio twin on the model; it cannot be pickled (worker
        # processes rebuild it on first use).
        state = dict(self.__dict__)
        state.pop('_pinocchio_cache', None)
        return state

    def __setstate__(self, state: dict[str, Any]) -> None:
        self.__dict__.update(state)
        for value in state.values():
            if isinstance(value, np.ndarray):
                value.flags.writeable = False


# ---------------------------------------------------------------------- URDF reading
XACRO_SUFFIX = '.xacro'
# A URDF that still holds xacro macros: urdf_parser_py would skip the macro elements
# silently and build a model without the links they define.
_XACRO_MARKERS = ('xmlns:xacro=', '<xacro:')


def _read_urdf_text(urdf: str | Path) -> tuple[str, str]:
    text = str(urdf)
    if isinstance(urdf, Path) or not text.lstrip().startswith('<'):
        path = Path(text)
        if not path.is_file():
            raise RobotDescriptionError(f'URDF file not found: {path}')
        if path.suffix == XACRO_SUFFIX:
            return expand_xacro(path), str(path)
        content = path.read_text(encoding='utf-8')
        if any(marker in content for marker in _XACRO_MARKERS):
            return expand_xacro(path), str(path)
        return content, str(path)
    if any(marker in text for marker in _XACRO_MARKERS):
        raise RobotDescriptionError(
            'the robot description text holds xacro macros, not plain URDF: expand it first '
            '(xacro arm.urdf.xacro > arm.urdf, as robot_state_publisher users do), or give '
            'the .xacro file path')
    return text, '<urdf string>'


def expand_xacro(path: str | Path) -> str:
    """The URDF text of a xacro file, expanded with the ``xacro`` package (no arguments:
    every ``xacro:arg`` takes its default).

    Raises:
        RobotDescriptionError: ``xacro`` is not installed (the message says how to install
            it or expand the file by hand), or the expansion failed.
    """
    path = Path(path)
    try:
        import xacro
    except ImportError as err:
        raise RobotDescriptionError(
            f'{path} is a xacro file and the xacro package is not installed: install it '
            '(python3 -m pip install xacro, or the ros-jazzy-xacro package), or expand the '
            f'file yourself and give the URDF: xacro {path} > {path.with_suffix("").name}'
            + ('' if path.with_suffix('').suffix == '.urdf' else '.urdf')) from err
    try:
        document = xacro.process_file(str(path))
        return str(document.toxml())
    except Exception as err:  # xacro raises its own and XML errors of many types
        raise RobotDescriptionError(f'{path}: xacro could not expand the file: '
                                    f'{type(err).__name__}: {err}') from err


def _parse_urdf(xml_text: str, source: str) -> Any:
    from urdf_parser_py import urdf as urdf_module
    from urdf_parser_py.xml_reflection import core as xml_core

    # urdf_parser_py prints a warning for every tag it does not know (gazebo, transmission
    # details, ...); those are not errors for us, so silence them while parsing.
    previous = xml_core.on_error
    xml_core.on_error = lambda _message: None
    try:
        robot = urdf_module.URDF.from_xml_string(xml_text.encode('utf-8'))
    except Exception as err:  # the parser raises many unrelated types on bad input
        raise RobotDescriptionError(f'{source}: the URDF does not parse: {err}') from err
    finally:
        xml_core.on_error = previous
    if not robot.links:
        raise RobotDescriptionError(f'{source}: the URDF has no links')
    return robot


def _origin(element: Any) -> tuple[np.ndarray, np.ndarray]:
    """Rotation and translation of a URDF <origin> (identity when absent)."""
    if element is None:
        return np.eye(3), np.zeros(3)
    xyz = np.array(element.xyz if element.xyz is not None else [0, 0, 0], dtype=float)
    rpy = np.array(element.rpy if element.rpy is not None else [0, 0, 0], dtype=float)
    return rpy_to_matrix(rpy), xyz


@dataclass
class _Frame:
    """Pose of a link relative to the moving body that carries it (-1: the fixed base)."""

    body: int
    rotation: np.ndarray
    translation: np.ndarray


def _build_model(
    xml_text: str,
    source: str,
    spec: Mapping[str, Any],
    base_link: str | None,
    tip_link: str | None,
    joint_selection: Sequence[str] | None,
    locked: dict[str, float],
) -> RobotModel:
    robot = _parse_urdf(xml_text, source)
    links = {link.name: link for link in robot.links}
    joints = {joint.name: joint for joint in robot.joints}
    joint_into = {joint.child: joint for joint in robot.joints}  # child link -> its joint
    children: dict[str, list[Any]] = {name: [] for name in links}
    for joint in robot.joints:
        if joint.parent not in links:
            raise UnknownLink(joint.parent, list(links))
        if joint.child not in links:
            raise UnknownLink(joint.child, list(links))
        children[joint.parent].append(joint)
    roots = [name for name in links if name not in joint_into]
    if len(roots) != 1:
        raise RobotDescriptionError(f'{source}: expected one root link, found {roots}')
    root = roots[0]

    for name in [base_link, tip_link]:
        if name is not None and name not in links:
            raise UnknownLink(name, list(links))
    for name in list(joint_selection or []) + list(locked):
        if name not in joints:
            raise UnknownJoint(name, list(joints))

    def path_from_root(link: str) -> list[Any]:
        path = []
        while link in joint_into:
            joint = joint_into[link]
            path.append(joint)
            link = joint.parent
        return path[::-1]

    # ---- select the chain
    if joint_selection is not None:
        selected = [joints[name] for name in joint_selection]
        if not selected:
            raise UnsupportedChain('the joint selection is empty')
    elif tip_link is not None:
        path = path_from_root(tip_link)
        if base_link is not None:
            names = [j.child for j in path]
            if base_link != root and base_link not in names:
                raise UnsupportedChain(
                    f'tip link {tip_link!r} is not below base link {base_link!r}')
            if base_link != root:
                path = path[names.index(base_link) + 1:]
        selected = [j for j in path if j.type in _MOVABLE]
    else:
        selected = [j for j in robot.joints if j.type not in ('fixed',)]
        if base_link is not None:
            below = set()
            stack = [base_link]
            while stack:
                link = stack.pop()
                for joint in children[link]:
                    below.add(joint.name)
                    stack.append(joint.child)
            selected = [j for j in selected if j.name in below]
        selected.sort(key=lambda j: len(path_from_root(j.child)))
    if not selected:
        raise UnsupportedChain('the selection contains no movable joint')
    for joint in selected:
        if joint.type not in _MOVABLE:
            raise UnsupportedChain(
                f'joint {joint.name!r} is of type {joint.type!r}; the chain supports '
                'revolute, continuous and prismatic joints')
        if joint.mimic is not None:
            raise UnsupportedChain(
                f'joint {joint.name!r} mimics {joint.mimic.joint!r}; mimic joints cannot be '
                'part of the actuated chain')
    # Serial check: each selected joint must lie below the previous one.
    for previous, joint in zip(selected, selected[1:]):
        if previous not in path_from_root(joint.child):
            raise UnsupportedChain(
                f'joints {previous.name!r} and {joint.name!r} are on different branches of the '
                'tree; select one serial chain with tip_link or an explicit joint list')
    selected_names = [j.name for j in selected]
    for name in locked:
        if name in selected_names:
            raise InvalidLimits('is in the chain and cannot also be locked', joint=name)

    base = base_link if base_link is not None else root
    first_path = path_from_root(selected[0].child)
    if base != root and base not in [j.child for j in first_path]:
        raise UnsupportedChain(f'joint {selected[0].name!r} is not below base link {base!r}')

    # ---- positions of joints outside the chain (locked as rigid load)
    def locked_position(joint: Any, seen: tuple[str, ...] = ()) -> float:
        if joint.type == 'fixed':
            return 0.0
        if joint.type in ('floating', 'planar'):
            raise UnsupportedChain(
                f'joint {joint.name!r} of type {joint.type!r} cannot be locked; '
                'only revolute, continuous and prismatic joints can')
        if joint.mimic is not None and joint.name not in locked:
            if joint.mimic.joint in selected_names:
                raise UnsupportedChain(
                    f'joint {joint.name!r} mimics the chain joint {joint.mimic.joint!r}; '
                    'mimic joints that follow the chain are not supported')
            if joint.mimic.joint not in joints or joint.mimic.joint in seen:
                raise UnsupportedChain(f'joint {joint.name!r} has an invalid mimic reference')
            other = locked_position(joints[joint.mimic.joint], seen + (joint.name,))
            multiplier = joint.mimic.multiplier if joint.mimic.multiplier is not None else 1.0
            offset = joint.mimic.offset if joint.mimic.offset is not None else 0.0
            return multiplier * other + offset
        value = float(locked.get(joint.name, 0.0))
        if not math.isfinite(value):
            raise InvalidLimits(f'locked position must be finite, got {value}', joint.name)
        limit = joint.limit
        if joint.type != 'continuous' and limit is not None and limit.lower is not None \
                and limit.upper is not None and limit.lower < limit.upper:
            if joint.name in locked and not limit.lower <= value <= limit.upper:
                raise InvalidLimits(
                    f'locked position {value} is outside [{limit.lower}, {limit.upper}]',
                    joint.name)
            value = min(max(value, limit.lower), limit.upper)
        return value

    def joint_motion(joint: Any, position: float) -> tuple[np.ndarray, np.ndarray]:
        axis = _joint_axis(joint)
        if joint.type in ('revolute', 'continuous'):
            return axis_angle_matrix(axis, np.array(position)), np.zeros(3)
        if joint.type == 'prismatic':
            return np.eye(3), axis * position
        return np.eye(3), np.zeros(3)

    # ---- pose of every link relative to the body that carries it
    body_of_joint = {joint.name: k for k, joint in enumerate(selected)}
    frames: dict[str, _Frame] = {}
    locked_used: dict[str, float] = {}
    # The base frame: pose of links above the chain relative to the base link. Links that
    # are not ancestors of the base or below it are irrelevant (fixed to the world).
    root_to_base_rotation = np.eye(3)
    for joint in path_from_root(base):
        position = locked_position(joint)
        if joint.type != 'fixed':
            locked_used[joint.name] = position
        rot_o, trans_o = _origin(joint.origin)
        rot_m, _ = joint_motion(joint, position)
        root_to_base_rotation = root_to_base_rotation @ rot_o @ rot_m
    frames[base] = _Frame(-1, np.eye(3), np.zeros(3))
    stack = [base]
    placements: dict[int, tuple[np.ndarray, np.ndarray]] = {}
    while stack:
        link = stack.pop()
        frame = frames[link]
        for joint in children[link]:
            rot_o, trans_o = _origin(joint.origin)
            placement_rot = frame.rotation @ rot_o
            placement_trans = frame.rotation @ trans_o + frame.translation
            if joint.name in body_of_joint:
                k = body_of_joint[joint.name]
                if frame.body != k - 1:
                    raise UnsupportedChain(
                        f'joint {joint.name!r} is not carried by the previous chain joint')
                placements[k] = (placement_rot, placement_trans)
                frames[joint.child] = _Frame(k, np.eye(3), np.zeros(3))
            else:
                position = locked_position(joint)
                if joint.type != 'fixed':
                    if frame.body >= 0 or joint.name in locked:
                        locked_used[joint.name] = position
                rot_m, trans_m = joint_motion(joint, position)
                frames[joint.child] = _Frame(
                    frame.body, placement_rot @ rot_m, placement_rot @ trans_m + placement_trans)
            stack.append(joint.child)
    if len(placements) != len(selected):
        raise UnsupportedChain(f'the chain joints are not all below base link {base!r}')

    # ---- inertias, merged per moving body
    parts: list[list[tuple[float, np.ndarray, np.ndarray]]] = [[] for _ in selected]
    for link_name, frame in frames.items():
        link = links[link_name]
        if link.inertial is None:
            continue  # a pure frame (tool point, sensor frame): carries no mass
        mass, com, inertia = _validated_inertial(link)
        if frame.body < 0 or mass == 0.0:
            continue  # fixed to the world, or a massless frame: no part of the dynamics
        parts[frame.body].append((
            mass, frame.rotation @ com + frame.translation,
            frame.rotation @ inertia @ frame.rotation.T))
    body_mass, body_com, body_inertia = [], [], []
    for k in range(len(selected)):
        mass, com, inertia = combine_inertias(parts[k])
        body_mass.append(mass)
        body_com.append(com)
        body_inertia.append(inertia)
    _check_bodies_move_inertia(selected, placements, body_mass, body_com, body_inertia)

    # ---- limits and friction
    lower, upper, velocity, effort, viscous, coulomb, notes = _joint_limits(selected, spec)

    # ---- tip, payload, gravity
    tip = tip_link if tip_link is not None else selected[-1].child
    tip_frame = frames.get(tip)
    if tip_frame is None or tip_frame.body != len(selected) - 1:
        raise UnsupportedChain(f'tip link {tip!r} is not carried by the last chain joint')
    payload = _payload(spec)
    point_in_body = tip_frame.rotation @ np.array(payload.point) + tip_frame.translation
    gravity_root = np.array(spec.get('gravity', STANDARD_GRAVITY), dtype=float)
    if gravity_root.shape != (3,) or not np.all(np.isfinite(gravity_root)):
        raise InvalidLimits(f'gravity must be three finite numbers, got {spec.get("gravity")}')
    gravity = root_to_base_rotation.T @ gravity_root

    return RobotModel(
        name=robot.name or 'robot',
        joint_names=selected_names,
        joint_kinds=['prismatic' if j.type == 'prismatic' else
                     ('continuous' if j.type == 'continuous' else 'revolute') for j in selected],
        base_link=base,
        tip_link=tip,
        joint_rotation=np.array([placements[k][0] for k in range(len(selected))]),
        joint_translation=np.array([placements[k][1] for k in range(len(selected))]),
        joint_axis=np.array([_joint_axis(j) for j in selected]),
        body_mass=np.array(body_mass),
        body_com=np.array(body_com),
        body_inertia=np.array(body_inertia),
        position_lower=lower,
        position_upper=upper,
        velocity_limit=velocity,
        effort_limit=effort,
        viscous_friction=viscous,
        coulomb_friction=coulomb,
        gravity=gravity,
        payload=payload,
        payload_point_in_body=point_in_body,
        locked_positions=locked_used,
        notes=notes,
        uncertainty=UncertaintySet.from_mapping(spec.get('uncertainty')),
    )


def _joint_axis(joint: Any) -> np.ndarray:
    axis = np.array(joint.axis if joint.axis is not None else [1.0, 0.0, 0.0], dtype=float)
    norm = float(np.linalg.norm(axis))
    if not math.isfinite(norm) or norm < 1e-9:
        raise RobotDescriptionError(f'joint {joint.name!r} has a zero or invalid axis {axis}')
    return axis / norm


def _validated_inertial(link: Any) -> tuple[float, np.ndarray, np.ndarray]:
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
    rotation, com = _origin(inertial.origin)
    if mass == 0.0:
        if np.any(inertia != 0.0):
            raise InvalidInertia(
                link.name, 'mass is 0 but the inertia tensor is not zero: a massless link '
                'has no rotational inertia (give its mass, or zero its inertia)')
        return 0.0, com, np.zeros((3, 3))
    principal = np.linalg.eigvalsh(inertia)
    slack = _INERTIA_TOLERANCE * float(np.abs(principal).sum())
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
    axis = _joint_axis(joint)
    if joint.type == 'prismatic':
        return np.concatenate([np.zeros(3), axis])
    return np.concatenate([axis, np.zeros(3)])


def _check_bodies_move_inertia(
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
            axis = _joint_axis(joint)
            about_origin = inertia_about_origin(mass, com, inertia)
            own = float(axis @ about_origin @ axis)
            scale = float(np.trace(about_origin))
        if own > 0.0 and own > _INERTIA_TOLERANCE * scale:
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
    return bool(principal[0] > _INERTIA_TOLERANCE * max(float(principal.sum()), 0.0)
                and principal[0] > 0.0)


# ---------------------------------------------------------------------- limits file
_LIMIT_KEYS = {'format', 'chain', 'locked_joints', 'joints', 'payload', 'gravity',
               'uncertainty'}
_JOINT_KEYS = {'position', 'velocity', 'effort', 'viscous_friction', 'coulomb_friction'}


def _read_limits(limits: str | Path | Mapping[str, Any] | None) -> dict[str, Any]:
    if limits is None:
        return {}
    if isinstance(limits, Mapping):
        spec = dict(limits)
        source = '<limits mapping>'
    else:
        spec = read_yaml_file(limits, InvalidLimits, 'limits file')
        source = str(limits)
        if spec is None:
            spec = {}
    if not isinstance(spec, Mapping):
        raise InvalidLimits(f'{source}: the limits file must be a mapping')
    unknown = set(spec) - _LIMIT_KEYS
    if unknown:
        raise InvalidLimits(f'{source}: unknown keys {sorted(unknown)}; '
                            f'allowed: {sorted(_LIMIT_KEYS)}')
    if 'format' in spec and spec['format'] != LIMITS_FORMAT:
        raise InvalidLimits(f'{source}: format {spec["format"]!r} is not {LIMITS_FORMAT!r}')
    chain = spec.get('chain', {}) or {}
    if not isinstance(chain, Mapping) or set(chain) - {'base_link', 'tip_link', 'joints'}:
        raise InvalidLimits(f'{source}: chain takes base_link, tip_link or joints')
    for key in ('locked_joints', 'joints', 'payload', 'uncertainty'):
        if not isinstance(spec.get(key, {}) or {}, Mapping):
            raise InvalidLimits(f'{source}: {key} must be a mapping')
    for name, entry in (spec.get('joints') or {}).items():
        if not isinstance(entry, Mapping) or set(entry) - _JOINT_KEYS:
            raise InvalidLimits(f'entries must be among {sorted(_JOINT_KEYS)}', joint=name)
    return spec


def _number(value: Any, what: str, joint: str) -> float:
    try:
        number = float(value)
    except (TypeError, ValueError) as err:
        raise InvalidLimits(f'{what} must be a number, got {value!r}', joint) from err
    if not math.isfinite(number):
        raise InvalidLimits(f'{what} must be finite, got {value!r}', joint)
    return number


def _symmetric_bound(value: Any, what: str, joint: str, notes: list[str]) -> float:
    """A positive symmetric bound from a scalar or a [lo, hi] pair (tighter side kept)."""
    if isinstance(value, Iterable) and not isinstance(value, str):
        pair = [_number(v, what, joint) for v in value]
        if len(pair) != 2 or not pair[0] < 0.0 < pair[1]:
            raise InvalidLimits(f'{what} range must be [lo < 0, hi > 0], got {value}', joint)
        bound = min(-pair[0], pair[1])
        if -pair[0] != pair[1]:
            notes.append(f'joint {joint!r}: asymmetric {what} limit {pair} replaced by the '
                         f'tighter symmetric bound +/-{bound:g}')
        return bound
    bound = _number(value, what, joint)
    if bound <= 0.0:
        raise InvalidLimits(f'{what} limit must be positive, got {bound:g}', joint)
    return bound


def _joint_limits(selected: list[Any], spec: Mapping[str, Any]) -> tuple[Any, ...]:
    overrides = spec.get('joints') or {}
    names = [j.name for j in selected]
    for name in overrides:
        if name not in names:
            raise InvalidLimits(f'limits file names joint {name!r}, which is not in the chain '
                                f'{names}')
    notes: list[str] = []
    lower, upper, velocity, effort, viscous, coulomb = [], [], [], [], [], []
    for joint in selected:
        entry = overrides.get(joint.name, {})
        limit = joint.limit
        if 'position' in entry:
            pair = entry['position']
            if not isinstance(pair, Sequence) or isinstance(pair, str) or len(pair) != 2:
                raise InvalidLimits(f'position must be [lower, upper], got {pair!r}', joint.name)
            lo, hi = (_number(v, 'position limit', joint.name) for v in pair)
        elif joint.type == 'continuous' or limit is None or limit.lower is None \
                or limit.upper is None:
            raise InvalidLimits('has no position limits; give them in the limits file',
                                joint.name)
        else:
            lo = _number(limit.lower, 'position limit', joint.name)
            hi = _number(limit.upper, 'position limit', joint.name)
        if not lo < hi:
            raise InvalidLimits(f'lower position limit {lo:g} is not below upper {hi:g}',
                                joint.name)
        lower.append(lo)
        upper.append(hi)
        for what, key, store in (('velocity', 'velocity', velocity),
                                 ('effort', 'effort', effort)):
            if key in entry:
                store.append(_symmetric_bound(entry[key], what, joint.name, notes))
            elif limit is None or getattr(limit, key) is None:
                raise InvalidLimits(f'has no {what} limit; give it in the URDF or the limits '
                                    'file', joint.name)
            else:
                store.append(_symmetric_bound(getattr(limit, key), what, joint.name, notes))
        dynamics = joint.dynamics
        urdf_damping = dynamics.damping if dynamics is not None and dynamics.damping else 0.0
        urdf_friction = dynamics.friction if dynamics is not None and dynamics.friction else 0.0
        for what, key, default, store in (
                ('viscous friction', 'viscous_friction', urdf_damping, viscous),
                ('Coulomb friction', 'coulomb_friction', urdf_friction, coulomb)):
            value = _number(entry.get(key, default), what, joint.name)
            if value < 0.0:
                raise InvalidLimits(f'{what} must be >= 0, got {value:g}', joint.name)
            store.append(value)
    return (np.array(lower), np.array(upper), np.array(velocity), np.array(effort),
            np.array(viscous), np.array(coulomb), notes)


def _payload(spec: Mapping[str, Any]) -> PayloadRange:
    entry = spec.get('payload') or {}
    unknown = set(entry) - {'mass', 'point'}
    if unknown:
        raise InvalidLimits(f'payload takes mass and point, not {sorted(unknown)}')
    mass = entry.get('mass', [0.0, 0.0])
    if isinstance(mass, (int, float)):
        mass = [mass, mass]
    try:
        lo, hi = (float(m) for m in mass)
        point = tuple(float(p) for p in entry.get('point', [0.0, 0.0, 0.0]))
    except (TypeError, ValueError) as err:
        raise InvalidLimits(f'payload mass must be [min, max] and point [x, y, z]: {err}') \
            from err
    if not (math.isfinite(lo) and math.isfinite(hi) and 0.0 <= lo <= hi):
        raise InvalidLimits(f'payload mass range must satisfy 0 <= min <= max, got {mass}')
    if len(point) != 3 or not all(math.isfinite(p) for p in point):
        raise InvalidLimits(f'payload point must be three finite numbers, got {point}')
    return PayloadRange(lo, hi, point)  # type: ignore[arg-type]
