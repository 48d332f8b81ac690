"""The stress test's report: a terminal table, ``stress_summary.json``, ``stress_report.html``.

:func:`format_table` renders the result of :func:`safety_filter.campaigns.stress_runs.run_stress`
as plain text (one row per plant x nominal x rate, worst first, then a summary and the
verdict).
:func:`write_report` writes the JSON summary and a self-contained HTML page (our own CSS, no
external URLs) with PNG plots of the worst run: positions, velocities and torques against
the limits, and the barrier margin of the true state. Matplotlib is imported only when plots
are drawn, with the Agg canvas and its object-oriented API only.
"""

from __future__ import annotations

import dataclasses
import html
from pathlib import Path
from typing import Any, Protocol

import numpy as np

from safety_filter.online.mode_codes import FILTER_MODE_NAMES
from safety_filter.reports.html_kit import (
    caution_element,
    figure_element,
    json_ready,
    new_figure,
    page,
    verdict_element,
    write_json,
)


class StressResult(Protocol):
    """What the report reads of a stress test's result
    (:class:`safety_filter.campaigns.stress_runs.StressResult`; the report sits a layer
    below the campaign, so it names the attributes instead of importing the class)."""

    summaries: list[dict[str, Any]]  # per run, worst first
    worst: dict[str, Any]
    worst_log: Any  # safety_filter.simulation.plant.PlantLog
    worst_pushes: list[Any]  # safety_filter.simulation.plant.Push
    context: Any  # the matrix: model, certificate, uncertainty, settings, rules, plants...
    wall_s: float
    passed: bool

REPORT_HTML = 'stress_report.html'
SUMMARY_JSON = 'stress_summary.json'
PLOTS = ('positions.png', 'velocities.png', 'torques.png', 'margin.png')
_MODES = FILTER_MODE_NAMES  # the modes of a filter step (no node watchdog in a stress run)


def _num(value: float | None, digits: int = 3) -> str:
    if value is None:
        return '-'
    return '0' if value == 0.0 else f'{value:.{digits}g}'


def _recovery_text(summary: dict[str, Any]) -> str:
    times = summary['recovery_s']
    if not times:
        return '-'
    if any(t is None for t in times):
        return 'never'
    return f'{max(times):.3g}'


def _modes_text(summary: dict[str, Any]) -> str:
    modes = summary['modes']
    return '/'.join(f'{100 * modes.get(m, 0.0):.0f}' for m in _MODES[:3])


def run_rows(result: StressResult) -> list[list[str]]:
    """Table cells per run, worst first."""
    rows = []
    for s in result.summaries:
        rows.append([s['plant'], s['nominal'], f'{s["rate_hz"]:g}',
                     _num(s['position_excursion']), _num(s['velocity_excursion']),
                     _num(max(s['command_excess'], s['applied_excess'])),
                     _num(s['driver_saturation']), _num(s['time_outside_s']),
                     _num(s['min_margin']), _recovery_text(s), _modes_text(s),
                     'pass' if s['passed'] else 'FAIL'])
    return rows


HEADER = ['plant', 'nominal', 'Hz', 'pos over', 'vel over', 'trq over', 'drv sat',
          'out of S s', 'min margin', 'recover s', 'flt/fb/rec %', 'result']


def _plain_table(header: list[str], rows: list[list[str]]) -> str:
    widths = [max(len(h), *(len(r[k]) for r in rows)) if rows else len(h)
              for k, h in enumerate(header)]
    lines = ['  '.join(h.ljust(w) for h, w in zip(header, widths)),
             '  '.join('-' * w for w in widths)]
    lines += ['  '.join(c.ljust(w) for c, w in zip(row, widths)) for row in rows]
    return '\n'.join(lines)


def verdict_line(result: StressResult) -> str:
    failed = [s for s in result.summaries if not s['passed']]
    if not failed:
        return f'verdict: PASS (all {len(result.summaries)} runs kept every rule)'
    return (f'verdict: FAIL ({len(failed)} of {len(result.summaries)} runs broke a rule; '
            f'worst: {failed[0]["plant"]} / {failed[0]["nominal"]} at '
            f'{failed[0]["rate_hz"]:g} Hz: {failed[0]["failures"][0]})')


def summary_lines(result: StressResult, source: str) -> list[str]:
    """The summary under the table (also on the HTML page)."""
    context = result.context
    summaries = result.summaries
    rules = context.rules
    recoveries = [t for s in summaries for t in s['recovery_s']]
    finite = [t for t in recoveries if t is not None]
    never = len(recoveries) - len(finite)
    plants = sorted({s['plant'] for s in summaries if not s['passed']},
                    key=[name for name, _ in context.plants].index)
    bounds = [b for s in summaries for b in s.get('recovery_bound_s') or []]
    judged = sum(b is not None for b in bounds)
    recovery_rule = (f'back in S within {rules.recovery_time_s:g} s after each push'
                     if rules.recovery_time_s is not None else
                     'after each push back in S within the certified return time where it '
                     f'applies ({judged} of {len(bounds)} pushes: the others stayed in S, or '
                     'on the way back went past a position limit or the certified speeds, '
                     'or to states from which the certificate states no time)')
    return [
        f'robot: {context.model.name} ({context.model.n_joints} joints); certificate: '
        f'{source} (id {context.certificate.certificate_id})',
        f'runs: {len(summaries)} = {len(context.plants)} plants x '
        f'{len(summaries) // max(len(context.plants) * len(context.rates), 1)} nominals x '
        f'{len(context.rates)} rate(s) ({", ".join(f"{r:g}" for r in context.rates)} Hz), '
        f'{context.settings.duration_s:g} s each; wall time {result.wall_s:.1f} s',
        f'worst position excursion {_num(max(s["position_excursion"] for s in summaries))}, '
        f'velocity excursion {_num(max(s["velocity_excursion"] for s in summaries))}, '
        'torque beyond the box '
        f'{_num(max(max(s["command_excess"], s["applied_excess"]) for s in summaries))}, '
        f'longest time outside S {_num(max(s["time_outside_s"] for s in summaries))} s',
        f'recovery after pushes: {len(recoveries)} pushes, longest '
        f'{_num(max(finite) if finite else None)} s; largest excursion during a push: '
        f'position {_num(max(s["push_position_excursion"] for s in summaries))}, velocity '
        f'{_num(max(s["push_velocity_excursion"] for s in summaries))}'
        + (f', {never} not back in S before the next push or the end' if never else ''),
        f'rules: no position excursion (> {rules.position_tolerance:g}); velocity excursion '
        f'<= declared velocity noise {rules.velocity_allowance:g}; filter command and applied '
        f'torque inside the box; {recovery_rule}',
        'failing plants: ' + (', '.join(plants) if plants else 'none'),
        verdict_line(result),
    ]


def format_table(result: StressResult, source: str) -> str:
    """The terminal output: the run table (worst first), the summary, the verdict."""
    legend = ('pos/vel/trq over: largest excursion past the position [rad], velocity '
              '[rad/s] and torque [N m] limits (position and velocity: outside the push '
              'windows, from a push to its recovery; torque: the filter command or the '
              "applied torque, every step); drv sat: the driver's gain*u+offset past the "
              'box before it saturates; out of S s: time with the true state outside the '
              'safe set; recover s: longest time back into S after a push; flt/fb/rec %: steps '
              'filtered / fallback / recovering')
    return '\n'.join([_plain_table(HEADER, run_rows(result)), '', legend, '',
                      *summary_lines(result, source)])


# ---------------------------------------------------------------------- JSON, HTML, plots
def report_data(result: StressResult, source: str) -> dict[str, Any]:
    """Everything of :data:`SUMMARY_JSON`."""
    context = result.context
    return json_ready({
        'robot': context.model.name,
        'joint_names': list(context.model.joint_names),
        'certificate': {'source': source, 'id': context.certificate.certificate_id,
                        'control_rate_hz': context.certificate.control_rate_hz,
                        'sampling_factor': context.certificate.sampling_factor},
        'uncertainty': context.uncertainty.record(),
        'settings': dataclasses.asdict(context.settings),
        'rules': {'position_tolerance': context.rules.position_tolerance,
                  'velocity_allowance': context.rules.velocity_allowance,
                  'torque_tolerance_relative': context.rules.torque_tolerance,
                  'recovery_time_s': context.rules.recovery_time_s},
        'plants': [{'name': name, 'payload_mass': plant.payload_mass,
                    'torque_gain': plant.torque_gain, 'torque_offset': plant.torque_offset,
                    'position_noise': plant.position_noise,
                    'velocity_noise': plant.velocity_noise,
                    'delay_periods': plant.delay_periods}
                   for name, plant in context.plants],
        'filter_payload_mass': context.filter.payload_mass,
        'start_state': {'q': context.q0, 'v': context.v0},
        'passed': result.passed,
        'verdict': verdict_line(result),
        'worst_run': result.worst['index'],
        'wall_s': result.wall_s,
        'runs': result.summaries,
    })


def _shade_pushes(axes: Any, result: StressResult) -> None:
    for push in result.worst_pushes:
        axes.axvspan(push.start_s, push.end_s, color='#f4b400', alpha=0.35, lw=0)


def _joint_figure(result: StressResult, path: Path, kind: str) -> None:
    model = result.context.model
    log = result.worst_log
    n = model.n_joints
    figure = new_figure(9.0, 1.7 * n + 0.8)
    axes_list = figure.subplots(n, 1, sharex=True, squeeze=False)[:, 0]
    t = log.time_s
    for i, axes in enumerate(axes_list):
        if kind == 'positions':
            axes.plot(t, log.q[:, i], color='tab:blue', lw=1.0, label='true')
            limits = (model.position_lower[i], model.position_upper[i])
            over = (log.q[:, i] > limits[1]) | (log.q[:, i] < limits[0])
            values = log.q[:, i]
        elif kind == 'velocities':
            axes.plot(t, log.v[:, i], color='tab:blue', lw=1.0, label='true')
            bound = result.context.certificate.velocity_bound[i]
            axes.axhline(bound, color='tab:green', ls=':', lw=1.0, label='certified')
            axes.axhline(-bound, color='tab:green', ls=':', lw=1.0)
            limits = (-model.velocity_limit[i], model.velocity_limit[i])
            values = log.v[:, i]
            over = np.abs(values) > limits[1]
        else:
            axes.plot(t, log.nominal[:, i], color='0.6', lw=0.8, label='nominal')
            axes.plot(t, log.command[:, i], color='tab:green', lw=0.8, label='filter command')
            axes.plot(t, log.applied[:, i], color='tab:blue', lw=1.0, label='applied')
            limits = (-model.effort_limit[i], model.effort_limit[i])
            values = log.applied[:, i]
            over = np.abs(log.command[:, i]) > limits[1] * (1 + 1e-6)
            span = 1.3 * limits[1]
            axes.set_ylim(-span, span)
        for limit in limits:
            axes.axhline(limit, color='red', ls='--', lw=1.0)
        if np.any(over):
            axes.plot(t, np.where(over, values, np.nan), color='red', lw=2.5)
        _shade_pushes(axes, result)
        axes.set_ylabel(model.joint_names[i], fontsize=8)
        axes.tick_params(labelsize=7)
        if i == 0:
            axes.legend(fontsize=7, loc='upper right')
    axes_list[-1].set_xlabel('time [s]')
    figure.subplots_adjust(left=0.1, right=0.98, top=0.97, bottom=0.6 / (1.7 * n + 0.8),
                           hspace=0.15)
    figure.savefig(path)


def _margin_figure(result: StressResult, path: Path) -> None:
    log = result.worst_log
    figure = new_figure(9.0, 3.2)
    axes = figure.add_subplot(1, 1, 1)
    for i, name in enumerate(result.context.model.joint_names):
        axes.plot(log.time_s, log.margin[:, i], lw=1.0, label=name)
    axes.axhline(0.0, color='red', ls='--', lw=1.0)
    _shade_pushes(axes, result)
    axes.set_xlabel('time [s]')
    axes.set_ylabel('smallest barrier value')
    axes.legend(fontsize=7, ncol=min(7, result.context.model.n_joints), loc='upper right')
    figure.subplots_adjust(left=0.09, right=0.98, top=0.95, bottom=0.16)
    figure.savefig(path)


def _page(result: StressResult, source: str, plots: bool) -> str:
    esc = html.escape
    worst = result.worst
    verdict = verdict_line(result)

    def cell(k: int, text: str) -> str:
        if 2 <= k < len(HEADER) - 1:
            return f'<td class="num">{esc(text)}</td>'
        kind = {'FAIL': 'bad', 'pass': 'ok'}.get(text, '')
        return f'<td class="{kind}">{esc(text)}</td>'

    rows = ''.join('<tr>' + ''.join(cell(k, c) for k, c in enumerate(row)) + '</tr>'
                   for row in run_rows(result))
    head = '<tr>' + ''.join(f'<th>{esc(h)}</th>' for h in HEADER) + '</tr>'
    failures = ''.join(f'<li>{esc(f)}</li>' for f in worst['failures']) or '<li>none</li>'
    body = [
        f'<h1>Stress test: {esc(result.context.model.name)}</h1>',
        '<p>The model, certificate and filter in closed loop against plants drawn from the '
        'declared uncertainty set, with adversarial and benign nominals, the control rates '
        'the certificate covers, and external torque pushes.</p>',
        caution_element(),
        verdict_element(result.passed, verdict),
        '<h2>Summary</h2><ul>'
        + ''.join(f'<li>{esc(line)}</li>' for line in summary_lines(result, source)[:-1])
        + '</ul>',
        f'<h2>Worst run: {esc(worst["plant"])} / {esc(worst["nominal"])} at '
        f'{worst["rate_hz"]:g} Hz</h2>',
        f'<p>Rules it broke:</p><ul>{failures}</ul>',
    ]
    if plots:
        captions = {
            'positions.png': 'True joint positions against the position limits (red dashed); '
                             'thick red: past a limit. Shaded: pushes.',
            'velocities.png': 'True joint velocities against the rated limits (red dashed) and '
                              'the certified velocity bound (green dotted).',
            'torques.png': 'Nominal (grey), filter command (green) and applied torque (blue, '
                           "after delay, the driver's gain and offset, and saturation) "
                           'against the torque limits.',
            'margin.png': 'Smallest barrier value per joint of the true state: negative '
                          'means outside the safe set S.',
        }
        for name in PLOTS:
            body.append(figure_element(name, captions[name]))
    body += ['<h2>All runs, worst first</h2>', f'<table>{head}{rows}</table>',
             f'<p>Machine-readable: <code>{SUMMARY_JSON}</code>.</p>']
    return page(f'safety_filter stress test: {result.context.model.name}', body)


def write_report(folder: str | Path, result: StressResult, source: str, *, plots: bool = True
                 ) -> tuple[Path, Path]:
    """Write the HTML page, the JSON summary and (``plots``) the PNGs; returns their paths
    ``(page, summary)``. Existing files of the same names are replaced."""
    folder = Path(folder)
    folder.mkdir(parents=True, exist_ok=True)
    summary = folder / SUMMARY_JSON
    write_json(summary, report_data(result, source))
    if plots:
        for kind in ('positions', 'velocities', 'torques'):
            _joint_figure(result, folder / f'{kind}.png', kind)
        _margin_figure(result, folder / 'margin.png')
    path = folder / REPORT_HTML
    path.write_text(_page(result, source, plots), encoding='utf-8')
    return path, summary
