"""The limits file: our YAML beside the URDF (``docs/limits-file.md`` describes it).

It selects the chain, locks joints outside it, overrides the URDF's position, velocity and
effort limits and friction per joint, and declares the payload range, gravity and the
uncertainty. This module reads and checks it; :mod:`safety_filter.core.urdf_reader` applies
it to the URDF's joints while building a :class:`~safety_filter.core.robot_model.RobotModel`.
"""

from __future__ import annotations

import math
from collections.abc import Iterable, Mapping, Sequence
from pathlib import Path
from typing import Any

import numpy as np

from safety_filter.core.yaml_files import read_yaml_file
from safety_filter.errors import InvalidLimits

LIMITS_FORMAT = 'safety_filter/limits-1'
STANDARD_GRAVITY = (0.0, 0.0, -9.80665)  # [m/s^2], ISO 80000-3 standard acceleration
_LIMIT_KEYS = {'format', 'chain', 'locked_joints', 'joints', 'payload', 'gravity',
               'uncertainty'}
_JOINT_KEYS = {'position', 'velocity', 'effort', 'viscous_friction', 'coulomb_friction'}


def read_limits(limits: str | Path | Mapping[str, Any] | None) -> dict[str, Any]:
    """The limits file (a path) or its parsed content, checked for its keys and format
    (``{}`` for ``None``); the per-joint values are checked by :func:`joint_limits`."""
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


def joint_limits(selected: list[Any], spec: Mapping[str, Any]) -> tuple[Any, ...]:
    """Per chain joint (URDF joints, base to tip), the limits file's values or else the
    URDF's: ``(lower, upper, velocity, effort, viscous, coulomb, notes)``, five arrays and
    the notes on what was replaced (asymmetric limits made symmetric)."""
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


def payload_range(spec: Mapping[str, Any]) -> tuple[float, float, tuple[float, float, float]]:
    """The ``payload`` section: ``(mass_min [kg], mass_max [kg], point [m] in the tip link)``
    (no payload when absent)."""
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
    return lo, hi, point  # type: ignore[return-value]


def gravity_in_root(spec: Mapping[str, Any]) -> np.ndarray:
    """The ``gravity`` entry [m/s^2] in the URDF root frame (default: standard gravity)."""
    gravity = np.array(spec.get('gravity', STANDARD_GRAVITY), dtype=float)
    if gravity.shape != (3,) or not np.all(np.isfinite(gravity)):
        raise InvalidLimits(f'gravity must be three finite numbers, got {spec.get("gravity")}')
    return gravity
