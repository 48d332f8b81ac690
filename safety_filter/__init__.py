"""safety_filter: a certified control-barrier-function safety filter for torque-controlled arms.

The numeric core (model, dynamics, barriers, certification, the filter step) imports no ROS;
the ROS 2 nodes are thin adapters around it. Public API::

    from safety_filter import RobotModel, Certificate, SafetyFilter, certify
    model = RobotModel.from_urdf('arm.urdf', limits='arm_limits.yaml')
    cert = certify(model)                  # cert.certified; cert.save('cert.yaml')
    filt = SafetyFilter(model, cert)
    out = filt.step(q, v, u_nom)           # out.torque, out.mode, out.barrier_margin

Everything else is imported from the module that defines it (for example
``safety_filter.core.dynamics.Dynamics`` or ``safety_filter.simulation.demo_arms.DEMO_ARMS``).

The names are loaded on first use (PEP 562): ``import safety_filter`` alone imports neither
the compiled kernels nor the solvers, so a command's ``--help`` and the ROS entry points start
quickly.

This software is not a certified safety function. It does not replace hardware emergency
stops, safety-rated monitoring or a risk assessment.
"""

from __future__ import annotations

import importlib
from typing import TYPE_CHECKING, Any

from safety_filter._version import __version__

if TYPE_CHECKING:
    from safety_filter.certification.certify import CertifySettings, certify
    from safety_filter.core.certificate import Certificate
    from safety_filter.core.robot_model import PayloadRange, RobotModel
    from safety_filter.errors import CertificateError, CertificateMismatch, SafetyFilterError
    from safety_filter.online.barrier_filter import FilterOutput, SafetyFilter
    from safety_filter.online.mode_codes import FilterMode

# Public name -> the module that defines it (imported on first access).
_LAZY_NAMES: dict[str, str] = {
    'Certificate': 'safety_filter.core.certificate',
    'CertificateError': 'safety_filter.errors',
    'CertificateMismatch': 'safety_filter.errors',
    'CertifySettings': 'safety_filter.certification.certify',
    'FilterMode': 'safety_filter.online.mode_codes',
    'FilterOutput': 'safety_filter.online.barrier_filter',
    'PayloadRange': 'safety_filter.core.robot_model',
    'RobotModel': 'safety_filter.core.robot_model',
    'SafetyFilter': 'safety_filter.online.barrier_filter',
    'SafetyFilterError': 'safety_filter.errors',
    'certify': 'safety_filter.certification.certify',
}

__all__ = [
    'Certificate',
    'CertificateError',
    'CertificateMismatch',
    'CertifySettings',
    'FilterMode',
    'FilterOutput',
    'PayloadRange',
    'RobotModel',
    'SafetyFilter',
    'SafetyFilterError',
    '__version__',
    'certify',
]


def __getattr__(name: str) -> Any:
    """Import a public name from its defining module the first time it is asked for."""
    module_name = _LAZY_NAMES.get(name)
    if module_name is None:
        raise AttributeError(f'module {__name__!r} has no attribute {name!r}')
    value = getattr(importlib.import_module(module_name), name)
    globals()[name] = value  # later lookups skip __getattr__
    return value


def __dir__() -> list[str]:
    """The module's attributes, including the public names not yet loaded."""
    return sorted(set(globals()) | set(__all__))
