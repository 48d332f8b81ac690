"""safety_filter: a certified control-barrier-function safety filter for torque-controlled arms.

The numeric core (model, dynamics, barriers, certification, the filter step) imports no ROS;
the ROS 2 nodes are thin adapters around it. Public API::

    from safety_filter import RobotModel, Certificate, SafetyFilter, certify
    model = RobotModel.from_urdf('arm.urdf', limits='arm_limits.yaml')
    cert = certify(model)                  # cert.certified; cert.save('cert.yaml')
    filt = SafetyFilter(model, cert)
    out = filt.step(q, v, u_nom)           # out.torque, out.mode, out.barrier_margin

This software is not a certified safety function. It does not replace hardware emergency
stops, safety-rated monitoring or a risk assessment.
"""

from safety_filter._version import __version__
from safety_filter.certification.certify import (
    CertificationOutcome,
    CertifySettings,
    certify,
    certify_with_evidence,
)
from safety_filter.certification.dynamics_bounds import BoundSettings
from safety_filter.certification.falsifier import FalsifierResult, falsify
from safety_filter.core.certificate import Certificate, CertificateError, CertificateMismatch
from safety_filter.core.class_k import ClassK
from safety_filter.core.dynamics import (
    Dynamics,
    christoffel_batch,
    gravity_torque_batch,
    mass_matrix_batch,
    rnea_batch,
)
from safety_filter.core.robot_model import PayloadRange, RobotModel
from safety_filter.errors import (
    InvalidInertia,
    InvalidLimits,
    RobotDescriptionError,
    SafetyFilterError,
    UnknownJoint,
    UnknownLink,
    UnsupportedChain,
)
from safety_filter.online.barrier_filter import FilterMode, FilterOutput, SafetyFilter
from safety_filter.simulation.demo_arms import DEMO_ARMS, demo_arm_files, load_demo_arm

__all__ = [
    'BoundSettings',
    'Certificate',
    'CertificateError',
    'CertificateMismatch',
    'CertificationOutcome',
    'CertifySettings',
    'ClassK',
    'DEMO_ARMS',
    'FalsifierResult',
    'FilterMode',
    'FilterOutput',
    'SafetyFilter',
    'Dynamics',
    'InvalidInertia',
    'InvalidLimits',
    'PayloadRange',
    'RobotDescriptionError',
    'RobotModel',
    'SafetyFilterError',
    'UnknownJoint',
    'UnknownLink',
    'UnsupportedChain',
    '__version__',
    'certify',
    'certify_with_evidence',
    'christoffel_batch',
    'demo_arm_files',
    'falsify',
    'gravity_torque_batch',
    'load_demo_arm',
    'mass_matrix_batch',
    'rnea_batch',
]
