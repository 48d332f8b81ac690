"""Shared pieces of the ROS node tests: certificates, a DDS domain, a test harness node.

* :func:`certified_arm` takes a demo arm's session certificate (``certify_fixtures.py``:
  default settings, certified once per session) and saves its parameter files to a
  temporary directory.
* :func:`isolate_ros_domain` gives a test module its own DDS domain (random id in 100..200,
  discovery limited to localhost), so parallel runs and other ROS traffic do not mix.
* :class:`NodeRunner` runs a :class:`SafetyFilterNode` in this process, in its own rclpy
  context (its own DDS participant) with its own executor thread.
* :class:`Harness` is the test side, in another context: publishers of joint states and
  nominal torques (optionally timer-driven at 1 kHz), recorders of the filter's outputs,
  and clients of the lifecycle and parameter services. Traffic between the two goes through
  DDS on loopback; nothing of ROS is mocked.
* :func:`replay_statuses` replays the ``~/status`` records through a separate
  :class:`SafetyFilter` and compares, the core of the exactness checks.
"""

from __future__ import annotations

import atexit
import functools
import itertools
import math
import os
import random
import shutil
import tempfile
import threading
import time
from collections.abc import Callable, Sequence
from dataclasses import dataclass
from pathlib import Path
from typing import Any

import numpy as np
import pytest
from certify_fixtures import demo_certificate

rclpy = pytest.importorskip(
    'rclpy', reason='rclpy is missing: install the ROS 2 wheels with '
    "pip install -e '.[ros]' (or source a ROS 2 Jazzy install)")

from diagnostic_msgs.msg import DiagnosticArray, DiagnosticStatus  # noqa: E402
from lifecycle_msgs.msg import Transition  # noqa: E402
from lifecycle_msgs.srv import ChangeState, GetState  # noqa: E402
from rcl_interfaces.srv import GetParameters, SetParameters  # noqa: E402
from rclpy.parameter import Parameter, parameter_value_to_python  # noqa: E402
from rclpy.qos import DurabilityPolicy, QoSProfile, ReliabilityPolicy  # noqa: E402
from sensor_msgs.msg import JointState  # noqa: E402
from std_msgs.msg import Float64MultiArray, String  # noqa: E402

from safety_filter.core.certificate import Certificate  # noqa: E402
from safety_filter.core.robot_model import RobotModel  # noqa: E402
from safety_filter.online.barrier_filter import SafetyFilter  # noqa: E402
from safety_filter.online.mode_codes import MODE_STALE, mode_code  # noqa: E402
from safety_filter.online.status_layout import unpack_status  # noqa: E402
from safety_filter.ros.filter_node import (  # noqa: E402
    SafetyFilterNode,
    control_qos,
    make_executor,
    status_field_names,
)
from safety_filter.simulation.demo_arms import demo_arm_files  # noqa: E402

NODE_NAME = 'safety_filter'
ANY_NAMESPACE_KEY = f'/**/{NODE_NAME}'  # parameter-file key matching the node in any namespace
TRANSITIONS = {'configure': Transition.TRANSITION_CONFIGURE,
               'cleanup': Transition.TRANSITION_CLEANUP,
               'activate': Transition.TRANSITION_ACTIVATE,
               'deactivate': Transition.TRANSITION_DEACTIVATE,
               'shutdown_from_active': Transition.TRANSITION_ACTIVE_SHUTDOWN}
LEVEL_NAMES = {DiagnosticStatus.OK: 'OK', DiagnosticStatus.WARN: 'WARN',
               DiagnosticStatus.ERROR: 'ERROR', DiagnosticStatus.STALE: 'STALE'}


# ---------------------------------------------------------------------- certificates
@dataclass(frozen=True)
class CertifiedArm:
    """A demo arm with its certificate parameter files.

    ``default_certificate_path`` is the file as :meth:`Certificate.save` (and so
    ``safety-filter certify``) writes it, keyed ``/**``: the node it is given to, in any
    namespace; ``certificate_path`` is the same content keyed ``/**/safety_filter``, the
    node of that name in any namespace (the tests give each node its own namespace).
    """

    name: str
    model: RobotModel
    certificate: Certificate
    certificate_path: Path
    default_certificate_path: Path
    urdf_path: Path
    limits_path: Path

    def reference_filter(self, **options: Any) -> SafetyFilter:
        """A filter with the node's default options (or ``options``)."""
        return SafetyFilter(self.model, self.certificate, **options)


_CERTIFICATE_DIR: list[Path] = []


def _certificate_dir() -> Path:
    if not _CERTIFICATE_DIR:
        folder = Path(tempfile.mkdtemp(prefix='safety_filter_node_test_'))
        atexit.register(shutil.rmtree, folder, ignore_errors=True)
        _CERTIFICATE_DIR.append(folder)
    return _CERTIFICATE_DIR[0]


@functools.lru_cache(maxsize=None)
def certified_arm(name: str, control_rate_hz: float = 1000.0) -> CertifiedArm:
    """Demo arm ``name`` with its session certificate at ``control_rate_hz`` and the
    certificate's parameter files (fails the test, with the reasons, when the arm does not
    certify: that is a regression of the certification, not a reason to skip node tests)."""
    model, certificate = demo_certificate(name, control_rate_hz)
    stem = name if control_rate_hz == 1000.0 else f'{name}_{control_rate_hz:g}hz'
    default_path = certificate.save(_certificate_dir() / f'{stem}_certificate.yaml')
    path = certificate.save(_certificate_dir() / f'{stem}_certificate_any_namespace.yaml',
                            node_name=ANY_NAMESPACE_KEY)
    urdf, limits = demo_arm_files(name)
    return CertifiedArm(name, model, certificate, path, default_path, urdf, limits)


# ---------------------------------------------------------------------- DDS domain
def isolate_ros_domain() -> int:
    """Pick a random domain id in 100..200 for this module; sets the environment too (for
    subprocesses) and returns it (for ``rclpy.init(domain_id=...)``)."""
    domain = random.SystemRandom().randint(100, 200)
    os.environ['ROS_DOMAIN_ID'] = str(domain)
    os.environ['ROS_AUTOMATIC_DISCOVERY_RANGE'] = 'LOCALHOST'
    return domain


def node_arguments(arm: CertifiedArm, certificate_path: Path | None = None,
                   **parameters: Any) -> list[str]:
    """``--ros-args`` for the node: the certificate file (default: the one keyed for any
    namespace), the URDF and limits, and ``parameters``."""
    path = arm.certificate_path if certificate_path is None else certificate_path
    args = ['--ros-args', '--params-file', str(path),
            '-p', f'urdf_path:={arm.urdf_path}', '-p', f'limits_path:={arm.limits_path}']
    for key, value in parameters.items():
        args += ['-p', f'{key}:={value}']
    return args


def wait_for(condition: Callable[[], bool], timeout: float, step: float = 0.01) -> bool:
    """Poll ``condition`` until it holds or ``timeout`` [s] passes; its last value."""
    deadline = time.monotonic() + timeout
    while time.monotonic() < deadline:
        if condition():
            return True
        time.sleep(step)
    return bool(condition())


class _Spinner:
    """An rclpy context with an executor (single-threaded by default, or rclpy's events
    executor) spinning in a thread."""

    def __init__(self, domain_id: int, executor: str = 'single_threaded') -> None:
        self.context = rclpy.context.Context()
        rclpy.init(context=self.context, domain_id=domain_id)
        self.executor = make_executor(executor, self.context)
        self._running = threading.Event()
        self._thread: threading.Thread | None = None

    def start(self) -> None:
        self._running.set()
        self._thread = threading.Thread(target=self._spin, daemon=True)
        self._thread.start()

    def _spin(self) -> None:
        while self._running.is_set() and self.context.ok():
            self.executor.spin_once(timeout_sec=0.02)

    def stop(self, nodes: Sequence[Any]) -> None:
        """Stop spinning, then destroy the nodes, then shut the context down."""
        self._running.clear()
        if self._thread is not None:
            self._thread.join(timeout=10.0)
            assert not self._thread.is_alive(), 'the executor thread did not stop'
        for node in nodes:
            self.executor.remove_node(node)
            node.destroy_node()
        self.executor.shutdown(timeout_sec=2.0)
        self.context.try_shutdown()


_NAMESPACES = itertools.count()


def unique_namespace() -> str:
    """A namespace no other test uses: no node of an earlier test (whose discovery data may
    linger in DDS for a while) shares a topic or service name with this one."""
    return f'/test_{os.getpid()}_{next(_NAMESPACES)}'


class NodeRunner:
    """The filter node in this process, in its own context and executor thread."""

    def __init__(self, domain_id: int, arguments: Sequence[str], namespace: str,
                 executor: str = 'single_threaded') -> None:
        self._spinner = _Spinner(domain_id, executor)
        self.node = SafetyFilterNode(context=self._spinner.context, cli_args=list(arguments),
                                     namespace=namespace)
        self._spinner.executor.add_node(self.node)
        self._spinner.start()

    def close(self) -> None:
        self._spinner.stop([self.node])


# ---------------------------------------------------------------------- the harness
class Recorder:
    """Messages of one topic with their receipt time (steady clock), in arrival order."""

    def __init__(self) -> None:
        self.items: list[tuple[float, Any]] = []
        self._lock = threading.Lock()

    def __call__(self, msg: Any) -> None:
        with self._lock:
            self.items.append((time.monotonic(), msg))

    def __len__(self) -> int:
        return len(self.items)

    def since(self, t0: float) -> list[Any]:
        with self._lock:
            return [msg for t, msg in self.items if t >= t0]

    def messages(self) -> list[Any]:
        with self._lock:
            return [msg for _, msg in self.items]

    def clear(self) -> None:
        with self._lock:
            self.items.clear()


class Harness:
    """The test side: inputs to the filter node, recorders of its outputs, service clients.

    Publishers use the node's control QoS (depth 1, reliable, volatile); the recorders
    subscribe with deep reliable queues so that a slow test thread loses nothing.
    """

    def __init__(self, domain_id: int, namespace: str, node_name: str = NODE_NAME) -> None:
        self._spinner = _Spinner(domain_id)
        node = rclpy.create_node('filter_test_harness', context=self._spinner.context,
                                 namespace=namespace)
        prefix = f'{namespace}/{node_name}'
        self.node = node
        qos = control_qos()
        self.joint_state_pub = node.create_publisher(JointState, 'joint_states', qos)
        self.nominal_pub = node.create_publisher(Float64MultiArray, 'nominal_torque', qos)
        deep = QoSProfile(depth=100_000, reliability=ReliabilityPolicy.RELIABLE)
        self.filtered = Recorder()
        self.status = Recorder()
        self.status_fields = Recorder()
        self.diagnostics = Recorder()
        self.filtered_sub = node.create_subscription(
            Float64MultiArray, 'filtered_torque', self.filtered, deep)
        self.status_sub = node.create_subscription(
            Float64MultiArray, f'{prefix}/status', self.status, deep)
        # The field names, sent once (transient-local): received even when sent earlier.
        node.create_subscription(String, f'{prefix}/status_fields', self.status_fields,
                                 QoSProfile(depth=1, reliability=ReliabilityPolicy.RELIABLE,
                                            durability=DurabilityPolicy.TRANSIENT_LOCAL))
        node.create_subscription(DiagnosticArray, '/diagnostics', self.diagnostics, 100)
        self.change_state_client = node.create_client(ChangeState, f'{prefix}/change_state')
        self.get_state_client = node.create_client(GetState, f'{prefix}/get_state')
        self.set_parameters_client = node.create_client(SetParameters, f'{prefix}/set_parameters')
        self.get_parameters_client = node.create_client(GetParameters, f'{prefix}/get_parameters')
        self.diagnostic_name = f'{namespace}/{node_name}: filter'  # the fully qualified name
        self._source: Callable[[int], tuple[Any, Any]] | None = None
        self._tick = 0
        self.published: list[tuple[int, Any, Any]] = []  # (tick, joint state, nominal)
        self._timer = None
        # Publish the nominal before the joint state in a tick (for trigger: joint_state, so
        # that a step pairs the state with the nominal of the same tick).
        self.nominal_first = False
        self._spinner.executor.add_node(node)
        self._spinner.start()

    # ---- inputs
    def start_source(self, source: Callable[[int], tuple[Any, Any]],
                     rate_hz: float = 1000.0) -> None:
        """Publish ``source(tick)`` = (joint state or None, nominal or None) from a timer."""
        self._source = source
        if self._timer is None:
            self._timer = self.node.create_timer(1.0 / rate_hz, self._on_timer)

    def set_source(self, source: Callable[[int], tuple[Any, Any]] | None) -> None:
        """Replace the source (None: publish nothing; the timer keeps running)."""
        self._source = source

    def _on_timer(self) -> None:
        source = self._source
        if source is None:
            return
        self._tick += 1
        joint_state, nominal = source(self._tick)
        if self.nominal_first and nominal is not None:
            self.nominal_pub.publish(nominal)
        if joint_state is not None:
            self.joint_state_pub.publish(joint_state)
        if not self.nominal_first and nominal is not None:
            self.nominal_pub.publish(nominal)
        self.published.append((self._tick, joint_state, nominal))

    def wait_for_subscribers(self, timeout: float = 20.0) -> None:
        """Wait until the node's subscriptions have matched our publishers."""
        assert wait_for(lambda: self.joint_state_pub.get_subscription_count() > 0
                        and self.nominal_pub.get_subscription_count() > 0, timeout), \
            'the filter node never subscribed to joint_states and nominal_torque'

    def wait_for_publishers(self, timeout: float = 20.0) -> None:
        """Wait until our recorders have matched the node's filtered_torque and status."""
        assert wait_for(lambda: self.filtered_sub.get_publisher_count() > 0
                        and self.status_sub.get_publisher_count() > 0, timeout), \
            'the filter node never published filtered_torque and status'

    # ---- services
    def _call(self, client: Any, request: Any, timeout: float = 20.0, attempts: int = 1
              ) -> Any:
        """One service call; a request that only reads (``attempts`` > 1) is sent again when
        no answer comes: right after discovery DDS may drop the first response (the server's
        reply writer not yet matched to this client although ``wait_for_service`` saw it)."""
        assert client.wait_for_service(timeout_sec=timeout), \
            f'service {client.srv_name} not available'
        for _ in range(attempts):
            future = client.call_async(request)
            if wait_for(future.done, timeout):
                return future.result()
            client.remove_pending_request(future)
        raise AssertionError(f'no answer from {client.srv_name} ({attempts} requests)')

    def change_state(self, transition: str) -> bool:
        request = ChangeState.Request()
        request.transition.id = TRANSITIONS[transition]
        return bool(self._call(self.change_state_client, request).success)

    def get_state(self) -> str:
        return str(self._call(self.get_state_client, GetState.Request(), timeout=10.0,
                              attempts=3).current_state.label)

    def set_parameter(self, name: str, value: Any) -> Any:
        """Set one parameter through the node's set_parameters service; its result."""
        request = SetParameters.Request()
        request.parameters = [Parameter(name, value=value).to_parameter_msg()]
        return self._call(self.set_parameters_client, request).results[0]

    def get_parameter(self, name: str) -> Any:
        request = GetParameters.Request()
        request.names = [name]
        return parameter_value_to_python(
            self._call(self.get_parameters_client, request, timeout=10.0,
                       attempts=3).values[0])

    def latest_diagnostic(self, since: float = 0.0) -> DiagnosticStatus | None:
        """The latest filter diagnostic status received after ``since`` (steady time)."""
        for msg in reversed(self.diagnostics.since(since)):
            for status in msg.status:
                if status.name == self.diagnostic_name:
                    return status
        return None

    def close(self) -> None:
        self._source = None
        self._spinner.stop([self.node])


# ---------------------------------------------------------------------- messages
def joint_state(names: Sequence[str], q: Sequence[float], v: Sequence[float],
                effort: Sequence[float] = ()) -> JointState:
    msg = JointState()
    msg.name = list(names)
    msg.position = [float(x) for x in q]
    msg.velocity = [float(x) for x in v]
    msg.effort = [float(x) for x in effort]
    return msg


def nominal(values: Sequence[float]) -> Float64MultiArray:
    msg = Float64MultiArray()
    msg.data = [float(x) for x in values]
    return msg


# ---------------------------------------------------------------------- status records
@dataclass
class StatusRecord:
    """One ``~/status`` message, split into its fields."""

    step: int
    mode: int
    hold_nominal: bool
    intervention: float
    solve_time_s: float
    margin: np.ndarray
    torque: np.ndarray
    nominal: np.ndarray
    position: np.ndarray
    velocity: np.ndarray
    stamp: float = math.nan  # [s], the node clock
    joint_state_age: float = math.nan  # [s]
    nominal_age: float = math.nan  # [s]


def parse_status(msg: Float64MultiArray, joint_names: Sequence[str]) -> StatusRecord:
    """Check the lean layout (values only: the names go once on ~/status_fields) and split
    the data into a :class:`StatusRecord`."""
    fields = status_field_names(joint_names)
    assert not msg.layout.dim, 'the status carries its field names in every message'
    assert len(fields) == len(msg.data)
    record = unpack_status(msg.data, len(joint_names))
    return StatusRecord(record.step, record.mode, record.hold_nominal, record.intervention,
                        record.solve_time_s, record.margin, record.torque, record.nominal,
                        record.position, record.velocity, stamp=record.stamp_s,
                        joint_state_age=record.joint_state_age_s,
                        nominal_age=record.nominal_age_s)


def replay_statuses(records: Sequence[StatusRecord], reference: SafetyFilter,
                    tolerance: float = 1e-9) -> int:
    """Feed the recorded inputs to ``reference`` in order; assert each torque matches.

    The records must be every step since activation (steps 1, 2, ...): the filter's warm
    start depends on the whole sequence. Returns the number of records replayed.
    """
    for expected_step, record in enumerate(records, start=1):
        assert record.step == expected_step, \
            f'status of step {expected_step} missing (got step {record.step})'
        out = reference.step(record.position, record.velocity, record.nominal)
        error = float(np.max(np.abs(out.torque - record.torque)))
        assert error <= tolerance, (
            f'step {record.step}: node torque {record.torque} differs from the reference '
            f'{out.torque} by {error:.3e} (mode {record.mode}, inputs q={record.position} '
            f'v={record.velocity} u={record.nominal})')
        if record.mode != MODE_STALE:
            assert record.mode == mode_code(out.mode)
    return len(records)


def match_filtered_to_statuses(filtered: Sequence[Float64MultiArray],
                               records: Sequence[StatusRecord]) -> int:
    """Every received filtered torque must be the torque of a status, in order (the node
    publishes both per step; either topic may skip samples). Returns the matches."""
    j = 0
    for msg in filtered:
        data = np.array(msg.data)
        while j < len(records) and not np.array_equal(records[j].torque, data):
            j += 1
        assert j < len(records), f'filtered torque {data} matches no status torque in order'
        j += 1
    return len(filtered)


def mid_range(model: RobotModel) -> np.ndarray:
    return 0.5 * (np.array(model.position_lower) + np.array(model.position_upper))


def safe_nan(n: int) -> np.ndarray:
    return np.full(n, math.nan)
