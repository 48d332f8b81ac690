"""The settings of a certification (:class:`CertifySettings`) and the names of its design
families.

A family is the class-K function of the position barriers (``alpha1``: ``linear``,
``sqrt``, ...), with velocity barriers of its own, or, with the suffix ``:lemma``, kept in
the velocity box by the velocity lemma alone (``docs/method.md``).
"""

from __future__ import annotations

from dataclasses import asdict, dataclass, field
from typing import Any

import numpy as np

from safety_filter.certification.dynamics_bounds import BoundSettings
from safety_filter.core.certificate import CONDITIONS, DEFAULT_OBSERVER_PERIODS
from safety_filter.core.class_k import ALPHA1_KINDS, ALPHA2_KINDS, ClassK
from safety_filter.core.robot_model import RobotModel
from safety_filter.errors import InvalidValue

LEMMA_SUFFIX = ':lemma'
# The slow design's velocity boxes by default [share of the rated speeds]: on both demo arms a
# motion at half the rated speeds then passes through it unchanged (a joint cruises there up to
# vS - delta / beta_v; docs/method.md, "The slow set").
DEFAULT_SLOW_BOX = 0.6


def split_family(name: str) -> tuple[str, bool]:
    """``(alpha1 kind, velocity barriers)`` of a family name (``'linear:lemma'``: none)."""
    if name.endswith(LEMMA_SUFFIX):
        return name[:-len(LEMMA_SUFFIX)], False
    return name, True


@dataclass(frozen=True)
class CertifySettings:
    """Choices and margins of the certification (all recorded in the certificate).

    Attributes:
        alpha1, alpha2: class-K families (alpha1: linear, atan, tanh, sqrt, parabola;
            alpha2: linear, cubic, atan, tanh). ``alpha1 = None`` (the default) tries each
            of ``families`` and keeps the one whose safe set is largest among those that
            certify.
        families: the alpha1 families tried when ``alpha1`` is None; a family named with
            the suffix ``:lemma`` keeps the velocity box by the velocity lemma (no velocity
            barriers), the others by velocity barriers of their own.
        velocity_barrier: for an explicit ``alpha1``: give the velocity box barriers of its
            own (then gamma is not held by the velocity lemma and S reaches the braking
            curve); False: the lemma.
        per_joint_envelopes: search each joint's velocity bound, not only a common scale.
        braking_slope_share: the automatic sqrt family's eps keeps the drift of its slope
            term over one hold at about this share of the authority.
        braking_distance_share: authority is not spent beyond what brakes a joint from its
            rated speed within this share of its range (``useful_authority``).
        acceleration_bound_factor: the filter keeps each joint's acceleration within this
            many times its authority (0: no bound); the sampled-data margin then covers
            only accelerations within it.
        gamma_margin: ``gamma <= gamma_margin * gamma*`` (< 1). None (default): 0.95 with
            the delay predicted, 0.9 with the delay as an upper bound (``gamma_share``).
        beta_margin: ``beta >= beta_margin * beta*`` (> 1).
        beta_sampling_limit: cap ``beta * max(alpha2(b)/b) * T_hold <= beta_sampling_limit``.
        beta_cap_share: ``beta`` is at least this share of that cap (1: at the cap, the most
            permissive; 0: the least ``beta`` that certifies, which slows the arm long
            before it nears a limit; docs/method.md). None (default): 0.2 with the delay
            predicted, 0.05 with the delay as an upper bound (``cap_share``).
        control_rate_hz: the filter's control rate [Hz].
        sampling_factor: the sampled-data margin covers hold periods of this many control
            periods (so the limits also hold at a rate this many times slower).
        margin_samples, margin_inflation: rollouts and inflation of the sampled-data margin.
        velocity_scales: how many common velocity scales to try in (0, 1].
        velocity_headroom: every velocity box stays this share of the rated speed below
            it: model error that the disturbance observer has not yet removed can carry a
            joint past its box for a few periods (docs/method.md, Certification).
        min_velocity_fraction: certification fails when the certified velocity bound of a
            joint is below this fraction of its rated limit.
        condition: 'auto', 'acceleration_authority' or 'torque_coupling'.
        falsifier_states: states the falsifier samples (0 skips it: not certified then).
        bounds: settings of the dynamics bounds.
        seed: random seed of every sampling stage.
        observer_periods: the slowest time constant of the filter's disturbance observer, in
            control periods; observer_noise_share: each joint's time constant is the fastest
            (at least two periods) whose velocity noise costs at most this share of the
            joint's torque limit (recorded per joint; the filter uses them).
        margin_plants: arms drawn from the declared uncertainty set that the sampled-data
            rollouts use besides the model (``margin_plants``).
        delay_periods: control periods between measurement and torque that the sampled-data
            margin covers on top of ``sampling_factor`` (None: the model's declared
            uncertainty, ``delay_periods``).
        delay_predicted: False (default): the delay may be anything up to the declared
            one; the filter plans at the measured state and the margin covers the delay as a
            longer hold. True: the declared delay is the driver's fixed delay; the filter
            plans each torque for the state it predicts at the end of the delay (certificate
            entry ``prediction_s``) and the margin covers one hold from there: a larger
            safe set, less robust to measurement noise (docs/method.md, "Delay").
        mean_over_hold: on an arm with viscous damping, True: the filter bounds the mean
            acceleration over a control period (the exact zero-order-hold response of the
            damped joints, ``hold_mass_matrix``); False: the acceleration at the start of
            the hold; None (default): certification tries both and keeps the larger safe
            set.
        lookahead: True: the filter plans each torque for the state half the hold the
            margin covers ahead (``M`` and ``h`` there, the velocity's share to first order;
            certificate entry ``lookahead_s``), so the drift of the dynamics along the
            motion within the hold is planned for and the margin covers only what is left of
            it; False (default): at the planned state; None: certification tries both and
            keeps the larger safe set (docs/method.md, "Lookahead": on planar2's exact model
            a lookahead design left S by 5e-5 with the disturbance observer on).
        slow_box: when above 0, certification adds a slow design: a second design for the
            same arm whose velocity box is at most this share of the rated speeds, so that
            with the Coriolis torque of the smaller box freed it brakes harder; the filter's
            safe set is the union of the two (docs/method.md, "The slow set"). 0: none.
            None (default): ``DEFAULT_SLOW_BOX``, or 0 with ``delay_predicted`` (the
            filter predicts over the delay with one design only; ``slow_box_share``).
        friction_error_box: the velocity box at which the model-error bound counts the
            friction spreads [rad/s or m/s per joint]; None (default): the design's own box.
            The slow design takes the main design's, so that its range of the disturbance
            estimate contains the main design's (one observer serves both).
    """

    alpha1: ClassK | None = None
    alpha2: ClassK = ClassK('linear')
    families: tuple[str, ...] = ('parabola', 'sqrt', 'linear', 'linear' + LEMMA_SUFFIX)
    velocity_barrier: bool = True
    per_joint_envelopes: bool = True
    braking_slope_share: float = 0.1
    braking_distance_share: float = 0.02
    acceleration_bound_factor: float = 1.5
    gamma_margin: float | None = None
    beta_margin: float = 1.2
    beta_sampling_limit: float = 0.1
    beta_cap_share: float | None = None
    control_rate_hz: float = 1000.0
    sampling_factor: float = 1.0
    margin_samples: int = 1000
    margin_inflation: float = 1.5
    velocity_scales: int = 40
    velocity_headroom: float = 0.1
    min_velocity_fraction: float = 0.05
    condition: str = 'auto'
    falsifier_states: int = 100_000
    bounds: BoundSettings = field(default_factory=BoundSettings)
    seed: int = 0
    observer_periods: float = DEFAULT_OBSERVER_PERIODS
    observer_noise_share: float = 0.01
    delay_periods: int | None = None
    delay_predicted: bool = False
    margin_plants: int = 3
    mean_over_hold: bool | None = None
    lookahead: bool | None = False
    slow_box: float | None = None
    friction_error_box: tuple[float, ...] | None = None

    def __post_init__(self) -> None:
        kinds1, kinds2 = ', '.join(ALPHA1_KINDS), ', '.join(ALPHA2_KINDS)
        if self.alpha1 is not None and self.alpha1.kind not in ALPHA1_KINDS:
            raise InvalidValue('alpha1', self.alpha1.kind, f'one of {kinds1}')
        if not self.families or any(split_family(kind)[0] not in ALPHA1_KINDS
                                    for kind in self.families):
            raise InvalidValue('families', list(self.families),
                               f'a non-empty choice of {kinds1} (each may end in {LEMMA_SUFFIX})')
        if not 0.0 < self.braking_slope_share <= 1.0:
            raise InvalidValue('braking_slope_share', self.braking_slope_share, 'in (0, 1]')
        if self.alpha2.kind not in ALPHA2_KINDS:
            raise InvalidValue('alpha2', self.alpha2.kind, f'one of {kinds2}')
        if not 0.0 <= self.velocity_headroom <= 1.0 - 1.0 / self.velocity_scales:
            raise InvalidValue('velocity_headroom', self.velocity_headroom,
                               'in [0, 1 - 1 / velocity_scales]')
        if self.beta_cap_share is not None and not 0.0 <= self.beta_cap_share <= 1.0:
            raise InvalidValue('beta_cap_share', self.beta_cap_share, 'in [0, 1]')
        if self.gamma_margin is not None and not 0.0 < self.gamma_margin < 1.0:
            raise InvalidValue('gamma_margin', self.gamma_margin, 'in (0, 1)')
        if not self.beta_margin > 1.0:
            raise InvalidValue('beta_margin', self.beta_margin, '> 1')
        if not self.control_rate_hz > 0.0:
            raise InvalidValue('control_rate_hz', self.control_rate_hz, '> 0')
        if not self.sampling_factor >= 1.0:
            raise InvalidValue('sampling_factor', self.sampling_factor, '>= 1')
        if self.condition not in ('auto', *CONDITIONS):
            raise InvalidValue('condition', self.condition,
                               'one of auto, ' + ', '.join(CONDITIONS))
        if self.slow_box is not None and self.slow_box != 0.0 and not (
                1.0 / self.velocity_scales <= self.slow_box <= self.top_velocity_fraction):
            raise InvalidValue('slow_box', self.slow_box,
                               '0 (no slow design) or in [1 / velocity_scales, '
                               '1 - velocity_headroom]')
        if self.slow_box and self.delay_predicted:
            raise InvalidValue('slow_box', self.slow_box,
                               '0 with delay_predicted (the filter predicts over the delay '
                               'with one design only)')
        if not (np.isfinite(self.observer_periods) and self.observer_periods >= 2.0):
            raise InvalidValue('observer_periods', self.observer_periods, 'finite and >= 2')
        if not (np.isfinite(self.observer_noise_share) and self.observer_noise_share > 0.0):
            raise InvalidValue('observer_noise_share', self.observer_noise_share,
                               'finite and > 0')

    def acceleration_hold_s(self, model: RobotModel) -> float:
        """The hold whose mean acceleration the filter bounds [s]: one control period (what
        the driver holds each command for at the certified rate; the sampled-data margin
        covers the longer holds). 0: the acceleration at the start of the hold (no damping,
        or ``mean_over_hold`` off)."""
        damped = bool(np.any(np.array(model.viscous_friction) > 0.0))
        return 1.0 / self.control_rate_hz if self.mean_over_hold is True and damped else 0.0

    @property
    def slow_box_share(self) -> float:
        """``slow_box``, or its default: ``DEFAULT_SLOW_BOX`` with the delay as an upper
        bound, 0 (no slow design) with the delay predicted."""
        if self.slow_box is not None:
            return self.slow_box
        return 0.0 if self.delay_predicted else min(DEFAULT_SLOW_BOX, self.top_velocity_fraction)

    @property
    def top_velocity_fraction(self) -> float:
        """The largest share of its rated speed a joint's velocity box may reach."""
        return 1.0 - self.velocity_headroom

    @property
    def hold_period_s(self) -> float:
        """Longest hold period the margin covers [s]: ``sampling_factor`` control periods
        (plus the declared delay between measurement and torque when it is not predicted)."""
        delay = 0 if self.delay_predicted else (self.delay_periods or 0)
        return (self.sampling_factor + delay) / self.control_rate_hz

    @property
    def gamma_share(self) -> float:
        """``gamma_margin``, or its default: 0.95 with the delay predicted (S reaches 95 % of
        the braking speed); 0.9 with the delay as an upper bound, where the observer's
        declared delay may differ from the loop's and exact-model loops left S at 0.95
        (docs/method.md)."""
        if self.gamma_margin is not None:
            return self.gamma_margin
        return 0.95 if self.delay_predicted else 0.9

    @property
    def cap_share(self) -> float:
        """``beta_cap_share``, or its default: 0.2 with the delay predicted; 0.05 with the
        delay as an upper bound, where the observer's declared delay may differ from the
        loop's and a larger ``beta`` let exact-model loops leave S (docs/method.md)."""
        if self.beta_cap_share is not None:
            return self.beta_cap_share
        return 0.2 if self.delay_predicted else 0.05

    @property
    def gain_hold_s(self) -> float:
        """The time from a measurement to the end of the hold of the torque computed from it
        [s]: ``sampling_factor`` control periods plus the declared delay, predicted or not.
        The rates of the barriers (``beta``'s cap, ``beta_v``, the ``sqrt`` family's
        ``eps``) are set for it: the prediction is exact only for the model, and what the
        measurement misses (its noise) acts on the arm that long (docs/method.md, "Delay")."""
        return (self.sampling_factor + (self.delay_periods or 0)) / self.control_rate_hz

    @property
    def lookahead_s(self) -> float:
        """How far ahead the filter plans each torque [s]: the middle of the hold the
        margin covers, ``sampling_factor`` control periods plus the delay when it is read as
        an upper bound (0: none; ``lookahead`` None counts as on, certification settles
        it)."""
        return 0.5 * self.hold_period_s if self.lookahead is not False else 0.0

    @property
    def delay_bound_s(self) -> float:
        """The declared delay read as an upper bound that the rollouts cover as a separate
        start of the command [s]: with the lookahead, whose plan is for the middle of the
        hold, it matters whether the command acts over the hold's first part or only its
        second (docs/method.md, "Lookahead"). 0: predicted, none, or without the
        lookahead."""
        if self.delay_predicted or self.lookahead_s == 0.0:
            return 0.0
        return (self.delay_periods or 0) / self.control_rate_hz

    @property
    def prediction_s(self) -> float:
        """The delay the filter predicts over [s] (0: none)."""
        return (self.delay_periods or 0) / self.control_rate_hz if self.delay_predicted else 0.0

    def record(self) -> dict[str, Any]:
        """Plain form for the certificate's provenance."""
        plain = asdict(self)
        plain['alpha1'] = None if self.alpha1 is None else self.alpha1.to_dict()
        plain['families'] = list(self.families)
        plain['alpha2'] = self.alpha2.to_dict()
        return plain
