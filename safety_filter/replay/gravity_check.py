"""The gravity-convention check: do the driver's joint efforts carry gravity?

A torque driver either takes the full joint torque (``gravity_convention: full``) or adds
gravity compensation itself and takes only the rest (``driver_compensated``). Setting the
filter's convention wrong is a model error of a whole ``g(q)``, so check it before the first
filtered motion: record the arm **at rest**, held by the driver's own controller or gravity
compensation with the brakes released, and compare the efforts it reports in
``sensor_msgs/JointState.effort`` with the model's ``g(q)`` at the same positions.

* A driver that reports the total motor torque reports ``g(q)`` at rest: **full**.
* A driver that compensates gravity itself and reports only the torque beyond that reports
  about zero while ``g(q)`` is not: **the efforts do not carry gravity**, which is what a
  ``driver_compensated`` driver shows.
* Anything else is **inconclusive**, with the reason.

What the check can and cannot tell: it sees what the *effort* channel carries and assumes
that the driver reports efforts in the convention in which it takes commands (true of
drivers whose state interface echoes the command interface). A driver that compensates
gravity but reports total motor torque reads as full; one that reports no torque at all
(zeros) reads as "the efforts do not carry gravity". Check the driver's documentation when
its verdict surprises you.

This module holds the check itself and the reading of bags, all without ROS; the live
subscriber is :mod:`safety_filter.ros.joint_states`, the command ``safety-filter
check-gravity`` is :mod:`safety_filter.cli.check_gravity`. The steps:

1. **pairing** (:func:`pair_samples`): each ``JointState`` is mapped by joint name onto the
   model's chain (other joints ignored; a message lacking a chain joint is skipped and
   counted); missing velocity or effort arrays become NaN. Times are receipt times.
2. **rest detection** (:func:`rest_mask`): a sample is at rest when every chain joint has
   ``|v| < rest_velocity`` (default :data:`DEFAULT_REST_VELOCITY`, 0.02 rad/s or m/s: twice
   the default declared velocity noise of 0.01, so a still arm passes and an arm moving at
   about a degree per second does not), and it lies in a run of such samples lasting at
   least :data:`MIN_REST_S` (0.2 s), so the turning points of a swinging arm (``v`` near
   zero but accelerating) do not count. Without reported velocities, ``v`` is the position
   change over the last :data:`VELOCITY_WINDOW_S` (0.05 s).
3. **comparison** (:func:`check_gravity`): per joint, over the rest samples, the mean
   measured effort ``e``, the mean ``g(q)`` of the model (payload: the given mass, default
   the middle of the limits file's range) and the mean residual ``e - g``. The verdict uses
   the mean *absolute* deviations ``|e - g|`` and ``|e|``, so rest poses whose gravity has
   opposite signs do not cancel. The joint's tolerance is::

       tol = tolerance * max |g| over the rest samples
             + coulomb_friction + torque_error_absolute * effort_limit

   with ``tolerance`` by default ``max(0.15, link_mass_error + torque_error_relative)`` of
   the limits file's uncertainty section (0.15 with its defaults: 10 % link masses and 3 %
   driver torque, with a little room), the declared Coulomb friction because static
   friction can hold part of the arm's weight at rest, and the declared driver torque
   offset (0.5 % of the effort limit by default) as a floor for joints that carry little
   gravity, where effort noise would otherwise decide. A single link 30 % heavier than the
   URDF says is flagged where that link carries at least about half of a joint's gravity
   (a forearm at the elbow); spread over many links, errors of that size pass.
4. **verdict** per joint: ``full`` when ``mean |e - g| <= tol``; ``the efforts do not carry
   gravity`` when ``mean |e| <= tol``; ``too little gravity to tell`` when the joint's
   gravity is too small to separate the two (``mean |g| <= 2 tol``, e.g. a vertical base
   axis) and one of them fits; ``inconclusive`` otherwise (a residual larger than the
   tolerance: a wrong URDF mass, a wrong payload, a contact, a joint offset). Overall: one
   convention when every joint that tells agrees with it and no joint is inconclusive; else
   inconclusive (too few rest samples, efforts missing, no joint with enough gravity, a
   large residual, joints that disagree).
"""

from __future__ import annotations

import math
from collections.abc import Iterable, Sequence
from dataclasses import dataclass, field
from pathlib import Path
from typing import TYPE_CHECKING, Any

import numpy as np

from safety_filter.errors import BagError, ExitCode, InvalidValue, ShapeMismatch

if TYPE_CHECKING:
    from safety_filter.core.robot_model import RobotModel

from safety_filter.replay.gravity_check_defaults import (
    DEFAULT_MIN_SAMPLES,
    DEFAULT_REST_VELOCITY,
    MIN_REST_S,
)

VELOCITY_WINDOW_S = 0.05  # [s] position difference window when velocities are not reported
MIN_TOLERANCE = 0.15

FULL = 'full'
NO_GRAVITY = 'the efforts do not carry gravity'
TOO_LITTLE = 'too little gravity to tell'
INCONCLUSIVE = 'inconclusive'



# ---------------------------------------------------------------------- pairing
@dataclass
class JointStateSamples:
    """Joint states mapped onto a chain: ``time_s`` (T,) receipt times [s]; ``position``,
    ``velocity``, ``effort`` (T, n) in ``joint_names`` order, NaN where a message had no
    such array; ``messages``: messages read; ``skipped``: those lacking a chain joint;
    ``names_seen``: the joint names of the first message (for error messages)."""

    joint_names: list[str]
    time_s: np.ndarray
    position: np.ndarray
    velocity: np.ndarray
    effort: np.ndarray
    messages: int = 0
    skipped: int = 0
    names_seen: list[str] = field(default_factory=list)

    @property
    def count(self) -> int:
        return int(self.time_s.size)


def pair_samples(messages: Iterable[tuple[int, Any]], joint_names: Sequence[str]
                 ) -> JointStateSamples:
    """Map ``(receipt_time_ns, JointState)`` pairs onto ``joint_names`` by name.

    ``JointState`` is any object with ``name``, ``position``, ``velocity`` and ``effort``
    (a ``rosbags`` message from a bag, or an rclpy message received live). An array whose
    length differs from ``name``'s (empty: not reported) becomes NaN.
    """
    names = list(joint_names)
    times, rows = [], []
    count = skipped = 0
    seen: list[str] = []
    cache: tuple[tuple[str, ...], list[int] | None] = ((), None)
    for log_time, msg in messages:
        count += 1
        message_names = tuple(str(x) for x in msg.name)
        if not seen:
            seen = list(message_names)
        if message_names != cache[0]:
            index = {name: i for i, name in enumerate(message_names)}
            columns = ([index[j] for j in names] if all(j in index for j in names) else None)
            cache = (message_names, columns)
        columns = cache[1]
        if columns is None:
            skipped += 1
            continue

        def pick(values: Any, columns: list[int] = columns, width: int = len(message_names)
                 ) -> np.ndarray:
            array = np.asarray(values, dtype=float).reshape(-1)
            return array[columns] if array.size == width else np.full(len(columns), np.nan)

        times.append(int(log_time))
        rows.append((pick(msg.position), pick(msg.velocity), pick(msg.effort)))
    n = len(names)
    position, velocity, effort = (np.array([row[k] for row in rows]).reshape(len(rows), n)
                                  for k in range(3))
    stamps = np.array(times, dtype=np.int64)
    order = np.argsort(stamps, kind='stable')
    time_s = 1e-9 * (stamps[order] - (stamps.min() if stamps.size else 0))
    return JointStateSamples(names, time_s, position[order], velocity[order], effort[order],
                             count, skipped, seen)


# ---------------------------------------------------------------------- rest detection
def estimated_velocity(samples: JointStateSamples) -> np.ndarray:
    """Reported velocities, or where a sample has none, the position change over the last
    :data:`VELOCITY_WINDOW_S` (NaN when no sample is that old)."""
    velocity = samples.velocity.copy()
    missing = np.isnan(velocity).any(axis=1)
    if missing.any():
        t = samples.time_s
        earlier = np.searchsorted(t, t - VELOCITY_WINDOW_S, side='right') - 1
        for k in np.flatnonzero(missing):
            j = earlier[k]
            if j >= 0 and t[k] > t[j]:
                velocity[k] = (samples.position[k] - samples.position[j]) / (t[k] - t[j])
            else:
                velocity[k] = np.nan
    return velocity


def rest_mask(samples: JointStateSamples, rest_velocity: float = DEFAULT_REST_VELOCITY,
              min_rest_s: float = MIN_REST_S) -> np.ndarray:
    """(T,) True for samples at rest: every joint ``|v| < rest_velocity``, finite positions,
    in a run of such samples spanning at least ``min_rest_s``."""
    velocity = estimated_velocity(samples)
    with np.errstate(invalid='ignore'):
        still = (np.all(np.abs(velocity) < rest_velocity, axis=1)
                 & np.all(np.isfinite(samples.position), axis=1))
    mask = np.zeros_like(still)
    k = 0
    t = samples.time_s
    while k < still.size:
        if not still[k]:
            k += 1
            continue
        end = k
        while end + 1 < still.size and still[end + 1]:
            end += 1
        if t[end] - t[k] >= min_rest_s:
            mask[k:end + 1] = True
        k = end + 1
    return mask


# ---------------------------------------------------------------------- comparison
@dataclass(frozen=True)
class JointCheck:
    """One joint's comparison over the rest samples [N m or N]: mean measured effort, mean
    model ``g(q)``, mean residual ``e - g``; ``max_gravity`` = max ``|g|``; ``tolerance``;
    ``verdict`` (:data:`FULL`, :data:`NO_GRAVITY`, :data:`TOO_LITTLE`, :data:`INCONCLUSIVE`)
    and why."""

    name: str
    measured: float
    gravity: float
    residual: float
    max_gravity: float
    tolerance: float
    verdict: str
    reason: str = ''


@dataclass
class GravityCheck:
    """The outcome: per-joint checks, the convention the efforts are consistent with
    (``'full'``, ``'driver_compensated'`` or None) and the reasons when inconclusive."""

    joints: list[JointCheck]
    convention: str | None
    reasons: list[str]
    samples: int
    rest_samples: int
    skipped: int
    payload_mass: float
    rest_velocity: float
    tolerance: float
    source: str = ''

    @property
    def exit_code(self) -> ExitCode:
        """The command's exit code: OK for one convention, INCONCLUSIVE (6) otherwise."""
        return ExitCode.OK if self.convention is not None else ExitCode.INCONCLUSIVE

    def format(self) -> str:
        """The terminal report: a table per joint and the verdict."""
        lines = [f'joint states: {self.samples} from {self.source or "the input"}'
                 + (f' ({self.skipped} more lacked a chain joint, skipped)'
                    if self.skipped else '')
                 + f'; at rest (|v| < {self.rest_velocity:g} for >= {MIN_REST_S:g} s): '
                 f'{self.rest_samples}',
                 f'model payload: {self.payload_mass:g} kg; tolerance: {self.tolerance:.0%} '
                 'of max |g| + Coulomb friction + driver torque offset']
        if self.joints:
            width = max(8, *(len(j.name) for j in self.joints))
            lines.append(f'{"joint":<{width}}  {"measured":>9}  {"g(q)":>9}  '
                         f'{"residual":>9}  {"tol":>7}  verdict')
            for j in self.joints:
                lines.append(f'{j.name:<{width}}  {j.measured:9.3f}  {j.gravity:9.3f}  '
                             f'{j.residual:9.3f}  {j.tolerance:7.3f}  {j.verdict}'
                             + (f' ({j.reason})' if j.reason else ''))
            lines.append('[N m or N; means over the rest samples; residual = measured - g]')
        if self.convention == 'full':
            lines.append('verdict: full. The efforts carry the full gravity torque g(q): a '
                         'driver that reports the torque it takes as command takes the full '
                         'joint torque. Set gravity_convention: full (the default; '
                         'safety-filter node --gravity-convention full).')
        elif self.convention == 'driver_compensated':
            lines.append('verdict: the efforts do not carry gravity, as a driver that adds '
                         'gravity compensation itself reports them. Set gravity_convention: '
                         'driver_compensated (safety-filter node --gravity-convention '
                         'driver_compensated), unless the driver reports no torque at all '
                         '(zeros): check its documentation.')
        else:
            lines.append('verdict: inconclusive')
            lines += [f'  - {reason}' for reason in self.reasons]
        return '\n'.join(lines)


def default_tolerance(model: RobotModel) -> float:
    """``max(0.15, link_mass_error + torque_error_relative)`` of the model's uncertainty."""
    u = model.uncertainty
    return max(MIN_TOLERANCE, float(u.link_mass_error) + float(u.torque_error_relative))


def check_gravity(model: RobotModel, samples: JointStateSamples, *,
                  payload_mass: float | None = None,
                  rest_velocity: float = DEFAULT_REST_VELOCITY,
                  tolerance: float | None = None,
                  min_samples: int = DEFAULT_MIN_SAMPLES, source: str = '') -> GravityCheck:
    """Compare the rest samples' efforts with the model's ``g(q)`` (see the module text).

    Raises:
        ShapeMismatch: samples not in the model's joint order.
        InvalidValue: option values out of range.
    """
    from safety_filter.core.dynamics import gravity_torque_batch

    if list(samples.joint_names) != list(model.joint_names):
        raise ShapeMismatch('joint order of the samples', len(model.joint_names),
                            len(samples.joint_names),
                            detail='the samples are not in the model joint order')
    if not (math.isfinite(rest_velocity) and rest_velocity > 0):
        raise InvalidValue('--rest-velocity', rest_velocity, 'a positive number')
    tolerance = default_tolerance(model) if tolerance is None else float(tolerance)
    if not (math.isfinite(tolerance) and 0 < tolerance < 1):
        raise InvalidValue('--tolerance', tolerance, 'in (0, 1)')
    if min_samples < 1:
        raise InvalidValue('--min-samples', min_samples, '>= 1')
    if payload_mass is None:
        payload_mass = 0.5 * (model.payload.mass_min + model.payload.mass_max)
    if not (math.isfinite(payload_mass) and payload_mass >= 0):
        raise InvalidValue('--payload-mass', payload_mass, 'finite and >= 0')
    mask = rest_mask(samples, rest_velocity)
    result = GravityCheck([], None, [], samples.count, int(mask.sum()), samples.skipped,
                          float(payload_mass), rest_velocity, tolerance, source)
    if samples.count == 0:
        result.reasons.append('no joint state carried every chain joint')
        return result
    if result.rest_samples < min_samples:
        moving = ('velocities not reported and positions changing'
                  if np.isnan(samples.velocity).all() else 'the arm was moving')
        result.reasons.append(
            f'too few rest samples: {result.rest_samples} < {min_samples} (--min-samples); '
            f'{moving} or still for less than {MIN_REST_S:g} s at a time. Record the arm '
            'held still (by its driver, brakes released) for a few seconds')
        return result
    q = samples.position[mask]
    effort = samples.effort[mask]
    # The numpy recursion, batched over the samples (the same g(q) as Dynamics').
    gravity = gravity_torque_batch(model, q, payload_mass=payload_mass, backend='numpy')
    u = model.uncertainty
    offset = (np.array(model.coulomb_friction)
              + u.torque_error_absolute * np.array(model.effort_limit))
    telling: list[str] = []
    missing: list[str] = []
    for i, name in enumerate(model.joint_names):
        e, g = effort[:, i], gravity[:, i]
        g_max = float(np.max(np.abs(g)))
        tol = tolerance * g_max + float(offset[i])
        if np.isnan(e).any():
            missing.append(name)
            result.joints.append(JointCheck(name, math.nan, float(g.mean()), math.nan, g_max,
                                            tol, INCONCLUSIVE, 'no effort reported'))
            continue
        off_full = float(np.mean(np.abs(e - g)))
        off_zero = float(np.mean(np.abs(e)))
        tells = float(np.mean(np.abs(g))) > 2.0 * tol
        if tells and off_full <= tol:
            verdict, reason = FULL, ''
        elif tells and off_zero <= tol:
            verdict, reason = NO_GRAVITY, ''
        elif not tells and min(off_full, off_zero) <= tol:
            verdict, reason = TOO_LITTLE, 'fits either'
        else:
            verdict = INCONCLUSIVE
            reason = (f'mean |measured - g| {off_full:.3g} and mean |measured| {off_zero:.3g} '
                      f'both exceed the tolerance')
        if verdict in (FULL, NO_GRAVITY):
            telling.append(verdict)
        result.joints.append(JointCheck(name, float(e.mean()), float(g.mean()),
                                        float((e - g).mean()), g_max, tol, verdict, reason))
    if missing:
        result.reasons.append(
            'efforts missing: the joint states carry no effort for '
            + (', '.join(missing) if len(missing) < len(model.joint_names) else 'any joint')
            + ' (the driver does not fill JointState.effort)')
    large = [j.name for j in result.joints
             if j.verdict == INCONCLUSIVE and j.reason != 'no effort reported']
    if large:
        result.reasons.append(
            f'large residual at {", ".join(large)}: the efforts match neither g(q) nor zero. '
            "A wrong URDF mass or centre of mass, a payload other than the model's "
            f'{payload_mass:g} kg (--payload-mass), a contact or a joint offset; or static '
            'friction above the tolerance (--tolerance)')
    kinds = set(telling)
    if not telling and not missing and not large:
        result.reasons.append(
            'no joint carries enough gravity at these positions to tell the conventions '
            'apart: record the arm at rest where the shoulder and elbow hold its weight '
            '(e.g. the upper arm horizontal)')
    if len(kinds) > 1:
        full = [j.name for j in result.joints if j.verdict == FULL]
        zero = [j.name for j in result.joints if j.verdict == NO_GRAVITY]
        result.reasons.append(f'joints disagree: {", ".join(full)} carry gravity, '
                              f'{", ".join(zero)} do not')
    if not result.reasons and len(kinds) == 1:
        result.convention = 'full' if FULL in kinds else 'driver_compensated'
    return result


# ---------------------------------------------------------------------- input
def bag_folder(path: str | Path) -> Path:
    """The rosbag2 folder of ``path`` (the folder itself, or the folder of its storage file).

    Raises:
        BagError: not a rosbag2 bag.
    """
    path = Path(path)
    if path.is_dir() and (path / 'metadata.yaml').is_file():
        return path
    if path.is_file() and (path.parent / 'metadata.yaml').is_file():
        return path.parent
    if not path.exists():
        raise BagError(f'bag not found: {path}', path)
    raise BagError(f'{path} is not a rosbag2 bag (a folder with metadata.yaml)', path)


def bag_topic(topic: str) -> str:
    """The topic name as a bag records it (absolute)."""
    return topic if topic.startswith('/') else '/' + topic


def read_bag_samples(path: str | Path, topic: str, joint_names: Sequence[str]
                     ) -> JointStateSamples:
    """The joint states of a bag's ``topic`` paired with ``joint_names``.

    Raises:
        BagError: no such bag or topic, or no message with the chain's joints.
    """
    from safety_filter.recordings import bags

    folder = bag_folder(path)
    name = bag_topic(topic)
    summary = bags.topic_summary(folder)
    if name not in summary:
        found = ', '.join(f'{t} ({i.msgtype})' for t, i in sorted(summary.items())) or 'none'
        raise BagError(f'{folder} has no topic {name} (--joint-states-topic); topics: {found}',
                       folder)
    if summary[name].msgtype != bags.JOINT_STATE:
        raise BagError(f'{name} in {folder} is {summary[name].msgtype}, not '
                       f'{bags.JOINT_STATE}', folder)
    return require_chain(pair_samples(bags.read_messages(folder, name), joint_names),
                         f'{name} in {folder}')


def require_chain(samples: JointStateSamples, where: str) -> JointStateSamples:
    """``samples``, or BagError when no message carried the chain's joints (``where``: the
    topic and the bag or the live source)."""
    if samples.messages == 0:
        raise BagError(f'no joint state on {where}')
    if samples.count == 0:
        raise BagError(
            f'no joint state on {where} carries every chain joint {samples.joint_names}; '
            f'they name {samples.names_seen}')
    return samples
