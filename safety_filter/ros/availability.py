"""Whether ROS 2 is installed, asked by commands before they start ROS work.

The command line (``safety_filter.cli``) may not import rclpy itself; it asks here, and gets
an error that says how to install ROS 2 instead of an ImportError.
"""

from __future__ import annotations

import importlib
from types import ModuleType

from safety_filter.errors import RunFailed

INSTALL_HINT = ("install them with pip install -e '.[ros]' (the ROS 2 Jazzy wheels) or "
                'source a ROS 2 Jazzy install')


def require_rclpy(what: str = 'this command') -> None:
    """Return when rclpy can be imported.

    Raises:
        RunFailed: rclpy is not installed (``what`` names what needs it).
    """
    import_ros_module('rclpy', what)


def import_ros_module(name: str, what: str) -> ModuleType:
    """The module ``name`` (one that imports rclpy and ROS messages), imported.

    Raises:
        RunFailed: rclpy or a ROS 2 message package is not installed.
    """
    try:
        return importlib.import_module(name)
    except ImportError as err:
        raise RunFailed(f'{what} needs rclpy and the ROS 2 message packages ({err}); '
                        f'{INSTALL_HINT}') from err
