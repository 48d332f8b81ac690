"""From a URDF (or xacro) file and a limits file to the fields of a robot model.

Reads the URDF (expanding xacro), selects the actuated serial chain, locks the joints left
out of it at a position and merges what they carry into the moving bodies as rigid load,
checks the inertial data (physical tensors; no chain joint that moves nothing), and applies
the limits file (:mod:`safety_filter.core.limits_file`). :meth:`RobotModel.from_urdf
<safety_filter.core.robot_model.RobotModel.from_urdf>` is the entry point; it builds the
model from :func:`build_model_fields`.
"""

from __future__ import annotations

import math
from collections.abc import Mapping, Sequence
from dataclasses import dataclass
from pathlib import Path
from typing import Any

import numpy as np

from safety_filter.core.limits_file import gravity_in_root, joint_limits, payload_range
from safety_filter.core.spatial_algebra import (
    axis_angle_matrix,
    combine_inertias,
)
from safety_filter.core.uncertainty_set import UncertaintySet
from safety_filter.core.urdf_inertials import (
    check_bodies_move_inertia,
    joint_axis,
    urdf_origin,
    validated_inertial,
)
from safety_filter.errors import (
    InvalidLimits,
    RobotDescriptionError,
    UnknownJoint,
    UnknownLink,
    UnsupportedChain,
)

_MOVABLE = ('revolute', 'continuous', 'prismatic')
XACRO_SUFFIX = '.xacro'
# A URDF that still holds xacro macros: urdf_parser_py would skip the macro elements
# silently and build a model without the links they define.
_XACRO_MARKERS = ('xmlns:xacro=', '<xacro:')


def read_urdf_text(urdf: str | Path) -> tuple[str, str]:
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


@dataclass
class _Frame:
    """Pose of a link relative to the moving body that carries it (-1: the fixed base)."""

    body: int
    rotation: np.ndarray
    translation: np.ndarray


def build_model_fields(
    xml_text: str,
    source: str,
    spec: Mapping[str, Any],
    base_link: str | None,
    tip_link: str | None,
    joint_selection: Sequence[str] | None,
    locked: dict[str, float],
) -> dict[str, Any]:
    """The keyword arguments of :class:`~safety_filter.core.robot_model.RobotModel` for the
    chain of ``xml_text`` selected by ``base_link``/``tip_link`` or ``joint_selection``,
    with the joints of ``locked`` (and every other joint outside the chain) locked as rigid
    load, and the limits file ``spec`` applied. ``payload`` is ``(mass_min, mass_max,
    point)``; the model builds its :class:`PayloadRange` (this module cannot name the model
    module, which imports it).

    Raises:
        RobotDescriptionError and its subclasses, InvalidLimits: with the joint or link.
    """
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
        axis = joint_axis(joint)
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
        rot_o, trans_o = urdf_origin(joint.origin)
        rot_m, _ = joint_motion(joint, position)
        root_to_base_rotation = root_to_base_rotation @ rot_o @ rot_m
    frames[base] = _Frame(-1, np.eye(3), np.zeros(3))
    stack = [base]
    placements: dict[int, tuple[np.ndarray, np.ndarray]] = {}
    while stack:
        link = stack.pop()
        frame = frames[link]
        for joint in children[link]:
            rot_o, trans_o = urdf_origin(joint.origin)
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
        mass, com, inertia = validated_inertial(link)
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
    check_bodies_move_inertia(selected, placements, body_mass, body_com, body_inertia)

    # ---- limits and friction
    lower, upper, velocity, effort, viscous, coulomb, notes = joint_limits(selected, spec)

    # ---- tip, payload, gravity
    tip = tip_link if tip_link is not None else selected[-1].child
    tip_frame = frames.get(tip)
    if tip_frame is None or tip_frame.body != len(selected) - 1:
        raise UnsupportedChain(f'tip link {tip!r} is not carried by the last chain joint')
    payload = payload_range(spec)
    point_in_body = tip_frame.rotation @ np.array(payload[2]) + tip_frame.translation
    gravity = root_to_base_rotation.T @ gravity_in_root(spec)

    return dict(
        name=robot.name or 'robot',
        joint_names=selected_names,
        joint_kinds=['prismatic' if j.type == 'prismatic' else
                     ('continuous' if j.type == 'continuous' else 'revolute') for j in selected],
        base_link=base,
        tip_link=tip,
        joint_rotation=np.array([placements[k][0] for k in range(len(selected))]),
        joint_translation=np.array([placements[k][1] for k in range(len(selected))]),
        joint_axis=np.array([joint_axis(j) for j in selected]),
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

