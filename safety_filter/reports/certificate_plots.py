"""The certificate report's PNG plots: per joint the ratio psi / alpha2(b) over its slice
of S and the safe set in the (q, v) plane; the authority against the sampled-data margin.

Matplotlib is imported only when plots are drawn
(:func:`safety_filter.reports.html_kit.new_figure`).
"""

from __future__ import annotations

import re
from pathlib import Path
from typing import Any

import numpy as np

from safety_filter.certification.certify import CertificationOutcome
from safety_filter.certification.design_formulas import beta_star, slice_ratio
from safety_filter.core.robot_model import RobotModel
from safety_filter.reports.certificate_tables import speed_bound, velocity_envelope
from safety_filter.reports.html_kit import new_figure

SUMMARY_PLOT = 'authority_margin.png'


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
    # Fixed margins: a layout engine would cost more than drawing the plot.
    figure = new_figure(width, height, dpi=110)
    figure.subplots_adjust(left=left, right=right, bottom=0.12, top=0.92)
    return figure


def _slice_edges(cert: Any, i: int, q: np.ndarray, lower: float, upper: float
                 ) -> tuple[np.ndarray, np.ndarray]:
    """Velocity edges of joint i's slice of S at positions q: (low, high), on bn = 0 and
    bp = 0, or on the velocity bound where S keeps it by velocity barriers."""
    gamma = float(cert.gamma[i])
    low, high = -gamma * cert.alpha1.value(q - lower), gamma * cert.alpha1.value(upper - q)
    bound = speed_bound(cert, i)
    if bound is not None:
        low, high = np.maximum(low, -bound), np.minimum(high, bound)
    return low, high


def _no_gains(axes: Any) -> None:
    axes.text(0.5, 0.5, 'no gains were certified for this joint:\nsee the reasons in the report',
              ha='center', va='center', transform=axes.transAxes, fontsize=11,
              color='#a01010')


def plot_ratio(outcome: CertificationOutcome, model: RobotModel, i: int, path: Path) -> None:
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
    top = velocity_envelope(cert, i, r)
    bound = speed_bound(cert, i)
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


def plot_safe_set(outcome: CertificationOutcome, model: RobotModel, i: int, path: Path
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
        bound = velocity_envelope(cert, i, r)
        axes.axhline(bound, color='#2a8a2a', linestyle=':', linewidth=1.8, zorder=4,
                     label=f'certified bound +-{bound:.3g}')
        axes.axhline(-bound, color='#2a8a2a', linestyle=':', linewidth=1.8, zorder=4)
        usable = max(float(cert.authority[i] - cert.sampling_margin[i]), 0.0)
        brake_hi = np.minimum(np.sqrt(2.0 * usable * (upper - qs)), rated)
        brake_lo = -np.minimum(np.sqrt(2.0 * usable * (qs - lower)), rated)
        axes.plot(qs, brake_hi, color='#7a3db8', linestyle='-.', linewidth=1.3,
                  label='braking curve at the usable authority')
        axes.plot(qs, brake_lo, color='#7a3db8', linestyle='-.', linewidth=1.3)
        slow = cert.slow_design
        if slow is not None:  # S is the union of the two designs' sets
            positions = np.tile(np.asarray(cert.position_lower, dtype=float), (len(qs), 1))
            positions[:, i] = qs  # (each joint's slice depends on its own position only)
            slow_lo, slow_hi = slow.safe_velocity_interval(positions)
            slow_lo, slow_hi = slow_lo[:, i], slow_hi[:, i]
            axes.fill_between(qs, slow_lo, slow_hi, color='#8fbbe0', alpha=0.55)
            axes.plot(qs, slow_hi, color='#1f4e79', linewidth=1.2, linestyle='--',
                      label="edge of the slow design's set")
            axes.plot(qs, slow_lo, color='#1f4e79', linewidth=1.2, linestyle='--')
            slow_usable = max(float(slow.authority[i] - slow.sampling_margin[i]), 0.0)
            axes.plot(qs, np.minimum(np.sqrt(2.0 * slow_usable * (upper - qs)), rated),
                      color='#b83d7a', linestyle='-.', linewidth=1.1,
                      label='braking curve at its usable authority')
            axes.plot(qs, -np.minimum(np.sqrt(2.0 * slow_usable * (qs - lower)), rated),
                      color='#b83d7a', linestyle='-.', linewidth=1.1)
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


def plot_summary(outcome: CertificationOutcome, path: Path) -> None:
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
