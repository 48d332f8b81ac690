"""The live monitor's event log: JSON lines, flushed as events happen (no ROS).

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
"""

from __future__ import annotations

import json
import math
from collections.abc import Sequence
from pathlib import Path
from typing import IO, Any

from safety_filter.errors import SafetyFilterError
from safety_filter.monitor.state import DEFAULT_NODE_NAME, MonitorEvent

EVENT_TIMES = ('wall', 'filter')


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
        SafetyFilterError: an unknown ``event_time``, or a file that cannot be opened.
    """

    def __init__(self, path: str | Path, node: str = DEFAULT_NODE_NAME,
                 event_time: str = 'wall') -> None:
        if event_time not in EVENT_TIMES:
            raise SafetyFilterError(f'event_time must be one of {EVENT_TIMES}, got '
                                    f'{event_time!r}')
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
