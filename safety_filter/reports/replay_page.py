"""The replay report's HTML page of one trial (self-contained: styles, data and scripts
inline, the PNG plots next to it), built with :mod:`safety_filter.reports.html_kit`."""

from __future__ import annotations

import html
import json
from typing import Any

from safety_filter.reports.html_kit import (
    UPLOT_VERSION,
    asset_text,
    caution_element,
    json_script_element,
    page,
    script_element,
    table,
    uplot_elements,
    written_at,
)
from safety_filter.reports.html_kit import (
    number_text as _num,
)
from safety_filter.reports.replay_interactive import (
    INTERACTIVE_BUCKETS,
    INTERACTIVE_FULL_SAMPLES,
    MOMENT_WINDOW_S,
    MOMENT_ZOOM_S,
)
from safety_filter.reports.replay_report_data import MODE_COLOURS, REPORT_JSON

CSS = """
.warn { background: #fbf3d9; border-left: 5px solid #c99a06; padding: 0.4em 1em; }
"""

# The zoomable plots. Until the script has drawn every chart (it then puts class sf-js on
# <html>), and in print, the page shows the static PNGs instead.
INTERACTIVE_CSS = """
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
    modes = [(m, c) for m, c in MODE_COLOURS.items() if c in shaded]
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


def trial_page(data: dict[str, Any], interactive: dict[str, Any] | None = None) -> str:
    esc = html.escape
    start = data['start_time_s']
    body = [f'<h1>Replay of {esc(data["name"])}</h1>',
            f'<p>Bag <code>{esc(data["bag"])}</code>, robot <b>{esc(data["robot"])}</b>, '
            f'{esc(_num(data["duration_s"]))} s from bag time {start:.6f} s. Options: '
            f'<code>{esc(json.dumps(data["options"], sort_keys=True))}</code>.</p>',
            caution_element()]
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
        body.append(table(('figure', 'value'), rows))
        body.append('<p>Largest interventions and smallest margins:</p>')
        moment_rows = [('largest intervention', f'+{m["at_rel_s"]:.4f}', m['at_s'],
                        m['value'], m.get('mode', ''), m['at_rel_s'])
                       for m in run['moments']['largest_intervention']]
        moment_rows += [('smallest margin', f'+{m["at_rel_s"]:.4f}', m['at_s'], m['value'],
                         m.get('joint', ''), m['at_rel_s'])
                        for m in run['moments']['smallest_margin']]
        header = ('what', 'time [s]', 'bag time [s]', 'value', 'mode / joint')
        moments = table(header, [(a, b, f'{c:.6f}', d, e) for a, b, c, d, e, _ in moment_rows])
        if interactive is not None:  # a last column with a button per moment
            rows = moments.split('</tr>')
            rows[0] += '<th class="sf-js-only">time plots</th>'
            for k, row in enumerate(moment_rows, start=1):
                rows[k] += f'<td class="sf-js-only">{_moment_button(row[5])}</td>'
            moments = '</tr>'.join(rows)
        body.append(moments)
        episodes = [(mode, f'+{e["from_s"] - start:.4f}', f'+{e["to_s"] - start:.4f}',
                     e['steps']) for mode, items in summary['episodes'].items()
                    for e in items]
        body.append('<p>Fallback, recovery, rejected and stale episodes: '
                    + ('none.</p>' if not episodes else '</p>'
                       + table(('mode', 'from [s]', 'to [s]', 'steps'), episodes)))
        closed = run['closed_loop']
        if closed is not None:
            verdict = ('<span class="bad">limits violated</span>' if closed['violated']
                       else '<span class="ok">no limit violated</span>')
            body.append(f'<p>Closed-loop re-simulation from the recorded initial state, '
                        f'driven by the recorded nominal: {verdict}.</p>')
            names = data['joint_names']
            body.append(table(
                ('joint', 'position violation', 'velocity violation', 'torque violation',
                 'position difference rms', 'position difference max'),
                [(j, closed['violations']['position'][j], closed['violations']['velocity'][j],
                  closed['violations']['torque'][j], closed['difference']['position_rms'][j],
                  closed['difference']['position_max'][j]) for j in names]))
    if data['gaps']:
        body.append('<h2>Input gaps</h2>' + table(
            ('topic', 'from [s]', 'to [s]', 'length [s]'),
            [(g['topic'], f'+{g["from_rel_s"]:.4f}', f'+{g["to_rel_s"]:.4f}',
              g['to_s'] - g['from_s']) for g in data['gaps']]))
    else:
        body.append('<h2>Input gaps</h2><p>none.</p>')
    comparison = data.get('comparison')
    if comparison:
        body.append('<h2>Comparison</h2>')
        body.append(table(['metric', 'unit'] + comparison['labels'],
                           [[r['metric'], r['unit']] + list(r['values'])
                            for r in comparison['rows']]))
    if events and events['in_trial']:
        body.append('<h2>Events</h2>' + table(
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
        head = [uplot_style, f'<style>{INTERACTIVE_CSS}</style>']
        body.append(f'<p class="sf-js-only">The zoomable plots are drawn with uPlot '
                    f'{UPLOT_VERSION} (MIT licence, copyright (c) 2022 Leon Sorokin; the '
                    "licence text is in this page's source), included in the page: it "
                    'needs no network.</p>')
    body.append(f'<p>Machine-readable: <a href="{REPORT_JSON}">{REPORT_JSON}</a>. Written '
                f'{written_at()}.</p>')
    if interactive is not None:
        body += [json_script_element('sf-plot-data', interactive), uplot_script,
                 script_element(asset_text('time_plots.js'))]
    return page(f'safety_filter replay: {data["name"]}', body, CSS, head)
