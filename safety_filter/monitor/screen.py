"""How the live monitor looks: frames of a :class:`~safety_filter.monitor.state.MonitorState`,
drawn with Rich (no ROS).

Why Rich: it is pure Python, small, widely used and maintained, and it does what this
screen needs and nothing more: tables and label/value grids laid out to the terminal's
width, text wrapped or cut to it, styles that become ANSI colours on a terminal and nothing
on a pipe or with ``NO_COLOR``, and a live display that repaints the whole screen from the
top each frame. Textual would add an application framework (its own event loop, widgets,
mouse and key handling) that a read-only display does not need, and its loop would compete
with the ROS executor that drives the monitor.

What is drawn, top to bottom: a title; the diagnostics level, the mode and the certificate;
the diagnostics message; alarm lines (``!!``, bold red, wrapped so an alarm is never cut);
one row per joint (position against its range, velocity and torque against their limits,
as text bars and percentages, and the barrier margin); where the limits come from; the
figures (intervention, solve times, step and episode counts, input ages, status rate,
active constraints); the last events. The frame fits the space it is given:

* narrower than the table with bars: the bars go, then the percentages; values stay;
* lower than the frame: the events go first (the newest kept), then the figures from the
  bottom up; title, state, alarms and joints go last.

On a terminal, :class:`Screen` repaints the frame in place at each refresh through Rich's
live display on the alternate screen (cursor home and full-width lines, so a resized window
or a stray log line is painted over at the next frame; a terminal without an alternate
screen simply draws on its main screen); the last frame is printed again on exit so it stays
in the terminal. No mouse, keys or cursor reports are used, so it works over SSH and in
tmux. When stdout is not a terminal (or ``TERM`` is ``dumb``, or with ``--plain``) each frame
is printed after a separator line, 100 columns wide, without escape codes.
"""

from __future__ import annotations

import io
import math
import os
import time
from typing import IO

from rich.console import Console, ConsoleOptions, Group, RenderableType, RenderResult
from rich.live import Live
from rich.measure import Measurement
from rich.segment import Segment
from rich.table import Table
from rich.text import Text

from safety_filter.errors import InvalidValue
from safety_filter.monitor.snapshots import (
    LEVEL_ERROR,
    LEVEL_OK,
    LEVEL_STALE,
    LEVEL_WARN,
    split_node_name,
)
from safety_filter.monitor.state import MonitorState, format_value

ALARM_PREFIX = '!! '
PLAIN_WIDTH = 100
SEPARATOR = '-' * PLAIN_WIDTH
# Waiting frames say the same thing: in plain output print them once, then this often [s].
PLAIN_WAITING_EVERY_S = 5.0

ALARM_STYLE = 'bold red'
_LEVEL_STYLES = {LEVEL_OK: 'green', LEVEL_WARN: 'yellow', LEVEL_ERROR: 'bold red',
                 LEVEL_STALE: 'magenta'}
_MODE_STYLES = {'filtered': 'green', 'fallback': 'yellow', 'recovering': 'bold red',
                'rejected': 'bold red', 'stale': 'bold red', 'inactive': 'magenta'}
# The joint table's detail levels, richest first; the widest that fits is drawn.
JOINT_DETAILS = ('bars', 'percent', 'values')


# ---------------------------------------------------------------------- numbers as text
def _fixed(value: float, width: int, decimals: int) -> str:
    if value is None or not math.isfinite(value):
        return 'nan'.rjust(width)
    text = f'{value:+.{decimals}f}'
    if len(text) > width:
        text = f'{value:+.{max(0, width - 6)}e}'
    return text.rjust(width)


def _num(value: float, decimals: int = 0) -> str:
    if value is None or not math.isfinite(value):
        return 'nan'
    return f'{value:.{decimals}f}'


def _percent(fraction: float, signed: bool = False) -> str:
    if not math.isfinite(fraction):
        return '   ?%'
    return f'{fraction * 100:+4.0f}%' if signed else f'{fraction * 100:4.0f}%'


def _clock(t: float | None) -> str:
    if t is None:
        return '--:--:--'
    return time.strftime('%H:%M:%S', time.localtime(t)) + f'.{int((t % 1) * 10)}'


# Bars are plain ASCII rather than block characters, so they read the same in a plain log,
# on a terminal without Unicode fonts and through any SSH client.
def _range_bar(value: float, lower: float, upper: float, width: int = 6) -> tuple[str, float]:
    """``[---#--]`` with the marker at ``value`` in [lower, upper]; and the fraction."""
    if not (math.isfinite(value) and math.isfinite(lower) and math.isfinite(upper)
            and upper > lower):
        return '[' + '?' * width + ']', math.nan
    fraction = (value - lower) / (upper - lower)
    cells = ['-'] * width
    if fraction < 0.0:
        cells[0] = '<'
    elif fraction > 1.0:
        cells[-1] = '>'
    else:
        cells[min(width - 1, int(fraction * width))] = '#'
    return '[' + ''.join(cells) + ']', fraction


def _signed_bar(value: float, limit: float, half: int = 3) -> tuple[str, float]:
    """``[  ##|   ]``: |value|/limit filled left (negative) or right (positive) of the bar;
    the end marked ``<`` or ``>`` past the limit."""
    if not (math.isfinite(value) and math.isfinite(limit) and limit > 0.0):
        return '[' + '?' * (2 * half + 1) + ']', math.nan
    fraction = value / limit
    cells = '#' * min(half, math.ceil(abs(fraction) * half - 1e-9))
    if abs(fraction) > 1.0 + 1e-9:
        cells = cells[:-1] + ('>' if fraction > 0 else '<')
    if fraction < 0:
        return '[' + cells[::-1].rjust(half) + '|' + ' ' * half + ']', fraction
    return '[' + ' ' * half + '|' + cells.ljust(half) + ']', fraction


def _quantity(value: float, decimals: int, bar: str, fraction: float, signed: bool,
              detail: str) -> Text:
    """One joint-table cell: the value, then (by detail) the bar and the percentage, the
    percentage red past the limit."""
    text = Text(_fixed(value, 7, decimals))
    if detail == 'bars':
        text.append(' ' + bar)
    if detail in ('bars', 'percent'):
        # Past the limit: |fraction| > 1 of a limit, outside [0, 1] of a range.
        outside = abs(fraction) > 1.0 if signed else not 0.0 <= fraction <= 1.0
        over = math.isfinite(fraction) and outside
        text.append(' ' + _percent(fraction, signed), style=ALARM_STYLE if over else None)
    return text


# ---------------------------------------------------------------------- the frame
# Everything of the frame goes to Rich as Text, never as str: Rich would read '[...]' in a
# str as markup and swallow it (the bars, 'solve [us]', brackets in a node's message).
class MonitorFrame:
    """One screen of the monitor, a Rich renderable laid out to the space it is given.

    Args:
        state: what the monitor knows.
        now: wall clock [s since the epoch].
        diagnostics_topic: named while waiting for the filter.
        rate_hz: the refresh rate, shown in the title (None: not shown).
    """

    def __init__(self, state: MonitorState, now: float, *,
                 diagnostics_topic: str = '/diagnostics', rate_hz: float | None = None
                 ) -> None:
        self.state = state
        self.now = now
        self.diagnostics_topic = diagnostics_topic
        self.rate_hz = rate_hz

    def __rich_console__(self, console: Console, options: ConsoleOptions) -> RenderResult:
        # The body is rendered to lines first, so that the height it takes once wrapped is
        # known: the events get what is left (the newest kept). Below that, the bottom is
        # cut: the figures go before the joints, and the title, state and alarms stay.
        height = options.height
        unbounded = options.update(height=None)
        state = self.state
        if state.present:
            body = [*self._head(), Text(''), self._joints(console, unbounded),
                    self._limits_line(), self._units_line(), Text(''), self._figures()]
        else:
            body = self._waiting()
        lines = console.render_lines(Group(*body), unbounded, pad=False)
        events = list(state.recent_events)
        room = len(events) if height is None else height - len(lines) - 2
        if events and room > 0:
            shown = events[-room:]
            title = (f'events ({state.event_count}):' if len(shown) == len(events) else
                     f'events ({state.event_count}, last {len(shown)} shown):')
            cut = 'ellipsis' if options.encoding.startswith('utf') else 'crop'
            lines += console.render_lines(Group(Text(''), Text(title), *(
                Text(f'  {_clock(e.t)} {e.kind:<18} {e.detail}', no_wrap=True, overflow=cut)
                for e in shown)), unbounded, pad=False)
        for line in lines[:height]:
            yield from line
            yield Segment.line()

    # ---- sections
    def _title(self) -> Text:
        state = self.state
        refresh = f'   refresh {self.rate_hz:g} Hz' if self.rate_hz else ''
        up = (f'   up {self.now - (state.first_seen_s or self.now):.0f} s' if state.present
              else '')
        return Text(f'safety_filter monitor   node {split_node_name(state.node_name)[1]}   '
                    f'{_clock(self.now)}{refresh}{up}', style='bold')

    def _waiting(self) -> list[RenderableType]:
        state = self.state
        if state.last_seen_s is None:
            since = 'nothing received yet'
        else:
            since = (f'no message for {self.now - state.last_seen_s:.1f} s, last at '
                     f'{_clock(state.last_seen_s)}')
        return [self._title(), Text(f'waiting for {state.base_name} on '
                                    f'{self.diagnostics_topic} ... ({since})')]

    def _head(self) -> list[RenderableType]:
        state, now = self.state, self.now
        diagnostic = state.diagnostic
        level = diagnostic.level_name if diagnostic is not None else '?'
        mode = state.mode or '?'
        certificate = diagnostic.certificate_id if diagnostic is not None else None
        if certificate is None and state.limits is not None:
            certificate = state.limits.certificate_id
        line = Text.assemble(
            'state ', (f'{level:<5}', _LEVEL_STYLES.get(diagnostic.level, '')
                       if diagnostic is not None else ''),
            '  mode ', (f'{mode.upper():<10}', _MODE_STYLES.get(mode, '')),
            f'  certificate {certificate or "?"}')
        if state.expected_certificate_id and certificate:
            if certificate == state.expected_certificate_id:
                line.append(' (= --certificate)')
            else:
                line.append(f' (MISMATCH: --certificate is {state.expected_certificate_id})',
                            style=ALARM_STYLE)
        if diagnostic is not None:
            message = Text(f'  {diagnostic.message}   [report '
                           f'{now - diagnostic.received_s:.1f} s ago]')
        else:
            message = Text('  (no diagnostics report yet)')
        alarms = [Text(ALARM_PREFIX + alarm, style=ALARM_STYLE, overflow='fold')
                  for alarm in state.alarms(now)]
        return [self._title(), line, message, *alarms]

    def _joints(self, console: Console, options: ConsoleOptions) -> RenderableType:
        names = self.state.joint_names()
        if not names:
            return Text('  (joint names not known yet)')
        # Measured without a width limit: Rich would otherwise shrink the columns to fit
        # and cut every cell, where dropping the bars keeps the numbers whole.
        free = options.update_width(10_000)
        table = Table()
        for detail in JOINT_DETAILS:
            table = self._joint_table(names, detail)
            if Measurement.get(console, free, table).maximum <= options.max_width:
                break
        return table

    def _joint_table(self, names: tuple[str, ...], detail: str) -> Table:
        state = self.state
        status = state.status if not state.status_silent(self.now) else None
        source = status if status is not None else state.status
        diagnostic = state.diagnostic
        limits = state.limits
        # No box and no edge padding: rows start with the joint name, in plain text too.
        # Two spaces between columns, one when the bars are dropped to fit a narrow screen.
        gap = 2 if detail == 'bars' else 1
        table = Table(box=None, pad_edge=False, padding=(0, gap, 0, 0), show_edge=False,
                      header_style='bold')
        table.add_column('joint', no_wrap=True)
        for quantity, of in (('position', 'range'), ('velocity', 'limit'), ('torque', 'limit')):
            header = {'bars': f'{quantity}  % of {of}', 'percent': f'{quantity}  %',
                      'values': quantity}[detail]
            table.add_column(header, justify='right', no_wrap=True)
        table.add_column('margin', justify='right', no_wrap=True)
        for joint in names:
            bounds = limits.of(joint) if limits is not None else None
            lower, upper, vmax, emax = bounds if bounds is not None else (math.nan,) * 4
            if source is not None:
                q, v = source.joint('position', joint), source.joint('velocity', joint)
                u, margin = source.joint('torque', joint), source.joint('margin', joint)
            else:
                q = v = u = math.nan
                margin = diagnostic.number(f'margin.{joint}') if diagnostic else math.nan
            margin_text = Text(format_value(margin, 3))
            if math.isfinite(margin) and margin < state.thin_margin:
                # The '!' marks a thin margin where colour does not show (plain output).
                margin_text = Text(format_value(margin, 3) + '!', style=ALARM_STYLE)
            elif joint in state.thin:
                margin_text.stylize('yellow')
            table.add_row(
                Text(joint),
                _quantity(q, 3, *_range_bar(q, lower, upper), False, detail),
                _quantity(v, 2, *_signed_bar(v, vmax), True, detail),
                _quantity(u, 2, *_signed_bar(u, emax), True, detail),
                margin_text)
        return table

    def _limits_line(self) -> Text:
        limits = self.state.limits
        if limits is not None:
            return Text(f'  limits: {limits.source}')
        return Text('  limits: unknown (no --certificate; node parameters not read yet)')

    def _units_line(self) -> Text:
        return Text('  units: rad, rad/s, N m (prismatic: m, m/s, N); margin: smallest '
                    f'barrier value, thin < {self.state.thin_margin:g}')

    def _figures(self) -> Table:
        state, now = self.state, self.now
        diagnostic = state.diagnostic
        status = state.status if not state.status_silent(now) else None
        source = status if status is not None else state.status
        number = diagnostic.number if diagnostic is not None else (lambda key: math.nan)
        values = diagnostic.values if diagnostic is not None else {}
        median, p99, worst, count = state.solve_time_stats_us()
        intervention = source.get('intervention') if source is not None else math.nan
        totals, episodes = state.step_totals, state.episodes
        if source is not None:
            js_age = source.get('joint_state_age_s') * 1e3
            nominal_age = source.get('nominal_age_s') * 1e3
            step = source.get('step')
        else:
            js_age, nominal_age = number('age.joint_state_ms'), number('age.nominal_ms')
            step = math.nan
        hold = (' (hold-still nominal)' if source is not None
                and source.get('hold_nominal') == 1.0 else '')
        invalid = (f'   invalid: joint_state {values.get("invalid.joint_state", "?")}, '
                   f'nominal {values.get("invalid.nominal", "?")}' if diagnostic else '')
        rows = [
            ('intervention', f'now {_num(intervention, 2)}   max last 1 s '
             f'{_num(state.intervention_max_1s(), 2)}   max last report '
             f'{_num(number("intervention.max"), 2)}   [N m]'),
            ('solve [us]', f'median {_num(median)}  p99 {_num(p99)}  max {_num(worst)} '
             f'(last {count} steps)   report: {_num(number("solve_time.median_us"))} / '
             f'{_num(number("solve_time.p99_us"))} / {_num(number("solve_time.max_us"))} '
             f'({values.get("solves", "?")})'),
            ('steps', f'{sum(totals.values())}   fallback {totals["fallback"]} '
             f'({episodes["fallback"]} episodes)   recovering {totals["recovering"]} '
             f'({episodes["recovering"]})   rejected {totals["rejected"]} '
             f'({episodes["rejected"]})   stale {totals["stale"]} ({episodes["stale"]})'
             + (f'   in the slow set {state.slow_set_total}'
                if state.slow_set_total is not None else '')),
            ('input age [ms]', f'joint_state {_num(js_age, 1)}   nominal '
             f'{_num(nominal_age, 1)}{hold}{invalid}'),
            ('status', f'step {_num(step) if math.isfinite(step) else "?"}   '
             f'{state.status_rate():.0f} msg/s   {state.status_count} received'),
        ]
        if diagnostic is not None:
            rows.append(('constraints', values.get('active_constraints', 'none')))
            reasons = values.get('reasons', 'none')
            if reasons and reasons != 'none':
                rows.append(('reasons', reasons))
        # A grid keeps the labels in one column; a long value wraps under its own column
        # on a narrow terminal instead of under the label.
        grid = Table.grid(padding=(0, 3))
        grid.add_column(no_wrap=True)
        grid.add_column(overflow='fold')
        for label, value in rows:
            grid.add_row(Text(label), Text(value))
        return grid


# ---------------------------------------------------------------------- text and terminal
def render_text(renderable: RenderableType, width: int = PLAIN_WIDTH,
                height: int | None = None, color: bool = False) -> str:
    """``renderable`` as text ``width`` columns wide (and at most ``height`` lines when
    given), with ANSI styles when ``color``; trailing spaces removed.

    Raises:
        InvalidValue: a width or height below 1.
    """
    if width < 1 or (height is not None and height < 1):
        raise InvalidValue('width and height', (width, height), 'at least 1 each')
    console = Console(file=io.StringIO(), width=width, height=height or 10_000,
                      force_terminal=color, color_system='standard' if color else None,
                      no_color=not color, highlight=False, emoji=False, markup=False)
    console.print(renderable, height=height)
    text = console.file.getvalue()  # type: ignore[attr-defined]
    return '\n'.join(line.rstrip() for line in text.splitlines())


def render_frame(state: MonitorState, now: float, *, color: bool = False,
                 width: int = PLAIN_WIDTH, height: int | None = None,
                 diagnostics_topic: str = '/diagnostics', rate_hz: float | None = None) -> str:
    """One frame of the monitor as text (see :class:`MonitorFrame`).

    Args:
        state: what the monitor knows.
        now: wall clock [s since the epoch].
        color: ANSI styles (colours, bold) in the text.
        width: columns; every line fits in it.
        height: lines at most (None: as many as the frame has).
        diagnostics_topic: named while waiting for the filter.
        rate_hz: the refresh rate, shown in the title.
    """
    return render_text(MonitorFrame(state, now, diagnostics_topic=diagnostics_topic,
                                    rate_hz=rate_hz), width, height, color)


def plain_output(stream: IO[str], plain_requested: bool = False) -> bool:
    """Whether frames go out as plain text: asked for, or ``stream`` is not a terminal that
    can move its cursor (not a tty, or ``TERM`` dumb)."""
    isatty = getattr(stream, 'isatty', None)
    tty = bool(isatty and isatty())
    return plain_requested or not tty or os.environ.get('TERM', '') in ('dumb', 'unknown')


class Screen:
    """Where frames go: repainted in place on a terminal, or printed one after another.

    Args:
        stream: the output (stdout).
        plain: print frames after a separator line, without escape codes (see
            :func:`plain_output`).
        color: colours on the terminal (bold and the layout stay without them; Rich also
            drops colours when ``NO_COLOR`` is set).
    """

    def __init__(self, stream: IO[str], plain: bool, color: bool = True) -> None:
        self.stream = stream
        self.plain = plain
        self.frames = 0
        self._last: MonitorFrame | None = None
        self._last_waiting_print = -math.inf
        self._live: Live | None = None
        # The terminal, as Rich sees it (its size is read again at every frame); None when
        # plain.
        self.console: Console | None = None
        if not plain:
            self.console = Console(file=stream, force_terminal=True, highlight=False,
                                   emoji=False, markup=False,
                                   no_color=True if not color else None)
            self._live = Live(console=self.console, screen=True, auto_refresh=False,
                              redirect_stdout=False, redirect_stderr=False)

    def show(self, frame: MonitorFrame) -> None:
        """Show ``frame`` (a waiting frame is printed only every few seconds in plain mode)."""
        if self._live is not None:
            if not self._live.is_started:
                self._live.start()
            self._live.update(frame, refresh=True)
        else:
            if not frame.state.present:
                if frame.now - self._last_waiting_print < PLAIN_WAITING_EVERY_S:
                    return
                self._last_waiting_print = frame.now
            else:
                self._last_waiting_print = -math.inf
            self.stream.write(SEPARATOR + '\n' + render_text(frame, PLAIN_WIDTH) + '\n')
            self.stream.flush()
        self._last = frame
        self.frames += 1

    def close(self) -> None:
        """Leave the live display; the last frame is printed again so it stays on screen."""
        if self._live is not None and self._live.is_started:
            self._live.stop()
            if self._last is not None and self.console is not None:
                self.console.print(self._last)
