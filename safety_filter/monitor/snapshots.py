"""What the live monitor is given (no ROS): the filter node's names, its status and
diagnostics as snapshots, and the joint limits to show values against.

* :func:`split_node_name`, :func:`diagnostic_name`, :func:`status_topic`: the names under
  which a filter node publishes;
* :class:`StatusSnapshot` (one ``~/status`` array, with its :class:`StatusLayout`) and
  :class:`DiagnosticSnapshot` (the filter's ``'<node>: filter'`` status of ``/diagnostics``);
* :class:`JointLimits`: the joint names and limits the values are shown against, from the
  certificate parameter file or the node's parameters.

:class:`safety_filter.monitor.state.MonitorState` follows them.
"""

from __future__ import annotations

import math
from collections.abc import Mapping, Sequence
from dataclasses import dataclass
from pathlib import Path
from typing import Any

from safety_filter.errors import (
    FileFormatError,
    InvalidValue,
    ShapeMismatch,
    StatusLayoutError,
)
from safety_filter.online.mode_codes import mode_name

LEVEL_NAMES = {0: 'OK', 1: 'WARN', 2: 'ERROR', 3: 'STALE'}
LEVEL_OK, LEVEL_WARN, LEVEL_ERROR, LEVEL_STALE = 0, 1, 2, 3
DIAGNOSTIC_NAME_SUFFIX = ': filter'
MODE_INACTIVE = 'inactive'


# ---------------------------------------------------------------------- names
def split_node_name(node_name: str) -> tuple[str, str]:
    """``(base name, fully qualified name)`` of ``'safety_filter'`` or ``'/ns/safety_filter'``.

    Raises:
        InvalidValue: an empty name or one ending in ``/``.
    """
    text = node_name.strip()
    base = text.rstrip('/').rsplit('/', 1)[-1]
    if not base or text.endswith('/'):
        raise InvalidValue('node name', node_name, 'a ROS node name, e.g. safety_filter or '
                           '/arm1/safety_filter', detail=f'not a node name: {node_name!r}')
    full = text if text.startswith('/') else '/' + text
    return base, full


def diagnostic_name(node_name: str) -> str:
    """The name of the filter's diagnostic status: ``'<fully qualified name>: filter'``
    (``'/arm1/safety_filter: filter'``; :mod:`safety_filter.online.status_layout`)."""
    return split_node_name(node_name)[1] + DIAGNOSTIC_NAME_SUFFIX


def status_topic(node_name: str) -> str:
    """The filter's ``~/status`` topic: ``'/<namespace>/<node>/status'``."""
    return split_node_name(node_name)[1] + '/status'


# ---------------------------------------------------------------------- snapshots
def _number(text: str | None) -> float:
    if text is None:
        return math.nan
    try:
        return float(text)
    except ValueError:
        return math.nan


@dataclass(frozen=True)
class StatusLayout:
    """Field names of a ``~/status`` array (``layout.dim[0].label``, comma separated)."""

    fields: tuple[str, ...]
    joint_names: tuple[str, ...]
    index: Mapping[str, int]

    @classmethod
    def from_label(cls, label: str) -> StatusLayout:
        """Parse the label; joints are those of the ``margin.<joint>`` fields, in order.

        Raises:
            StatusLayoutError: an empty label or repeated field names.
        """
        fields = tuple(name.strip() for name in label.split(',') if name.strip())
        if not fields:
            raise StatusLayoutError('status layout without field names')
        if len(set(fields)) != len(fields):
            raise StatusLayoutError('status layout with repeated field names')
        joints = tuple(name[len('margin.'):] for name in fields if name.startswith('margin.'))
        return cls(fields, joints, {name: i for i, name in enumerate(fields)})


@dataclass(frozen=True)
class StatusSnapshot:
    """One ``~/status`` message.

    Attributes:
        layout: its field names.
        values: the array, one value per field (missing trailing values read as NaN).
        received_s: when it arrived, wall clock [s since the epoch].
    """

    layout: StatusLayout
    values: Sequence[float]
    received_s: float

    @classmethod
    def from_fields(cls, fields: Mapping[str, float], received_s: float) -> StatusSnapshot:
        """A snapshot from ``{field: value}`` (for tests and tools)."""
        layout = StatusLayout.from_label(','.join(fields))
        return cls(layout, tuple(float(v) for v in fields.values()), received_s)

    def get(self, name: str) -> float:
        """Value of field ``name``; NaN when absent."""
        i = self.layout.index.get(name)
        if i is None or i >= len(self.values):
            return math.nan
        return float(self.values[i])

    @property
    def joint_names(self) -> tuple[str, ...]:
        """The joints of the layout's ``margin.<joint>`` fields, in order."""
        return self.layout.joint_names

    def joint(self, quantity: str, joint: str) -> float:
        """``quantity`` (margin, torque, nominal, position, velocity) of ``joint``."""
        return self.get(f'{quantity}.{joint}')

    @property
    def mode(self) -> str | None:
        """Mode name from the numeric code; None when absent."""
        return mode_name(self.get('mode'))

    @property
    def stamp_s(self) -> float:
        """The filter node's clock at the step [s] (NaN when absent)."""
        return self.get('stamp_s')


@dataclass(frozen=True)
class DiagnosticSnapshot:
    """The filter's diagnostic status (one entry of a ``/diagnostics`` message).

    Attributes:
        level: 0 OK, 1 WARN, 2 ERROR, 3 STALE.
        message: the status message.
        values: its key values.
        received_s: arrival, wall clock [s since the epoch].
        stamp_s: the message header's stamp, the filter node's clock [s]; None if unset.
    """

    level: int
    message: str
    values: Mapping[str, str]
    received_s: float
    stamp_s: float | None = None

    def number(self, key: str) -> float:
        """Key value ``key`` as a number (NaN when missing or not a number)."""
        return _number(self.values.get(key))

    @property
    def level_name(self) -> str:
        """``'OK'``, ``'WARN'``, ``'ERROR'``, ``'STALE'`` (or ``'level N'``)."""
        return LEVEL_NAMES.get(self.level, f'level {self.level}')

    @property
    def certificate_id(self) -> str | None:
        """The id of the certificate the node runs; None when not reported."""
        return self.values.get('certificate_id') or None

    @property
    def active(self) -> bool:
        """False only when the node reports itself inactive."""
        return self.values.get('active', 'true') != 'false'

    @property
    def mode(self) -> str | None:
        """The node's mode: the last step's, ``'inactive'`` while inactive, None before any."""
        if not self.active:
            return MODE_INACTIVE
        mode = self.values.get('mode')
        return mode if mode and mode != 'none' else None

    @property
    def watchdog_tripped(self) -> bool:
        """The node reports its joint-state watchdog tripped (key ``watchdog_tripped``)."""
        # Imported here: health_verdict loads the filter step, which the monitor's command
        # line (its --help above all) need not.
        from safety_filter.online.health_verdict import WATCHDOG_KEY

        flag = self.values.get(WATCHDOG_KEY)
        if flag is not None:
            return flag == 'true'
        # Recordings and event logs of earlier releases have no such key: their message
        # was the only sign of a trip.
        return 'watchdog tripped' in self.message


# ---------------------------------------------------------------------- limits
@dataclass(frozen=True)
class JointLimits:
    """Joint names and limits in the certificate's joint order.

    Attributes:
        joint_names: base to tip.
        position_lower, position_upper: [rad or m]; velocity_limit [rad/s or m/s];
            effort_limit [N m or N].
        certificate_id: the certificate's id (None when unknown).
        source: where they came from (for the screen).
    """

    joint_names: tuple[str, ...]
    position_lower: tuple[float, ...]
    position_upper: tuple[float, ...]
    velocity_limit: tuple[float, ...]
    effort_limit: tuple[float, ...]
    certificate_id: str | None = None
    source: str = ''

    def __post_init__(self) -> None:
        n = len(self.joint_names)
        for name in ('position_lower', 'position_upper', 'velocity_limit', 'effort_limit'):
            if len(getattr(self, name)) != n:
                raise ShapeMismatch(f'limits: {name}', n, len(getattr(self, name)),
                                    detail=f'{name} has {len(getattr(self, name))} entries '
                                    f'for {n} joints')

    @classmethod
    def from_parameters(cls, parameters: Mapping[str, Any], source: str) -> JointLimits:
        """From certificate parameters (the ``ros__parameters`` of a certificate file, or the
        filter node's parameters of the same names).

        Raises:
            FileFormatError: an entry missing or malformed.
        """
        try:
            names = tuple(str(x) for x in parameters['joint_names'])
            vectors = {key: tuple(float(x) for x in parameters[key]) for key in (
                'position_lower', 'position_upper', 'velocity_limit', 'effort_limit')}
        except KeyError as err:
            raise FileFormatError(f'limits: no entry {err.args[0]!r} ({source})') from err
        except (TypeError, ValueError) as err:
            raise FileFormatError(f'limits: malformed entry ({source}): {err}') from err
        certificate_id = parameters.get('certificate_id')
        return cls(names, certificate_id=str(certificate_id) if certificate_id else None,
                   source=source, **vectors)

    @classmethod
    def from_certificate_file(cls, path: str | Path) -> JointLimits:
        """From a certificate parameter file written by ``safety-filter certify`` (checked:
        an edited file is refused, as the node refuses it)."""
        from safety_filter.core.certificate import Certificate

        certificate = Certificate.load(path)
        return cls.from_parameters(certificate.to_parameters(), f'certificate file {path}')

    def of(self, joint: str) -> tuple[float, float, float, float] | None:
        """``(lower, upper, velocity limit, effort limit)`` of ``joint``; None if unknown."""
        try:
            i = self.joint_names.index(joint)
        except ValueError:
            return None
        return (self.position_lower[i], self.position_upper[i], self.velocity_limit[i],
                self.effort_limit[i])
