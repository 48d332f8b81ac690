"""The filter's lifecycle node class, :class:`SafetyFilterNode` (the ROS adapter).

It converts messages, asks :mod:`safety_filter.online.input_supervision` what to do with
late or missing inputs, calls :meth:`SafetyFilter.step` (the ROS-free numeric core), packs
the ``~/status`` record (:mod:`safety_filter.online.status_layout`) and publishes the
diagnostics verdict of :mod:`safety_filter.online.health_verdict`; its parameters are
declared and read in :mod:`safety_filter.ros.filter_node_parameters`. The executable is
:mod:`safety_filter.ros.filter_node`; the node's reference is docs/node.md.
"""

from __future__ import annotations

import array
import math
import time
from collections.abc import Sequence
from typing import Any

import numpy as np
from diagnostic_msgs.msg import DiagnosticArray, DiagnosticStatus, KeyValue
from lifecycle_msgs.srv import ChangeState
from rcl_interfaces.msg import SetParametersResult
from rclpy.clock import Clock, ClockType
from rclpy.duration import Duration
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
from sensor_msgs.msg import JointState
from std_msgs.msg import Float64MultiArray, MultiArrayDimension, String

from safety_filter.core.certificate import Certificate
from safety_filter.core.robot_model import RobotModel
from safety_filter.errors import SafetyFilterError
from safety_filter.online.barrier_filter import SafetyFilter
from safety_filter.online.health_verdict import FilterHealth
from safety_filter.online.input_supervision import InputSupervisor, supervised_step
from safety_filter.online.status_layout import (
    diagnostic_name,
    fields_topic,
    format_fields,
    pack_status,
    status_field_names,
)
from safety_filter.ros.filter_node_parameters import (
    JOINT_STATE_TIMEOUT_S,
    NOMINAL_TIMEOUT_S,
    check_parameter_change,
    declare_parameters,
    latched_qos,
    read_settings,
)
from safety_filter.ros.names import FILTER_NODE_NAME

STATUS_TOPIC = '~/status'
STATUS_FIELDS_TOPIC = fields_topic(STATUS_TOPIC)  # '~/status_fields'
RCLError = _rclpy.RCLError


def control_qos() -> QoSProfile:
    """Keep-last depth 1, reliable, volatile: the QoS of the control topics (docs/node.md)."""
    return QoSProfile(history=HistoryPolicy.KEEP_LAST, depth=1,
                      reliability=ReliabilityPolicy.RELIABLE,
                      durability=DurabilityPolicy.VOLATILE)


def _qos_overrides() -> QoSOverridingOptions:
    return QoSOverridingOptions(policy_kinds=(QoSPolicyKind.RELIABILITY,
                                              QoSPolicyKind.HISTORY, QoSPolicyKind.DEPTH))


class SafetyFilterNode(LifecycleNode):
    """The managed node ``safety_filter`` (its interface: docs/node.md).

    Args:
        node_name: the node's name; the certificate file is keyed by it.
        **kwargs: passed to :class:`rclpy.lifecycle.LifecycleNode` (``context``,
            ``cli_args``, ``parameter_overrides``, ``namespace``, ...).
    """

    def __init__(self, node_name: str = FILTER_NODE_NAME, **kwargs: Any) -> None:
        super().__init__(node_name, **kwargs)
        # rclpy's change_state service raises (and so ends the executor's spin) when asked for
        # a transition the current state does not have; answer success=False instead. rclpy
        # (Jazzy) has no public hook on that service, so this reads its one private attribute;
        # where a release lacks it, rclpy's own behaviour stands (test_filter_node.py asks an
        # unconfigured node to activate and checks the node answers and keeps spinning).
        service = getattr(self, '_service_change_state', None)
        if service is not None:
            service.callback = self._guard_change_state(service.callback)
        declare_parameters(self)
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
        # The timeouts, validated and read at configure; changed at runtime by
        # _on_set_parameters.
        self._supervisor = InputSupervisor(JOINT_STATE_TIMEOUT_S, NOMINAL_TIMEOUT_S)

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
    def _on_set_parameters(self, parameters: list[Parameter]) -> SetParametersResult:
        """Reject safety parameters; validate operational ones."""
        result = check_parameter_change(parameters, self._configured)
        if not result.successful:
            return result
        for parameter in parameters:
            if parameter.name == 'joint_state_timeout_s':
                self._supervisor.joint_state_timeout_s = float(parameter.value)
            elif parameter.name == 'nominal_timeout_s':
                self._supervisor.nominal_timeout_s = float(parameter.value)
        if self._watchdog is not None and not self._watchdog_holding:
            self._watchdog.timer_period_ns = round(self._supervisor.silence_limit() * 1e9)
        return result

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
        self._health.reset()
        if not self._supervisor.joint_state_fresh(time.monotonic(), self._js_valid_time):
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
        """Publish the one defined last command before going quiet (docs/node.md).

        :meth:`InputSupervisor.last_command`, in the driver's convention. Nothing when no
        valid joint state came since activation. ``wait_s``: wait this long at most for
        subscribers to acknowledge it (shutdown, where the publisher is destroyed right
        after).
        """
        filt, publisher, q = self._filter, self._filtered_pub, self._last_valid_q
        if filt is None or publisher is None or q is None:
            return
        torque, fresh = self._supervisor.last_command(
            filt, time.monotonic(), self._js_valid_time, q, self._last_valid_v)
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
        settings = read_settings(self)
        model, certificate = settings.model, settings.certificate
        filt = SafetyFilter(model, certificate, gravity_convention=settings.gravity_convention,
                            payload_mass=settings.payload_mass,
                            observer_time_constant_s=None if settings.observer else 0.0)

        self._model = model
        self._certificate = certificate
        self._certificate_id = certificate.certificate_id  # a hash of the content: compute once
        self._diagnostic_name = diagnostic_name(self.get_fully_qualified_name())
        self._filter = filt
        self._supervisor = InputSupervisor(settings.joint_state_timeout_s,
                                           settings.nominal_timeout_s, settings.trigger)
        self._trigger = settings.trigger
        self._thin_margin = settings.thin_margin
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
        self._health = FilterHealth(self._joint_names)

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
        self._hold_period_ns = max(1, round(1e9 / settings.watchdog_rate_hz))
        self._watchdog = self.create_timer(self._supervisor.silence_limit(), self._on_watchdog,
                                           clock=steady)
        self._watchdog.cancel()  # runs only while active
        self._watchdog_holding = False
        diagnostics = self.create_timer(1.0 / settings.diagnostics_rate_hz,
                                        self._on_diagnostics, clock=steady)
        self._timers_made = [self._watchdog, diagnostics]
        self._configured = True
        self.get_logger().info(
            f'configured: {model.name!r}, joints {list(self._joint_names)}, certificate '
            f'{certificate.certificate_id}, gravity convention {settings.gravity_convention}, '
            f'payload {filt.payload_mass:g} kg, trigger {self._trigger}, watchdog '
            f'{settings.watchdog_rate_hz:g} Hz')

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
            self._health.invalid_joint_state(problem)
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
            self._health.invalid_nominal(f'{len(data)} values for {self._n} joints')
            self._u_nom = self._nan
        else:
            self._u_nom = np.array(data, dtype=float)
        self._nominal_time = now
        if self._active and self._trigger == 'nominal':
            self._feed_watchdog()
            self._run_step(now)

    # ------------------------------------------------------------------ watchdog
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
            watchdog.timer_period_ns = round(self._supervisor.silence_limit() * 1e9)
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
        return self._supervisor.trigger_silent(now, self._js_time, self._nominal_time)

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
        decision = self._supervisor.decide(now, self._js_valid_time, self._nominal_time)
        step = supervised_step(filt, decision, self._q, self._v, self._u_nom,
                               self._last_valid_q)
        output = step.output
        msg = self._filtered_msg
        msg.data = array.array('d', output.torque.tobytes())
        self._filtered_pub.publish(msg)

        health = self._health
        health.steps += 1
        buffer = pack_status(
            self._status_buffer, stamp_s=self._clock.now().nanoseconds * 1e-9,
            step=health.steps, mode=step.mode_code, hold_nominal=step.hold_nominal,
            intervention=output.intervention, solve_time_s=output.solve_time_s,
            joint_state_age_s=decision.joint_state_age_s,
            nominal_age_s=decision.nominal_age_s, margin=output.barrier_margin,
            torque=output.torque, nominal=step.nominal, position=step.q, velocity=step.v)
        status = self._status_msg
        status.data = array.array('d', buffer.tobytes())
        self._status_pub.publish(status)
        health.record_step(now, step.mode_code, step.reason, output)

    # ------------------------------------------------------------------ diagnostics
    def _on_diagnostics(self) -> None:
        if self._diagnostics_pub is None:
            return
        status = self._diagnostic_status(time.monotonic())
        array_msg = DiagnosticArray()
        array_msg.header.stamp = self.get_clock().now().to_msg()
        array_msg.status = [status]
        self._diagnostics_pub.publish(array_msg)
        self._health.reset_window()

    def _diagnostic_status(self, now: float) -> DiagnosticStatus:
        certificate = self._certificate
        model = self._model
        assert certificate is not None and model is not None
        has_state = self._last_valid_q is not None
        verdict = self._health.verdict(
            active=self._active, has_joint_state=has_state,
            decision=self._supervisor.decide(now, self._js_valid_time, self._nominal_time,
                                             has_joint_state=has_state),
            thin_margin=self._thin_margin,
            certified_hold_s=certificate.control_period_s * certificate.sampling_factor,
            trigger=self._trigger, certificate_id=self._certificate_id,
            disturbance_estimate=(self._filter.disturbance_estimate
                                  if self._filter is not None else None))
        # The message's level is a byte (diagnostic_msgs' OK, WARN, ERROR, STALE).
        status = DiagnosticStatus(level=bytes([verdict.level]), name=self._diagnostic_name,
                                  message=verdict.message, hardware_id=model.name)
        status.values = [KeyValue(key=key, value=value) for key, value in verdict.values]
        return status
