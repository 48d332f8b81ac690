"""What the filter node publishes about itself, and how to read it back (no ROS imports).

The filter node, the replay, the bag readers and the monitor all read or write the same
per-step status record and diagnostic status; this module is their one definition.

Status records
--------------
One ``std_msgs/Float64MultiArray`` per filter step on ``~/status`` (the replay writes the
same records on ``/replay/status``). The message carries only the numbers: its layout has
no dimension, so that a 1 kHz stream does not resend the same field names every step. The
field names go out **once**, on the topic named like the status topic plus ``_fields``
(:func:`fields_topic`: ``~/status_fields``), as a ``std_msgs/String`` of comma-separated
names, published with transient-local durability: a subscriber that joins later (a
monitor, a bag recorder started after the filter) still receives them, and a bag that
records both topics can be read without knowing the robot.

The fields, in order (:func:`status_field_names`)::

    stamp_s,step,mode,hold_nominal,intervention,solve_time_s,joint_state_age_s,
    nominal_age_s,margin.<joint>...,torque.<joint>...,nominal.<joint>...,
    position.<joint>...,velocity.<joint>...

The two writers (the node and the replay) pack a record with :func:`pack_status`;
:func:`unpack_status` splits one record back into its fields by position (readers of
recordings whose layout may be older go by the field names instead: :func:`decode_fields`).

Earlier releases put the comma-separated names in every message (``layout.dim[0].label``);
:func:`decode_fields` reads both forms, and, for a recording that lacks the ``_fields``
topic, derives the names from the chain's joint names (the certificate's ``joint_names``)
when the record length fits.

Diagnostics
-----------
The node's ``/diagnostics`` status is named after its fully qualified node name plus
``': filter'`` (:func:`diagnostic_name`), e.g. ``'/arm1/safety_filter: filter'``, so that
filters in different namespaces report under different names. Earlier releases used the
base name only (``'safety_filter: filter'``: :func:`legacy_diagnostic_name`).
"""

from __future__ import annotations

import math
from collections.abc import Sequence
from dataclasses import dataclass

import numpy as np

from safety_filter.errors import ShapeMismatch, StatusLayoutError

STATUS_SCALAR_FIELDS = ('stamp_s', 'step', 'mode', 'hold_nominal', 'intervention',
                        'solve_time_s', 'joint_state_age_s', 'nominal_age_s')
STATUS_JOINT_FIELDS = ('margin', 'torque', 'nominal', 'position', 'velocity')
FIELDS_TOPIC_SUFFIX = '_fields'
FIELDS_TYPE = 'std_msgs/msg/String'
DIAGNOSTIC_NAME_SUFFIX = ': filter'
# A barrier margin below this is thin [barrier units: rad or m]: the filter node's
# diagnostics WARN (parameter thin_margin) and the live monitor alarms (--thin-margin).
THIN_MARGIN = 0.01



def status_field_names(joint_names: Sequence[str]) -> list[str]:
    """Field names of a status record, in order, for a chain with ``joint_names``."""
    names = list(STATUS_SCALAR_FIELDS)
    for field in STATUS_JOINT_FIELDS:
        names.extend(f'{field}.{joint}' for joint in joint_names)
    return names


def status_record_size(n_joints: int) -> int:
    """Number of values in a status record of a chain of ``n_joints`` joints."""
    return len(STATUS_SCALAR_FIELDS) + len(STATUS_JOINT_FIELDS) * n_joints


@dataclass(frozen=True, slots=True)
class StatusRecord:
    """One status record, split into its fields (see the module docstring).

    Attributes:
        stamp_s: the writer's clock at the step [s].
        step: the step count since activation (1, 2, ...).
        mode: the mode code (:mod:`safety_filter.online.mode_codes`).
        hold_nominal: the hold command was used as the nominal.
        intervention: ``|u* - u_nom|`` [N m].
        solve_time_s: the QP solve time [s].
        joint_state_age_s, nominal_age_s: the inputs' ages [s].
        margin, torque, nominal, position, velocity: (n,) arrays, the chain's joint order.
    """

    stamp_s: float
    step: int
    mode: int
    hold_nominal: bool
    intervention: float
    solve_time_s: float
    joint_state_age_s: float
    nominal_age_s: float
    margin: np.ndarray
    torque: np.ndarray
    nominal: np.ndarray
    position: np.ndarray
    velocity: np.ndarray


def pack_status(out: np.ndarray, *, stamp_s: float, step: int, mode: float,
                hold_nominal: bool, intervention: float, solve_time_s: float,
                joint_state_age_s: float, nominal_age_s: float, margin: np.ndarray,
                torque: np.ndarray, nominal: np.ndarray, position: np.ndarray,
                velocity: np.ndarray) -> np.ndarray:
    """Write one status record into ``out`` (preallocated, :func:`status_record_size`
    values: the node packs one per control period) and return it.

    ``mode`` is the mode code (NaN when unknown). The per-joint arrays have shape (n,).

    Raises:
        ShapeMismatch: ``out`` is not of the size the arrays need.
    """
    n = len(margin)
    base = len(STATUS_SCALAR_FIELDS)
    if out.shape != (status_record_size(n),):
        raise ShapeMismatch('status record', status_record_size(n), out.shape)
    out[:base] = (stamp_s, step, mode, float(hold_nominal), intervention, solve_time_s,
                  joint_state_age_s, nominal_age_s)
    for k, values in enumerate((margin, torque, nominal, position, velocity)):
        out[base + k * n:base + (k + 1) * n] = values
    return out


def unpack_status(values: Sequence[float] | np.ndarray, n_joints: int) -> StatusRecord:
    """Split one record of the current layout (:func:`status_field_names`) into its fields.

    Raises:
        ShapeMismatch: not :func:`status_record_size` values.
    """
    data = np.asarray(values, dtype=float)
    n = int(n_joints)
    if data.shape != (status_record_size(n),):
        raise ShapeMismatch('status record', status_record_size(n), data.shape)
    base = len(STATUS_SCALAR_FIELDS)
    stamp, step, mode, hold, intervention, solve, js_age, nominal_age = data[:base].tolist()
    blocks = [data[base + k * n:base + (k + 1) * n].copy()
              for k in range(len(STATUS_JOINT_FIELDS))]
    return StatusRecord(stamp, int(step), int(mode) if math.isfinite(mode) else -1,
                        bool(hold), intervention, solve, js_age, nominal_age, *blocks)


def fields_topic(status_topic: str) -> str:
    """The topic that carries the field names of ``status_topic`` (``'~/status'`` ->
    ``'~/status_fields'``, ``'/arm1/safety_filter/status'`` -> ``'.../status_fields'``)."""
    return status_topic.rstrip('/') + FIELDS_TOPIC_SUFFIX


def format_fields(fields: Sequence[str]) -> str:
    """The text of the field-names message: the names joined by commas.

    Raises:
        StatusLayoutError: a name that is empty or holds a comma (it could not be read
            back), or a repeated name.
    """
    bad = [name for name in fields if not name or ',' in name]
    if bad:
        raise StatusLayoutError(f'status field names must be non-empty and hold no comma: '
                                f'{bad}')
    if len(set(fields)) != len(fields):
        raise StatusLayoutError('status field names must be unique')
    return ','.join(fields)


def parse_fields(text: str, source: str = 'status') -> tuple[str, ...]:
    """The field names of a comma-separated list (a ``_fields`` message or an old label).

    Raises:
        StatusLayoutError: no names, or a repeated name.
    """
    fields = tuple(name.strip() for name in str(text).split(',') if name.strip())
    if not fields:
        raise StatusLayoutError(f'{source}: the field list is empty')
    if len(set(fields)) != len(fields):
        raise StatusLayoutError(f'{source}: the field list repeats names')
    return fields


def decode_fields(label: str, size: int, announced: str | Sequence[str] | None = None,
                  joint_names: Sequence[str] | None = None, source: str = 'status'
                  ) -> tuple[str, ...]:
    """The field names of one status record of ``size`` values.

    In order of preference: the record's own label when it lists names (earlier releases
    sent them in every message); the names announced once on the ``_fields`` topic; the
    names derived from ``joint_names`` (for recordings without the ``_fields`` topic).

    Args:
        label: ``layout.dim[0].label`` of the record ('' when the layout has no dimension).
        size: the number of values in the record.
        announced: the ``_fields`` message text (or its names), if received.
        joint_names: the chain's joints (the certificate's ``joint_names``), if known.
        source: what to call the records in an error (a topic name).

    Raises:
        StatusLayoutError: no field names from any of these, or not ``size`` of them.
    """
    if label and ',' in label:
        fields, origin = parse_fields(label, source), 'its layout label'
    elif announced:
        fields = (parse_fields(announced, source) if isinstance(announced, str)
                  else tuple(announced))
        origin = f'{fields_topic(source)}'
    elif joint_names is not None:
        fields = tuple(status_field_names(joint_names))
        origin = f'the joint names {list(joint_names)}'
    else:
        raise StatusLayoutError(
            f'{source}: no field names for records of {size} values: the filter publishes '
            f'them once on {fields_topic(source)} (record that topic with the status), or '
            'give the joint names (the certificate)')
    if len(fields) != size:
        raise StatusLayoutError(f'{source}: {len(fields)} field names from {origin} for '
                                f'records of {size} values')
    return fields


def diagnostic_name(fully_qualified_node_name: str) -> str:
    """Name of the filter node's diagnostic status: ``'<fully qualified name>: filter'``.

    ``'safety_filter'`` and ``'/safety_filter'`` both give ``'/safety_filter: filter'``.
    """
    name = fully_qualified_node_name.strip()
    return (name if name.startswith('/') else '/' + name) + DIAGNOSTIC_NAME_SUFFIX


def legacy_diagnostic_name(fully_qualified_node_name: str) -> str:
    """The base-name form earlier releases used: ``'safety_filter: filter'``."""
    return fully_qualified_node_name.strip().rstrip('/').rsplit('/', 1)[-1] \
        + DIAGNOSTIC_NAME_SUFFIX
