"""The node graphs of this package, as the launch files start them: which nodes, with which
parameter files, parameters and remappings (:class:`NodeSpec`).

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

The unfiltered baseline of the demo (the operator's torque sent straight to the simulated
arm) is **not** a mode of the filter node and cannot be asked of it: it is a graph without
the filter, built only by :func:`sim_demo_graph` around the simulated arm (its
``sim_effort_command`` remapped to ``nominal_torque``), for ``safety-filter demo``.

:mod:`safety_filter.ros.runner` runs them. Nothing here imports rclpy.
"""
from __future__ import annotations

import sys
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

import yaml

from safety_filter.errors import GraphError, InvalidValue
from safety_filter.recordings import bags
from safety_filter.ros.names import FILTER_NODE_NAME, ros_namespace

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


def write_overrides(spec: NodeSpec, folder: Path) -> Path | None:
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
            raise InvalidValue('certificate', certificate, 'a certificate file',
                               detail='the filtered graph needs a certificate')
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
        raise InvalidValue('robot', 'urdf_path and robot_description_topic',
                           detail='give the robot as urdf_path or robot_description_topic '
                           '(one of them)')
    config = Path(config) if config is not None else config_file(FILTER_CONFIG)
    return [NodeSpec('filter_node', FILTER_NODE_NAME, [Path(certificate), config], {
        'urdf_path': str(urdf_path), 'limits_path': str(limits_path),
        'robot_description_topic': str(robot_description_topic),
        'gravity_convention': gravity_convention, 'payload_mass': float(payload_mass),
        'watchdog_rate_hz': float(watchdog_rate_hz)}, [
        ('filtered_torque', command_topic), ('joint_states', joint_states_topic),
        ('nominal_torque', nominal_topic)], activate=bool(activate_at_start),
        namespace=namespace)]
