"""Reports of replayed trials: a terminal summary, an HTML page with plots, and JSON.

:func:`report_data` gathers what :mod:`safety_filter.replay.bag_replay` found for one bag, replayed
with one certificate or two (a comparison); :func:`write_trial_report` writes a folder with
``replay_report.html`` (self-contained: our CSS, PNG plots next to it), ``replay_report.json``
and the plots; :func:`format_trial_summary` renders the same figures for the terminal.
:func:`write_batch_summary` and :func:`format_batch_summary` do the same for a folder of
bags (``index.html`` and ``replay_summary.json``, one row per bag, failures with their
error).

Keys of ``replay_report.json`` (format ``safety_filter/replay-report-1``). Times ``*_s``
are bag times [s]; ``*_rel_s`` the same from the start of the trial (the plots' axis):

* ``format``, ``name``, ``bag``, ``robot``, ``joint_names``, ``options`` (trigger,
  timeouts, gravity convention, payload, topics), ``start_time_s``, ``end_time_s``,
  ``duration_s``, ``topics`` (message count per topic), ``warnings`` (what the reader
  repaired or found odd: out-of-order or duplicated stamps, skipped messages);
* ``runs``: one entry per certificate (the first is the one given with ``--certificate``,
  the second the ``--compare`` one), each with ``label``, ``role``, ``source``,
  ``certificate_id``, ``summary`` (:func:`safety_filter.replay.bag_replay.summarize`: ``steps``,
  ``modes``, ``intervention`` mean/p95/max/max_at_s [N m], ``smallest_margin``,
  ``time_active_fraction`` per joint, ``time_any_active_fraction``, ``solve_time_us``,
  ``episodes`` of fallback/recovering/rejected/stale steps, ``gaps``,
  ``recorded_state_violations``), ``moments`` (``largest_intervention`` and
  ``smallest_margin``: the five most extreme moments, at least 0.1 s apart, with their
  times), ``solve_time_histogram`` (``edges_us``, ``counts``), ``agreement`` (with the
  recorded filtered torques: ``matched_steps``, ``max_abs_diff``, ``rms_diff``,
  ``p99_abs_diff`` [N m]) and ``closed_loop`` (null unless re-simulated: ``violations``
  per kind and joint, ``violated``, ``difference`` to the recorded motion, ``modes``);
* ``gaps``: input gaps (joint states older than the timeout, nominal silences);
* ``comparison``: null, or ``labels`` and ``rows`` (``metric``, ``unit``, ``values``: one
  per run) of the side-by-side table;
* ``events``: the event log (``path``, ``count``, ``in_trial``: events within the trial,
  ``malformed``: ``[{'line', 'error'}]``), or null without one;
* ``plots``: the PNG files; ``html``: the page.

The event log is the live monitor's JSON-lines file: one object per line with at least
``t`` (bag time [s], the clock the recorder stamps with) and ``kind``. Events within a
trial are drawn on its time plots; lines that are not such objects are reported, not fatal;
a missing file is ignored.

Matplotlib is imported only when plots are drawn, with the Agg canvas and its
object-oriented API, so the caller's pyplot backend is left alone.
"""

from __future__ import annotations

import base64
import datetime as _dt
import html
import json
import math
from collections.abc import Sequence
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

import numpy as np

from safety_filter.core.certificate import Certificate
from safety_filter.core.robot_model import RobotModel
from safety_filter.replay.bag_replay import (
    ClosedLoopResult,
    ReplayResult,
    Trial,
    agreement,
    summarize,
)
from safety_filter.reports.certificate_report import SAFETY_NOTICE
from safety_filter.reports.html_kit import (
    BASE_CSS,
    UPLOT_VERSION,
    asset_text,
    json_ready,
    json_script_element,
    script_element,
    uplot_elements,
)

REPORT_FORMAT = 'safety_filter/replay-report-1'
SUMMARY_FORMAT = 'safety_filter/replay-summary-1'
REPORT_HTML = 'replay_report.html'
REPORT_JSON = 'replay_report.json'
SUMMARY_HTML = 'index.html'
SUMMARY_JSON = 'replay_summary.json'
VIOLATION_TOLERANCE = 1e-9  # excursions past a limit below this are rounding, not violations
MOMENTS = 5
MOMENT_SEPARATION_S = 0.1
_RUN_COLOURS = ('#1f5fa8', '#d9622b')
_MODE_COLOURS = {'fallback': '#f0b429', 'recovering': '#d64545', 'rejected': '#7b3fb5',
                 'stale': '#888888'}


# ---------------------------------------------------------------------- event log
@dataclass
class Event:
    """One line of the event log: bag time ``t`` [s], ``kind`` and the rest of the object."""

    t: float
    kind: str
    line: int
    data: dict[str, Any] = field(default_factory=dict)


@dataclass
class EventLog:
    """An event log as read: its events, the malformed lines, whether the file was there."""

    path: Path | None
    events: list[Event] = field(default_factory=list)
    malformed: list[dict[str, Any]] = field(default_factory=list)
    missing: bool = False

    def within(self, start_s: float, end_s: float) -> list[Event]:
        """Events with ``start_s <= t <= end_s``."""
        return [e for e in self.events if start_s <= e.t <= end_s]


def read_event_log(path: str | Path | None) -> EventLog:
    """Read a JSON-lines event log; never raises for its content.

    A missing file gives an empty log with ``missing=True``. Blank lines are skipped; a line
    that is not a JSON object with a finite number ``t`` and a string ``kind`` is listed in
    ``malformed`` with its line number and the reason.
    """
    if path is None:
        return EventLog(None)
    path = Path(path)
    log = EventLog(path)
    try:
        text = path.read_text(encoding='utf-8', errors='replace')
    except FileNotFoundError:
        log.missing = True
        return log
    except OSError as err:
        log.malformed.append({'line': 0, 'error': f'cannot read the file: {err}'})
        return log
    for number, line in enumerate(text.splitlines(), start=1):
        if not line.strip():
            continue
        try:
            item = json.loads(line)
        except json.JSONDecodeError as err:
            log.malformed.append({'line': number, 'error': f'not JSON: {err.msg}'})
            continue
        if not isinstance(item, dict):
            log.malformed.append({'line': number, 'error': 'not a JSON object'})
            continue
        t, kind = item.get('t'), item.get('kind')
        if isinstance(t, bool) or not isinstance(t, (int, float)) or not math.isfinite(t):
            log.malformed.append({'line': number, 'error': "no finite number 't'"})
            continue
        if not isinstance(kind, str) or not kind:
            log.malformed.append({'line': number, 'error': "no string 'kind'"})
            continue
        rest = {k: v for k, v in item.items() if k not in ('t', 'kind')}
        log.events.append(Event(float(t), kind, number, rest))
    log.events.sort(key=lambda e: e.t)
    return log


# ---------------------------------------------------------------------- figures
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


def _solve_histogram(result: ReplayResult, bins: int = 40) -> dict[str, list[float]]:
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
        'violated': bool(any(v > VIOLATION_TOLERANCE for kind in violations.values()
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
            'solve_time_histogram': _solve_histogram(run.result),
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


# ---------------------------------------------------------------------- terminal
def _num(value: Any, digits: int = 4) -> str:
    if value is None:
        return '-'
    if isinstance(value, str):
        return value
    x = float(value)
    return f'{x:.{digits}g}' if math.isfinite(x) else str(x)


def _episode_text(episodes: list[dict[str, Any]], start: float, limit: int = 3) -> str:
    if not episodes:
        return 'none'
    parts = [f'+{e["from_s"] - start:.3f}..+{e["to_s"] - start:.3f} s ({e["steps"]} steps)'
             for e in episodes[:limit]]
    more = f', and {len(episodes) - limit} more' if len(episodes) > limit else ''
    return f'{len(episodes)}: ' + ', '.join(parts) + more


def format_trial_summary(data: dict[str, Any]) -> str:
    """The terminal summary of one trial report (from :func:`report_data`)."""
    start = data['start_time_s']
    runs = data['runs']
    steps = runs[0]['summary']['steps'] if runs else 0
    options = data.get('options', {})
    lines = [f'bag {data["name"]}: {data["bag"]}',
             f'  {steps} steps over {data["duration_s"]:.3f} s from bag time {start:.6f} s '
             f'(trigger {options.get("trigger", "nominal")})']
    for warning in data['warnings']:
        lines.append(f'  warning: {warning}')
    gaps = data['gaps']
    lines.append('  input gaps: ' + ('none' if not gaps else f'{len(gaps)}: ' + ', '.join(
        f'{g["topic"]} +{g["from_rel_s"]:.3f}..+{g["to_rel_s"]:.3f} s' for g in gaps[:4])
        + (f', and {len(gaps) - 4} more' if len(gaps) > 4 else '')))
    events = data.get('events')
    if events:
        if events['missing']:
            lines.append(f'  event log {events["path"]}: not found (ignored)')
        else:
            lines.append(f'  event log: {len(events["in_trial"])} of {events["count"]} events '
                         'within this trial')
        for bad in events['malformed'][:5]:
            lines.append(f'  warning: event log line {bad["line"]}: {bad["error"]}')
        if len(events['malformed']) > 5:
            lines.append(f'  warning: {len(events["malformed"]) - 5} more malformed event-log '
                         'lines (see the JSON report)')
    for run in runs:
        summary = run['summary']
        lines.append(f'  {run["role"]} {run["label"]} (id {run["certificate_id"]}):')
        modes = ', '.join(f'{m} {c}' for m, c in sorted(summary['modes'].items()))
        lines.append(f'    modes: {modes}')
        if 'intervention' in summary:
            iv = summary['intervention']
            lines.append(f'    intervention [N m]: mean {_num(iv["mean"])}, p95 '
                         f'{_num(iv["p95"])}, max {_num(iv["max"])} at '
                         f'+{iv["max_at_s"] - start:.3f} s')
        if 'smallest_margin' in summary:
            sm = summary['smallest_margin']
            lines.append(f'    smallest margin: {_num(sm["value"])} ({sm["joint"]}) at '
                         f'+{sm["at_s"] - start:.3f} s')
        if 'time_active_fraction' in summary:
            active = ', '.join(f'{j} {100 * f:.0f} %'
                               for j, f in summary['time_active_fraction'].items())
            lines.append(f'    time at active constraints: any '
                         f'{100 * summary["time_any_active_fraction"]:.0f} % ({active})')
        if 'solve_time_us' in summary:
            st = summary['solve_time_us']
            lines.append(f'    solve time [us]: median {_num(st["median"], 3)}, p99 '
                         f'{_num(st["p99"], 3)}, max {_num(st["max"], 3)}')
        for mode in ('fallback', 'recovering', 'rejected', 'stale'):
            episodes = summary['episodes'][mode]
            if episodes or mode in ('fallback', 'recovering'):
                lines.append(f'    {mode} episodes: {_episode_text(episodes, start)}')
        agree = run['agreement']
        if agree.get('matched_steps') and run['role'] == 'certificate':
            lines.append(f'    agreement with the recorded filtered torque: '
                         f'{agree["matched_steps"]} steps, max |diff| '
                         f'{_num(agree["max_abs_diff"])} N m, rms {_num(agree["rms_diff"])}')
        elif agree.get('matched_steps'):
            lines.append(f'    differs from the recorded filtered torque by up to '
                         f'{_num(agree["max_abs_diff"])} N m (rms {_num(agree["rms_diff"])}) '
                         f'over {agree["matched_steps"]} steps')
        elif run['role'] == 'certificate':
            lines.append('    agreement with the recorded filtered torque: no recorded '
                         'filtered torque to compare')
        closed = run['closed_loop']
        if closed is not None:
            if closed['violated']:
                worst = [f'{kind} {joint} by {_num(v)}' for kind, per in
                         closed['violations'].items() for joint, v in per.items()
                         if v > VIOLATION_TOLERANCE]
                verdict = 'LIMITS VIOLATED: ' + ', '.join(worst)
            else:
                verdict = 'no limit violated'
            diff = closed['difference']['position_max']
            joint = max(diff, key=diff.get) if diff else '-'
            lines.append(f'    closed loop: {verdict}; position differs from the recording '
                         f'by up to {_num(diff.get(joint))} ({joint})')
    comparison = data.get('comparison')
    if comparison:
        lines.append('  comparison:')
        lines += ['    ' + line for line in _comparison_table(comparison).splitlines()]
    if data.get('html'):
        lines.append(f'  report: {data["html"]}')
    if data.get('replay_bag'):
        lines.append(f'  replay bag: {data["replay_bag"]}')
    return '\n'.join(lines)


def _comparison_table(comparison: dict[str, Any]) -> str:
    labels = comparison['labels']
    header = ['metric'] + labels
    rows = [[row['metric'] + (f' [{row["unit"]}]' if row['unit'] else '')]
            + [_num(v) for v in row['values']] for row in comparison['rows']]
    widths = [max(len(str(r[i])) for r in [header] + rows) for i in range(len(header))]
    text = [' | '.join(str(c).ljust(widths[i]) if i == 0 else str(c).rjust(widths[i])
                       for i, c in enumerate(r)) for r in [header] + rows]
    text.insert(1, '-+-'.join('-' * w for w in widths))
    return '\n'.join(text)


# ---------------------------------------------------------------------- plots
MAX_PLOT_POINTS = 20_000


def _series(axes: Any, t: np.ndarray, y: np.ndarray, *args: Any, **kwargs: Any) -> None:
    """``axes.plot`` of a long time series, reduced to at most about ``MAX_PLOT_POINTS``
    points by keeping each bucket's smallest and largest value (extremes stay visible)."""
    t, y = np.asarray(t, dtype=float), np.asarray(y, dtype=float)
    if len(t) > 2:
        step = np.diff(t)
        jumps = np.flatnonzero(step > 5.0 * max(float(np.median(step)), 1e-9))
        if len(jumps):  # break the line across input gaps instead of bridging them
            t = np.insert(t, jumps + 1, t[jumps] + 0.5 * step[jumps])
            y = np.insert(y, jumps + 1, np.nan)
    if len(t) > MAX_PLOT_POINTS:
        bucket = int(np.ceil(2 * len(t) / MAX_PLOT_POINTS))
        count = len(t) // bucket
        tb = t[:count * bucket].reshape(count, bucket)
        yb = y[:count * bucket].reshape(count, bucket)
        finite = np.isfinite(yb)
        low = np.argmin(np.where(finite, yb, np.inf), axis=1)
        high = np.argmax(np.where(finite, yb, -np.inf), axis=1)
        first, second = np.minimum(low, high), np.maximum(low, high)
        rows = np.arange(count)
        t = np.concatenate([np.column_stack([tb[rows, first], tb[rows, second]]).reshape(-1),
                            t[count * bucket:]])
        y = np.concatenate([np.column_stack([yb[rows, first], yb[rows, second]]).reshape(-1),
                            y[count * bucket:]])
    axes.plot(t, y, *args, **kwargs)


def _new_figure(width: float, height: float) -> Any:
    from matplotlib.backends.backend_agg import FigureCanvasAgg
    from matplotlib.figure import Figure

    figure = Figure(figsize=(width, height), dpi=100)
    FigureCanvasAgg(figure)
    return figure


def _mark_events(axes: Any, events: Sequence[Event], start: float, label: bool) -> None:
    palette = ('#2a9d8f', '#e76f51', '#6a4c93', '#8ab17d', '#e9c46a', '#264653')
    colours: dict[str, str] = {}
    for event in events:
        first = event.kind not in colours
        colour = colours.setdefault(event.kind, palette[len(colours) % len(palette)])
        axes.axvline(event.t - start, color=colour, linestyle=':', linewidth=1.1,
                     label=f'event: {event.kind}' if label and first else None)


def _shade_modes(axes: Any, result: ReplayResult, t: np.ndarray) -> None:
    labelled = set()
    for mode, colour in _MODE_COLOURS.items():
        mask = result.mode == mode
        if not mask.any():
            continue
        edges = np.diff(np.concatenate([[0], mask.astype(int), [0]]))
        for first, last in zip(np.flatnonzero(edges == 1), np.flatnonzero(edges == -1) - 1):
            axes.axvspan(t[first], t[last] + 1e-4, color=colour, alpha=0.25, linewidth=0,
                         label=mode if mode not in labelled else None)
            labelled.add(mode)


def _joint_figure(trial: Trial, model: RobotModel, runs: Sequence[CertificateRun],
                  events: Sequence[Event], quantity: str, path: Path) -> None:
    names = list(model.joint_names)
    n = len(names)
    start = trial.start_time
    figure = _new_figure(10.0, 1.9 * n + 0.8)
    axes_list = figure.subplots(n, 1, sharex=True, squeeze=False)[:, 0]
    result = runs[0].result
    t = trial.relative_time(result.time, result.stamp_ns)
    t_state = trial.relative_time(trial.state_time, trial.state_stamp_ns)
    for i, axes in enumerate(axes_list):
        if quantity == 'position':
            _series(axes, t_state, trial.q[:, i], color='#1f5fa8', linewidth=1.0,
                      label='recorded')
            axes.axhline(model.position_lower[i], color='k', linewidth=1.0)
            axes.axhline(model.position_upper[i], color='k', linewidth=1.0, label='limit')
            unit = 'rad'
        elif quantity == 'velocity':
            _series(axes, t_state, trial.v[:, i], color='#1f5fa8', linewidth=1.0,
                      label='recorded')
            for sign in (-1, 1):
                axes.axhline(sign * model.velocity_limit[i], color='k', linewidth=1.0,
                             label='rated limit' if sign > 0 else None)
                axes.axhline(sign * runs[0].certificate.velocity_bound[i], color='#2f9e44',
                             linestyle='--', linewidth=0.9,
                             label='certified bound' if sign > 0 else None)
            unit = 'rad/s'
        else:
            _series(axes, t, result.nominal[:, i], color='#999999', linewidth=0.8,
                      label='nominal')
            if np.isfinite(result.recorded[:, i]).any():
                _series(axes, t, result.recorded[:, i], color='#2f9e44', linewidth=1.6,
                          alpha=0.7, label='recorded filtered')
            for index, run in enumerate(runs):
                _series(axes, trial.relative_time(run.result.time, run.result.stamp_ns),
                        run.result.torque[:, i],
                          color=_RUN_COLOURS[index % 2], linewidth=0.9,
                          linestyle='-' if index == 0 else '--', label=f'replay {run.label}')
            for sign in (-1, 1):
                axes.axhline(sign * model.effort_limit[i], color='k', linewidth=1.0,
                             label='limit' if sign > 0 else None)
            unit = 'N m'
        if quantity in ('position', 'velocity'):
            for index, run in enumerate(runs):
                if run.closed is not None:
                    values = run.closed.q if quantity == 'position' else run.closed.v
                    _series(axes, run.closed.time - start, values[:, i],
                              color=_RUN_COLOURS[index % 2], linestyle='--', linewidth=0.9,
                              label=f'closed loop {run.label}')
        _mark_events(axes, events, start, label=i == 0)
        axes.set_ylabel(f'{names[i]} [{unit}]', fontsize=8)
        axes.tick_params(labelsize=7)
        axes.grid(alpha=0.3)
    axes_list[0].legend(fontsize=7, loc='upper left', bbox_to_anchor=(1.01, 1.0))
    axes_list[0].set_title(f'{quantity} per joint against its limits', fontsize=10)
    axes_list[-1].set_xlabel('time from the start of the trial [s]', fontsize=8)
    height = 1.9 * n + 0.8
    figure.subplots_adjust(left=0.08, right=0.76, top=1.0 - 0.35 / height,
                           bottom=0.45 / height, hspace=0.12)
    figure.savefig(path)


def _intervention_figure(trial: Trial, runs: Sequence[CertificateRun], events: Sequence[Event],
                         path: Path, compare: bool) -> None:
    figure = _new_figure(10.0, 3.4)
    axes = figure.add_subplot()
    for index, run in enumerate(runs):
        result = run.result
        t = trial.relative_time(result.time, result.stamp_ns)
        colour = _RUN_COLOURS[index % 2]
        _series(axes, t, result.intervention, color=colour, linewidth=0.9,
                label=run.label if compare else '|u* - u_nom|')
        if np.isfinite(result.intervention).any():
            k = int(np.nanargmax(result.intervention))
            axes.plot(t[k], result.intervention[k], 'v', color=colour, markersize=8,
                      label=f'largest at +{t[k]:.3f} s')
        if not compare:
            _shade_modes(axes, result, t)
    _mark_events(axes, events, trial.start_time, label=True)
    axes.set_xlabel('time from the start of the trial [s]', fontsize=8)
    axes.set_ylabel('intervention [N m]', fontsize=8)
    axes.set_title('Intervention over time' + (' (two certificates)' if compare else
                                               ' (shaded: non-filtered modes)'), fontsize=10)
    axes.grid(alpha=0.3)
    axes.legend(fontsize=7, loc='upper left', bbox_to_anchor=(1.01, 1.0))
    figure.subplots_adjust(left=0.07, right=0.76, top=0.91, bottom=0.14)
    figure.savefig(path)


def _margin_figure(trial: Trial, model: RobotModel, runs: Sequence[CertificateRun],
                   events: Sequence[Event], path: Path, compare: bool) -> None:
    names = list(model.joint_names)
    figure = _new_figure(10.0, 3.4)
    axes = figure.add_subplot()
    styles = ('-', '--', '-.', ':')
    for index, run in enumerate(runs):
        result = run.result
        t = trial.relative_time(result.time, result.stamp_ns)
        colour = _RUN_COLOURS[index % 2]
        margin = np.where(np.isfinite(result.margin), result.margin, np.inf)
        smallest = margin.min(axis=1) if margin.size else np.zeros(0)
        if compare:
            _series(axes, t, np.where(np.isfinite(smallest), smallest, np.nan), color=colour,
                    linewidth=0.9, label=run.label)
        else:
            for i, name in enumerate(names):
                _series(axes, t, result.margin[:, i], linewidth=0.9, linestyle=styles[i % 4],
                        label=name)
        if np.isfinite(smallest).any():
            k = int(np.argmin(smallest))
            axes.plot(t[k], smallest[k], '^', color=colour, markersize=8,
                      label=f'smallest at +{t[k]:.3f} s')
    axes.axhline(0.0, color='#d64545', linewidth=1.0, label='edge of the safe set')
    _mark_events(axes, events, trial.start_time, label=True)
    axes.set_xlabel('time from the start of the trial [s]', fontsize=8)
    axes.set_ylabel('smallest barrier value', fontsize=8)
    axes.set_title('Barrier margin per joint' if not compare else
                   'Smallest barrier margin over the joints (two certificates)', fontsize=10)
    axes.grid(alpha=0.3)
    axes.legend(fontsize=7, loc='upper left', bbox_to_anchor=(1.01, 1.0))
    figure.subplots_adjust(left=0.07, right=0.76, top=0.91, bottom=0.14)
    figure.savefig(path)


def _solve_figure(runs: Sequence[CertificateRun], path: Path) -> None:
    figure = _new_figure(6.4, 3.4)
    axes = figure.add_subplot()
    drawn = False
    for index, run in enumerate(runs):
        histogram = _solve_histogram(run.result)
        if not histogram['counts']:
            continue
        edges = np.array(histogram['edges_us'])
        axes.stairs(histogram['counts'], edges, color=_RUN_COLOURS[index % 2],
                    fill=index == 0, alpha=0.5 if index == 0 else 1.0, label=run.label)
        drawn = True
    if drawn:
        axes.set_xscale('log')
        axes.legend(fontsize=7)
    else:
        axes.text(0.5, 0.5, 'no QP solves (every step recovering, stale or nominal-feasible)',
                  ha='center', va='center', transform=axes.transAxes, fontsize=9)
    axes.set_xlabel('QP update and solve time per step [us]', fontsize=8)
    axes.set_ylabel('steps', fontsize=8)
    axes.set_title('Solve-time distribution', fontsize=10)
    axes.grid(alpha=0.3)
    figure.subplots_adjust(left=0.09, right=0.98, top=0.91, bottom=0.14)
    figure.savefig(path)


def _draw_plots(folder: Path, trial: Trial, model: RobotModel,
                runs: Sequence[CertificateRun], events: Sequence[Event]) -> list[str]:
    files = []
    for quantity in ('position', 'velocity', 'torque'):
        name = f'{quantity}.png'
        _joint_figure(trial, model, runs, events, quantity, folder / name)
        files.append(name)
    _intervention_figure(trial, runs[:1], events, folder / 'intervention.png', compare=False)
    _margin_figure(trial, model, runs[:1], events, folder / 'margin.png', compare=False)
    _solve_figure(runs, folder / 'solve_time.png')
    files += ['intervention.png', 'margin.png', 'solve_time.png']
    if len(runs) > 1:
        _intervention_figure(trial, runs, events, folder / 'compare_intervention.png',
                             compare=True)
        _margin_figure(trial, model, runs, events, folder / 'compare_margin.png',
                       compare=True)
        files += ['compare_intervention.png', 'compare_margin.png']
    return files


# ---------------------------------------------------------------------- interactive plots
# The page's time plots zoom and pan in the browser (report_assets/time_plots.js, drawn
# with the vendored uPlot). Their data travels inline in the page, base64-encoded binary:
# times as float64, values as float32 (seven significant digits, plenty for a plot; half
# the size). Up to INTERACTIVE_FULL_SAMPLES samples per time axis the page holds every
# sample; a longer trial keeps, per bucket of INTERACTIVE_BUCKETS, each series' smallest and
# largest value (so no spike is lost) plus every sample within MOMENT_WINDOW_S of the
# moments listed in the tables, so those can be zoomed into at full resolution.
INTERACTIVE_FULL_SAMPLES = 60_000
INTERACTIVE_BUCKETS = 5_000
MOMENT_WINDOW_S = 0.25
MOMENT_ZOOM_S = 0.05  # the moments tables' buttons show this much time around a moment
MIN_VIEW_S = 1e-3  # the narrowest window the plots zoom to
PLOTS_FORMAT = 'safety_filter/replay-plots-1'
_GAP_FACTOR = 5.0  # a step longer than this many median steps is an input gap: the line
                   # breaks there rather than bridging it (as in the PNGs)
_EVENT_PALETTE = ('#2a9d8f', '#e76f51', '#6a4c93', '#8ab17d', '#e9c46a', '#264653')


@dataclass
class _Line:
    """One series of a chart: values ``y`` at times ``t`` [s from the trial start], or a
    constant ``y`` over the whole chart when ``t`` is None."""

    label: str
    t: np.ndarray | None
    y: np.ndarray | float
    colour: str
    width: float = 1.0
    dash: tuple[float, ...] = ()


@dataclass
class _Chart:
    title: str
    y_label: str
    lines: list[_Line]
    height: int = 170
    bands: list[tuple[float, float, str]] = field(default_factory=list)
    marks: list[dict[str, Any]] = field(default_factory=list)


def _encode(values: np.ndarray, dtype: str) -> str:
    return base64.b64encode(np.ascontiguousarray(values, dtype=dtype).tobytes()).decode('ascii')


def _gap_breaks(t: np.ndarray) -> np.ndarray:
    """Times in the middle of the input gaps of ``t`` (steps longer than ``_GAP_FACTOR``
    median steps)."""
    if len(t) < 3:
        return np.zeros(0)
    step = np.diff(t)
    jumps = np.flatnonzero(step > _GAP_FACTOR * max(float(np.median(step)), 1e-9))
    return t[jumps] + 0.5 * step[jumps]


def _bucket_extremes(values: np.ndarray, buckets: int) -> np.ndarray:
    """Indices of the smallest and largest finite value in each of ``buckets`` equal runs."""
    count = len(values)
    size = int(np.ceil(count / buckets))
    padded = np.full(size * buckets, np.nan)
    padded[:count] = values
    rows = padded.reshape(buckets, size)
    finite = np.isfinite(rows)
    has = finite.any(axis=1)
    low = np.argmin(np.where(finite, rows, np.inf), axis=1)
    high = np.argmax(np.where(finite, rows, -np.inf), axis=1)
    offsets = np.arange(buckets) * size
    picked = np.concatenate([(offsets + low)[has], (offsets + high)[has]])
    return picked[picked < count]


def _time_axis(lines: Sequence[_Line], moments: Sequence[float]
               ) -> tuple[np.ndarray, list[np.ndarray], bool]:
    """The shared time axis of ``lines`` (their times, joined) and each line's values on it.

    A line's values are NaN where it breaks (its input gaps) and +inf where it has no
    sample because another line does (the page draws across those). Returns the axis, the
    values (None for constant lines) and whether the axis was thinned.
    """
    own = {}
    for line in lines:
        if line.t is not None and id(line.t) not in own:
            own[id(line.t)] = (line.t, _gap_breaks(line.t))
    if not own:
        return np.zeros(0), [], False
    axis = np.unique(np.concatenate([np.concatenate([t, b]) for t, b in own.values()]))
    columns = []
    for line in lines:
        if line.t is None:
            columns.append(None)
            continue
        t, breaks = own[id(line.t)]
        column = np.full(len(axis), np.inf)
        column[np.searchsorted(axis, t)] = np.where(np.isfinite(line.y), line.y, np.nan)
        column[np.searchsorted(axis, breaks)] = np.nan
        columns.append(column)
    thinned = len(axis) > INTERACTIVE_FULL_SAMPLES
    if thinned:
        keep = np.zeros(len(axis), dtype=bool)
        keep[[0, -1]] = True
        for column in columns:
            if column is not None:
                keep[_bucket_extremes(np.where(np.isinf(column), np.nan, column),
                                      INTERACTIVE_BUCKETS)] = True
                keep |= np.isnan(column)  # the breaks stay breaks
        for moment in moments:
            keep |= np.abs(axis - moment) <= MOMENT_WINDOW_S
        axis = axis[keep]
        columns = [None if c is None else c[keep] for c in columns]
    return axis, columns, thinned


def _episodes(mask: np.ndarray) -> list[tuple[int, int]]:
    edges = np.diff(np.concatenate([[0], mask.astype(int), [0]]))
    return list(zip(np.flatnonzero(edges == 1), np.flatnonzero(edges == -1) - 1))


def _time_charts(trial: Trial, model: RobotModel, runs: Sequence[CertificateRun]
                 ) -> list[tuple[str, list[_Chart]]]:
    """The charts of each time figure, the same content as the PNG of that name."""
    names = list(model.joint_names)
    start = trial.start_time
    t_state = trial.relative_time(trial.state_time, trial.state_stamp_ns)
    t_runs = []
    for run in runs:  # runs replaying the same steps share one time array (one axis)
        t = trial.relative_time(run.result.time, run.result.stamp_ns)
        same = next((u for u in t_runs if len(u) == len(t) and np.array_equal(u, t)), None)
        t_runs.append(same if same is not None else t)
    t_closed = [None if run.closed is None else run.closed.time - start for run in runs]
    first = runs[0].result
    figures: list[tuple[str, list[_Chart]]] = []
    for quantity, unit in (('position', 'rad'), ('velocity', 'rad/s'), ('torque', 'N m')):
        charts = []
        for i, name in enumerate(names):
            lines: list[_Line] = []
            if quantity == 'position':
                lines.append(_Line('recorded', t_state, trial.q[:, i], '#1f5fa8'))
                lines.append(_Line('lower limit', None, float(model.position_lower[i]), '#000000'))
                lines.append(_Line('upper limit', None, float(model.position_upper[i]), '#000000'))
            elif quantity == 'velocity':
                lines.append(_Line('recorded', t_state, trial.v[:, i], '#1f5fa8'))
                limit = float(model.velocity_limit[i])
                bound = float(runs[0].certificate.velocity_bound[i])
                lines += [_Line('rated limit -', None, -limit, '#000000'),
                          _Line('rated limit +', None, limit, '#000000'),
                          _Line('certified bound -', None, -bound, '#2f9e44', 1.0, (6, 4)),
                          _Line('certified bound +', None, bound, '#2f9e44', 1.0, (6, 4))]
            else:
                lines.append(_Line('nominal', t_runs[0], first.nominal[:, i], '#999999'))
                if np.isfinite(first.recorded[:, i]).any():
                    lines.append(_Line('recorded filtered', t_runs[0], first.recorded[:, i],
                                       '#2f9e44', 1.6))
                for index, run in enumerate(runs):
                    lines.append(_Line(f'replay {run.label}', t_runs[index],
                                       run.result.torque[:, i], _RUN_COLOURS[index % 2], 1.0,
                                       () if index == 0 else (6, 4)))
                limit = float(model.effort_limit[i])
                lines += [_Line('limit -', None, -limit, '#000000'),
                          _Line('limit +', None, limit, '#000000')]
            if quantity != 'torque':
                for index, run in enumerate(runs):
                    if run.closed is not None:
                        values = run.closed.q if quantity == 'position' else run.closed.v
                        lines.append(_Line(f'closed loop {run.label}', t_closed[index],
                                           values[:, i], _RUN_COLOURS[index % 2], 1.0, (6, 4)))
            charts.append(_Chart(name, f'{name} [{unit}]', lines))
        figures.append((quantity, charts))

    def intervention_chart(selected: Sequence[int], compare: bool) -> _Chart:
        chart = _Chart('intervention', 'intervention [N m]', [], height=230)
        for index in selected:
            result = runs[index].result
            colour = _RUN_COLOURS[index % 2]
            chart.lines.append(_Line(runs[index].label if compare else '|u* - u_nom|',
                                     t_runs[index], result.intervention, colour))
            if np.isfinite(result.intervention).any():
                k = int(np.nanargmax(result.intervention))
                chart.marks.append({'t': float(t_runs[index][k]), 'shape': 'down',
                                    'value': float(result.intervention[k]), 'colour': colour})
        if not compare:
            for mode, colour in _MODE_COLOURS.items():
                for a, b in _episodes(first.mode == mode):
                    chart.bands.append((float(t_runs[0][a]), float(t_runs[0][b]) + 1e-4,
                                        colour))
        return chart

    def margin_chart(selected: Sequence[int], compare: bool) -> _Chart:
        chart = _Chart('margin', 'smallest barrier value', [], height=230)
        styles = ((), (6, 4), (8, 3, 2, 3), (2, 3))
        palette = ('#1f77b4', '#ff7f0e', '#2ca02c', '#d62728', '#9467bd', '#8c564b',
                   '#e377c2', '#7f7f7f', '#bcbd22', '#17becf')
        for index in selected:
            result = runs[index].result
            margin = np.where(np.isfinite(result.margin), result.margin, np.inf)
            smallest = margin.min(axis=1) if margin.size else np.zeros(0)
            smallest = np.where(np.isfinite(smallest), smallest, np.nan)
            colour = _RUN_COLOURS[index % 2]
            if compare:
                chart.lines.append(_Line(runs[index].label, t_runs[index], smallest, colour))
            else:
                for i, name in enumerate(names):
                    chart.lines.append(_Line(name, t_runs[index], result.margin[:, i],
                                             palette[i % len(palette)], 1.0,
                                             styles[i % len(styles)]))
            if np.isfinite(smallest).any():
                k = int(np.nanargmin(smallest))
                chart.marks.append({'t': float(t_runs[index][k]), 'shape': 'up',
                                    'value': float(smallest[k]), 'colour': colour})
        chart.lines.append(_Line('edge of the safe set', None, 0.0, '#d64545'))
        return chart

    figures.append(('intervention', [intervention_chart([0], compare=False)]))
    figures.append(('margin', [margin_chart([0], compare=False)]))
    if len(runs) > 1:
        every = list(range(len(runs)))
        figures.append(('compare_intervention', [intervention_chart(every, compare=True)]))
        figures.append(('compare_margin', [margin_chart(every, compare=True)]))
    return figures


def interactive_plot_data(trial: Trial, model: RobotModel, runs: Sequence[CertificateRun],
                          events: Sequence[Event], moments_rel_s: Sequence[float] = ()
                          ) -> dict[str, Any]:
    """What the page's zoomable time plots draw (read by ``report_assets/time_plots.js``).

    Keys: ``format``; ``range`` (the trial's first and last step [s from its start]);
    ``bases`` (time axes, base64 little-endian float64, by key); ``figures`` (``id``: the
    PNG of the same content without ``.png``, ``charts``: ``title``, ``y_label``,
    ``height`` [px], ``base``, ``series`` (``label``, ``colour``, ``width``, ``dash``, and
    ``values`` base64 float32 with NaN for a break and +inf for no sample at that time, or
    ``constant``), ``bands`` (``[from, to, colour]``: non-filtered modes), ``marks``
    (largest intervention, smallest margin)); ``events`` (``t``, ``kind``, ``colour``);
    ``thinned`` (whether a long trial's axes hold bucket extremes rather than every
    sample); ``x_label``; ``min_span_s``.
    """
    figures = _time_charts(trial, model, runs)
    axes: dict[tuple[int, ...], str] = {}
    bases: dict[str, str] = {}
    out_figures = []
    thinned_any = False
    low, high = math.inf, -math.inf
    for figure_id, charts in figures:
        out_charts = []
        for chart in charts:
            key = tuple(sorted({id(line.t) for line in chart.lines if line.t is not None}))
            axis, columns, thinned = _time_axis(chart.lines, moments_rel_s)
            thinned_any |= thinned
            # Charts over the same time arrays share one encoded axis (their joins agree),
            # unless the axis was thinned: that depends on the chart's own values.
            name = None if thinned else axes.get(key)
            if name is None:
                name = f'axis{len(bases)}'
                bases[name] = _encode(axis, '<f8')
                if not thinned:
                    axes[key] = name
            if len(axis):
                low, high = min(low, float(axis[0])), max(high, float(axis[-1]))
            series = []
            for line, column in zip(chart.lines, columns):
                item: dict[str, Any] = {'label': line.label, 'colour': line.colour,
                                        'width': line.width, 'dash': list(line.dash)}
                if column is None:
                    item['constant'] = float(line.y)
                else:
                    item['values'] = _encode(column, '<f4')
                series.append(item)
            out_charts.append({'title': chart.title, 'y_label': chart.y_label,
                               'height': chart.height, 'base': name, 'series': series,
                               'bands': [list(b) for b in chart.bands],
                               'marks': chart.marks})
        out_figures.append({'id': figure_id, 'charts': out_charts})
    if not math.isfinite(low):
        low, high = 0.0, 1.0
    if high - low < MIN_VIEW_S:
        high = low + MIN_VIEW_S
    colours: dict[str, str] = {}
    event_data = []
    for event in events:
        colour = colours.setdefault(event.kind, _EVENT_PALETTE[len(colours) % len(
            _EVENT_PALETTE)])
        event_data.append({'t': event.t - trial.start_time, 'kind': event.kind,
                           'colour': colour})
    return {'format': PLOTS_FORMAT, 'range': [low, high], 'bases': bases,
            'figures': out_figures, 'events': event_data, 'thinned': thinned_any,
            'x_label': 'time from the start of the trial [s]', 'min_span_s': MIN_VIEW_S}


# ---------------------------------------------------------------------- files
def write_trial_report(folder: str | Path, trial: Trial, model: RobotModel,
                       runs: Sequence[CertificateRun], *, name: str = '',
                       options: dict[str, Any] | None = None, events: EventLog | None = None,
                       extra: dict[str, Any] | None = None, plots: bool = True
                       ) -> dict[str, Any]:
    """Write ``replay_report.html``, ``replay_report.json`` and the plots into ``folder``.

    Returns the report data (:func:`report_data`, with ``plots``, ``html`` and the
    ``extra`` entries filled in), as written to the JSON file. ``plots=False`` leaves the
    plots out (the page then has the tables only).
    """
    folder = Path(folder)
    folder.mkdir(parents=True, exist_ok=True)
    data = report_data(trial, model, runs, name=name, options=options, events=events)
    inside = events.within(data['start_time_s'], data['end_time_s']) if events else []
    data['plots'] = _draw_plots(folder, trial, model, runs, inside) if plots else []
    data['html'] = str(folder / REPORT_HTML)
    data.update(json_ready(extra or {}))
    (folder / REPORT_JSON).write_text(json.dumps(data, indent=2, allow_nan=False) + '\n',
                                      encoding='utf-8')
    interactive = None
    if plots and runs:
        moments = [m['at_rel_s'] for run in data['runs'] for kind in run['moments'].values()
                   for m in kind]
        interactive = interactive_plot_data(trial, model, runs, inside, moments)
    (folder / REPORT_HTML).write_text(_trial_page(data, interactive), encoding='utf-8')
    return data


_CSS = BASE_CSS + """
.warn { background: #fbf3d9; border-left: 5px solid #c99a06; padding: 0.4em 1em; }
.bad { color: #8a1010; font-weight: bold; }
.ok { color: #14601a; font-weight: bold; }
figure { margin: 0.8em 0; }
figcaption { font-size: 0.88em; color: #444; }
code { font-size: 0.95em; }
"""

# The zoomable plots. Until the script has drawn every chart (it then puts class sf-js on
# <html>), and in print, the page shows the static PNGs instead.
_INTERACTIVE_CSS = """
.sf-js-only, .sf-live { display: none; }
.sf-js .sf-js-only { display: revert; }
.sf-js .sf-live { display: block; }
.sf-js figure.sf-time img.sf-static { display: none; }
.sf-toolbar { position: sticky; top: 0; z-index: 5; background: #ffffffee; padding: 0.4em 0;
              border-bottom: 1px solid #ddd; font-size: 0.9em; }
.sf-toolbar button, button.sf-moment { font-size: 0.9em; margin-right: 0.3em; }
.sf-toolbar .sf-hint { color: #555; margin-left: 0.6em; }
.sf-swatch { display: inline-block; width: 0.9em; height: 0.9em; vertical-align: middle;
             margin: 0 0.25em 0 0.6em; border: 1px solid #999; }
.sf-chart .u-legend { font-size: 11px; text-align: left; margin: 0 0 0 60px; }
.sf-chart .u-legend .u-series > * { padding: 1px 3px; }
@media print {
  .sf-js figure.sf-time img.sf-static { display: block; }
  .sf-js .sf-live, .sf-js .sf-js-only, .sf-toolbar { display: none !important; }
}
"""


def _table(header: Sequence[str], rows: Sequence[Sequence[Any]]) -> str:
    esc = html.escape
    head = '<tr>' + ''.join(f'<th>{esc(str(h))}</th>' for h in header) + '</tr>'
    body = []
    for row in rows:
        cells = []
        for value in row:
            if isinstance(value, (int, float)) and not isinstance(value, bool):
                cells.append(f'<td class="num">{esc(_num(value))}</td>')
            else:
                cells.append(f'<td>{esc("-" if value is None else str(value))}</td>')
        body.append('<tr>' + ''.join(cells) + '</tr>')
    return '<table>' + head + ''.join(body) + '</table>'


def _page(title: str, body: list[str], head: Sequence[str] = ()) -> str:
    return '\n'.join(['<!DOCTYPE html>', '<html lang="en">', '<head>', '<meta charset="utf-8">',
                      f'<title>{html.escape(title)}</title>', f'<style>{_CSS}</style>',
                      *head, '</head>', '<body>', *body, '</body>', '</html>']) + '\n'


_PLOT_CAPTIONS = {
    'position.png': 'Recorded joint positions against the position limits (black); dashed: '
                    'the closed-loop re-simulation, when run. Dotted vertical lines: events '
                    'of the event log.',
    'velocity.png': 'Recorded joint velocities against the rated limits (black) and the '
                    'certified velocity bound (green dashed).',
    'torque.png': 'Nominal (grey), recorded filtered (green) and replayed torques against '
                  'the torque limits.',
    'intervention.png': 'Intervention |u* - u_nom| over time; the triangle marks the '
                        'largest; shaded: steps in fallback, recovering, rejected or stale '
                        'mode.',
    'margin.png': 'Smallest barrier value per joint (negative: outside the safe set); the '
                  'triangle marks the smallest.',
    'solve_time.png': 'Distribution of the QP update and solve time per step (steps that '
                      'ran a solve).',
    'compare_intervention.png': 'Intervention over time with the two certificates.',
    'compare_margin.png': 'Smallest barrier value over the joints with the two '
                          'certificates.',
}


def _moment_button(at_rel_s: float) -> str:
    """A button (shown only with scripts) that puts the time plots on this moment."""
    half = 0.5 * MOMENT_ZOOM_S
    return (f'<button class="sf-moment sf-js-only" type="button" data-t="{at_rel_s!r}" '
            f'data-half-width="{half!r}" title="show +{at_rel_s - half:.4f} to '
            f'+{at_rel_s + half:.4f} s in the time plots">show '
            f'{1000 * MOMENT_ZOOM_S:g} ms</button>')


def _toolbar(interactive: dict[str, Any]) -> str:
    """The time plots' controls and the key to their shading and event lines."""
    esc = html.escape
    key = []
    shaded = {colour for chart in (c for f in interactive['figures'] for c in f['charts'])
              for _, _, colour in chart['bands']}
    modes = [(m, c) for m, c in _MODE_COLOURS.items() if c in shaded]
    if modes:
        key.append('shaded:' + ''.join(
            f'<span class="sf-swatch" style="background:{c}"></span>{esc(m)}'
            for m, c in modes))
    kinds: dict[str, str] = {}
    for event in interactive['events']:
        kinds.setdefault(event['kind'], event['colour'])
    if kinds:
        key.append('events (dotted):' + ''.join(
            f'<span class="sf-swatch" style="background:{c}"></span>{esc(k)}'
            for k, c in kinds.items()))
    thinned = ''
    if interactive['thinned']:
        thinned = (f'<div class="sf-hint">This trial has more than '
                   f'{INTERACTIVE_FULL_SAMPLES:,} samples per plot: the zoomable plots hold, '
                   f'per stretch of about 1/{INTERACTIVE_BUCKETS:,} of the trial, each '
                   f"series' smallest and largest value, and every sample within "
                   f'{MOMENT_WINDOW_S:g} s of the moments in the tables above.</div>')
    return ('<div class="sf-toolbar sf-js-only">'
            '<button type="button" id="sf-zoom-in">zoom in</button>'
            '<button type="button" id="sf-zoom-out">zoom out</button>'
            '<button type="button" id="sf-pan-left">&#9664; earlier</button>'
            '<button type="button" id="sf-pan-right">later &#9654;</button>'
            '<button type="button" id="sf-whole">whole trial</button>'
            '<span id="sf-view-label"></span> '
            '<label><input type="checkbox" id="sf-fit-y"> fit y to the data shown (the limit '
            'lines may leave the view)</label>'
            '<div class="sf-hint">Drag across a plot to zoom to that span; Shift+drag to pan; '
            'Ctrl+wheel to zoom at the pointer; double-click for the whole trial. All time '
            'plots follow.' + (' ' + '; '.join(key) if key else '') + '</div>'
            + thinned + '</div>')


def _trial_page(data: dict[str, Any], interactive: dict[str, Any] | None = None) -> str:
    esc = html.escape
    start = data['start_time_s']
    body = [f'<h1>Replay of {esc(data["name"])}</h1>',
            f'<p>Bag <code>{esc(data["bag"])}</code>, robot <b>{esc(data["robot"])}</b>, '
            f'{esc(_num(data["duration_s"]))} s from bag time {start:.6f} s. Options: '
            f'<code>{esc(json.dumps(data["options"], sort_keys=True))}</code>.</p>',
            f'<p class="caution">{esc(SAFETY_NOTICE)}</p>']
    if data['warnings']:
        body.append('<h2>Bag warnings</h2><ul>' + ''.join(
            f'<li class="warn">{esc(w)}</li>' for w in data['warnings']) + '</ul>')
    events = data.get('events')
    if events and events['malformed']:
        body.append('<h2>Event log problems</h2><ul>' + ''.join(
            f'<li class="warn">line {m["line"]}: {esc(m["error"])}</li>'
            for m in events['malformed']) + '</ul>')
    for run in data['runs']:
        summary = run['summary']
        body.append(f'<h2>{esc(run["role"].capitalize())}: {esc(run["label"])} '
                    f'(id {esc(run["certificate_id"])})</h2>')
        iv = summary.get('intervention', {})
        sm = summary.get('smallest_margin', {})
        st = summary.get('solve_time_us', {})
        rows = [
            ('steps', summary['steps']),
            ('modes', ', '.join(f'{m}: {c}' for m, c in sorted(summary['modes'].items()))),
            ('intervention mean / p95 / max [N m]',
             f'{_num(iv.get("mean"))} / {_num(iv.get("p95"))} / {_num(iv.get("max"))}'),
            ('smallest margin', f'{_num(sm.get("value"))} ({sm.get("joint", "-")})'),
            ('time at an active constraint',
             f'{100 * summary.get("time_any_active_fraction", 0.0):.1f} %'),
            ('solve time median / p99 / max [us]',
             f'{_num(st.get("median"), 3)} / {_num(st.get("p99"), 3)} / '
             f'{_num(st.get("max"), 3)}'),
        ]
        agree = run['agreement']
        rows.append(('agreement with the recorded filtered torque'
                     if run['role'] == 'certificate' else
                     'difference from the recorded filtered torque',
                     f'{agree["matched_steps"]} steps, max |diff| '
                     f'{_num(agree["max_abs_diff"])} N m, rms {_num(agree["rms_diff"])} N m'
                     if agree.get('matched_steps') else 'nothing recorded to compare'))
        body.append(_table(('figure', 'value'), rows))
        body.append('<p>Largest interventions and smallest margins:</p>')
        moment_rows = [('largest intervention', f'+{m["at_rel_s"]:.4f}', m['at_s'],
                        m['value'], m.get('mode', ''), m['at_rel_s'])
                       for m in run['moments']['largest_intervention']]
        moment_rows += [('smallest margin', f'+{m["at_rel_s"]:.4f}', m['at_s'], m['value'],
                         m.get('joint', ''), m['at_rel_s'])
                        for m in run['moments']['smallest_margin']]
        header = ('what', 'time [s]', 'bag time [s]', 'value', 'mode / joint')
        table = _table(header, [(a, b, f'{c:.6f}', d, e) for a, b, c, d, e, _ in moment_rows])
        if interactive is not None:  # a last column with a button per moment
            rows = table.split('</tr>')
            rows[0] += '<th class="sf-js-only">time plots</th>'
            for k, row in enumerate(moment_rows, start=1):
                rows[k] += f'<td class="sf-js-only">{_moment_button(row[5])}</td>'
            table = '</tr>'.join(rows)
        body.append(table)
        episodes = [(mode, f'+{e["from_s"] - start:.4f}', f'+{e["to_s"] - start:.4f}',
                     e['steps']) for mode, items in summary['episodes'].items()
                    for e in items]
        body.append('<p>Fallback, recovery, rejected and stale episodes: '
                    + ('none.</p>' if not episodes else '</p>'
                       + _table(('mode', 'from [s]', 'to [s]', 'steps'), episodes)))
        closed = run['closed_loop']
        if closed is not None:
            verdict = ('<span class="bad">limits violated</span>' if closed['violated']
                       else '<span class="ok">no limit violated</span>')
            body.append(f'<p>Closed-loop re-simulation from the recorded initial state, '
                        f'driven by the recorded nominal: {verdict}.</p>')
            names = data['joint_names']
            body.append(_table(
                ('joint', 'position violation', 'velocity violation', 'torque violation',
                 'position difference rms', 'position difference max'),
                [(j, closed['violations']['position'][j], closed['violations']['velocity'][j],
                  closed['violations']['torque'][j], closed['difference']['position_rms'][j],
                  closed['difference']['position_max'][j]) for j in names]))
    if data['gaps']:
        body.append('<h2>Input gaps</h2>' + _table(
            ('topic', 'from [s]', 'to [s]', 'length [s]'),
            [(g['topic'], f'+{g["from_rel_s"]:.4f}', f'+{g["to_rel_s"]:.4f}',
              g['to_s'] - g['from_s']) for g in data['gaps']]))
    else:
        body.append('<h2>Input gaps</h2><p>none.</p>')
    comparison = data.get('comparison')
    if comparison:
        body.append('<h2>Comparison</h2>')
        body.append(_table(['metric', 'unit'] + comparison['labels'],
                           [[r['metric'], r['unit']] + list(r['values'])
                            for r in comparison['rows']]))
    if events and events['in_trial']:
        body.append('<h2>Events</h2>' + _table(
            ('time [s]', 'kind', 'log line'),
            [(f'+{e["t_rel_s"]:.4f}', e['kind'], e['line']) for e in events['in_trial']]))
    live = {f['id'] for f in interactive['figures']} if interactive else set()
    body.append('<section id="sf-time-plots"><h2>Plots</h2>')
    if interactive is not None:
        body.append(_toolbar(interactive))
    for plot in data['plots']:
        stem = plot.rsplit('.', 1)[0]
        caption = esc(_PLOT_CAPTIONS.get(plot, plot))
        if stem in live:
            body.append(f'<figure class="sf-time"><div class="sf-live" id="sf-live-{esc(stem)}" '
                        f'hidden></div><img class="sf-static" src="{esc(plot)}" '
                        f'alt="{esc(plot)}"><figcaption>{caption}</figcaption></figure>')
        else:
            body.append(f'<figure><img src="{esc(plot)}" alt="{esc(plot)}"><figcaption>'
                        f'{caption}</figcaption></figure>')
    body.append('</section>')
    head: list[str] = []
    if interactive is not None:
        uplot_style, uplot_script = uplot_elements()
        head = [uplot_style, f'<style>{_INTERACTIVE_CSS}</style>']
        body.append(f'<p class="sf-js-only">The zoomable plots are drawn with uPlot '
                    f'{UPLOT_VERSION} (MIT licence, copyright (c) 2022 Leon Sorokin; the '
                    "licence text is in this page's source), included in the page: it "
                    'needs no network.</p>')
    body.append(f'<p>Machine-readable: <a href="{REPORT_JSON}">{REPORT_JSON}</a>. Written '
                f'{_dt.datetime.now(_dt.timezone.utc).isoformat(timespec="seconds")}.</p>')
    if interactive is not None:
        body += [json_script_element('sf-plot-data', interactive), uplot_script,
                 script_element(asset_text('time_plots.js'))]
    return _page(f'safety_filter replay: {data["name"]}', body, head)


# ---------------------------------------------------------------------- batches
def format_batch_summary(entries: Sequence[dict[str, Any]]) -> str:
    """One line per bag (a failed bag with its error), then the counts."""
    lines = []
    width = max([len(e['name']) for e in entries] + [4])
    for entry in entries:
        if entry['status'] == 'ok':
            figures = entry.get('figures', {})
            lines.append(
                f'  ok      {entry["name"]:<{width}}  {figures.get("steps", 0):>7} steps  '
                f'intervention max {_num(figures.get("intervention_max"))} N m  '
                f'smallest margin {_num(figures.get("smallest_margin"))}  '
                f'warnings {figures.get("warnings", 0)}'
                + (f'  closed loop {"VIOLATED" if figures["closed_loop_violated"] else "ok"}'
                   if figures.get('closed_loop_violated') is not None else ''))
        else:
            lines.append(f'  FAILED  {entry["name"]:<{width}}  {entry["error"]}')
    ok = sum(e['status'] == 'ok' for e in entries)
    lines.append(f'{ok} of {len(entries)} bags replayed, {len(entries) - ok} failed')
    return '\n'.join(lines)


def write_batch_summary(folder: str | Path, entries: Sequence[dict[str, Any]], *,
                        options: dict[str, Any] | None = None,
                        events: EventLog | None = None) -> Path:
    """Write ``replay_summary.json`` and ``index.html`` for a batch; returns the JSON path.

    Each entry: ``name``, ``bag``, ``status`` (``'ok'`` or ``'failed'``), ``error`` (null
    when ok), ``report`` (the bag's HTML page, relative to ``folder``), ``figures`` (steps,
    intervention max, smallest margin, warnings, closed-loop verdict).
    """
    folder = Path(folder)
    folder.mkdir(parents=True, exist_ok=True)
    ok = sum(e['status'] == 'ok' for e in entries)
    data = json_ready({
        'format': SUMMARY_FORMAT, 'options': options or {},
        'counts': {'bags': len(entries), 'ok': ok, 'failed': len(entries) - ok},
        'event_log': None if events is None or events.path is None else {
            'path': str(events.path), 'missing': events.missing,
            'count': len(events.events), 'malformed': events.malformed},
        'bags': list(entries)})
    path = folder / SUMMARY_JSON
    path.write_text(json.dumps(data, indent=2, allow_nan=False) + '\n', encoding='utf-8')
    esc = html.escape
    rows = []
    for entry in entries:
        figures = entry.get('figures') or {}
        link = (f'<a href="{esc(entry["report"])}">{esc(entry["name"])}</a>'
                if entry.get('report') else esc(entry['name']))
        status = ('<span class="ok">ok</span>' if entry['status'] == 'ok'
                  else '<span class="bad">failed</span>')
        rows.append(f'<tr><td>{link}</td><td>{status}</td>'
                    f'<td class="num">{esc(_num(figures.get("steps")))}</td>'
                    f'<td class="num">{esc(_num(figures.get("intervention_max")))}</td>'
                    f'<td class="num">{esc(_num(figures.get("smallest_margin")))}</td>'
                    f'<td>{esc(entry.get("error") or "")}</td></tr>')
    table = ('<table><tr><th>bag</th><th>status</th><th>steps</th><th>intervention max '
             '[N m]</th><th>smallest margin</th><th>error</th></tr>' + ''.join(rows)
             + '</table>')
    body = ['<h1>Replay of a folder of bags</h1>',
            f'<p class="caution">{esc(SAFETY_NOTICE)}</p>',
            f'<p>{ok} of {len(entries)} bags replayed, {len(entries) - ok} failed.</p>', table,
            f'<p>Machine-readable: <a href="{SUMMARY_JSON}">{SUMMARY_JSON}</a>.</p>']
    (folder / SUMMARY_HTML).write_text(_page('safety_filter replay summary', body),
                                       encoding='utf-8')
    return path
