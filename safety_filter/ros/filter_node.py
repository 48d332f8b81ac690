"""The safety filter as a managed (lifecycle) ROS 2 node, between a command source and a driver.

Wiring (topic names are relative, so remap them)::

    teleop / policy --nominal_torque--> [safety_filter] --filtered_torque--> driver
    driver ---------------joint_states--^

The node converts messages, calls :meth:`SafetyFilter.step` (the ROS-free numeric core) and
publishes. It does no numerics of its own: even the "hold" commands below come from the
filter's own rejection path.

Topics
------
Subscriptions:

* ``joint_states`` (``sensor_msgs/JointState``): matched by joint NAME, so any order works and
  joints outside the certified chain are ignored. The message is *invalid* (counted, and the
  step gets the filter's rejection semantics: the hold command at the last valid position)
  when a chain joint is missing, when ``position`` or ``velocity`` does not have one entry per
  name, or when ``velocity`` is empty. ``header.stamp`` is not used: input ages are measured
  from receipt on this node's steady clock, so the node works with any clock in the stamps
  (sim time, a driver's own clock); DDS transport delay is not included in the ages.
* ``nominal_torque`` (``std_msgs/Float64MultiArray``, the usual effort-command format of
  ``ros2_control`` forward controllers): ``data`` holds exactly one torque per chain joint in
  the CERTIFICATE's joint order (the ``joint_names`` parameter, base to tip), in the driver's
  convention (see ``gravity_convention``). ``layout`` is ignored. Another length makes the
  message invalid (counted; the step then sends the hold command).

Publications:

* ``filtered_torque`` (``std_msgs/Float64MultiArray``): the safe torque, same format and joint
  order as the nominal. Remap it to the driver's effort command topic, e.g.
  ``-r filtered_torque:=/effort_controller/commands``. Nothing is published before the first
  valid joint state: without a state there is no safe command to give (the driver's own
  command timeout applies then, as it does when this node stops).
* ``~/status`` (``std_msgs/Float64MultiArray``, one per published torque, for bags): the
  values only, with an empty layout (no field names in each message: at 1 kHz they would be
  most of the traffic). The field names go out once, at configure, on
* ``~/status_fields`` (``std_msgs/String``, transient-local: late subscribers and bag
  recorders still get it): the comma-separated field names of ``~/status``, in order (see
  :mod:`safety_filter.online.status_layout`, :data:`STATUS_SCALAR_FIELDS` and
  :func:`status_field_names`)::

      stamp_s,step,mode,hold_nominal,intervention,solve_time_s,joint_state_age_s,
      nominal_age_s,margin.<joint>...,torque.<joint>...,nominal.<joint>...,
      position.<joint>...,velocity.<joint>...

  ``stamp_s`` is the node clock [s]; ``step`` counts published steps since activation;
  ``mode`` is a numeric code (:data:`MODE_CODES`): **0 filtered, 1 fallback, 2 recovering,
  3 rejected, 4 stale** (joint states timed out, hold command sent); ``hold_nominal`` is 1
  when the nominal was stale and the hold command was used as the nominal; ``intervention``
  ``|u* - u_nom|`` [N m]; ``margin.<j>`` the smallest barrier value of the joint (negative:
  outside the safe set); ``torque``, ``nominal``, ``position`` and ``velocity`` are exactly
  the arrays given to and returned by :meth:`SafetyFilter.step` (NaN where the input was
  invalid), so a bag of this topic replays the filter step by step.
* ``/diagnostics`` (``diagnostic_msgs/DiagnosticArray``, at ``diagnostics_rate_hz``, also
  while inactive): one status named ``'<fully qualified node name>: filter'`` (e.g.
  ``'/safety_filter: filter'``, ``'/arm1/safety_filter: filter'``: filters in different
  namespaces report under different names). Level ERROR when the
  joint-state watchdog has tripped or steps were rejected or recovering since the last
  report; STALE when inactive, when no joint state was ever received, or when the nominal is
  stale or was never received; WARN after a fallback since the last report or when a barrier
  margin fell below ``thin_margin``; OK otherwise (ERROR > STALE > WARN > OK). Key values:
  mode, intervention (last and max since the last report), ``margin.<joint>`` (smallest
  since the last report), active constraints of the last step, solve time median/p99/max
  over the report window, step counts per mode and the reasons of non-filtered steps, input
  ages [ms], invalid-message counts, certificate id, and the measured loop:
  ``step_period.median_ms`` (median time between consecutive published steps over the report
  window, on the steady clock at receipt: the hold the driver actually sees),
  ``step_period.jitter_ms`` (its 99th percentile minus the median) and
  ``step_period.certified_hold_ms`` (``control_period_s * sampling_factor`` of the
  certificate, the longest hold its sampled-data margin covers). While active, the level is
  at least WARN when the median step period exceeds the certified hold by more than 10 %
  (:data:`STEP_PERIOD_TOLERANCE`; judged on 5 periods or more): the loop runs slower than the
  certificate assumes (e.g. ``trigger: nominal`` with a 100 Hz command source, or a driver
  publishing joint states below the certified rate), so its guarantee does not apply. The
  tolerance leaves room for the clock of a real driver (a few per cent) and for a median
  taken over receipt times, and is still far below the factor 2 of a loop at half rate.

Quality of service
------------------
``joint_states``, ``nominal_torque``, ``filtered_torque`` and ``~/status``: keep-last depth 1,
reliable, volatile. In a control loop only the newest sample is useful: a deeper queue would
hand the filter (or the driver) a backlog of old states and commands after any hiccup, i.e.
feed stale commands; volatile because a late joiner must not get an old command. Reliable
keeps samples from being dropped on a lossy link while the writer still holds them. A driver
that publishes joint states best-effort (sensor-data QoS) needs the standard override
``-p qos_overrides./joint_states.subscription.reliability:=best_effort`` (QoS overrides are
enabled for reliability, history and depth on these four topics). ``/diagnostics``: the
default QoS (reliable, depth 10), like every diagnostics publisher. ``~/status_fields`` and the
``robot_description`` subscription: reliable, transient-local, depth 1, the QoS of latched
descriptions (``robot_state_publisher`` publishes ``robot_description`` so).

Executor
--------
The executable spins the node with rclpy's SingleThreadedExecutor, the supported executor,
on the safety path by default. ``--executor events`` selects rclpy's EventsExecutor, which
is experimental in Jazzy (``rclpy.experimental``); it may need less CPU per message (no
wait-set rebuild per callback), but the repository records no measurement of it for this
node: measure with ``benchmarks/bench_node_latency.py --executor events`` before using it.

Timeouts and the watchdog
-------------------------
``joint_state_timeout_s`` defaults to 0.02 s: 20 periods of a 1 kHz loop. Until it runs out
after the driver's last joint state, the driver keeps applying the last filtered torque,
which the certificate covers for one period only, so it must be short; it must also be a real
timeout, not tripped by the scheduling jitter of a Python process on a non-real-time kernel
(latency spikes of a few milliseconds: garbage collection, page faults, other load), since
every stale step sends gravity compensation without damping and restarts the disturbance
observer. 20 ms is several times those spikes and still bounds the uncovered hold to 20
control periods (the old default, 50 ms, let 50 joint states at 1 kHz go missing before
anything happened). Raise it for a loop on simulated time that runs
slower than wall time (``config/sim_demo.yaml`` does).

A watchdog timer counts down from the trigger topic's timeout (``nominal_timeout_s`` with
``trigger: nominal``, ``joint_state_timeout_s`` with ``trigger: joint_state``); each message on
the trigger topic restarts it, so it fires only after a full timeout of silence. It then ticks
at ``watchdog_rate_hz`` (default: the certificate's control rate) until the trigger topic is
back. It runs on the steady clock even under ``use_sim_time``: a stopped simulator stops
``/clock``, and the watchdog must still fire. The diagnostics timer does likewise.

* **Joint states** older than ``joint_state_timeout_s`` (no valid message for that long):
  every step publishes the filter's hold command at the last valid position with the
  velocity unknown (gravity compensation ``g(q_last)`` only: no damping computed from a
  stale velocity), status mode 4, diagnostics ERROR. The watchdog publishes it at its rate
  even when no message arrives at all.
* **Nominal** older than ``nominal_timeout_s`` (or never received) is NEVER used. The step
  uses the "hold still" command as the nominal instead: the filter's hold command at the
  current state (gravity compensation plus damping toward rest, ``g(q) - hold_damping v``),
  and that nominal is still filtered, so the limits keep being enforced. Diagnostics go
  STALE with the nominal's age; status ``hold_nominal`` = 1.
* With ``trigger: nominal`` (steps run on each nominal, with the latest joint state) the
  watchdog runs the step itself while the nominal topic is silent; with
  ``trigger: joint_state`` (steps run on each joint state, with the latest nominal) it does
  so while the joint-state topic is silent. So a command keeps flowing to the driver once a
  valid joint state has been received since activation (a state that is already stale at
  activation is forgotten: nothing is published until a fresh one arrives).

Parameters
----------
Safety parameters, fixed for the life of the node (a runtime change is rejected with a
reason; change them by starting the node again):

* every entry of the certificate parameter file (:meth:`Certificate.to_parameters`, given
  with ``--params-file``; declared read-only). The node refuses an uncertified certificate,
  an edited one (its id covers the content) and one computed for another model (hash; the
  error names the likely cause: another chain, a missing or different limits file, another
  URDF). ``safety-filter certify`` keys the file ``/**``, which ROS applies to the node it is
  given to in any namespace and under any name; files keyed by the node name (earlier
  releases) apply only to a node of that name in the root namespace.
* the robot: ``urdf_path`` (a URDF file, or a ``.xacro`` file when the ``xacro`` package is
  installed), or ``robot_description`` (the URDF XML text), or ``robot_description_topic``
  (a topic carrying the URDF as ``std_msgs/String``, transient-local, as
  ``robot_state_publisher`` publishes ``robot_description``; read once at configure, which
  waits up to ``robot_description_timeout_s`` (10 s) for it; relative names resolve in the
  node's namespace). Exactly one of the three. ``limits_path``
  (the limits YAML, which also selects the chain); ``gravity_convention`` (``'full'``: the
  driver takes the full torque, ``'driver_compensated'``: the driver adds ``g(q)`` itself,
  both nominal and output are then on top of gravity); ``payload_mass`` [kg] (negative: the
  middle of the certified range; outside the range: refused); ``disturbance_observer``
  (true: the filter estimates the model error from the measured motion, which the guarantee
  on an arm unlike its model needs; false only for inputs that are not a real motion, such
  as tests feeding random states). The observer assumes one step per control period of the
  certificate: run the node at the certified rate (``trigger`` ``'joint_state'``, the
  default, with the driver's joint states at its control rate).

``trigger`` defaults to ``'joint_state'``: one filter step per joint state, so the driver gets
a filtered torque every control period whatever the rate of the command source, which is the
zero-order hold the certificate's sampled-data margin covers. ``'nominal'`` (one step per
nominal) holds each torque for the command source's period instead, which the certificate
covers only when that source runs at the control rate. ``config/filter.yaml`` (installed to
``share/safety_filter/config``) holds the same operational values as the defaults here;
``launch/hardware.launch.py``, ``safety-filter node`` and ``safety-filter run-graph --graph
hardware`` load it.

Operational parameters: ``joint_state_timeout_s`` (0.02) and ``nominal_timeout_s`` (0.1)
[s] may change at any time (positive, finite); ``trigger`` (``'joint_state'``),
``watchdog_rate_hz`` (0 = the certificate's control rate), ``diagnostics_rate_hz`` (2.0) and
``thin_margin`` (0.01, in the barrier's units: ``safety_filter.cli.robot_options.THIN_MARGIN``,
also the monitor's default) are read at configure and can be changed only while the node is
unconfigured.

Lifecycle
---------
What the node publishes in each state and at each transition:

* **unconfigured** (at start, after ``cleanup``): nothing (no publishers).
* ``configure``: builds the model, rebuilds the certificate from the parameters, checks the
  model hash and creates the filter, publishers, subscriptions and timers (any error: logged,
  the transition fails and the node stays unconfigured). Publishes the ``~/status``
  field names once on ``~/status_fields`` (transient-local), nothing else.
* **inactive**: no ``filtered_torque`` and no ``~/status``; ``/diagnostics`` at its rate,
  level STALE ('inactive: not filtering'). The driver's own command timeout applies.
* ``activate``: fresh filter state and counters; a joint state already older than
  ``joint_state_timeout_s`` is forgotten. Publishes nothing until the first valid joint
  state after activation.
* **active**: one ``filtered_torque`` and one ``~/status`` per step (per joint state with
  the default trigger; the watchdog's steps when the trigger topic is silent, see above).
* ``deactivate`` (and ``shutdown`` from active): ONE last ``filtered_torque``, then nothing:
  the hold command :meth:`SafetyFilter.hold_torque` at the last valid joint state,
  ``g(q) - hold_damping v`` clipped to the torque box (the velocity counts as unknown, so no
  damping, when that state is older than ``joint_state_timeout_s``), in the driver's
  convention (``gravity_convention``). It is not a filter step: no ``~/status`` record. So
  the driver's last command from the filter is a defined hold, not whatever the last step
  sent, until its own command timeout or the next command source takes over. Nothing is
  sent when no valid joint state came since activation.
* ``cleanup``, ``shutdown``: destroy publishers, subscriptions and timers (``shutdown`` from
  active sends the last command first and waits up to 0.2 s for it to be acknowledged).

Executables: ``ros2 run safety_filter filter_node --ros-args --params-file certificate.yaml
--params-file <share>/config/filter.yaml -p urdf_path:=arm.urdf -p limits_path:=limits.yaml``
starts unconfigured (drive it with ``ros2 lifecycle set``); add ``--configure-at-start``
before ``--ros-args`` to configure at start-up (inactive), or ``--autostart`` to configure
and activate. ``safety-filter node --certificate certificate.yaml --urdf arm.urdf --limits
limits.yaml`` configures at start and stays inactive unless given ``--activate-at-start``.
"""

from __future__ import annotations

import argparse
import array
import math
import signal
import sys
import time
from collections import Counter
from collections.abc import Sequence
from typing import Any

import numpy as np
import rclpy
from diagnostic_msgs.msg import DiagnosticArray, DiagnosticStatus, KeyValue
from lifecycle_msgs.srv import ChangeState
from rcl_interfaces.msg import ParameterDescriptor, SetParametersResult
from rclpy.clock import Clock, ClockType
from rclpy.duration import Duration
from rclpy.executors import SingleThreadedExecutor
from rclpy.impl.implementation_singleton import rclpy_implementation as _rclpy
from rclpy.lifecycle import LifecycleNode, LifecycleState, TransitionCallbackReturn
from rclpy.parameter import Parameter
from rclpy.qos import (
    DurabilityPolicy,
    HistoryPolicy,
    QoSPolicyKind,
    QoSProfile,
    ReliabilityPolicy,
)
from rclpy.qos_overriding_options import QoSOverridingOptions
from rclpy.signals import SignalHandlerOptions
from rclpy.utilities import remove_ros_args
from rclpy.wait_for_message import wait_for_message
from sensor_msgs.msg import JointState
from std_msgs.msg import Float64MultiArray, MultiArrayDimension, String

from safety_filter.cli.robot_options import THIN_MARGIN
from safety_filter.core.certificate import FILTER_NODE_NAME, Certificate
from safety_filter.core.robot_model import RobotModel
from safety_filter.errors import SafetyFilterError
from safety_filter.online.barrier_filter import (
    GRAVITY_CONVENTIONS,
    FilterMode,
    FilterOutput,
    SafetyFilter,
)
from safety_filter.online.status_layout import (  # noqa: F401 - re-exported: the node's interface
    DIAGNOSTIC_NAME_SUFFIX,
    STATUS_JOINT_FIELDS,
    STATUS_SCALAR_FIELDS,
    diagnostic_name,
    fields_topic,
    format_fields,
    status_field_names,
)

# Every key of Certificate.to_parameters() (a test checks they agree).
CERTIFICATE_PARAMETERS = (
    'certificate_format', 'joint_names', 'position_lower', 'position_upper', 'velocity_limit',
    'effort_limit', 'velocity_bound', 'gamma', 'gamma_star', 'beta', 'beta_star', 'beta_floor',
    'beta_cap', 'authority', 'sampling_margin', 'viscous_friction', 'coulomb_friction',
    'condition', 'control_rate_hz', 'sampling_factor', 'model_hash', 'package_version',
    'created', 'certified', 'alpha1_kind', 'alpha1_scale', 'alpha2_kind', 'alpha2_scale',
    'payload_mass_range', 'payload_point', 'settings_json', 'falsifier_json', 'reasons',
    'certificate_id', 'velocity_beta', 'acceleration_bound', 'acceleration_hold_s')
MODEL_PARAMETERS = ('urdf_path', 'robot_description', 'robot_description_topic',
                    'robot_description_timeout_s', 'limits_path', 'gravity_convention',
                    'payload_mass', 'disturbance_observer')
SAFETY_PARAMETERS = frozenset(CERTIFICATE_PARAMETERS + MODEL_PARAMETERS)
TIMEOUT_PARAMETERS = ('joint_state_timeout_s', 'nominal_timeout_s')
CONFIGURE_TIME_PARAMETERS = ('trigger', 'watchdog_rate_hz', 'diagnostics_rate_hz',
                             'thin_margin')
TRIGGERS = ('nominal', 'joint_state')
JOINT_STATE_TIMEOUT_S = 0.02  # [s] default joint_state_timeout_s (module docstring)

# Status mode codes (the ``mode`` field of ~/status).
MODE_FILTERED = 0
MODE_FALLBACK = 1
MODE_RECOVERING = 2
MODE_REJECTED = 3
MODE_STALE = 4
MODE_CODES = {FilterMode.FILTERED: MODE_FILTERED, FilterMode.FALLBACK: MODE_FALLBACK,
              FilterMode.RECOVERING: MODE_RECOVERING, FilterMode.REJECTED: MODE_REJECTED}
MODE_NAMES = ('filtered', 'fallback', 'recovering', 'rejected', 'stale')
STATUS_TOPIC = '~/status'
STATUS_FIELDS_TOPIC = fields_topic(STATUS_TOPIC)  # '~/status_fields'
ROBOT_DESCRIPTION_TIMEOUT_S = 10.0  # [s] default robot_description_timeout_s

RCLError = _rclpy.RCLError
EXIT_OK = 0
EXIT_FAILED = 1
EXECUTORS = ('single_threaded', 'events')  # of safety_filter.cli.robot_options.EXECUTORS
# Diagnostics WARN when the median step period exceeds the certified hold by more than this
# fraction (see the module docstring), judged on at least STEP_PERIOD_MIN_SAMPLES periods.
STEP_PERIOD_TOLERANCE = 0.1
STEP_PERIOD_MIN_SAMPLES = 5


def control_qos() -> QoSProfile:
    """Keep-last depth 1, reliable, volatile: the QoS of the control topics (module doc)."""
    return QoSProfile(history=HistoryPolicy.KEEP_LAST, depth=1,
                      reliability=ReliabilityPolicy.RELIABLE,
                      durability=DurabilityPolicy.VOLATILE)


def latched_qos() -> QoSProfile:
    """Reliable, transient-local, keep-last 1: a description sent once, kept for late
    subscribers (``~/status_fields``; ``robot_description`` as robot_state_publisher sends it)."""
    return QoSProfile(history=HistoryPolicy.KEEP_LAST, depth=1,
                      reliability=ReliabilityPolicy.RELIABLE,
                      durability=DurabilityPolicy.TRANSIENT_LOCAL)


def _qos_overrides() -> QoSOverridingOptions:
    return QoSOverridingOptions(policy_kinds=(QoSPolicyKind.RELIABILITY,
                                              QoSPolicyKind.HISTORY, QoSPolicyKind.DEPTH))


def _describe(text: str, read_only: bool = False, dynamic: bool = False) -> ParameterDescriptor:
    return ParameterDescriptor(description=text, read_only=read_only, dynamic_typing=dynamic)


def _positive_finite(name: str, value: Any) -> float:
    """``value`` as a positive finite float, or :class:`SafetyFilterError` naming ``name``."""
    if isinstance(value, bool) or not isinstance(value, (int, float)):
        raise SafetyFilterError(f'{name} must be a number, got {value!r}')
    number = float(value)
    if not (math.isfinite(number) and number > 0.0):
        raise SafetyFilterError(f'{name} must be positive and finite, got {value!r}')
    return number


def _format_number(value: float) -> str:
    return 'nan' if value is None or not math.isfinite(value) else f'{value:.6g}'


class SafetyFilterNode(LifecycleNode):
    """The managed node ``safety_filter`` (see the module docstring for its interface).

    Args:
        node_name: the node's name; the certificate file is keyed by it.
        **kwargs: passed to :class:`rclpy.lifecycle.LifecycleNode` (``context``,
            ``cli_args``, ``parameter_overrides``, ``namespace``, ...).
    """

    def __init__(self, node_name: str = FILTER_NODE_NAME, **kwargs: Any) -> None:
        super().__init__(node_name, **kwargs)
        # rclpy's change_state service raises (and so ends the executor's spin) when asked for
        # a transition the current state does not have; answer success=False instead.
        service = getattr(self, '_service_change_state', None)
        if service is not None:
            service.callback = self._guard_change_state(service.callback)
        self._declare_parameters()
        # Registered after the declarations: declaring calls the callback too.
        self.add_on_set_parameters_callback(self._on_set_parameters)
        self._configured = False
        self._active = False
        self._subscriptions_made: list[Any] = []
        self._timers_made: list[Any] = []
        self._filtered_pub: Any = None
        self._status_pub: Any = None
        self._status_fields_pub: Any = None
        self._diagnostics_pub: Any = None
        self._watchdog: Any = None
        self._watchdog_holding = False  # the watchdog ticks at the hold rate (trigger silent)
        self._hold_period_ns = 1_000_000
        self._filter: SafetyFilter | None = None
        self._model: RobotModel | None = None
        self._certificate: Certificate | None = None
        # Validated and read at configure; changed at runtime by _on_set_parameters.
        self._joint_state_timeout = JOINT_STATE_TIMEOUT_S
        self._nominal_timeout = 0.1

    def _guard_change_state(self, callback: Any) -> Any:
        def change_state(request: ChangeState.Request,
                         response: ChangeState.Response) -> ChangeState.Response:
            try:
                return callback(request, response)
            except RCLError as err:
                self.get_logger().warning(
                    f'refused lifecycle transition {request.transition.id} '
                    f'{request.transition.label!r}: {err}')
                response.success = False
                return response
        return change_state

    # ------------------------------------------------------------------ parameters
    def _declare_parameters(self) -> None:
        for name in CERTIFICATE_PARAMETERS:
            self.declare_parameter(name, None, _describe(
                'certificate entry (from the certificate parameter file); fixed',
                read_only=True, dynamic=True))
        self.declare_parameter('urdf_path', '', _describe(
            'path of the robot URDF or .xacro file (or give robot_description or '
            'robot_description_topic); safety parameter, fixed'))
        self.declare_parameter('robot_description', '', _describe(
            'URDF XML text, instead of urdf_path; safety parameter, fixed'))
        self.declare_parameter('robot_description_topic', '', _describe(
            'read the URDF at configure from this std_msgs/String topic (transient-local, '
            'as robot_state_publisher publishes robot_description), instead of urdf_path; '
            'safety parameter, fixed'))
        self.declare_parameter('robot_description_timeout_s', ROBOT_DESCRIPTION_TIMEOUT_S,
                               _describe('configure waits this long [s] for the URDF on '
                                         'robot_description_topic; fixed', dynamic=True))
        self.declare_parameter('limits_path', '', _describe(
            'limits YAML of the robot (also selects the chain); safety parameter, fixed'))
        self.declare_parameter('gravity_convention', 'full', _describe(
            "'full' (the driver takes the full torque) or 'driver_compensated' (the driver "
            'adds g(q) itself); safety parameter, fixed'))
        self.declare_parameter('payload_mass', -1.0, _describe(
            'payload of the model [kg]; negative: middle of the certified range; safety '
            'parameter, fixed', dynamic=True))
        self.declare_parameter('disturbance_observer', True, _describe(
            'estimate the model error from the measured motion (docs/method.md); false only '
            'to feed the node inputs that are not a real motion (tests, studies): the '
            'guarantee on an arm that differs from its model needs it; safety parameter, '
            'fixed'))
        self.declare_parameter('joint_state_timeout_s', JOINT_STATE_TIMEOUT_S, _describe(
            'joint states older than this [s] trip the watchdog (hold command); default 0.02: '
            '20 periods of a 1 kHz loop', dynamic=True))
        self.declare_parameter('nominal_timeout_s', 0.1, _describe(
            'a nominal older than this [s] is never used (hold-still nominal instead)',
            dynamic=True))
        self.declare_parameter('trigger', 'joint_state', _describe(
            "'joint_state' (default): step on each joint state with the latest nominal, one "
            "step per control period at the driver's rate, the hold the certificate covers; "
            "'nominal': step on each nominal with the latest joint state (only for a command "
            'source at the control rate); read at configure'))
        self.declare_parameter('watchdog_rate_hz', 0.0, _describe(
            'rate of the watchdog timer [Hz]; 0: the certificate control rate; read at '
            'configure', dynamic=True))
        self.declare_parameter('diagnostics_rate_hz', 2.0, _describe(
            'rate of /diagnostics [Hz]; read at configure', dynamic=True))
        self.declare_parameter('thin_margin', THIN_MARGIN, _describe(
            'diagnostics WARN when a barrier margin falls below this (barrier units; the '
            "monitor's --thin-margin default too); read at configure", dynamic=True))

    def _on_set_parameters(self, parameters: list[Parameter]) -> SetParametersResult:
        """Reject safety parameters; validate operational ones."""
        for parameter in parameters:
            name = parameter.name
            if name in SAFETY_PARAMETERS:
                return SetParametersResult(
                    successful=False,
                    reason=f'{name} is a safety parameter (certificate, robot model, payload or '
                    'gravity convention) and cannot change at runtime; start the node again '
                    'with the new value (a new certificate for a new model)')
            try:
                if name in TIMEOUT_PARAMETERS:
                    _positive_finite(name, parameter.value)
                elif name in CONFIGURE_TIME_PARAMETERS:
                    if self._configured:
                        return SetParametersResult(
                            successful=False,
                            reason=f'{name} is read at configure; clean the node up first')
                    self._validate_configure_parameter(name, parameter.value)
            except SafetyFilterError as err:
                return SetParametersResult(successful=False, reason=str(err))
        for parameter in parameters:
            if parameter.name == 'joint_state_timeout_s':
                self._joint_state_timeout = float(parameter.value)
            elif parameter.name == 'nominal_timeout_s':
                self._nominal_timeout = float(parameter.value)
        if self._watchdog is not None and not self._watchdog_holding:
            self._watchdog.timer_period_ns = round(self._silence_limit() * 1e9)
        return SetParametersResult(successful=True)

    @staticmethod
    def _validate_configure_parameter(name: str, value: Any) -> Any:
        if name == 'trigger':
            if value not in TRIGGERS:
                raise SafetyFilterError(f'trigger must be one of {TRIGGERS}, got {value!r}')
            return value
        if name == 'watchdog_rate_hz':
            if isinstance(value, (int, float)) and not isinstance(value, bool) and value == 0:
                return 0.0
            return _positive_finite(name, value)
        if name == 'thin_margin':
            if isinstance(value, bool) or not isinstance(value, (int, float)) \
                    or not math.isfinite(value):
                raise SafetyFilterError(f'thin_margin must be a finite number, got {value!r}')
            return float(value)
        return _positive_finite(name, value)

    def _certificate_parameters(self) -> dict[str, Any]:
        values = {}
        for name in CERTIFICATE_PARAMETERS:
            parameter = self.get_parameter(name)
            if parameter.type_ != Parameter.Type.NOT_SET:
                value = parameter.value
                values[name] = list(value) if isinstance(value, (array.array, tuple)) else value
        return values

    # ------------------------------------------------------------------ lifecycle
    def on_configure(self, state: LifecycleState) -> TransitionCallbackReturn:
        try:
            self._configure()
        except SafetyFilterError as err:
            self.get_logger().error(f'configure failed: {err}')
            self._teardown()
            return TransitionCallbackReturn.FAILURE
        except Exception as err:  # noqa: BLE001 - any error must fail the transition cleanly
            self.get_logger().error(
                f'configure failed: {type(err).__name__}: {err}')
            self._teardown()
            return TransitionCallbackReturn.FAILURE
        return TransitionCallbackReturn.SUCCESS

    def on_activate(self, state: LifecycleState) -> TransitionCallbackReturn:
        result = super().on_activate(state)  # enables the lifecycle publishers
        if result != TransitionCallbackReturn.SUCCESS:
            return result
        if self._filter is None:  # cannot happen: activate needs a configured node
            return TransitionCallbackReturn.FAILURE
        self._filter.reset()
        self._reset_counters()
        if time.monotonic() - self._js_valid_time > self._joint_state_timeout:
            # A state from before activation is not a basis for holding: wait for a new one.
            self._last_valid_q = None
        self._active = True
        if self._last_valid_q is not None:
            self._start_watchdog()  # else started by the first valid joint state
        self.get_logger().info('active: filtering')
        return TransitionCallbackReturn.SUCCESS

    def on_deactivate(self, state: LifecycleState) -> TransitionCallbackReturn:
        if self._active:
            self._publish_last_command()
        self._active = False
        if self._watchdog is not None:
            self._watchdog.cancel()
            self._watchdog_holding = False
        self.get_logger().info('inactive: not filtering')
        return super().on_deactivate(state)

    def on_cleanup(self, state: LifecycleState) -> TransitionCallbackReturn:
        self._teardown()
        return TransitionCallbackReturn.SUCCESS

    def on_shutdown(self, state: LifecycleState) -> TransitionCallbackReturn:
        if self._active:  # shutdown from active: the last command, as on deactivate
            self._publish_last_command(wait_s=0.2)
        self._teardown()
        self.get_logger().info('shut down')
        return TransitionCallbackReturn.SUCCESS

    def on_error(self, state: LifecycleState) -> TransitionCallbackReturn:
        self.get_logger().error('error processing: tearing down (back to unconfigured)')
        self._teardown()
        return TransitionCallbackReturn.SUCCESS

    def _publish_last_command(self, wait_s: float = 0.0) -> None:
        """Publish the one defined last command before going quiet (module docstring).

        The hold command :meth:`SafetyFilter.hold_torque` at the last valid joint state
        (gravity compensation with damping toward rest; the velocity counts as unknown, so
        no damping, when that state is older than ``joint_state_timeout_s``), in the
        driver's convention. Nothing when no valid joint state came since activation.
        ``wait_s``: wait this long at most for subscribers to acknowledge it (shutdown,
        where the publisher is destroyed right after).
        """
        filt, publisher, q = self._filter, self._filtered_pub, self._last_valid_q
        if filt is None or publisher is None or q is None:
            return
        fresh = time.monotonic() - self._js_valid_time <= self._joint_state_timeout
        torque = filt.hold_torque(q, self._last_valid_v if fresh else self._nan)
        msg = Float64MultiArray()
        msg.layout = self._filtered_msg.layout
        msg.data = array.array('d', np.asarray(torque, dtype=float).tobytes())
        publisher.publish(msg)
        if wait_s > 0.0:
            try:
                publisher.wait_for_all_acked(Duration(seconds=wait_s))
            except Exception:  # noqa: BLE001 - best effort on the way out
                pass
        self.get_logger().info(
            f'last command: the hold command at the last valid joint state '
            f'({"fresh" if fresh else "stale: no damping"}) {np.round(torque, 4).tolist()}')

    @property
    def filter(self) -> SafetyFilter | None:
        """The filter while configured, else None."""
        return self._filter

    # ------------------------------------------------------------------ configure
    def _configure(self) -> None:
        values = self._certificate_parameters()
        if 'certificate_format' not in values:
            name = self.get_fully_qualified_name()
            raise SafetyFilterError(
                'no certificate parameters: start the node with --params-file <certificate '
                'YAML written by safety-filter certify> (keyed /**, it applies to this node '
                f'wherever it runs); a file keyed by a node name applies only to that name: '
                f"for {name!r} key it '/**' or {name!r}")
        certificate = Certificate.from_parameters(values)
        limits_path = str(self.get_parameter('limits_path').value)
        model = RobotModel.from_urdf(self._robot_description(), limits=limits_path or None)
        certificate.check_model(model)

        convention = self.get_parameter('gravity_convention').value
        if convention not in GRAVITY_CONVENTIONS:
            raise SafetyFilterError(
                f'gravity_convention must be one of {GRAVITY_CONVENTIONS}, got {convention!r}')
        payload = self.get_parameter('payload_mass').value
        if isinstance(payload, bool) or not isinstance(payload, (int, float)) \
                or not math.isfinite(payload):
            raise SafetyFilterError(f'payload_mass must be a finite number, got {payload!r}')
        low, high = certificate.payload_mass_range
        payload_mass: float | None = None
        if payload >= 0.0:
            if not low <= payload <= high:
                raise SafetyFilterError(
                    f'payload_mass {payload:g} kg is outside the certified range '
                    f'[{low:g}, {high:g}] kg: certify for this payload')
            payload_mass = float(payload)
        operational = {name: self._validate_configure_parameter(
            name, self.get_parameter(name).value) for name in CONFIGURE_TIME_PARAMETERS}
        timeouts = [_positive_finite(name, self.get_parameter(name).value)
                     for name in TIMEOUT_PARAMETERS]
        observer = self.get_parameter('disturbance_observer').value
        if not isinstance(observer, bool):
            raise SafetyFilterError(f'disturbance_observer must be true or false, got '
                                    f'{observer!r}')
        filt = SafetyFilter(model, certificate, gravity_convention=convention,
                            payload_mass=payload_mass,
                            observer_time_constant_s=None if observer else 0.0)

        self._model = model
        self._certificate = certificate
        self._certificate_id = certificate.certificate_id  # a hash of the content: compute once
        self._diagnostic_name = diagnostic_name(self.get_fully_qualified_name())
        self._filter = filt
        self._joint_state_timeout, self._nominal_timeout = timeouts
        self._trigger = operational['trigger']
        self._thin_margin = operational['thin_margin']
        watchdog_rate = operational['watchdog_rate_hz'] or certificate.control_rate_hz
        n = model.n_joints
        self._n = n
        self._joint_names = tuple(model.joint_names)
        self._clock = self.get_clock()
        self._nan = np.full(n, math.nan)
        self._nan.flags.writeable = False
        self._js_names: list[str] | None = None
        self._js_index: np.ndarray | None = None
        self._js_problem = ''
        self._q = self._nan
        self._v = self._nan
        self._last_valid_q: np.ndarray | None = None
        self._last_valid_v = self._nan
        self._js_valid_time = -math.inf  # steady time of the last valid joint state
        self._js_time = -math.inf  # steady time of the last joint state (valid or not)
        self._u_nom = self._nan
        self._nominal_time = -math.inf
        self._nominal_problem = ''
        self._last_js_problem = ''
        self._reset_counters()

        fields = status_field_names(self._joint_names)
        self._status_buffer = np.zeros(len(fields))
        # No layout in each status message: the field names go out once, on ~/status_fields.
        self._status_msg = Float64MultiArray()
        self._filtered_msg = Float64MultiArray()
        self._filtered_msg.layout.dim = [MultiArrayDimension(
            label='joints', size=n, stride=n)]

        qos = control_qos()
        self._filtered_pub = self.create_lifecycle_publisher(
            Float64MultiArray, 'filtered_torque', qos, qos_overriding_options=_qos_overrides())
        self._status_pub = self.create_lifecycle_publisher(
            Float64MultiArray, STATUS_TOPIC, qos, qos_overriding_options=_qos_overrides())
        # A plain publisher, not a lifecycle one: transient-local keeps the one message for
        # subscribers that come later, active or not.
        self._status_fields_pub = self.create_publisher(String, STATUS_FIELDS_TOPIC,
                                                        latched_qos())
        self._status_fields_pub.publish(String(data=format_fields(fields)))
        self._diagnostics_pub = self.create_publisher(DiagnosticArray, '/diagnostics', 10)
        self._subscriptions_made = [
            self.create_subscription(JointState, 'joint_states', self._on_joint_state, qos,
                                     qos_overriding_options=_qos_overrides()),
            self.create_subscription(Float64MultiArray, 'nominal_torque', self._on_nominal,
                                     qos, qos_overriding_options=_qos_overrides()),
        ]
        # Both timers run on the steady clock: under simulated time a dead simulator stops
        # /clock, and a watchdog on the node clock would then never fire.
        steady = Clock(clock_type=ClockType.STEADY_TIME)
        self._hold_period_ns = max(1, round(1e9 / watchdog_rate))
        self._watchdog = self.create_timer(self._silence_limit(), self._on_watchdog,
                                           clock=steady)
        self._watchdog.cancel()  # runs only while active
        self._watchdog_holding = False
        diagnostics = self.create_timer(1.0 / operational['diagnostics_rate_hz'],
                                        self._on_diagnostics, clock=steady)
        self._timers_made = [self._watchdog, diagnostics]
        self._configured = True
        self.get_logger().info(
            f'configured: {model.name!r}, joints {list(self._joint_names)}, certificate '
            f'{certificate.certificate_id}, gravity convention {convention}, payload '
            f'{filt.payload_mass:g} kg, trigger {self._trigger}, watchdog {watchdog_rate:g} Hz')

    def _robot_description(self) -> str:
        """The URDF path or text from ``urdf_path``, ``robot_description`` or
        ``robot_description_topic`` (exactly one; the topic is read now, waiting up to
        ``robot_description_timeout_s`` for its transient-local message)."""
        urdf_path = str(self.get_parameter('urdf_path').value)
        description = str(self.get_parameter('robot_description').value)
        topic = str(self.get_parameter('robot_description_topic').value).strip()
        given = [name for name, value in (('urdf_path', urdf_path),
                                          ('robot_description', description.strip()),
                                          ('robot_description_topic', topic)) if value]
        if len(given) > 1:
            raise SafetyFilterError(f'give one of urdf_path, robot_description and '
                                    f'robot_description_topic, not {" and ".join(given)}')
        if not given:
            raise SafetyFilterError('no robot model: set urdf_path, robot_description or '
                                    'robot_description_topic')
        if urdf_path:
            return urdf_path
        if description:
            if not description.lstrip().startswith('<'):
                raise SafetyFilterError('robot_description must be URDF XML text')
            return description
        timeout = _positive_finite('robot_description_timeout_s',
                                   self.get_parameter('robot_description_timeout_s').value)
        resolved = self.resolve_topic_name(topic)
        self.get_logger().info(f'waiting up to {timeout:g} s for the URDF on {resolved}')
        # rclpy's wait_for_message waits on a wait set of its own: it works inside a
        # transition callback, while the executor that called it is busy.
        received, message = wait_for_message(String, self, topic, qos_profile=latched_qos(),
                                             time_to_wait=timeout)
        if not received or message is None:
            raise SafetyFilterError(
                f'no robot description on {resolved} within {timeout:g} s: start '
                'robot_state_publisher (or whatever publishes it, transient-local), remap '
                'robot_description_topic, or give urdf_path')
        text = str(message.data)
        if not text.lstrip().startswith('<'):
            raise SafetyFilterError(f'{resolved} did not carry URDF XML text')
        return text

    def _teardown(self) -> None:
        self._active = False
        self._configured = False
        for subscription in self._subscriptions_made:
            self.destroy_subscription(subscription)
        self._subscriptions_made = []
        for timer in self._timers_made:
            self.destroy_timer(timer)
        self._timers_made = []
        self._watchdog = None
        self._watchdog_holding = False
        for publisher in (self._filtered_pub, self._status_pub):
            if publisher is not None:
                self.destroy_lifecycle_publisher(publisher)
        for plain in (self._diagnostics_pub, self._status_fields_pub):
            if plain is not None:
                self.destroy_publisher(plain)
        self._filtered_pub = self._status_pub = self._diagnostics_pub = None
        self._status_fields_pub = None
        self._filter = None
        self._model = None
        self._certificate = None

    def _reset_counters(self) -> None:
        self._steps = 0
        self._invalid_joint_states = 0
        self._invalid_nominals = 0
        self._last_output: FilterOutput | None = None
        self._last_code = -1
        self._last_step_time: float | None = None
        self._reset_window()

    def _reset_window(self) -> None:
        self._window_counts = [0] * len(MODE_NAMES)
        self._window_reasons: Counter[str] = Counter()
        self._window_solve_times: list[float] = []
        self._window_intervention = 0.0
        self._window_margin = np.full(self._n, math.inf)
        self._window_periods: list[float] = []

    # ------------------------------------------------------------------ inputs
    def _on_joint_state(self, msg: JointState) -> None:
        now = time.monotonic()
        self._js_time = now
        names = msg.name
        if names != self._js_names:
            self._js_names = list(names)
            self._js_index, self._js_problem = self._index_for(names)
        count = len(names)
        problem = self._js_problem
        if not problem:
            if len(msg.position) != count:
                problem = (f'{len(msg.position)} positions for {count} names')
            elif len(msg.velocity) == 0:
                problem = 'no velocities'
            elif len(msg.velocity) != count:
                problem = f'{len(msg.velocity)} velocities for {count} names'
        if problem:
            self._invalid_joint_states += 1
            self._last_js_problem = problem
            self._q = self._v = self._nan
        else:
            index = self._js_index
            self._q = np.asarray(msg.position)[index]
            self._v = np.asarray(msg.velocity)[index]
            if self._last_valid_q is None and self._active:
                self._start_watchdog()  # nothing to watch before the first valid state
            self._last_valid_q = self._q
            self._last_valid_v = self._v
            self._js_valid_time = now
        if self._active and self._trigger == 'joint_state':
            self._feed_watchdog()
            self._run_step(now)

    def _index_for(self, names: Sequence[str]) -> tuple[np.ndarray | None, str]:
        position = {name: i for i, name in enumerate(names)}
        missing = [joint for joint in self._joint_names if joint not in position]
        if missing:
            return None, f'missing chain joints {missing}'
        return np.array([position[joint] for joint in self._joint_names], dtype=np.intp), ''

    def _on_nominal(self, msg: Float64MultiArray) -> None:
        now = time.monotonic()
        data = msg.data
        if len(data) != self._n:
            self._invalid_nominals += 1
            self._nominal_problem = f'{len(data)} values for {self._n} joints'
            self._u_nom = self._nan
        else:
            self._u_nom = np.array(data, dtype=float)
        self._nominal_time = now
        if self._active and self._trigger == 'nominal':
            self._feed_watchdog()
            self._run_step(now)

    def _silence_limit(self) -> float:
        """How long the trigger topic may be silent before the watchdog steps in [s]."""
        if self._trigger == 'nominal':
            return self._nominal_timeout
        return self._joint_state_timeout

    def _feed_watchdog(self) -> None:
        """The trigger topic delivered: restart the watchdog's countdown.

        While the trigger topic flows the watchdog timer's period is the timeout and every
        message restarts it, so it never fires (a timer callback costs as much as a message
        in rclpy; a timer polling at the control rate doubled the node's CPU per step).
        """
        watchdog = self._watchdog
        if watchdog is None:
            return
        if self._watchdog_holding:
            self._watchdog_holding = False
            watchdog.timer_period_ns = round(self._silence_limit() * 1e9)
        watchdog.reset()

    def _start_watchdog(self) -> None:
        """Start watching: tick at the hold rate at once if the trigger topic is already
        silent (a command then flows from the start), else count down."""
        if self._trigger_silent(time.monotonic()):
            self._hold_at_watchdog_rate()
        else:
            self._feed_watchdog()

    def _hold_at_watchdog_rate(self) -> None:
        self._watchdog_holding = True
        self._watchdog.timer_period_ns = self._hold_period_ns
        # reset: a changed period applies only from the next restart of the countdown.
        self._watchdog.reset()

    def _trigger_silent(self, now: float) -> bool:
        if self._trigger == 'nominal':
            return now - self._nominal_time > self._nominal_timeout
        return now - self._js_time > self._joint_state_timeout

    def _on_watchdog(self) -> None:
        """The trigger topic has been silent for a timeout: step at the hold rate."""
        if not self._active:
            return
        if not self._watchdog_holding:
            self._hold_at_watchdog_rate()  # until the trigger topic is back
        now = time.monotonic()
        if self._trigger_silent(now):
            self._run_step(now)

    # ------------------------------------------------------------------ the step
    def _run_step(self, now: float) -> None:
        """One filter step with the latest inputs (the timeouts applied), then publish."""
        filt = self._filter
        if filt is None or self._last_valid_q is None:
            return  # no valid joint state yet: nothing safe to command
        joint_state_age = now - self._js_valid_time
        nominal_age = now - self._nominal_time
        hold_nominal = False
        if joint_state_age > self._joint_state_timeout:
            # The filter's hold command at the last valid position, velocity unknown.
            q, v, u_nom = self._last_valid_q, self._nan, self._nan
            output = filt.step(q, v, u_nom)
            code = MODE_STALE
            reason = 'joint states stale: holding'  # the age is in the status and diagnostics
        else:
            q, v = self._q, self._v
            if nominal_age <= self._nominal_timeout:
                u_nom = self._u_nom
            else:
                # Never use a stale nominal: the hold command (g(q) - D v) is the nominal.
                # (hold_torque, not a rejected step: a step would count and would restart
                # the disturbance observer, which a replay of ~/status could not know.)
                u_nom = filt.hold_torque(q, v)
                hold_nominal = True
            output = filt.step(q, v, u_nom)
            code = MODE_CODES[output.mode]
            reason = output.reason
        msg = self._filtered_msg
        msg.data = array.array('d', output.torque.tobytes())
        self._filtered_pub.publish(msg)

        self._steps += 1
        buffer = self._status_buffer
        n = self._n
        buffer[:8] = (self._clock.now().nanoseconds * 1e-9, self._steps, code,
                      float(hold_nominal), output.intervention, output.solve_time_s,
                      joint_state_age, nominal_age)
        buffer[8:8 + n] = output.barrier_margin
        buffer[8 + n:8 + 2 * n] = output.torque
        buffer[8 + 2 * n:8 + 3 * n] = u_nom
        buffer[8 + 3 * n:8 + 4 * n] = q
        buffer[8 + 4 * n:8 + 5 * n] = v
        status = self._status_msg
        status.data = array.array('d', buffer.tobytes())
        self._status_pub.publish(status)

        self._window_counts[code] += 1
        if reason:
            self._window_reasons[reason] += 1
        if output.solve_time_s > 0.0:
            self._window_solve_times.append(output.solve_time_s)
        if output.intervention > self._window_intervention:
            self._window_intervention = output.intervention
        np.fmin(self._window_margin, output.barrier_margin, out=self._window_margin)
        self._last_output = output
        self._last_code = code
        if self._last_step_time is not None:  # the measured step period (hold) [s]
            self._window_periods.append(now - self._last_step_time)
        self._last_step_time = now

    # ------------------------------------------------------------------ diagnostics
    def _on_diagnostics(self) -> None:
        if self._diagnostics_pub is None:
            return
        status = self._diagnostic_status(time.monotonic())
        array_msg = DiagnosticArray()
        array_msg.header.stamp = self.get_clock().now().to_msg()
        array_msg.status = [status]
        self._diagnostics_pub.publish(array_msg)
        self._reset_window()

    def _diagnostic_status(self, now: float) -> DiagnosticStatus:
        certificate = self._certificate
        model = self._model
        assert certificate is not None and model is not None
        errors: list[str] = []
        stale: list[str] = []
        warnings: list[str] = []
        counts = self._window_counts
        joint_state_age = now - self._js_valid_time
        nominal_age = now - self._nominal_time
        if not self._active:
            stale.append('inactive: not filtering, nothing published')
        else:
            if self._last_valid_q is None:
                stale.append('no valid joint state received yet: nothing published')
            elif joint_state_age > self._joint_state_timeout:
                errors.append(f'joint-state watchdog tripped: last valid joint state '
                              f'{joint_state_age * 1e3:.0f} ms ago; sending the hold command')
            if not math.isfinite(nominal_age):
                stale.append('no nominal received yet: holding still')
            elif nominal_age > self._nominal_timeout:
                stale.append(f'nominal stale ({nominal_age * 1e3:.0f} ms old): holding still')
            if counts[MODE_REJECTED] or self._last_code == MODE_REJECTED:
                errors.append(f'{counts[MODE_REJECTED]} rejected steps (invalid input)')
            if counts[MODE_RECOVERING] or self._last_code == MODE_RECOVERING:
                errors.append(f'{counts[MODE_RECOVERING]} recovering steps (state outside the '
                              'safe set)')
            if counts[MODE_FALLBACK]:
                warnings.append(f'{counts[MODE_FALLBACK]} fallback steps')
            finite = self._window_margin[np.isfinite(self._window_margin)]
            if finite.size and float(finite.min()) < self._thin_margin:
                warnings.append(f'barrier margin down to {float(finite.min()):.4g}')
        hold_ms = certificate.control_period_s * certificate.sampling_factor * 1e3
        periods = np.array(self._window_periods) * 1e3
        period_ms = jitter_ms = math.nan
        if periods.size >= STEP_PERIOD_MIN_SAMPLES:
            period_ms = float(np.median(periods))
            jitter_ms = float(np.percentile(periods, 99.0)) - period_ms
            if self._active and period_ms > hold_ms * (1.0 + STEP_PERIOD_TOLERANCE):
                warnings.append(
                    f'step period {period_ms:.3g} ms exceeds the certified hold '
                    f'{hold_ms:.3g} ms by more than {STEP_PERIOD_TOLERANCE:.0%}: the '
                    'certificate does not cover this loop')
        if errors:
            level, parts = DiagnosticStatus.ERROR, errors + stale + warnings
        elif stale:
            level, parts = DiagnosticStatus.STALE, stale + warnings
        elif warnings:
            level, parts = DiagnosticStatus.WARN, warnings
        else:
            level, parts = DiagnosticStatus.OK, ['filtering']
        status = DiagnosticStatus(level=level, name=self._diagnostic_name,
                                  message='; '.join(parts), hardware_id=model.name)
        values = [('mode', MODE_NAMES[self._last_code] if self._last_code >= 0 else 'none'),
                  ('active', str(self._active).lower())]
        last = self._last_output
        values.append(('intervention.last',
                       _format_number(last.intervention) if last is not None else 'nan'))
        values.append(('intervention.max', _format_number(self._window_intervention)))
        for joint, margin in zip(self._joint_names, self._window_margin.tolist()):
            values.append((f'margin.{joint}', _format_number(margin)))
        values.append(('active_constraints', self._active_constraints(last)))
        # What the arm needs beyond the model (payload, inertia and friction errors, the
        # driver's torque error), as the disturbance observer sees it [N m].
        estimate = self._filter.disturbance_estimate if self._filter is not None else None
        for index, joint in enumerate(self._joint_names):
            values.append((f'model_error.{joint}', _format_number(float(estimate[index]))
                           if estimate is not None else 'nan'))
        times = np.array(self._window_solve_times) * 1e6
        values.append(('solves', str(times.size)))
        for label, value in (('median', 50.0), ('p99', 99.0)):
            values.append((f'solve_time.{label}_us',
                           _format_number(float(np.percentile(times, value)))
                           if times.size else 'nan'))
        values.append(('solve_time.max_us',
                       _format_number(float(times.max())) if times.size else 'nan'))
        values.append(('steps', str(sum(counts))))
        values.append(('step_period.median_ms', _format_number(period_ms)))
        values.append(('step_period.jitter_ms', _format_number(jitter_ms)))
        values.append(('step_period.certified_hold_ms', _format_number(hold_ms)))
        for name, count in zip(MODE_NAMES, counts):
            values.append((f'count.{name}', str(count)))
        values.append(('reasons', '; '.join(f'{reason} (x{count})' for reason, count
                                            in self._window_reasons.most_common(5)) or 'none'))
        values.append(('age.joint_state_ms', _format_number(joint_state_age * 1e3)))
        values.append(('age.nominal_ms', _format_number(nominal_age * 1e3)))
        values.append(('invalid.joint_state', str(self._invalid_joint_states)))
        values.append(('invalid.nominal', str(self._invalid_nominals)))
        if self._invalid_joint_states:
            values.append(('invalid.joint_state_last', self._last_js_problem))
        if self._invalid_nominals:
            values.append(('invalid.nominal_last', self._nominal_problem))
        values.append(('trigger', self._trigger))
        values.append(('certificate_id', self._certificate_id))
        status.values = [KeyValue(key=key, value=value) for key, value in values]
        return status

    def _active_constraints(self, output: FilterOutput | None) -> str:
        if output is None:
            return 'none'
        active = []
        for i, joint in enumerate(self._joint_names):
            if output.active_upper[i]:
                active.append(f'{joint}:accel_upper')
            if output.active_lower[i]:
                active.append(f'{joint}:accel_lower')
            if output.torque_saturated[i]:
                active.append(f'{joint}:torque')
        return ', '.join(active) or 'none'


# ---------------------------------------------------------------------- executable
def own_argument_parser() -> argparse.ArgumentParser:
    """The parser of the executable's own options (those before ``--ros-args``)."""
    parser = argparse.ArgumentParser(
        prog='filter_node',
        description='The safety_filter lifecycle node. ROS arguments go after --ros-args, '
        'e.g. --ros-args --params-file certificate.yaml -p urdf_path:=arm.urdf')
    parser.add_argument('--autostart', action='store_true',
                        help='configure and activate at start-up (no lifecycle manager needed)')
    parser.add_argument('--configure-at-start', action='store_true',
                        help='configure at start-up and stay inactive (a lifecycle manager or '
                        '`ros2 lifecycle set` activates it)')
    parser.add_argument('--executor', choices=EXECUTORS, default='single_threaded',
                        help="rclpy executor: 'single_threaded' (default; rclpy's "
                        "SingleThreadedExecutor) or 'events' (rclpy.experimental."
                        'EventsExecutor, experimental in Jazzy; measure it with '
                        'benchmarks/bench_node_latency.py first)')
    return parser


def _parse_own_arguments(arguments: Sequence[str]) -> argparse.Namespace:
    return own_argument_parser().parse_args(list(arguments))


def make_executor(kind: str, context: Any) -> Any:
    """An rclpy executor of kind ``'single_threaded'`` or ``'events'``."""
    if kind == 'events':
        from rclpy.experimental import EventsExecutor

        return EventsExecutor(context=context)
    return SingleThreadedExecutor(context=context)


def _raise_keyboard_interrupt(signum: int, frame: Any) -> None:
    raise KeyboardInterrupt


def main(args: Sequence[str] | None = None) -> int:
    """Run the node until SIGINT or SIGTERM (both end it cleanly: shutdown transition).

    Args:
        args: the command line like ``sys.argv`` (program name first); default ``sys.argv``.
            ``--autostart`` configures and activates the node at start-up; the node spins
            with rclpy's SingleThreadedExecutor unless ``--executor events`` (rclpy's
            experimental EventsExecutor) is given.

    Returns:
        0 on a clean exit, 1 when the autostart transitions failed.
    """
    argv = list(sys.argv if args is None else args)
    own = _parse_own_arguments(remove_ros_args(argv)[1:])
    context = rclpy.context.Context()
    # Our own signal handling: SIGINT/SIGTERM raise KeyboardInterrupt in the spin loop, so the
    # node can run its shutdown transition before the context goes away.
    rclpy.init(args=argv, context=context, signal_handler_options=SignalHandlerOptions.NO)
    previous = {number: signal.signal(number, _raise_keyboard_interrupt)
                for number in (signal.SIGINT, signal.SIGTERM)}
    node: SafetyFilterNode | None = None
    code = EXIT_OK
    try:
        node = SafetyFilterNode(context=context)
        if own.autostart or own.configure_at_start:
            if node.trigger_configure() != TransitionCallbackReturn.SUCCESS:
                node.get_logger().fatal('configure at start failed (see above)')
                return EXIT_FAILED
        if own.autostart:
            if node.trigger_activate() != TransitionCallbackReturn.SUCCESS:
                node.get_logger().fatal('autostart: activate failed')
                return EXIT_FAILED
        executor = make_executor(own.executor, context)
        executor.add_node(node)
        while context.ok():
            executor.spin_once(timeout_sec=0.1)
    except KeyboardInterrupt:
        pass
    finally:
        for number, handler in previous.items():
            signal.signal(number, handler)
        if node is not None:
            try:
                node.trigger_shutdown()
            except Exception as err:  # noqa: BLE001 - best effort on the way out
                node.get_logger().warning(f'shutdown transition failed: {err}')
            node.destroy_node()
        context.try_shutdown()
    return code


if __name__ == '__main__':
    sys.exit(main())
