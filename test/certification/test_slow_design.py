"""Certification of the slow design (docs/method.md, "The slow set").

Checks against the certificate's own record and the definitions of the note: the slow
design's velocity boxes stay within ``slow_box`` of the rated speeds, it gives each joint at
least the main design's usable authority, its range of the disturbance estimate contains the
main one, and its own falsifier (SciPy's HiGHS, a solver the filter does not use) found no
infeasible state.
"""

from __future__ import annotations

from dataclasses import replace

import numpy as np
import pytest
from certify_fixtures import certified_demo_arm

from safety_filter.certification.certify import MIN_SLOW_GROWTH, CertifySettings
from safety_filter.certification.certify_settings import DEFAULT_SLOW_BOX
from safety_filter.cli.certify import SLOW_BOX_SHOWN
from safety_filter.errors import InvalidValue


def test_the_default_slow_box_and_when_there_is_none() -> None:
    assert CertifySettings().slow_box_share == DEFAULT_SLOW_BOX == SLOW_BOX_SHOWN
    assert CertifySettings(delay_predicted=True).slow_box_share == 0.0
    assert CertifySettings(slow_box=0.0).slow_box_share == 0.0
    with pytest.raises(InvalidValue, match='slow_box'):
        CertifySettings(slow_box=0.5, delay_predicted=True)
    with pytest.raises(InvalidValue, match='slow_box'):
        CertifySettings(slow_box=0.95)  # above 1 - velocity_headroom
    with pytest.raises(InvalidValue, match='slow_box'):
        CertifySettings(slow_box=-0.1)
    with pytest.raises(InvalidValue, match='slow_box'):
        CertifySettings(slow_box=0.01)  # below the slowest box the search tries


def test_the_slow_design_is_certified_slower_and_brakes_harder() -> None:
    _, outcome = certified_demo_arm('bench6')
    main = outcome.certificate
    slow = main.slow_design
    assert slow is not None, main.settings.get('notes')
    assert slow.certified and slow.falsifier['states'] > 0 and slow.falsifier['infeasible'] == 0
    share = np.asarray(slow.velocity_bound) / np.asarray(slow.velocity_limit)
    assert np.all(share <= DEFAULT_SLOW_BOX + 1e-9)
    assert np.all(slow.usable_authority >= main.usable_authority * (1.0 - 1e-9))
    assert np.any(slow.usable_authority > main.usable_authority * 1.05)
    # and the union enlarges some joint's slice of S by the share certification asks for
    alone = replace(main, slow_design=None).slice_areas()
    assert np.max(main.slice_areas() / alone) >= 1.0 + MIN_SLOW_GROWTH
    assert np.all(np.asarray(slow.settings['disturbance_constant'])
                  >= np.asarray(main.settings['disturbance_constant']) * (1.0 - 1e-9))
    # the slow design counts the friction spreads at the main design's box
    recorded = slow.settings['certify']['friction_error_box']
    np.testing.assert_allclose(recorded, main.velocity_bound)
    assert slow.alpha1.kind == main.alpha1.kind
    assert slow.acceleration_hold_s == main.acceleration_hold_s


def test_a_slow_design_that_adds_nothing_is_left_out_with_the_reason() -> None:
    # planar2's main boxes sit at the top fraction with 89 % of its braking sets: a slower
    # box enlarges no joint's safe set by 1 %
    _, outcome = certified_demo_arm('planar2')
    certificate = outcome.certificate
    assert certificate.certified
    top = CertifySettings().top_velocity_fraction
    share = np.asarray(certificate.velocity_bound) / np.asarray(certificate.velocity_limit)
    assert np.all(share >= top - 1e-9), 'planar2 no longer certifies at the top boxes'
    assert certificate.slow_design is None
    notes = [note for note in certificate.settings['notes'] if 'slow design left out' in note]
    assert notes and f'by {100 * MIN_SLOW_GROWTH:g} % or more' in notes[0]
