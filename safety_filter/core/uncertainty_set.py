"""The declared uncertainty of an arm: :class:`UncertaintySet`, read from the limits file.

The limits file's ``uncertainty`` section (``docs/limits-file.md``) says by how much the arm
the filter drives may differ from the filter's model. Every :class:`RobotModel` carries one
set (part of its content hash); the plants drawn from it and the torque bounds it implies
are in :mod:`safety_filter.core.model_uncertainty`.

Each field has a default that describes a typical arm whose URDF comes from CAD; none is
zero. Where a default comes from is said beside it: "common practice" for a fact of the
trade with no single source, "from memory" for a value recalled rather than looked up.
"""

from __future__ import annotations

import math
from collections.abc import Mapping
from dataclasses import asdict, dataclass, fields
from typing import Any, Protocol

from safety_filter.errors import InvalidLimits


class _PayloadRangeLike(Protocol):
    mass_min: float
    mass_max: float


class _HasPayloadRange(Protocol):
    """What the payload queries need of a model (the robot model module imports this one,
    so the model type cannot be named here)."""

    @property
    def payload(self) -> _PayloadRangeLike: ...


@dataclass(frozen=True)
class UncertaintySet:
    """The declared uncertainty of an arm (relative values are fractions, not per cent).

    Attributes:
        payload_told_within: ``None`` (the default): the filter is not told the payload, which
            may be anywhere in the model's payload range. A number [kg]: the filter will be
            told the mounted payload to within this tolerance (narrows the set).
        link_mass_error: relative error of each link's mass. Default 0.10: CAD inertias are
            rarely better than 10 % (common practice; cables, fasteners and lubricant are
            not in the CAD model).
        link_inertia_error: relative error of each link's rotational inertia. Default 0.10
            (common practice, as above).
        com_error: how far each link's centre of mass may sit from where the URDF puts it
            [m]. Default 0.005 (from memory: a few millimetres between CAD and a weighed part).
        viscous_friction_spread: the true viscous friction of joint ``i`` lies within
            ``+- spread * effort_limit_i / velocity_limit_i`` of the model's value (never
            below zero). Default 0.02 (from memory: geared joints lose a few per cent of
            rated torque to friction, and it drifts with temperature).
        coulomb_friction_spread: likewise for Coulomb friction, ``+- spread * effort_limit_i``.
            Default 0.02 (from memory, as above).
        torque_error_relative: the driver applies ``u (1 + e_r) + e_a`` with
            ``|e_r| <= torque_error_relative``. Default 0.03 (from memory: current-controlled
            drives track torque to a few per cent).
        torque_error_absolute: ``|e_a| <= torque_error_absolute * effort_limit``. Default
            0.005 (from memory: torque offset of a calibrated drive, half a per cent of rated).
        position_noise: noise on measured positions [rad or m]. Default 1e-4 (common
            practice: about a 16-bit encoder per turn).
        velocity_noise: noise on measured velocities [rad/s or m/s]. Default 0.01 (from
            memory: a filtered encoder derivative at 1 kHz).
        delay_periods: control periods between the measurement and the torque that acts on
            it. Default 1 (common practice: a synchronous loop applies the command computed
            from one sample at the next).
    """

    payload_told_within: float | None = None
    link_mass_error: float = 0.10
    link_inertia_error: float = 0.10
    com_error: float = 0.005
    viscous_friction_spread: float = 0.02
    coulomb_friction_spread: float = 0.02
    torque_error_relative: float = 0.03
    torque_error_absolute: float = 0.005
    position_noise: float = 1e-4
    velocity_noise: float = 0.01
    delay_periods: int = 1

    def __post_init__(self) -> None:
        for item in fields(self):
            value = getattr(self, item.name)
            if item.name == 'payload_told_within' and value is None:
                continue
            if isinstance(value, bool) or not isinstance(value, (int, float)) \
                    or not math.isfinite(value) or value < 0:
                raise InvalidLimits(f'uncertainty: {item.name} must be a finite number >= 0, '
                                    f'got {value!r}')
        for name in ('link_mass_error', 'link_inertia_error', 'torque_error_relative'):
            if getattr(self, name) >= 0.5:
                raise InvalidLimits(f'uncertainty: {name} must be below 0.5 (a relative error '
                                    f'of 50 % or more is not a model), got {getattr(self, name)}')
        if int(self.delay_periods) != self.delay_periods:
            raise InvalidLimits(f'uncertainty: delay_periods must be a whole number, got '
                                f'{self.delay_periods}')

    @classmethod
    def exact(cls) -> UncertaintySet:
        """The set that holds only the nominal model, the filter told the payload exactly."""
        return cls(payload_told_within=0.0, link_mass_error=0.0, link_inertia_error=0.0,
                   com_error=0.0,
                   viscous_friction_spread=0.0, coulomb_friction_spread=0.0,
                   torque_error_relative=0.0, torque_error_absolute=0.0, position_noise=0.0,
                   velocity_noise=0.0, delay_periods=0)

    @classmethod
    def from_mapping(cls, entry: Mapping[str, Any] | None) -> UncertaintySet:
        """Read the ``uncertainty`` section of a limits file (missing keys keep defaults)."""
        if entry is None:
            return cls()
        if not isinstance(entry, Mapping):
            raise InvalidLimits('uncertainty must be a mapping')
        known = {item.name for item in fields(cls)}
        unknown = set(entry) - known
        if unknown:
            raise InvalidLimits(f'uncertainty: unknown keys {sorted(unknown)}; allowed: '
                                f'{sorted(known)}')
        values: dict[str, Any] = {}
        for key, value in entry.items():
            if key == 'payload_told_within' and value is None:
                values[key] = None
                continue
            try:
                values[key] = int(value) if key == 'delay_periods' else float(value)
            except (TypeError, ValueError) as err:
                raise InvalidLimits(f'uncertainty: {key} must be a number, got {value!r}') \
                    from err
            if key == 'delay_periods' and float(value) != values[key]:
                raise InvalidLimits(f'uncertainty: delay_periods must be a whole number, got '
                                    f'{value!r}')
        return cls(**values)

    def record(self) -> dict[str, Any]:
        """Plain form for the certificate (covered by its id)."""
        return asdict(self)

    def payload_error_range(self, model: _HasPayloadRange, told_mass: float | None = None
                            ) -> tuple[float, float]:
        """Payload masses [kg] the plant may carry when the filter uses ``told_mass``.

        Not told: the whole payload range. Told: ``told_mass +- payload_told_within``,
        within the range.
        """
        low, high = model.payload.mass_min, model.payload.mass_max
        if self.payload_told_within is None or told_mass is None:
            return low, high
        return (max(low, told_mass - self.payload_told_within),
                min(high, told_mass + self.payload_told_within))

    def filter_payload(self, model: _HasPayloadRange) -> float:
        """The payload mass [kg] the filter's model uses when it is not told one."""
        return 0.5 * (model.payload.mass_min + model.payload.mass_max)
