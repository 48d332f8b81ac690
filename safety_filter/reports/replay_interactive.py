"""The replay report's zoomable time plots: their data, inline in the page.

The page's time plots zoom and pan in the browser (``report_assets/time_plots.js``, drawn
with the vendored uPlot); :func:`interactive_plot_data` gives their data (format
:data:`PLOTS_FORMAT`), which :mod:`safety_filter.reports.replay_page` puts in the page.
"""

from __future__ import annotations

import base64
import math
from collections.abc import Sequence
from dataclasses import dataclass, field
from typing import Any

import numpy as np

from safety_filter.core.robot_model import RobotModel
from safety_filter.recordings.event_log import Event
from safety_filter.replay.trial import Trial
from safety_filter.reports.replay_report_data import (
    EVENT_PALETTE,
    MODE_COLOURS,
    RUN_COLOURS,
    CertificateRun,
)

# The page's time plots zoom and pan in the browser (report_assets/time_plots.js, drawn
# with the vendored uPlot). Their data travels inline in the page, base64-encoded binary:
# times as float64, values as float32 (seven significant digits, plenty for a plot; half
# the size). Up to INTERACTIVE_FULL_SAMPLES samples per time axis the page holds every
# sample; a longer trial keeps, per bucket of INTERACTIVE_BUCKETS, each series' smallest and
# largest value (so no spike is lost) plus every sample within MOMENT_WINDOW_S of the
# moments listed in the tables, so those can be zoomed into at full resolution.
INTERACTIVE_FULL_SAMPLES = 60_000
INTERACTIVE_BUCKETS = 5_000
MOMENT_WINDOW_S = 0.25
MOMENT_ZOOM_S = 0.05  # the moments tables' buttons show this much time around a moment
MIN_VIEW_S = 1e-3  # the narrowest window the plots zoom to
PLOTS_FORMAT = 'safety_filter/replay-plots-1'
_GAP_FACTOR = 5.0  # a step longer than this many median steps is an input gap: the line
                   # breaks there rather than bridging it (as in the PNGs)


@dataclass
class _Line:
    """One series of a chart: values ``y`` at times ``t`` [s from the trial start], or a
    constant ``y`` over the whole chart when ``t`` is None."""

    label: str
    t: np.ndarray | None
    y: np.ndarray | float
    colour: str
    width: float = 1.0
    dash: tuple[float, ...] = ()


@dataclass
class _Chart:
    title: str
    y_label: str
    lines: list[_Line]
    height: int = 170
    bands: list[tuple[float, float, str]] = field(default_factory=list)
    marks: list[dict[str, Any]] = field(default_factory=list)


def _encode(values: np.ndarray, dtype: str) -> str:
    return base64.b64encode(np.ascontiguousarray(values, dtype=dtype).tobytes()).decode('ascii')


def _gap_breaks(t: np.ndarray) -> np.ndarray:
    """Times in the middle of the input gaps of ``t`` (steps longer than ``_GAP_FACTOR``
    median steps)."""
    if len(t) < 3:
        return np.zeros(0)
    step = np.diff(t)
    jumps = np.flatnonzero(step > _GAP_FACTOR * max(float(np.median(step)), 1e-9))
    return t[jumps] + 0.5 * step[jumps]


def _bucket_extremes(values: np.ndarray, buckets: int) -> np.ndarray:
    """Indices of the smallest and largest finite value in each of ``buckets`` equal runs."""
    count = len(values)
    size = int(np.ceil(count / buckets))
    padded = np.full(size * buckets, np.nan)
    padded[:count] = values
    rows = padded.reshape(buckets, size)
    finite = np.isfinite(rows)
    has = finite.any(axis=1)
    low = np.argmin(np.where(finite, rows, np.inf), axis=1)
    high = np.argmax(np.where(finite, rows, -np.inf), axis=1)
    offsets = np.arange(buckets) * size
    picked = np.concatenate([(offsets + low)[has], (offsets + high)[has]])
    return picked[picked < count]


def _time_axis(lines: Sequence[_Line], moments: Sequence[float]
               ) -> tuple[np.ndarray, list[np.ndarray], bool]:
    """The shared time axis of ``lines`` (their times, joined) and each line's values on it.

    A line's values are NaN where it breaks (its input gaps) and +inf where it has no
    sample because another line does (the page draws across those). Returns the axis, the
    values (None for constant lines) and whether the axis was thinned.
    """
    own = {}
    for line in lines:
        if line.t is not None and id(line.t) not in own:
            own[id(line.t)] = (line.t, _gap_breaks(line.t))
    if not own:
        return np.zeros(0), [], False
    axis = np.unique(np.concatenate([np.concatenate([t, b]) for t, b in own.values()]))
    columns = []
    for line in lines:
        if line.t is None:
            columns.append(None)
            continue
        t, breaks = own[id(line.t)]
        column = np.full(len(axis), np.inf)
        column[np.searchsorted(axis, t)] = np.where(np.isfinite(line.y), line.y, np.nan)
        column[np.searchsorted(axis, breaks)] = np.nan
        columns.append(column)
    thinned = len(axis) > INTERACTIVE_FULL_SAMPLES
    if thinned:
        keep = np.zeros(len(axis), dtype=bool)
        keep[[0, -1]] = True
        for column in columns:
            if column is not None:
                keep[_bucket_extremes(np.where(np.isinf(column), np.nan, column),
                                      INTERACTIVE_BUCKETS)] = True
                keep |= np.isnan(column)  # the breaks stay breaks
        for moment in moments:
            keep |= np.abs(axis - moment) <= MOMENT_WINDOW_S
        axis = axis[keep]
        columns = [None if c is None else c[keep] for c in columns]
    return axis, columns, thinned


def _episodes(mask: np.ndarray) -> list[tuple[int, int]]:
    edges = np.diff(np.concatenate([[0], mask.astype(int), [0]]))
    return list(zip(np.flatnonzero(edges == 1), np.flatnonzero(edges == -1) - 1))


def _time_charts(trial: Trial, model: RobotModel, runs: Sequence[CertificateRun]
                 ) -> list[tuple[str, list[_Chart]]]:
    """The charts of each time figure, the same content as the PNG of that name."""
    names = list(model.joint_names)
    start = trial.start_time
    t_state = trial.relative_time(trial.state_time, trial.state_stamp_ns)
    t_runs = []
    for run in runs:  # runs replaying the same steps share one time array (one axis)
        t = trial.relative_time(run.result.time, run.result.stamp_ns)
        same = next((u for u in t_runs if len(u) == len(t) and np.array_equal(u, t)), None)
        t_runs.append(same if same is not None else t)
    t_closed = [None if run.closed is None else run.closed.time - start for run in runs]
    first = runs[0].result
    figures: list[tuple[str, list[_Chart]]] = []
    for quantity, unit in (('position', 'rad'), ('velocity', 'rad/s'), ('torque', 'N m')):
        charts = []
        for i, name in enumerate(names):
            lines: list[_Line] = []
            if quantity == 'position':
                lines.append(_Line('recorded', t_state, trial.q[:, i], '#1f5fa8'))
                lines.append(_Line('lower limit', None, float(model.position_lower[i]), '#000000'))
                lines.append(_Line('upper limit', None, float(model.position_upper[i]), '#000000'))
            elif quantity == 'velocity':
                lines.append(_Line('recorded', t_state, trial.v[:, i], '#1f5fa8'))
                limit = float(model.velocity_limit[i])
                bound = float(runs[0].certificate.velocity_bound[i])
                lines += [_Line('rated limit -', None, -limit, '#000000'),
                          _Line('rated limit +', None, limit, '#000000'),
                          _Line('certified bound -', None, -bound, '#2f9e44', 1.0, (6, 4)),
                          _Line('certified bound +', None, bound, '#2f9e44', 1.0, (6, 4))]
            else:
                lines.append(_Line('nominal', t_runs[0], first.nominal[:, i], '#999999'))
                if np.isfinite(first.recorded[:, i]).any():
                    lines.append(_Line('recorded filtered', t_runs[0], first.recorded[:, i],
                                       '#2f9e44', 1.6))
                for index, run in enumerate(runs):
                    lines.append(_Line(f'replay {run.label}', t_runs[index],
                                       run.result.torque[:, i], RUN_COLOURS[index % 2], 1.0,
                                       () if index == 0 else (6, 4)))
                limit = float(model.effort_limit[i])
                lines += [_Line('limit -', None, -limit, '#000000'),
                          _Line('limit +', None, limit, '#000000')]
            if quantity != 'torque':
                for index, run in enumerate(runs):
                    if run.closed is not None:
                        values = run.closed.q if quantity == 'position' else run.closed.v
                        lines.append(_Line(f'closed loop {run.label}', t_closed[index],
                                           values[:, i], RUN_COLOURS[index % 2], 1.0, (6, 4)))
            charts.append(_Chart(name, f'{name} [{unit}]', lines))
        figures.append((quantity, charts))

    def intervention_chart(selected: Sequence[int], compare: bool) -> _Chart:
        chart = _Chart('intervention', 'intervention [N m]', [], height=230)
        for index in selected:
            result = runs[index].result
            colour = RUN_COLOURS[index % 2]
            chart.lines.append(_Line(runs[index].label if compare else '|u* - u_nom|',
                                     t_runs[index], result.intervention, colour))
            if np.isfinite(result.intervention).any():
                k = int(np.nanargmax(result.intervention))
                chart.marks.append({'t': float(t_runs[index][k]), 'shape': 'down',
                                    'value': float(result.intervention[k]), 'colour': colour})
        if not compare:
            for mode, colour in MODE_COLOURS.items():
                for a, b in _episodes(first.mode == mode):
                    chart.bands.append((float(t_runs[0][a]), float(t_runs[0][b]) + 1e-4,
                                        colour))
        return chart

    def margin_chart(selected: Sequence[int], compare: bool) -> _Chart:
        chart = _Chart('margin', 'smallest barrier value', [], height=230)
        styles = ((), (6, 4), (8, 3, 2, 3), (2, 3))
        palette = ('#1f77b4', '#ff7f0e', '#2ca02c', '#d62728', '#9467bd', '#8c564b',
                   '#e377c2', '#7f7f7f', '#bcbd22', '#17becf')
        for index in selected:
            result = runs[index].result
            margin = np.where(np.isfinite(result.margin), result.margin, np.inf)
            smallest = margin.min(axis=1) if margin.size else np.zeros(0)
            smallest = np.where(np.isfinite(smallest), smallest, np.nan)
            colour = RUN_COLOURS[index % 2]
            if compare:
                chart.lines.append(_Line(runs[index].label, t_runs[index], smallest, colour))
            else:
                for i, name in enumerate(names):
                    chart.lines.append(_Line(name, t_runs[index], result.margin[:, i],
                                             palette[i % len(palette)], 1.0,
                                             styles[i % len(styles)]))
            if np.isfinite(smallest).any():
                k = int(np.nanargmin(smallest))
                chart.marks.append({'t': float(t_runs[index][k]), 'shape': 'up',
                                    'value': float(smallest[k]), 'colour': colour})
        chart.lines.append(_Line('edge of the safe set', None, 0.0, '#d64545'))
        return chart

    figures.append(('intervention', [intervention_chart([0], compare=False)]))
    figures.append(('margin', [margin_chart([0], compare=False)]))
    if len(runs) > 1:
        every = list(range(len(runs)))
        figures.append(('compare_intervention', [intervention_chart(every, compare=True)]))
        figures.append(('compare_margin', [margin_chart(every, compare=True)]))
    return figures


def interactive_plot_data(trial: Trial, model: RobotModel, runs: Sequence[CertificateRun],
                          events: Sequence[Event], moments_rel_s: Sequence[float] = ()
                          ) -> dict[str, Any]:
    """What the page's zoomable time plots draw (read by ``report_assets/time_plots.js``).

    Keys: ``format``; ``range`` (the trial's first and last step [s from its start]);
    ``bases`` (time axes, base64 little-endian float64, by key); ``figures`` (``id``: the
    PNG of the same content without ``.png``, ``charts``: ``title``, ``y_label``,
    ``height`` [px], ``base``, ``series`` (``label``, ``colour``, ``width``, ``dash``, and
    ``values`` base64 float32 with NaN for a break and +inf for no sample at that time, or
    ``constant``), ``bands`` (``[from, to, colour]``: non-filtered modes), ``marks``
    (largest intervention, smallest margin)); ``events`` (``t``, ``kind``, ``colour``);
    ``thinned`` (whether a long trial's axes hold bucket extremes rather than every
    sample); ``x_label``; ``min_span_s``.
    """
    figures = _time_charts(trial, model, runs)
    axes: dict[tuple[int, ...], str] = {}
    bases: dict[str, str] = {}
    out_figures = []
    thinned_any = False
    low, high = math.inf, -math.inf
    for figure_id, charts in figures:
        out_charts = []
        for chart in charts:
            key = tuple(sorted({id(line.t) for line in chart.lines if line.t is not None}))
            axis, columns, thinned = _time_axis(chart.lines, moments_rel_s)
            thinned_any |= thinned
            # Charts over the same time arrays share one encoded axis (their joins agree),
            # unless the axis was thinned: that depends on the chart's own values.
            name = None if thinned else axes.get(key)
            if name is None:
                name = f'axis{len(bases)}'
                bases[name] = _encode(axis, '<f8')
                if not thinned:
                    axes[key] = name
            if len(axis):
                low, high = min(low, float(axis[0])), max(high, float(axis[-1]))
            series = []
            for line, column in zip(chart.lines, columns):
                item: dict[str, Any] = {'label': line.label, 'colour': line.colour,
                                        'width': line.width, 'dash': list(line.dash)}
                if column is None:
                    item['constant'] = float(line.y)
                else:
                    item['values'] = _encode(column, '<f4')
                series.append(item)
            out_charts.append({'title': chart.title, 'y_label': chart.y_label,
                               'height': chart.height, 'base': name, 'series': series,
                               'bands': [list(b) for b in chart.bands],
                               'marks': chart.marks})
        out_figures.append({'id': figure_id, 'charts': out_charts})
    if not math.isfinite(low):
        low, high = 0.0, 1.0
    if high - low < MIN_VIEW_S:
        high = low + MIN_VIEW_S
    colours: dict[str, str] = {}
    event_data = []
    for event in events:
        colour = colours.setdefault(event.kind, EVENT_PALETTE[len(colours) % len(
            EVENT_PALETTE)])
        event_data.append({'t': event.t - trial.start_time, 'kind': event.kind,
                           'colour': colour})
    return {'format': PLOTS_FORMAT, 'range': [low, high], 'bases': bases,
            'figures': out_figures, 'events': event_data, 'thinned': thinned_any,
            'x_label': 'time from the start of the trial [s]', 'min_span_s': MIN_VIEW_S}
