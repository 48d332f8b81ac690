"""Replay a bag or a folder of bags: per-bag reports, in parallel, failures listed not fatal.

:func:`replay_bag` does everything for one bag (read, open-loop replay with each
certificate, optional closed-loop re-simulation, optional replay bag, report) and returns a
plain entry that says ``'ok'`` or ``'failed'`` with the error: a bad bag never raises.
:func:`replay_bags` runs it over many bags across processes (``concurrent.futures``) with a
progress bar, or on the workers of a running Dask cluster
(:mod:`safety_filter.replay.cluster`, imported only then); the command
``safety-filter replay`` is a thin layer over it.

Output folder layout: ``<out>/<bag name>/replay_report.html`` (+ JSON, plots) per bag,
``<out>/<bag name>/<bag name>_replay`` (the replay bag, with ``write_bags``), and
``<out>/index.html`` and ``<out>/replay_summary.json`` for the whole run.
"""

from __future__ import annotations

import copy
import dataclasses
import os
import shutil
import sys
import time
import traceback
import uuid
from collections.abc import Sequence
from dataclasses import asdict, dataclass, field
from pathlib import Path
from typing import Any

from safety_filter.core.certificate import Certificate
from safety_filter.core.robot_model import RobotModel
from safety_filter.errors import SafetyFilterError
from safety_filter.replay.bag_replay import (
    BAG_SUFFIXES,
    BagError,
    ReplayTopics,
    read_trial,
    replay_open_loop,
    resimulate,
    write_replay_bag,
)
from safety_filter.reports.replay_report import (
    REPORT_HTML,
    CertificateRun,
    EventLog,
    format_trial_summary,
    write_trial_report,
)

DEFAULT_JOBS = 2


@dataclass(frozen=True)
class ReplayOptions:
    """How to replay (the same for every bag of a batch).

    Attributes:
        topics: topic names to read.
        trigger: ``'nominal'`` or ``'joint_state'`` (the node's pairing rule).
        gravity_convention: ``'full'`` or ``'driver_compensated'``.
        payload_mass: payload used by the filter and the simulated arm [kg]; None: the
            middle of the certificate's range.
        joint_state_timeout_s, nominal_timeout_s: the node's timeouts [s].
        closed_loop: also re-simulate the arm in closed loop with each certificate.
        internal_rate_hz: integration rate of the re-simulation [Hz].
        write_bags: write a replay bag per input bag; bag_storage: its storage.
        plots: draw the report's plots (without them the report is the JSON and an HTML
            page of tables: much faster for large batches).
    """

    topics: ReplayTopics = field(default_factory=ReplayTopics)
    trigger: str = 'nominal'
    gravity_convention: str = 'full'
    payload_mass: float | None = None
    joint_state_timeout_s: float = 0.05
    nominal_timeout_s: float = 0.1
    closed_loop: bool = False
    internal_rate_hz: float = 10_000.0
    write_bags: bool = False
    bag_storage: str = 'mcap'
    plots: bool = True

    def record(self) -> dict[str, Any]:
        """JSON-ready form (for the reports)."""
        return asdict(self)


@dataclass(frozen=True)
class CertificateChoice:
    """A certificate to replay with, its display label and where it came from."""

    label: str
    certificate: Certificate
    source: str = ''


def bag_names(bags: Sequence[Path], root: Path) -> list[str]:
    """A distinct folder name per bag: its path below ``root`` with ``__`` for ``/``."""
    names: list[str] = []
    for bag in bags:
        try:
            relative = Path(bag).resolve().relative_to(Path(root).resolve())
            parts = list(relative.parts) or [Path(bag).name]
        except ValueError:
            parts = [Path(bag).name]
        if parts[-1].endswith(BAG_SUFFIXES):
            parts[-1] = Path(parts[-1]).stem
        base = '__'.join(parts) or 'bag'
        name, k = base, 2
        while name in names:
            name, k = f'{base}_{k}', k + 1
        names.append(name)
    return names


def portable_model(model: RobotModel) -> RobotModel:
    """A shallow copy of ``model`` that pickles (for worker processes).

    The model caches its Pinocchio model (a module object inside), which cannot be pickled;
    the copy starts with an empty cache and builds its own.
    """
    clone = copy.copy(model)
    if hasattr(clone, '_pinocchio_cache'):
        clone._pinocchio_cache = {}  # type: ignore[attr-defined]
    return clone


def _figures(data: dict[str, Any]) -> dict[str, Any]:
    run = data['runs'][0]
    summary = run['summary']
    closed = run['closed_loop']
    return {
        'steps': summary['steps'],
        'intervention_max': summary.get('intervention', {}).get('max'),
        'smallest_margin': summary.get('smallest_margin', {}).get('value'),
        'warnings': len(data['warnings']),
        'closed_loop_violated': None if closed is None else closed['violated'],
    }


def _remove_old_replay_bag(path: Path) -> None:
    """Delete a replay bag this tool wrote before at ``path`` (and nothing else)."""
    if not path.exists():
        return
    metadata = path / 'metadata.yaml'
    if path.is_dir() and metadata.is_file() and \
            'safety_filter.replay_of' in metadata.read_text(encoding='utf-8', errors='replace'):
        shutil.rmtree(path)
        return
    raise BagError(f'{path} exists and is not a replay bag written by safety_filter; '
                   'move it or choose another --output-dir')


def failed_entry(bag: str, name: str, error: str | None, detail: str | None = None
                 ) -> dict[str, Any]:
    """The entry of a bag that was not replayed, with its ``error`` (see :func:`replay_bag`
    for the keys)."""
    return {'name': name, 'bag': bag, 'status': 'failed', 'error': error, 'report': None,
            'report_json': None, 'replay_bag': None, 'figures': None, 'summary': '',
            'seconds': 0.0, 'detail': detail}


def _renamer(pairs: Sequence[tuple[str, str]]) -> Any:
    """A function that rewrites the opened paths in a text to the recorded ones."""
    pairs = sorted(((real, shown) for real, shown in pairs if real != shown),
                   key=lambda pair: -len(pair[0]))  # the longest first: nested paths

    def rename(text: str) -> str:
        for real, shown in pairs:
            text = text.replace(real, shown)
        return text
    return rename


_STAGING = '.partial-'


def _write_replay_bag_atomically(bag: str, result: Any, target: Path, storage: str,
                                 custom_data: dict[str, str]) -> None:
    """Write the replay bag in a hidden folder beside ``target``, then rename it into place.

    A process killed while writing (a cluster worker, Ctrl-C) leaves only a hidden
    ``.partial-*`` folder, which the next attempt at the same bag removes, never a
    half-written bag under the final name that a retry would refuse to replace. The staged
    bag has the final folder name, so its storage file is named as a direct write names it.
    """
    folder = target.parent
    if folder.is_dir():
        for stale in folder.glob(f'{_STAGING}{target.name}-*'):
            shutil.rmtree(stale, ignore_errors=True)
    staging = folder / f'{_STAGING}{target.name}-{uuid.uuid4().hex}'
    try:
        staged = write_replay_bag(bag, result, staging / target.name, storage=storage,
                                  custom_data=custom_data)
        try:
            os.rename(staged, target)
        except OSError as err:
            raise BagError(f'cannot put the replay bag in place at {target}: {err}') from err
    finally:
        shutil.rmtree(staging, ignore_errors=True)


def replay_bag(bag: str | Path, name: str, model: RobotModel,
               certificates: Sequence[CertificateChoice], options: ReplayOptions,
               out_dir: str | Path, events: EventLog | None = None, *,
               recorded_bag: str | None = None, recorded_out_dir: str | None = None
               ) -> dict[str, Any]:
    """Replay one bag and write its report; never raises for a bad bag.

    Returns an entry: ``name``, ``bag``, ``status`` (``'ok'``/``'failed'``), ``error``,
    ``report`` (HTML path relative to ``out_dir``), ``report_json``, ``replay_bag``,
    ``figures`` (a few key numbers), ``summary`` (the terminal text), ``seconds``, and
    ``detail`` (a traceback, for errors that are not the bag's fault).

    ``recorded_bag`` and ``recorded_out_dir`` are how the reports, the entry and the error
    messages name ``bag`` and ``out_dir`` (default: as given). A cluster worker opens the
    absolute paths but records the spelling of the machine that started the run, so that
    its output is the same as a local run's.
    """
    started = time.perf_counter()
    out_dir = Path(out_dir)
    shown_bag = str(bag) if recorded_bag is None else recorded_bag
    shown_out = out_dir if recorded_out_dir is None else Path(recorded_out_dir)
    folder, shown_folder = out_dir / name, shown_out / name
    target = folder / f'{name}_replay'
    staging_prefix = str(folder / f'{_STAGING}{target.name}-')
    rename = _renamer([(str(Path(bag)), str(Path(shown_bag))), (str(bag), shown_bag),
                       (str(out_dir), str(shown_out))])
    entry = failed_entry(shown_bag, name, None)
    try:
        trial = read_trial(bag, model, options.topics)
        if recorded_bag is not None:
            trial = dataclasses.replace(trial, path=Path(shown_bag))
        filter_options: dict[str, Any] = {'gravity_convention': options.gravity_convention}
        if options.payload_mass is not None:
            filter_options['payload_mass'] = options.payload_mass
        runs = []
        for choice in certificates:
            result = replay_open_loop(
                trial, model, choice.certificate, trigger=options.trigger,
                joint_state_timeout_s=options.joint_state_timeout_s,
                nominal_timeout_s=options.nominal_timeout_s, **filter_options)
            closed = None
            if options.closed_loop:
                closed = resimulate(trial, model, choice.certificate,
                                    payload_mass=options.payload_mass,
                                    internal_rate_hz=options.internal_rate_hz,
                                    nominal_timeout_s=options.nominal_timeout_s,
                                    gravity_convention=options.gravity_convention)
            runs.append(CertificateRun(choice.label, choice.certificate, result,
                                       choice.source, closed))
        # 'html' is set by write_trial_report from the folder it writes to; the extra
        # entries override it with the recorded spelling.
        extra: dict[str, Any] = {'html': str(shown_folder / REPORT_HTML)}
        if options.write_bags:
            _remove_old_replay_bag(target)
            _write_replay_bag_atomically(
                str(bag), runs[0].result, target, options.bag_storage, custom_data={
                    # (the same value write_replay_bag records, in the recorded spelling)
                    'safety_filter.replay_of': str(Path(shown_bag)),
                    'safety_filter.certificate_id': runs[0].certificate.certificate_id,
                    'safety_filter.trigger': options.trigger})
            extra['replay_bag'] = str(shown_folder / target.name)
            entry['replay_bag'] = extra['replay_bag']
        data = write_trial_report(folder, trial, model, runs, name=name,
                                  options=options.record(), events=events, extra=extra,
                                  plots=options.plots)
        entry.update(status='ok', report=str(Path(name) / 'replay_report.html'),
                     report_json=str(Path(name) / 'replay_report.json'),
                     figures=_figures(data), summary=format_trial_summary(data))
    except BagError as err:
        entry['error'] = str(err)
    except SafetyFilterError as err:
        entry['error'] = f'{bag}: {err}'
    except OSError as err:  # the output folder: full disk, permissions
        entry['error'] = f'{bag}: cannot write the results: {err}'
    except Exception as err:  # not the bag's fault: say so, keep the traceback in the JSON
        entry['error'] = f'{bag}: internal error: {type(err).__name__}: {err}'
        entry['detail'] = traceback.format_exc()
    if entry['error'] is not None:
        # A staged replay bag's path is reported as the bag it was to become.
        text = entry['error']
        while staging_prefix in text:
            start = text.index(staging_prefix)
            end = text.find(os.sep, start + len(staging_prefix))
            text = text[:start] + str(folder) + (text[end:] if end >= 0 else '')
        entry['error'] = rename(text)
    entry['seconds'] = time.perf_counter() - started
    return entry


_WORKER: dict[str, Any] = {}
_PRELOAD = ['safety_filter.replay.batch', 'matplotlib.backends.backend_agg',
            'rosbags.highlevel']


def _worker_context(multiprocessing: Any) -> Any:
    """'forkserver' with the heavy imports preloaded once (workers fork from it, no threads
    of this process are copied); 'spawn' where there is no forkserver."""
    if 'forkserver' in multiprocessing.get_all_start_methods():
        context = multiprocessing.get_context('forkserver')
        context.set_forkserver_preload(_PRELOAD)
        return context
    return multiprocessing.get_context('spawn')


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
                jobs: int = DEFAULT_JOBS, events: EventLog | None = None,
                progress: bool = True, cluster: str | None = None) -> list[dict[str, Any]]:
    """Replay every bag (see :func:`replay_bag`), ``jobs`` at a time in worker processes.

    One bag, or ``jobs <= 1``, runs in this process. With ``cluster``, the address of a
    running Dask scheduler (``tcp://HOST:PORT``), the bags are replayed on its workers
    instead and ``jobs`` is not used (:func:`safety_filter.replay.cluster.replay_on_cluster`:
    the bags and ``out_dir`` must be at the same paths on the workers). A progress bar goes
    to stderr when it is a terminal and ``progress`` is set. Returns the entries in the
    order of ``bags``.

    Raises:
        SafetyFilterError: ``jobs`` < 1, or ``names`` of the wrong length;
            :class:`safety_filter.replay.cluster.ClusterError` when the cluster cannot be
            used (before any bag is replayed).
    """
    from tqdm import tqdm

    if jobs < 1:
        raise SafetyFilterError(f'jobs must be >= 1, got {jobs}')
    bags = [str(b) for b in bags]
    names = list(names) if names is not None else bag_names([Path(b) for b in bags],
                                                             Path(bags[0]).parent if bags
                                                             else Path('.'))
    if len(names) != len(bags):
        raise SafetyFilterError('one name per bag is needed')
    if cluster is not None:
        # Dask is imported only here: a local replay does not pay for it.
        from safety_filter.replay.cluster import replay_on_cluster

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
            import multiprocessing
            from concurrent.futures import ProcessPoolExecutor, as_completed

            context = _worker_context(multiprocessing)
            with ProcessPoolExecutor(
                    max_workers=min(jobs, len(bags)), mp_context=context,
                    initializer=_init_worker,
                    initargs=(portable_model(model), list(certificates), options,
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
