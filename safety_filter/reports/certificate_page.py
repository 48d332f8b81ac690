"""The certificate report's HTML page (self-contained: styles inline, the PNG plots next to
it), built with :mod:`safety_filter.reports.html_kit`."""

from __future__ import annotations

import html
import json
import math
from typing import Any

import numpy as np

from safety_filter.certification.certify import CertificationOutcome
from safety_filter.core.robot_model import RobotModel
from safety_filter.reports.certificate_plots import SUMMARY_PLOT
from safety_filter.reports.certificate_tables import (
    CONDITION_TEXT,
    MODEL_ERROR_KINDS,
    design_lines,
    dissipation_line,
    falsifier_line,
    joint_rows,
    model_error_rows,
    recovery_line,
    scale_line,
    seconds_line,
    slow_design_rows,
    verdict_text,
)
from safety_filter.reports.html_kit import (
    caution_element,
    facts_table,
    json_ready,
    page,
    verdict_element,
    written_at,
)

REPORT_JSON = 'certificate_report.json'


CSS = """
h3 { font-size: 1.05em; margin-top: 1.4em; }
.verdict { font-size: 1.3em; }
th { text-align: center; }
td.ok, td.bad { text-align: center; }
figure { display: inline-block; margin: 0.5em 1em 1em 0; vertical-align: top;
         max-width: 46%; }
figure img { width: 100%; }
figure.wide { max-width: 60%; }
pre { background: #f7f7f9; padding: 0.8em; overflow-x: auto; font-size: 0.85em; }
"""


def _cell(value: float, digits: int = 4) -> str:
    x = float(value)
    return f'<td class="num">{html.escape(f"{x:.{digits}g}" if math.isfinite(x) else str(x))}</td>'


def _html_table(rows: list[dict[str, Any]]) -> str:
    head = ('<tr><th>joint</th><th>authority e<br>[rad/s&sup2;]</th>'
            '<th>sampling margin<br>[rad/s&sup2;]</th><th>&gamma;*<br>[1/s]</th>'
            '<th>&gamma;<br>[1/s]</th><th>certified velocity<br>&gamma;&nbsp;&alpha;1(range) '
            '[rad/s]</th><th>rated velocity<br>[rad/s]</th><th>% of rated</th>'
            '<th>S / braking set</th><th>&beta;*</th><th>&beta;</th><th>&beta; floor</th>'
            '<th>&beta; cap</th>'
            '<th>&beta; set by</th><th>result</th></tr>')
    body = []
    for row in rows:
        cells = [f'<td>{html.escape(row["joint"])}</td>']
        for key in ('authority', 'sampling_margin', 'gamma_star', 'gamma',
                    'certified_velocity', 'rated_velocity'):
            cells.append(_cell(row[key]))
        cells.append(f'<td class="num">{row["velocity_percent"]:.0f} %</td>')
        cells.append(f'<td class="num">{row["braking_percent"]:.0f} %</td>')
        for key in ('beta_star', 'beta', 'beta_floor', 'beta_cap'):
            cells.append(_cell(row[key]))
        cells.append(f'<td>{html.escape(row["beta_set_by"])}</td>')
        cells.append('<td class="ok">pass</td>' if row['passed'] else
                     '<td class="bad">FAIL</td>')
        body.append('<tr>' + ''.join(cells) + '</tr>')
    return '<table>\n' + head + '\n' + '\n'.join(body) + '\n</table>'


def certificate_page(outcome: CertificationOutcome, model: RobotModel,
               files: dict[str, list[str]]) -> str:
    cert = outcome.certificate
    rows = joint_rows(outcome, model)
    esc = html.escape
    verdict = (
        'CERTIFIED: the filter accepts these gains.' if outcome.certified else
        'NOT CERTIFIED: the certificate file is marked certified: false and the filter '
        'refuses it.')
    parts = [
        f'<h1>Certificate report: {esc(model.name)}</h1>',
        f'<p>This report shows how <code>safety-filter certify</code> chose per-joint barrier '
        f'gains (&gamma;, &beta;) for <b>{esc(model.name)}</b> ({model.n_joints} joints) so '
        'that the safety filter&rsquo;s QP has a solution at every state of the safe set S, '
        'and the evidence behind that choice.</p>',
        caution_element(),
        verdict_element(outcome.certified, verdict),
    ]
    if cert.reasons:
        parts.append('<h2>Why it is not certified</h2><ol>')
        parts += [f'<li>{esc(reason)}</li>' for reason in cert.reasons]
        parts.append('</ol>')
    parts.append('<h2>Per-joint result</h2>')
    parts.append(_html_table(rows))
    parts.append(
        '<p>Units are rad, rad/s, rad/s&sup2; (m, m/s, m/s&sup2; for prismatic joints). '
        '&gamma; stays below &gamma;* so the velocity barrier can be held with the authority '
        'left after the sampling margin; the certified velocity bound is the fastest the '
        'filter lets the joint move. &beta; stays above &beta;* (feasibility) and between a '
        'floor (the arm does not freeze) and a cap (the sampled filter stays sound).</p>')
    falsifier_text = falsifier_line(outcome).split(': ', 1)[1]
    parts.append(facts_table([
        ('verdict', verdict_text(outcome)),
        ('condition', CONDITION_TEXT.get(cert.condition, cert.condition)),
        ('velocity scale', scale_line(outcome).split(': ', 1)[1]),
        ('falsifier', falsifier_text),
        ('stage timings', seconds_line(outcome.stage_seconds).split(': ', 1)[1]),
    ] + ([('recovery', recovery_line(cert).split(': ', 1)[1])] if cert.certified else [])
        + ([('dissipation', dissipation_line(cert).split(': ', 1)[1])]
           if dissipation_line(cert) else [])))
    designs = design_lines(cert, model)
    if designs:
        parts.append('<h2>Designs tried</h2>')
        parts.append('<p>Certification takes each barrier design it knows through the same '
                     'steps and keeps the one whose safe set is largest among those that '
                     'certify (docs/method.md, &ldquo;Which design, and how fast&rdquo;).</p>')
        parts.append('<ul>' + ''.join(f'<li>{esc(text)}</li>' for text in designs) + '</ul>')
    slow_rows = slow_design_rows(outcome, model)
    if slow_rows:
        slow = cert.slow_design
        share = float(np.max(np.asarray(slow.velocity_bound) / np.asarray(slow.velocity_limit)))
        falsifier = slow.falsifier or {}
        parts.append('<h2>Slow design</h2>')
        parts.append(
            f'<p>A second certified design whose velocity boxes are at most '
            f'{100 * share:.0f}&nbsp;% of the rated speeds: with the Coriolis torque of the '
            'smaller box freed it brakes harder. The safe set S is the union of its set and '
            'the main one; at each step the filter keeps the state in a set that contains it, '
            'whichever changes the nominal less (docs/method.md, &ldquo;The slow set&rdquo;). '
            f'Falsifier on the slow design: {falsifier.get("states", 0)} states, '
            f'{esc(str(falsifier.get("infeasible", "?")))} infeasible.</p>')
        body = ''.join(
            f'<tr><td>{esc(row["joint"])}</td>{_cell(row["authority"], 3)}'
            f'{_cell(row["sampling_margin"], 3)}{_cell(row["gamma"], 3)}'
            f'{_cell(row["certified_velocity"], 3)}<td>{row["velocity_percent"]:.0f}&nbsp;%</td>'
            f'<td>{row["braking_percent"]:.0f}&nbsp;%</td>'
            f'<td>{row["union_growth_percent"]:.0f}&nbsp;%</td>'
            f'<td>{row["union_braking_percent"]:.0f}&nbsp;%</td></tr>' for row in slow_rows)
        parts.append(
            '<table><tr><th>joint</th><th>authority e</th><th>sampling margin</th>'
            '<th>&gamma;</th><th>certified velocity</th><th>of rated</th>'
            '<th>its S / braking set</th><th>union larger than the main S by</th>'
            '<th>union / braking set at the larger authority</th></tr>' + body + '</table>')
    error_rows = model_error_rows(cert, model)
    if error_rows:
        parts.append('<h2>Model error the certificate covers</h2>')
        parts.append(
            '<p>The arm is not its URDF. The limits file declares by how much (payload, link '
            'masses and inertias, centres of mass, friction, the driver&rsquo;s torque, '
            'measurement noise and delay); the filter&rsquo;s disturbance observer measures '
            'the difference while it runs, and the authority below is what is left when the '
            'observer&rsquo;s estimate sits anywhere in the range these errors allow. Torque '
            'bound per kind [N&nbsp;m]:</p>')
        head = ''.join(f'<th>{esc(k)}</th>' for k in MODEL_ERROR_KINDS)
        body = []
        for row in error_rows:
            cells = ''.join(_cell(row[k], 3) for k in MODEL_ERROR_KINDS)
            body.append(
                f'<tr><td>{esc(row["joint"])}</td>{_cell(row["effort_limit"], 3)}{cells}'
                f'{_cell(row["authority"])}{_cell(row["authority_without"])}'
                f'<td>{row["velocity_percent"]:.0f}&nbsp;%</td>'
                f'<td>{row["velocity_percent_without"]:.0f}&nbsp;%</td></tr>')
        parts.append(
            '<table><tr><th>joint</th><th>effort limit</th>' + head
            + '<th>authority e<br>[rad/s&sup2;]</th><th>e for an exact model</th>'
            '<th>velocity bound / rated</th><th>same, exact model</th></tr>'
            + ''.join(body) + '</table>')
        parts.append('<p>The velocity columns are before the sampled-data margin, each at '
                     'its own best velocity scale.</p>')
    parts.append('<h2>Plots</h2>')
    parts.append(
        f'<figure class="wide"><img src="{esc(SUMMARY_PLOT)}" alt="authority and margin">'
        '<figcaption>Acceleration authority e of each joint (blue) beside the part reserved '
        'for the drift over one control period (orange): the filter works with the '
        'difference, so an orange bar close to the blue one leaves little room.'
        '</figcaption></figure>')
    for i, name in enumerate(cert.joint_names):
        parts.append(f'<h3>Joint {esc(name)}</h3>')
        parts.append(
            f'<figure><img src="{esc(files["ratio"][i])}" alt="ratio for {esc(name)}">'
            '<figcaption>Colour: the ratio &psi;/&alpha;2(b) over the joint&rsquo;s slice of '
            'S (blank outside S): the larger of the braking needs at the upper and lower '
            'edges and of keeping An + margin &le; Ap &minus; margin. The QP stays feasible '
            'where &beta; is above it; its largest value is &beta;* (red star). The white '
            'dashed line, if any, encloses the states where the ratio is above '
            '0.</figcaption></figure>')
        parts.append(
            f'<figure><img src="{esc(files["safe_set"][i])}" alt="safe set of {esc(name)}">'
            '<figcaption>The safe set S (shaded) between its barrier edges, the position '
            'limits (black), the rated (orange dashed) and certified (green dotted) velocity '
            'limits, the braking curve at the usable authority, and the falsifier&rsquo;s '
            'lowest-slack states projected on this joint (colour: their slack).'
            + (' With a slow design S also holds its set: its edge (dashed blue) and its '
               'braking curve.' if cert.slow_design else '')
            + '</figcaption></figure>')
    settings = cert.settings if isinstance(cert.settings, dict) else {}
    bounds = settings.get('bounds', {})
    certify_settings = settings.get('certify', {})
    parts.append('<h2>Provenance</h2>')
    parts.append(facts_table([
        ('robot model hash', cert.model_hash),
        ('certificate id', cert.certificate_id),
        ('package version', cert.package_version),
        ('certified at', cert.created),
        ('report written at',
         written_at()),
        ('alpha1, alpha2', f'{cert.alpha1.kind} (scale {cert.alpha1.scale:g}), '
                           f'{cert.alpha2.kind} (scale {cert.alpha2.scale:g})'),
        ('control rate', f'{cert.control_rate_hz:g} Hz (margin covers hold periods of '
                         f'{cert.sampling_factor:g} control periods)'),
        ('payload range', f'{cert.payload_mass_range[0]:g} .. {cert.payload_mass_range[1]:g}'
                          f' kg at {list(cert.payload_point)} m on the tip link'),
        ('bound sampling', f'{bounds.get("samples", "?")} Sobol samples, '
                           f'{bounds.get("refine_starts", "?")} refinement starts x '
                           f'{bounds.get("refine_iterations", "?")} iterations, inflation '
                           f'{bounds.get("inflation", "?")}, seed {bounds.get("seed", "?")}'),
        ('bound evaluations', str(settings.get('evaluations', '?'))),
        ('sampling margin', f'{certify_settings.get("margin_samples", "?")} rollouts, '
                            f'inflation {certify_settings.get("margin_inflation", "?")}'),
        ('falsifier states', str(certify_settings.get('falsifier_states', '?'))),
    ]))
    parts.append('<p>All settings as recorded in the certificate:</p>')
    parts.append('<pre>' + esc(json.dumps(json_ready(settings), indent=2, sort_keys=True))
                 + '</pre>')
    parts.append(f'<p>Machine-readable: <a href="{REPORT_JSON}">{REPORT_JSON}</a>.</p>')
    return page(f'safety_filter certificate: {model.name}', parts, CSS)
