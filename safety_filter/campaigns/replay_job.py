"""Replay one bag as a campaign does: read, replay with each certificate, report; never raise.

:func:`replay_bag` does everything for one bag (read, open-loop replay with each
certificate, optional closed-loop re-simulation, optional replay bag, report) and returns a
plain entry that says ``'ok'`` or ``'failed'`` with the error: a bad bag never raises. It is
the job a worker runs, in a local process (:mod:`safety_filter.campaigns.replay_batch`) or
on a Dask worker (:mod:`safety_filter.campaigns.replay_cluster`).

Output folder layout: ``<out>/<bag name>/replay_report.html`` (+ JSON, plots) per bag,
``<out>/<bag name>/<bag name>_replay`` (the replay bag, with ``write_bags``), and
``<out>/index.html`` and ``<out>/replay_summary.json`` for the whole run.
"""

from __future__ import annotations

import dataclasses
import os
import shutil
import time
import traceback
import uuid
from collections.abc import Sequence
from dataclasses import asdict, dataclass, field
from pathlib import Path
from typing import Any

from safety_filter.core.certificate import Certificate
from safety_filter.core.robot_model import RobotModel
from safety_filter.errors import BagError, SafetyFilterError
from safety_filter.recordings.bags import BAG_SUFFIXES
from safety_filter.recordings.event_log import EventLog
from safety_filter.replay.closed_loop import resimulate
from safety_filter.replay.open_loop import replay_open_loop
from safety_filter.replay.replay_bag import write_replay_bag
from safety_filter.replay.trial import ReplayTopics, read_trial
from safety_filter.reports.replay_report import (
    REPORT_HTML,
    CertificateRun,
    format_trial_summary,
    write_trial_report,
)


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
                   'move it or choose another --output-dir', path)


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
            raise BagError(f'cannot put the replay bag in place at {target}: {err}',
                           target) from err
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
