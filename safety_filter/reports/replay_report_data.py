"""The figures of a replayed trial, as they go into ``replay_report.json``.

:func:`report_data` gathers what :mod:`safety_filter.replay` found for one bag, replayed with
one certificate or two (a comparison): per run its summary, most extreme moments, solve-time
histogram, agreement with the recorded torques and closed-loop result; the input gaps, the
comparison table and the events of the event log. The keys are listed in
:mod:`safety_filter.reports.replay_report`. The names and colours the replay report's pages
and plots share are here too.
"""

from __future__ import annotations

from collections.abc import Sequence
from dataclasses import dataclass
from typing import Any

import numpy as np

from safety_filter.core.certificate import Certificate
from safety_filter.core.limit_tolerance import limit_broken
from safety_filter.core.robot_model import RobotModel
from safety_filter.recordings.event_log import EventLog
from safety_filter.replay.closed_loop import ClosedLoopResult
from safety_filter.replay.open_loop import ReplayResult, agreement, summarize
from safety_filter.replay.trial import Trial
from safety_filter.reports.html_kit import json_ready

REPORT_FORMAT = 'safety_filter/replay-report-1'
SUMMARY_FORMAT = 'safety_filter/replay-summary-1'
REPORT_HTML = 'replay_report.html'
REPORT_JSON = 'replay_report.json'
SUMMARY_HTML = 'index.html'
SUMMARY_JSON = 'replay_summary.json'
MOMENTS = 5
MOMENT_SEPARATION_S = 0.1
RUN_COLOURS = ('#1f5fa8', '#d9622b')
MODE_COLOURS = {'fallback': '#f0b429', 'recovering': '#d64545', 'rejected': '#7b3fb5',
                'stale': '#888888'}
# Event kinds take these colours in turn, in the PNGs and the zoomable plots alike.
EVENT_PALETTE = ('#2a9d8f', '#e76f51', '#6a4c93', '#8ab17d', '#e9c46a', '#264653')


@dataclass
class CertificateRun:
    """One certificate's replay of a trial (and its closed-loop re-simulation, if run)."""

    label: str
    certificate: Certificate
    result: ReplayResult
    source: str = ''
    closed: ClosedLoopResult | None = None


def _extreme_moments(time: np.ndarray, relative: np.ndarray, values: np.ndarray,
                     largest: bool, extra: Sequence[Any] | None = None
                     ) -> list[dict[str, Any]]:
    """The ``MOMENTS`` most extreme finite values, at least ``MOMENT_SEPARATION_S`` apart."""
    finite = np.flatnonzero(np.isfinite(values))
    order = finite[np.argsort(values[finite], kind='stable')]
    if largest:
        order = order[::-1]
    chosen: list[int] = []
    for k in order:
        if all(abs(time[k] - time[j]) >= MOMENT_SEPARATION_S for j in chosen):
            chosen.append(int(k))
            if len(chosen) == MOMENTS:
                break
    moments = []
    for k in chosen:
        item: dict[str, Any] = {'at_s': float(time[k]), 'at_rel_s': float(relative[k]),
                                'value': float(values[k])}
        if extra is not None:
            item.update(extra[k])
        moments.append(item)
    return moments


def _moments(trial: Trial, result: ReplayResult, names: Sequence[str]) -> dict[str, Any]:
    relative = trial.relative_time(result.time, result.stamp_ns)
    valid = result.mode != 'stale'
    intervention = np.where(valid, result.intervention, np.nan)
    modes = [{'mode': str(m)} for m in result.mode]
    margin = np.where(valid[:, None] & np.isfinite(result.margin), result.margin, np.inf)
    smallest = margin.min(axis=1) if margin.size else np.zeros(0)
    smallest = np.where(np.isfinite(smallest), smallest, np.nan)
    joints = [{'joint': names[int(np.argmin(row))]} for row in margin]
    return {'largest_intervention': _extreme_moments(result.time, relative, intervention,
                                                     True, modes),
            'smallest_margin': _extreme_moments(result.time, relative, smallest, False,
                                                joints)}


def solve_histogram(result: ReplayResult, bins: int = 40) -> dict[str, list[float]]:
    """Histogram of the solve times [us] of the steps that ran a solve (``edges_us``,
    ``counts``; both empty when none did)."""
    solve = result.solve_time_s[(result.mode != 'stale') & (result.solve_time_s > 0)] * 1e6
    if len(solve) == 0:
        return {'edges_us': [], 'counts': []}
    low, high = float(solve.min()), float(solve.max())
    if high <= low:
        high = low * 1.01 + 1e-3
    edges = np.geomspace(max(low, 1e-3), high, bins + 1)
    counts, _ = np.histogram(np.clip(solve, edges[0], edges[-1]), bins=edges)
    return {'edges_us': edges.tolist(), 'counts': counts.tolist()}


def _closed_loop_data(closed: ClosedLoopResult, names: Sequence[str]) -> dict[str, Any]:
    violations = {kind: {name: float(value[i]) for i, name in enumerate(names)}
                  for kind, value in closed.violations.items()}
    modes, counts = np.unique(closed.mode.astype(str), return_counts=True)
    return {
        'violations': violations,
        'violated': bool(any(limit_broken(v) for kind in violations.values()
                             for v in kind.values())),
        'difference': {key: {name: float(value[i]) for i, name in enumerate(names)}
                       for key, value in closed.difference.items()},
        'modes': {str(m): int(c) for m, c in zip(modes, counts)},
    }


def _comparison(runs: list[dict[str, Any]], names: Sequence[str]) -> dict[str, Any]:
    """The side-by-side table of two (or more) runs."""

    def pick(run: dict[str, Any], *keys: str) -> Any:
        value: Any = run
        for key in keys:
            if not isinstance(value, dict) or key not in value:
                return None
            value = value[key]
        return value

    def worst(run: dict[str, Any], kind: str) -> Any:
        closed = run.get('closed_loop')
        if not closed:
            return None
        return max(closed['violations'][kind].values())

    rows = [
        ('intervention mean', 'N m', lambda r: pick(r, 'summary', 'intervention', 'mean')),
        ('intervention p95', 'N m', lambda r: pick(r, 'summary', 'intervention', 'p95')),
        ('intervention max', 'N m', lambda r: pick(r, 'summary', 'intervention', 'max')),
        ('time at an active constraint', '%', lambda r: None if pick(
            r, 'summary', 'time_any_active_fraction') is None else 100.0 * pick(
            r, 'summary', 'time_any_active_fraction')),
    ]
    for name in names:
        rows.append((f'time active: {name}', '%', lambda r, name=name: None if pick(
            r, 'summary', 'time_active_fraction', name) is None else 100.0 * pick(
            r, 'summary', 'time_active_fraction', name)))
    rows += [
        ('smallest margin', '', lambda r: pick(r, 'summary', 'smallest_margin', 'value')),
        ('smallest margin at joint', '', lambda r: pick(r, 'summary', 'smallest_margin',
                                                       'joint')),
        ('fallback steps', '', lambda r: pick(r, 'summary', 'modes').get('fallback', 0)),
        ('recovering steps', '', lambda r: pick(r, 'summary', 'modes').get('recovering', 0)),
        ('solve time p99', 'us', lambda r: pick(r, 'summary', 'solve_time_us', 'p99')),
        ('closed loop: position violation', 'rad or m', lambda r: worst(r, 'position')),
        ('closed loop: velocity violation', 'rad/s or m/s', lambda r: worst(r, 'velocity')),
        ('closed loop: torque violation', 'N m or N', lambda r: worst(r, 'torque')),
    ]
    return {'labels': [r['label'] for r in runs],
            'rows': [{'metric': metric, 'unit': unit, 'values': [get(r) for r in runs]}
                     for metric, unit, get in rows]}


def report_data(trial: Trial, model: RobotModel, runs: Sequence[CertificateRun], *,
                name: str = '', options: dict[str, Any] | None = None,
                events: EventLog | None = None) -> dict[str, Any]:
    """The machine-readable report of one trial (keys: see the module docstring)."""
    names = list(model.joint_names)
    start = trial.start_time
    ends = [float(t[-1]) for t in (trial.state_time, trial.nominal_time) if len(t)]
    end = max(ends) if ends else start
    run_data = []
    for index, run in enumerate(runs):
        run_data.append({
            'label': run.label,
            'role': 'certificate' if index == 0 else 'compare',
            'source': run.source,
            'certificate_id': run.certificate.certificate_id,
            'summary': summarize(run.result, model),
            'moments': _moments(trial, run.result, names),
            'solve_time_histogram': solve_histogram(run.result),
            'agreement': agreement(run.result),
            'closed_loop': (_closed_loop_data(run.closed, names) if run.closed is not None
                            else None),
        })
    event_data = None
    if events is not None and events.path is not None:
        inside = events.within(start, end)
        event_data = {
            'path': str(events.path), 'missing': events.missing, 'count': len(events.events),
            'in_trial': [{'t': e.t, 't_rel_s': e.t - start, 'kind': e.kind, 'line': e.line,
                          **e.data} for e in inside],
            'malformed': list(events.malformed)}
    gaps = runs[0].result.gaps if runs else []
    return json_ready({
        'format': REPORT_FORMAT,
        'name': name or trial.path.name,
        'bag': str(trial.path),
        'robot': model.name,
        'joint_names': names,
        'options': options or {},
        'start_time_s': start,
        'end_time_s': end,
        'duration_s': end - start,
        'topics': trial.topics,
        'warnings': list(trial.warnings),
        'gaps': [{'from_s': a, 'to_s': b, 'from_rel_s': a - start, 'to_rel_s': b - start,
                  'topic': topic} for a, b, topic in gaps],
        'runs': run_data,
        'comparison': _comparison(run_data, names) if len(run_data) > 1 else None,
        'events': event_data,
        'plots': [],
        'html': None,
    })
