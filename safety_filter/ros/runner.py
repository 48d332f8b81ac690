"""Run a node graph of this package without ``ros2 launch``: in one process or several.

The graphs (:class:`~safety_filter.ros.graph_specs.NodeSpec` lists) are built by
:func:`~safety_filter.ros.graph_specs.sim_demo_graph` and
:func:`~safety_filter.ros.graph_specs.hardware_graph`, as the launch files start them.

:func:`run_graph` starts a graph either in this process (every node in one executor) or as
one subprocess per node, configures and activates the lifecycle filter node itself
(in-process through its transitions, across processes through its ``change_state``
service; the hardware graph's filter only configured, left inactive, unless asked to
activate at start), and stops everything cleanly on SIGINT/SIGTERM, when the simulated arm
has run its ``duration_s``, or after a wall-clock duration. What went wrong while it ran is
in its :class:`GraphResult`: nodes that failed (an exception out of a callback in this
process, a node process that exited early or with an error code) and, for a graph with a
simulated arm, the largest excursion past each of the arm's limits
(:attr:`GraphResult.broken_limits`).
"""
from __future__ import annotations

import importlib
import json
import os
import signal
import subprocess
import sys
import tempfile
import time
from collections.abc import Sequence
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

from safety_filter.core.limit_tolerance import LIMIT_TOLERANCE  # (a broken limit)
from safety_filter.errors import GraphError, InvalidValue, SafetyFilterError
from safety_filter.recordings import bags
from safety_filter.ros.graph_specs import NODES, NodeSpec, write_overrides
from safety_filter.ros.names import EXECUTORS, executor_name


# ---------------------------------------------------------------------- running
@dataclass
class GraphResult:
    """How a run went.

    Attributes:
        wall_s: wall-clock time from the start of the nodes to the stop [s].
        simulated_s: simulated time the arm ran after its release [s] (0 without a sim).
        finished: the simulated arm ran its whole duration (False: stopped early or no sim).
        interrupted: stopped by SIGINT/SIGTERM.
        exit_codes: per node name, the subprocess's exit code (subprocess mode only).
        counts: per topic, messages the recorder wrote (when there was one).
        sim_stats: the simulated driver's counters: ``ticks``, ``stale_ticks`` (zero
            torque: stale command), ``invalid_commands``, ``lockstep_timeouts`` (ticks with
            the held command: no answer in time).
        failures: what went wrong with the nodes while the graph ran, one line each (an
            exception out of a node's callback, a node process that exited early, with an
            error code, or had to be killed); empty when every node ran and stopped cleanly.
        excursions: with a simulated arm, its largest excursion past each limit since its
            release, ``{'position'|'velocity'|'torque': [per joint]}`` (0: kept; torque:
            the commands it was sent), in the order of ``joint_names``.
        joint_names: the simulated arm's joints.
    """

    wall_s: float
    simulated_s: float = 0.0
    finished: bool = False
    interrupted: bool = False
    exit_codes: dict[str, int | None] = field(default_factory=dict)
    counts: dict[str, int] = field(default_factory=dict)
    sim_stats: dict[str, int] = field(default_factory=dict)
    failures: list[str] = field(default_factory=list)
    excursions: dict[str, list[float]] = field(default_factory=dict)
    joint_names: list[str] = field(default_factory=list)

    @property
    def broken_limits(self) -> list[str]:
        """Each limit of the simulated arm broken by more than :data:`LIMIT_TOLERANCE`, as
        ``'<joint> <limit> by <excursion>'`` (empty: every limit kept, or no simulated arm)."""
        broken = []
        for kind, values in self.excursions.items():
            for joint, value in zip(self.joint_names, values):
                if value > LIMIT_TOLERANCE:
                    broken.append(f'{joint} {kind} by {value:.4g}')
        return broken

    def _take_sim_report(self, report: dict[str, Any]) -> None:
        self.sim_stats = {key: int(report[key]) for key in (
            'ticks', 'stale_ticks', 'invalid_commands', 'lockstep_timeouts')}
        self.excursions = {kind: [float(x) for x in values]
                           for kind, values in report['excursions'].items()}
        self.joint_names = list(report['joint_names'])
        self.simulated_s = float(report['released_for_s'])


class _StopFlag:
    """SIGINT/SIGTERM set a flag instead of raising (main thread only)."""

    def __init__(self) -> None:
        self.raised = False
        self._previous: dict[int, Any] = {}

    def __enter__(self) -> _StopFlag:
        for signum in (signal.SIGINT, signal.SIGTERM):
            try:
                self._previous[signum] = signal.signal(signum, self._handle)
            except ValueError:  # not the main thread: no handlers
                pass
        return self

    def _handle(self, signum: int, frame: Any) -> None:
        self.raised = True

    def __exit__(self, *exc: object) -> None:
        for signum, previous in self._previous.items():
            signal.signal(signum, previous)


def _environment(domain_id: int | None, localhost_only: bool) -> dict[str, str]:
    env = dict(os.environ)
    if domain_id is not None:
        env['ROS_DOMAIN_ID'] = str(int(domain_id))
    if localhost_only:
        env['ROS_AUTOMATIC_DISCOVERY_RANGE'] = 'LOCALHOST'
    return env


def run_graph(specs: Sequence[NodeSpec], *, processes: bool = False, executor: str = 'events',
              duration_s: float = 0.0, wall_timeout_s: float = 0.0,
              domain_id: int | None = None, localhost_only: bool = False,
              log_level: str | None = None, log_dir: str | Path | None = None) -> GraphResult:
    """Start the nodes of a graph, run it, stop it cleanly.

    Args:
        specs: the nodes (from :func:`sim_demo_graph` or :func:`hardware_graph`), started in
            this order (a recorder first, the simulated arm last).
        processes: one subprocess per node (True) or every node in this process.
        executor: ``'events'`` (default), ``'single_threaded'`` or ``'multi_threaded'``
            (:data:`safety_filter.ros.names.EXECUTORS`): the executor of the in-process
            graph, and of each of this package's demo nodes in subprocess mode (the filter
            node's executable always uses its own single-threaded one). See
            :func:`safety_filter.ros._common.make_executor`.
        duration_s: wall-clock seconds to run when the graph has no simulated arm with a
            ``duration_s`` of its own (0: until SIGINT/SIGTERM).
        wall_timeout_s: stop after this many wall seconds in any case (0: no limit).
        domain_id: ROS domain of the graph (default: ``ROS_DOMAIN_ID`` or 0).
        localhost_only: discover only on this machine (``ROS_AUTOMATIC_DISCOVERY_RANGE``).
        log_level: the nodes' log level (e.g. ``'warn'``); default the ROS default (info).
        log_dir: subprocess mode: write each node's output to ``<log_dir>/<name>.log``.

    Raises:
        GraphError: a node could not be created, or the filter not configured and
            activated.
    """
    executor = executor_name(executor)
    if not specs:
        raise GraphError('the graph has no nodes')
    unknown = [s.executable for s in specs if s.executable not in NODES]
    if unknown:
        raise GraphError(f'unknown executables {unknown}; known: {sorted(NODES)}')
    names = [s.fully_qualified_name for s in specs]
    if len(set(names)) != len(names):
        raise GraphError(f'node names must be unique, got {names}')
    if executor not in EXECUTORS:
        raise InvalidValue('executor', executor, f'one of {", ".join(EXECUTORS)}')
    with tempfile.TemporaryDirectory(prefix='safety_filter_graph_') as folder:
        if processes:  # the simulated arm reports its counters and excursions in a file
            specs = [_with_report_path(s, Path(folder)) if s.executable == 'sim_arm' else s
                     for s in specs]
        overrides = {s.fully_qualified_name: write_overrides(s, Path(folder)) for s in specs}
        runner = _run_subprocesses if processes else _run_in_process
        return runner(specs, overrides, executor=executor, duration_s=duration_s,
                      wall_timeout_s=wall_timeout_s, domain_id=domain_id,
                      localhost_only=localhost_only, log_level=log_level,
                      log_dir=Path(log_dir) if log_dir is not None else None)


def _with_report_path(spec: NodeSpec, folder: Path) -> NodeSpec:
    from dataclasses import replace

    name = spec.fully_qualified_name.strip('/').replace('/', '_')
    return replace(spec, parameters=dict(spec.parameters,
                                         report_path=str(folder / f'{name}_report.json')))


def _has_timed_sim(specs: Sequence[NodeSpec]) -> bool:
    return any(s.executable == 'sim_arm' and float(s.parameters.get('duration_s', 0.0)) > 0.0
               for s in specs)


def _should_stop(start: float, duration_s: float, wall_timeout_s: float, timed_sim: bool
                 ) -> bool:
    elapsed = time.monotonic() - start
    if wall_timeout_s > 0.0 and elapsed >= wall_timeout_s:
        return True
    return not timed_sim and duration_s > 0.0 and elapsed >= duration_s


def _init_context(domain_id: int | None, localhost_only: bool) -> Any:
    import rclpy
    from rclpy.signals import SignalHandlerOptions

    if localhost_only:  # read by the middleware when the context starts
        os.environ['ROS_AUTOMATIC_DISCOVERY_RANGE'] = 'LOCALHOST'
    context = rclpy.context.Context()
    rclpy.init(args=[], context=context, domain_id=domain_id,
               signal_handler_options=SignalHandlerOptions.NO)
    return context


def _run_in_process(specs: Sequence[NodeSpec], overrides: dict[str, Path | None], *,
                    executor: str, duration_s: float, wall_timeout_s: float,
                    domain_id: int | None, localhost_only: bool, log_level: str | None,
                    log_dir: Path | None) -> GraphResult:
    from rclpy.lifecycle import TransitionCallbackReturn
    from rclpy.logging import get_logging_severity_from_string, set_logger_level

    from safety_filter.ros._common import make_executor

    context = _init_context(domain_id, localhost_only)
    nodes: list[Any] = []
    result = GraphResult(wall_s=0.0)
    spinner = None
    try:
        with _StopFlag() as stop:
            for spec in specs:
                if log_level:
                    set_logger_level(spec.logger_name,
                                     get_logging_severity_from_string(log_level))
                cls = getattr(importlib.import_module(spec.module), NODES[spec.executable][1])
                try:
                    node = cls(spec.name, context=context, use_global_arguments=False,
                               cli_args=spec.ros_arguments(overrides[spec.fully_qualified_name]))
                except SafetyFilterError as err:
                    raise GraphError(f'node {spec.fully_qualified_name}: {err}') from err
                nodes.append(node)
            for spec, node in zip(specs, nodes):
                if spec.lifecycle:
                    for transition in spec.transitions:
                        outcome = getattr(node, f'trigger_{transition}')()
                        if outcome != TransitionCallbackReturn.SUCCESS:
                            raise GraphError(f'{spec.fully_qualified_name}: {transition} '
                                             'failed (see its log)')
            sims = [n for s, n in zip(specs, nodes) if s.executable == 'sim_arm']
            timed_sim = _has_timed_sim(specs)
            spinner = make_executor(executor, context)
            for node in nodes:
                spinner.add_node(node)
            start = time.monotonic()
            while not stop.raised:
                if timed_sim and all(s.finished for s in sims):
                    break
                if _should_stop(start, duration_s, wall_timeout_s, timed_sim):
                    break
                try:
                    spinner.spin_once(timeout_sec=0.05)
                except Exception as err:  # noqa: BLE001 - a node's callback raised: stop
                    # The executor cannot say which node raised; the traceback's last frame
                    # can.
                    result.failures.append(f'a node raised {type(err).__name__}: {err} '
                                           f'({_where(err)}); the graph was stopped')
                    break
            result.interrupted = stop.raised
            result.wall_s = time.monotonic() - start
            if sims:
                result._take_sim_report(sims[0].report())
                result.finished = all(s.finished for s in sims)
    finally:
        if spinner is not None:
            spinner.shutdown(timeout_sec=1.0)
        for spec, node in zip(specs, nodes):
            if spec.lifecycle:
                try:
                    node.trigger_shutdown()
                except Exception:  # noqa: BLE001 - best effort on the way out
                    pass
            if spec.executable == 'bag_recorder':
                node.close()
                result.counts = node.counts
            node.destroy_node()
        context.try_shutdown()
    return result


def _where(err: BaseException) -> str:
    """``file:line in function`` of the frame that raised ``err``."""
    import traceback

    frames = traceback.extract_tb(err.__traceback__)
    if not frames:
        return 'no traceback'
    last = frames[-1]
    return f'{Path(last.filename).name}:{last.lineno} in {last.name}'


def _call_lifecycle(node: Any, spinner: Any, name: str, transitions: Sequence[str],
                    timeout_s: float) -> None:
    from lifecycle_msgs.msg import Transition
    from lifecycle_msgs.srv import ChangeState

    ids = {'configure': Transition.TRANSITION_CONFIGURE,
           'activate': Transition.TRANSITION_ACTIVATE}
    client = node.create_client(ChangeState, f'{name}/change_state')
    try:
        if not client.wait_for_service(timeout_sec=timeout_s):
            raise GraphError(f'{name}: no lifecycle service after {timeout_s:g} s')
        for transition in transitions:
            request = ChangeState.Request()
            request.transition.id = ids[transition]
            future = client.call_async(request)
            spinner.spin_until_future_complete(future, timeout_sec=timeout_s)
            if not future.done() or not future.result().success:
                raise GraphError(f'{name}: {transition} failed (see its log)')
    finally:
        node.destroy_client(client)


def _wait_for_node(node: Any, spec: NodeSpec, process: subprocess.Popen[bytes],
                   timeout_s: float) -> None:
    name = spec.fully_qualified_name
    wanted = (spec.name, spec.namespace or '/')
    deadline = time.monotonic() + timeout_s
    while time.monotonic() < deadline:
        if wanted in node.get_node_names_and_namespaces():
            return
        if process.poll() is not None:
            raise GraphError(f'node {name} exited at start (code {process.returncode}); see '
                             'its log')
        time.sleep(0.05)
    raise GraphError(f'node {name} did not appear within {timeout_s:g} s')


def _run_subprocesses(specs: Sequence[NodeSpec], overrides: dict[str, Path | None], *,
                      executor: str, duration_s: float, wall_timeout_s: float,
                      domain_id: int | None, localhost_only: bool, log_level: str | None,
                      log_dir: Path | None) -> GraphResult:
    import rclpy
    from rclpy.executors import SingleThreadedExecutor

    env = _environment(domain_id, localhost_only)
    processes: dict[str, subprocess.Popen[bytes]] = {}
    logs: list[Any] = []
    result = GraphResult(wall_s=0.0)
    timed_sim = _has_timed_sim(specs)
    sims = [s.fully_qualified_name for s in specs if s.executable == 'sim_arm']
    if log_dir is not None:
        log_dir.mkdir(parents=True, exist_ok=True)
    context = _init_context(domain_id, localhost_only)
    watcher = rclpy.create_node('safety_filter_graph_runner', context=context)
    spinner = SingleThreadedExecutor(context=context)
    spinner.add_node(watcher)
    try:
        with _StopFlag() as stop:
            # One at a time, each once it is up: the recorder hears everything, the arm
            # starts last.
            for spec in specs:
                name = spec.fully_qualified_name
                own = [] if spec.lifecycle else ['--executor', executor]
                command = [sys.executable, '-m', spec.module, *own, *spec.arguments,
                           *spec.ros_arguments(overrides[name], log_level)]
                output = None
                if log_dir is not None:
                    log_name = name.strip('/').replace('/', '_')
                    output = open(log_dir / f'{log_name}.log', 'wb')  # noqa: SIM115
                    logs.append(output)
                processes[name] = subprocess.Popen(
                    command, env=env, stdout=output,
                    stderr=subprocess.STDOUT if output is not None else None,
                    start_new_session=True)
                _wait_for_node(watcher, spec, processes[name], 60.0)
                if spec.lifecycle:
                    _call_lifecycle(watcher, spinner, name, spec.transitions, 60.0)
                if stop.raised:
                    break
            start = time.monotonic()
            while not stop.raised:
                exited = [n for n, p in processes.items() if p.poll() is not None]
                if timed_sim and all(n in exited for n in sims):
                    result.finished = all(processes[n].returncode == 0 for n in sims)
                    break
                early = [n for n in exited if n not in sims]
                if early:
                    # A node gone while the graph runs: stop the rest and say so.
                    result.failures += [f'{n} exited early (code {processes[n].returncode})'
                                        for n in early]
                    break
                if _should_stop(start, duration_s, wall_timeout_s, timed_sim):
                    break
                time.sleep(0.05)
            result.interrupted = stop.raised
            result.wall_s = time.monotonic() - start
    finally:
        # Stop in reverse start order: the arm and the operator first, the recorder last.
        stopped_by_us = set()
        for name in reversed(list(processes)):
            process = processes[name]
            if process.poll() is None:
                stopped_by_us.add(name)
                process.send_signal(signal.SIGINT)
                try:
                    process.wait(timeout=15.0)
                except subprocess.TimeoutExpired:
                    process.kill()
                    process.wait()
                    result.failures.append(f'{name} did not stop within 15 s of SIGINT; '
                                           'killed')
            result.exit_codes[name] = process.returncode
            early = any(f.startswith(f'{name} exited early') for f in result.failures)
            if process.returncode not in (0, None) and not early and (
                    name in stopped_by_us or name in sims):
                result.failures.append(f'{name} exited with code {process.returncode}')
        for handle in logs:
            handle.close()
        spinner.shutdown(timeout_sec=1.0)
        watcher.destroy_node()
        context.try_shutdown()
    for spec in specs:
        if spec.executable == 'bag_recorder':
            path = Path(spec.parameters['bag_path'])
            if (path / 'metadata.yaml').is_file():
                result.counts = {t: i.count for t, i in bags.topic_summary(path).items()}
        if spec.executable == 'sim_arm':
            report = Path(str(spec.parameters.get('report_path', '')))
            if report.is_file():
                result._take_sim_report(json.loads(report.read_text(encoding='utf-8')))
    return result
