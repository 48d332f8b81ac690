"""Planning over the declared delay (online/delay_prediction.py, docs/method.md "Delay").

The torques that act over the delay come from the history the observer keeps; the prediction
is checked against the planar elbow manipulator in closed form (Spong et al., via
``certify_fixtures.PlanarTwoLink``) integrated by SciPy's ``solve_ivp``, a plant that shares
no code with the package.
"""

from __future__ import annotations

import numpy as np
import pytest
from certify_fixtures import PlanarTwoLink, certified_demo_arm, demo_certificate
from scipy.integrate import solve_ivp

from safety_filter.online.barrier_filter import SafetyFilter
from safety_filter.online.disturbance_observer import DisturbanceObserver


def _observer(delay_periods: int, period_s: float = 1e-3) -> DisturbanceObserver:
    return DisturbanceObserver(np.full(1, 0.01), delay_periods, np.full(1, 100.0), None, None,
                               None, period_s)


def _send(observer: DisturbanceObserver, *torques: float) -> None:
    for torque in torques:
        observer.sent(np.array([torque]))


def _pieces(observer: DisturbanceObserver, horizon_s: float, period_s: float | None
            ) -> list[tuple[float, float]]:
    pieces = observer.acting_ahead(horizon_s, period_s)
    assert pieces is not None
    return [(round(duration * 1e3, 9), float(torque[0])) for duration, torque in pieces]


def test_the_torques_that_act_over_the_delay_in_time_order() -> None:
    """Sent 1, 2, 3 (3 last): over a 1 ms delay at 1 kHz the last one acts (it was sent one
    period ago, for the period that starts now); over 2 ms the one before it first; at a
    2 ms loop the last one covers the whole 1 ms; at a 0.5 ms loop the last two, 0.5 ms
    each."""
    observer = _observer(delay_periods=2)
    _send(observer, 1.0, 2.0, 3.0)
    assert _pieces(observer, 1e-3, None) == [(1.0, 3.0)]
    assert _pieces(observer, 2e-3, None) == [(1.0, 2.0), (1.0, 3.0)]
    assert _pieces(observer, 1e-3, 2e-3) == [(1.0, 3.0)]
    assert _pieces(observer, 1e-3, 0.5e-3) == [(0.5, 2.0), (0.5, 3.0)]
    assert _pieces(observer, 1.5e-3, 1e-3) == [(0.5, 2.0), (1.0, 3.0)]


def test_no_prediction_before_the_acting_torques_are_known() -> None:
    """None until the torques over the delay were all sent since the last restart; a loop
    far faster than certified uses the oldest torque kept for the rest of the delay."""
    observer = _observer(delay_periods=2)
    assert observer.acting_ahead(1e-3, None) is None
    _send(observer, 1.0)
    assert observer.acting_ahead(2e-3, None) is None
    assert _pieces(observer, 1e-3, None) == [(1.0, 1.0)]
    observer.restart()
    assert observer.acting_ahead(1e-3, None) is None
    assert observer.acting_ahead(1e-3, float('nan')) is None
    _send(observer, 1.0, 2.0, 3.0, 4.0, 5.0)
    # four torques kept (delay + 2): 1e-4 s periods over 1 ms -> 3 pieces, then the oldest
    pieces = _pieces(observer, 1e-3, 1e-4)
    assert [torque for _, torque in pieces] == [2.0, 3.0, 4.0, 5.0]
    assert sum(duration for duration, _ in pieces) == pytest.approx(1.0)
    assert pieces[0][0] == pytest.approx(0.7)


def test_the_step_plans_at_the_state_the_plant_reaches_after_the_delay() -> None:
    """planar2 under a sinusoidal nominal, its torques acting one period late (the declared
    delay) on the closed-form plant: the state the filter plans for at each step is the
    plant's state one period later to within 1e-4 rad/s and 1e-7 rad (measured: 4e-5 and
    1.4e-8), a hundred times closer in velocity than the measured state it started from."""
    model, outcome = certified_demo_arm('planar2', delay_predicted=True)
    certificate = outcome.certificate
    assert certificate.prediction_s == pytest.approx(1.0 / certificate.control_rate_hz)
    payload = model.payload.mass_max
    plant = PlanarTwoLink(payload)
    safety = SafetyFilter(model, certificate, payload_mass=payload)
    period = 1.0 / certificate.control_rate_hz
    lower, upper = np.array(model.position_lower), np.array(model.position_upper)
    q, v = 0.5 * (lower + upper), np.zeros(2)
    acting = np.zeros(2)  # the torque the driver applies now (sent one period ago)
    planned, measured, actual = [], [], []
    for k in range(300):
        t = k * period
        nominal = 8.0 * np.sin(2 * np.pi * 2.0 * t + np.array([0.0, 1.0])) + \
            np.array(plant.gravity_torque(q[0], q[1]))
        out = safety.step(q, v, nominal)
        result = solve_ivp(plant.state_derivative(acting), (t, t + period), np.r_[q, v],
                           method='DOP853', rtol=1e-11, atol=1e-13)
        assert result.success, result.message
        if k > 0:
            planned.append(np.concatenate(safety.planned_state))
            measured.append(np.r_[q, v])
            actual.append(result.y[:, -1])
        q, v = result.y[:2, -1], result.y[2:, -1]
        acting = np.array(out.torque)
    planned, measured, actual = np.array(planned), np.array(measured), np.array(actual)
    error = np.abs(planned - actual)
    stale = np.abs(measured - actual)
    print(f'\nprediction error: position {error[:, :2].max():.2e} rad, velocity '
          f'{error[:, 2:].max():.2e} rad/s; measured state off by {stale[:, 2:].max():.2e} '
          'rad/s')
    assert error[:, :2].max() < 1e-7
    assert error[:, 2:].max() < 1e-4
    assert error[:, 2:].max() < 0.01 * stale[:, 2:].max()


def test_a_certificate_without_prediction_plans_at_the_measured_state() -> None:
    """The planned state is the measured one when the certificate predicts nothing (the
    delay covered as a longer hold, the default), and on a predicting filter's first step
    (no torque of its own acts yet)."""
    model, outcome = certified_demo_arm('planar2', delay_predicted=True)
    certificate = outcome.certificate
    q = 0.5 * (np.array(model.position_lower) + np.array(model.position_upper))
    v = np.array([0.3, -0.2])
    safety = SafetyFilter(model, certificate)
    safety.step(q, v, np.zeros(2))
    np.testing.assert_array_equal(np.concatenate(safety.planned_state), np.r_[q, v])
    safety.step(q + 1e-3 * v, v, np.zeros(2))
    assert not np.array_equal(safety.planned_state[1], v)
    plain = SafetyFilter(model, demo_certificate('planar2')[1])
    assert plain.certificate.prediction_s is None
    for _ in range(3):
        plain.step(q, v, np.zeros(2))
        np.testing.assert_array_equal(np.concatenate(plain.planned_state), np.r_[q, v])
