"""The filter's mode names and their integer codes: the one definition.

A filter step ends in one of four modes (:class:`FilterMode`); the node adds a fifth,
``'stale'``, for the steps its joint-state watchdog runs (joint states timed out: the hold
command at the last valid position). The ``mode`` field of a ``~/status`` record (and of a
replay's ``/replay/status``) holds the mode's integer code; diagnostics, the monitor, the
reports and the replay show the names. Every one of them reads the names and codes here::

    code  name         what produced the torque
    0     filtered     the QP answer, checked
    1     fallback     the constructive fallback (solver failed or its answer did not check)
    2     recovering   state outside the safe set: pushing back toward it
    3     rejected     invalid input: the hold command
    4     stale        joint states timed out (node watchdog): the hold command, no damping

The code of a mode is its index in :data:`MODE_NAMES`.
"""

from __future__ import annotations

import math
from enum import Enum


class FilterMode(str, Enum):
    """What produced the torque of a filter step (the values are the names shown)."""

    FILTERED = 'filtered'  # the QP answer, checked
    FALLBACK = 'fallback'  # constructive fallback: the solver failed or its answer did not check
    RECOVERING = 'recovering'  # state outside S: pushing back toward S
    REJECTED = 'rejected'  # invalid input: hold command

    def __str__(self) -> str:
        return self.value


STALE = 'stale'  # the node's watchdog step (not a filter mode: the filter does not know time)

# Names in code order: the code of a mode is its index here.
MODE_NAMES: tuple[str, ...] = tuple(mode.value for mode in FilterMode) + (STALE,)
MODE_FILTERED, MODE_FALLBACK, MODE_RECOVERING, MODE_REJECTED, MODE_STALE = range(5)
# Name -> code. FilterMode is a str enum, so a FilterMode looks up like its name.
MODE_CODES: dict[str, int] = {name: code for code, name in enumerate(MODE_NAMES)}
# The modes a filter step can end in (all but the node's 'stale').
FILTER_MODE_NAMES: tuple[str, ...] = MODE_NAMES[:MODE_STALE]
# The modes that are not the normal 'filtered' (episodes in the monitor and reports).
NON_FILTERED_MODE_NAMES: tuple[str, ...] = MODE_NAMES[MODE_FALLBACK:]


def mode_code(mode: str | FilterMode) -> int:
    """The integer code of a mode name or :class:`FilterMode` (``'recovering'`` -> 2).

    Raises:
        KeyError: not a mode name.
    """
    return MODE_CODES[str(mode)]


def mode_name(code: float) -> str | None:
    """The name of an integer code as stored in a status record (a float): None for NaN,
    ``'code <k>'`` for a code outside :data:`MODE_NAMES` (a newer recording)."""
    if not math.isfinite(code):
        return None
    index = int(round(code))
    return MODE_NAMES[index] if 0 <= index < len(MODE_NAMES) else f'code {index}'
