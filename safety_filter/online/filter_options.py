"""The checks of :class:`SafetyFilter`'s options, and the defaults they take from the
certificate.

The filter refuses an uncertified certificate, one for another model (``check_model``), one
that leaves no usable authority, and options outside their range; each with the error of
:mod:`safety_filter.errors` that names the option and the value.
"""

from __future__ import annotations

import math
from dataclasses import dataclass
from typing import Any

import numpy as np

from safety_filter.core.certificate import Certificate
from safety_filter.core.robot_model import RobotModel
from safety_filter.errors import CertificateError, InvalidValue, ShapeMismatch

GRAVITY_CONVENTIONS = ('full', 'driver_compensated')
HOLD_TIME_CONSTANT_PERIODS = 20.0  # default hold damping: velocity time constant [periods]


@dataclass(frozen=True)
class FilterOptions:
    """The checked options of a filter.

    Attributes:
        time_constants: the observer's time constant per joint [s] (all 0: no observer).
        usable_authority: the certificate's usable authority per joint [rad/s^2].
        payload_mass: the payload of the filter's model [kg].
        rejection_distance: positions farther beyond a limit are rejected [rad or m].
    """

    time_constants: np.ndarray
    usable_authority: np.ndarray
    payload_mass: float
    rejection_distance: float


def check_filter_options(model: RobotModel, certificate: Certificate, gravity_convention: str,
                         payload_mass: float | None, rejection_distance: float | None,
                         observer_time_constant_s: Any) -> FilterOptions:
    """Check the options of :class:`SafetyFilter` against the certificate; fill the defaults.

    Raises:
        CertificateMismatch: the certificate belongs to another model.
        CertificateError: the certificate is not certified or leaves no usable authority.
        InvalidValue: an option outside its range (ShapeMismatch: time constants that are
            neither one number nor one per joint).
    """
    certificate.check_model(model)
    if not certificate.certified:
        reasons = '; '.join(certificate.reasons) or 'no reason recorded'
        raise CertificateError(f'the certificate is not certified ({reasons}); the filter '
                               'refuses to run on it')
    if gravity_convention not in GRAVITY_CONVENTIONS:
        raise InvalidValue('gravity_convention', gravity_convention,
                           f'one of {", ".join(GRAVITY_CONVENTIONS)}')
    if rejection_distance is None:
        rejection_distance = 0.5 * float(np.min(certificate.position_upper
                                                - certificate.position_lower))
    if observer_time_constant_s is None:
        observer_time_constant_s = certificate.observer_time_constants_s
    n = model.n_joints
    try:
        time_constants = np.broadcast_to(np.asarray(observer_time_constant_s, dtype=float),
                                         (n,)).copy()
    except ValueError as err:
        raise ShapeMismatch('observer_time_constant_s', (n,),
                            np.shape(observer_time_constant_s),
                            detail='give a number or one per joint') from err
    if not (np.all(np.isfinite(time_constants)) and np.all(time_constants >= 0.0)
            and (np.all(time_constants > 0.0) or np.all(time_constants == 0.0))):
        raise InvalidValue('observer_time_constant_s', observer_time_constant_s,
                           'finite and > 0 per joint (or 0: no observer)')
    if not (math.isfinite(rejection_distance) and rejection_distance >= 0.0):
        raise InvalidValue('rejection_distance', rejection_distance, 'finite and >= 0')
    if payload_mass is None:
        low, high = certificate.payload_mass_range
        payload_mass = 0.5 * (float(low) + float(high))
    if not (math.isfinite(payload_mass) and payload_mass >= 0.0):
        raise InvalidValue('payload_mass', payload_mass, 'finite and >= 0')
    usable = np.array(certificate.usable_authority)
    if not np.all(usable > 0.0):
        raise CertificateError('the certificate leaves no usable authority '
                               '(authority <= sampling_margin) at some joint')
    return FilterOptions(time_constants, usable, float(payload_mass), float(rejection_distance))


def checked_hold_damping(hold_damping: Any, mass_mid: np.ndarray,
                         control_rate_hz: float) -> np.ndarray:
    """The hold command's damping per joint [N m s/rad].

    Default ``M_ii(q_mid) / (20 T)``: a velocity time constant of
    :data:`HOLD_TIME_CONSTANT_PERIODS` control periods ``T`` at the mid-range configuration.

    Raises:
        InvalidValue: a damping that is not finite and >= 0 (or not one per joint).
    """
    n = len(mass_mid)
    if hold_damping is None:
        damping = np.diag(mass_mid) * control_rate_hz / HOLD_TIME_CONSTANT_PERIODS
    else:
        try:
            damping = np.broadcast_to(np.asarray(hold_damping, dtype=float), (n,)).copy()
        except ValueError as err:
            raise ShapeMismatch('hold_damping', (n,), np.shape(hold_damping),
                                detail='give a number or one per joint') from err
    if not (np.all(np.isfinite(damping)) and np.all(damping >= 0.0)):
        raise InvalidValue('hold_damping', hold_damping, 'finite and >= 0')
    return damping
