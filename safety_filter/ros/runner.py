"""Run a node graph of this package without ``ros2 launch``: in one process or several.

The graphs are the ones the launch files in ``launch/`` start, with the same executables,
parameter files from ``config/``, certificate and remappings:

* :func:`sim_demo_graph`: the simulated arm (``sim_arm``), the careless operator and the
  filter, the filter's ``filtered_torque`` remapped to the arm's ``sim_effort_command``
  (``launch/sim_demo.launch.py``); optionally a bag recorder.
* :func:`hardware_graph`: the filter alone, between the user's command source and driver
  (``launch/hardware.launch.py``).

Both graphs take a ``namespace``: every node of the graph runs in it (its relative topics,
``~/`` topics and services with it; ``/diagnostics`` and ``/clock`` stay global), as the
launch files' ``namespace`` argument does. Parameter files apply there too: the config files
are keyed ``/**/<node name>`` and certificates ``/**``.

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

The unfiltered baseline of the demo (the operator's torque sent straight to the simulated
arm) is **not** a mode of the filter node and cannot be asked of it: it is a graph without
the filter, built only by :func:`sim_demo_graph` around the simulated arm (its
``sim_effort_command`` remapped to ``nominal_torque``), for ``safety-filter demo``.
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

import yaml

from safety_filter.errors import GraphError, SafetyFilterError
from safety_filter.recordings import bags
from safety_filter.ros.names import EXECUTORS, FILTER_NODE_NAME, executor_name, ros_namespace

PACKAGE = 'safety_filter'
SIM_DEMO_CONFIG = 'sim_demo.yaml'
FILTER_CONFIG = 'filter.yaml'
# The simulated arm's command topic, and the hardware graph's default command topic: they
# differ, so that a sim graph cannot command a real arm's driver by accident.
COMMAND_TOPIC = 'sim_effort_command'
HARDWARE_COMMAND_TOPIC = 'effort_command'
# A sim graph runs on a random ROS domain in this range, discovery on this machine only
# (as the demo does), unless given a domain.
SIM_DOMAIN_RANGE = (150, 199)
# An excursion past a limit of the simulated arm larger than this counts as a broken limit
# (the demo report's tolerance, safety_filter.reports.demo_report.VIOLATION_TOLERANCE).
LIMIT_TOLERANCE = 1e-6

# Executable (console script) -> (module, node class) of this package's nodes.
NODES = {
    'filter_node': ('safety_filter.ros.filter_node', 'SafetyFilterNode'),
    'sim_arm': ('safety_filter.ros.sim_arm_node', 'SimArmNode'),
    'careless_operator': ('safety_filter.ros.operator_node', 'CarelessOperatorNode'),
    'bag_recorder': ('safety_filter.ros.recorder_node', 'BagRecorderNode'),
}



def config_file(name: str) -> Path:
    """Path of a parameter file of ``config/``.

    Looked up in the source tree next to the package (a clone, or ``pip install -e``), in
    the package's share folder of an install (the ament index, then ``<prefix>/share``).
    """
    here = Path(__file__).resolve().parent.parent.parent / 'config' / name
    candidates = [here]
    try:
        from ament_index_python.packages import get_package_share_directory

        candidates.append(Path(get_package_share_directory(PACKAGE)) / 'config' / name)
    except Exception:  # noqa: BLE001 - not installed, or the package not in the index
        pass
    candidates.append(Path(sys.prefix) / 'share' / PACKAGE / 'config' / name)
    for candidate in candidates:
        if candidate.is_file():
            return candidate
    raise GraphError(f'parameter file config/{name} not found (looked in '
                     f'{", ".join(str(c.parent) for c in candidates)})')


def check_namespace(namespace: str) -> str:
    """``namespace`` as a ROS namespace: ``''`` (the root) or ``'/a/b'``.

    A leading ``/`` is added; tokens are letters, digits and underscores, not starting with
    a digit (the ROS 2 name rules).

    Raises:
        InvalidValue: any other text, with the rule it breaks.
    """
    return ros_namespace(namespace)


def in_namespace(namespace: str, topic: str) -> str:
    """The absolute topic ``topic`` (``'/joint_states'``) inside ``namespace``."""
    return (namespace.rstrip('/') + topic) if namespace else topic


@dataclass
class NodeSpec:
    """One node of a graph, as a launch file's ``Node(...)`` describes it.

    Attributes:
        executable: console script (a key of :data:`NODES`).
        name: node name.
        parameter_files: ``--params-file`` files, in order (later ones win).
        parameters: parameters given last (they win over the files).
        remappings: ``(from, to)`` topic remappings.
        arguments: extra command-line arguments of the executable (subprocess only).
        activate: a lifecycle node is configured and activated at start (True) or only
            configured, left inactive for ``ros2 lifecycle set <name> activate`` (False).
        namespace: the node's namespace (``''``: the root).
    """

    executable: str
    name: str
    parameter_files: list[Path] = field(default_factory=list)
    parameters: dict[str, Any] = field(default_factory=dict)
    remappings: list[tuple[str, str]] = field(default_factory=list)
    arguments: list[str] = field(default_factory=list)
    activate: bool = True
    namespace: str = ''

    @property
    def fully_qualified_name(self) -> str:
        """``'/<namespace>/<name>'``, e.g. ``'/arm1/safety_filter'``."""
        return f'{self.namespace.rstrip("/")}/{self.name}'

    @property
    def logger_name(self) -> str:
        """The node's logger name (rclpy joins namespace and name with dots)."""
        return '.'.join([*self.namespace.strip('/').split('/'), self.name]).lstrip('.')

    @property
    def transitions(self) -> tuple[str, ...]:
        """The lifecycle transitions the runner triggers at start."""
        if not self.lifecycle:
            return ()
        return ('configure', 'activate') if self.activate else ('configure',)

    @property
    def module(self) -> str:
        return NODES[self.executable][0]

    @property
    def lifecycle(self) -> bool:
        """Whether the node is a managed (lifecycle) node."""
        return self.executable == 'filter_node'

    def ros_arguments(self, overrides_file: Path | None, log_level: str | None = None
                      ) -> list[str]:
        """``--ros-args ...`` for this node: name, parameter files, overrides, remappings."""
        args = ['--ros-args', '-r', f'__node:={self.name}']
        if self.namespace:
            args += ['-r', f'__ns:={self.namespace}']
        for path in self.parameter_files:
            args += ['--params-file', str(path)]
        if overrides_file is not None:
            args += ['--params-file', str(overrides_file)]
        for source, target in self.remappings:
            args += ['-r', f'{source}:={target}']
        if log_level:
            args += ['--log-level', f'{self.logger_name}:={log_level}']
        return args


def _write_overrides(spec: NodeSpec, folder: Path) -> Path | None:
    if not spec.parameters:
        return None
    path = folder / f'{spec.fully_qualified_name.strip("/").replace("/", "_")}_overrides.yaml'
    plain = {k: (list(v) if isinstance(v, tuple) else v) for k, v in spec.parameters.items()}
    # Keyed '/**': the file goes to this one node, in whatever namespace it runs.
    path.write_text(yaml.safe_dump({'/**': {'ros__parameters': plain}}), encoding='utf-8')
    return path


# ---------------------------------------------------------------------- graphs
def sim_demo_graph(*, urdf_path: str | Path, limits_path: str | Path,
                   certificate: str | Path | None, filtered: bool = True,
                   duration_s: float = 0.0, seed: int | None = None,
                   payload_mass: float | None = None, bag_path: str | Path | None = None,
                   storage: str = 'mcap', config: str | Path | None = None,
                   control_rate_hz: float | None = None, namespace: str = ''
                   ) -> list[NodeSpec]:
    """The simulated demo graph (``launch/sim_demo.launch.py``), optionally recorded.

    Args:
        urdf_path, limits_path: the robot (every node loads the same model).
        certificate: the certificate parameter file (needed when ``filtered``).
        filtered: True: operator -> filter -> arm. False: the unfiltered baseline, the
            operator's ``nominal_torque`` straight to the simulated arm (simulation only:
            it exists only in this graph, around ``sim_arm``).
        duration_s: simulated seconds the arm runs after its release (0: until stopped).
        seed: the operator's seed (default: the parameter file's).
        payload_mass: payload [kg] of the simulated arm, told to the filter and the
            operator (default: the parameter file's).
        bag_path: record the graph's topics to this bag (a ``bag_recorder`` node).
        storage: bag storage, ``'mcap'`` or ``'sqlite3'``.
        config: the parameter file (default ``config/sim_demo.yaml``).
        control_rate_hz: the arm's control rate (default: the certificate's).
        namespace: every node's namespace (the recorder records the graph's topics in it).

    Raises:
        GraphError: an invalid namespace, or a filtered graph without a certificate.
    """
    namespace = check_namespace(namespace)
    config = Path(config) if config is not None else config_file(SIM_DEMO_CONFIG)
    robot = {'urdf_path': str(urdf_path), 'limits_path': str(limits_path)}
    if control_rate_hz is None and certificate is not None:
        from safety_filter.core.certificate import Certificate

        control_rate_hz = Certificate.load(certificate).control_rate_hz
    sim_parameters: dict[str, Any] = dict(robot, lockstep=bool(filtered),
                                          duration_s=float(duration_s))
    if control_rate_hz is not None:
        sim_parameters['control_rate_hz'] = float(control_rate_hz)
    operator_parameters: dict[str, Any] = dict(robot)
    filter_parameters: dict[str, Any] = dict(robot)
    if payload_mass is not None:
        for parameters in (sim_parameters, operator_parameters, filter_parameters):
            parameters['payload_mass'] = float(payload_mass)
    if seed is not None:
        operator_parameters['seed'] = int(seed)
    sim = NodeSpec('sim_arm', 'sim_arm', [config], sim_parameters, namespace=namespace)
    operator = NodeSpec('careless_operator', 'careless_operator', [config],
                        operator_parameters, namespace=namespace)
    specs = []
    if bag_path is not None:
        # The graph's topics as they are named in the namespace (/diagnostics is global).
        topics = [bags.TOPIC_DIAGNOSTICS] + [in_namespace(namespace, topic) for topic in (
            bags.TOPIC_JOINT_STATES, bags.TOPIC_NOMINAL, bags.TOPIC_COMMAND, bags.TOPIC_STATUS,
            bags.TOPIC_STATUS_FIELDS)]
        specs.append(NodeSpec('bag_recorder', 'bag_recorder', [], {
            'bag_path': str(bag_path), 'storage': storage, 'topics': topics,
            'types': [bags.TOPIC_TYPES[topic] for topic in (
                bags.TOPIC_DIAGNOSTICS, bags.TOPIC_JOINT_STATES, bags.TOPIC_NOMINAL,
                bags.TOPIC_COMMAND, bags.TOPIC_STATUS, bags.TOPIC_STATUS_FIELDS)],
            'latched_topics': [in_namespace(namespace, t) for t in bags.LATCHED_TOPICS],
            'use_sim_time': True}, namespace=namespace))
    if filtered:
        if certificate is None:
            raise GraphError('the filtered graph needs a certificate')
        specs.append(NodeSpec('filter_node', FILTER_NODE_NAME, [Path(certificate), config],
                              filter_parameters,
                              [('filtered_torque', COMMAND_TOPIC)], namespace=namespace))
    else:
        # The unfiltered baseline: the arm takes the operator's torque directly.
        sim.remappings.append((COMMAND_TOPIC, 'nominal_torque'))
    specs += [operator, sim]
    return specs


def hardware_graph(*, certificate: str | Path, urdf_path: str | Path = '',
                   limits_path: str | Path = '', command_topic: str = HARDWARE_COMMAND_TOPIC,
                   joint_states_topic: str = 'joint_states',
                   nominal_topic: str = 'nominal_torque', gravity_convention: str = 'full',
                   payload_mass: float = -1.0, watchdog_rate_hz: float = 0.0,
                   config: str | Path | None = None, activate_at_start: bool = False,
                   namespace: str = '', robot_description_topic: str = ''
                   ) -> list[NodeSpec]:
    """The filter alone (``launch/hardware.launch.py``), between a command source and a driver.

    Args:
        certificate: the certificate parameter file.
        urdf_path, limits_path: the robot (``urdf_path`` a URDF or ``.xacro`` file).
        command_topic: the driver's effort-command topic (``filtered_torque`` goes there).
        joint_states_topic, nominal_topic: where the filter reads states and nominal torques.
        gravity_convention: ``'full'`` or ``'driver_compensated'``.
        payload_mass: mounted payload [kg]; negative: the middle of the certified range.
        watchdog_rate_hz: the filter's watchdog rate [Hz] (parameter ``watchdog_rate_hz``;
            0: the certificate's control rate).
        config: operational parameters (default ``config/filter.yaml``).
        activate_at_start: activate the filter at start. Default False: it is configured and
            stays inactive (no torque published) until ``ros2 lifecycle set
            /<namespace>/safety_filter activate``: a real arm's driver gets commands only
            when the user says so.
        namespace: the filter's namespace (its relative topics resolve in it).
        robot_description_topic: read the URDF from this topic (``std_msgs/String``,
            transient-local, as robot_state_publisher publishes ``robot_description``)
            instead of ``urdf_path``.

    Raises:
        GraphError: an invalid namespace, or not exactly one of ``urdf_path`` and
            ``robot_description_topic``.
    """
    namespace = check_namespace(namespace)
    if bool(str(urdf_path)) == bool(robot_description_topic):
        raise GraphError('give the robot as urdf_path or robot_description_topic (one of '
                         'them)')
    config = Path(config) if config is not None else config_file(FILTER_CONFIG)
    return [NodeSpec('filter_node', FILTER_NODE_NAME, [Path(certificate), config], {
        'urdf_path': str(urdf_path), 'limits_path': str(limits_path),
        'robot_description_topic': str(robot_description_topic),
        'gravity_convention': gravity_convention, 'payload_mass': float(payload_mass),
        'watchdog_rate_hz': float(watchdog_rate_hz)}, [
        ('filtered_torque', command_topic), ('joint_states', joint_states_topic),
        ('nominal_torque', nominal_topic)], activate=bool(activate_at_start),
        namespace=namespace)]


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
        raise GraphError(f'executor must be one of {EXECUTORS}, got {executor!r}')
    with tempfile.TemporaryDirectory(prefix='safety_filter_graph_') as folder:
        if processes:  # the simulated arm reports its counters and excursions in a file
            specs = [_with_report_path(s, Path(folder)) if s.executable == 'sim_arm' else s
                     for s in specs]
        overrides = {s.fully_qualified_name: _write_overrides(s, Path(folder)) for s in specs}
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
