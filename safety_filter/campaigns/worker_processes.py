"""How a campaign starts its worker processes, and a robot model they can receive."""

from __future__ import annotations

import copy
import multiprocessing
from collections.abc import Sequence
from typing import Any

from safety_filter.core.robot_model import RobotModel


def portable_model(model: RobotModel) -> RobotModel:
    """A shallow copy of ``model`` that pickles (for worker processes).

    The model caches its Pinocchio model (a module object inside), which cannot be pickled;
    the copy starts with an empty cache and builds its own.
    """
    clone = copy.copy(model)
    if hasattr(clone, '_pinocchio_cache'):
        clone._pinocchio_cache = {}  # type: ignore[attr-defined]
    return clone


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
