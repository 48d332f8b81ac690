"""Names the ROS layer accepts from users: executor kinds and node namespaces.

Imports nothing from ROS, so that the command line can offer these names (as ``choices``
and argparse ``type=``) without loading rclpy.
"""

from __future__ import annotations

import re

from safety_filter.errors import InvalidValue

# The executors of :func:`safety_filter.ros._common.make_executor` and of the graph runner.
EXECUTORS = ('single_threaded', 'multi_threaded', 'events')
# Names of earlier releases, still accepted (and mapped) by :func:`executor_name`.
DEPRECATED_EXECUTORS = {'single': 'single_threaded', 'multi': 'multi_threaded'}
# The filter node's default name (launch files and the graph runner start it under it).
FILTER_NODE_NAME = 'safety_filter'

_NAMESPACE_TOKEN = re.compile(r'[A-Za-z_][A-Za-z0-9_]*\Z')
_NAMESPACE_RULE = ('tokens of letters, digits and underscores, not starting with a digit, '
                   'separated by single slashes, e.g. /arm1 or /cell2/left')


def executor_name(value: str) -> str:
    """An executor name of :data:`EXECUTORS`; the deprecated ``'single'`` and ``'multi'``
    map to ``'single_threaded'`` and ``'multi_threaded'`` (argparse ``type=`` too)."""
    return DEPRECATED_EXECUTORS.get(value, value)


def ros_namespace(value: str) -> str:
    """``value`` as a ROS namespace: ``''`` for the root (``''`` or ``'/'``), else
    ``'/a/b'`` (a leading ``/`` added).

    Raises:
        InvalidValue: a token that is empty, starts with a digit or holds other characters
            than letters, digits and underscores (the ROS 2 name rules); ``~`` and
            substitutions are not namespaces.
    """
    text = str(value).strip()
    if text in ('', '/'):
        return ''
    tokens = text.strip('/').split('/')
    bad = [token for token in tokens if not _NAMESPACE_TOKEN.match(token)]
    if bad or text.endswith('/') or '//' in text:
        raise InvalidValue('not a ROS namespace', value, _NAMESPACE_RULE)
    return '/' + '/'.join(tokens)

