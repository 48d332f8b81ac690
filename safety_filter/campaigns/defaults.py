"""The campaigns' defaults (stress test, replay of many bags), importable without the
numeric libraries: the command line shows them in ``--help``, which answers without loading
numpy."""

from __future__ import annotations

import os

DEFAULT_DURATION_S = 5.0  # simulated seconds per run
DEFAULT_PLANTS = 8  # random plants drawn from the uncertainty set, besides the fixed ones
DEFAULT_JOBS = os.cpu_count() or 1  # stress runs in parallel (processes)
DEFAULT_REPLAY_JOBS = 2  # bags replayed in parallel (processes)
