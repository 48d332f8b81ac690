"""safety_filter: a certified control-barrier-function safety filter for torque-controlled arms.

The numeric core (model, dynamics, barriers, certification, the filter step) imports no ROS;
the ROS 2 nodes are thin adapters around it. Public API::

    from safety_filter import RobotModel, Dynamics
    model = RobotModel.from_urdf('arm.urdf', limits='arm_limits.yaml')
    dyn = Dynamics(model)
    M, h = dyn.mass_and_bias(q, v)

This software is not a certified safety function. It does not replace hardware emergency
stops, safety-rated monitoring or a risk assessment.
"""

from safety_filter.demo_arms import DEMO_ARMS, demo_arm_files, load_demo_arm
from safety_filter.dynamics import (
    Dynamics,
    christoffel_batch,
    gravity_torque_batch,
    mass_matrix_batch,
    rnea_batch,
)
from safety_filter.errors import (
    InvalidInertia,
    InvalidLimits,
    RobotDescriptionError,
    SafetyFilterError,
    UnknownJoint,
    UnknownLink,
    UnsupportedChain,
)
from safety_filter.model import PayloadRange, RobotModel

__version__ = '0.1.0'

__all__ = [
    'DEMO_ARMS',
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
    'christoffel_batch',
    'demo_arm_files',
    'gravity_torque_batch',
    'load_demo_arm',
    'mass_matrix_batch',
    'rnea_batch',
]
