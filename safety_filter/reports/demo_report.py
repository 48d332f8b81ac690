"""What the demo's bags show: limit violations per run, a terminal summary, an HTML report.

ROS-free: it reads the bags of ``safety-filter demo`` with :mod:`safety_filter.recordings.bags`.

* :func:`load_run` reads one run's bag into arrays (:class:`RunData`);
* :func:`run_violations` measures how far each joint went past each of its limits;
* :func:`barrier_margins` evaluates the certificate's barriers along a run (also for the
  unfiltered run, which never saw the filter: it shows where that run left the safe set);
* :func:`format_summary` is the terminal table; :func:`write_demo_report` writes
  ``demo_report.html`` with PNG plots and ``demo_summary.json``.

Torque violations are measured on the torque *sent to the driver* (the nominal in the
unfiltered run, the filter's output in the filtered run): the simulated driver clips what it
is sent to the effort limits, as a real one does, so the applied torque never exceeds them.
"""

from __future__ import annotations

import datetime as _dt
import html
import json
from collections.abc import Sequence
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

import numpy as np

from safety_filter.core.barriers import evaluate_barriers
from safety_filter.core.certificate import Certificate
from safety_filter.core.robot_model import RobotModel
from safety_filter.online.mode_codes import MODE_NAMES
from safety_filter.recordings import bags
from safety_filter.reports.html_kit import BASE_CSS, json_ready
from safety_filter.simulation.careless_operator import Segment
from safety_filter.simulation.plant import limit_violations

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
LIMITS = ('position', 'velocity', 'torque')
# An excursion past a limit counts as a violation above this [rad, rad/s, N m]: far below
# anything visible, far above rounding.
VIOLATION_TOLERANCE = 1e-6
BEHAVIOUR_COLOURS = {'pd_beyond_limits': '#fde0c5', 'jerk': '#f8c9d4', 'slack': '#d9e8f5',
                     'sinusoid': '#dcefd5'}

# The same words as safety_filter.cli.main.SAFETY_NOTICE.
SAFETY_NOTICE = (
    'CAUTION: safety_filter is not a certified safety function. It does not replace '
    'hardware emergency stops, safety-rated monitoring or a risk assessment; local '
    'regulations and qualified safety engineers have the last word.')


@dataclass
class RunData:
    """One recorded run, in the model's joint order; times [s] from the run's first state.

    Attributes:
        label: ``'unfiltered'`` or ``'filtered'``.
        bag: the bag folder.
        time_s, q, v, effort: joint states (effort: the torque the driver applied).
        command_time_s, command: the torque sent to the driver.
        nominal_time_s, nominal: the operator's torque.
        status: the filter's status records (``'time_s'`` and the field names of
            :mod:`safety_filter.ros.filter_node`); empty without a filter.
        diagnostics: the filter's diagnostics.
        counts: messages per topic in the bag.
        start_ns: bag time of ``time_s = 0`` [ns].
    """

    label: str
    bag: Path
    time_s: np.ndarray
    q: np.ndarray
    v: np.ndarray
    effort: np.ndarray
    command_time_s: np.ndarray
    command: np.ndarray
    nominal_time_s: np.ndarray
    nominal: np.ndarray
    status: dict[str, np.ndarray] = field(default_factory=dict)
    diagnostics: list[bags.DiagnosticRecord] = field(default_factory=list)
    counts: dict[str, int] = field(default_factory=dict)
    start_ns: int = 0

    @property
    def duration_s(self) -> float:
        """Time covered by the joint states [s]."""
        return float(self.time_s[-1] - self.time_s[0]) if self.time_s.size else 0.0


def load_run(bag: str | Path, model: RobotModel, label: str, command_topic: str
             ) -> RunData:
    """Read one run's bag (see :class:`RunData`).

    Args:
        bag: the bag folder.
        model: the robot (joint order, limits).
        label: the run's name.
        command_topic: the topic of the torque the driver was sent
            (:data:`safety_filter.recordings.bags.TOPIC_NOMINAL` in the unfiltered run,
            :data:`safety_filter.recordings.bags.TOPIC_COMMAND` in the filtered one).
    """
    bag = Path(bag)
    counts = {t: i.count for t, i in bags.topic_summary(bag).items()}
    messages = bags.read_topics(bag, sorted({bags.TOPIC_JOINT_STATES, bags.TOPIC_NOMINAL,
                                             command_topic, bags.TOPIC_STATUS,
                                             bags.TOPIC_STATUS_FIELDS,
                                             bags.TOPIC_DIAGNOSTICS}))
    states = bags.joint_state_series(messages.get(bags.TOPIC_JOINT_STATES, []),
                                     model.joint_names)
    if states.stamp_ns.size == 0:
        raise bags.BagError(f'{bag}: no joint states recorded')
    start = int(states.stamp_ns[0])
    n = model.n_joints

    def relative(ns: np.ndarray) -> np.ndarray:
        return 1e-9 * (ns - start)

    def arrays(topic: str) -> tuple[np.ndarray, np.ndarray]:
        if topic not in counts:
            return np.zeros(0), np.zeros((0, n))
        series = bags.float64_array_series(messages[topic])
        if series.data.shape[1] != n:
            raise bags.BagError(f'{bag}: {topic} has {series.data.shape[1]} values per '
                                f'message, the model {n} joints')
        return relative(series.log_time_ns), series.data

    command_time, command = arrays(command_topic)
    nominal_time, nominal = arrays(bags.TOPIC_NOMINAL)
    status = bags.status_records(
        messages.get(bags.TOPIC_STATUS, []),
        fields=bags.last_text(messages.get(bags.TOPIC_STATUS_FIELDS, [])),
        joint_names=model.joint_names)
    if status:
        status['time_s'] = relative(status['log_time_ns'])
    diagnostics = bags.diagnostic_records(messages.get(bags.TOPIC_DIAGNOSTICS, []))
    return RunData(label, bag, relative(states.stamp_ns), states.position, states.velocity,
                   states.effort, command_time, command, nominal_time, nominal, status,
                   diagnostics, counts, start)


def run_violations(model: RobotModel, run: RunData) -> dict[str, np.ndarray]:
    """Largest excursion past each limit, per joint (0 when kept): ``'position'`` [rad],
    ``'velocity'`` [rad/s] (joint states) and ``'torque'`` [N m] (the torque sent to the
    driver), each of shape (n,)."""
    command = run.command if run.command.shape[0] else np.zeros((1, model.n_joints))
    return limit_violations(model, run.q, run.v, command)


def broken_limits(violations: dict[str, np.ndarray]) -> int:
    """How many (joint, limit) pairs were broken (excursion above the tolerance)."""
    return int(sum(np.count_nonzero(violations[k] > VIOLATION_TOLERANCE) for k in LIMITS))


def barrier_margins(certificate: Certificate, run: RunData) -> np.ndarray:
    """Smallest of the certificate's barrier values ``hp, hn, bp, bn`` per joint along the
    run's joint states, shape (T, n) (negative: outside the safe set S)."""
    state = evaluate_barriers(
        run.q, run.v, np.array(certificate.position_lower),
        np.array(certificate.position_upper), np.array(certificate.gamma),
        np.array(certificate.beta), certificate.alpha1, certificate.alpha2)
    return state.smallest


# ---------------------------------------------------------------------- terminal
def _excursion(value: float, unit: str) -> str:
    return '-' if value <= VIOLATION_TOLERANCE else f'{value:.3g} {unit}'


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


# ---------------------------------------------------------------------- plots
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


def _figure(width: float, height: float) -> Any:
    from matplotlib.backends.backend_agg import FigureCanvasAgg
    from matplotlib.figure import Figure

    figure = Figure(figsize=(width, height), dpi=100)
    FigureCanvasAgg(figure)
    return figure


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
    figure = _figure(6.0 * len(runs) + 0.5, 1.55 * n + 1.1)
    axes = figure.subplots(n, len(runs), sharex='col', squeeze=False)
    figure.subplots_adjust(left=0.09, right=0.98, top=1.0 - 0.55 / (1.55 * n + 1.1),
                           bottom=0.45 / (1.55 * n + 1.1), hspace=0.25, wspace=0.18)
    figure.suptitle(title, fontsize=11)
    for column, run in enumerate(runs):
        axes[0, column].set_title(f'{run.label} run', fontsize=10)
        axes[n - 1, column].set_xlabel('simulated time [s]')
    return figure, axes


def _plot_limited(model: RobotModel, runs: Sequence[RunData], schedule: Sequence[Segment],
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


def _plot_torques(model: RobotModel, runs: Sequence[RunData], schedule: Sequence[Segment],
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


def _plot_margins(model: RobotModel, runs: Sequence[RunData], margins: Sequence[np.ndarray],
                  path: Path) -> None:
    figure = _figure(6.0 * len(runs) + 0.5, 4.2)
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


def _plot_modes(run: RunData, path: Path) -> None:
    figure = _figure(9.0, 4.4)
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


def _plot_solve_times(run: RunData, path: Path) -> None:
    figure = _figure(9.0, 3.8)
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


# ---------------------------------------------------------------------- report
def mode_counts(run: RunData) -> dict[str, int]:
    """Filter steps per mode in a run (empty without a filter)."""
    if not run.status:
        return {}
    codes = run.status['mode'].astype(int)
    return {name: int(np.count_nonzero(codes == k)) for k, name in enumerate(MODE_NAMES)}


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
    _plot_limited(model, data, schedule, offsets, folder / PLOTS['positions'], 'position',
                  certificate)
    _plot_limited(model, data, schedule, offsets, folder / PLOTS['velocities'], 'velocity',
                  certificate)
    _plot_torques(model, data, schedule, offsets, folder / PLOTS['torques'])
    _plot_margins(model, data, margins, folder / PLOTS['margins'])
    filtered = [run for run in data if run.status]
    if filtered:
        _plot_modes(filtered[-1], folder / PLOTS['modes'])
        _plot_solve_times(filtered[-1], folder / PLOTS['solve_times'])
    summary = {
        'arm': model.name,
        'joints': list(model.joint_names),
        'certificate_id': certificate.certificate_id,
        'violation_tolerance': VIOLATION_TOLERANCE,
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
    (folder / SUMMARY_JSON).write_text(json.dumps(json_ready(summary), indent=2) + '\n',
                                       encoding='utf-8')
    page = folder / REPORT_HTML
    page.write_text(_html_page(model, runs, schedule, facts, bool(filtered),
                               certificate_report), encoding='utf-8')
    return page


_CSS = BASE_CSS + """
.verdict { font-size: 1.15em; font-weight: bold; padding: 0.4em 1em; border-radius: 4px; }
.pass { background: #e3f4e3; color: #14601a; }
.fail { background: #fbe4e4; color: #8a1010; }
th { background: #f0f2f5; text-align: center; }
td.ok { color: #14601a; text-align: center; }
td.bad { color: #8a1010; font-weight: bold; text-align: right; }
table.facts td:first-child { font-weight: bold; background: #f7f7f9; }
figure { margin: 1em 0 1.5em 0; }
figcaption { font-size: 0.9em; color: #444; max-width: 60em; }
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
                cells.append('<td class="ok">kept</td>' if value <= VIOLATION_TOLERANCE
                             else f'<td class="bad">{value:.3g}</td>')
        rows.append('<tr>' + ''.join(cells) + '</tr>')
    return '<table>' + head + ''.join(rows) + '</table>'


def range_and_speed_used(model: RobotModel, run: RunData) -> tuple[np.ndarray, np.ndarray]:
    """Per joint: the largest speed over the rated speed, and the nearest approach to a
    position limit over the joint's range (negative: past a limit), from the joint states."""
    speed = np.max(np.abs(run.v), axis=0) / np.array(model.velocity_limit)
    nearest = np.min(np.minimum(run.q - model.position_lower, model.position_upper - run.q),
                     axis=0) / np.array(model.position_range)
    return speed, nearest


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
    parts = ['<!DOCTYPE html>', '<html lang="en">', '<head>', '<meta charset="utf-8">',
             f'<title>safety_filter demo: {esc(model.name)}</title>',
             f'<style>{_CSS}</style>', '</head>', '<body>',
             f'<h1>Demo: a careless operator on {esc(model.name)}, without and with the '
             'filter</h1>',
             f'<p class="caution">{esc(SAFETY_NOTICE)}</p>',
             '<p>A simulated torque-controlled arm is driven by a careless operator (a '
             'seeded schedule of behaviours: PD toward targets beyond the limits, sudden '
             'full-effort jerks, a slack hold that lets gravity act, large sinusoids). The '
             'same operator, with the same seed, runs twice: once straight into the arm '
             '(the <b>unfiltered</b> run, possible only in simulation) and once through the '
             'safety filter (the <b>filtered</b> run). Both runs were recorded as rosbag2 '
             'bags; everything below is read from them.</p>']
    for run, violations in runs:
        broken = broken_limits(violations)
        if broken:
            css, text = 'fail', f'{run.label} run: {broken} of {total} limits broken'
        else:
            css, text = 'pass', f'{run.label} run: all {total} limits kept'
        parts.append(f'<p class="verdict {css}">{esc(text)}</p>')
    parts.append('<h2>Limit violations</h2>')
    parts.append('<p>Largest excursion past each limit per joint. Positions and velocities '
                 'come from the joint states; torques are what was <i>sent to the driver</i> '
                 "(the operator's torque in the unfiltered run, the filter's output in the "
                 'filtered run): the simulated driver clips it to the effort limit, as a real '
                 f'one does. Excursions below {VIOLATION_TOLERANCE:g} count as kept.</p>')
    parts.append(_violation_table(model, runs))
    parts.append('<h2>How much of its range and speed each joint used</h2>')
    parts.append('<p>A filter that kept the limits by keeping the arm slow and far from them '
                 'would be of little use. Per joint, the fastest it moved as a share of its '
                 'rated speed, and how near it came to a position limit as a share of its '
                 'range.</p>')
    parts.append(_usage_table(model, runs))
    parts.append('<h2>The run</h2>')
    parts.append('<table class="facts">' + ''.join(
        f'<tr><td>{esc(k)}</td><td>{esc(v)}</td></tr>' for k, v in facts) + '</table>')
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
        parts.append(f'<figure><img src="{name}" alt="{esc(key)}"><figcaption>'
                     f'{esc(captions[key])}</figcaption></figure>')
    parts.append('<h2>Bags</h2><table><tr><th>run</th><th>bag</th><th>topic</th>'
                 '<th>messages</th></tr>')
    for run, _ in runs:
        for topic, count in sorted(run.counts.items()):
            parts.append(f'<tr><td>{esc(run.label)}</td><td>{esc(str(run.bag))}</td>'
                         f'<td>{esc(topic)}</td><td class="num">{count}</td></tr>')
    parts.append('</table>')
    parts.append(f'<p>Machine-readable: <a href="{SUMMARY_JSON}">{SUMMARY_JSON}</a>. Report '
                 'written ' + _dt.datetime.now(_dt.timezone.utc).isoformat(timespec='seconds')
                 + '.</p>')
    parts += ['</body>', '</html>']
    return '\n'.join(parts) + '\n'
