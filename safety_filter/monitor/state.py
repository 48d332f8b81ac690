"""What the live monitor knows about a filter node, and the events it detects (no ROS).

The ROS side (:mod:`safety_filter.ros.monitor`) only turns the filter node's messages into
snapshots and hands them to a :class:`MonitorState`; everything it knows and decides is
here, so it can be tested without DDS. How it is drawn is in
:mod:`safety_filter.monitor.screen`, how events are logged in
:mod:`safety_filter.recordings.event_log`.

* the snapshots it is given, in :mod:`safety_filter.monitor.snapshots`: one ``~/status``
  array with its layout, the filter's ``'<node>: filter'`` status of ``/diagnostics``, and
  the joint limits the values are shown against;
* :class:`MonitorState`: the latest snapshots, running totals, the alarms, and the **events**
  it detects from the sequence of snapshots (:class:`MonitorEvent`).

Events
------
Each event has a wall time ``t`` (when the monitor saw it), a ``kind``, a ``detail`` line
for people, ``stamp_s`` (the same moment on the filter node's clock: the stamps of its
``~/status`` and ``/diagnostics``, extrapolated with the wall clock; None before the first
message) and the kind's extra keys (in brackets):

- ``filter_appeared`` / ``filter_disappeared`` (``silent_s``): the first message after none
  for ``absent_after_s`` (2 s), and such a silence; episodes still open at a disappearance
  are ended first (``reason``).
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

import math
from collections import Counter, deque
from collections.abc import Sequence
from dataclasses import dataclass
from typing import Any

from safety_filter.errors import InvalidValue
from safety_filter.monitor.snapshots import (
    LEVEL_ERROR,
    LEVEL_NAMES,
    LEVEL_STALE,
    DiagnosticSnapshot,
    JointLimits,
    StatusSnapshot,
    split_node_name,
)
from safety_filter.online.mode_codes import (
    FILTER_MODE_NAMES,
    MODE_FALLBACK,
    MODE_NAMES,
    STALE,
)
from safety_filter.online.status_layout import THIN_MARGIN
from safety_filter.recordings.event_log import DEFAULT_NODE_NAME, MonitorEvent

# The modes whose stretches the monitor reports as episodes (the watchdog's 'stale' has its
# own events).
EPISODE_MODES = FILTER_MODE_NAMES[MODE_FALLBACK:]
MODE_STALE = STALE

DEFAULT_THIN_MARGIN = THIN_MARGIN  # the filter node's thin_margin default too
DEFAULT_ABSENT_AFTER_S = 2.0
DEFAULT_STATUS_SILENT_S = 1.0
THIN_MARGIN_HYSTERESIS = 0.2


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
            raise InvalidValue('thin margin', thin_margin, 'a finite number')
        if not (absent_after_s > 0 and status_silent_s > 0):
            raise InvalidValue('absent_after_s and status_silent_s',
                               (absent_after_s, status_silent_s), 'both positive')
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
        # steps the filter kept in its slow design's set (docs/method.md); None until a
        # diagnostic reports the count (older nodes do not)
        self.slow_set_total: int | None = None
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
        """Take one ``~/status`` message; the events it gives."""
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
        """Take the filter's diagnostic status; the events it gives."""
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
        slow = snapshot.number('count.slow_set')
        if math.isfinite(slow):
            self.slow_set_total = (self.slow_set_total or 0) + int(slow)
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
        """The joints to show: the status layout's, else the limits', else the
        diagnostics' margin keys."""
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
            lines.append(f'thin margin {joint}: {format_value(current, 4)} '
                         f'(min {episode.extreme:.4g}) < {self.thin_margin:g}')
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


def format_value(value: float, digits: int = 3, sign: bool = False) -> str:
    """``value`` with ``digits`` significant digits (``'nan'`` when not finite)."""
    if value is None or not math.isfinite(value):
        return 'nan'
    return f'{value:+.{digits}g}' if sign else f'{value:.{digits}g}'

