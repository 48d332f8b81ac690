"""Replay a bag or a folder of bags: per-bag reports, in parallel, failures listed not fatal.

:func:`replay_bags` runs :func:`safety_filter.campaigns.replay_job.replay_bag` over many bags
across processes (``concurrent.futures``) with a progress bar, or on the workers of a
running Dask cluster (:mod:`safety_filter.campaigns.replay_cluster`, imported only then); the
command ``safety-filter replay`` is a thin layer over it. The output folder's layout is
described in :mod:`safety_filter.campaigns.replay_job`.
"""

from __future__ import annotations

import sys
from collections.abc import Sequence
from pathlib import Path
from typing import Any

from safety_filter.campaigns.defaults import DEFAULT_REPLAY_JOBS
from safety_filter.campaigns.replay_job import (
    CertificateChoice,
    ReplayOptions,
    bag_names,
    failed_entry,
    replay_bag,
)
from safety_filter.campaigns.worker_processes import worker_context
from safety_filter.core.robot_model import RobotModel
from safety_filter.errors import InvalidValue, ShapeMismatch
from safety_filter.recordings.event_log import EventLog

_WORKER: dict[str, Any] = {}
# Imported once in the forkserver, so that each worker starts with them.
_PRELOAD = ['safety_filter.campaigns.replay_job', 'matplotlib.backends.backend_agg',
            'rosbags.highlevel']


def _init_worker(model: RobotModel, certificates: Sequence[CertificateChoice],
                 options: ReplayOptions, out_dir: str, events: EventLog | None) -> None:
    _WORKER.update(model=model, certificates=certificates, options=options, out_dir=out_dir,
                   events=events)


def _work(bag: str, name: str) -> dict[str, Any]:
    return replay_bag(bag, name, _WORKER['model'], _WORKER['certificates'],
                      _WORKER['options'], _WORKER['out_dir'], _WORKER['events'])


def replay_bags(bags: Sequence[str | Path], model: RobotModel,
                certificates: Sequence[CertificateChoice], options: ReplayOptions,
                out_dir: str | Path, *, names: Sequence[str] | None = None,
                jobs: int = DEFAULT_REPLAY_JOBS, events: EventLog | None = None,
                progress: bool = True, cluster: str | None = None) -> list[dict[str, Any]]:
    """Replay every bag (see :func:`replay_bag`), ``jobs`` at a time in worker processes.

    One bag, or ``jobs <= 1``, runs in this process. With ``cluster``, the address of a
    running Dask scheduler (``tcp://HOST:PORT``), the bags are replayed on its workers
    instead and ``jobs`` is not used
    (:func:`safety_filter.campaigns.replay_cluster.replay_on_cluster`: the bags and
    ``out_dir`` must be at the same paths on the workers). A progress bar goes to stderr
    when it is a terminal and ``progress`` is set. Returns the entries in the
    order of ``bags``.

    Raises:
        InvalidValue: ``jobs`` < 1; ShapeMismatch: ``names`` of the wrong length;
        ClusterError: the cluster cannot be used (before any bag is replayed).
    """
    from tqdm import tqdm

    if jobs < 1:
        raise InvalidValue('jobs', jobs, '>= 1')
    bags = [str(b) for b in bags]
    names = list(names) if names is not None else bag_names([Path(b) for b in bags],
                                                             Path(bags[0]).parent if bags
                                                             else Path('.'))
    if len(names) != len(bags):
        raise ShapeMismatch('names (one per bag)', len(bags), len(names))
    if cluster is not None:
        # Dask is imported only here: a local replay does not pay for it.
        from safety_filter.campaigns.replay_cluster import replay_on_cluster

        return replay_on_cluster(cluster, bags, model, certificates, options, out_dir,
                                 names=names, events=events, progress=progress)
    entries: list[dict[str, Any] | None] = [None] * len(bags)
    bar = tqdm(total=len(bags), unit='bag', file=sys.stderr, disable=None if progress else True,
               desc='replay', leave=False)
    try:
        if jobs == 1 or len(bags) <= 1:
            for k, (bag, name) in enumerate(zip(bags, names)):
                entries[k] = replay_bag(bag, name, model, certificates, options, out_dir,
                                        events)
                bar.update(1)
        else:
            from concurrent.futures import ProcessPoolExecutor, as_completed

            with ProcessPoolExecutor(
                    max_workers=min(jobs, len(bags)), mp_context=worker_context(_PRELOAD),
                    initializer=_init_worker,
                    initargs=(model, list(certificates), options,
                              str(out_dir), events)) as pool:
                futures = {pool.submit(_work, bag, name): k
                           for k, (bag, name) in enumerate(zip(bags, names))}
                for future in as_completed(futures):
                    k = futures[future]
                    try:
                        entries[k] = future.result()
                    except Exception as err:  # a worker died (killed, out of memory)
                        entries[k] = failed_entry(bags[k], names[k],
                                                  f'{bags[k]}: the worker process failed: '
                                                  f'{type(err).__name__}: {err}')
                    bar.update(1)
    finally:
        bar.close()
    return [e for e in entries if e is not None]
