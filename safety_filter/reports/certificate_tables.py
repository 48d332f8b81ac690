"""What a certification found, per joint and in words: the rows and lines of its report.

:func:`joint_rows` (per joint: authority, margin, gains, velocity bounds, verdict),
:func:`model_error_rows` (the torque bound per kind of model error), and the text the
terminal and the page show: :func:`format_joint_table`, :func:`format_model_error_table`,
:func:`design_lines`, :func:`dissipation_line` and the one-line facts (verdict, velocity
scale, falsifier, stage timings, recovery).
"""

from __future__ import annotations

import math
import textwrap
from dataclasses import replace
from typing import Any

import numpy as np

from safety_filter.certification.certify import CertificationOutcome
from safety_filter.core.barriers import braking_set_area, safe_set_area
from safety_filter.core.class_k import BRAKING_FAMILIES
from safety_filter.core.robot_model import RobotModel

TABLE_WIDTH = 100
CONDITION_TEXT = {
    'acceleration_authority': 'acceleration authority (row sums of M, docs/method.md)',
    'torque_coupling': 'torque coupling (rows of M^-1, docs/method.md)',
}


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
        velocity = velocity_envelope(cert, i, r)
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


def speed_bound(cert: Any, i: int) -> float | None:
    """Joint i's velocity bound when S keeps it by velocity barriers, else None."""
    return float(cert.velocity_bound[i]) if float(cert.velocity_beta[i]) > 0.0 else None


def velocity_envelope(cert: Any, i: int, r: float) -> float:
    """The fastest speed in joint i's slice of S: ``gamma alpha1(r)``, within the velocity
    bound when S keeps it by velocity barriers."""
    reach = float(cert.gamma[i]) * float(cert.alpha1.value(r))
    bound = speed_bound(cert, i)
    return reach if bound is None else min(reach, bound)


def _braking_percent(cert: Any, i: int, r: float, usable: float, rated: float) -> float:
    """Area of S over the braking set at the usable authority, in per cent (0 without
    gains)."""
    braking = braking_set_area(r, usable, rated)
    if braking <= 0.0 or float(cert.gamma[i]) <= 0.0:
        return 0.0
    area = safe_set_area(r, float(cert.gamma[i]), cert.alpha1, speed_bound(cert, i))
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


def seconds_line(stage_seconds: dict[str, float]) -> str:
    """The seconds each certification stage took, as one line."""
    parts = [f'{stage} {seconds:.2f} s' for stage, seconds in stage_seconds.items()]
    total = sum(stage_seconds.values())
    return 'stages: ' + ', '.join(parts) + f' (total {total:.1f} s)'


def falsifier_line(outcome: CertificationOutcome) -> str:
    """The falsifier's finding, as one line."""
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


def recovery_line(cert: Any) -> str:
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


def delay_line(cert: Any) -> str:
    """How the certificate covers the driver's delay (docs/method.md, "Delay")."""
    if cert.prediction_s:
        return (f'delay: {1000 * cert.prediction_s:g} ms, predicted (--delay fixed): the filter '
                'plans each torque for the state at the end of the declared delay and the '
                'margin covers one hold from there; it asks that delay of the driver and is '
                'less robust to velocity noise than a delay covered as an upper bound: check '
                'it with `safety-filter stress` before hardware')
    periods = dict(cert.settings.get('certify') or {}).get('delay_periods')
    if not periods:
        return 'delay: none declared'
    return (f'delay: up to {1000 * periods / cert.control_rate_hz:g} ms, covered as part of '
            'the hold (the filter plans at the measured state)')


def verdict_text(outcome: CertificationOutcome) -> str:
    """The verdict in words."""
    return 'CERTIFIED' if outcome.certified else 'NOT CERTIFIED'


def scale_line(outcome: CertificationOutcome) -> str:
    """The velocity scale chosen, as one line."""
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
        if entry.get('alpha1_scale') is not None and family in BRAKING_FAMILIES:
            family += f' (eps {entry["alpha1_scale"]:.3g})'
        if entry.get('mean_over_hold'):
            family += ', mean acceleration over the hold'
        if entry.get('lookahead'):
            family += ', planned half the hold ahead'
        envelope = entry.get('envelope_fraction') or []
        speeds = ', '.join(f'{100 * x:.0f}' for x in envelope)
        lines.append(f'{family}: {entry.get("outcome", "?")}'
                     + (f'; envelope % of rated: {speeds}' if speeds else ''))
    slow = getattr(certificate, 'slow_design', None)
    if slow is not None:
        share = np.asarray(slow.velocity_bound) / np.asarray(slow.velocity_limit)
        lines.append(f'slow design (velocity boxes up to {100 * share.max():.0f} % of rated): '
                     'kept; the safe set is the union of the two (its table below)')
    lines += [note for note in settings.get('notes') or []
              if note.startswith('slow design left out')]
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
    lines.append(f'verdict: {verdict_text(outcome)}')
    lines.append('condition: ' + CONDITION_TEXT.get(cert.condition, cert.condition))
    lines.append(f'alpha1: {cert.alpha1.kind} (scale {cert.alpha1.scale:g}), alpha2: '
                 f'{cert.alpha2.kind} (scale {cert.alpha2.scale:g}), control rate '
                 f'{cert.control_rate_hz:g} Hz')
    lines.append(scale_line(outcome))
    lines += textwrap.wrap(delay_line(cert), TABLE_WIDTH, subsequent_indent='  ')
    lines += textwrap.wrap(falsifier_line(outcome), TABLE_WIDTH,
                           subsequent_indent='  ')
    lines += textwrap.wrap(recovery_line(cert), TABLE_WIDTH, subsequent_indent='  ')
    lines += textwrap.wrap(dissipation_line(cert), TABLE_WIDTH, subsequent_indent='  ')
    lines += textwrap.wrap(seconds_line(outcome.stage_seconds), TABLE_WIDTH,
                           subsequent_indent='  ')
    designs = design_lines(cert, model)
    if designs:
        lines += ['', 'designs tried (the largest safe set that certifies is kept):']
        for text in designs:
            lines += textwrap.wrap(text, TABLE_WIDTH, initial_indent='  ',
                                   subsequent_indent='    ')
    slow = format_slow_design_table(outcome, model)
    if slow:
        lines += ['', slow]
    model_error = format_model_error_table(cert, model)
    if model_error:
        lines += ['', model_error]
    if not outcome.certified and cert.reasons:
        lines.append('why not certified:')
        for k, reason in enumerate(cert.reasons, start=1):
            lines += textwrap.wrap(reason, TABLE_WIDTH, initial_indent=f'  {k}. ',
                                   subsequent_indent=' ' * (len(str(k)) + 4))
    return '\n'.join(lines)


def slow_design_rows(outcome: CertificationOutcome, model: RobotModel) -> list[dict[str, Any]]:
    """Per joint, the slow design's numbers (empty without one): ``joint``, ``authority``,
    ``sampling_margin``, ``usable_authority``, ``gamma``, ``certified_velocity``,
    ``velocity_percent``, ``braking_percent`` (its own S over the braking set at its usable
    authority), ``union_growth_percent`` (how much larger the union of the two sets is than
    the main design's set) and ``union_braking_percent`` (the union over the braking set at
    the larger of the two usable authorities)."""
    cert = outcome.certificate
    slow = cert.slow_design
    if slow is None:
        return []
    own = joint_rows(replace(outcome, certificate=slow), model)
    main = joint_rows(outcome, model)
    union = cert.slice_areas()
    alone = replace(cert, slow_design=None).slice_areas()  # the same grid as the union's
    rows = []
    for i, row in enumerate(own):
        r = float(model.position_upper[i] - model.position_lower[i])
        usable = max(row['usable_authority'], main[i]['usable_authority'])
        braking = braking_set_area(r, usable, row['rated_velocity'])
        rows.append({key: row[key] for key in (
            'joint', 'authority', 'sampling_margin', 'usable_authority', 'gamma',
            'certified_velocity', 'velocity_percent', 'braking_percent')} | {
            'union_growth_percent': (100.0 * (union[i] / alone[i] - 1.0) if alone[i] > 0
                                     else 0.0),
            'union_braking_percent': 100.0 * union[i] / braking if braking > 0 else 0.0})
    return rows


def format_slow_design_table(outcome: CertificationOutcome, model: RobotModel) -> str:
    """The slow design as plain text (empty without one): per joint its authority,
    margin, gamma, certified velocity, its own %brk, and what the union adds."""
    rows = slow_design_rows(outcome, model)
    if not rows:
        return ''
    slow = outcome.certificate.slow_design
    share = np.asarray(slow.velocity_bound) / np.asarray(slow.velocity_limit)
    width = min(max([5] + [len(row['joint']) for row in rows]), 20)
    header = (f'{"joint":<{width}} {"e":>6} {"margin":>6} {"gamma":>6} {"v_cert":>6} '
              f'{"%rat":>4} {"%brk":>4} {"S+":>5} {"%brkU":>5}')
    lines = textwrap.wrap(f'slow design (velocity boxes up to {100 * share.max():.0f} % of '
                          'the rated speeds): the safe set S is the union of its set and the '
                          'main one', TABLE_WIDTH) + [header, '-' * len(header)]
    for row in rows:
        name = row['joint'] if len(row['joint']) <= width else row['joint'][:width - 1] + '~'
        lines.append(
            f'{name:<{width}} {_fmt(row["authority"]):>6} {_fmt(row["sampling_margin"]):>6} '
            f'{_fmt(row["gamma"]):>6} {_fmt(row["certified_velocity"]):>6} '
            f'{row["velocity_percent"]:>3.0f}% {row["braking_percent"]:>3.0f}% '
            f'{row["union_growth_percent"]:>4.0f}% {row["union_braking_percent"]:>4.0f}%')
    lines.append('-' * len(header))
    falsifier = slow.falsifier or {}
    lines += textwrap.wrap(
        'S+: how much larger the union is than the main set, per joint; %brkU: the union '
        'over the braking set at the larger usable authority of the two designs. Falsifier '
        f'on the slow design: {falsifier.get("states", 0)} states, '
        f'{falsifier.get("infeasible", "?")} infeasible.', TABLE_WIDTH)
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
