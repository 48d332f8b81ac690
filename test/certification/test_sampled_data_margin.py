"""The sampled-data margin with the delay predicted (docs/method.md, "Delay").

Rollouts of bench6 with its session certificate's gains: the filter's command acts over the
declared one-period delay, then the command it plans at the predicted state acts on the
arm's actual state. What that needs is at least what one held period needs (the first
segment is that hold, with the same draws) and well under what a hold of the period and
the delay together needs (the margin of a certificate with the delay as an upper bound).
"""

from __future__ import annotations

import numpy as np
import pytest
from certify_fixtures import demo_certificate

from safety_filter.certification.certify import margin_plants
from safety_filter.certification.certify_settings import CertifySettings
from safety_filter.certification.sampled_data_margin import Gains, estimate_sampling_margin


def _bench6_gains():  # noqa: ANN202
    """bench6, its session certificate, the certificate's gains and its control period."""
    model, c = demo_certificate('bench6')
    gains = Gains(c.gamma, c.beta, c.alpha1, c.alpha2, c.velocity_bound, c.velocity_beta,
                  c.acceleration_bound)
    return model, c, gains, 1.0 / c.control_rate_hz


@pytest.mark.slow
def test_predicting_the_delay_leaves_a_hold_of_one_period_to_cover() -> None:
    model, c, gains, period = _bench6_gains()
    common = dict(samples=1000, current_margin=np.zeros(model.n_joints), seed=0,
                  plants=margin_plants(model, CertifySettings(delay_periods=1)))
    one_hold = estimate_sampling_margin(model, gains, period, **common)
    predicted = estimate_sampling_margin(model, gains, period, prediction_s=period, **common)
    longer_hold = estimate_sampling_margin(model, gains, 2 * period, **common)
    print(f'\none period {np.round(one_hold, 3)}\npredicted  {np.round(predicted, 3)}\n'
          f'two periods {np.round(longer_hold, 3)}')
    assert np.all(predicted >= one_hold)
    assert np.all(predicted <= 0.75 * longer_hold)


@pytest.mark.slow
def test_the_lookahead_takes_the_drift_of_the_heavy_joints_out_of_the_margin() -> None:
    """bench6 at its certificate's gains, the hold of a period and the declared delay read as
    an upper bound (the default), commands as the filter computes them with ``M`` and ``h``
    at the state, and with the lookahead of half that hold: the shoulder's and the elbow's
    margins, mostly the drift of their dynamics along the motion, drop by at least 40 %
    (docs/method.md, "Lookahead", which also says what it costs the base)."""
    model, c, gains, period = _bench6_gains()
    common = dict(samples=1000, current_margin=np.zeros(model.n_joints), seed=0,
                  plants=margin_plants(model, CertifySettings(delay_periods=1)),
                  acceleration_hold_s=c.acceleration_hold_s or 0.0, delay_s=period)
    plain = estimate_sampling_margin(model, gains, 2 * period, **common)
    ahead = estimate_sampling_margin(model, gains, 2 * period, lookahead_s=period, **common)
    print(f'\nat the state {np.round(plain, 3)}\nlookahead    {np.round(ahead, 3)}')
    shoulder, elbow = model.joint_names.index('shoulder_pitch'), model.joint_names.index(
        'elbow_pitch')
    assert ahead[shoulder] <= 0.6 * plain[shoulder]
    assert ahead[elbow] <= 0.6 * plain[elbow]
