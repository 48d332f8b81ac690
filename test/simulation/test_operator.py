"""The careless operator's schedule (safety_filter.simulation.careless_operator): seeded, cycling,
careless."""

from __future__ import annotations

import numpy as np
import pytest

from safety_filter.core.dynamics import Dynamics
from safety_filter.errors import InvalidValue
from safety_filter.simulation.careless_operator import BEHAVIOURS, CarelessOperator
from safety_filter.simulation.demo_arms import load_demo_arm


@pytest.fixture(scope='module')
def bench6():
    return load_demo_arm('bench6')


def _trajectory(operator: CarelessOperator, model, times: np.ndarray) -> np.ndarray:
    rng = np.random.default_rng(5)
    lower, upper = np.array(model.position_lower), np.array(model.position_upper)
    states = [(rng.uniform(lower, upper), rng.uniform(-1.0, 1.0, model.n_joints))
              for _ in times]
    return np.array([operator(t, q, v) for t, (q, v) in zip(times, states)])


def test_same_seed_same_schedule_and_torques(bench6) -> None:
    times = np.linspace(0.0, 30.0, 601)
    first = CarelessOperator(bench6, seed=3)
    second = CarelessOperator(bench6, seed=3)
    assert first.schedule(30.0) == second.schedule(30.0)
    np.testing.assert_array_equal(_trajectory(first, bench6, times),
                                  _trajectory(second, bench6, times))


def test_queries_in_any_order_give_the_same_torques(bench6) -> None:
    rng = np.random.default_rng(6)
    lower, upper = np.array(bench6.position_lower), np.array(bench6.position_upper)
    samples = [(t, rng.uniform(lower, upper), rng.uniform(-1.0, 1.0, 6))
               for t in np.linspace(0.0, 20.0, 201)]
    forward = CarelessOperator(bench6, seed=8)
    expected = [forward(t, q, v) for t, q, v in samples]
    backward = CarelessOperator(bench6, seed=8)
    backward.segment_at(40.0)  # build the schedule far ahead first
    got = [backward(t, q, v) for t, q, v in reversed(samples)][::-1]
    np.testing.assert_array_equal(np.array(expected), np.array(got))


def test_other_seed_other_schedule(bench6) -> None:
    schedules = {tuple((s.behaviour, round(s.duration_s, 9)) for s in
                       CarelessOperator(bench6, seed=seed).schedule(20.0))
                 for seed in range(5)}
    assert len(schedules) == 5


def test_segments_cycle_through_every_behaviour(bench6) -> None:
    operator = CarelessOperator(bench6, seed=11, segment_s=(2.0, 4.0))
    segments = operator.schedule(100.0)
    assert segments[0].start_s == 0.0
    for previous, current in zip(segments, segments[1:]):
        assert current.start_s == pytest.approx(previous.end_s)
        assert current.index == previous.index + 1
    for segment in segments:
        assert 2.0 <= segment.duration_s <= 4.0
    count = len(BEHAVIOURS)
    for cycle in range(len(segments) // count):
        chunk = segments[cycle * count:(cycle + 1) * count]
        assert sorted(s.behaviour for s in chunk) == sorted(BEHAVIOURS)
    for segment in segments:
        assert operator.segment_at(segment.start_s + 0.5 * segment.duration_s) == segment


def test_behaviours_are_what_they_say(bench6) -> None:
    gravity = Dynamics(bench6).gravity_torque
    effort = np.array(bench6.effort_limit)
    q = 0.5 * (np.array(bench6.position_lower) + np.array(bench6.position_upper))
    v = np.zeros(6)
    for behaviour in BEHAVIOURS:
        operator = CarelessOperator(bench6, seed=2, behaviours=[behaviour])
        times = np.linspace(0.0, 8.0, 801)
        torques = np.array([operator(t, q, v) for t in times])
        if behaviour == 'slack':
            assert np.all(torques == 0.0)
        elif behaviour == 'jerk':
            # Gravity compensation between pulses; full-effort pulses on some joints.
            hold = np.all(np.isclose(torques, gravity(q)), axis=1)
            assert hold.any() and not hold.all()
            assert np.any(np.isclose(np.abs(torques), effort))
        elif behaviour == 'sinusoid':
            assert np.all(np.max(np.abs(torques), axis=0) > effort)  # beyond the limits
        else:  # PD toward targets beyond the limits: saturating pulls both ways
            assert np.any(torques > effort) and np.any(torques < -effort)


def test_pd_drags_toward_targets_beyond_the_limits(bench6) -> None:
    operator = CarelessOperator(bench6, seed=0, behaviours=['pd_beyond_limits'])
    upper = np.array(bench6.position_upper)
    lower = np.array(bench6.position_lower)
    # At a limit, at rest, the PD still pushes outward on one side or the other.
    pushes_out = []
    for t in np.linspace(0.0, 4.0, 41):
        gravity = operator.gravity(upper)
        pushes_out.append(np.all(operator(t, upper, np.zeros(6)) - gravity > 0.0)
                          or np.all(operator(t, lower, np.zeros(6))
                                    - operator.gravity(lower) < 0.0))
    assert all(pushes_out)


def test_driver_compensated_output_leaves_gravity_out(bench6) -> None:
    full = CarelessOperator(bench6, seed=4)
    compensated = CarelessOperator(bench6, seed=4, output_convention='driver_compensated')
    q = np.array(bench6.position_lower) + 0.3
    v = np.full(6, 0.1)
    for t in (0.5, 3.0, 7.5, 12.0):
        np.testing.assert_allclose(full(t, q, v) - compensated(t, q, v), full.gravity(q),
                                   atol=1e-12)


@pytest.mark.parametrize('options', [
    {'segment_s': (0.0, 1.0)}, {'segment_s': (3.0, 2.0)}, {'behaviours': []},
    {'behaviours': ['slack', 'slack']}, {'behaviours': ['dance']},
    {'output_convention': 'half'}])
def test_bad_options_are_refused(bench6, options) -> None:
    (name,) = options  # the message names the option refused
    with pytest.raises(InvalidValue, match=name) as raised:
        CarelessOperator(bench6, **options)
    assert raised.value.what == name
