"""How a campaign starts its worker processes."""

from __future__ import annotations

import multiprocessing
from collections.abc import Sequence
from typing import Any


def worker_context(preload: Sequence[str] = ()) -> Any:
    """The multiprocessing context of a campaign's worker pool.

    'forkserver' where there is one (workers fork from a clean server process: no threads
    of this process are copied), with the modules ``preload`` imported once in the server;
    'spawn' elsewhere.
    """
    if 'forkserver' in multiprocessing.get_all_start_methods():
        context = multiprocessing.get_context('forkserver')
        if preload:
            context.set_forkserver_preload(list(preload))
        return context
    return multiprocessing.get_context('spawn')
