"""Reports of replayed trials: a terminal summary, an HTML page with plots, and JSON.

:func:`report_data` gathers what :mod:`safety_filter.replay` found for one bag, replayed
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
  ``certificate_id``, ``summary`` (:func:`safety_filter.replay.summarize`: ``steps``,
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

import datetime as _dt
import html
import json
import math
from collections.abc import Sequence
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

import numpy as np

from safety_filter._report_common import BASE_CSS, json_ready
from safety_filter.certificate import Certificate
from safety_filter.certify_report import SAFETY_NOTICE
from safety_filter.model import RobotModel
from safety_filter.replay import ClosedLoopResult, ReplayResult, Trial, agreement, summarize

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
    (folder / REPORT_HTML).write_text(_trial_page(data), encoding='utf-8')
    return data


_CSS = BASE_CSS + """
.warn { background: #fbf3d9; border-left: 5px solid #c99a06; padding: 0.4em 1em; }
.bad { color: #8a1010; font-weight: bold; }
.ok { color: #14601a; font-weight: bold; }
figure { margin: 0.8em 0; }
figcaption { font-size: 0.88em; color: #444; }
code { font-size: 0.95em; }
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


def _page(title: str, body: list[str]) -> str:
    return '\n'.join(['<!DOCTYPE html>', '<html lang="en">', '<head>', '<meta charset="utf-8">',
                      f'<title>{html.escape(title)}</title>', f'<style>{_CSS}</style>',
                      '</head>', '<body>', *body, '</body>', '</html>']) + '\n'


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


def _trial_page(data: dict[str, Any]) -> str:
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
                        m['value'], m.get('mode', ''))
                       for m in run['moments']['largest_intervention']]
        moment_rows += [('smallest margin', f'+{m["at_rel_s"]:.4f}', m['at_s'], m['value'],
                         m.get('joint', '')) for m in run['moments']['smallest_margin']]
        body.append(_table(('what', 'time [s]', 'bag time [s]', 'value', 'mode / joint'),
                           [(a, b, f'{c:.6f}', d, e) for a, b, c, d, e in moment_rows]))
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
    body.append('<h2>Plots</h2>')
    for plot in data['plots']:
        body.append(f'<figure><img src="{esc(plot)}" alt="{esc(plot)}"><figcaption>'
                    f'{esc(_PLOT_CAPTIONS.get(plot, plot))}</figcaption></figure>')
    body.append(f'<p>Machine-readable: <a href="{REPORT_JSON}">{REPORT_JSON}</a>. Written '
                f'{_dt.datetime.now(_dt.timezone.utc).isoformat(timespec="seconds")}.</p>')
    return _page(f'safety_filter replay: {data["name"]}', body)


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
