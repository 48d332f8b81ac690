"""The filter node's parameters: their declarations, their checks, and reading them at
configure into the robot model, the certificate and the filter's settings.

The parameter reference is docs/node.md ("Parameters"). Safety parameters (the certificate's
entries and the robot model) are fixed for the life of the node; the timeouts may change at
any time; the other operational parameters are read at configure.
"""

from __future__ import annotations

import array
import math
from dataclasses import dataclass
from typing import Any

from rcl_interfaces.msg import ParameterDescriptor, SetParametersResult
from rclpy.lifecycle import LifecycleNode
from rclpy.parameter import Parameter
from rclpy.qos import DurabilityPolicy, HistoryPolicy, QoSProfile, ReliabilityPolicy
from rclpy.wait_for_message import wait_for_message
from std_msgs.msg import String

from safety_filter.core.certificate import Certificate
from safety_filter.core.robot_model import RobotModel
from safety_filter.errors import (
    CertificateError,
    InvalidValue,
    RobotDescriptionError,
    RunFailed,
    SafetyFilterError,
)
from safety_filter.online.filter_options import GRAVITY_CONVENTIONS
from safety_filter.online.input_supervision import (
    JOINT_STATE_TIMEOUT_S,
    NOMINAL_TIMEOUT_S,
    TRIGGERS,
    check_trigger,
    positive_finite,
)
from safety_filter.online.status_layout import THIN_MARGIN

# Every key of Certificate.to_parameters() (a test checks they agree).
CERTIFICATE_PARAMETERS = (
    'certificate_format', 'joint_names', 'position_lower', 'position_upper', 'velocity_limit',
    'effort_limit', 'velocity_bound', 'gamma', 'gamma_star', 'beta', 'beta_star', 'beta_floor',
    'beta_cap', 'authority', 'sampling_margin', 'viscous_friction', 'coulomb_friction',
    'condition', 'control_rate_hz', 'sampling_factor', 'model_hash', 'package_version',
    'created', 'certified', 'alpha1_kind', 'alpha1_scale', 'alpha2_kind', 'alpha2_scale',
    'payload_mass_range', 'payload_point', 'settings_json', 'falsifier_json', 'reasons',
    'certificate_id', 'velocity_beta', 'acceleration_bound', 'acceleration_hold_s',
    'prediction_s', 'lookahead_s', 'slow_design_json')
MODEL_PARAMETERS = ('urdf_path', 'robot_description', 'robot_description_topic',
                    'robot_description_timeout_s', 'limits_path', 'gravity_convention',
                    'payload_mass', 'disturbance_observer')
SAFETY_PARAMETERS = frozenset(CERTIFICATE_PARAMETERS + MODEL_PARAMETERS)
TIMEOUT_PARAMETERS = ('joint_state_timeout_s', 'nominal_timeout_s')
CONFIGURE_TIME_PARAMETERS = ('trigger', 'watchdog_rate_hz', 'diagnostics_rate_hz',
                             'thin_margin')
ROBOT_DESCRIPTION_TIMEOUT_S = 10.0  # [s] default robot_description_timeout_s
__all__ = ['CERTIFICATE_PARAMETERS', 'MODEL_PARAMETERS', 'SAFETY_PARAMETERS',
           'TIMEOUT_PARAMETERS', 'CONFIGURE_TIME_PARAMETERS', 'TRIGGERS',
           'JOINT_STATE_TIMEOUT_S', 'NOMINAL_TIMEOUT_S', 'ROBOT_DESCRIPTION_TIMEOUT_S',
           'NodeSettings', 'declare_parameters', 'check_parameter_change', 'read_settings',
           'latched_qos']


def latched_qos() -> QoSProfile:
    """Reliable, transient-local, keep-last 1: a description sent once, kept for late
    subscribers (``~/status_fields``; ``robot_description`` as robot_state_publisher sends it)."""
    return QoSProfile(history=HistoryPolicy.KEEP_LAST, depth=1,
                      reliability=ReliabilityPolicy.RELIABLE,
                      durability=DurabilityPolicy.TRANSIENT_LOCAL)


def _describe(text: str, read_only: bool = False, dynamic: bool = False) -> ParameterDescriptor:
    return ParameterDescriptor(description=text, read_only=read_only, dynamic_typing=dynamic)


def declare_parameters(node: LifecycleNode) -> None:
    """Declare every parameter of the filter node on ``node`` (docs/node.md)."""
    for name in CERTIFICATE_PARAMETERS:
        node.declare_parameter(name, None, _describe(
            'certificate entry (from the certificate parameter file); fixed',
            read_only=True, dynamic=True))
    node.declare_parameter('urdf_path', '', _describe(
        'path of the robot URDF or .xacro file (or give robot_description or '
        'robot_description_topic); safety parameter, fixed'))
    node.declare_parameter('robot_description', '', _describe(
        'URDF XML text, instead of urdf_path; safety parameter, fixed'))
    node.declare_parameter('robot_description_topic', '', _describe(
        'read the URDF at configure from this std_msgs/String topic (transient-local, '
        'as robot_state_publisher publishes robot_description), instead of urdf_path; '
        'safety parameter, fixed'))
    node.declare_parameter('robot_description_timeout_s', ROBOT_DESCRIPTION_TIMEOUT_S,
                           _describe('configure waits this long [s] for the URDF on '
                                     'robot_description_topic; fixed', dynamic=True))
    node.declare_parameter('limits_path', '', _describe(
        'limits YAML of the robot (also selects the chain); safety parameter, fixed'))
    node.declare_parameter('gravity_convention', 'full', _describe(
        "'full' (the driver takes the full torque) or 'driver_compensated' (the driver "
        'adds g(q) itself); safety parameter, fixed'))
    node.declare_parameter('payload_mass', -1.0, _describe(
        'payload of the model [kg]; negative: middle of the certified range; safety '
        'parameter, fixed', dynamic=True))
    node.declare_parameter('disturbance_observer', True, _describe(
        'estimate the model error from the measured motion (docs/method.md); false only '
        'to feed the node inputs that are not a real motion (tests, studies): the '
        'guarantee on an arm that differs from its model needs it; safety parameter, '
        'fixed'))
    node.declare_parameter('joint_state_timeout_s', JOINT_STATE_TIMEOUT_S, _describe(
        'joint states older than this [s] trip the watchdog (hold command); default 0.02: '
        '20 periods of a 1 kHz loop', dynamic=True))
    node.declare_parameter('nominal_timeout_s', NOMINAL_TIMEOUT_S, _describe(
        'a nominal older than this [s] is never used (hold-still nominal instead)',
        dynamic=True))
    node.declare_parameter('trigger', 'joint_state', _describe(
        "'joint_state' (default): step on each joint state with the latest nominal, one "
        "step per control period at the driver's rate, the hold the certificate covers; "
        "'nominal': step on each nominal with the latest joint state (only for a command "
        'source at the control rate); read at configure'))
    node.declare_parameter('watchdog_rate_hz', 0.0, _describe(
        'rate of the watchdog timer [Hz]; 0: the certificate control rate; read at '
        'configure', dynamic=True))
    node.declare_parameter('diagnostics_rate_hz', 2.0, _describe(
        'rate of /diagnostics [Hz]; read at configure', dynamic=True))
    node.declare_parameter('thin_margin', THIN_MARGIN, _describe(
        'diagnostics WARN when a barrier margin falls below this (barrier units; the '
        "monitor's --thin-margin default too); read at configure", dynamic=True))


def check_configure_parameter(name: str, value: Any) -> Any:
    """The value of a configure-time parameter, checked.

    Raises:
        InvalidValue: a value the parameter does not take.
    """
    if name == 'trigger':
        return check_trigger(value)
    if name == 'watchdog_rate_hz':
        if isinstance(value, (int, float)) and not isinstance(value, bool) and value == 0:
            return 0.0
        return positive_finite(name, value)
    if name == 'thin_margin':
        if isinstance(value, bool) or not isinstance(value, (int, float)) \
                or not math.isfinite(value):
            raise InvalidValue('thin_margin', value, 'a finite number')
        return float(value)
    return positive_finite(name, value)


def check_parameter_change(parameters: list[Parameter], configured: bool
                           ) -> SetParametersResult:
    """Whether a runtime change of ``parameters`` is allowed: never for a safety parameter,
    configure-time ones only while unconfigured, timeouts when positive and finite."""
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
                positive_finite(name, parameter.value)
            elif name in CONFIGURE_TIME_PARAMETERS:
                if configured:
                    return SetParametersResult(
                        successful=False,
                        reason=f'{name} is read at configure; clean the node up first')
                check_configure_parameter(name, parameter.value)
        except SafetyFilterError as err:
            return SetParametersResult(successful=False, reason=str(err))
    return SetParametersResult(successful=True)


@dataclass(frozen=True)
class NodeSettings:
    """What configure reads from the parameters.

    Attributes:
        model, certificate: the robot model and its certificate (checked against it).
        gravity_convention: ``'full'`` or ``'driver_compensated'``.
        payload_mass: the payload [kg]; None: the middle of the certified range.
        observer: the disturbance observer runs.
        joint_state_timeout_s, nominal_timeout_s: the timeouts [s].
        trigger: ``'joint_state'`` or ``'nominal'``.
        watchdog_rate_hz: the watchdog's rate (the certificate's control rate for 0).
        diagnostics_rate_hz, thin_margin: the diagnostics' rate and thin-margin threshold.
    """

    model: RobotModel
    certificate: Certificate
    gravity_convention: str
    payload_mass: float | None
    observer: bool
    joint_state_timeout_s: float
    nominal_timeout_s: float
    trigger: str
    watchdog_rate_hz: float
    diagnostics_rate_hz: float
    thin_margin: float


def _certificate_parameters(node: LifecycleNode) -> dict[str, Any]:
    values = {}
    for name in CERTIFICATE_PARAMETERS:
        parameter = node.get_parameter(name)
        if parameter.type_ != Parameter.Type.NOT_SET:
            value = parameter.value
            values[name] = list(value) if isinstance(value, (array.array, tuple)) else value
    return values


def read_settings(node: LifecycleNode) -> NodeSettings:
    """Read and check the parameters of ``node`` at configure; build the model and the
    certificate and check that they belong together.

    Raises:
        SafetyFilterError: a missing or bad parameter, a certificate that is refused, a
            robot description that cannot be read (the subclass says which).
    """
    values = _certificate_parameters(node)
    if 'certificate_format' not in values:
        name = node.get_fully_qualified_name()
        raise CertificateError(
            'no certificate parameters: start the node with --params-file <certificate '
            'YAML written by safety-filter certify> (keyed /**, it applies to this node '
            f'wherever it runs); a file keyed by a node name applies only to that name: '
            f"for {name!r} key it '/**' or {name!r}")
    certificate = Certificate.from_parameters(values)
    limits_path = str(node.get_parameter('limits_path').value)
    model = RobotModel.from_urdf(_robot_description(node), limits=limits_path or None)
    certificate.check_model(model)

    convention = node.get_parameter('gravity_convention').value
    if convention not in GRAVITY_CONVENTIONS:
        raise InvalidValue('gravity_convention', convention,
                           f'one of {", ".join(GRAVITY_CONVENTIONS)}')
    payload = node.get_parameter('payload_mass').value
    if isinstance(payload, bool) or not isinstance(payload, (int, float)) \
            or not math.isfinite(payload):
        raise InvalidValue('payload_mass', payload, 'a finite number')
    low, high = certificate.payload_mass_range
    payload_mass: float | None = None
    if payload >= 0.0:
        if not low <= payload <= high:
            raise InvalidValue(
                'payload_mass', payload, f'within the certified range [{low:g}, {high:g}] kg',
                detail='certify for this payload')
        payload_mass = float(payload)
    operational = {name: check_configure_parameter(name, node.get_parameter(name).value)
                   for name in CONFIGURE_TIME_PARAMETERS}
    js_timeout, nominal_timeout = (positive_finite(name, node.get_parameter(name).value)
                                   for name in TIMEOUT_PARAMETERS)
    observer = node.get_parameter('disturbance_observer').value
    if not isinstance(observer, bool):
        raise InvalidValue('disturbance_observer', observer, 'true or false')
    return NodeSettings(
        model, certificate, convention, payload_mass, observer, js_timeout, nominal_timeout,
        operational['trigger'],
        operational['watchdog_rate_hz'] or certificate.control_rate_hz,
        operational['diagnostics_rate_hz'], operational['thin_margin'])


def _robot_description(node: LifecycleNode) -> str:
    """The URDF path or text from ``urdf_path``, ``robot_description`` or
    ``robot_description_topic`` (exactly one; the topic is read now, waiting up to
    ``robot_description_timeout_s`` for its transient-local message)."""
    urdf_path = str(node.get_parameter('urdf_path').value)
    description = str(node.get_parameter('robot_description').value)
    topic = str(node.get_parameter('robot_description_topic').value).strip()
    given = [name for name, value in (('urdf_path', urdf_path),
                                      ('robot_description', description.strip()),
                                      ('robot_description_topic', topic)) if value]
    if len(given) > 1:
        raise InvalidValue('robot model', ' and '.join(given),
                           'one of urdf_path, robot_description and robot_description_topic',
                           detail=f'give one of urdf_path, robot_description and '
                           f'robot_description_topic, not {" and ".join(given)}')
    if not given:
        raise RobotDescriptionError('no robot model: set urdf_path, robot_description or '
                                    'robot_description_topic')
    if urdf_path:
        return urdf_path
    if description:
        if not description.lstrip().startswith('<'):
            raise RobotDescriptionError('robot_description must be URDF XML text')
        return description
    timeout = positive_finite('robot_description_timeout_s',
                              node.get_parameter('robot_description_timeout_s').value)
    resolved = node.resolve_topic_name(topic)
    node.get_logger().info(f'waiting up to {timeout:g} s for the URDF on {resolved}')
    # rclpy's wait_for_message waits on a wait set of its own: it works inside a
    # transition callback, while the executor that called it is busy.
    received, message = wait_for_message(String, node, topic, qos_profile=latched_qos(),
                                         time_to_wait=timeout)
    if not received or message is None:
        raise RunFailed(
            f'no robot description on {resolved} within {timeout:g} s: start '
            'robot_state_publisher (or whatever publishes it, transient-local), remap '
            'robot_description_topic, or give urdf_path')
    text = str(message.data)
    if not text.lstrip().startswith('<'):
        raise RobotDescriptionError(f'{resolved} did not carry URDF XML text')
    return text
