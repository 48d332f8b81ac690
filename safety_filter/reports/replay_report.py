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
  ``certificate_id``, ``summary`` (:func:`safety_filter.replay.open_loop.summarize`: ``steps``,
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

import html
from collections.abc import Sequence
from pathlib import Path
from typing import Any

from safety_filter.core.limit_tolerance import limit_broken
from safety_filter.core.robot_model import RobotModel
from safety_filter.online.mode_codes import NON_FILTERED_MODE_NAMES
from safety_filter.recordings.event_log import EventLog
from safety_filter.replay.trial import Trial
from safety_filter.reports.html_kit import (
    caution_element,
    json_ready,
    page,
    write_json,
)
from safety_filter.reports.html_kit import (
    number_text as _num,
)
from safety_filter.reports.replay_interactive import interactive_plot_data
from safety_filter.reports.replay_page import trial_page
from safety_filter.reports.replay_plots import draw_plots
from safety_filter.reports.replay_report_data import (  # noqa: F401 (names of the report)
    REPORT_HTML,
    REPORT_JSON,
    SUMMARY_FORMAT,
    SUMMARY_HTML,
    SUMMARY_JSON,
    CertificateRun,
    report_data,
)


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
    data['plots'] = draw_plots(folder, trial, model, runs, inside) if plots else []
    data['html'] = str(folder / REPORT_HTML)
    data.update(json_ready(extra or {}))
    write_json(folder / REPORT_JSON, data)
    interactive = None
    if plots and runs:
        moments = [m['at_rel_s'] for run in data['runs'] for kind in run['moments'].values()
                   for m in kind]
        interactive = interactive_plot_data(trial, model, runs, inside, moments)
    (folder / REPORT_HTML).write_text(trial_page(data, interactive), encoding='utf-8')
    return data


# ---------------------------------------------------------------------- terminal
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
        for mode in NON_FILTERED_MODE_NAMES:
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
                         if limit_broken(v)]
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
    path = write_json(folder / SUMMARY_JSON, data)
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
            caution_element(),
            f'<p>{ok} of {len(entries)} bags replayed, {len(entries) - ok} failed.</p>', table,
            f'<p>Machine-readable: <a href="{SUMMARY_JSON}">{SUMMARY_JSON}</a>.</p>']
    (folder / SUMMARY_HTML).write_text(page('safety_filter replay summary', body),
                                       encoding='utf-8')
    return path
