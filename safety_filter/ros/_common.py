"""Helpers shared by the demo's nodes (private): QoS profiles, the robot model from
parameters, joint-state matching, and a spin loop with clean SIGINT/SIGTERM handling."""

from __future__ import annotations

import argparse
import signal
import sys
from collections.abc import Callable, Sequence
from typing import Any

import numpy as np
import rclpy
from rcl_interfaces.msg import ParameterDescriptor
from rclpy.executors import SingleThreadedExecutor
from rclpy.qos import DurabilityPolicy, HistoryPolicy, QoSProfile, ReliabilityPolicy
from rclpy.signals import SignalHandlerOptions
from rclpy.utilities import remove_ros_args

from safety_filter.core.robot_model import RobotModel
from safety_filter.errors import ExitCode, InvalidValue, SafetyFilterError
from safety_filter.ros.names import EXECUTORS, executor_name


def state_qos() -> QoSProfile:
    """Reliable, volatile, keep-last 10 for published states: a subscriber that wants only
    the newest sample (the filter) keeps depth 1 on its side; a recorder misses nothing."""
    return QoSProfile(history=HistoryPolicy.KEEP_LAST, depth=10,
                      reliability=ReliabilityPolicy.RELIABLE,
                      durability=DurabilityPolicy.VOLATILE)


def latest_qos() -> QoSProfile:
    """Keep-last 1, reliable, volatile: for consumers that act on the newest sample only
    (a driver on its commands, an operator on joint states)."""
    return QoSProfile(history=HistoryPolicy.KEEP_LAST, depth=1,
                      reliability=ReliabilityPolicy.RELIABLE,
                      durability=DurabilityPolicy.VOLATILE)


def describe(text: str) -> ParameterDescriptor:
    """A read-only parameter descriptor (read at start)."""
    return ParameterDescriptor(description=text, read_only=True)


def load_model(urdf_path: str, limits_path: str) -> RobotModel:
    """The robot model from the ``urdf_path`` and ``limits_path`` parameters."""
    if not urdf_path:
        raise InvalidValue('urdf_path', urdf_path, 'a URDF file',
                           detail='urdf_path is not set: give the robot URDF')
    return RobotModel.from_urdf(urdf_path, limits=limits_path or None)


class JointOrder:
    """Maps the names of a ``JointState`` to the model's joint order (cached per name list)."""

    def __init__(self, joint_names: Sequence[str]) -> None:
        self.joint_names = list(joint_names)
        self._names: list[str] | None = None
        self._index: np.ndarray | None = None

    def index(self, names: Sequence[str]) -> np.ndarray | None:
        """Column of each model joint in ``names``; None when one is missing."""
        if names != self._names:
            self._names = list(names)
            position = {name: i for i, name in enumerate(names)}
            if all(joint in position for joint in self.joint_names):
                self._index = np.array([position[j] for j in self.joint_names], dtype=np.intp)
            else:
                self._index = None
        return self._index


def _raise_keyboard_interrupt(signum: int, frame: Any) -> None:
    raise KeyboardInterrupt


def make_executor(kind: str, context: Any) -> Any:
    """An executor of :data:`EXECUTORS` for ``context``.

    ``'events'`` is rclpy's EventsExecutor (``rclpy.experimental`` in Jazzy): about twice
    as fast as the single-threaded executor, and four times as fast as the multi-threaded
    one, for a 1 kHz loop of Python nodes, because it does not rebuild a wait set for every
    callback. ``'single_threaded'`` and ``'multi_threaded'`` are the classic executors (the
    deprecated names ``'single'`` and ``'multi'`` still work).
    """
    kind = executor_name(kind)
    if kind == 'events':
        from rclpy.experimental import EventsExecutor

        return EventsExecutor(context=context)
    if kind == 'single_threaded':
        return SingleThreadedExecutor(context=context)
    if kind == 'multi_threaded':
        from rclpy.executors import MultiThreadedExecutor

        return MultiThreadedExecutor(num_threads=2, context=context)
    raise InvalidValue('executor', kind, f'one of {", ".join(EXECUTORS)}')


def _executor_argument(argv: Sequence[str]) -> str:
    """The ``--executor`` option of a node executable (outside ``--ros-args``)."""
    parser = argparse.ArgumentParser(add_help=False)
    parser.add_argument('--executor', type=executor_name, choices=EXECUTORS,
                        default='single_threaded',
                        help='the rclpy executor of the node (default: single_threaded)')
    known, _ = parser.parse_known_args(list(remove_ros_args(list(argv)))[1:])
    return str(known.executor)


def spin_node(node_factory: Callable[[Any], Any], args: Sequence[str] | None,
              done: Callable[[Any], bool] | None = None) -> int:
    """Create a node in a context of its own and spin it until SIGINT/SIGTERM or
    ``done(node)``; then call its ``close()`` (if any) and destroy it.

    Args:
        node_factory: ``factory(context) -> node``.
        args: the command line like ``sys.argv`` (program name first); default sys.argv.
            ``--executor {single_threaded,multi_threaded,events}`` (before
            ``--ros-args``) picks the executor (default single_threaded).
        done: optional predicate that ends the spin.

    Returns:
        0, or 1 when the node could not be created (the reason is printed).
    """
    argv = list(sys.argv if args is None else args)
    executor_kind = _executor_argument(argv)
    context = rclpy.context.Context()
    rclpy.init(args=argv, context=context, signal_handler_options=SignalHandlerOptions.NO)
    previous_int = signal.signal(signal.SIGINT, _raise_keyboard_interrupt)
    previous_term = signal.signal(signal.SIGTERM, _raise_keyboard_interrupt)
    node = None
    executor = None
    try:
        try:
            node = node_factory(context)
        except SafetyFilterError as err:
            print(f'error: {err}', file=sys.stderr)
            return ExitCode.FAILED
        executor = make_executor(executor_kind, context)
        executor.add_node(node)
        while context.ok() and not (done is not None and done(node)):
            executor.spin_once(timeout_sec=0.1)
    except KeyboardInterrupt:
        pass
    finally:
        signal.signal(signal.SIGINT, previous_int)
        signal.signal(signal.SIGTERM, previous_term)
        if executor is not None:
            executor.shutdown(timeout_sec=1.0)
        if node is not None:
            close = getattr(node, 'close', None)
            if close is not None:
                close()
            node.destroy_node()
        context.try_shutdown()
    return ExitCode.OK
