"""The demo report's PNG plots: joints against their limits for both runs, the barrier
values, the filter's modes and solve times. Matplotlib is imported only when plots are drawn
(:func:`safety_filter.reports.html_kit.new_figure`)."""

from __future__ import annotations

from collections.abc import Sequence
from pathlib import Path
from typing import Any

import numpy as np

from safety_filter.core.certificate import Certificate
from safety_filter.core.robot_model import RobotModel
from safety_filter.online.mode_codes import MODE_NAMES
from safety_filter.reports.demo_runs import RunData
from safety_filter.reports.html_kit import new_figure
from safety_filter.simulation.careless_operator import Segment

BEHAVIOUR_COLOURS = {'pd_beyond_limits': '#fde0c5', 'jerk': '#f8c9d4', 'slack': '#d9e8f5',
                     'sinusoid': '#dcefd5'}
MAX_PLOT_POINTS = 2000  # per line: a min/max envelope above this keeps every peak


def _envelope(count: int, values: np.ndarray) -> np.ndarray:
    """Indices of a min/max envelope of ``values`` (shape (count,)) with at most about
    :data:`MAX_PLOT_POINTS` points, in time order (all indices when short enough)."""
    if count <= MAX_PLOT_POINTS:
        return np.arange(count)
    size = int(np.ceil(2 * count / MAX_PLOT_POINTS))
    full = count // size * size
    blocks = np.nan_to_num(values[:full], nan=0.0).reshape(-1, size)
    base = np.arange(0, full, size)
    picks = np.concatenate([base + blocks.argmin(axis=1), base + blocks.argmax(axis=1),
                            np.arange(full, count)])
    return np.unique(picks)


def _shade_segments(axes: Any, segments: Sequence[Segment], offset_s: float,
                    end_s: float) -> None:
    for segment in segments:
        start = segment.start_s + offset_s
        if start >= end_s:
            break
        axes.axvspan(start, min(segment.end_s + offset_s, end_s),
                     color=BEHAVIOUR_COLOURS.get(segment.behaviour, '#eeeeee'), lw=0,
                     zorder=0)


def _joint_grid(model: RobotModel, runs: Sequence[RunData], title: str) -> tuple[Any, Any]:
    n = model.n_joints
    figure = new_figure(6.0 * len(runs) + 0.5, 1.55 * n + 1.1)
    axes = figure.subplots(n, len(runs), sharex='col', squeeze=False)
    figure.subplots_adjust(left=0.09, right=0.98, top=1.0 - 0.55 / (1.55 * n + 1.1),
                           bottom=0.45 / (1.55 * n + 1.1), hspace=0.25, wspace=0.18)
    figure.suptitle(title, fontsize=11)
    for column, run in enumerate(runs):
        axes[0, column].set_title(f'{run.label} run', fontsize=10)
        axes[n - 1, column].set_xlabel('simulated time [s]')
    return figure, axes


def plot_limited(model: RobotModel, runs: Sequence[RunData], schedule: Sequence[Segment],
                  offsets: Sequence[float], path: Path, quantity: str,
                  certificate: Certificate) -> None:
    """positions or velocities with their limits, one row per joint, one column per run."""
    unit = 'rad' if quantity == 'position' else 'rad/s'
    plural = 'positions' if quantity == 'position' else 'velocities'
    figure, axes = _joint_grid(model, runs, f'Joint {plural} against their limits '
                               "(red dashed; shaded: the operator's behaviour)")
    for column, (run, offset) in enumerate(zip(runs, offsets)):
        end = float(run.time_s[-1]) if run.time_s.size else 1.0
        for i, joint in enumerate(model.joint_names):
            ax = axes[i, column]
            _shade_segments(ax, schedule, offset, end)
            values = run.q[:, i] if quantity == 'position' else run.v[:, i]
            if quantity == 'position':
                low, high = model.position_lower[i], model.position_upper[i]
            else:
                high = model.velocity_limit[i]
                low = -high
                bound = certificate.velocity_bound[i]
                if bound < high:
                    ax.axhline(bound, color='#2a8a2a', ls=':', lw=0.9)
                    ax.axhline(-bound, color='#2a8a2a', ls=':', lw=0.9)
            ax.axhline(high, color='#c01010', ls='--', lw=1.0)
            ax.axhline(low, color='#c01010', ls='--', lw=1.0)
            over = (values > high) | (values < low)
            keep = _envelope(values.size, values)
            ax.plot(run.time_s[keep], values[keep], color='#1f4e9a', lw=0.9)
            if over.any():
                ax.plot(run.time_s[keep], np.where(over[keep], values[keep], np.nan),
                        color='#e01010', lw=1.8)
            span = high - low
            ax.set_ylim(min(low - 0.15 * span, np.nanmin(values, initial=low)),
                        max(high + 0.15 * span, np.nanmax(values, initial=high)))
            ax.set_xlim(0.0, end)
            if column == 0:
                ax.set_ylabel(f'{joint}\n[{unit}]', fontsize=8)
            ax.tick_params(labelsize=7)
    figure.savefig(path)


def plot_torques(model: RobotModel, runs: Sequence[RunData], schedule: Sequence[Segment],
                  offsets: Sequence[float], path: Path) -> None:
    figure, axes = _joint_grid(model, runs, 'Torques: sent to the driver (blue), the '
                               "operator's nominal (grey), applied after the driver's "
                               'clipping (orange); limits red dashed')
    for column, (run, offset) in enumerate(zip(runs, offsets)):
        end = float(run.time_s[-1]) if run.time_s.size else 1.0
        for i, joint in enumerate(model.joint_names):
            ax = axes[i, column]
            _shade_segments(ax, schedule, offset, end)
            limit = model.effort_limit[i]
            if run.nominal.shape[0]:
                ax.plot(run.nominal_time_s, run.nominal[:, i], color='#9a9a9a', lw=0.9,
                        drawstyle='steps-post')
            keep = _envelope(run.time_s.size, run.effort[:, i])
            ax.plot(run.time_s[keep], run.effort[keep, i], color='#f08c1a', lw=0.8)
            if run.command.shape[0]:
                keep = _envelope(run.command_time_s.size, run.command[:, i])
                ax.plot(run.command_time_s[keep], run.command[keep, i], color='#1f4e9a',
                        lw=1.1, drawstyle='steps-post')
            ax.axhline(limit, color='#c01010', ls='--', lw=1.0)
            ax.axhline(-limit, color='#c01010', ls='--', lw=1.0)
            peak = max(limit, float(np.max(np.abs(run.nominal[:, i]), initial=0.0)),
                       float(np.max(np.abs(run.command[:, i]), initial=0.0)))
            ax.set_ylim(-1.1 * peak, 1.1 * peak)
            ax.set_xlim(0.0, end)
            if column == 0:
                ax.set_ylabel(f'{joint}\n[N m]', fontsize=8)
            ax.tick_params(labelsize=7)
    figure.savefig(path)


def plot_margins(model: RobotModel, runs: Sequence[RunData], margins: Sequence[np.ndarray],
                  path: Path) -> None:
    figure = new_figure(6.0 * len(runs) + 0.5, 4.2)
    axes = figure.subplots(1, len(runs), squeeze=False, sharey=True)[0]
    figure.subplots_adjust(left=0.08, right=0.98, top=0.86, bottom=0.14, wspace=0.08)
    figure.suptitle("Smallest barrier value per joint (the certificate's hp, hn, bp, bn); "
                    'below zero: outside the safe set S', fontsize=11)
    colours = [f'C{i}' for i in range(model.n_joints)]
    low = min(float(np.nanmin(m, initial=0.0)) for m in margins)
    high = max(float(np.nanmax(m, initial=1.0)) for m in margins)
    for ax, run, margin in zip(axes, runs, margins):
        for i, joint in enumerate(model.joint_names):
            keep = _envelope(run.time_s.size, margin[:, i])
            ax.plot(run.time_s[keep], margin[keep, i], color=colours[i], lw=0.9, label=joint)
        ax.axhline(0.0, color='#c01010', lw=1.0)
        ax.set_yscale('symlog', linthresh=0.05)
        ax.set_ylim(min(low * 1.2, -0.1), high * 1.2)
        ax.set_title(f'{run.label} run', fontsize=10)
        ax.set_xlabel('simulated time [s]')
        ax.set_xlim(0.0, float(run.time_s[-1]) if run.time_s.size else 1.0)
    axes[0].set_ylabel('barrier value [rad or rad/s] (symlog)')
    axes[-1].legend(fontsize=7, loc='upper right', ncol=2)
    figure.savefig(path)


def plot_modes(run: RunData, path: Path) -> None:
    figure = new_figure(9.0, 4.4)
    top, bottom = figure.subplots(2, 1, sharex=True)
    figure.subplots_adjust(left=0.12, right=0.97, top=0.9, bottom=0.12, hspace=0.15)
    figure.suptitle('Filter mode and intervention over time (filtered run)', fontsize=11)
    status = run.status
    if status:
        time = status['time_s']
        keep = _envelope(time.size, status['mode'])
        top.plot(time[keep], status['mode'][keep], drawstyle='steps-post', color='#1f4e9a',
                 lw=1.0)
        keep = _envelope(time.size, status['intervention'])
        bottom.plot(time[keep], status['intervention'][keep], color='#7a2a9a', lw=0.7)
        held = status.get('hold_nominal')
        if held is not None and np.any(held > 0):
            top.fill_between(time, -0.4, 4.4, where=held > 0, color='#f5d0d0', step='post',
                             label='nominal stale: hold-still nominal')
            top.legend(fontsize=7, loc='upper right')
        bottom.set_xlim(0.0, float(time[-1]))
    else:
        top.text(0.5, 0.5, 'no status recorded', ha='center', transform=top.transAxes)
    top.set_yticks(range(len(MODE_NAMES)), MODE_NAMES, fontsize=8)
    top.set_ylim(-0.4, len(MODE_NAMES) - 0.6)
    top.set_ylabel('mode')
    bottom.set_ylabel('|u* - u_nom| [N m]')
    bottom.set_xlabel('simulated time [s]')
    figure.savefig(path)


def plot_solve_times(run: RunData, path: Path) -> None:
    figure = new_figure(9.0, 3.8)
    left, right = figure.subplots(1, 2, gridspec_kw={'width_ratios': (2.2, 1.0)})
    figure.subplots_adjust(left=0.09, right=0.97, top=0.86, bottom=0.15, wspace=0.25)
    figure.suptitle('QP solve time per filter step (steps that solved a QP; log scales)',
                    fontsize=11)
    status = run.status
    times = status.get('solve_time_s', np.zeros(0)) * 1e6
    solved = times > 0.0
    if solved.any():
        left.plot(status['time_s'][solved], times[solved], '.', ms=1.5, color='#1f4e9a')
        left.set_yscale('log')
        low, high = float(times[solved].min()), float(times[solved].max())
        right.hist(times[solved], bins=np.geomspace(low, max(high, 1.01 * low), 50),
                   color='#1f4e9a')
        right.set_xscale('log')
        for q, style in ((50, '-'), (99, '--')):
            value = float(np.percentile(times[solved], q))
            right.axvline(value, color='#c01010', ls=style, lw=1.0, label=f'p{q} {value:.0f} us')
        right.legend(fontsize=7)
    else:
        left.text(0.5, 0.5, 'no QP solved (the nominal was always feasible)', ha='center',
                  transform=left.transAxes)
    left.set_xlabel('simulated time [s]')
    left.set_ylabel('solve time [us]')
    right.set_xlabel('solve time [us]')
    right.set_ylabel('steps')
    figure.savefig(path)
