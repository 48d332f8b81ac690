"""One spelling per concept on the ``safety-filter`` command line (no ROS imports).

Every subcommand names a concept the same way (``test/test_cli_options.py`` walks the
parser and checks it):

* the robot: ``--demo NAME`` (a built-in demo arm) or ``--urdf FILE`` with ``--limits FILE``;
* what a command writes: ``--output FILE`` when it writes one file (``certify``'s
  certificate), ``--output-dir DIR`` when it writes a folder (``demo``, ``replay``,
  ``stress``; ``run-graph``'s recorded bag, a rosbag2 folder);
* bag storage: ``--storage {mcap,sqlite3}``;
* executors: ``single_threaded``, ``multi_threaded``, ``events`` (:data:`EXECUTORS`);
* rates: ``--control-rate`` is always the certified control rate, ``--watchdog-rate`` the
  filter's watchdog rate, ``--refresh-rate`` the monitor's screen refreshes;
* verbosity: ``--no-progress`` drops the progress bar and nothing else; ``--quiet`` prints
  only the verdict (or summary) and the files written, and implies ``--no-progress``;
  ``--log-level`` sets the ROS nodes' log level;
* the thin-margin threshold: :data:`THIN_MARGIN`, shared by the filter node's diagnostics
  (parameter ``thin_margin``) and the monitor's alarm (``--thin-margin``);
* ROS names: ``--namespace NS`` the nodes' namespace (launch argument ``namespace``,
  checked by :func:`ros_namespace`), ``--robot-description-topic TOPIC`` the robot from a
  topic instead of ``--urdf`` (launch argument ``robot_description_topic``), topics
  ``--<what>-topic TOPIC``.

Old spellings that were a plain rename stay accepted as argparse aliases whose help says
they are deprecated (:func:`deprecated`).
"""

from __future__ import annotations

import argparse
import re

EXECUTORS = ('single_threaded', 'multi_threaded', 'events')
# Names of earlier releases, still accepted (and mapped) by :func:`executor_name`.
DEPRECATED_EXECUTORS = {'single': 'single_threaded', 'multi': 'multi_threaded'}
STORAGES = ('mcap', 'sqlite3')
LOG_LEVELS = ('debug', 'info', 'warn', 'error')
GRAVITY_CONVENTIONS = ('full', 'driver_compensated')
# A barrier margin below this is thin [barrier units: rad or m]: the filter node's
# diagnostics WARN (parameter thin_margin) and the monitor alarms (--thin-margin).
THIN_MARGIN = 0.01


def executor_name(value: str) -> str:
    """An executor name of :data:`EXECUTORS`; the deprecated ``'single'`` and ``'multi'``
    map to ``'single_threaded'`` and ``'multi_threaded'`` (argparse ``type=`` too)."""
    return DEPRECATED_EXECUTORS.get(value, value)


_NAMESPACE_TOKEN = re.compile(r'[A-Za-z_][A-Za-z0-9_]*\Z')


def ros_namespace(value: str) -> str:
    """``value`` as a ROS namespace: ``''`` for the root (``''`` or ``'/'``), else
    ``'/a/b'`` (a leading ``/`` added). Also an argparse ``type=``.

    Raises:
        ValueError: a token that is empty, starts with a digit or holds other characters
            than letters, digits and underscores (the ROS 2 name rules); ``~`` and
            substitutions are not namespaces.
    """
    text = str(value).strip()
    if text in ('', '/'):
        return ''
    tokens = text.strip('/').split('/')
    bad = [token for token in tokens if not _NAMESPACE_TOKEN.match(token)]
    if bad or text.endswith('/') or '//' in text:
        raise ValueError(
            f'not a ROS namespace: {value!r} (tokens of letters, digits and underscores, not '
            'starting with a digit, separated by single slashes, e.g. /arm1 or /cell2/left)')
    return '/' + '/'.join(tokens)


def namespace_argument(value: str) -> str:
    """:func:`ros_namespace` as an argparse ``type=`` (its error message kept)."""
    try:
        return ros_namespace(value)
    except ValueError as err:
        raise argparse.ArgumentTypeError(str(err)) from err


def deprecated(help_text: str, *old: str) -> str:
    """``help_text`` followed by the note that the option strings ``old`` are deprecated."""
    plural = 's' if len(old) > 1 else ''
    return f'{help_text} ({", ".join(old)}: deprecated spelling{plural})'
