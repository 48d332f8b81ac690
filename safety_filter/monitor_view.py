"""What the live monitor knows, shows and logs, without ROS (``safety-filter monitor``).

The ROS side (:mod:`safety_filter.ros.monitor`) only turns the filter node's messages into
snapshots and hands them to a :class:`MonitorState`; everything else is here, so it can be
tested without DDS:

* :class:`StatusSnapshot` (one ``~/status`` array, with its self-describing layout) and
  :class:`DiagnosticSnapshot` (the filter's ``'<node>: filter'`` status of ``/diagnostics``);
* :class:`JointLimits`: the joint names and limits the values are shown against, from the
  certificate parameter file or the node's parameters;
* :class:`MonitorState`: the latest snapshots, running totals, and the **events** it detects
  from the sequence of snapshots (:class:`MonitorEvent`);
* :func:`render_frame`: one screen of text (ANSI colours optional);
* :class:`EventLogWriter`: the event log, JSON lines, flushed as events happen.

Event log
---------
One JSON object per line, written when the event is detected::

    {"t": 1718000000.123, "kind": "watchdog_trip", "detail": "...", "node": "safety_filter",
     "stamp_s": 1718000000.101, ...}

* ``t``: when the monitor saw it, wall clock [s since the epoch] (with ``--event-time
  filter``: the filter node's clock instead, see below); ``kind``; ``detail``: one line for
  people; ``node``: the filter node watched; ``stamp_s``: the same moment on the filter
  node's clock (the stamps of its ``~/status`` and ``/diagnostics``, extrapolated with the
  wall clock; ``null`` before the first message). On a real arm both clocks are the system
  clock. Under simulated time (the demo: ``use_sim_time``, a lock-stepped simulator slower
  than real time) the bag's times are the filter's clock, so ``stamp_s`` is what lines up
  with a bag; ``--event-time filter`` puts it in ``t`` (the wall time then goes to
  ``wall_t``), which is what ``safety-filter replay --event-log`` expects.
* Kinds (extra keys in brackets):

  - ``filter_appeared`` (``certificate_id`` when known) / ``filter_disappeared``
    (``silent_s``): the first message after none for ``absent_after_s`` (2 s), and such a
    silence; episodes still open at a disappearance are ended first (``reason``).
  - ``level`` (``from``, ``to``, ``message``): diagnostics level changes (OK, WARN, ERROR,
    STALE), the first report included (``from`` null).
  - ``mode`` (``from``, ``to``): every change of the filter's mode (``filtered``,
    ``fallback``, ``recovering``, ``rejected``, ``stale``; ``inactive`` when the node reports
    itself inactive), the first one included.
  - ``watchdog_trip`` (``joint_state_age_ms``) / ``watchdog_clear`` (``duration_s``,
    ``steps``): the joint-state watchdog tripped (mode ``stale``: joint states timed out,
    the filter sends its hold command) and ended.
  - ``fallback_start`` / ``fallback_end``, ``recovering_start`` / ``recovering_end``,
    ``rejected_start`` / ``rejected_end`` (ends: ``duration_s``, ``steps`` seen).
  - ``thin_margin_start`` (``joint``, ``margin``, ``threshold``) / ``thin_margin_end``
    (``joint``, ``min_margin``, ``duration_s``): a joint's barrier margin fell below the
    threshold, and came back above it (with 20 % hysteresis, so a margin hovering at the
    threshold does not flood the log).
  - ``certificate_mismatch`` (``node_certificate_id``, ``expected``): the node runs another
    certificate than the ``--certificate`` file.

Modes, margins and the watchdog are followed on ``~/status`` (every step); when it is
silent for ``status_silent_s`` (1 s: the node inactive, or the status not reaching the
monitor) the diagnostics' values stand in for it. Steps of the same mode between two
status messages the monitor did not receive are not seen; the step totals shown come from
the diagnostics' exact counts.
"""

from __future__ import annotations

import argparse
import json
import math
import re
import time
from collections import Counter, deque
from collections.abc import Mapping, Sequence
from dataclasses import dataclass, field
from pathlib import Path
from typing import IO, Any

from safety_filter.cli_options import THIN_MARGIN, deprecated
from safety_filter.errors import SafetyFilterError

# The filter node's codes (safety_filter.ros.filter_node, which needs rclpy; a ROS test
# checks that the two agree).
MODE_NAMES = ('filtered', 'fallback', 'recovering', 'rejected', 'stale')
LEVEL_NAMES = {0: 'OK', 1: 'WARN', 2: 'ERROR', 3: 'STALE'}
LEVEL_OK, LEVEL_WARN, LEVEL_ERROR, LEVEL_STALE = 0, 1, 2, 3
DIAGNOSTIC_NAME_SUFFIX = ': filter'
EPISODE_MODES = ('fallback', 'recovering', 'rejected')
MODE_INACTIVE = 'inactive'
MODE_STALE = 'stale'

DEFAULT_NODE_NAME = 'safety_filter'
DEFAULT_RATE_HZ = 4.0
DEFAULT_THIN_MARGIN = THIN_MARGIN  # the filter node's thin_margin default too
DEFAULT_ABSENT_AFTER_S = 2.0
DEFAULT_STATUS_SILENT_S = 1.0
THIN_MARGIN_HYSTERESIS = 0.2
EVENT_TIMES = ('wall', 'filter')


# ---------------------------------------------------------------------- names
def split_node_name(node_name: str) -> tuple[str, str]:
    """``(base name, fully qualified name)`` of ``'safety_filter'`` or ``'/ns/safety_filter'``.

    Raises:
        SafetyFilterError: an empty name or one ending in ``/``.
    """
    text = node_name.strip()
    base = text.rstrip('/').rsplit('/', 1)[-1]
    if not base or text.endswith('/'):
        raise SafetyFilterError(f'not a node name: {node_name!r}')
    full = text if text.startswith('/') else '/' + text
    return base, full


def diagnostic_name(node_name: str) -> str:
    """The name of the filter's diagnostic status: ``'<node base name>: filter'``."""
    return split_node_name(node_name)[0] + DIAGNOSTIC_NAME_SUFFIX


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
            SafetyFilterError: an empty label or repeated field names.
        """
        fields = tuple(name.strip() for name in label.split(',') if name.strip())
        if not fields:
            raise SafetyFilterError('status layout without field names')
        if len(set(fields)) != len(fields):
            raise SafetyFilterError('status layout with repeated field names')
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
        return self.layout.joint_names

    def joint(self, quantity: str, joint: str) -> float:
        """``quantity`` (margin, torque, nominal, position, velocity) of ``joint``."""
        return self.get(f'{quantity}.{joint}')

    @property
    def mode(self) -> str | None:
        """Mode name from the numeric code; None when absent."""
        code = self.get('mode')
        if not math.isfinite(code):
            return None
        index = int(round(code))
        return MODE_NAMES[index] if 0 <= index < len(MODE_NAMES) else f'code {index}'

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
        return LEVEL_NAMES.get(self.level, f'level {self.level}')

    @property
    def certificate_id(self) -> str | None:
        return self.values.get('certificate_id') or None

    @property
    def active(self) -> bool:
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
                raise SafetyFilterError(
                    f'limits: {name} has {len(getattr(self, name))} entries for {n} joints')

    @classmethod
    def from_parameters(cls, parameters: Mapping[str, Any], source: str) -> JointLimits:
        """From certificate parameters (the ``ros__parameters`` of a certificate file, or the
        filter node's parameters of the same names).

        Raises:
            SafetyFilterError: an entry missing or malformed.
        """
        try:
            names = tuple(str(x) for x in parameters['joint_names'])
            vectors = {key: tuple(float(x) for x in parameters[key]) for key in (
                'position_lower', 'position_upper', 'velocity_limit', 'effort_limit')}
        except KeyError as err:
            raise SafetyFilterError(f'limits: no entry {err.args[0]!r} ({source})') from err
        except (TypeError, ValueError) as err:
            raise SafetyFilterError(f'limits: malformed entry ({source}): {err}') from err
        certificate_id = parameters.get('certificate_id')
        return cls(names, certificate_id=str(certificate_id) if certificate_id else None,
                   source=source, **vectors)

    @classmethod
    def from_certificate_file(cls, path: str | Path) -> JointLimits:
        """From a certificate parameter file written by ``safety-filter certify`` (checked:
        an edited file is refused, as the node refuses it)."""
        from safety_filter.certificate import Certificate

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


# ---------------------------------------------------------------------- events
@dataclass(frozen=True)
class MonitorEvent:
    """One event of the log (see the module docstring for the kinds and keys).

    Attributes:
        t: wall clock [s since the epoch] when the monitor saw it.
        kind: the kind.
        detail: one line for people.
        stamp_s: the same moment on the filter node's clock [s] (None when unknown).
        data: the kind's extra keys.
    """

    t: float
    kind: str
    detail: str
    stamp_s: float | None = None
    data: Mapping[str, Any] = field(default_factory=dict)

    def to_dict(self, node: str = '', event_time: str = 'wall') -> dict[str, Any]:
        """The JSON object of the log line (``event_time``: ``'wall'`` or ``'filter'``)."""
        item: dict[str, Any] = {'t': self.t, 'kind': self.kind, 'detail': self.detail}
        if event_time == 'filter' and self.stamp_s is not None:
            item['t'] = self.stamp_s
            item['wall_t'] = self.t
        if node:
            item['node'] = node
        item['stamp_s'] = self.stamp_s
        for key, value in self.data.items():
            if key not in item:
                item[key] = value
        return item


def _json_safe(value: Any) -> Any:
    if isinstance(value, float) and not math.isfinite(value):
        return None
    return value


class EventLogWriter:
    """Appends events to a JSON-lines file, one object per line, flushed after each.

    Args:
        path: the file (created, or appended to).
        node: the filter node's name, written in every line.
        event_time: ``'wall'`` (``t`` is the wall clock) or ``'filter'`` (``t`` is the filter
            node's clock, the wall clock goes to ``wall_t``).
    """

    def __init__(self, path: str | Path, node: str = DEFAULT_NODE_NAME,
                 event_time: str = 'wall') -> None:
        if event_time not in EVENT_TIMES:
            raise SafetyFilterError(f'event_time must be one of {EVENT_TIMES}')
        self.path = Path(path)
        self.node = node
        self.event_time = event_time
        self.count = 0
        try:
            if self.path.parent != Path(''):
                self.path.parent.mkdir(parents=True, exist_ok=True)
            self._file: IO[str] | None = open(self.path, 'a', encoding='utf-8')  # noqa: SIM115
        except OSError as err:
            raise SafetyFilterError(f'cannot open the event log {self.path}: {err}') from err

    def write(self, events: Sequence[MonitorEvent]) -> None:
        if self._file is None or not events:
            return
        for event in events:
            item = {k: _json_safe(v) for k, v in
                    event.to_dict(self.node, self.event_time).items()}
            self._file.write(json.dumps(item, separators=(', ', ': ')) + '\n')
            self.count += 1
        self._file.flush()

    def close(self) -> None:
        if self._file is not None:
            self._file.close()
            self._file = None


# ---------------------------------------------------------------------- the state
@dataclass
class _Episode:
    start_s: float
    steps: int = 0
    extreme: float = math.inf


def _percentile(sorted_values: Sequence[float], fraction: float) -> float:
    if not sorted_values:
        return math.nan
    k = min(len(sorted_values) - 1, max(0, int(math.ceil(fraction * len(sorted_values))) - 1))
    return sorted_values[k]


class MonitorState:
    """What the monitor knows about one filter node, fed with snapshots in arrival order.

    :meth:`add_status`, :meth:`add_diagnostic` and :meth:`poll` return the events the new
    information gives (and keep the last few in :attr:`recent_events`).

    Args:
        node_name: the filter node (``'safety_filter'`` or ``'/ns/safety_filter'``).
        thin_margin: a barrier margin below this is thin (alarm and event).
        limits: joint limits to show values against (or set :attr:`limits` later).
        absent_after_s: no message for this long [s]: the filter is gone.
        status_silent_s: ``~/status`` silent this long [s]: diagnostics stand in for it.
        history: events kept for the screen.
        expected_certificate_id: the certificate the node must run (from ``--certificate``);
            another one is an alarm and a ``certificate_mismatch`` event.
    """

    def __init__(self, node_name: str = DEFAULT_NODE_NAME,
                 thin_margin: float = DEFAULT_THIN_MARGIN, limits: JointLimits | None = None,
                 absent_after_s: float = DEFAULT_ABSENT_AFTER_S,
                 status_silent_s: float = DEFAULT_STATUS_SILENT_S, history: int = 6,
                 expected_certificate_id: str | None = None) -> None:
        if not math.isfinite(thin_margin):
            raise SafetyFilterError(f'thin margin must be finite, got {thin_margin}')
        if not (absent_after_s > 0 and status_silent_s > 0):
            raise SafetyFilterError('absent_after_s and status_silent_s must be positive')
        self.node_name = node_name
        self.base_name = split_node_name(node_name)[0]
        self.thin_margin = float(thin_margin)
        self.thin_clear = self.thin_margin + THIN_MARGIN_HYSTERESIS * abs(self.thin_margin)
        self.limits = limits
        self.expected_certificate_id = expected_certificate_id
        self.absent_after_s = float(absent_after_s)
        self.status_silent_s = float(status_silent_s)
        self.recent_events: deque[MonitorEvent] = deque(maxlen=history)
        self.event_count = 0
        self.status: StatusSnapshot | None = None
        self.diagnostic: DiagnosticSnapshot | None = None
        self.present = False
        self.first_seen_s: float | None = None
        self.last_seen_s: float | None = None
        self.appearances = 0
        self.status_count = 0
        self.diagnostic_count = 0
        self.step_totals: Counter[str] = Counter()  # steps per mode, from the diagnostics
        self.episodes: Counter[str] = Counter()  # episodes started, per mode (incl. stale)
        self.thin_episodes = 0
        self.mode: str | None = None
        self.level: int | None = None
        self.certificate_mismatch = False
        self._mode_episode: _Episode | None = None
        self.thin: dict[str, _Episode] = {}
        self._status_times: deque[float] = deque()
        self._solve_times: deque[float] = deque(maxlen=2000)
        self._interventions: deque[tuple[float, float]] = deque()
        self._clock_pair: tuple[float, float] | None = None  # (wall, filter clock)

    # ---- clocks
    def filter_time(self, wall_s: float) -> float | None:
        """``wall_s`` on the filter node's clock (from its latest stamp), None if unknown."""
        if self._clock_pair is None:
            return None
        wall, stamp = self._clock_pair
        return stamp + (wall_s - wall)

    def _event(self, t: float, kind: str, detail: str, **data: Any) -> MonitorEvent:
        event = MonitorEvent(t, kind, detail, self.filter_time(t), data)
        self.recent_events.append(event)
        self.event_count += 1
        return event

    # ---- inputs
    def status_silent(self, now: float) -> bool:
        """No ``~/status`` for :attr:`status_silent_s` (or never)."""
        return self.status is None or now - self.status.received_s > self.status_silent_s

    def add_status(self, snapshot: StatusSnapshot) -> list[MonitorEvent]:
        t = snapshot.received_s
        if math.isfinite(snapshot.stamp_s):
            self._clock_pair = (t, snapshot.stamp_s)
        events = self._seen(t)
        self.status = snapshot
        self.status_count += 1
        self._status_times.append(t)
        while self._status_times and t - self._status_times[0] > 1.0:
            self._status_times.popleft()
        solve = snapshot.get('solve_time_s')
        if math.isfinite(solve) and solve > 0.0:
            self._solve_times.append(solve)
        intervention = snapshot.get('intervention')
        if math.isfinite(intervention):
            self._interventions.append((t, intervention))
        while self._interventions and t - self._interventions[0][0] > 1.0:
            self._interventions.popleft()
        mode = snapshot.mode
        if mode is not None:
            events += self._set_mode(mode, t, snapshot.get('joint_state_age_s'))
        for joint in snapshot.joint_names:
            events += self._margin(joint, snapshot.joint('margin', joint), t)
        return events

    def add_diagnostic(self, snapshot: DiagnosticSnapshot) -> list[MonitorEvent]:
        t = snapshot.received_s
        silent = self.status_silent(t)
        if snapshot.stamp_s is not None and (silent or self._clock_pair is None):
            self._clock_pair = (t, snapshot.stamp_s)
        events = self._seen(t)
        previous = self.level
        if snapshot.level != previous:
            old = LEVEL_NAMES.get(previous, None) if previous is not None else None
            events.append(self._event(
                t, 'level', f'{old or "none"} -> {snapshot.level_name}: {snapshot.message}',
                **{'from': old, 'to': snapshot.level_name, 'message': snapshot.message}))
            self.level = snapshot.level
        self.diagnostic = snapshot
        self.diagnostic_count += 1
        for mode in MODE_NAMES:
            count = snapshot.number(f'count.{mode}')
            if math.isfinite(count):
                self.step_totals[mode] += int(count)
        expected = self.expected_certificate_id
        found = snapshot.certificate_id
        if expected and found and found != expected:
            if not self.certificate_mismatch:
                events.append(self._event(
                    t, 'certificate_mismatch', f'the node runs certificate {found}, '
                    f'not {expected}', node_certificate_id=found, expected=expected))
            self.certificate_mismatch = True
        else:
            self.certificate_mismatch = False
        if silent:
            mode = snapshot.mode
            if snapshot.active and snapshot.watchdog_tripped:
                mode = MODE_STALE
            if mode is not None:
                events += self._set_mode(mode, t, snapshot.number('age.joint_state_ms') * 1e-3,
                                         steps=0)
            for key in snapshot.values:
                if key.startswith('margin.'):
                    events += self._margin(key[len('margin.'):], snapshot.number(key), t)
        return events

    def poll(self, now: float) -> list[MonitorEvent]:
        """Events due to time passing: the filter disappearing (no message for a while)."""
        if not self.present or self.last_seen_s is None:
            return []
        silent = now - self.last_seen_s
        if silent <= self.absent_after_s:
            return []
        events = self._close_all(now, 'filter disappeared')
        events.append(self._event(
            now, 'filter_disappeared',
            f'no message from {self.base_name} for {silent:.1f} s', silent_s=round(silent, 3)))
        self.present = False
        self.mode = None
        self.level = None
        return events

    # ---- detection
    def _seen(self, t: float) -> list[MonitorEvent]:
        self.last_seen_s = t
        if self.present:
            return []
        self.present = True
        self.first_seen_s = t
        self.appearances += 1
        return [self._event(t, 'filter_appeared', f'{self.base_name} is publishing')]

    def _set_mode(self, mode: str, t: float, joint_state_age_s: float,
                  steps: int = 1) -> list[MonitorEvent]:
        episode = self._mode_episode
        if mode == self.mode:
            if episode is not None:
                episode.steps += steps
            return []
        old = self.mode
        events = []
        if episode is not None and old is not None:
            duration = round(t - episode.start_s, 6)
            if old == MODE_STALE:
                events.append(self._event(
                    t, 'watchdog_clear', f'joint states back after {duration:.3f} s ({old} -> '
                    f'{mode})', duration_s=duration, steps=episode.steps))
            elif old in EPISODE_MODES:
                events.append(self._event(
                    t, f'{old}_end', f'{old} ended after {duration:.3f} s, {episode.steps} '
                    f'steps seen', duration_s=duration, steps=episode.steps))
        events.append(self._event(t, 'mode', f'{old or "none"} -> {mode}',
                                  **{'from': old, 'to': mode}))
        self.mode = mode
        self._mode_episode = None
        if mode == MODE_STALE:
            age_ms = joint_state_age_s * 1e3 if math.isfinite(joint_state_age_s) else None
            age = f'{age_ms:.0f} ms old' if age_ms is not None and age_ms < 1e9 else 'missing'
            events.append(self._event(
                t, 'watchdog_trip', f'joint-state watchdog tripped: joint states {age}; the '
                'filter sends the hold command', joint_state_age_ms=(
                    round(age_ms, 3) if age_ms is not None and age_ms < 1e9 else None)))
            self.episodes[mode] += 1
            self._mode_episode = _Episode(t, steps)
        elif mode in EPISODE_MODES:
            events.append(self._event(t, f'{mode}_start', f'{mode} started ({old or "none"} -> '
                                      f'{mode})'))
            self.episodes[mode] += 1
            self._mode_episode = _Episode(t, steps)
        return events

    def _margin(self, joint: str, margin: float, t: float) -> list[MonitorEvent]:
        if not math.isfinite(margin):
            return []
        episode = self.thin.get(joint)
        if margin < self.thin_margin:
            if episode is None:
                self.thin[joint] = _Episode(t, 1, margin)
                self.thin_episodes += 1
                return [self._event(
                    t, 'thin_margin_start', f'{joint}: barrier margin {margin:.4g} < '
                    f'{self.thin_margin:g}', joint=joint, margin=margin,
                    threshold=self.thin_margin)]
            episode.steps += 1
            episode.extreme = min(episode.extreme, margin)
            return []
        if episode is not None:
            episode.extreme = min(episode.extreme, margin)
            if margin >= self.thin_clear:
                del self.thin[joint]
                return [self._thin_end(joint, episode, t, '')]
        return []

    def _thin_end(self, joint: str, episode: _Episode, t: float, reason: str
                  ) -> MonitorEvent:
        duration = round(t - episode.start_s, 6)
        extra = {'reason': reason} if reason else {}
        return self._event(
            t, 'thin_margin_end', f'{joint}: margin back above {self.thin_clear:.4g} after '
            f'{duration:.3f} s (min {episode.extreme:.4g}){", " + reason if reason else ""}',
            joint=joint, min_margin=episode.extreme, duration_s=duration, **extra)

    def _close_all(self, t: float, reason: str) -> list[MonitorEvent]:
        events = []
        episode = self._mode_episode
        if episode is not None and self.mode is not None:
            duration = round(t - episode.start_s, 6)
            kind = 'watchdog_clear' if self.mode == MODE_STALE else f'{self.mode}_end'
            events.append(self._event(t, kind, f'{self.mode} ended: {reason}',
                                      duration_s=duration, steps=episode.steps, reason=reason))
        self._mode_episode = None
        for joint, thin in list(self.thin.items()):
            events.append(self._thin_end(joint, thin, t, reason))
        self.thin.clear()
        return events

    # ---- derived figures
    def status_rate(self) -> float:
        """``~/status`` messages received over the last second [1/s]."""
        return float(len(self._status_times))

    def solve_time_stats_us(self) -> tuple[float, float, float, int]:
        """(median, p99, max, count) of the solve times of the recent status messages [us]."""
        values = sorted(self._solve_times)
        if not values:
            return math.nan, math.nan, math.nan, 0
        return (_percentile(values, 0.5) * 1e6, _percentile(values, 0.99) * 1e6,
                values[-1] * 1e6, len(values))

    def intervention_max_1s(self) -> float:
        """Largest intervention of the status messages of the last second [N m]."""
        return max((v for _, v in self._interventions), default=math.nan)

    def joint_names(self) -> tuple[str, ...]:
        if self.status is not None and self.status.joint_names:
            return self.status.joint_names
        if self.limits is not None:
            return self.limits.joint_names
        if self.diagnostic is not None:
            return tuple(k[len('margin.'):] for k in self.diagnostic.values
                         if k.startswith('margin.'))
        return ()

    def alarms(self, now: float) -> list[str]:
        """The alarm lines for the screen (empty when all is well)."""
        lines = []
        diagnostic = self.diagnostic
        if self.mode == MODE_STALE:
            age = self.status.get('joint_state_age_s') * 1e3 if self.status else math.nan
            age_text = f'{age:.0f} ms old' if math.isfinite(age) and age < 1e9 else 'missing'
            lines.append(f'WATCHDOG TRIPPED: joint states {age_text}; the filter sends its '
                         'hold command')
        if diagnostic is not None and diagnostic.level in (LEVEL_ERROR, LEVEL_STALE):
            lines.append(f'{diagnostic.level_name}: {diagnostic.message}')
        if self.mode in EPISODE_MODES:
            lines.append(f'mode {self.mode.upper()}')
        for joint, episode in self.thin.items():
            current = math.nan
            if self.status is not None and not self.status_silent(now):
                current = self.status.joint('margin', joint)
            lines.append(f'thin margin {joint}: {_fmt(current, 4)} (min {episode.extreme:.4g}) '
                         f'< {self.thin_margin:g}')
        if self.certificate_mismatch and diagnostic is not None:
            lines.append(f'certificate mismatch: the node runs {diagnostic.certificate_id}, '
                         f'expected {self.expected_certificate_id}')
        if (diagnostic is not None and diagnostic.active and self.status_silent(now)
                and now - diagnostic.received_s < self.absent_after_s):
            last = (f'{now - self.status.received_s:.1f} s' if self.status is not None
                    else 'ever')
            lines.append(f'no ~/status received for {last}: not filtering, or not reaching '
                         'the monitor')
        return lines


# ---------------------------------------------------------------------- rendering
_STYLES = {'bold': '1', 'red': '1;31', 'green': '32', 'yellow': '33', 'grey': '90',
           'magenta': '35', 'cyan': '36', 'reverse_red': '1;37;41'}
_LEVEL_STYLES = {LEVEL_OK: 'green', LEVEL_WARN: 'yellow', LEVEL_ERROR: 'red',
                 LEVEL_STALE: 'magenta'}
_MODE_STYLES = {'filtered': 'green', 'fallback': 'yellow', 'recovering': 'red',
                'rejected': 'red', 'stale': 'red', 'inactive': 'magenta'}
ALARM_PREFIX = '!! '
_ANSI = re.compile(r'\x1b\[[0-9;?]*[A-Za-z]')
ANSI_HOME = '\x1b[H'
ANSI_CLEAR_LINE = '\x1b[K'
ANSI_CLEAR_BELOW = '\x1b[J'
ANSI_HIDE_CURSOR = '\x1b[?25l'
ANSI_SHOW_CURSOR = '\x1b[?25h'


def _paint(text: str, style: str | None, color: bool) -> str:
    if not color or not style:
        return text
    return f'\x1b[{_STYLES[style]}m{text}\x1b[0m'


def _fmt(value: float, digits: int = 3, sign: bool = False) -> str:
    if value is None or not math.isfinite(value):
        return 'nan'
    return f'{value:+.{digits}g}' if sign else f'{value:.{digits}g}'


def _fixed(value: float, width: int, decimals: int) -> str:
    if value is None or not math.isfinite(value):
        return 'nan'.rjust(width)
    text = f'{value:+.{decimals}f}'
    if len(text) > width:
        text = f'{value:+.{max(0, width - 6)}e}'
    return text.rjust(width)


def _num(value: float, decimals: int = 0) -> str:
    if value is None or not math.isfinite(value):
        return 'nan'
    return f'{value:.{decimals}f}'


def cut_line(line: str, width: int) -> str:
    """``line`` cut to ``width`` visible characters (ANSI escape sequences kept, not counted;
    an open colour is reset)."""
    if width <= 0:
        return line
    visible = 0
    out = []
    i = 0
    cut = False
    while i < len(line):
        if line[i] == '\x1b':
            match = _ANSI.match(line, i)
            if match:
                out.append(match.group(0))
                i = match.end()
                continue
        if visible >= width:
            cut = True
            break
        out.append(line[i])
        visible += 1
        i += 1
    text = ''.join(out)
    if cut and '\x1b[' in text and not text.endswith('\x1b[0m'):
        text += '\x1b[0m'
    return text


def _range_bar(value: float, lower: float, upper: float, width: int = 6) -> tuple[str, float]:
    """``[---#----]`` with the marker at ``value`` in [lower, upper]; and the fraction."""
    if not (math.isfinite(value) and math.isfinite(lower) and math.isfinite(upper)
            and upper > lower):
        return '[' + '?' * width + ']', math.nan
    fraction = (value - lower) / (upper - lower)
    cells = ['-'] * width
    if fraction < 0.0:
        cells[0] = '<'
    elif fraction > 1.0:
        cells[-1] = '>'
    else:
        cells[min(width - 1, int(fraction * width))] = '#'
    return '[' + ''.join(cells) + ']', fraction


def _signed_bar(value: float, limit: float, half: int = 3) -> tuple[str, float]:
    """``[  ##|    ]``: |value|/limit filled left (negative) or right (positive) of the bar."""
    if not (math.isfinite(value) and math.isfinite(limit) and limit > 0.0):
        return '[' + '?' * (2 * half + 1) + ']', math.nan
    fraction = value / limit
    filled = min(half, int(math.ceil(abs(fraction) * half - 1e-9)))
    over = abs(fraction) > 1.0 + 1e-9
    mark = '>' if over else '#'
    if fraction < 0:
        left = ' ' * (half - filled) + (('<' if over else '#') + '#' * (filled - 1)
                                        if filled else '')
        right = ' ' * half
    else:
        left = ' ' * half
        right = ('#' * (filled - 1) + mark if filled else '') + ' ' * (half - filled)
    return '[' + left + '|' + right + ']', fraction


def _percent(fraction: float, signed: bool = False) -> str:
    if not math.isfinite(fraction):
        return '   ?%'
    return f'{fraction * 100:+4.0f}%' if signed else f'{fraction * 100:4.0f}%'


def _clock(t: float | None) -> str:
    if t is None:
        return '--:--:--'
    return time.strftime('%H:%M:%S', time.localtime(t)) + f'.{int((t % 1) * 10)}'


def render_waiting(state: MonitorState, now: float, diagnostics_topic: str = '/diagnostics',
                   color: bool = False) -> str:
    """The screen while no filter is heard from."""
    head = _paint(f'safety_filter monitor   node {split_node_name(state.node_name)[1]}   '
                  f'{_clock(now)}', 'bold', color)
    if state.last_seen_s is None:
        since = 'nothing received yet'
    else:
        since = (f'no message for {now - state.last_seen_s:.1f} s, last at '
                 f'{_clock(state.last_seen_s)}')
    lines = [head, f'waiting for {state.base_name} on {diagnostics_topic} ... ({since})']
    if state.recent_events:
        lines.append('events:')
        lines += [f'  {_clock(e.t)} {e.kind:<18} {e.detail}' for e in state.recent_events]
    return '\n'.join(lines)


def render_frame(state: MonitorState, now: float, *, color: bool = False, width: int = 100,
                 diagnostics_topic: str = '/diagnostics', rate_hz: float | None = None) -> str:
    """One screen of the monitor, as text lines (no cursor movement; ANSI colours if
    ``color``). While the filter is absent, the waiting screen (:func:`render_waiting`).

    Args:
        state: what the monitor knows.
        now: wall clock [s since the epoch].
        color: colour the level, the mode and the alarms with ANSI codes.
        width: the terminal width; lines are cut to it.
        diagnostics_topic: named in the waiting screen.
        rate_hz: the refresh rate, shown in the title.
    """
    if not state.present:
        text = render_waiting(state, now, diagnostics_topic, color)
        return '\n'.join(cut_line(line, width) for line in text.splitlines())
    diagnostic = state.diagnostic
    status = state.status if not state.status_silent(now) else None
    last_status = state.status
    lines: list[str] = []
    refresh = f'   refresh {rate_hz:g} Hz' if rate_hz else ''
    lines.append(_paint(f'safety_filter monitor   node {split_node_name(state.node_name)[1]}   '
                        f'{_clock(now)}{refresh}   up {now - (state.first_seen_s or now):.0f} s',
                        'bold', color))
    level = diagnostic.level_name if diagnostic is not None else '?'
    level_text = _paint(f'{level:<5}', _LEVEL_STYLES.get(diagnostic.level) if diagnostic
                        else None, color)
    mode = state.mode or '?'
    mode_text = _paint(f'{mode.upper():<10}', _MODE_STYLES.get(mode), color)
    certificate = diagnostic.certificate_id if diagnostic is not None else None
    if certificate is None and state.limits is not None:
        certificate = state.limits.certificate_id
    check = ''
    if state.expected_certificate_id and certificate:
        check = (' (= --certificate)' if certificate == state.expected_certificate_id
                 else f' (MISMATCH: --certificate is {state.expected_certificate_id})')
    lines.append(f'state {level_text}  mode {mode_text}  certificate {certificate or "?"}'
                 f'{check}')
    if diagnostic is not None:
        lines.append(f'  {diagnostic.message}   [report {now - diagnostic.received_s:.1f} s '
                     'ago]')
    else:
        lines.append('  (no diagnostics report yet)')
    for alarm in state.alarms(now):
        lines.append(_paint(ALARM_PREFIX + alarm, 'red', color))

    # ---- joints
    names = state.joint_names()
    name_width = max([5] + [len(n) for n in names])
    limits = state.limits
    lines.append('')
    lines.append(f'{"joint":<{name_width}} {"position  % of range":>22}  '
                 f'{"velocity  % of limit":>23}  {"torque  % of limit":>23}  {"margin":>7}')
    source = status if status is not None else last_status
    for joint in names:
        bounds = limits.of(joint) if limits is not None else None
        lower, upper, vmax, emax = bounds if bounds is not None else (math.nan,) * 4
        if source is not None:
            q, v = source.joint('position', joint), source.joint('velocity', joint)
            u = source.joint('torque', joint)
            margin = source.joint('margin', joint)
        else:
            q = v = u = math.nan
            margin = diagnostic.number(f'margin.{joint}') if diagnostic else math.nan
        pbar, pfrac = _range_bar(q, lower, upper)
        vbar, vfrac = _signed_bar(v, vmax)
        tbar, tfrac = _signed_bar(u, emax)
        margin_text = _fmt(margin, 3).rjust(7)
        if math.isfinite(margin) and margin < state.thin_margin:
            margin_text = (_paint(margin_text, 'red', color) if color
                           else margin_text.strip().rjust(6) + '!')
        elif joint in state.thin:
            margin_text = _paint(margin_text, 'yellow', color)
        lines.append(f'{joint:<{name_width}} {_fixed(q, 7, 3)} {pbar} {_percent(pfrac)}  '
                     f'{_fixed(v, 7, 2)} {vbar} {_percent(vfrac, True)}  '
                     f'{_fixed(u, 7, 2)} {tbar} {_percent(tfrac, True)}  {margin_text}')
    if not names:
        lines.append('  (joint names not known yet)')
    if limits is not None:
        lines.append(f'  limits: {limits.source}')
    else:
        lines.append('  limits: unknown (no --certificate; node parameters not read yet)')
    lines.append(f'  units: rad, rad/s, N m (prismatic: m, m/s, N); margin: smallest barrier '
                 f'value, thin < {state.thin_margin:g}')
    lines.append('')

    # ---- figures
    if diagnostic is not None:
        d_median = diagnostic.number('solve_time.median_us')
        d_p99 = diagnostic.number('solve_time.p99_us')
        d_max = diagnostic.number('solve_time.max_us')
        d_solves = diagnostic.values.get('solves', '?')
    else:
        d_median = d_p99 = d_max = math.nan
        d_solves = '?'
    median, p99, worst, count = state.solve_time_stats_us()
    intervention = source.get('intervention') if source is not None else math.nan
    window_max = diagnostic.number('intervention.max') if diagnostic is not None else math.nan
    recent_max = state.intervention_max_1s()
    lines.append(f'intervention   now {_num(intervention, 2)}   max last 1 s {_num(recent_max, 2)}'
                 f'   max last report {_num(window_max, 2)}   [N m]')
    lines.append(f'solve [us]     median {_num(median)}  p99 {_num(p99)}  max {_num(worst)} '
                 f'(last {count} steps)   report: {_num(d_median)} / {_num(d_p99)} / '
                 f'{_num(d_max)} ({d_solves})')
    totals = state.step_totals
    episodes = state.episodes
    lines.append(f'steps          {sum(totals.values())}   fallback {totals["fallback"]} '
                 f'({episodes["fallback"]} episodes)   recovering {totals["recovering"]} '
                 f'({episodes["recovering"]})   rejected {totals["rejected"]} '
                 f'({episodes["rejected"]})   stale {totals["stale"]} ({episodes["stale"]})')
    if source is not None:
        js_age = source.get('joint_state_age_s') * 1e3
        nominal_age = source.get('nominal_age_s') * 1e3
        step = source.get('step')
    else:
        js_age = diagnostic.number('age.joint_state_ms') if diagnostic else math.nan
        nominal_age = diagnostic.number('age.nominal_ms') if diagnostic else math.nan
        step = math.nan
    hold = ' (hold-still nominal)' if source is not None and source.get('hold_nominal') == 1.0 \
        else ''
    invalid = ''
    if diagnostic is not None:
        values = diagnostic.values
        invalid = (f'   invalid: joint_state {values.get("invalid.joint_state", "?")}'
                   f', nominal {values.get("invalid.nominal", "?")}')
    lines.append(f'input age [ms] joint_state {_num(js_age, 1)}   nominal {_num(nominal_age, 1)}'
                 f'{hold}{invalid}')
    step_text = f'{step:.0f}' if math.isfinite(step) else '?'
    lines.append(f'status         step {step_text}   {state.status_rate():.0f} msg/s   '
                 f'{state.status_count} received')
    if diagnostic is not None:
        active = diagnostic.values.get('active_constraints', 'none')
        reasons = diagnostic.values.get('reasons', 'none')
        lines.append(f'constraints    {active}')
        if reasons and reasons != 'none':
            lines.append(f'reasons        {reasons}')
    if state.recent_events:
        lines.append('')
        lines.append(f'events ({state.event_count}):')
        for event in state.recent_events:
            lines.append(f'  {_clock(event.t)} {event.kind:<18} {event.detail}')
    return '\n'.join(cut_line(line, width) for line in lines)


# ---------------------------------------------------------------------- command line
def add_monitor_arguments(parser: argparse.ArgumentParser) -> None:
    """The options of ``safety-filter monitor`` and ``filter_monitor``."""
    parser.add_argument('--node-name', default=DEFAULT_NODE_NAME, metavar='NAME',
                        help='the filter node to watch, e.g. safety_filter or '
                        '/arm1/safety_filter (default: safety_filter). Its diagnostics are '
                        "named by the node's base name only, so run filters in different "
                        'namespaces with different names or diagnostics topics')
    parser.add_argument('--refresh-rate', '--rate', dest='refresh_rate', type=float,
                        default=DEFAULT_RATE_HZ, metavar='HZ', help=deprecated(
                            f'screen refreshes per second (default: {DEFAULT_RATE_HZ:g})',
                            '--rate'))
    parser.add_argument('--thin-margin', type=float, default=DEFAULT_THIN_MARGIN,
                        metavar='VALUE', help='alarm when a barrier margin falls below this '
                        f'(barrier units; default: {DEFAULT_THIN_MARGIN:g}, the filter '
                        "node's thin_margin default, below which its diagnostics WARN)")
    parser.add_argument('--certificate', metavar='PATH', default=None,
                        help='certificate parameter file: joint limits to show values against, '
                        'and the id the node must run (default: read the node parameters)')
    parser.add_argument('--event-log', metavar='PATH', default=None,
                        help='append events as JSON lines to this file (flushed as they '
                        'happen; read by safety-filter replay --event-log)')
    parser.add_argument('--event-time', choices=EVENT_TIMES, default='wall',
                        help="the event log's 't': wall clock (default) or the filter node's "
                        'clock (simulated time in the demo; what lines up with a bag)')
    parser.add_argument('--duration', type=float, default=0.0, metavar='S',
                        help='stop after this many seconds (default: until Ctrl-C)')
    parser.add_argument('--plain', action='store_true',
                        help='print frames one after another, without escape codes (the '
                        'default when stdout is not a terminal)')
    parser.add_argument('--no-color', action='store_true',
                        help='no colours (also when NO_COLOR is set)')
    parser.add_argument('--absent-after', type=float, default=DEFAULT_ABSENT_AFTER_S,
                        metavar='S', help='no message for this long: the filter is gone '
                        f'(default: {DEFAULT_ABSENT_AFTER_S:g})')
    parser.add_argument('--diagnostics-topic', default='/diagnostics', metavar='TOPIC',
                        help='diagnostic_msgs/DiagnosticArray topic (default: /diagnostics)')
    parser.add_argument('--status-topic', default=None, metavar='TOPIC',
                        help="default: the node's ~/status, /<node name>/status")
    parser.add_argument('--domain-id', type=int, default=None, metavar='N',
                        help='ROS domain id (default: ROS_DOMAIN_ID or 0)')


def check_monitor_arguments(args: argparse.Namespace) -> None:
    """Raise :class:`SafetyFilterError` for option values out of range."""
    if not (math.isfinite(args.refresh_rate) and args.refresh_rate > 0):
        raise SafetyFilterError(f'--refresh-rate must be positive, got {args.refresh_rate}')
    if not math.isfinite(args.thin_margin):
        raise SafetyFilterError('--thin-margin must be finite')
    if not (math.isfinite(args.duration) and args.duration >= 0):
        raise SafetyFilterError('--duration must be >= 0')
    if not (math.isfinite(args.absent_after) and args.absent_after > 0):
        raise SafetyFilterError('--absent-after must be positive')
    split_node_name(args.node_name)


def _command_monitor(args: argparse.Namespace) -> int:
    try:
        from safety_filter.ros import monitor
    except ImportError as err:
        raise SafetyFilterError(
            f'the monitor needs rclpy and the ROS 2 message packages ({err}); install them '
            "with pip install -e '.[ros]' or source a ROS 2 Jazzy install") from err
    return monitor.run(args)


def add_monitor_parser(commands: argparse._SubParsersAction) -> None:
    """Add ``safety-filter monitor`` to the subcommands of ``safety-filter``."""
    parser = commands.add_parser(
        'monitor', help='watch a running filter live in the terminal; log its events',
        description="Subscribe to a running safety_filter node's /diagnostics and ~/status "
        'over DDS and show, a few times a second, its state and mode, each joint against its '
        'limits with the barrier margin, interventions, solve times, fallback and recovery '
        'counts, input ages and certificate id, with alarms (!!) for thin margins, the '
        'watchdog and stale states. Plain frames when stdout is not a terminal. Ctrl-C quits. '
        'Exit code 0: stopped (Ctrl-C, SIGTERM or --duration); 2: bad input (options, '
        'certificate file).')
    add_monitor_arguments(parser)
    parser.add_argument('--ros-args', dest='ros_args', nargs=argparse.REMAINDER, default=[],
                        metavar='ROS_ARGS', help='everything after this goes to ROS')
    parser.set_defaults(handler=_command_monitor)
