"""The engineer's report of a certification: a terminal table, an HTML page with plots, JSON.

:func:`format_joint_table` renders what
:func:`safety_filter.certification.certify.certify_with_evidence`
found as a plain-text table (one row per joint, then the verdict and the evidence).
:func:`write_report` writes a folder with ``certificate_report.html`` (self-contained: our
own CSS, no external URLs, plots as PNG files next to it), ``certificate_report.json`` for
machines, and the plots:

* per joint, the ratio ``psi / alpha2(b)`` over the joint's slice of the safe set, whose
  largest value is ``beta*`` (docs/method.md);
* per joint, the safe set in the ``(q, v)`` plane with the position limits, the rated and the
  certified velocity bounds and the falsifier's lowest-slack states;
* one summary bar chart of the acceleration authority against the sampled-data margin.

Matplotlib is imported only when plots are drawn, and only its object-oriented API with the
Agg canvas is used, so the caller's pyplot backend is left alone.
"""

from __future__ import annotations

import datetime as _dt
import html
import json
import math
import re
import textwrap
from pathlib import Path
from typing import Any

import numpy as np

from safety_filter.certification.certify import CertificationOutcome
from safety_filter.certification.design_formulas import beta_star, slice_ratio
from safety_filter.core.barriers import braking_set_area, safe_set_area
from safety_filter.core.robot_model import RobotModel
from safety_filter.reports.html_kit import BASE_CSS, json_ready

REPORT_HTML = 'certificate_report.html'
REPORT_JSON = 'certificate_report.json'
SUMMARY_PLOT = 'authority_margin.png'
TABLE_WIDTH = 100

# The same words as safety_filter.cli.main.SAFETY_NOTICE (a test keeps them equal); repeated here
# so that the report does not import the command line.
SAFETY_NOTICE = (
    'CAUTION: safety_filter is not a certified safety function. It does not replace '
    'hardware emergency stops, safety-rated monitoring or a risk assessment; local '
    'regulations and qualified safety engineers have the last word.')

_CONDITION_TEXT = {
    'acceleration_authority': 'acceleration authority (row sums of M, docs/method.md)',
    'torque_coupling': 'torque coupling (rows of M^-1, docs/method.md)',
}


# ---------------------------------------------------------------------- per-joint numbers
def joint_rows(outcome: CertificationOutcome, model: RobotModel) -> list[dict[str, Any]]:
    """Per-joint numbers of the report (plain floats), in joint order.

    Keys: ``joint``, ``authority`` and ``sampling_margin`` [rad/s^2], ``usable_authority``,
    ``gamma_star``, ``gamma``, ``certified_velocity`` (the fastest speed in S) and
    ``rated_velocity`` [rad/s], ``velocity_percent``, ``beta_star``, ``beta``,
    ``beta_floor``, ``beta_cap``, ``beta_set_by`` (margin, floor or cap), ``passed``,
    ``braking_percent``: the area of S in the joint's (q, v) plane over the area of the set
    from which the joint can still brake to a stop before its limits at its usable
    authority, within its rated speed (how permissive S is: 100 % is the braking limit).
    (m instead of rad for prismatic joints.)
    """
    cert = outcome.certificate
    settings = cert.settings.get('certify', {}) if isinstance(cert.settings, dict) else {}
    beta_margin = float(settings.get('beta_margin', 1.2))
    rows = []
    for i, name in enumerate(cert.joint_names):
        r = float(model.position_upper[i] - model.position_lower[i])
        gamma = float(cert.gamma[i])
        velocity = _envelope(cert, i, r)
        rated = float(cert.velocity_limit[i])
        usable = float(cert.authority[i] - cert.sampling_margin[i])
        b_star, beta = float(cert.beta_star[i]), float(cert.beta[i])
        floor, cap = float(cert.beta_floor[i]), float(cert.beta_cap[i])
        if beta <= 0.0:
            set_by = 'none'
        elif math.isclose(beta, cap, rel_tol=1e-9):
            set_by = 'cap'
        elif math.isclose(beta, floor, rel_tol=1e-9):
            set_by = 'floor'
        else:
            set_by = f'{beta_margin:g} beta*'
        named = any(f'joint {name!r}' in reason for reason in cert.reasons)
        passed = bool(
            usable > 0.0 and gamma > 0.0 and np.isfinite(b_star)
            and gamma <= float(cert.gamma_star[i]) * (1.0 + 1e-9)
            and b_star <= beta <= cap * (1.0 + 1e-9) and not named)
        rows.append({
            'joint': name,
            'authority': float(cert.authority[i]),
            'sampling_margin': float(cert.sampling_margin[i]),
            'usable_authority': usable,
            'gamma_star': float(cert.gamma_star[i]),
            'gamma': gamma,
            'certified_velocity': velocity,
            'rated_velocity': rated,
            'velocity_percent': 100.0 * velocity / rated if rated > 0 else 0.0,
            'beta_star': b_star,
            'beta': beta,
            'beta_floor': floor,
            'beta_cap': cap,
            'beta_set_by': set_by,
            'passed': passed,
            'braking_percent': _braking_percent(cert, i, r, usable, rated),
        })
    return rows


def _speed_bound(cert: Any, i: int) -> float | None:
    """Joint i's velocity bound when S keeps it by velocity barriers, else None."""
    return float(cert.velocity_bound[i]) if float(cert.velocity_beta[i]) > 0.0 else None


def _envelope(cert: Any, i: int, r: float) -> float:
    """The fastest speed in joint i's slice of S: ``gamma alpha1(r)``, within the velocity
    bound when S keeps it by velocity barriers."""
    reach = float(cert.gamma[i]) * float(cert.alpha1.value(r))
    bound = _speed_bound(cert, i)
    return reach if bound is None else min(reach, bound)


def _braking_percent(cert: Any, i: int, r: float, usable: float, rated: float) -> float:
    """Area of S over the braking set at the usable authority, in per cent (0 without
    gains)."""
    braking = braking_set_area(r, usable, rated)
    if braking <= 0.0 or float(cert.gamma[i]) <= 0.0:
        return 0.0
    area = safe_set_area(r, float(cert.gamma[i]), cert.alpha1, _speed_bound(cert, i))
    return 100.0 * area / braking


def _fmt(value: float) -> str:
    """A number in at most 6 characters (3 significant digits where they fit)."""
    x = float(value)
    if not math.isfinite(x):
        return 'nan' if math.isnan(x) else ('inf' if x > 0 else '-inf')
    if x == 0.0:
        return '0'
    size = abs(x)
    if 0.01 <= size < 1000.0:
        text = f'{x:.3g}'
    elif 1000.0 <= size < 1e5:
        text = f'{x:.0f}'
    else:
        text = f'{x:.1e}'
    return text.replace('e-0', 'e-').replace('e+0', 'e')


def _seconds_line(stage_seconds: dict[str, float]) -> str:
    parts = [f'{stage} {seconds:.2f} s' for stage, seconds in stage_seconds.items()]
    total = sum(stage_seconds.values())
    return 'stages: ' + ', '.join(parts) + f' (total {total:.1f} s)'


def _falsifier_line(outcome: CertificationOutcome) -> str:
    result = outcome.falsifier
    if result is None:
        if outcome.certified or not outcome.certificate.reasons:
            return 'falsifier: not run'
        return 'falsifier: not run (certification failed before the independent check)'
    if math.isfinite(result.min_slack):
        slack = f'{100.0 * result.min_slack:.1f} % of the torque limits'
    else:
        slack = 'none (empty acceleration bounds)'
    return (f'falsifier: {result.states} states in S, {result.lp_solved} decided by the exact '
            f'LP, {result.infeasible} infeasible; smallest slack {slack}')


def _recovery_line(cert: Any) -> str:
    """The longest recovery time the certificate states per joint (Certificate.
    worst_recovery_time), or '' for an uncertified certificate."""
    if not cert.certified:
        return ''
    times = cert.worst_recovery_time()
    listed = ', '.join(f'{name} {_fmt(t) if math.isfinite(t) else "none"}'
                       for name, t in zip(cert.joint_names, times))
    return ('recovery: from outside S (within the braking set of the usable authority, '
            f'speeds within v_cert) back in S within [s]: {listed} (none: the drift the '
            'margin covers may take all of the usable authority)')


def dissipation_line(cert: Any) -> str:
    """What the one-sided treatment of friction and damping gives back per joint: the
    sampled-data margin the design would need were friction able to push a joint on through
    zero speed, and (mean-acceleration designs) with accelerations at the start of the hold,
    beside the certified margin; '' when the certificate records neither."""
    settings = cert.settings if isinstance(cert.settings, dict) else {}
    parts = []
    for key, text in (('margin_if_friction_flipped', 'if Coulomb friction could push a joint '
                       'through zero speed'),
                      ('margin_at_start_of_hold', 'with accelerations at the start of the '
                       'hold')):
        values = settings.get(key)
        if values:
            listed = ', '.join(f'{name} {_fmt(x)}' for name, x in zip(cert.joint_names,
                                                                       values))
            parts.append(f'{text}: {listed}')
    if not parts:
        return ''
    return ('dissipation: friction and damping only slow a joint; counted so, the margin is '
            'the certified one [rad/s^2]; the margin the design would need ' + '; '.join(parts))


def _verdict(outcome: CertificationOutcome) -> str:
    return 'CERTIFIED' if outcome.certified else 'NOT CERTIFIED'


def _scale_line(outcome: CertificationOutcome) -> str:
    scale = outcome.velocity_scale
    if scale <= 0.0:
        return 'velocity scale: none found (no velocity envelope gave every joint authority)'
    cert = outcome.certificate
    fractions = np.asarray(cert.velocity_bound) / np.asarray(cert.velocity_limit)
    if float(np.ptp(fractions)) <= 1e-9:
        return (f'velocity scale: {scale:.3g} (the dynamics bounds cover {100 * scale:.0f} % '
                'of the rated velocity limits)')
    return (f'velocity box: {100 * fractions.min():.0f}-{100 * fractions.max():.0f} % of the '
            'rated velocity limits, per joint (the dynamics bounds cover that box)')


def design_lines(certificate: Any, model: RobotModel) -> list[str]:
    """Plain-text lines on the designs certification tried (family, outcome, envelope per
    joint) and on what limits each slow joint's velocity box; empty for certificates without
    that record."""
    settings = certificate.settings if isinstance(certificate.settings, dict) else {}
    tried = settings.get('designs_tried') or []
    lines = []
    for entry in tried:
        family = entry.get('alpha1', '?')
        if entry.get('alpha1_scale') is not None and family.startswith('sqrt'):
            family += f' (eps {entry["alpha1_scale"]:.3g})'
        if entry.get('mean_over_hold'):
            family += ', mean acceleration over the hold'
        envelope = entry.get('envelope_fraction') or []
        speeds = ', '.join(f'{100 * x:.0f}' for x in envelope)
        lines.append(f'{family}: {entry.get("outcome", "?")}'
                     + (f'; envelope % of rated: {speeds}' if speeds else ''))
    limited = settings.get('velocity_box_limited_by') or []
    for name, reason in zip(certificate.joint_names, limited):
        if reason:
            lines.append(f'{name} velocity box limited by {reason}')
    return lines


_COLUMNS = (('e', 'authority'), ('margin', 'sampling_margin'), ('gamma*', 'gamma_star'),
            ('gamma', 'gamma'), ('v_cert', 'certified_velocity'), ('v_rat', 'rated_velocity'))
_BETA_COLUMNS = (('beta*', 'beta_star'), ('beta', 'beta'), ('floor', 'beta_floor'),
                 ('cap', 'beta_cap'))


def format_joint_table(outcome: CertificationOutcome, model: RobotModel) -> str:
    """The certification result as plain ASCII text, at most 100 columns wide.

    One row per joint (authority, sampling margin, gamma*, gamma, certified velocity bound
    beside the rated limit and its percentage, beta*, beta with its floor and cap, pass or
    fail), then the verdict, the condition, the velocity scale, the falsifier, the stage
    timings and, when not certified, the numbered reasons.
    """
    cert = outcome.certificate
    rows = joint_rows(outcome, model)
    width = min(max([5] + [len(row['joint']) for row in rows]), 20)
    header = f'{"joint":<{width}}'
    for label, _ in _COLUMNS:
        header += f' {label:>6}'
    header += f' {"%rat":>4} {"%brk":>4}'
    for label, _ in _BETA_COLUMNS:
        header += f' {label:>6}'
    header += ' pass'
    lines = [f'certification of {model.name!r} ({model.n_joints} joints)', header,
             '-' * len(header)]
    for row in rows:
        name = row['joint'] if len(row['joint']) <= width else row['joint'][:width - 1] + '~'
        line = f'{name:<{width}}'
        for _, key in _COLUMNS:
            line += f' {_fmt(row[key]):>6}'
        line += f' {row["velocity_percent"]:>3.0f}% {row["braking_percent"]:>3.0f}%'
        for _, key in _BETA_COLUMNS:
            line += f' {_fmt(row[key]):>6}'
        line += ' ' + ('ok' if row['passed'] else 'FAIL')
        lines.append(line)
    lines.append('-' * len(header))
    lines += textwrap.wrap(
        'e: acceleration authority; margin: sampled-data margin reserved from it [rad/s^2]. '
        'gamma <= gamma* [1/s]. v_cert: the fastest speed in S (gamma alpha1(range), within '
        'the velocity box where S keeps it by velocity barriers) beside the rated limit v_rat '
        '[rad/s]; %brk: area of S over the set from which the joint can '
        'still brake before its limits at its usable authority (e - margin) within v_rat. '
        'beta >= beta*, kept between floor and cap. '
        '(m for rad on prismatic joints.)', TABLE_WIDTH)
    lines.append('')
    lines.append(f'verdict: {_verdict(outcome)}')
    lines.append('condition: ' + _CONDITION_TEXT.get(cert.condition, cert.condition))
    lines.append(f'alpha1: {cert.alpha1.kind} (scale {cert.alpha1.scale:g}), alpha2: '
                 f'{cert.alpha2.kind} (scale {cert.alpha2.scale:g}), control rate '
                 f'{cert.control_rate_hz:g} Hz')
    lines.append(_scale_line(outcome))
    lines += textwrap.wrap(_falsifier_line(outcome), TABLE_WIDTH,
                           subsequent_indent='  ')
    lines += textwrap.wrap(_recovery_line(cert), TABLE_WIDTH, subsequent_indent='  ')
    lines += textwrap.wrap(dissipation_line(cert), TABLE_WIDTH, subsequent_indent='  ')
    lines += textwrap.wrap(_seconds_line(outcome.stage_seconds), TABLE_WIDTH,
                           subsequent_indent='  ')
    designs = design_lines(cert, model)
    if designs:
        lines += ['', 'designs tried (the largest safe set that certifies is kept):']
        for text in designs:
            lines += textwrap.wrap(text, TABLE_WIDTH, initial_indent='  ',
                                   subsequent_indent='    ')
    model_error = format_model_error_table(cert, model)
    if model_error:
        lines += ['', model_error]
    if not outcome.certified and cert.reasons:
        lines.append('why not certified:')
        for k, reason in enumerate(cert.reasons, start=1):
            lines += textwrap.wrap(reason, TABLE_WIDTH, initial_indent=f'  {k}. ',
                                   subsequent_indent=' ' * (len(str(k)) + 4))
    return '\n'.join(lines)


MODEL_ERROR_KINDS = ('payload', 'links', 'centre of mass', 'friction', 'driver',
                     'observer noise')


def model_error_rows(certificate: Any, model: RobotModel) -> list[dict[str, Any]]:
    """What the declared uncertainty costs, per joint (empty for certificates without it).

    Keys: ``joint``; ``effort_limit`` [N m]; one key per kind of ``MODEL_ERROR_KINDS`` with
    its share of the model-error torque bound [N m]; ``authority`` and
    ``authority_without`` [rad/s^2] (at the certified velocity box, with and without the
    uncertainty); ``velocity_percent`` and ``velocity_percent_without``: the certified velocity
    bound over the rated one, with the uncertainty and if the arm matched its model exactly
    (both before the sampled-data margin, each at its best velocity scale).
    """
    settings = certificate.settings if isinstance(certificate.settings, dict) else {}
    by_kind = settings.get('disturbance_by_kind')
    if not by_kind:
        return []
    without = settings.get('authority_without_uncertainty') or [float('nan')] * model.n_joints
    with_v = settings.get('velocity_fraction_with_uncertainty') or [float('nan')] \
        * model.n_joints
    without_v = settings.get('velocity_fraction_without_uncertainty') or [float('nan')] \
        * model.n_joints
    rows = []
    for i, name in enumerate(certificate.joint_names):
        row: dict[str, Any] = {'joint': name, 'effort_limit': float(model.effort_limit[i])}
        for kind in MODEL_ERROR_KINDS:
            value = float(by_kind.get(kind, [0.0] * model.n_joints)[i])
            row[kind] = value if abs(value) >= 1e-6 * row['effort_limit'] else 0.0
        row['authority'] = float(certificate.authority[i])
        row['authority_without'] = float(without[i])
        row['velocity_percent'] = 100.0 * float(with_v[i])
        row['velocity_percent_without'] = 100.0 * float(without_v[i])
        rows.append(row)
    return rows


def format_model_error_table(certificate: Any, model: RobotModel) -> str:
    """The cost of the declared uncertainty as plain text (empty when not recorded)."""
    rows = model_error_rows(certificate, model)
    if not rows:
        return ''
    width = min(max([5] + [len(row['joint']) for row in rows]), 16)
    short = ('payld', 'links', 'com', 'frict', 'drive', 'noise')
    header = (f'{"joint":<{width}} {"umax":>6} ' + ' '.join(f'{k:>6}' for k in short)
              + f' {"e":>6} {"e_exact":>7} {"%v":>4} {"%v_ex":>5}')
    lines = ['model error the certificate covers (torque bound per kind [N m]):', header,
             '-' * len(header)]
    for row in rows:
        name = row['joint'] if len(row['joint']) <= width else row['joint'][:width - 1] + '~'
        lines.append(f'{name:<{width}} {_fmt(row["effort_limit"]):>6} '
                     + ' '.join(f'{_fmt(row[k]):>6}' for k in MODEL_ERROR_KINDS)
                     + f' {_fmt(row["authority"]):>6} {_fmt(row["authority_without"]):>7}'
                     f' {row["velocity_percent"]:>3.0f}% {row["velocity_percent_without"]:>4.0f}%')
    lines += textwrap.wrap(
        'payld: payload not told; com: centres of mass; drive: driver torque error; noise: '
        'velocity noise through the disturbance observer. e / e_exact: authority [rad/s^2] '
        'with the declared uncertainty and for an arm that matched its model exactly; '
        '%v / %v_ex: the velocity bound either would certify (before the sampled-data '
        'margin). The uncertainty set comes from the limits file (docs/limits-file.md).',
        TABLE_WIDTH)
    return '\n'.join(lines)


# ---------------------------------------------------------------------- plots
def _file_stem(index: int, name: str) -> str:
    return f'joint{index + 1}_' + re.sub(r'[^A-Za-z0-9_.-]', '_', name)


def plot_file_names(outcome: CertificationOutcome) -> dict[str, list[str]]:
    """PNG names :func:`write_report` writes: ``{'ratio': [...], 'safe_set': [...],
    'summary': [...]}``, per joint in joint order."""
    names = outcome.certificate.joint_names
    return {
        'ratio': [_file_stem(i, name) + '_ratio.png' for i, name in enumerate(names)],
        'safe_set': [_file_stem(i, name) + '_safe_set.png' for i, name in enumerate(names)],
        'summary': [SUMMARY_PLOT],
    }


def _new_figure(width: float = 6.4, height: float = 4.6, left: float = 0.11,
                right: float = 0.9) -> Any:
    from matplotlib.backends.backend_agg import FigureCanvasAgg
    from matplotlib.figure import Figure

    # Fixed margins: a layout engine would cost more than drawing the plot.
    figure = Figure(figsize=(width, height), dpi=110)
    figure.subplots_adjust(left=left, right=right, bottom=0.12, top=0.92)
    FigureCanvasAgg(figure)
    return figure


def _slice_edges(cert: Any, i: int, q: np.ndarray, lower: float, upper: float
                 ) -> tuple[np.ndarray, np.ndarray]:
    """Velocity edges of joint i's slice of S at positions q: (low, high), on bn = 0 and
    bp = 0, or on the velocity bound where S keeps it by velocity barriers."""
    gamma = float(cert.gamma[i])
    low, high = -gamma * cert.alpha1.value(q - lower), gamma * cert.alpha1.value(upper - q)
    bound = _speed_bound(cert, i)
    if bound is not None:
        low, high = np.maximum(low, -bound), np.minimum(high, bound)
    return low, high


def _no_gains(axes: Any) -> None:
    axes.text(0.5, 0.5, 'no gains were certified for this joint:\nsee the reasons in the report',
              ha='center', va='center', transform=axes.transAxes, fontsize=11,
              color='#a01010')


def _plot_ratio(outcome: CertificationOutcome, model: RobotModel, i: int, path: Path) -> None:
    cert = outcome.certificate
    name = cert.joint_names[i]
    lower, upper = float(model.position_lower[i]), float(model.position_upper[i])
    r = upper - lower
    gamma = float(cert.gamma[i])
    margin = float(cert.sampling_margin[i])
    usable = float(cert.authority[i]) - margin
    figure = _new_figure()
    axes = figure.add_subplot()
    axes.set_xlabel(f'position q of {name} [rad or m]')
    axes.set_ylabel('velocity v [rad/s or m/s]')
    axes.set_title(f'{name}: psi / alpha2(b) over the safe set (max = beta*)', fontsize=10)
    if gamma <= 0.0 or usable <= 0.0:
        axes.set_xlim(lower, upper)
        _no_gains(axes)
        figure.savefig(path)
        return
    top = _envelope(cert, i, r)
    bound = _speed_bound(cert, i)
    speed = {} if bound is None else {'speed_bound': bound,
                                      'speed_beta': float(cert.velocity_beta[i])}
    qs = np.linspace(lower, upper, 321)
    vs = np.linspace(-top, top, 301)
    qq, vv = np.meshgrid(qs, vs)
    hp = upper - qq
    edge_lo, edge_hi = _slice_edges(cert, i, qq, lower, upper)
    with np.errstate(divide='ignore', invalid='ignore'):
        t = (vv - edge_lo) / (edge_hi - edge_lo)
    inside = (t >= 0.0) & (t <= 1.0) & np.isfinite(t)
    ratio = slice_ratio(hp, np.clip(np.nan_to_num(t), 0.0, 1.0), r, usable, gamma, margin,
                         cert.alpha1, cert.alpha2, **speed)
    shown = inside & np.isfinite(ratio)
    values = ratio[shown]
    b_star, best_x, best_t = beta_star(r, usable, gamma, margin, cert.alpha1, cert.alpha2,
                                       **speed)
    high = max(float(np.max(values)) if values.size else 0.0, b_star)
    low = float(np.percentile(values, 5.0)) if values.size else high - 1.0
    if not low < high:
        low = high - 1.0
    masked = np.ma.masked_array(ratio, mask=~shown)
    mesh = axes.imshow(masked, cmap='viridis', vmin=low, vmax=high, origin='lower',
                       aspect='auto', interpolation='nearest',
                       extent=(lower, upper, -top, top))
    colorbar = figure.colorbar(mesh, ax=axes, fraction=0.06, pad=0.02)
    colorbar.set_label('psi / alpha2(b)  (clipped below at the 5th percentile)', fontsize=8)
    flat = bool(values.size) and float(np.ptp(values)) <= 1e-6 * max(1.0, abs(high))
    if flat:
        axes.text(0.03, 0.04, 'the ratio is the same at every state of S:\nbeta* is set by '
                  'keeping An + margin <= Ap - margin', transform=axes.transAxes, fontsize=8,
                  bbox={'facecolor': 'white', 'edgecolor': '#999999', 'alpha': 0.9})
    if values.size and np.min(values) < 0.0 < np.max(values):
        axes.contour(qs, vs, np.ma.masked_array(ratio, mask=~shown), levels=[0.0],
                     colors='white', linewidths=0.8, linestyles='dashed')
    edge_lo, edge_hi = _slice_edges(cert, i, qs, lower, upper)
    axes.plot(qs, edge_hi, color='black', linewidth=1.0)
    axes.plot(qs, edge_lo, color='black', linewidth=1.0)
    if np.isfinite(b_star) and flat:
        axes.plot([], [], ' ', label=f'beta* = {b_star:.4g} (certificate: '
                  f'{cert.beta_star[i]:.4g}), attained everywhere')
        axes.plot([], [], ' ', label=f'beta = {cert.beta[i]:.4g} used by the filter')
        axes.legend(loc='upper right', fontsize=8, framealpha=0.85)
    elif np.isfinite(b_star):
        q_best = upper - best_x
        low_best, high_best = _slice_edges(cert, i, np.array(q_best), lower, upper)
        v_best = float(low_best + best_t * (high_best - low_best))
        axes.plot([q_best], [v_best], marker='*', markersize=14, color='red',
                  markeredgecolor='black', linestyle='none',
                  label=f'beta* = {b_star:.4g} (certificate: {cert.beta_star[i]:.4g})')
        axes.plot([], [], ' ', label=f'beta = {cert.beta[i]:.4g} used by the filter')
        axes.legend(loc='upper right', fontsize=8, framealpha=0.85)
    axes.set_xlim(lower, upper)
    axes.set_ylim(-1.05 * top, 1.05 * top)
    figure.savefig(path)


def _plot_safe_set(outcome: CertificationOutcome, model: RobotModel, i: int, path: Path
                   ) -> None:
    cert = outcome.certificate
    name = cert.joint_names[i]
    lower, upper = float(model.position_lower[i]), float(model.position_upper[i])
    r = upper - lower
    rated = float(model.velocity_limit[i])
    gamma = float(cert.gamma[i])
    figure = _new_figure()
    axes = figure.add_subplot()
    axes.set_xlabel(f'position q of {name} [rad or m]')
    axes.set_ylabel('velocity v [rad/s or m/s]')
    axes.set_title(f'{name}: safe set S (shaded) in the (q, v) plane', fontsize=10)
    qs = np.linspace(lower, upper, 400)
    span = 1.15 * rated
    if gamma > 0.0:
        edge_lo, edge_hi = _slice_edges(cert, i, qs, lower, upper)
        axes.fill_between(qs, edge_lo, edge_hi, color='#8fbbe0', alpha=0.55, label='S')
        axes.plot(qs, edge_hi, color='#1f4e79', linewidth=1.5, label='bp = 0, bn = 0')
        axes.plot(qs, edge_lo, color='#1f4e79', linewidth=1.5)
        bound = _envelope(cert, i, r)
        axes.axhline(bound, color='#2a8a2a', linestyle=':', linewidth=1.8, zorder=4,
                     label=f'certified bound +-{bound:.3g}')
        axes.axhline(-bound, color='#2a8a2a', linestyle=':', linewidth=1.8, zorder=4)
        usable = max(float(cert.authority[i] - cert.sampling_margin[i]), 0.0)
        brake_hi = np.minimum(np.sqrt(2.0 * usable * (upper - qs)), rated)
        brake_lo = -np.minimum(np.sqrt(2.0 * usable * (qs - lower)), rated)
        axes.plot(qs, brake_hi, color='#7a3db8', linestyle='-.', linewidth=1.3,
                  label='braking curve at the usable authority')
        axes.plot(qs, brake_lo, color='#7a3db8', linestyle='-.', linewidth=1.3)
    else:
        _no_gains(axes)
    axes.axhline(rated, color='#c05000', linestyle='--', linewidth=1.2,
                 label=f'rated limit +-{rated:.3g}')
    axes.axhline(-rated, color='#c05000', linestyle='--', linewidth=1.2)
    axes.axvline(lower, color='black', linewidth=1.5, label='position limits')
    axes.axvline(upper, color='black', linewidth=1.5)
    worst = list(getattr(outcome.falsifier, 'worst_states', None) or [])
    if worst:
        q_w = np.array([float(s['q'][i]) for s in worst])
        v_w = np.array([float(s['v'][i]) for s in worst])
        slack = np.array([100.0 * float(s['slack']) for s in worst])
        points = axes.scatter(q_w, v_w, c=slack, cmap='autumn', s=28, edgecolors='black',
                              linewidths=0.5, zorder=5,
                              label=f'falsifier: {len(worst)} lowest-slack states')
        colorbar = figure.colorbar(points, ax=axes, fraction=0.06, pad=0.02)
        colorbar.set_label('falsifier slack [% of torque limits]', fontsize=8)
    margin_q = 0.04 * r
    axes.set_xlim(lower - margin_q, upper + margin_q)
    axes.set_ylim(-span, span)
    axes.legend(loc='best', fontsize=7, framealpha=0.85)
    figure.savefig(path)


def _plot_summary(outcome: CertificationOutcome, path: Path) -> None:
    cert = outcome.certificate
    n = cert.n_joints
    figure = _new_figure(max(5.0, 1.0 + 0.9 * n), 4.0, left=0.14, right=0.97)
    axes = figure.add_subplot()
    x = np.arange(n)
    authority = np.array(cert.authority)
    margin = np.array(cert.sampling_margin)
    axes.bar(x - 0.2, authority, width=0.4, color='#3a7dbf', label='authority e')
    axes.bar(x + 0.2, margin, width=0.4, color='#d9822b', label='sampled-data margin')
    values = np.concatenate([authority, margin])
    if np.all(values > 0.0) and values.max() / values.min() > 50.0:
        axes.set_yscale('log')
    axes.set_xticks(x, list(cert.joint_names), rotation=30 if n > 4 else 0, fontsize=8)
    axes.set_ylabel('acceleration [rad/s^2 or m/s^2]')
    axes.set_title('Acceleration authority and the part reserved for sampling', fontsize=10)
    if not np.any(values > 0.0):
        _no_gains(axes)
    axes.legend(fontsize=8)
    figure.savefig(path)


# ---------------------------------------------------------------------- files
def report_data(outcome: CertificationOutcome, model: RobotModel) -> dict[str, Any]:
    """The machine-readable report: certificate summary, per-joint rows, timings, falsifier."""
    falsifier = outcome.falsifier
    falsifier_summary = None
    if falsifier is not None:
        falsifier_summary = dict(falsifier.summary())
        falsifier_summary['worst_states'] = list(falsifier.worst_states)
    return json_ready({
        'robot': model.name,
        'verdict': 'certified' if outcome.certified else 'not certified',
        'certificate': outcome.certificate.summary(),
        'joints': joint_rows(outcome, model),
        'velocity_scale': outcome.velocity_scale,
        'authority_by_condition': outcome.authority_by_condition,
        'stage_seconds': outcome.stage_seconds,
        'falsifier': falsifier_summary,
    })


def write_report(outcome: CertificationOutcome, model: RobotModel, folder: str | Path
                 ) -> Path:
    """Write the report folder; returns the path of ``certificate_report.html``.

    The folder receives the HTML page, ``certificate_report.json`` and the PNG plots named
    by :func:`plot_file_names`. Existing files of the same names are replaced.
    """
    folder = Path(folder)
    folder.mkdir(parents=True, exist_ok=True)
    files = plot_file_names(outcome)
    for i in range(outcome.certificate.n_joints):
        _plot_ratio(outcome, model, i, folder / files['ratio'][i])
        _plot_safe_set(outcome, model, i, folder / files['safe_set'][i])
    _plot_summary(outcome, folder / SUMMARY_PLOT)
    data = report_data(outcome, model)
    (folder / REPORT_JSON).write_text(json.dumps(data, indent=2, allow_nan=False) + '\n',
                                      encoding='utf-8')
    page = folder / REPORT_HTML
    page.write_text(_html_page(outcome, model, files), encoding='utf-8')
    return page


_CSS = BASE_CSS + """
h3 { font-size: 1.05em; margin-top: 1.4em; }
.verdict { font-size: 1.3em; font-weight: bold; padding: 0.5em 1em; border-radius: 4px; }
.pass { background: #e3f4e3; color: #14601a; }
.fail { background: #fbe4e4; color: #8a1010; }
th { background: #f0f2f5; text-align: center; }
td.ok { color: #14601a; font-weight: bold; text-align: center; }
td.bad { color: #8a1010; font-weight: bold; text-align: center; }
table.facts td:first-child { font-weight: bold; background: #f7f7f9; }
figure { display: inline-block; margin: 0.5em 1em 1em 0; vertical-align: top;
         max-width: 46%; }
figure img { width: 100%; border: 1px solid #ddd; }
figure.wide { max-width: 60%; }
figcaption { font-size: 0.88em; color: #444; }
pre { background: #f7f7f9; padding: 0.8em; overflow-x: auto; font-size: 0.85em; }
code { font-size: 0.95em; }
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


def _facts(pairs: list[tuple[str, str]]) -> str:
    rows = ''.join(f'<tr><td>{html.escape(k)}</td><td>{html.escape(v)}</td></tr>'
                   for k, v in pairs)
    return f'<table class="facts">{rows}</table>'


def _html_page(outcome: CertificationOutcome, model: RobotModel,
               files: dict[str, list[str]]) -> str:
    cert = outcome.certificate
    rows = joint_rows(outcome, model)
    esc = html.escape
    verdict_class = 'pass' if outcome.certified else 'fail'
    verdict_text = (
        'CERTIFIED: the filter accepts these gains.' if outcome.certified else
        'NOT CERTIFIED: the certificate file is marked certified: false and the filter '
        'refuses it.')
    parts = [
        '<!DOCTYPE html>', '<html lang="en">', '<head>', '<meta charset="utf-8">',
        f'<title>safety_filter certificate: {esc(model.name)}</title>',
        f'<style>{_CSS}</style>', '</head>', '<body>',
        f'<h1>Certificate report: {esc(model.name)}</h1>',
        f'<p>This report shows how <code>safety-filter certify</code> chose per-joint barrier '
        f'gains (&gamma;, &beta;) for <b>{esc(model.name)}</b> ({model.n_joints} joints) so '
        'that the safety filter&rsquo;s QP has a solution at every state of the safe set S, '
        'and the evidence behind that choice.</p>',
        f'<p class="caution">{esc(SAFETY_NOTICE)}</p>',
        f'<p class="verdict {verdict_class}">{esc(verdict_text)}</p>',
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
    falsifier_text = _falsifier_line(outcome).split(': ', 1)[1]
    parts.append(_facts([
        ('verdict', _verdict(outcome)),
        ('condition', _CONDITION_TEXT.get(cert.condition, cert.condition)),
        ('velocity scale', _scale_line(outcome).split(': ', 1)[1]),
        ('falsifier', falsifier_text),
        ('stage timings', _seconds_line(outcome.stage_seconds).split(': ', 1)[1]),
    ] + ([('recovery', _recovery_line(cert).split(': ', 1)[1])] if cert.certified else [])
        + ([('dissipation', dissipation_line(cert).split(': ', 1)[1])]
           if dissipation_line(cert) else [])))
    designs = design_lines(cert, model)
    if designs:
        parts.append('<h2>Designs tried</h2>')
        parts.append('<p>Certification takes each barrier design it knows through the same '
                     'steps and keeps the one whose safe set is largest among those that '
                     'certify (docs/method.md, &ldquo;Which design, and how fast&rdquo;).</p>')
        parts.append('<ul>' + ''.join(f'<li>{esc(text)}</li>' for text in designs) + '</ul>')
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
            'limits, and the falsifier&rsquo;s lowest-slack states projected on this joint '
            '(colour: their slack).</figcaption></figure>')
    settings = cert.settings if isinstance(cert.settings, dict) else {}
    bounds = settings.get('bounds', {})
    certify_settings = settings.get('certify', {})
    parts.append('<h2>Provenance</h2>')
    parts.append(_facts([
        ('robot model hash', cert.model_hash),
        ('certificate id', cert.certificate_id),
        ('package version', cert.package_version),
        ('certified at', cert.created),
        ('report written at',
         _dt.datetime.now(_dt.timezone.utc).isoformat(timespec='seconds')),
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
    parts += ['</body>', '</html>']
    return '\n'.join(parts) + '\n'
