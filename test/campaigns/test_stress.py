"""The stress test: the plant loop, the SafeTracking nominal, the verdict rules, the command.

References: the loop without imperfections is checked against :func:`run_closed_loop` (the
closed loop the closed-loop tests check against SciPy's ``solve_ivp``); the delay, noise and
driver checks against the definitions of a FIFO, a uniform bound and a saturating driver
written out in the test; the push against the same plant driven by the push as part of the
drive torque (a push is a torque added to the equation of motion, Featherstone's
``M a + h = tau``); SafeTracking against the error dynamics of computed-torque control on an
exact model (Spong, Hutchinson and Vidyasagar, *Robot Modeling and Control*, computed torque:
``e'' + kd e' + kp e = 0``, so the error stays near zero from a zero initial error).
"""

from __future__ import annotations

import json

import numpy as np
import pytest
from certify_fixtures import demo_certificate

from safety_filter.campaigns import stress_runs
from safety_filter.campaigns.stress_matrix import NOMINALS
from safety_filter.campaigns.stress_verdict import (
    VerdictRules,
    recovery_times,
    return_time_bounds,
    run_failures,
    summarize_run,
)
from safety_filter.cli.main import SAFETY_NOTICE, main
from safety_filter.core.model_uncertainty import Plant, nominal_plant
from safety_filter.errors import ExitCode
from safety_filter.online.barrier_filter import SafetyFilter
from safety_filter.simulation.command_sources import (
    LargeSinusoid,
    PDBeyondLimits,
    SafeTracking,
    ZeroTorque,
)
from safety_filter.simulation.plant import (
    PlantLog,
    Push,
    limit_violations,
    run_closed_loop,
    run_plant_loop,
)

RATE_HZ = 1000.0


@pytest.fixture(scope='module')
def planar2():  # noqa: ANN201
    return demo_certificate('planar2')


def _plant(model, payload: float, **changes) -> Plant:  # noqa: ANN001
    base = nominal_plant(model, payload)
    values = {'model': base.model, 'payload_mass': base.payload_mass,
              'torque_gain': base.torque_gain, 'torque_offset': base.torque_offset,
              'position_noise': 0.0, 'velocity_noise': 0.0, 'delay_periods': 0}
    values.update(changes)
    return Plant(**values)


def _mid(model) -> np.ndarray:  # noqa: ANN001
    return 0.5 * (np.array(model.position_lower) + np.array(model.position_upper))


# ---------------------------------------------------------------------- the loop
def test_exact_plant_reproduces_run_closed_loop(planar2) -> None:
    """Nominal plant, no noise, no delay, no torque error: the same torques and states as
    simulate.run_closed_loop, to the last bit."""
    model, certificate = planar2
    payload = model.payload.mass_max
    q0 = _mid(model) + np.array([1.5, -1.2])
    logs = []
    for runner in ('closed_loop', 'plant_loop'):
        filt = SafetyFilter(model, certificate, payload_mass=payload)
        nominal = PDBeyondLimits(model, period_s=0.25, gravity=filt.dynamics.gravity_torque)
        if runner == 'closed_loop':
            logs.append(run_closed_loop(model, filt.step, nominal, 0.6, RATE_HZ, q0,
                                        payload_mass=payload))
        else:
            logs.append(run_plant_loop(nominal_plant(model, payload), filt.step, nominal, 0.6,
                                       RATE_HZ, q0))
    reference, ours = logs
    assert np.array_equal(ours.command, reference.torque)
    assert np.array_equal(ours.applied, reference.torque)
    assert np.array_equal(ours.q, reference.q) and np.array_equal(ours.v, reference.v)
    assert list(ours.mode) == list(reference.mode)
    assert np.any(ours.mode != 'filtered') or np.any(ours.command != ours.nominal)  # it acted


@pytest.mark.parametrize('delay', [1, 3])
def test_delay_shifts_the_applied_torque_by_whole_periods(planar2, delay: int) -> None:
    model, _ = planar2
    plant = _plant(model, 0.0, delay_periods=delay)
    nominal = LargeSinusoid(model, scale=0.3, frequency_hz=3.0)  # inside the box: no clipping
    log = run_plant_loop(plant, None, nominal, 0.2, RATE_HZ, _mid(model))
    assert np.array_equal(log.applied[delay:], log.command[:-delay])
    # Before the first command arrives the driver holds the first one (documented).
    assert np.array_equal(log.applied[:delay], np.repeat(log.command[:1], delay, axis=0))
    assert not np.array_equal(log.applied, log.command)


def test_noise_stays_within_its_bounds_and_is_there(planar2) -> None:
    model, _ = planar2
    plant = _plant(model, 0.0, position_noise=1e-3, velocity_noise=0.05)
    log = run_plant_loop(plant, None, ZeroTorque(model), 0.5, RATE_HZ, _mid(model),
                         rng=np.random.default_rng(3))
    position_error = np.abs(log.measured_q - log.q)
    velocity_error = np.abs(log.measured_v - log.v)
    assert position_error.max() <= 1e-3 and velocity_error.max() <= 0.05
    # Uniform on [-b, b]: 500 x 2 samples reach past 0.95 b and spread with std b / sqrt(3).
    assert position_error.max() > 0.95e-3 and velocity_error.max() > 0.95 * 0.05
    assert abs(np.std(log.measured_v - log.v) - 0.05 / np.sqrt(3)) < 0.005


def test_driver_applies_gain_and_offset_then_saturates(planar2) -> None:
    model, _ = planar2
    umax = np.array(model.effort_limit)
    command = np.array([0.9, 0.3]) * umax
    gain, offset = np.array([1.2, 0.9]), np.array([0.05, -0.02]) * umax
    plant = _plant(model, 0.0, torque_gain=gain, torque_offset=offset)
    log = run_plant_loop(plant, None, lambda t, q, v: command, 0.05, RATE_HZ, _mid(model))
    assert np.allclose(log.demand, 1.2 * 0.9 * umax * np.array([1, 0]) + np.array(
        [0.05 * umax[0], (0.9 * 0.3 - 0.02) * umax[1]]), rtol=1e-12, atol=0.0)
    assert np.all(log.applied[:, 0] == umax[0])  # 1.13 umax demanded: saturated
    assert np.allclose(log.applied[:, 1], (0.9 * 0.3 - 0.02) * umax[1], rtol=1e-12)


def test_a_push_is_an_external_torque_on_the_plant(planar2) -> None:
    """A push acts like the same torque added to the drive (here nothing saturates), and
    leaves the motion before it untouched."""
    model, _ = planar2
    umax = np.array(model.effort_limit)
    payload = 0.25
    # Gravity compensation of the plant's own model holds the arm: only the push moves it.
    holding = SafeTracking(model, payload).dynamics.gravity_torque
    push = Push(0.1, 0.02, np.array([0.2, -0.15]) * umax)
    plant = _plant(model, payload)
    q0 = _mid(model)
    pushed = run_plant_loop(plant, None, lambda t, q, v: holding(q), 0.3, RATE_HZ, q0,
                            pushes=[push])
    quiet = run_plant_loop(plant, None, lambda t, q, v: holding(q), 0.3, RATE_HZ, q0)

    def with_push(t: float, q: np.ndarray, v: np.ndarray) -> np.ndarray:
        return holding(q) + (push.torque if 0.1 - 1e-9 <= t < 0.12 - 1e-9 else 0.0)

    as_drive = run_plant_loop(plant, None, with_push, 0.3, RATE_HZ, q0)
    active = (pushed.time_s >= 0.1 - 1e-9) & (pushed.time_s < 0.12 - 1e-9)
    assert np.count_nonzero(active) == 20
    assert np.array_equal(pushed.external[active], np.repeat(push.torque[None], 20, axis=0))
    assert np.all(pushed.external[~active] == 0.0)
    before = pushed.time_s <= 0.1 + 1e-9
    assert np.array_equal(pushed.q[before], quiet.q[before])
    assert np.max(np.abs(pushed.q[-1] - quiet.q[-1])) > 0.05  # the push moved the arm
    assert np.allclose(pushed.q, as_drive.q, rtol=0.0, atol=1e-12)
    assert np.allclose(pushed.v, as_drive.v, rtol=0.0, atol=1e-10)


def test_pushes_change_a_filtered_motion_and_recovery_is_measured(planar2) -> None:
    model, certificate = planar2
    filt = SafetyFilter(model, certificate)
    tracking = SafeTracking(model, filt.payload_mass, seed=1)
    q0, v0, _ = tracking.reference(0.0)
    umax = np.array(model.effort_limit)
    pushes = [Push(0.2, 0.02, 0.4 * umax), Push(0.6, 0.02, -0.4 * umax)]
    plant = nominal_plant(model, filt.payload_mass)

    def barrier(q: np.ndarray, v: np.ndarray) -> np.ndarray:
        return filt.constraint_bounds(q, v).smallest

    runs = []
    for these in ([], pushes):
        filt.reset()
        runs.append(run_plant_loop(plant, filt.step, tracking, 1.0, RATE_HZ, q0, 0.5 * v0,
                                   pushes=these, barrier=barrier))
    quiet, pushed = runs
    before = pushed.time_s < 0.2 - 1e-9
    assert np.array_equal(pushed.q[before], quiet.q[before])
    assert np.max(np.abs(pushed.q - quiet.q)) > 0.01  # the tracking pulls it back after
    assert np.max(np.abs(pushed.v - quiet.v)) > 0.5
    summary = summarize_run(pushed, model, 1.0 / RATE_HZ, pushes)
    assert len(summary['recovery_s']) == 2
    assert all(t is not None and 0.0 <= t < 0.38 for t in summary['recovery_s'])
    assert summary['push_velocity_excursion'] >= 0.0
    assert set(summary['modes']) <= {'filtered', 'fallback', 'recovering', 'rejected'}
    assert abs(sum(summary['modes'].values()) - 1.0) < 1e-12


def test_recovery_times_on_a_hand_made_log() -> None:
    """Steps of 0.1 s; push 1 at 0.2-0.3 s, push 2 at 0.6-0.7 s; outside S at 0.3 and 0.4 s
    (back in at 0.5 s: 0.2 s after push 1's end), in S when push 2 ends (0.0) though the
    state leaves S again from 0.8 s (a later excursion, not the push's); a push that ends
    outside S and never comes back gets None; a tolerance counts small negatives as in."""
    time_s = np.arange(10) * 0.1
    margin = np.ones((10, 2))
    margin[[3, 4], 1] = -0.5
    margin[8:, 0] = -0.1
    log = PlantLog(time_s, *[np.zeros((10, 2))] * 9, np.array(['filtered'] * 10),
                          margin)
    pushes = [Push(0.2, 0.1, np.zeros(2)), Push(0.6, 0.1, np.zeros(2))]
    result = recovery_times(log, pushes, 0.1)
    assert result[0] == pytest.approx(0.2) and result[1] == 0.0
    assert recovery_times(log, [Push(0.7, 0.1, np.zeros(2))], 0.1)[0] is None
    assert recovery_times(log, [Push(0.7, 0.1, np.zeros(2))], 0.1, tolerance=0.2)[0] == 0.0
    log.margin = np.ones((10, 2))
    assert recovery_times(log, pushes, 0.1) == [0.0, 0.0]


def test_return_time_bounds_on_a_hand_made_log(planar2) -> None:
    """The allowed time of a push is the largest, over the steps from its end until the state
    is back, of the step's time after the push plus Certificate.recovery_time there, plus
    the delay and one period, from the step the speeds are within the certified domain for
    good; None where the state stayed in S, a step is past a limit or beyond the braking set
    (no time stated), or the speeds are not back within the domain."""
    model, certificate = planar2
    steps, period = 6, 0.01
    q = np.tile(_mid(model), (steps, 1))
    q[:, 1] = model.position_upper[1] - 0.3
    _, high = certificate.safe_velocity_interval(q[0])
    v = np.zeros((steps, 2))
    v[:, 1] = high[1] + np.array([0.08, 0.06, 0.04, 0.02, 0.0, -0.02])  # back in S at step 4
    log = PlantLog(np.arange(steps) * period, q, v, *[np.zeros((steps, 2))] * 7,
                          np.array(['recovering'] * steps), np.ones((steps, 2)))
    push = Push(0.0, 0.0, np.zeros(2))
    needed = np.max(certificate.recovery_time(q[:4], v[:4]), axis=1)
    assert np.all(np.isfinite(needed)) and needed[0] > 0.0
    expected = float(np.max(np.arange(4) * period + needed)) + 0.002 + period
    found = return_time_bounds(log, [push], certificate, [4 * period], period, 0.002)
    assert found[0] == pytest.approx(expected)
    assert return_time_bounds(log, [push], certificate, [0.0], period, 0.0) == [None]
    fast = PlantLog(log.time_s, q.copy(), v.copy(), *[np.zeros((steps, 2))] * 7,
                           log.mode, log.margin)
    fast.v[0, 0] = 1.1 * certificate.velocity_bound[0]  # beyond the certified domain
    later = float(np.max(np.arange(1, 4) * period + needed[1:])) + period
    assert return_time_bounds(fast, [push], certificate, [4 * period], period,
                                     0.0) == [pytest.approx(later)]
    fast.v[4, 0] = fast.v[0, 0]  # not back within the domain when back in S
    assert return_time_bounds(fast, [push], certificate, [4 * period], period,
                                     0.0) == [None]
    # speeds just beyond the box (mid-range, where the box binds the elbow): the domain
    # allows the velocity tolerance of "back in S"
    boxed = PlantLog(log.time_s[:4], np.tile(_mid(model), (4, 1)), np.zeros((4, 2)),
                            *[np.zeros((4, 2))] * 7, log.mode[:4], log.margin[:4])
    boxed.v[:, 1] = certificate.velocity_bound[1] + np.array([0.02, 0.015, 0.008, 0.004])
    assert return_time_bounds(boxed, [push], certificate, [3 * period], period,
                                     0.0) == [None]
    needed = np.max(certificate.recovery_time(boxed.q[2:], boxed.v[2:]), axis=1)
    assert np.all(np.isfinite(needed))
    within = float(np.max(np.arange(2, 4) * period + needed)) + period
    assert return_time_bounds(boxed, [push], certificate, [3 * period], period,
                                     0.0, tolerance=0.01) == [pytest.approx(within)]
    beyond = PlantLog(log.time_s, q.copy(), v.copy(), *[np.zeros((steps, 2))] * 7,
                             log.mode, log.margin)
    beyond.q[2, 1] = model.position_upper[1] - 1e-4  # far too fast to stop there
    assert return_time_bounds(beyond, [push], certificate, [4 * period], period,
                                     0.0) == [None]


def test_verdict_rules() -> None:
    base = {'position_excursion': 0.0, 'velocity_excursion': 0.004, 'command_excess': 0.0,
            'applied_excess': 0.0, 'recovery_s': [0.05, 0.2]}
    effort = np.array([10.0, 5.0])
    assert run_failures(base, VerdictRules(velocity_allowance=0.01), effort) == []
    strict = VerdictRules(velocity_allowance=0.001, recovery_time_s=0.1)
    reasons = run_failures(base, strict, effort)
    assert len(reasons) == 2 and 'velocity' in reasons[0] and 'push 2' in reasons[1]
    broken = dict(base, position_excursion=1e-3, command_excess=0.1, recovery_s=[None])
    reasons = run_failures(broken, VerdictRules(velocity_allowance=0.01,
                                                recovery_time_s=1.0), effort)
    assert [r.split()[0] for r in reasons] == ['position', 'torque', 'push']


# ---------------------------------------------------------------------- SafeTracking
@pytest.mark.parametrize('arm', ['planar2', 'bench6'])
def test_safe_tracking_tracks_its_reference_and_keeps_every_limit(arm: str) -> None:
    from safety_filter.simulation.demo_arms import load_demo_arm

    model = load_demo_arm(arm)
    payload = 0.5 * (model.payload.mass_min + model.payload.mass_max)
    tracking = SafeTracking(model, payload, speed_fraction=0.5, seed=4)
    lower, upper = np.array(model.position_lower), np.array(model.position_upper)
    span = upper - lower
    grid = np.linspace(0.0, 40.0, 40001)
    reference = np.array([tracking.reference(t)[:2] for t in grid])
    assert np.all(reference[:, 0] >= lower + 0.1 * span - 1e-12)
    assert np.all(reference[:, 0] <= upper - 0.1 * span + 1e-12)
    peak = np.max(np.abs(reference[:, 1]), axis=0) / np.array(model.velocity_limit)
    assert np.allclose(peak, 0.5, rtol=1e-3)
    q0, v0, _ = tracking.reference(0.0)
    log = run_closed_loop(model, None, tracking, 3.0, RATE_HZ, q0, v0, payload_mass=payload)
    desired = np.array([tracking.reference(t)[0] for t in log.time_s])
    assert np.max(np.abs(log.q - desired)) < 2e-3
    kept = limit_violations(model, log.q, log.v, log.torque)
    assert all(np.all(values == 0.0) for values in kept.values())
    assert np.all(np.abs(log.torque) < np.array(model.effort_limit))


# ---------------------------------------------------------------------- drift near a limit
def test_a_drifting_model_error_near_a_limit_keeps_the_limit() -> None:
    """bench6 with the default certificate, stress seed 1: the plant without its payload
    (the filter assumes the middle of the range), zero torque, 1 kHz. The shoulder swings
    while the elbow is braked toward its upper limit, and the torque the model misses on the
    elbow drifts with the configuration; the observer's estimate trails it by its time
    constant. Without the bounds narrowed by that lag (docs/method.md, "Drift") the elbow
    passed its limit by 7.9e-5 rad after 0.84 s outside S; with them it keeps it and
    leaves S for 0.35 s."""
    from safety_filter.campaigns.stress_matrix import StressSettings
    from safety_filter.campaigns.stress_runs import StressContext

    model, certificate = demo_certificate('bench6')
    context = StressContext(model, certificate, model.uncertainty, StressSettings(seed=1))
    spec = context.specs[15]
    summary, _, _ = context.run(spec)
    assert (summary['plant'], summary['nominal'], summary['rate_hz']) == (
        'payload_min', 'zero_torque', 1000.0)
    assert summary['passed'], summary['failures']
    assert summary['position_excursion'] == 0.0
    assert summary['time_outside_s'] < 0.5


# ---------------------------------------------------------------------- the command
def _run_cli(argv: list[str], capsys) -> tuple[int, str, str]:  # noqa: ANN001
    code = main(argv)
    captured = capsys.readouterr()
    return code, captured.out, captured.err


@pytest.mark.slow
def test_cli_end_to_end_on_planar2(tmp_path, capsys, planar2, demo_certificate_files) -> None:
    model, certificate = planar2
    path = demo_certificate_files.path('planar2')
    out = tmp_path / 'stress'
    code, stdout, stderr = _run_cli(
        ['stress', '--demo', 'planar2', '--certificate', str(path), '--duration', '0.4',
         '--plants', '1', '--jobs', '2', '--seed', '3', '--output-dir', str(out), '--no-progress'],
        capsys)
    summary = json.loads((out / 'stress_summary.json').read_text(encoding='utf-8'))
    assert code == (ExitCode.OK if summary['passed'] else ExitCode.STRESS_FAILED)
    assert len(summary['runs']) == 7 * len(NOMINALS)  # 6 fixed plants + 1 random
    assert {r['nominal'] for r in summary['runs']} == set(NOMINALS)
    assert summary['certificate']['id'] == certificate.certificate_id
    for name in ('stress_report.html', 'positions.png', 'velocities.png', 'torques.png',
                 'margin.png'):
        assert (out / name).is_file(), name
    page = (out / 'stress_report.html').read_text(encoding='utf-8')
    assert 'not a certified safety function' in page
    assert SAFETY_NOTICE in stderr
    assert 'verdict: ' in stdout and 'exact' in stdout and 'pushes' in stdout
    assert len([line for line in stdout.splitlines() if ' 1000 ' in line]) == 42
    for word in ('issue', 'target'):
        assert word not in (stdout + stderr).lower()
    # The worst run comes first, and the re-run that drew the plots is that run.
    assert summary['worst_run'] == summary['runs'][0]['index']


def test_cli_failed_verdict_exits_5(tmp_path, capsys, monkeypatch,
                                    demo_certificate_files) -> None:
    path = demo_certificate_files.path('planar2')
    monkeypatch.setattr(stress_runs, 'run_failures', lambda *args: ['made to fail'])
    code, stdout, _ = _run_cli(
        ['stress', '--demo', 'planar2', '--certificate', str(path), '--duration', '0.05',
         '--plants', '0', '--jobs', '1', '--output-dir', str(tmp_path / 'o'), '--quiet',
         '--no-plots'], capsys)
    assert code == ExitCode.STRESS_FAILED == 5
    assert stdout.splitlines()[0].startswith('verdict: FAIL (36 of 36 runs')


@pytest.mark.slow
def test_cli_demo_arm_without_certificate_certifies_then_reuses(tmp_path, capsys) -> None:
    out = tmp_path / 'stress'
    argv = ['stress', '--demo', 'planar2', '--duration', '0.05', '--plants', '0', '--jobs',
            '1', '--output-dir', str(out), '--no-plots', '--quiet']
    code, stdout, _ = _run_cli(argv, capsys)
    assert code in (ExitCode.OK, ExitCode.STRESS_FAILED)
    assert (out / 'planar2_certificate.yaml').is_file()
    summary = json.loads((out / 'stress_summary.json').read_text(encoding='utf-8'))
    assert 'certified now, 20000 falsifier states' in summary['certificate']['source']
    _run_cli(argv, capsys)
    summary = json.loads((out / 'stress_summary.json').read_text(encoding='utf-8'))
    assert 'reused' in summary['certificate']['source']


@pytest.mark.parametrize('options, message', [
    (['--certificate', 'no_such_file.yaml'], 'certificate file not found'),
    (['--urdf', 'arm.urdf'], "--certificate with --urdf: 'missing'"),
    (['--duration', '-1'], '--duration: -1.0 (expected > 0)'),
    (['--jobs', '0'], '--jobs: 0 (expected >= 1)'),
    (['--plants', '-2'], '--plants: -2 (expected >= 0)'),
])
def test_bad_input_exits_2_with_a_clear_message(tmp_path, capsys, options, message) -> None:
    code, _, stderr = _run_cli(['stress', '--demo', 'planar2', '--output-dir', str(tmp_path),
                                *options]
                               if '--urdf' not in options else
                               ['stress', '--output-dir', str(tmp_path), *options], capsys)
    assert code == ExitCode.BAD_INPUT == 2
    assert message in stderr


def test_tip_force_torque_matches_the_planar_jacobian() -> None:
    """J(q)^T F of a force on planar2's tool point against the planar two-link Jacobian
    (Spong, Hutchinson and Vidyasagar, Robot Modeling and Control, the planar elbow arm:
    tip (l1 c1 + l2 c12, l1 s1 + l2 s12) in the x-z plane, l1 = 0.5 m, l2 = 0.4 m as the URDF
    says)."""
    from safety_filter.campaigns.stress_matrix import tip_force_torque
    from safety_filter.simulation.demo_arms import load_demo_arm

    model = load_demo_arm('planar2')
    l1, l2 = 0.5, 0.4
    rng = np.random.default_rng(3)
    for _ in range(5):
        q = rng.uniform(model.position_lower, model.position_upper)
        force = rng.normal(size=3)
        s1, c1 = np.sin(q[0]), np.cos(q[0])
        s12, c12 = np.sin(q[0] + q[1]), np.cos(q[0] + q[1])
        expected = np.array([
            force[0] * (-l1 * s1 - l2 * s12) + force[2] * (l1 * c1 + l2 * c12),
            force[0] * (-l2 * s12) + force[2] * (l2 * c12)])
        np.testing.assert_allclose(tip_force_torque(model, q, force), expected, atol=1e-9)
