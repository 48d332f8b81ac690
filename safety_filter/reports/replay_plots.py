"""The replay report's PNG plots: joints, intervention, margins, solve times.

:func:`draw_plots` writes them next to the page (the page shows them where scripts do not
run, and in print). Matplotlib is imported only when plots are drawn, through
:func:`safety_filter.reports.html_kit.new_figure`.
"""

from __future__ import annotations

from collections.abc import Sequence
from pathlib import Path
from typing import Any

import numpy as np

from safety_filter.core.robot_model import RobotModel
from safety_filter.recordings.event_log import Event
from safety_filter.replay.open_loop import ReplayResult
from safety_filter.replay.trial import Trial
from safety_filter.reports.html_kit import new_figure
from safety_filter.reports.replay_report_data import (
    EVENT_PALETTE,
    MODE_COLOURS,
    RUN_COLOURS,
    CertificateRun,
    solve_histogram,
)

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


def _mark_events(axes: Any, events: Sequence[Event], start: float, label: bool) -> None:
    colours: dict[str, str] = {}
    for event in events:
        first = event.kind not in colours
        colour = colours.setdefault(event.kind, EVENT_PALETTE[len(colours) % len(EVENT_PALETTE)])
        axes.axvline(event.t - start, color=colour, linestyle=':', linewidth=1.1,
                     label=f'event: {event.kind}' if label and first else None)


def _shade_modes(axes: Any, result: ReplayResult, t: np.ndarray) -> None:
    labelled = set()
    for mode, colour in MODE_COLOURS.items():
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
    figure = new_figure(10.0, 1.9 * n + 0.8)
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
                          color=RUN_COLOURS[index % 2], linewidth=0.9,
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
                              color=RUN_COLOURS[index % 2], linestyle='--', linewidth=0.9,
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
    figure = new_figure(10.0, 3.4)
    axes = figure.add_subplot()
    for index, run in enumerate(runs):
        result = run.result
        t = trial.relative_time(result.time, result.stamp_ns)
        colour = RUN_COLOURS[index % 2]
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
    figure = new_figure(10.0, 3.4)
    axes = figure.add_subplot()
    styles = ('-', '--', '-.', ':')
    for index, run in enumerate(runs):
        result = run.result
        t = trial.relative_time(result.time, result.stamp_ns)
        colour = RUN_COLOURS[index % 2]
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
    figure = new_figure(6.4, 3.4)
    axes = figure.add_subplot()
    drawn = False
    for index, run in enumerate(runs):
        histogram = solve_histogram(run.result)
        if not histogram['counts']:
            continue
        edges = np.array(histogram['edges_us'])
        axes.stairs(histogram['counts'], edges, color=RUN_COLOURS[index % 2],
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


def draw_plots(folder: Path, trial: Trial, model: RobotModel,
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
