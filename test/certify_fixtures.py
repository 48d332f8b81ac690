"""Certified demo arms for the certification, simulation, closed-loop, replay and node tests.

Certification takes seconds per arm, so each demo arm is certified ONCE per test session with
the default :class:`CertifySettings` (at the default 1 kHz control rate, or at another rate
where a test needs one): :func:`certified_demo_arm` is cached, and every test that only needs
a demo arm's certificate takes it from there (:func:`demo_certificate`; the file in a
session folder from the ``demo_certificate_files`` fixture of ``conftest.py``), so the suite
certifies planar2 and bench6 once each and not once per test module. A certification that
does not certify fails the tests that need its certificate (it is a regression, not a reason
to skip them).

The session-scoped fixtures below call the cache (the cache, not the fixture scope, is what
makes it once per session: pytest keeps a separate fixture instance for every module that
imports a fixture, but they all share this cache).

Also here: the two-link planar arm in closed form (Spong, Hutchinson and Vidyasagar,
*Robot Modeling and Control*, the planar elbow manipulator), with the numbers of
``safety_filter/robots/planar2.urdf`` and a point payload on the tool frame, as a model of
planar2 that shares no code with the package.
"""

from __future__ import annotations

import functools
from dataclasses import dataclass
from pathlib import Path

import numpy as np
import pytest

from safety_filter.certification.certify import (
    CertificationOutcome,
    CertifySettings,
    certify_with_evidence,
)
from safety_filter.core.certificate import Certificate
from safety_filter.core.robot_model import RobotModel
from safety_filter.simulation.demo_arms import load_demo_arm

CERTIFIED_ARMS = ('planar2', 'bench6')
DEFAULT_RATE_HZ = CertifySettings().control_rate_hz


def certified_demo_arm(name: str, control_rate_hz: float = DEFAULT_RATE_HZ,
                       delay_predicted: bool = False) -> tuple[RobotModel, CertificationOutcome]:
    """A demo arm and the outcome of certifying it with the default settings at
    ``control_rate_hz`` (and ``delay_predicted``; cached: once per arm and settings per
    session)."""
    # One cache key however the rate is given (an lru_cache keys on the arguments as passed:
    # f('planar2') and f('planar2', 1000.0) would be two entries, two certifications).
    return _certify_demo_arm(name, float(control_rate_hz), bool(delay_predicted))


@functools.lru_cache(maxsize=None)
def _certify_demo_arm(name: str, control_rate_hz: float, delay_predicted: bool
                      ) -> tuple[RobotModel, CertificationOutcome]:
    model = load_demo_arm(name)
    settings = CertifySettings(control_rate_hz=control_rate_hz,
                               delay_predicted=delay_predicted)
    return model, certify_with_evidence(model, settings)


def covered_loop(certificate: Certificate, slowest: bool = False) -> tuple[float, int]:
    """A control rate [Hz] and a plant delay [control periods of that rate] the certificate
    covers. With the delay predicted (``prediction_s``) the declared delay at the certified
    rate (``sampling_factor`` 1). Else, with the delay as an upper bound, the certified rate
    with the declared delay or, for ``slowest``, no delay and one period as long as the
    hold the margin covers (``sampling_factor`` periods plus the declared delay)."""
    declared = int(certificate.settings['certify']['delay_periods'])
    rate = float(certificate.control_rate_hz)
    if certificate.prediction_s:
        assert certificate.sampling_factor == 1.0, 'a slower predicted loop is not simulated'
        return rate, declared
    if slowest:
        return rate / (certificate.sampling_factor + declared), 0
    return rate, declared


def demo_certificate(name: str, control_rate_hz: float = DEFAULT_RATE_HZ
                     ) -> tuple[RobotModel, Certificate]:
    """A demo arm and its session certificate (default settings); fails the calling test,
    with the certification's reasons, when the arm did not certify."""
    model, outcome = certified_demo_arm(name, control_rate_hz)
    if not outcome.certified:
        pytest.fail(f'{name} did not certify with the default settings at '
                    f'{control_rate_hz:g} Hz: {outcome.certificate.reasons}')
    return model, outcome.certificate


class DemoCertificateFiles:
    """The session's demo-arm certificates as files, each written once to ``folder`` the
    way ``safety-filter certify`` writes it (:meth:`Certificate.save`)."""

    def __init__(self, folder: Path) -> None:
        self.folder = folder
        self._paths: dict[tuple[str, float], Path] = {}

    def path(self, name: str, control_rate_hz: float = DEFAULT_RATE_HZ) -> Path:
        """The certificate file of demo arm ``name`` (fails the test if it did not
        certify). Treat it as read-only: other tests read the same file."""
        key = (name, control_rate_hz)
        if key not in self._paths:
            _, certificate = demo_certificate(name, control_rate_hz)
            stem = name if control_rate_hz == DEFAULT_RATE_HZ else \
                f'{name}_{control_rate_hz:g}hz'
            self._paths[key] = certificate.save(self.folder / f'{stem}_certificate.yaml')
        return self._paths[key]


@pytest.fixture(scope='session')
def planar2_certified() -> tuple[RobotModel, CertificationOutcome]:
    """planar2 and its certification outcome (default settings)."""
    return certified_demo_arm('planar2')


@pytest.fixture(scope='session')
def bench6_certified() -> tuple[RobotModel, CertificationOutcome]:
    """bench6 and its certification outcome (default settings)."""
    return certified_demo_arm('bench6')


@pytest.fixture(scope='session', params=CERTIFIED_ARMS)
def certified_arm(request: pytest.FixtureRequest) -> tuple[RobotModel, CertificationOutcome]:
    """Each certified demo arm in turn."""
    return certified_demo_arm(request.param)


# ---------------------------------------------------------------------- planar2, closed form
@dataclass(frozen=True)
class PlanarTwoLink:
    """The planar elbow manipulator in closed form (Spong et al., planar elbow example).

    Angles as in planar2.urdf: both joints positive counter-clockwise in the vertical x-z
    plane, zero with both links along +x, gravity ``-z``. Numbers from the URDF's inertial
    and dynamics elements (``l1 = 0.5``, ``lc1 = 0.25``, ``m1 = 2``, ``I1 = 0.042116667``,
    ``l2 = 0.4``, ``lc2 = 0.2``, ``m2 = 1.2``, ``I2 = 0.0161875``, damping 0.05 on both) and
    from planar2_limits.yaml (``g = 9.81``, payload point at the tool frame, ``x = l2`` on
    the forearm). The point payload ``mp`` is merged into link 2 by the parallel-axis theorem.
    """

    payload_mass: float = 0.0
    l1: float = 0.5
    lc1: float = 0.25
    m1: float = 2.0
    inertia1: float = 0.042116667
    l2: float = 0.4
    lc2_bare: float = 0.2
    m2_bare: float = 1.2
    inertia2_bare: float = 0.0161875
    gravity: float = 9.81
    damping: tuple[float, float] = (0.05, 0.05)

    @property
    def m2(self) -> float:
        return self.m2_bare + self.payload_mass

    @property
    def lc2(self) -> float:
        return (self.m2_bare * self.lc2_bare + self.payload_mass * self.l2) / self.m2

    @property
    def inertia2(self) -> float:
        """Link 2 (with payload) about its own centre of mass."""
        return (self.inertia2_bare + self.m2_bare * (self.lc2_bare - self.lc2) ** 2
                + self.payload_mass * (self.l2 - self.lc2) ** 2)

    def mass_matrix(self, q2: np.ndarray) -> np.ndarray:
        """``M(q)`` for elbow angles ``q2`` of shape (N,), shape (N, 2, 2)."""
        c2 = np.cos(q2)
        m2, lc2, i2 = self.m2, self.lc2, self.inertia2
        m11 = (self.m1 * self.lc1 ** 2 + m2 * (self.l1 ** 2 + lc2 ** 2 + 2 * self.l1 * lc2 * c2)
               + self.inertia1 + i2)
        m12 = m2 * (lc2 ** 2 + self.l1 * lc2 * c2) + i2
        m22 = np.full_like(c2, m2 * lc2 ** 2 + i2)
        return np.stack([np.stack([m11, m12], -1), np.stack([m12, m22], -1)], -2)

    def gravity_torque(self, q1: np.ndarray, q2: np.ndarray) -> np.ndarray:
        """``g(q)``, shape (..., 2)."""
        g = self.gravity
        c1, c12 = np.cos(q1), np.cos(q1 + q2)
        g2 = self.m2 * self.lc2 * g * c12
        g1 = (self.m1 * self.lc1 + self.m2 * self.l1) * g * c1 + g2
        return np.stack([g1, g2], -1)

    def coriolis_torque(self, q2: float, v: np.ndarray) -> np.ndarray:
        """``C(q, v) v`` with ``h = -m2 l1 lc2 sin q2`` (Spong et al.)."""
        h = -self.m2 * self.l1 * self.lc2 * np.sin(q2)
        return np.array([h * v[1] ** 2 + 2.0 * h * v[0] * v[1], -h * v[0] ** 2])

    def acceleration(self, q: np.ndarray, v: np.ndarray, u: np.ndarray) -> np.ndarray:
        """``M^-1 (u - C v - D v - g)``."""
        mass = self.mass_matrix(np.array([q[1]]))[0]
        bias = (self.coriolis_torque(q[1], v) + np.array(self.damping) * v
                + self.gravity_torque(q[0], q[1]))
        return np.linalg.solve(mass, u - bias)

    def state_derivative(self, u: np.ndarray):  # noqa: ANN201
        """``f(t, x)`` for ``x = (q, v)`` under a constant torque ``u`` (for solve_ivp)."""
        def rhs(_t: float, x: np.ndarray) -> np.ndarray:
            return np.concatenate([x[2:], self.acceleration(x[:2], x[2:], u)])
        return rhs
