"""The online filter step (safety_filter.online.barrier_filter).

Outside sources named per test: METHOD sections 3, 4.4 and 5 for the required behaviour,
Pinocchio's gravity and inertia (through Dynamics, itself checked against Pinocchio's URDF
loader in test_dynamics) for the expected hold torques and accelerations, and
``evaluate_barriers`` (the formulas of METHOD 2) for the barrier state.
"""

from __future__ import annotations

import math
from dataclasses import replace

import numpy as np
import pytest
from filter_fixtures import (
    demo_arm_and_certificate,
    random_nominal,
    random_state_in_safe_set,
    uncertified,
    velocity_interval,
)

from safety_filter.core.certificate import CertificateError, CertificateMismatch
from safety_filter.core.dynamics import Dynamics
from safety_filter.errors import SafetyFilterError
from safety_filter.online.barrier_filter import FilterMode, FilterOutput, SafetyFilter
from safety_filter.online.constructive import constructive_acceleration
from safety_filter.online.qp_solver import QPResult
from safety_filter.simulation.demo_arms import load_demo_arm

ARMS = ('planar2', 'bench6', 'reach7')


def make_filter(arm: str = 'reach7', **kwargs) -> SafetyFilter:
    # These tests step through unrelated states, which the disturbance observer would read
    # as model error: it is off unless a test asks for it (test_observer.py covers it).
    kwargs.setdefault('observer_time_constant_s', 0.0)
    model, certificate = demo_arm_and_certificate(arm)
    return SafetyFilter(model, certificate, **kwargs)


def full_torque_in_box(filt: SafetyFilter, out: FilterOutput, q: np.ndarray) -> bool:
    full = np.array(out.torque, dtype=float)
    if filt.gravity_convention == 'driver_compensated':
        full = full + filt.dynamics.gravity_torque(q)
    return bool(np.all(np.abs(full) <= filt.torque_limit * (1 + 1e-12)))


def acceleration_of(filt: SafetyFilter, q: np.ndarray, v: np.ndarray,
                    torque_full: np.ndarray) -> np.ndarray:
    """``M^-1 (u - h)`` from the public Dynamics API."""
    return filt.dynamics.forward_dynamics(q, v, torque_full)


def mid_state(filt: SafetyFilter) -> tuple[np.ndarray, np.ndarray]:
    q = 0.5 * (filt.certificate.position_lower + filt.certificate.position_upper)
    return q, np.zeros(filt.n)


# ---------------------------------------------------------------------- construction
def test_mismatched_certificate_raises() -> None:
    """A certificate of another model (content hash differs) is refused (certificate.py's
    CertificateMismatch, METHOD 4: the certificate holds for one model only)."""
    _, certificate = demo_arm_and_certificate('reach7')
    with pytest.raises(CertificateMismatch):
        SafetyFilter(load_demo_arm('bench6'), certificate)
    model, certificate = demo_arm_and_certificate('planar2')
    with pytest.raises(CertificateMismatch):
        SafetyFilter(model, replace(certificate, model_hash='0' * 64))


def test_uncertified_certificate_raises() -> None:
    """The filter refuses a certificate whose checks did not pass."""
    model, certificate = demo_arm_and_certificate('planar2')
    with pytest.raises(CertificateError, match='not certified'):
        SafetyFilter(model, uncertified(certificate))


@pytest.mark.parametrize(('kwargs', 'match'), [
    ({'gravity_convention': 'half'}, 'gravity_convention'),
    ({'rejection_distance': -0.1}, 'rejection_distance'),
    ({'rejection_distance': math.nan}, 'rejection_distance'),
    ({'hold_damping': -1.0}, 'hold_damping'),
    ({'payload_mass': -1.0}, 'payload_mass'),
    ({'torque_weights': np.zeros(2)}, 'torque_weights'),
    ({'solver_time_limit_s': -1.0}, 'time_limit_s'),
])
def test_invalid_options_raise(kwargs: dict, match: str) -> None:
    """Configuration errors raise the package's error (STYLE: errors), naming the option."""
    with pytest.raises(SafetyFilterError, match=match):
        make_filter('planar2', **kwargs)


def test_defaults() -> None:
    """Documented defaults: payload at the middle of the certificate's range; hold damping
    M_ii(q_mid) / (20 T) from Dynamics' inertia."""
    filt = make_filter('bench6')
    low, high = filt.certificate.payload_mass_range
    assert filt.payload_mass == pytest.approx(0.5 * (low + high))
    q_mid, _ = mid_state(filt)
    mass = Dynamics(filt.model, filt.payload_mass).mass_matrix(q_mid)
    expected = np.diag(mass) * filt.certificate.control_rate_hz / 20.0
    np.testing.assert_allclose(filt.hold_damping, expected, rtol=1e-12)
    assert str(FilterMode.FALLBACK) == 'fallback'
    assert [m.value for m in FilterMode] == ['filtered', 'fallback', 'recovering', 'rejected']


# ---------------------------------------------------------------------- internals vs public API
@pytest.mark.parametrize('arm', ARMS)
def test_step_dynamics_and_barriers_match_public_api(arm: str) -> None:
    """The step's preallocated fast paths give the numbers of Dynamics.mass_and_bias, of
    numpy's linear solve for M^-1 (u - h) (the fast path uses Pinocchio's ABA) and of
    evaluate_barriers (METHOD 2), to rounding."""
    filt = make_filter(arm)
    rng = np.random.default_rng(21)
    for _ in range(10):
        q, v = random_state_in_safe_set(rng, filt.certificate)
        v = v + rng.normal(scale=0.3, size=filt.n)  # also outside S
        filt._evaluate_barriers(q, v)
        filt._dyn.mass_and_bias(q, v, filt._mass, filt._bias)
        mass, bias = filt.dynamics.mass_and_bias(q, v)
        np.testing.assert_allclose(filt._mass, mass, rtol=1e-12, atol=1e-14)
        np.testing.assert_allclose(filt._bias, bias, rtol=1e-12, atol=1e-12)
        torque = random_nominal(rng, filt.certificate)
        np.testing.assert_allclose(
            filt._dyn.nominal_acceleration(q, v, torque, filt._mass, filt._bias),
            np.linalg.solve(mass, torque - bias), rtol=1e-9,
            atol=1e-9 * np.abs(np.linalg.solve(mass, torque - bias)).max())
        state = filt.constraint_bounds(q, v)
        expected = [state.margin_upper, state.margin_lower, state.barrier_upper,
                    state.barrier_lower, state.accel_upper, state.accel_lower,
                    np.broadcast_to(state.speed_upper, (filt.n,)),
                    np.broadcast_to(state.speed_lower, (filt.n,))]
        np.testing.assert_allclose(filt._rows, expected, rtol=1e-12, atol=1e-12)
        out = filt.step(q, v, np.zeros(filt.n))
        np.testing.assert_allclose(out.barrier_margin, state.smallest, atol=1e-13)


def test_numpy_backend_gives_the_same_torques() -> None:
    """Filter on the numpy dynamics (no Pinocchio) gives the same outputs to 1e-7 of umax."""
    pytest.importorskip('pinocchio', reason='needs pin for the comparison')
    fast = make_filter('bench6', backend='pinocchio')
    slow = make_filter('bench6', backend='numpy')
    assert fast._dyn.accelerated and not slow._dyn.accelerated
    rng = np.random.default_rng(22)
    for _ in range(15):
        q, v = random_state_in_safe_set(rng, fast.certificate)
        nominal = random_nominal(rng, fast.certificate)
        a, b = fast.step(q, v, nominal), slow.step(q, v, nominal)
        assert a.mode == b.mode
        assert np.max(np.abs(a.torque - b.torque) / fast.torque_limit) <= 1e-7


# ---------------------------------------------------------------------- normal operation
def test_feasible_nominal_passes_unchanged() -> None:
    """A nominal that meets every constraint is the QP's minimiser (METHOD 3): it is sent
    as is, with zero intervention. Here: the torque that gives zero acceleration at rest
    mid-range (An < 0 < Ap there), i.e. h(q, 0) from Dynamics."""
    for arm in ARMS:
        filt = make_filter(arm)
        q, v = mid_state(filt)
        nominal = filt.dynamics.bias_torque(q, v)
        out = filt.step(q, v, nominal)
        assert out.mode is FilterMode.FILTERED and out.reason == ''
        np.testing.assert_array_equal(out.torque, nominal)
        assert out.intervention == 0.0
        assert not out.active_upper.any() and not out.active_lower.any()


@pytest.mark.parametrize('arm', ARMS)
def test_torque_always_in_box(arm: str) -> None:
    """Property loop (METHOD 3: output clipped to the box): over random states inside S,
    slightly and far outside S, and nominals up to 1000x the box, the full torque is inside
    the box and never NaN, in both gravity conventions."""
    rng = np.random.default_rng(23)
    for convention in ('full', 'driver_compensated'):
        filt = make_filter(arm, gravity_convention=convention)
        c = filt.certificate
        for k in range(150):
            q, v = random_state_in_safe_set(rng, c)
            if k % 3 == 1:  # outside S through the velocity
                v = v + rng.normal(scale=0.5, size=filt.n) * c.velocity_bound
            elif k % 3 == 2:  # positions beyond the limits (the farthest rejected)
                reach = 1.5 * filt.rejection_distance
                q = rng.uniform(c.position_lower - reach, c.position_upper + reach)
            out = filt.step(q, v, random_nominal(rng, c))
            assert np.all(np.isfinite(out.torque))
            assert full_torque_in_box(filt, out, q), (out.mode, out.reason)
        modes = filt.statistics()['modes']
        assert modes['filtered'] > 0 and modes['recovering'] > 0 and modes['rejected'] > 0


def test_filtered_answers_meet_the_bounds() -> None:
    """Every 'filtered' or 'fallback' step inside S yields an acceleration (recomputed from
    the torque with Dynamics.forward_dynamics) inside [An, Ap] (METHOD 3 constraint)."""
    filt = make_filter('reach7')
    rng = np.random.default_rng(24)
    for _ in range(60):
        q, v = random_state_in_safe_set(rng, filt.certificate)
        out = filt.step(q, v, random_nominal(rng, filt.certificate))
        assert out.mode in (FilterMode.FILTERED, FilterMode.FALLBACK)
        a = acceleration_of(filt, q, v, out.torque)
        bounds = filt.constraint_bounds(q, v)
        slack = 1e-6 * np.maximum(1.0, filt.usable_authority)
        assert np.all(a <= bounds.accel_upper + slack)
        assert np.all(a >= bounds.accel_lower - slack)
        assert out.active_upper.dtype == bool and out.active_upper.shape == (filt.n,)


def test_mean_accelerations_over_the_hold_meet_the_bounds() -> None:
    """With a certificate that bounds mean accelerations over a hold, every filtered step's
    mean acceleration over that hold, M_hold^-1 (u - h) (dynamics.hold_mass_matrix), is
    inside [An, Ap], and the torques differ from those of the start-of-hold form (the demo
    arm's damping is made strong for the test: 50 times its own)."""
    import yaml

    from safety_filter.core.dynamics import hold_mass_matrix
    from safety_filter.core.robot_model import RobotModel
    from safety_filter.simulation.demo_arms import demo_arm_files

    model, certificate = demo_arm_and_certificate('planar2')
    urdf, limits = demo_arm_files('planar2')
    spec = yaml.safe_load(open(limits, encoding='utf-8'))
    spec['joints'] = {name: {'viscous_friction': 50.0 * float(d)}
                      for name, d in zip(model.joint_names, model.viscous_friction)}
    damped = RobotModel.from_urdf(urdf, limits=spec)
    held_certificate = replace(certificate, acceleration_hold_s=0.002,
                               viscous_friction=damped.viscous_friction,
                               model_hash=damped.content_hash())
    held = SafetyFilter(damped, held_certificate, observer_time_constant_s=0.0)
    plain = SafetyFilter(damped, replace(held_certificate, acceleration_hold_s=None),
                         observer_time_constant_s=0.0)
    rng = np.random.default_rng(5)
    differ = 0
    for _ in range(40):
        q, v = random_state_in_safe_set(rng, certificate)
        u = random_nominal(rng, certificate)
        out = held.step(q, v, u)
        if out.mode is not FilterMode.FILTERED:
            continue
        mass, bias = held.dynamics.mass_and_bias(q, v)
        mean = np.linalg.solve(hold_mass_matrix(mass, damped.viscous_friction, 0.002),
                               out.torque - bias)
        bounds = held.constraint_bounds(q, v)
        slack = 1e-6 * np.maximum(1.0, held.usable_authority)
        assert np.all(mean <= bounds.accel_upper + slack)
        assert np.all(mean >= bounds.accel_lower - slack)
        differ += not np.allclose(out.torque, plain.step(q, v, u).torque, atol=1e-9)
    assert differ > 5


def test_outputs_are_fresh_arrays() -> None:
    """Outputs do not alias the filter's buffers or the caller's inputs: a caller may keep
    them across steps (and the filter does not mutate the inputs)."""
    filt = make_filter('bench6')
    rng = np.random.default_rng(25)
    q, v = random_state_in_safe_set(rng, filt.certificate)
    nominal = random_nominal(rng, filt.certificate)
    q0, v0, u0 = q.copy(), v.copy(), nominal.copy()
    first = filt.step(q, v, nominal)
    kept = first.torque.copy(), first.barrier_margin.copy(), first.active_upper.copy()
    for _ in range(3):
        q2, v2 = random_state_in_safe_set(rng, filt.certificate)
        filt.step(q2, v2, random_nominal(rng, filt.certificate))
    np.testing.assert_array_equal(first.torque, kept[0])
    np.testing.assert_array_equal(first.barrier_margin, kept[1])
    np.testing.assert_array_equal(first.active_upper, kept[2])
    np.testing.assert_array_equal(q, q0)
    np.testing.assert_array_equal(v, v0)
    np.testing.assert_array_equal(nominal, u0)


# ---------------------------------------------------------------------- gravity convention
@pytest.mark.parametrize('arm', ARMS)
def test_driver_compensated_convention(arm: str) -> None:
    """METHOD 1: with a driver that adds g(q), the nominal and the output are on top of
    gravity. 'driver_compensated' output + g(q) equals the 'full' output for the same
    full-torque nominal (g from Dynamics, i.e. Pinocchio's gravity)."""
    full = make_filter(arm, gravity_convention='full')
    driver = make_filter(arm, gravity_convention='driver_compensated')
    rng = np.random.default_rng(26)
    for k in range(30):
        q, v = random_state_in_safe_set(rng, full.certificate)
        if k % 4 == 3:
            v = v * 1.5 + 0.1  # outside S too
        nominal_full = random_nominal(rng, full.certificate)
        gravity = full.dynamics.gravity_torque(q)
        a = full.step(q, v, nominal_full)
        b = driver.step(q, v, nominal_full - gravity)
        assert a.mode == b.mode
        np.testing.assert_allclose(b.torque + gravity, a.torque,
                                   atol=1e-7 * full.torque_limit.max())
        assert b.intervention == pytest.approx(a.intervention, rel=1e-6, abs=1e-6)


# ---------------------------------------------------------------------- rejected input
def hold_torque(filt: SafetyFilter, q: np.ndarray, v: np.ndarray | None) -> np.ndarray:
    """The documented hold command g(q) - D v (finite entries of v), clipped; full torque."""
    gravity = Dynamics(filt.model, filt.payload_mass).gravity_torque(q)
    damping = np.zeros(filt.n)
    if v is not None:
        finite = np.isfinite(v)
        damping[finite] = -filt.hold_damping[finite] * v[finite]
    return np.clip(gravity + damping, -filt.torque_limit, filt.torque_limit)


BAD_INPUTS = {
    'nan in q': lambda q, v, u: (np.where(np.arange(len(q)) == 0, np.nan, q), v, u),
    'inf in v': lambda q, v, u: (q, np.full(len(v), np.inf), u),
    'nan in u': lambda q, v, u: (q, v, np.full(len(u), np.nan)),
    '-inf in u': lambda q, v, u: (q, v, -np.full(len(u), np.inf)),
    'short q': lambda q, v, u: (q[:-1], v, u),
    'long v': lambda q, v, u: (q, np.append(v, 0.0), u),
    'empty u': lambda q, v, u: (q, v, np.array([])),
    'empty all': lambda q, v, u: (np.array([]), np.array([]), np.array([])),
    '2-D q': lambda q, v, u: (q[None, :], v, u),
    'scalar v': lambda q, v, u: (q, 0.0, u),
    'None u': lambda q, v, u: (q, v, None),
    'text q': lambda q, v, u: ('abc', v, u),
    'ragged q': lambda q, v, u: ([1.0, [2.0, 3.0]], v, u),
    'absurd u': lambda q, v, u: (q, v, np.full(len(u), 1e200)),
}


def expected_hold(filt: SafetyFilter, bad: tuple, last_q: np.ndarray | None) -> np.ndarray:
    """The documented hold command for the inputs ``bad``: at the measured q if it is valid
    (shape, finite, within the rejection distance), else at the last valid q, else zeros."""
    try:
        q = np.asarray(bad[0], dtype=float)
    except (TypeError, ValueError):
        q = None
    if q is None or q.shape != (filt.n,) or not np.all(np.isfinite(q)):
        q = last_q
    if q is None:
        return np.zeros(filt.n)
    try:
        velocity = np.asarray(bad[1], dtype=float)
    except (TypeError, ValueError):
        velocity = None
    if velocity is not None and velocity.shape != (filt.n,):
        velocity = None
    return hold_torque(filt, q, velocity)


@pytest.mark.filterwarnings('ignore:overflow encountered')  # the 'absurd u' case
@pytest.mark.parametrize('case', sorted(BAD_INPUTS))
def test_bad_input_is_rejected_with_hold_command(case: str) -> None:
    """METHOD 5 (never pass an invalid command through): invalid input gives 'rejected',
    a reason, and the hold command: gravity (expected value from Dynamics) at the measured
    position if that is valid, else at the last valid one, else zero torque; plus damping
    of the finite velocities."""
    filt = make_filter('reach7')
    rng = np.random.default_rng(27)
    q, v = random_state_in_safe_set(rng, filt.certificate)
    u = random_nominal(rng, filt.certificate)
    bad = BAD_INPUTS[case](q, v, u)
    fresh = make_filter('reach7')
    out = fresh.step(*bad)
    assert out.mode is FilterMode.REJECTED and out.reason
    np.testing.assert_allclose(out.torque, expected_hold(filt, bad, None), rtol=1e-12,
                               atol=1e-12)
    assert out.solver_status == 'not run'

    filt.step(q, v, u)  # a valid step: q becomes the last valid position
    out = filt.step(*bad)
    assert out.mode is FilterMode.REJECTED and out.reason
    np.testing.assert_allclose(out.torque, expected_hold(filt, bad, q.copy()), rtol=1e-12,
                               atol=1e-12)
    assert np.all(np.abs(out.torque) <= filt.torque_limit)
    assert filt.statistics()['modes']['rejected'] == 1


def test_rejected_hold_in_driver_convention() -> None:
    """With 'driver_compensated', the hold command is sent as (g - D v) clipped, minus g;
    before any valid position it is zero (the driver's own gravity compensation)."""
    filt = make_filter('bench6', gravity_convention='driver_compensated')
    q, v = mid_state(filt)
    assert np.all(filt.step(q, v, np.full(filt.n, np.nan)).torque == 0.0)
    v = np.linspace(-0.2, 0.2, filt.n)
    filt.step(q, v, np.zeros(filt.n))
    out = filt.step(q, v, np.full(filt.n, np.nan))
    gravity = Dynamics(filt.model, filt.payload_mass).gravity_torque(q)
    np.testing.assert_allclose(out.torque + gravity, hold_torque(filt, q, v), atol=1e-12)


@pytest.mark.parametrize('side', ['upper', 'lower'])
def test_position_far_outside_limits_is_rejected(side: str) -> None:
    """A position more than rejection_distance beyond a limit is a sensor fault or a state
    the model cannot recover from: 'rejected', hold command at the measured q."""
    filt = make_filter('reach7', rejection_distance=0.2)
    q, v = mid_state(filt)
    j = 3
    c = filt.certificate
    q[j] = c.position_upper[j] + 0.25 if side == 'upper' else c.position_lower[j] - 0.25
    out = filt.step(q, v, np.zeros(filt.n))
    assert out.mode is FilterMode.REJECTED
    assert filt.model.joint_names[j] in out.reason
    np.testing.assert_allclose(out.torque, hold_torque(filt, q, v), rtol=1e-12)
    assert out.barrier_margin[j] == pytest.approx(-0.25)
    # within the rejection distance it is recovery, not rejection
    q[j] = c.position_upper[j] + 0.1 if side == 'upper' else c.position_lower[j] - 0.1
    assert filt.step(q, v, np.zeros(filt.n)).mode is FilterMode.RECOVERING


# ---------------------------------------------------------------------- outside S
@pytest.mark.parametrize('arm', ARMS)
@pytest.mark.parametrize('side', ['upper', 'lower'])
def test_recovering_pushes_back(arm: str, side: str) -> None:
    """METHOD 5 (leaving S): a joint moving outward faster than its barrier allows, with a
    nominal pushing further out at full torque, gets 'recovering' and an acceleration
    (recomputed with Dynamics.forward_dynamics) that points back toward S, within the box."""
    filt = make_filter(arm)
    c = filt.certificate
    rng = np.random.default_rng(28)
    for j in range(filt.n):
        q, _ = random_state_in_safe_set(rng, c)
        q = np.clip(q, c.position_lower + 0.2 * filt.model.position_range,
                    c.position_upper - 0.2 * filt.model.position_range)
        low, high = velocity_interval(c, q)
        v = 0.5 * (low + high)
        sign = 1.0 if side == 'upper' else -1.0
        v[j] = (high[j] if side == 'upper' else low[j]) + sign * 0.05 * c.velocity_bound[j]
        nominal = np.zeros(filt.n)
        nominal[j] = sign * filt.torque_limit[j]
        out = filt.step(q, v, nominal)
        assert out.mode is FilterMode.RECOVERING, (j, out.mode, out.reason)
        assert filt.model.joint_names[j] in out.reason
        assert out.barrier_margin[j] < 0
        assert full_torque_in_box(filt, out, q)
        a = acceleration_of(filt, q, v, out.torque)
        assert sign * a[j] < 0, (arm, side, j, a[j])


def test_recovering_beyond_position_limit() -> None:
    """Slightly beyond a position limit at rest: the recovery accelerates back inside."""
    filt = make_filter('planar2')
    c = filt.certificate
    q, v = mid_state(filt)
    q[1] = c.position_upper[1] + 0.05
    out = filt.step(q, v, filt.torque_limit.copy())  # nominal pushes outward
    assert out.mode is FilterMode.RECOVERING
    assert acceleration_of(filt, q, v, out.torque)[1] < 0
    q[1] = c.position_lower[1] - 0.05
    out = filt.step(q, v, -filt.torque_limit)
    assert out.mode is FilterMode.RECOVERING
    assert acceleration_of(filt, q, v, out.torque)[1] > 0


def test_constructive_acceleration_cases() -> None:
    """METHOD 4.4 by hand: clamp into [max(An, -e), min(Ap, e)]; an empty interval takes
    the end that pushes back, within the authority."""
    e = np.array([1.0, 1.0, 1.0, 1.0])
    lower = np.array([-0.5, -2.0, 3.0, -5.0])
    upper = np.array([0.5, 2.0, 4.0, -3.0])
    nominal = np.array([2.0, -3.0, 0.0, 0.0])
    worse = np.array([False, False, False, True])
    a = constructive_acceleration(nominal, lower, upper, e, worse)
    np.testing.assert_array_equal(a, [0.5, -1.0, 1.0, -1.0])


# ---------------------------------------------------------------------- solver failure
def test_fallback_when_solver_reports_failure(monkeypatch: pytest.MonkeyPatch) -> None:
    """METHOD 4.4: a failed solve (status patched in) uses the constructive fallback, which
    is feasible by construction: torque in the box, acceleration in [An, Ap] and within the
    usable authority; the reason names the status; the counters record it."""
    filt = make_filter('reach7')

    def failing(*args, **kwargs):
        return QPResult(np.full(filt.n, np.nan), 'maximum iterations reached', 7, 1000, 1e-4)

    monkeypatch.setattr(filt._qp, 'solve', failing)
    rng = np.random.default_rng(29)
    for _ in range(30):
        q, v = random_state_in_safe_set(rng, filt.certificate)
        nominal = 1000.0 * rng.uniform(-filt.torque_limit, filt.torque_limit)
        out = filt.step(q, v, nominal)
        assert out.mode is FilterMode.FALLBACK
        assert 'maximum iterations' in out.reason
        assert full_torque_in_box(filt, out, q)
        a = acceleration_of(filt, q, v, out.torque)
        bounds = filt.constraint_bounds(q, v)
        slack = 1e-9 * np.maximum(1.0, filt.usable_authority)
        assert np.all(a <= bounds.accel_upper + slack)
        assert np.all(a >= bounds.accel_lower - slack)
        assert np.all(np.abs(a) <= filt.usable_authority + slack)
    stats = filt.statistics()
    assert stats['modes']['fallback'] == 30
    assert stats['reasons'] == {'solver status: maximum iterations reached': 30}
    filt.reset()
    assert filt.statistics() == {'steps': 0, 'slow_steps': 0,
                                 'modes': {m.value: 0 for m in FilterMode}, 'reasons': {}}


def test_recovery_without_the_qp_pushes_back_as_hard_as_the_box_allows(
        monkeypatch: pytest.MonkeyPatch) -> None:
    """Outside S with the QP failing (status patched in): the command moves from the
    constructive push-back (within the certified authority) toward what the barriers' bounds
    ask, as far as the torque box allows: never weaker than the constructive one on the
    joint that left S, always inside the box, and all the way where the box allows."""
    filt = make_filter('reach7')

    def failing(*args, **kwargs):
        return QPResult(np.full(filt.n, np.nan), 'maximum iterations reached', 7, 1000, 1e-4)

    monkeypatch.setattr(filt._qp, 'solve', failing)
    rng = np.random.default_rng(31)
    stronger = 0
    for _ in range(40):
        q, v = random_state_in_safe_set(rng, filt.certificate)
        i = int(rng.integers(filt.n))
        low, high = filt.certificate.safe_velocity_interval(q)
        v[i] = high[i] + rng.uniform(0.05, 1.0) * filt.certificate.velocity_limit[i]
        out = filt.step(q, v, np.zeros(filt.n))
        filt.reset()
        assert out.mode is FilterMode.RECOVERING
        assert full_torque_in_box(filt, out, q)
        a = acceleration_of(filt, q, v, out.torque)
        bounds = filt.constraint_bounds(q, v)
        authority = filt.usable_authority[i]
        tolerance = 1e-6 * (1.0 + abs(a[i]))
        # The joint pushed past its upper velocity edge decelerates at least as hard as the
        # constructive push-back (its bound, or the authority where that asks for more).
        assert a[i] <= max(bounds.accel_upper[i], -authority) + tolerance
        stronger += int(a[i] < -authority - tolerance)
    assert stronger > 10  # the box allowed more than the authority on many of them


def test_fallback_when_answer_fails_the_check(monkeypatch: pytest.MonkeyPatch) -> None:
    """A 'solved' answer that violates a bound is not used (METHOD 3: the answer is
    checked): 'fallback' with the check's reason."""
    filt = make_filter('bench6')
    q, v = mid_state(filt)
    bounds = filt.constraint_bounds(q, v)
    wrong = np.array(bounds.accel_upper) + 1.0
    monkeypatch.setattr(filt._qp, 'solve',
                        lambda *a, **k: QPResult(wrong.copy(), 'solved', 1, 10, 1e-5))
    out = filt.step(q, v, 1000.0 * filt.torque_limit)
    assert out.mode is FilterMode.FALLBACK
    assert 'check' in out.reason
    assert full_torque_in_box(filt, out, q)


@pytest.mark.parametrize('kwargs', [{'solver_max_iter': 1}, {'solver_time_limit_s': 1e-9}])
def test_fallback_with_real_solver_failure(kwargs: dict) -> None:
    """The real OSQP made to fail (one iteration; a 1 ns time limit): fallback, feasible."""
    filt = make_filter('reach7', **kwargs)
    rng = np.random.default_rng(30)
    fallbacks = 0
    for _ in range(10):
        q, v = random_state_in_safe_set(rng, filt.certificate)
        out = filt.step(q, v, 1000.0 * rng.uniform(-filt.torque_limit, filt.torque_limit))
        assert out.mode in (FilterMode.FALLBACK, FilterMode.FILTERED)
        fallbacks += out.mode is FilterMode.FALLBACK
        assert full_torque_in_box(filt, out, q)
        a = acceleration_of(filt, q, v, out.torque)
        bounds = filt.constraint_bounds(q, v)
        slack = 1e-6 * np.maximum(1.0, filt.usable_authority)
        assert np.all(a <= bounds.accel_upper + slack)
        assert np.all(a >= bounds.accel_lower - slack)
    assert fallbacks == 10


def test_generic_alpha_families() -> None:
    """A certificate with atan alpha1 (a non-linear family in the step's barrier kernel)
    filters, keeps the box and agrees with constraint_bounds (evaluate_barriers)."""
    model, certificate = demo_arm_and_certificate('planar2', 'atan')
    filt = SafetyFilter(model, certificate, observer_time_constant_s=0.0)  # random states
    assert filt.certificate.alpha1.kind == 'atan'
    rng = np.random.default_rng(31)
    for _ in range(20):
        q, v = random_state_in_safe_set(rng, certificate)
        out = filt.step(q, v, random_nominal(rng, certificate))
        assert out.mode is FilterMode.FILTERED
        assert full_torque_in_box(filt, out, q)
        np.testing.assert_allclose(out.barrier_margin,
                                   filt.constraint_bounds(q, v).smallest, atol=1e-13)


# ---------------------------------------------------------------------- closed loop
@pytest.mark.parametrize('arm', ['planar2', 'reach7'])
def test_closed_loop_keeps_the_position_limits(arm: str) -> None:
    """End to end (METHOD 2: S is invariant, so the position limits hold): the filter at its
    certified rate on the model (Dynamics, semi-implicit Euler with 4 substeps per held
    torque), started next to the limits and moving toward them with a nominal that pushes
    outward at 3x the torque limit. The limits hold (to 1e-3 of the range: the sampled
    loop may slip slightly outside S, METHOD 5.1) and the filter mostly solves its QP."""
    filt = make_filter(arm)
    c = filt.certificate
    plant = Dynamics(filt.model, filt.payload_mass)
    period = 1.0 / c.control_rate_hz
    sign = np.where(np.arange(filt.n) % 2 == 0, 1.0, -1.0)
    q = np.where(sign > 0, c.position_upper - 0.02, c.position_lower + 0.02)
    v = sign * c.gamma * 0.02 * 0.99  # just inside S, 0.02 from the limit, heading for it
    nominal = 3.0 * sign * filt.torque_limit
    worst = -np.inf
    for _ in range(600):
        out = filt.step(q, v, nominal)
        assert full_torque_in_box(filt, out, q)
        for _ in range(4):
            v = v + plant.forward_dynamics(q, v, out.torque) * period / 4
            q = q + v * period / 4
        beyond = np.maximum(q - c.position_upper, c.position_lower - q)
        worst = max(worst, float(np.max(beyond / filt.model.position_range)))
    assert worst <= 1e-3, worst
    modes = filt.statistics()['modes']
    assert modes['filtered'] >= 0.95 * filt.steps, modes
    assert modes['rejected'] == 0


def test_no_compilation_at_the_first_steps() -> None:
    """The constructor runs every branch once, so stepping compiles nothing new, whatever
    the input arrays' layout or write flag (a compilation takes seconds: in the control
    loop it would miss deadlines)."""
    from safety_filter.online import kernels as _kernels

    filt = make_filter('reach7')
    kernels = [getattr(_kernels, name) for name in dir(_kernels)
               if hasattr(getattr(_kernels, name), 'signatures')]
    before = {kernel: len(kernel.signatures) for kernel in kernels}
    rng = np.random.default_rng(40)
    q, v = random_state_in_safe_set(rng, filt.certificate)
    frozen = np.array(q)
    frozen.flags.writeable = False
    strided = np.repeat(v, 2)[::2]  # a non-contiguous view
    outputs = [filt.step(q, v, 50.0 * filt.torque_limit),
               filt.step(frozen, strided, list(50.0 * filt.torque_limit)),
               filt.step(q + 1.0, v, np.zeros(filt.n)),
               filt.step(q, v, np.zeros(filt.n))]
    assert {kernel: len(kernel.signatures) for kernel in kernels} == before
    np.testing.assert_array_equal(outputs[0].torque, outputs[1].torque)
    assert filt.statistics()['steps'] == 4  # the warm-up steps are not counted
    # The normalisation keeps shapes: a scalar stays a scalar (and is then rejected).
    from safety_filter.online.step_dynamics import kernel_input
    assert kernel_input(5.0).shape == ()
    assert filt.step(q, v, 5.0).mode is FilterMode.REJECTED
