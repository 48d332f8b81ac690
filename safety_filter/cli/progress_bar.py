"""The progress bar of long commands (``certify``, ``stress``): a tqdm bar on stderr."""

from __future__ import annotations

import sys
from typing import Any


class ProgressBar:
    """A tqdm bar on stderr driven by a ``(stage, fraction)`` callback (certification's and
    the stress test's progress)."""

    def __init__(self, enabled: bool) -> None:
        self._bar: Any = None
        self._stage: str | None = None
        if enabled:
            from tqdm import tqdm

            # disable=None: no bar when stderr is not a terminal (logs, CI, pipes).
            self._bar = tqdm(total=100, desc='starting', file=sys.stderr, leave=False,
                             disable=None,
                             bar_format='{desc:<28} {percentage:3.0f}%|{bar}| {elapsed}')

    def __call__(self, stage: str, fraction: float) -> None:
        if self._bar is None:
            return
        if stage != self._stage:
            self._stage = stage
            self._bar.reset(total=100)
            self._bar.set_description_str(stage)
        done = int(round(100 * min(max(fraction, 0.0), 1.0)))
        if done != self._bar.n:
            self._bar.n = done
            self._bar.refresh()

    def close(self) -> None:
        """Take the bar off the terminal."""
        if self._bar is not None:
            self._bar.close()
