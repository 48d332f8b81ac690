"""The live monitor's event log: its one format, written and read here (no ROS).

:class:`MonitorEvent` is one event as the monitor detects it; :class:`EventLogWriter`
appends events to the log as the monitor runs; :func:`read_event_log` reads a log back (for
``safety-filter replay --event-log``) into an :class:`EventLog` of :class:`Event` lines.

One JSON object per line, written when the event is detected::

    {"t": 1718000000.123, "kind": "watchdog_trip", "detail": "...", "node": "safety_filter",
     "stamp_s": 1718000000.101, ...}

* ``t``: when the monitor saw it, wall clock [s since the epoch] (with ``--event-time
  filter``: the filter node's clock instead, see below); ``kind``; ``detail``: one line for
  people; ``node``: the filter node watched; ``stamp_s``: the same moment on the filter
  node's clock (``null`` before the first message). On a real arm both clocks are the
  system clock. Under simulated time (the demo: ``use_sim_time``, a lock-stepped simulator
  slower than real time) the bag's times are the filter's clock, so ``stamp_s`` is what
  lines up with a bag; ``--event-time filter`` puts it in ``t`` (the wall time then goes to
  ``wall_t``), which is what ``safety-filter replay --event-log`` expects.
* then the kind's extra keys; the kinds and their keys are listed in
  :mod:`safety_filter.monitor.state`. Values that JSON cannot hold (an infinite joint-state
  age) are written as ``null``.

Reading: a line counts as an event when it is a JSON object with a finite number ``t`` and
a string ``kind``; other lines are listed as malformed with the reason, not fatal, and a
missing file gives an empty log.
"""

from __future__ import annotations

import json
import math
from collections.abc import Mapping, Sequence
from dataclasses import dataclass, field
from pathlib import Path
from typing import IO, Any

from safety_filter.errors import EventLogError, InvalidValue

EVENT_TIMES = ('wall', 'filter')
DEFAULT_NODE_NAME = 'safety_filter'  # the filter node's default name, written in every line


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
    # json.dumps would write Infinity/NaN, which strict JSON readers refuse.
    if isinstance(value, float) and not math.isfinite(value):
        return None
    return value


class EventLogWriter:
    """Appends events to a JSON-lines file, one object per line, flushed after each batch.

    Args:
        path: the file (created with its folder, or appended to).
        node: the filter node's name, written in every line.
        event_time: ``'wall'`` (``t`` is the wall clock) or ``'filter'`` (``t`` is the filter
            node's clock, the wall clock goes to ``wall_t``).

    Raises:
        InvalidValue: an unknown ``event_time``; EventLogError: a file that cannot be opened.
    """

    def __init__(self, path: str | Path, node: str = DEFAULT_NODE_NAME,
                 event_time: str = 'wall') -> None:
        if event_time not in EVENT_TIMES:
            raise InvalidValue('event_time', event_time, f'one of {", ".join(EVENT_TIMES)}')
        self.path = Path(path)
        self.node = node
        self.event_time = event_time
        self.count = 0
        try:
            if self.path.parent != Path(''):
                self.path.parent.mkdir(parents=True, exist_ok=True)
            self._file: IO[str] | None = open(self.path, 'a', encoding='utf-8')  # noqa: SIM115
        except OSError as err:
            raise EventLogError(f'cannot open the event log {self.path}: {err}',
                                self.path) from err

    def write(self, events: Sequence[MonitorEvent]) -> None:
        """Append ``events`` and flush, so the file is readable while the monitor runs."""
        if self._file is None or not events:
            return
        for event in events:
            item = {k: _json_safe(v) for k, v in
                    event.to_dict(self.node, self.event_time).items()}
            self._file.write(json.dumps(item, separators=(', ', ': ')) + '\n')
            self.count += 1
        self._file.flush()

    def close(self) -> None:
        """Close the file; later writes are ignored."""
        if self._file is not None:
            self._file.close()
            self._file = None


# ---------------------------------------------------------------------- reading
@dataclass
class Event:
    """One line of the event log: bag time ``t`` [s], ``kind`` and the rest of the object."""

    t: float
    kind: str
    line: int
    data: dict[str, Any] = field(default_factory=dict)


@dataclass
class EventLog:
    """An event log as read: its events, the malformed lines, whether the file was there."""

    path: Path | None
    events: list[Event] = field(default_factory=list)
    malformed: list[dict[str, Any]] = field(default_factory=list)
    missing: bool = False

    def within(self, start_s: float, end_s: float) -> list[Event]:
        """Events with ``start_s <= t <= end_s``."""
        return [e for e in self.events if start_s <= e.t <= end_s]


def read_event_log(path: str | Path | None) -> EventLog:
    """Read a JSON-lines event log; never raises for its content.

    A missing file gives an empty log with ``missing=True``. Blank lines are skipped; a line
    that is not a JSON object with a finite number ``t`` and a string ``kind`` is listed in
    ``malformed`` with its line number and the reason.
    """
    if path is None:
        return EventLog(None)
    path = Path(path)
    log = EventLog(path)
    try:
        text = path.read_text(encoding='utf-8', errors='replace')
    except FileNotFoundError:
        log.missing = True
        return log
    except OSError as err:
        log.malformed.append({'line': 0, 'error': f'cannot read the file: {err}'})
        return log
    for number, line in enumerate(text.splitlines(), start=1):
        if not line.strip():
            continue
        try:
            item = json.loads(line)
        except json.JSONDecodeError as err:
            log.malformed.append({'line': number, 'error': f'not JSON: {err.msg}'})
            continue
        if not isinstance(item, dict):
            log.malformed.append({'line': number, 'error': 'not a JSON object'})
            continue
        t, kind = item.get('t'), item.get('kind')
        if isinstance(t, bool) or not isinstance(t, (int, float)) or not math.isfinite(t):
            log.malformed.append({'line': number, 'error': "no finite number 't'"})
            continue
        if not isinstance(kind, str) or not kind:
            log.malformed.append({'line': number, 'error': "no string 'kind'"})
            continue
        rest = {k: v for k, v in item.items() if k not in ('t', 'kind')}
        log.events.append(Event(float(t), kind, number, rest))
    log.events.sort(key=lambda e: e.t)
    return log
