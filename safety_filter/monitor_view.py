"""The live monitor's public names, under the module name they had before the monitor was
split into :mod:`safety_filter.monitor_state` (snapshots, state, event detection),
:mod:`safety_filter.monitor_screen` (the frame, drawn with Rich),
:mod:`safety_filter.monitor_event_log` (the JSON-lines event log) and
:mod:`safety_filter.monitor_cli` (the ``safety-filter monitor`` options). Kept so that code
importing from here goes on working; new code imports from those modules."""

from safety_filter.monitor_cli import (
    DEFAULT_RATE_HZ,
    add_monitor_arguments,
    add_monitor_parser,
    check_monitor_arguments,
)
from safety_filter.monitor_event_log import EVENT_TIMES, EventLogWriter
from safety_filter.monitor_screen import ALARM_PREFIX, MonitorFrame, render_frame
from safety_filter.monitor_state import (
    DEFAULT_ABSENT_AFTER_S,
    DEFAULT_NODE_NAME,
    DEFAULT_STATUS_SILENT_S,
    DEFAULT_THIN_MARGIN,
    DIAGNOSTIC_NAME_SUFFIX,
    EPISODE_MODES,
    LEVEL_NAMES,
    MODE_NAMES,
    DiagnosticSnapshot,
    JointLimits,
    MonitorEvent,
    MonitorState,
    StatusLayout,
    StatusSnapshot,
    diagnostic_name,
    split_node_name,
    status_topic,
)

__all__ = [
    'ALARM_PREFIX', 'DEFAULT_ABSENT_AFTER_S', 'DEFAULT_NODE_NAME', 'DEFAULT_RATE_HZ',
    'DEFAULT_STATUS_SILENT_S', 'DEFAULT_THIN_MARGIN', 'DIAGNOSTIC_NAME_SUFFIX',
    'EPISODE_MODES', 'EVENT_TIMES', 'LEVEL_NAMES', 'MODE_NAMES', 'DiagnosticSnapshot',
    'EventLogWriter', 'JointLimits', 'MonitorEvent', 'MonitorFrame', 'MonitorState',
    'StatusLayout', 'StatusSnapshot', 'add_monitor_arguments', 'add_monitor_parser',
    'check_monitor_arguments', 'diagnostic_name', 'render_frame', 'split_node_name',
    'status_topic',
]
