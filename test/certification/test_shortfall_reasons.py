"""The advice a certification gives when a joint lacks authority within one hold
(safety_filter.certification.shortfall_reasons): a control rate the hardware might have, or
the URDF damping value that dominates, with its numbers.

Reference for the damping time constant: a joint of inertia I with viscous damping D decays
as exp(-t D / I) under a held torque, time constant I / D (first-order linear ODE, textbook;
common practice). The inertias come from Pinocchio's CRBA (package ``pin``), independent of
the package's own dynamics.
"""

from __future__ import annotations

import re
from pathlib import Path

import numpy as np
import pytest

from safety_filter.certification.certify_settings import CertifySettings
from safety_filter.certification.shortfall_reasons import margin_shortfall_reason
from safety_filter.core.robot_model import RobotModel
from safety_filter.simulation.demo_arms import load_demo_arm

URDF = Path(__file__).resolve().parents[1] / 'urdf'


def test_a_fast_damping_mode_names_the_urdf_value_and_its_time_constant() -> None:
    pin = pytest.importorskip('pinocchio')
    model = RobotModel.from_urdf(URDF / 'drag6.urdf', limits=URDF / 'drag6_limits.yaml')
    settings = CertifySettings(control_rate_hz=1000.0)
    flange = model.joint_names.index('flange_roll')
    reason = margin_shortfall_reason(model, settings, flange, margin=50.0, authority=10.0)
    assert "'flange_roll'" in reason and 'viscous damping' in reason
    match = re.search(r"the URDF gives '(\w+)' ([\d.]+) N m s/rad of viscous damping on as "
                      r'little as ([\d.e-]+) kg m\^2 of link inertia, a time constant of '
                      r'([\d.]+) ms', reason)
    assert match, reason
    joint, damping, inertia, tau_ms = match.groups()
    j = model.joint_names.index(joint)
    assert float(damping) == pytest.approx(model.viscous_friction[j], rel=1e-3)
    assert float(tau_ms) == pytest.approx(1000 * float(inertia) / float(damping), rel=2e-2)
    # the inertia it names is the joint's smallest effective one, 1 / max (M^-1)_jj over
    # configurations drawn in the joint box (seeded; no payload: drag6's lightest is none):
    # the same draws through Pinocchio's CRBA
    robot = pin.buildModelFromUrdf(str(URDF / 'drag6.urdf'))
    data = robot.createData()
    rng = np.random.default_rng(0)
    draws = rng.uniform(model.position_lower, model.position_upper, (64, model.n_joints))
    largest = 0.0
    for q in draws:
        crba = pin.crba(robot, data, q)
        crba = np.triu(crba) + np.triu(crba, 1).T
        largest = max(largest, np.linalg.inv(crba)[j, j])
    assert float(inertia) == pytest.approx(1.0 / largest, rel=1e-2)
    assert 'A faster control rate helps little' in reason


def test_a_light_damped_arm_gets_the_control_rate_that_would_do() -> None:
    model = load_demo_arm('planar2')
    settings = CertifySettings(control_rate_hz=500.0)
    reason = margin_shortfall_reason(model, settings, 0, margin=3.0, authority=2.0)
    assert 'raise the control rate above 750 Hz' in reason  # 500 Hz x 3 / 2, by scaling
    far = margin_shortfall_reason(model, settings, 0, margin=60.0, authority=2.0)
    assert 'no control rate below 10 kHz would do (about 15000 Hz' in far
