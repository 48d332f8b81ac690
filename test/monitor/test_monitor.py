"""The live monitor: its ROS-free view and event detection, and the monitor across DDS.

The unit tests feed :class:`MonitorState` hand-made snapshots (status arrays in the layout the
filter node documents, diagnostic key values of the node's names) and check the frame text
and the events. The integration test (``ros``) starts the demo graph (filter and careless
operator in one process, the simulated arm in another) and the monitor headless in a third,
all on a private DDS domain on loopback, checks the frames hold live values, then kills the
simulated arm: the filter's joint-state watchdog must trip and the event log must say so.
"""

from __future__ import annotations

import io
import json
import math
import os
import random
import re
import signal
import subprocess
import sys
import threading
import time
from pathlib import Path
from typing import Any

import pytest
import yaml

from safety_filter.cli.monitor import check_monitor_arguments
from safety_filter.core.certificate import Certificate
from safety_filter.core.class_k import ClassK
from safety_filter.errors import (
    CertificateError,
    ExitCode,
    FileFormatError,
    InvalidValue,
    SafetyFilterError,
    StatusLayoutError,
)
from safety_filter.monitor.screen import ALARM_PREFIX, SEPARATOR, render_frame
from safety_filter.monitor.snapshots import (
    DiagnosticSnapshot,
    JointLimits,
    StatusLayout,
    StatusSnapshot,
    diagnostic_name,
    split_node_name,
    status_topic,
)
from safety_filter.monitor.state import MonitorState
from safety_filter.online.mode_codes import MODE_NAMES
from safety_filter.recordings.event_log import EventLogWriter, read_event_log

JOINTS = ('shoulder', 'elbow')
LIMITS = JointLimits(JOINTS, position_lower=(-2.0, -2.5), position_upper=(2.0, 2.5),
                     velocity_limit=(3.0, 3.5), effort_limit=(40.0, 20.0),
                     certificate_id='abcdef123456', source='test limits')
T0 = 1_700_000_000.0  # wall clock of the synthetic trial [s]
# The status fields in the order the filter node documents (filter_node module docstring).
SCALARS = ('stamp_s', 'step', 'mode', 'hold_nominal', 'intervention', 'solve_time_s',
           'joint_state_age_s', 'nominal_age_s')
PER_JOINT = ('margin', 'torque', 'nominal', 'position', 'velocity')


def status_label(joints: tuple[str, ...] = JOINTS) -> str:
    return ','.join(list(SCALARS) + [f'{f}.{j}' for f in PER_JOINT for j in joints])


def status(t: float, step: int = 1, mode: int = 0, margin: tuple[float, float] = (0.5, 0.4),
           position: tuple[float, float] = (0.5, -1.0), velocity: tuple[float, float] = (1.5, 0.0),
           torque: tuple[float, float] = (10.0, -25.0), joint_state_age_s: float = 0.001,
           intervention: float = 1.25, solve_time_s: float = 50e-6) -> StatusSnapshot:
    """A status snapshot received at ``T0 + t`` (the filter clock 100 s behind the wall)."""
    values = [T0 + t - 100.0, step, mode, 0.0, intervention, solve_time_s, joint_state_age_s,
              0.004, *margin, *torque, 0.0, 0.0, *position, *velocity]
    return StatusSnapshot(StatusLayout.from_label(status_label()), values, T0 + t)


def diagnostic(t: float, level: int = 0, message: str = 'filtering', mode: str = 'filtered',
               certificate_id: str = 'abcdef123456', active: bool = True,
               counts: dict[str, int] | None = None, margins: tuple[str, str] = ('0.5', '0.4'),
               ) -> DiagnosticSnapshot:
    values = {'mode': mode, 'active': 'true' if active else 'false',
              'intervention.last': '1.25', 'intervention.max': '3.5',
              f'margin.{JOINTS[0]}': margins[0], f'margin.{JOINTS[1]}': margins[1],
              'active_constraints': 'elbow:torque', 'solves': '500',
              'solve_time.median_us': '48', 'solve_time.p99_us': '90', 'solve_time.max_us': '120',
              'steps': '500', 'reasons': 'none', 'age.joint_state_ms': '1.0',
              'age.nominal_ms': '4.0', 'invalid.joint_state': '0', 'invalid.nominal': '0',
              'trigger': 'joint_state', 'certificate_id': certificate_id}
    for name in MODE_NAMES:
        values[f'count.{name}'] = str((counts or {}).get(name, 0))
    if counts and 'slow_set' in counts:
        values['count.slow_set'] = str(counts['slow_set'])
    return DiagnosticSnapshot(level, message, values, T0 + t, stamp_s=T0 + t - 100.0)


def kinds(events: list[Any]) -> list[str]:
    return [e.kind for e in events]


# ---------------------------------------------------------------------- names, snapshots
def test_names_of_the_filter_topics_and_diagnostics() -> None:
    assert split_node_name('safety_filter') == ('safety_filter', '/safety_filter')
    assert split_node_name('/arm1/safety_filter') == ('safety_filter', '/arm1/safety_filter')
    assert diagnostic_name('/arm1/safety_filter') == '/arm1/safety_filter: filter'
    assert status_topic('safety_filter') == '/safety_filter/status'
    for bad in ('', '/', 'arm/'):
        with pytest.raises(InvalidValue, match='not a node name'):
            split_node_name(bad)


def test_status_snapshot_reads_the_self_describing_layout() -> None:
    snapshot = status(0.0, step=7, mode=1)
    assert snapshot.joint_names == JOINTS
    assert snapshot.mode == 'fallback'
    assert snapshot.joint('position', 'elbow') == -1.0
    assert snapshot.joint('torque', 'shoulder') == 10.0
    assert snapshot.get('step') == 7
    assert math.isnan(snapshot.get('no_such_field'))
    # Fewer values than fields: the missing ones read NaN, nothing raises.
    short = StatusSnapshot(snapshot.layout, list(snapshot.values)[:3], T0)
    assert math.isnan(short.joint('velocity', 'elbow'))
    with pytest.raises(StatusLayoutError, match='without field names'):
        StatusLayout.from_label('')
    with pytest.raises(StatusLayoutError, match='repeated field names'):
        StatusLayout.from_label('a,b,a')


def test_limits_from_a_certificate_file(tmp_path: Path) -> None:
    # A hand-made certificate (positive gains; no certification run): the monitor only
    # reads names, limits and the id from it.
    n = len(JOINTS)
    certificate = Certificate(
        joint_names=list(JOINTS), position_lower=[-2.0, -2.5], position_upper=[2.0, 2.5],
        velocity_limit=[3.0, 3.5], effort_limit=[40.0, 20.0], velocity_bound=[2.0, 2.0],
        gamma=[1.0] * n, gamma_star=[1.2] * n, beta=[5.0] * n, beta_star=[4.0] * n,
        beta_floor=[1.0] * n, beta_cap=[50.0] * n, authority=[10.0] * n,
        sampling_margin=[0.1] * n, viscous_friction=[0.0] * n, coulomb_friction=[0.0] * n,
        condition='acceleration_authority', alpha1=ClassK('linear', 1.0),
        alpha2=ClassK('linear', 1.0), control_rate_hz=1000.0, sampling_factor=1.0,
        payload_mass_range=(0.0, 0.5), payload_point=(0.0, 0.0, 0.0), model_hash='0' * 64,
        package_version='0.1.0', created='2024-01-01T00:00:00Z')
    path = certificate.save(tmp_path / 'certificate.yaml')
    limits = JointLimits.from_certificate_file(path)
    assert limits.joint_names == JOINTS
    assert limits.of('elbow') == (-2.5, 2.5, 3.5, 20.0)
    assert limits.of('wrist') is None
    assert limits.certificate_id == certificate.certificate_id
    # An edited file is refused, as the node refuses it.
    document = yaml.safe_load(path.read_text())
    (key,) = document  # the file's one node key (its spelling is the certificate's business)
    document[key]['ros__parameters']['effort_limit'] = [400.0, 20.0]
    path.write_text(yaml.safe_dump(document))
    with pytest.raises(CertificateError, match='edited'):
        JointLimits.from_certificate_file(path)
    with pytest.raises(FileFormatError, match='velocity_limit'):
        JointLimits.from_parameters({'joint_names': ['a'], 'position_lower': [0.0],
                                     'position_upper': [1.0], 'effort_limit': [1.0]}, 'x')


def test_the_state_is_kept_apart_from_drawing() -> None:
    import ast

    package = Path(__file__).resolve().parents[2] / 'safety_filter'

    def imported(name: str) -> set[str]:
        tree = ast.parse((package / f'{name}.py').read_text(encoding='utf-8'))
        names = {a.name for n in ast.walk(tree) if isinstance(n, ast.Import) for a in n.names}
        names |= {n.module for n in ast.walk(tree) if isinstance(n, ast.ImportFrom) and n.module}
        return {name.split('.')[0] for name in names}

    # ROS stays in safety_filter/ros (test_layering.py); drawing stays in the screen.
    assert 'rich' not in imported('monitor/state') | imported('recordings/event_log')
    assert 'rich' in imported('monitor/screen')


# ---------------------------------------------------------------------- rendering
def test_frame_shows_the_live_values_against_the_limits() -> None:
    state = MonitorState(thin_margin=0.05, limits=LIMITS,
                         expected_certificate_id='abcdef123456')
    state.add_diagnostic(diagnostic(0.0, counts={'filtered': 490, 'fallback': 10}))
    state.add_status(status(0.1, step=42, position=(0.4, -1.0), velocity=(1.5, -3.5),
                            torque=(10.0, -25.0)))
    text = render_frame(state, T0 + 0.2, color=False, width=120, rate_hz=4.0)
    assert '\x1b' not in text
    assert 'mode FILTERED' in text and 'state OK' in text
    assert 'certificate abcdef123456 (= --certificate)' in text
    rows = {line.split()[0]: line for line in text.splitlines()
            if line.split() and line.split()[0] in JOINTS}
    assert set(rows) == set(JOINTS)
    # shoulder: q = 0.4 in [-2, 2] is 60 % of the range; v = 1.5 of 3 is +50 %; 10 of 40 N m
    # is +25 %; margin 0.5.
    assert '+0.400' in rows['shoulder'] and '60%' in rows['shoulder']
    assert '+50%' in rows['shoulder'] and '+25%' in rows['shoulder']
    assert rows['shoulder'].rstrip().endswith('0.5')
    # elbow: v = -3.5 is -100 % of its limit, torque -25 of 20 N m is over it (-125 %).
    assert '-100%' in rows['elbow'] and '-125%' in rows['elbow']
    assert '[<##|   ]' in rows['elbow']  # over the limit: the bar is full and marked
    assert 'fallback 10' in text  # step counts of the diagnostics
    assert 'step 42' in text
    assert 'median 48' not in text  # the live solve times come from the status ...
    assert 'report: 48 / 90 / 120 (500)' in text  # ... the report's from the diagnostics
    assert 'elbow:torque' in text
    assert ALARM_PREFIX not in text  # nothing wrong
    assert all(len(line) <= 120 for line in text.splitlines())


def test_frame_alarms_for_thin_margins_the_watchdog_and_errors() -> None:
    state = MonitorState(thin_margin=0.05, limits=LIMITS)
    state.add_status(status(0.0, margin=(0.02, 0.4)))
    text = render_frame(state, T0 + 0.1)
    assert '!! thin margin shoulder: 0.02 (min 0.02) < 0.05' in text
    state.add_status(status(0.2, mode=4, joint_state_age_s=0.35, margin=(0.5, 0.4)))
    state.add_diagnostic(diagnostic(0.3, level=2, mode='stale', message='joint-state watchdog '
                                    'tripped: last valid joint state 350 ms ago; sending the '
                                    'hold command'))
    text = render_frame(state, T0 + 0.35)
    alarms = [line for line in text.splitlines() if line.startswith(ALARM_PREFIX)]
    assert alarms[0] == '!! WATCHDOG TRIPPED: joint states 350 ms old; the filter sends its ' \
                        'hold command'
    assert any(line.startswith('!! ERROR: joint-state watchdog tripped') for line in alarms)
    assert 'mode STALE' in text and 'state ERROR' in text
    # On a terminal the alarms are red, and the lines still fit the width.
    coloured = render_frame(state, T0 + 0.35, color=True, width=80)
    assert '\x1b[1;31m!! WATCHDOG TRIPPED' in coloured
    visible = [re.sub(r'\x1b\[[0-9;?]*[A-Za-z]', '', line) for line in coloured.splitlines()]
    assert all(len(line) <= 80 for line in visible)


def test_frame_while_no_filter_is_heard_from() -> None:
    state = MonitorState()
    text = render_frame(state, T0)
    assert 'waiting for safety_filter on /diagnostics ...' in text
    assert 'nothing received yet' in text
    state.add_status(status(0.0))
    assert 'waiting' not in render_frame(state, T0 + 1.0)
    state.poll(T0 + 5.0)
    text = render_frame(state, T0 + 5.0, diagnostics_topic='/robot/diagnostics')
    assert 'waiting for safety_filter on /robot/diagnostics ... (no message for 5.0 s' in text
    assert 'filter_disappeared' in text  # the last events stay on the screen


def test_frame_without_limits_shows_values_without_bars() -> None:
    state = MonitorState()
    state.add_status(status(0.0))
    text = render_frame(state, T0 + 0.1)
    assert 'limits: unknown' in text
    row = next(line for line in text.splitlines() if line.startswith('shoulder'))
    assert '+0.500' in row and '?%' in row


ANSI = re.compile(r'\x1b\[[0-9;?]*[A-Za-z]')


def _troubled_state() -> MonitorState:
    """A filter in trouble: watchdog tripped (ERROR), a thin margin, an elbow torque past its
    limit, and more events than a small screen holds."""
    state = MonitorState(thin_margin=0.05, limits=LIMITS, expected_certificate_id='abcdef123456')
    state.add_diagnostic(diagnostic(0.0, counts={'filtered': 490, 'fallback': 10}))
    state.add_status(status(0.1, step=42, position=(0.4, -1.0), velocity=(1.5, -3.5),
                            torque=(10.0, -25.0), margin=(0.02, 0.4)))
    state.add_status(status(0.2, step=43, mode=1, margin=(0.03, 0.4)))
    state.add_status(status(0.25, step=44, mode=4, joint_state_age_s=0.35, margin=(0.03, 0.4)))
    state.add_diagnostic(diagnostic(0.3, level=2, mode='stale', message='joint-state watchdog '
                                    'tripped: last valid joint state 350 ms ago; sending the '
                                    'hold command'))
    return state


def _record(width: int, height: int, renderable: Any) -> list[str]:
    """``renderable`` printed on a recording Rich console of that size; its lines."""
    from rich.console import Console

    console = Console(width=width, height=height, record=True, file=io.StringIO(),
                      force_terminal=True, color_system='standard')
    console.print(renderable, height=height)
    return console.export_text(styles=False).splitlines()


def test_frame_at_two_terminal_sizes() -> None:
    from safety_filter.monitor.screen import MonitorFrame

    state = _troubled_state()
    frame = MonitorFrame(state, T0 + 0.35, rate_hz=4.0)
    alarm = ('!! WATCHDOG TRIPPED: joint states 350 ms old; the filter sends its hold '
             'command')
    newest = state.recent_events[-1]

    # A roomy terminal: everything, the bars included, each line whole.
    wide = _record(120, 50, frame)
    text = '\n'.join(wide)
    assert all(len(line) <= 120 for line in wide) and len(wide) <= 50
    assert 'position  % of range' in text
    rows = {line.split()[0]: line for line in wide if line.split() and line.split()[0] in JOINTS}
    assert '[<##|   ]' in rows['elbow'] and '-125%' in rows['elbow']
    assert rows['shoulder'].rstrip().endswith('0.03!')  # thin: marked beside the colour
    assert alarm in wide
    assert f'events ({state.event_count}):' in text  # all of them
    assert 'solve [us]' in text and 'report: 48 / 90 / 120 (500)' in text
    assert 'units:' in text

    # A small one: 60 x 34. The bars go, the numbers and percentages stay whole; alarms
    # wrap (nothing of them lost), a long figure wraps under its own column; the older
    # events give way to the height, the newest stays.
    small = _record(60, 34, frame)
    text = '\n'.join(small)
    assert all(len(line) <= 60 for line in small) and len(small) <= 34
    assert '% of range' not in text and '[<##|' not in text
    rows = {line.split()[0]: line for line in small
            if line.split() and line.split()[0] in JOINTS}
    assert set(rows) == set(JOINTS)
    assert rows['elbow'].split()[1:7] == ['-1.000', '30%', '+0.00', '+0%', '-25.00', '-125%']
    assert alarm not in small  # longer than the width ...
    assert alarm in ' '.join(line.strip() for line in small)  # ... so wrapped, not cut
    solve = next(i for i, line in enumerate(small) if line.startswith('solve [us]'))
    column = small[solve].index('median')
    assert small[solve + 1][:column].strip() == ''  # the wrapped rest of the value ...
    assert small[solve + 1][column:].startswith('report: 48 / 90 / 120 (500)')  # ... aligned
    shown = re.search(r'events \((\d+), last (\d+) shown\):', text)
    assert shown is not None and int(shown.group(1)) == state.event_count
    assert 0 < int(shown.group(2)) < len(state.recent_events)
    assert newest.kind in small[-1]  # the newest event is the one kept, last

    # Lower still (60 x 20): no events, the figures cut from the bottom; the alarms and the
    # joints stay.
    low = _record(60, 20, frame)
    text = '\n'.join(low)
    assert len(low) <= 20 and 'events' not in text and 'constraints' not in text
    assert alarm in ' '.join(line.strip() for line in low)
    assert {line.split()[0] for line in low if line.split()} >= set(JOINTS)

    # Narrower still (44 columns): the percentages go too; the values and margins stay.
    narrow = _record(44, 50, frame)
    row = next(line for line in narrow if line.startswith('elbow'))
    assert row.split() == ['elbow', '-1.000', '+0.00', '-25.00', '0.4']


def test_bars_fill_toward_the_limit_and_mark_what_is_past_it() -> None:
    from safety_filter.monitor.screen import _range_bar, _signed_bar

    assert _signed_bar(10.0, 20.0) == ('[   |## ]', 0.5)
    assert _signed_bar(-20.0, 20.0) == ('[###|   ]', -1.0)  # at the limit: full, unmarked
    assert _signed_bar(25.0, 20.0) == ('[   |##>]', 1.25)
    assert _signed_bar(-0.1, 20.0)[0] == '[  #|   ]'  # anything non-zero shows
    assert _signed_bar(1.0, 0.0)[0] == '[???????]'  # no limit known
    assert _range_bar(0.0, -2.0, 2.0) == ('[---#--]', 0.5)
    assert _range_bar(-2.5, -2.0, 2.0)[0] == '[<-----]'
    assert _range_bar(2.5, -2.0, 2.0)[0] == '[----->]'
    assert _range_bar(0.0, 1.0, 1.0)[0] == '[??????]'  # an empty range


def test_frame_styles_alarms_and_modes_on_a_terminal() -> None:
    from safety_filter.monitor.screen import render_frame

    coloured = render_frame(_troubled_state(), T0 + 0.35, color=True, width=100)
    assert '\x1b[1;31m!! WATCHDOG TRIPPED' in coloured  # bold red
    assert re.search(r'\x1b\[1;31mSTALE', coloured)  # the mode, bold red
    plain = render_frame(_troubled_state(), T0 + 0.35, color=False, width=100)
    assert '\x1b' not in plain
    assert ANSI.sub('', coloured).splitlines() == plain.splitlines()
    with pytest.raises(InvalidValue, match='width'):
        render_frame(_troubled_state(), T0, width=0)


def test_screen_plain_prints_frames_after_a_separator() -> None:
    from safety_filter.monitor.screen import MonitorFrame, Screen, plain_output

    class Pipe(io.StringIO):
        def isatty(self) -> bool:
            return False

    assert plain_output(Pipe()) and plain_output(Pipe(), True)
    stream = Pipe()
    screen = Screen(stream, plain=True)
    waiting = MonitorState()
    screen.show(MonitorFrame(waiting, T0))
    screen.show(MonitorFrame(waiting, T0 + 1.0))  # the same waiting frame: not repeated
    screen.show(MonitorFrame(waiting, T0 + 6.0))  # ... until 5 s later
    state = _troubled_state()
    screen.show(MonitorFrame(state, T0 + 0.35))
    screen.close()
    out = stream.getvalue()
    assert '\x1b' not in out
    frames = [f for f in out.split(SEPARATOR + '\n') if f]
    assert len(frames) == 3 and screen.frames == 3
    assert 'waiting for safety_filter' in frames[0] and 'mode STALE' in frames[2]
    assert all(len(line) <= len(SEPARATOR) for line in out.splitlines())


def test_screen_on_a_terminal_repaints_in_place_and_follows_resizes(
        monkeypatch: pytest.MonkeyPatch) -> None:
    from safety_filter.monitor.screen import MonitorFrame, Screen

    class Terminal(io.StringIO):
        def isatty(self) -> bool:
            return True

    monkeypatch.setenv('TERM', 'xterm-256color')
    monkeypatch.delenv('NO_COLOR', raising=False)
    stream = Terminal()
    screen = Screen(stream, plain=False, color=True)
    assert screen.console is not None
    screen.console.size = (110, 40)
    state = _troubled_state()
    screen.show(MonitorFrame(state, T0 + 0.35))
    screen.console.size = (60, 20)  # the window shrinks: the next frame is laid out anew
    screen.show(MonitorFrame(state, T0 + 0.6))
    before_close = stream.getvalue()
    screen.close()
    out = stream.getvalue()

    # Each frame is painted from the top left, over the whole screen.
    repaints = [p for p in before_close.split('\x1b[H') if 'safety_filter monitor' in p]
    assert len(repaints) == 2
    first = ANSI.sub('', repaints[0]).splitlines()
    second = ANSI.sub('', repaints[1]).splitlines()
    assert any('[<##|   ]' in line for line in first)
    assert len(first) == 40 and all(len(line) == 110 for line in first)  # the full screen
    assert len(second) == 20 and all(len(line) == 60 for line in second)
    assert not any('[<##|' in line for line in second)
    assert '\x1b[1;31m!! WATCHDOG' in before_close  # coloured
    # Nothing a plain SSH terminal lacks: no mouse, focus or paste reporting asked for.
    for mode in ('?1000', '?1002', '?1003', '?1006', '?1004', '?2004'):
        assert f'\x1b[{mode}h' not in out
    # On exit the terminal is given back (main screen, cursor shown) and the last frame,
    # laid out for the current size, stays on it.
    after = out[len(before_close):]
    assert '\x1b[?1049l' in after and '\x1b[?25h' in after
    assert 'mode STALE' in ANSI.sub('', after.split('\x1b[?1049l')[-1])


# ---------------------------------------------------------------------- events
def test_events_from_a_sequence_of_snapshots() -> None:
    state = MonitorState(thin_margin=0.05, limits=LIMITS)
    events = state.add_status(status(0.0, step=1))
    assert kinds(events) == ['filter_appeared', 'mode']
    assert events[1].data == {'from': None, 'to': 'filtered'}
    assert kinds(state.add_diagnostic(diagnostic(0.01))) == ['level']
    assert kinds(state.add_status(status(0.02, step=2))) == []  # nothing new

    # A fallback episode of three steps.
    assert kinds(state.add_status(status(0.1, step=3, mode=1))) == ['mode', 'fallback_start']
    state.add_status(status(0.11, step=4, mode=1))
    state.add_status(status(0.12, step=5, mode=1))
    events = state.add_status(status(0.13, step=6, mode=0))
    assert kinds(events) == ['fallback_end', 'mode']
    assert events[0].data['steps'] == 3
    assert events[0].data['duration_s'] == pytest.approx(0.03)

    # A thin margin on the elbow, with hysteresis: 0.055 is above 0.05 but below 0.06.
    events = state.add_status(status(0.2, margin=(0.5, 0.04)))
    assert kinds(events) == ['thin_margin_start']
    assert events[0].data['joint'] == 'elbow' and events[0].data['margin'] == 0.04
    assert kinds(state.add_status(status(0.21, margin=(0.5, 0.01)))) == []
    assert kinds(state.add_status(status(0.22, margin=(0.5, 0.055)))) == []
    events = state.add_status(status(0.3, margin=(0.5, 0.2)))
    assert kinds(events) == ['thin_margin_end']
    assert events[0].data['min_margin'] == 0.01 and events[0].data['joint'] == 'elbow'

    # The watchdog trips (mode stale) and clears; the level follows the diagnostics.
    events = state.add_status(status(1.0, mode=4, joint_state_age_s=0.06))
    assert kinds(events) == ['mode', 'watchdog_trip']
    assert events[1].data['joint_state_age_ms'] == pytest.approx(60.0)
    assert events[1].stamp_s == pytest.approx(T0 + 1.0 - 100.0)  # the filter's clock
    events = state.add_diagnostic(diagnostic(1.1, level=2, mode='stale',
                                             message='joint-state watchdog tripped: ...'))
    assert kinds(events) == ['level']
    assert events[0].data['from'] == 'OK' and events[0].data['to'] == 'ERROR'
    state.add_status(status(1.2, mode=4, joint_state_age_s=0.26))
    events = state.add_status(status(1.5, mode=0))
    assert kinds(events) == ['watchdog_clear', 'mode']
    assert events[0].data['steps'] == 2 and events[0].data['duration_s'] == pytest.approx(0.5)
    assert state.episodes == {'fallback': 1, 'stale': 1}

    # Silence: nothing before absent_after_s, then the filter is gone, open episodes ended.
    state.add_status(status(1.6, mode=2, margin=(0.01, 0.4)))
    assert state.poll(T0 + 3.0) == []
    events = state.poll(T0 + 3.7)
    assert kinds(events) == ['recovering_end', 'thin_margin_end', 'filter_disappeared']
    assert events[0].data['reason'] == 'filter disappeared'
    assert state.poll(T0 + 10.0) == []
    events = state.add_status(status(20.0))
    assert kinds(events) == ['filter_appeared', 'mode']
    assert state.appearances == 2


def test_diagnostics_stand_in_while_the_status_is_silent() -> None:
    state = MonitorState(thin_margin=0.05)
    events = state.add_diagnostic(diagnostic(0.0, level=3, active=False,
                                             message='inactive: not filtering'))
    assert kinds(events) == ['filter_appeared', 'level', 'mode']
    assert events[2].data['to'] == 'inactive'
    events = state.add_diagnostic(diagnostic(
        0.5, level=2, mode='stale', margins=('0.5', '0.01'),
        message='joint-state watchdog tripped: last valid joint state 120 ms ago'))
    assert kinds(events) == ['level', 'mode', 'watchdog_trip', 'thin_margin_start']
    # With the status flowing, the diagnostics' mode no longer drives the events.
    state.add_status(status(0.9, mode=0))
    assert 'mode' not in kinds(state.add_diagnostic(diagnostic(1.0, mode='fallback')))


def test_certificate_mismatch_is_an_alarm_and_one_event() -> None:
    state = MonitorState(limits=LIMITS, expected_certificate_id='abcdef123456')
    events = state.add_diagnostic(diagnostic(0.0, certificate_id='999999999999'))
    assert 'certificate_mismatch' in kinds(events)
    assert 'certificate_mismatch' not in kinds(state.add_diagnostic(
        diagnostic(0.5, certificate_id='999999999999')))
    text = render_frame(state, T0 + 0.6)
    assert '!! certificate mismatch: the node runs 999999999999, expected abcdef123456' in text
    assert 'MISMATCH' in text


def test_event_log_is_json_lines_the_replay_report_reads(tmp_path: Path) -> None:
    state = MonitorState(limits=LIMITS)
    events = state.add_status(status(0.0))
    events += state.add_status(status(0.5, mode=4, joint_state_age_s=math.inf))
    path = tmp_path / 'logs' / 'events.jsonl'
    writer = EventLogWriter(path, node='safety_filter')
    writer.write(events)
    # Flushed as written: readable while the writer is open.
    lines = path.read_text().splitlines()
    assert len(lines) == len(events) == writer.count
    items = [json.loads(line) for line in lines]
    assert [i['kind'] for i in items] == ['filter_appeared', 'mode', 'mode', 'watchdog_trip']
    for item in items:
        assert isinstance(item['t'], float) and item['t'] >= T0
        assert isinstance(item['detail'], str) and item['detail']
        assert item['node'] == 'safety_filter'
    assert items[3]['joint_state_age_ms'] is None  # infinite age: JSON null, not Infinity
    assert 'joint states missing' in items[3]['detail']
    writer.close()
    log = read_event_log(path)
    assert not log.malformed
    assert [e.kind for e in log.events] == [i['kind'] for i in items]
    # Appending: a second monitor run adds to the same file.
    other = EventLogWriter(path, event_time='filter')
    other.write(state.add_status(status(1.0)))
    other.close()
    last = json.loads(path.read_text().splitlines()[-1])
    assert last['t'] == pytest.approx(T0 + 1.0 - 100.0)  # the filter's clock
    assert last['wall_t'] == pytest.approx(T0 + 1.0)
    with pytest.raises(SafetyFilterError, match='event_time'):
        EventLogWriter(path, event_time='bag')


def test_monitor_command_line() -> None:
    from safety_filter.cli.main import build_parser

    args = build_parser().parse_args(['monitor', '--refresh-rate', '2', '--thin-margin', '0.1',
                                      '--duration', '3', '--event-log', 'e.jsonl'])
    assert (args.refresh_rate, args.thin_margin, args.duration, args.event_log) == (
        2.0, 0.1, 3.0, 'e.jsonl')
    assert args.node_name == 'safety_filter' and args.event_time == 'wall'
    check_monitor_arguments(args)
    for option, value in (('--refresh-rate', '0'), ('--duration', '-1'), ('--absent-after', '0'),
                          ('--node-name', '/')):
        bad = build_parser().parse_args(['monitor', option, value])
        with pytest.raises(InvalidValue, match='--node-name|node name' if option == '--node-name'
                           else option) as raised:
            check_monitor_arguments(bad)
        assert raised.value.exit_code == ExitCode.BAD_INPUT


# ---------------------------------------------------------------------- across DDS
GRAPH_SCRIPT = """
import sys
from safety_filter.ros.graph_specs import sim_demo_graph
from safety_filter.ros.runner import run_graph
certificate, urdf, limits, domain = sys.argv[1:5]
specs = sim_demo_graph(urdf_path=urdf, limits_path=limits, certificate=certificate)
graph = [s for s in specs if s.executable != 'sim_arm']
for spec in graph:
    if spec.executable == 'filter_node':
        # The filter on the wall clock: under simulated time its watchdog timer would stop
        # with the simulator's /clock, and a dead simulator could not trip it.
        spec.parameters['use_sim_time'] = False
run_graph(graph, domain_id=int(domain), localhost_only=True, log_level='warn',
          wall_timeout_s=240.0)
"""
ROW = re.compile(r'^(shoulder|elbow)\s+([+-]\d+\.\d+)\s')
STEP = re.compile(r'^status\s+step (\d+)')


class LineReader:
    """Reads a process's stdout in a thread; splits the monitor's plain output into frames."""

    def __init__(self, process: subprocess.Popen[str], separator: str) -> None:
        self.frames: list[tuple[float, str]] = []  # (wall time when complete, text)
        self.lines: list[str] = []
        self._separator = separator
        self._current: list[str] = []
        self._lock = threading.Lock()
        self._thread = threading.Thread(target=self._read, args=(process,), daemon=True)
        self._thread.start()

    def _read(self, process: subprocess.Popen[str]) -> None:
        assert process.stdout is not None
        for line in process.stdout:
            line = line.rstrip('\n')
            with self._lock:
                self.lines.append(line)
                if line == self._separator:
                    if self._current:
                        self.frames.append((time.time(), '\n'.join(self._current)))
                    self._current = []
                else:
                    self._current.append(line)

    def snapshot(self) -> list[tuple[float, str]]:
        with self._lock:
            return list(self.frames)


def _wait(condition: Any, timeout: float, what: str | Any, step: float = 0.2) -> Any:
    """``condition()`` once true; ``what`` (text, or a function giving it at the time-out,
    e.g. the monitor's last lines) names what was awaited."""
    deadline = time.monotonic() + timeout
    while time.monotonic() < deadline:
        value = condition()
        if value:
            return value
        time.sleep(step)
    raise AssertionError(f'timed out after {timeout:g} s waiting for '
                         f'{what() if callable(what) else what}')


def _live(frame: str) -> dict[str, Any] | None:
    """The numbers of a frame of a filtering node: step and positions; None otherwise."""
    if 'mode FILTERED' not in frame:
        return None
    rows = dict(m.groups() for m in map(ROW.match, frame.splitlines()) if m)
    steps = [int(m.group(1)) for m in map(STEP.match, frame.splitlines()) if m]
    if set(rows) != {'shoulder', 'elbow'} or not steps:
        return None
    return {'step': steps[0], 'position': (rows['shoulder'], rows['elbow'])}


def _stop(process: subprocess.Popen[Any] | None, timeout: float = 20.0) -> int | None:
    if process is None:
        return None
    if process.poll() is None:
        process.send_signal(signal.SIGINT)
        try:
            process.wait(timeout=timeout)
        except subprocess.TimeoutExpired:
            process.kill()
            process.wait()
    return process.returncode


@pytest.mark.ros
def test_monitor_follows_a_live_graph_and_logs_the_watchdog_trip(tmp_path: Path) -> None:
    ros_fixtures = pytest.importorskip(
        'ros_fixtures', reason="rclpy is missing: pip install -e '.[ros]'")
    from safety_filter.ros import filter_node
    from safety_filter.ros.graph_specs import config_file, sim_demo_graph

    assert diagnostic_name('safety_filter') == \
        '/safety_filter' + filter_node.DIAGNOSTIC_NAME_SUFFIX
    layout = StatusLayout.from_label(','.join(filter_node.status_field_names(JOINTS)))
    assert layout.joint_names == JOINTS

    arm = ros_fixtures.certified_arm('planar2')
    domain = random.SystemRandom().randint(201, 230)  # not the other ROS modules' 100..200
    env = dict(os.environ, ROS_DOMAIN_ID=str(domain), ROS_AUTOMATIC_DISCOVERY_RANGE='LOCALHOST',
               PYTHONUNBUFFERED='1')
    event_log = tmp_path / 'events.jsonl'
    sim_spec = next(s for s in sim_demo_graph(urdf_path=arm.urdf_path,
                                              limits_path=arm.limits_path,
                                              certificate=arm.certificate_path)
                    if s.executable == 'sim_arm')
    overrides = tmp_path / 'sim_arm_overrides.yaml'
    overrides.write_text(yaml.safe_dump({sim_spec.name: {'ros__parameters': {
        k: (list(v) if isinstance(v, tuple) else v) for k, v in sim_spec.parameters.items()}}}))
    assert config_file('sim_demo.yaml') in sim_spec.parameter_files
    graph = sim = monitor = None
    logs = {name: open(tmp_path / f'{name}.log', 'w') for name in ('graph', 'sim')}
    try:
        graph = subprocess.Popen(
            [sys.executable, '-c', GRAPH_SCRIPT, str(arm.certificate_path), str(arm.urdf_path),
             str(arm.limits_path), str(domain)], env=env, stdout=logs['graph'],
            stderr=subprocess.STDOUT, start_new_session=True)
        sim = subprocess.Popen(
            [sys.executable, '-m', sim_spec.module, '--executor', 'events',
             *sim_spec.ros_arguments(overrides, 'warn')], env=env, stdout=logs['sim'],
            stderr=subprocess.STDOUT, start_new_session=True)
        monitor = subprocess.Popen(
            [sys.executable, '-m', 'safety_filter.cli.monitor', '--certificate',
             str(arm.certificate_path), '--event-log', str(event_log), '--refresh-rate', '4',
             '--duration', '240'], env=env, stdout=subprocess.PIPE, stderr=subprocess.STDOUT,
            text=True, start_new_session=True)
        reader = LineReader(monitor, SEPARATOR)

        # Live values: two filtering frames with different steps and positions.
        def two_live_frames() -> Any:
            live = [(t, text, _live(text)) for t, text in reader.snapshot()]
            live = [item for item in live if item[2] is not None]
            for i in range(1, len(live)):
                first, later = live[0][2], live[i][2]
                if later['step'] > first['step'] and later['position'] != first['position']:
                    return live[0][1], live[i][1]
            return None

        first, later = _wait(two_live_frames, 150.0, lambda: 'two frames of live values from '
                             'the monitor:\n' + '\n'.join(reader.lines[-40:]))
        certificate_id = arm.certificate.certificate_id
        for frame in (first, later):
            assert f'certificate {certificate_id} (= --certificate)' in frame
            assert 'limits: certificate file' in frame
            assert 'waiting for' not in frame

        # The fault: the simulated arm dies, joint states stop.
        sim.kill()
        sim.wait(timeout=10.0)
        fault = time.time()

        def watchdog_event() -> Any:
            if not event_log.is_file():
                return None
            for line in event_log.read_text().splitlines():
                item = json.loads(line)
                if item['kind'] == 'watchdog_trip' and item['t'] > fault:
                    return item
            return None

        trip = _wait(watchdog_event, 30.0, 'a watchdog_trip event after the fault')
        assert trip['t'] - fault < 20.0
        assert trip['node'] == 'safety_filter'
        _wait(lambda: any('!! WATCHDOG TRIPPED' in text for t, text in reader.snapshot()
                          if t > fault), 20.0, 'a frame with the watchdog alarm')

        assert _stop(monitor) == 0  # Ctrl-C ends it cleanly
        log = read_event_log(event_log)
        assert not log.malformed
        found = [e.kind for e in log.events]
        assert found[0] == 'filter_appeared'
        assert 'mode' in found and 'level' in found
        after = [e for e in log.events if e.t > fault]
        assert {'mode', 'watchdog_trip'} <= {e.kind for e in after}
        assert any(e.kind == 'mode' and e.data['to'] == 'stale' for e in after)
        print('\nfault at', fault, '\n' + event_log.read_text())
    finally:
        for process in (monitor, sim, graph):
            _stop(process)
        for handle in logs.values():
            handle.close()


def test_the_steps_line_counts_the_slow_set_when_the_node_reports_it() -> None:
    from safety_filter.monitor.screen import MonitorFrame

    state = MonitorState(thin_margin=0.05, limits=LIMITS)
    state.add_diagnostic(diagnostic(0.0, counts={'filtered': 500}))
    assert state.slow_set_total is None  # a node without the count (an older release)
    text = '\n'.join(_record(120, 50, MonitorFrame(state, T0 + 0.1, rate_hz=4.0)))
    assert 'slow set' not in text
    state.add_diagnostic(diagnostic(0.5, counts={'filtered': 500, 'slow_set': 120}))
    state.add_diagnostic(diagnostic(1.0, counts={'filtered': 500, 'slow_set': 30}))
    assert state.slow_set_total == 150
    text = '\n'.join(_record(120, 50, MonitorFrame(state, T0 + 1.1, rate_hz=4.0)))
    assert 'in the slow set 150' in text
