"""The filter with a slow design: the safe set is the union of two certified designs' sets.

References: the filter with each design alone (``Certificate`` without its slow design, and
the slow design's own certificate) on the same state; the union rule of docs/method.md ("The
slow set"). The observer is off so that each filter's answer depends on the state alone.
"""

from __future__ import annotations

from dataclasses import replace

import numpy as np
import pytest
from certify_fixtures import demo_certificate

from safety_filter import FilterMode, SafetyFilter
from safety_filter.core.certificate import Certificate
from safety_filter.errors import CertificateError


@pytest.fixture(scope='module')
def bench6() -> tuple:
    model, certificate = demo_certificate('bench6')
    assert certificate.slow_design is not None, certificate.settings.get('notes')
    main_only = replace(certificate, slow_design=None)
    filters = {name: SafetyFilter(model, cert, observer_time_constant_s=0.0)
               for name, cert in (('union', certificate), ('main', main_only),
                                  ('slow', certificate.slow_design))}
    return model, certificate, filters


def _gained_joint(certificate: Certificate) -> int:
    """The joint whose gamma the slow design raises most (its braking curve moves most)."""
    return int(np.argmax(np.asarray(certificate.slow_design.gamma) / certificate.gamma))


def _mid(certificate: Certificate) -> np.ndarray:
    return 0.5 * (np.asarray(certificate.position_lower) + certificate.position_upper)


def _full_torque(filt: SafetyFilter, q: np.ndarray, v: np.ndarray, a: np.ndarray) -> np.ndarray:
    mass = filt.dynamics.mass_matrix(q)
    return mass @ a + filt.dynamics.bias_torque(q, v)


def test_a_state_only_in_the_slow_set_is_kept_there_not_recovered(bench6):
    model, certificate, filters = bench6
    j = _gained_joint(certificate)
    q = _mid(certificate)
    q[j] = certificate.position_upper[j] - 0.15 * (certificate.position_upper[j]
                                                   - certificate.position_lower[j])
    v = np.zeros(model.n_joints)
    _, main_high = certificate.safe_velocity_interval(q)
    _, slow_high = certificate.slow_design.safe_velocity_interval(q)
    assert slow_high[j] > main_high[j] * 1.2, 'no state only the slow set holds here'
    v[j] = 0.5 * (main_high[j] + slow_high[j])
    assert np.min(certificate.safe_set_margins(q, v)) >= 0.0  # in S (the union)
    u = _full_torque(filters['main'], q, v, np.zeros(model.n_joints))
    for name in ('union', 'main'):
        filters[name].reset()
    alone = filters['main'].step(q, v, u)
    union = filters['union'].step(q, v, u)
    assert alone.mode is FilterMode.RECOVERING  # outside the main design's set
    assert union.mode is FilterMode.FILTERED and union.slow_set
    assert np.all(union.barrier_margin >= 0.0)
    slow = filters['slow']
    slow.reset()
    np.testing.assert_allclose(union.torque, slow.step(q, v, u).torque, rtol=1e-6, atol=1e-6)


def test_a_nominal_only_the_slow_design_allows_is_sent_unchanged(bench6):
    model, certificate, filters = bench6
    j = _gained_joint(certificate)
    q, v = _mid(certificate), np.zeros(model.n_joints)
    # between the main design's acceleration bound and the slow one's
    a = np.zeros(model.n_joints)
    a[j] = 0.5 * (certificate.acceleration_bound[j]
                  + certificate.slow_design.acceleration_bound[j])
    u = _full_torque(filters['main'], q, v, a)
    for name in ('union', 'main'):
        filters[name].reset()
    assert filters['main'].step(q, v, u).solver_status != 'nominal feasible'
    out = filters['union'].step(q, v, u)
    assert out.solver_status == 'nominal feasible' and out.slow_set
    np.testing.assert_array_equal(out.torque, u)


@pytest.mark.parametrize('case', ['slow changes less', 'main changes less'])
def test_in_both_sets_the_answer_that_changes_the_nominal_less_is_sent(bench6, case):
    model, certificate, filters = bench6
    q, v = _mid(certificate), np.zeros(model.n_joints)
    a = np.zeros(model.n_joints)
    if case == 'slow changes less':  # far past both acceleration bounds: slow allows more
        j = _gained_joint(certificate)
        a[j] = 3.0 * certificate.slow_design.acceleration_bound[j]
    else:  # near the slow box and speeding up: its velocity barrier holds it back more
        v = 0.95 * np.asarray(certificate.slow_design.velocity_bound)
        gap = (filters['main'].constraint_bounds(q, v).accel_upper
               - filters['slow'].constraint_bounds(q, v).accel_upper)
        j = int(np.argmax(gap))
        assert gap[j] > 0.0
        v = np.where(np.arange(model.n_joints) == j, v, 0.0)
        a[j] = filters['main'].constraint_bounds(q, v).accel_upper[j] + 0.1 * gap[j]
    u = _full_torque(filters['main'], q, v, a)
    answers = {}
    for name, filt in filters.items():
        filt.reset()
        answers[name] = filt.step(q, v, u)
    assert answers['main'].solver_status != 'nominal feasible'
    assert answers['slow'].solver_status != 'nominal feasible'

    def change(out):  # the QP's acceleration objective, from the torque sent
        mass = filters['main'].dynamics.mass_matrix(q)
        bias = filters['main'].dynamics.bias_torque(q, v)
        delta = np.linalg.solve(mass, out.torque - bias) - a
        return float(np.sum((delta / filters['main'].usable_authority) ** 2))

    expected = min(('main', 'slow'), key=lambda name: change(answers[name]))
    assert expected == ('slow' if case == 'slow changes less' else 'main')
    assert answers['union'].slow_set == (expected == 'slow')
    np.testing.assert_allclose(answers['union'].torque, answers[expected].torque, rtol=1e-6,
                               atol=1e-6)


def test_the_union_margins_are_those_of_the_set_that_holds_the_state(bench6):
    model, certificate, _ = bench6
    slow = certificate.slow_design
    rng = np.random.default_rng(3)
    q = rng.uniform(certificate.position_lower, certificate.position_upper,
                    size=(4000, model.n_joints))
    v = rng.uniform(-1.0, 1.0, size=q.shape) * certificate.velocity_limit
    union = certificate.safe_set_margins(q, v)
    main = replace(certificate, slow_design=None).safe_set_margins(q, v)
    alone = slow.safe_set_margins(q, v)
    inside = union.min(axis=1) >= 0.0
    np.testing.assert_array_equal(
        inside, (main.min(axis=1) >= 0.0) | (alone.min(axis=1) >= 0.0))
    assert inside.sum() > (main.min(axis=1) >= 0.0).sum()  # the slow set adds states


def test_the_certificate_file_keeps_the_slow_design_and_refuses_an_edit(bench6, tmp_path):
    model, certificate, _ = bench6
    path = certificate.save(tmp_path / 'c.yaml')
    loaded = Certificate.load(path, model)
    assert loaded.slow_design is not None
    assert loaded.certificate_id == certificate.certificate_id
    np.testing.assert_array_equal(loaded.slow_design.gamma, certificate.slow_design.gamma)
    text = path.read_text()
    gamma = f'{float(certificate.slow_design.gamma[0])!r}'
    assert gamma in text
    path.write_text(text.replace(gamma, f'{1.5 * float(gamma)!r}', 1))
    with pytest.raises(CertificateError, match='edited'):
        Certificate.load(path, model)


def test_a_slow_design_must_match_its_certificate(bench6):
    _, certificate, _ = bench6
    slow = certificate.slow_design
    with pytest.raises(CertificateError, match='another model'):
        replace(certificate, slow_design=replace(slow, model_hash='0' * 16))
    with pytest.raises(CertificateError, match='another model'):
        replace(certificate, slow_design=replace(slow, control_rate_hz=500.0))
    with pytest.raises(CertificateError, match='of its own'):
        replace(certificate, slow_design=replace(slow, slow_design=slow))
    with pytest.raises(CertificateError, match='not certified'):
        replace(certificate, slow_design=replace(slow, certified=False, reasons=['x']))


def test_safe_tracking_at_half_the_rated_speed_passes_unchanged_and_keeps_the_limits(bench6):
    # The motion of docs/method.md ("The slow set"): sinusoids 10 % of the range inside every
    # limit, peaking at half the rated speed, on the model; the main design alone changed
    # the torque on most steps of it.
    from safety_filter.simulation.command_sources import SafeTracking
    from safety_filter.simulation.plant import run_closed_loop

    model, certificate, _ = bench6
    filt = SafetyFilter(model, certificate)
    tracking = SafeTracking(model, filt.payload_mass, speed_fraction=0.5, inset=0.1, seed=2)
    q0, v0, _ = tracking.reference(0.0)
    assert np.min(certificate.safe_set_margins(q0, v0)) >= 0.0
    log = run_closed_loop(model, filt.step, tracking, 3.0, certificate.control_rate_hz, q0, v0,
                          payload_mass=filt.payload_mass)
    limit = np.maximum(np.abs(log.nominal), certificate.effort_limit)
    changed = np.any(np.abs(log.torque - log.nominal) > 1e-9 * limit, axis=1)
    assert changed.mean() <= 0.05, changed.mean()
    assert np.all(log.q >= certificate.position_lower) and np.all(
        log.q <= certificate.position_upper)
    assert np.all(np.abs(log.v) <= certificate.velocity_limit)
    assert np.all(log.mode != FilterMode.RECOVERING.value)
