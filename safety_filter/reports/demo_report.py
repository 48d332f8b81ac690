"""What the demo's bags show: limit violations per run, a terminal summary, an HTML report.

ROS-free: the runs are read from the bags of ``safety-filter demo`` and measured in
:mod:`safety_filter.reports.demo_runs` (:func:`load_run`, :func:`run_violations`,
:func:`broken_limits`, :func:`barrier_margins`; importable from here too), the plots drawn
in :mod:`safety_filter.reports.demo_plots`. Here: :func:`format_summary`, the terminal table,
and :func:`write_demo_report`, which writes ``demo_report.html`` with the PNG plots and
``demo_summary.json``. An excursion counts as a broken limit above
:data:`~safety_filter.core.limit_tolerance.LIMIT_TOLERANCE`.

Torque violations are measured on the torque *sent to the driver* (the nominal in the
unfiltered run, the filter's output in the filtered run): the simulated driver clips what it
is sent to the effort limits, as a real one does, so the applied torque never exceeds them.
"""

from __future__ import annotations

import html
from collections.abc import Sequence
from pathlib import Path

import numpy as np

from safety_filter.core.certificate import Certificate
from safety_filter.core.limit_tolerance import LIMIT_TOLERANCE, limit_broken
from safety_filter.core.robot_model import RobotModel
from safety_filter.reports.demo_plots import (
    BEHAVIOUR_COLOURS,
    plot_limited,
    plot_margins,
    plot_modes,
    plot_solve_times,
    plot_torques,
)
from safety_filter.reports.demo_runs import (  # noqa: F401 (load_run, run_violations: API)
    LIMITS,
    RunData,
    barrier_margins,
    broken_limits,
    load_run,
    mode_counts,
    range_and_speed_used,
    run_violations,
)
from safety_filter.reports.html_kit import (
    caution_element,
    facts_table,
    figure_element,
    page,
    verdict_element,
    write_json,
    written_at,
)
from safety_filter.simulation.careless_operator import Segment

REPORT_HTML = 'demo_report.html'
SUMMARY_JSON = 'demo_summary.json'
PLOTS = {
    'positions': 'positions.png',
    'velocities': 'velocities.png',
    'torques': 'torques.png',
    'margins': 'barrier_margins.png',
    'modes': 'filter_mode.png',
    'solve_times': 'solve_times.png',
}


def _excursion(value: float, unit: str) -> str:
    return f'{value:.3g} {unit}' if limit_broken(value) else '-'


def format_summary(model: RobotModel, runs: Sequence[tuple[RunData, dict[str, np.ndarray]]]
                   ) -> str:
    """The terminal table of limit violations per joint, one column group per run."""
    units = {'position': 'rad', 'velocity': 'rad/s', 'torque': 'N m'}
    width = 12
    header = f'{"joint":<16}'
    sub = f'{"":<16}'
    for run, _ in runs:
        header += f'| {run.label + " run":<{3 * width}}'
        sub += '| ' + ''.join(f'{k:<{width}}' for k in LIMITS)
    lines = ['limit violations: largest excursion past each limit (- : kept)', header, sub]
    for i, joint in enumerate(model.joint_names):
        row = f'{joint:<16}'
        for _, violations in runs:
            row += '| ' + ''.join(f'{_excursion(float(violations[k][i]), units[k]):<{width}}'
                                  for k in LIMITS)
        lines.append(row)
    total = 3 * model.n_joints
    for run, violations in runs:
        broken = broken_limits(violations)
        verdict = (f'{broken} of {total} limits broken' if broken
                   else f'all {total} limits kept')
        lines.append(f'{run.label} run: {verdict} ({run.duration_s:.2f} s of simulated '
                     f'motion, {run.time_s.size} joint states)')
        if not broken and run.time_s.size:
            speed, nearest = range_and_speed_used(model, run)
            fast, near = int(np.argmax(speed)), int(np.argmin(nearest))
            lines.append(f'  fastest: {model.joint_names[fast]} at {100 * speed[fast]:.0f} % '
                         f'of its rated speed; nearest to a limit: {model.joint_names[near]} '
                         f'at {100 * nearest[near]:.1f} % of its range')
    lines.append('torque: the torque sent to the driver (the simulated driver clips it to '
                 'the limit, as a real one does)')
    return '\n'.join(lines)


def write_demo_report(folder: str | Path, model: RobotModel, certificate: Certificate,
                      runs: Sequence[tuple[RunData, dict[str, np.ndarray]]],
                      schedule: Sequence[Segment], facts: Sequence[tuple[str, str]],
                      schedule_offsets: Sequence[float] | None = None,
                      certificate_report: str | None = None) -> Path:
    """Write ``demo_report.html``, its PNG plots and ``demo_summary.json``; returns the page.

    Args:
        folder: where to write (created).
        model, certificate: the arm and its certificate.
        runs: ``(run, violations)`` per run, the unfiltered one first.
        schedule: the operator's segments (for shading and the table).
        facts: ``(name, value)`` lines for the page (arm, durations, wall time, ...).
        schedule_offsets: per run, the time [s] of the operator's start in the run's time.
        certificate_report: link (relative to ``folder``) to the certification report.
    """
    folder = Path(folder)
    folder.mkdir(parents=True, exist_ok=True)
    data = [run for run, _ in runs]
    offsets = list(schedule_offsets) if schedule_offsets is not None else [0.0] * len(data)
    margins = [barrier_margins(certificate, run) for run in data]
    plot_limited(model, data, schedule, offsets, folder / PLOTS['positions'], 'position',
                  certificate)
    plot_limited(model, data, schedule, offsets, folder / PLOTS['velocities'], 'velocity',
                  certificate)
    plot_torques(model, data, schedule, offsets, folder / PLOTS['torques'])
    plot_margins(model, data, margins, folder / PLOTS['margins'])
    filtered = [run for run in data if run.status]
    if filtered:
        plot_modes(filtered[-1], folder / PLOTS['modes'])
        plot_solve_times(filtered[-1], folder / PLOTS['solve_times'])
    summary = {
        'arm': model.name,
        'joints': list(model.joint_names),
        'certificate_id': certificate.certificate_id,
        'violation_tolerance': LIMIT_TOLERANCE,
        'facts': dict(facts),
        'schedule': [{'behaviour': s.behaviour, 'start_s': s.start_s,
                      'duration_s': s.duration_s} for s in schedule],
        'runs': {run.label: {
            'bag': str(run.bag), 'counts': run.counts, 'duration_s': run.duration_s,
            'violations': violations, 'broken_limits': broken_limits(violations),
            'smallest_barrier': np.nanmin(margin, axis=0) if margin.size else [],
            'mode_counts': mode_counts(run)}
            for (run, violations), margin in zip(runs, margins)},
    }
    write_json(folder / SUMMARY_JSON, summary)
    page = folder / REPORT_HTML
    page.write_text(_html_page(model, runs, schedule, facts, bool(filtered),
                               certificate_report), encoding='utf-8')
    return page


CSS = """
.verdict { font-size: 1.15em; padding: 0.4em 1em; }
th { text-align: center; }
td.ok { font-weight: normal; text-align: center; }
td.bad { text-align: right; }
figure { margin: 1em 0 1.5em 0; }
figcaption { font-size: 0.9em; max-width: 60em; }
span.swatch { display: inline-block; width: 1em; height: 0.9em; vertical-align: middle;
              border: 1px solid #bbb; margin-right: 0.3em; }
"""


def _violation_table(model: RobotModel,
                     runs: Sequence[tuple[RunData, dict[str, np.ndarray]]]) -> str:
    units = {'position': 'rad', 'velocity': 'rad/s', 'torque': 'N m'}
    head = '<tr><th rowspan="2">joint</th>' + ''.join(
        f'<th colspan="3">{html.escape(run.label)} run</th>' for run, _ in runs) + '</tr>'
    head += '<tr>' + ''.join(f'<th>{k} [{units[k]}]</th>' for _ in runs for k in LIMITS) \
        + '</tr>'
    rows = []
    for i, joint in enumerate(model.joint_names):
        cells = [f'<td>{html.escape(joint)}</td>']
        for _, violations in runs:
            for key in LIMITS:
                value = float(violations[key][i])
                cells.append(f'<td class="bad">{value:.3g}</td>' if limit_broken(value)
                             else '<td class="ok">kept</td>')
        rows.append('<tr>' + ''.join(cells) + '</tr>')
    return '<table>' + head + ''.join(rows) + '</table>'


def _usage_table(model: RobotModel,
                 runs: Sequence[tuple[RunData, dict[str, np.ndarray]]]) -> str:
    head = ('<tr><th>joint</th>' + ''.join(
        f'<th>{html.escape(run.label)}: fastest / rated</th>'
        f'<th>{html.escape(run.label)}: nearest to a limit / range</th>' for run, _ in runs)
        + '</tr>')
    used = [range_and_speed_used(model, run) for run, _ in runs]
    rows = []
    for i, joint in enumerate(model.joint_names):
        cells = [f'<td>{html.escape(joint)}</td>']
        for speed, nearest in used:
            cells.append(f'<td>{100 * speed[i]:.0f} %</td>')
            cells.append(f'<td>{100 * nearest[i]:.1f} %</td>' if nearest[i] >= 0.0 else
                         '<td class="bad">past it</td>')
        rows.append('<tr>' + ''.join(cells) + '</tr>')
    return '<table>' + head + ''.join(rows) + '</table>'


def _html_page(model: RobotModel, runs: Sequence[tuple[RunData, dict[str, np.ndarray]]],
               schedule: Sequence[Segment], facts: Sequence[tuple[str, str]],
               has_filter: bool, certificate_report: str | None) -> str:
    esc = html.escape
    total = 3 * model.n_joints
    parts = [f'<h1>Demo: a careless operator on {esc(model.name)}, without and with the '
             'filter</h1>',
             caution_element(),
             '<p>A simulated torque-controlled arm is driven by a careless operator (a '
             'seeded schedule of behaviours: PD toward targets beyond the limits, sudden '
             'full-effort jerks, a slack hold that lets gravity act, large sinusoids). The '
             'same operator, with the same seed, runs twice: once straight into the arm '
             '(the <b>unfiltered</b> run, possible only in simulation) and once through the '
             'safety filter (the <b>filtered</b> run). Both runs were recorded as rosbag2 '
             'bags; everything below is read from them.</p>']
    for run, violations in runs:
        broken = broken_limits(violations)
        text = (f'{run.label} run: {broken} of {total} limits broken' if broken
                else f'{run.label} run: all {total} limits kept')
        parts.append(verdict_element(not broken, text))
    parts.append('<h2>Limit violations</h2>')
    parts.append('<p>Largest excursion past each limit per joint. Positions and velocities '
                 'come from the joint states; torques are what was <i>sent to the driver</i> '
                 "(the operator's torque in the unfiltered run, the filter's output in the "
                 'filtered run): the simulated driver clips it to the effort limit, as a real '
                 f'one does. Excursions below {LIMIT_TOLERANCE:g} count as kept.</p>')
    parts.append(_violation_table(model, runs))
    parts.append('<h2>How much of its range and speed each joint used</h2>')
    parts.append('<p>A filter that kept the limits by keeping the arm slow and far from them '
                 'would be of little use. Per joint, the fastest it moved as a share of its '
                 'rated speed, and how near it came to a position limit as a share of its '
                 'range.</p>')
    parts.append(_usage_table(model, runs))
    parts.append('<h2>The run</h2>')
    parts.append(facts_table(list(facts)))
    if certificate_report:
        parts.append(f'<p>How the certificate was obtained: <a href="{esc(certificate_report)}">'
                     'the certification report</a>.</p>')
    parts.append("<p>The operator's schedule (shaded in the plots): " + ', '.join(
        f'<span class="swatch" style="background:{BEHAVIOUR_COLOURS.get(s.behaviour, "#eee")}">'
        f'</span>{esc(s.behaviour)} {s.start_s:.1f}&ndash;{s.end_s:.1f} s'
        for s in schedule) + '.</p>')
    parts.append('<h2>How to read the plots</h2>')
    parts.append(
        '<p>Each of the first three figures has one row per joint and one column per run, '
        'against simulated time. Red dashed lines are the limits; a trace turns thick red '
        'where it is past one. The background shows which behaviour the operator was in. In '
        'the unfiltered column the arm goes wherever the operator drags it (the simulation '
        'has no hard stops). In the filtered column the same operator is at work, but the '
        'joints slow down before their position limits, stay within the velocity limits '
        '(green dotted: the certified velocity bound, when tighter) and the torque sent to '
        'the driver stays in the torque box: the blue trace departs from the grey nominal '
        'exactly where the filter intervened.</p>')
    captions = {
        'positions': 'Joint positions against the position limits.',
        'velocities': 'Joint velocities against the rated velocity limits (red) and the '
                      'certified velocity bound (green dotted).',
        'torques': "Torques: the operator's nominal (grey), the torque sent to the driver "
                   '(blue; in the unfiltered run it is the nominal), and the torque the '
                   'driver applied after clipping to the effort limits (orange).',
        'margins': "The certificate's barrier values along both runs (the smallest of hp, "
                   'hn, bp, bn per joint). The filter keeps them non-negative: that is what '
                   'keeps the limits. The unfiltered run dips below zero wherever it left '
                   'the safe set, usually well before a limit is actually crossed.',
        'modes': 'Filter mode per step (filtered: the QP answer; fallback: the constructive '
                 'command; recovering: outside S, pushing back; rejected: invalid input; '
                 'stale: no joint states) and the size of the intervention.',
        'solve_times': 'Time the QP took per step that solved one (a step whose nominal '
                       'already meets every constraint needs no solve). Median and p99 in '
                       'the histogram. These are times in Python on this machine.',
    }
    for key, name in PLOTS.items():
        if key in ('modes', 'solve_times') and not has_filter:
            continue
        parts.append(figure_element(name, captions[key], alt=key))
    parts.append('<h2>Bags</h2><table><tr><th>run</th><th>bag</th><th>topic</th>'
                 '<th>messages</th></tr>')
    for run, _ in runs:
        for topic, count in sorted(run.counts.items()):
            parts.append(f'<tr><td>{esc(run.label)}</td><td>{esc(str(run.bag))}</td>'
                         f'<td>{esc(topic)}</td><td class="num">{count}</td></tr>')
    parts.append('</table>')
    parts.append(f'<p>Machine-readable: <a href="{SUMMARY_JSON}">{SUMMARY_JSON}</a>. Report '
                 f'written {written_at()}.</p>')
    return page(f'safety_filter demo: {model.name}', parts, CSS)
