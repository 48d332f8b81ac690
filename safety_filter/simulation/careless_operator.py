"""A careless operator: a seeded schedule of behaviours that try to break the limits.

:class:`CarelessOperator` emulates a person teleoperating an arm carelessly. Time is cut
into segments of a few seconds; each segment runs one behaviour:

* ``'pd_beyond_limits'``: a PD controller with gravity feedforward dragging every joint
  toward targets past its position limits, switching side every second or two
  (:class:`safety_filter.simulation.command_sources.PDBeyondLimits`);
* ``'jerk'``: gravity compensation with sudden full-effort pulses (tens of milliseconds to
  a few tenths of a second) on a few joints at a time;
* ``'slack'``: no torque at all, so gravity acts
  (:class:`safety_filter.simulation.command_sources.ZeroTorque`);
* ``'sinusoid'``: sinusoidal torques well beyond the effort limits
  (:class:`safety_filter.simulation.command_sources.LargeSinusoid`).

The behaviours come in cycles: every cycle runs each of them once, in an order drawn from
the seed, and every segment draws its own duration and parameters from the seed. So the
schedule, and the torque for a given ``(t, q, v)``, is a pure function of the seed: the same
seed repeats the same operator, with or without ROS (the operator node, replay and the tests
all use this class). No ROS imports here.

Torques are in the model's joint order [N m] (prismatic joints [N]); ``t`` is the time since
the operator started [s].
"""

from __future__ import annotations

import math
from collections.abc import Callable, Sequence
from dataclasses import dataclass

import numpy as np

from safety_filter.core.dynamics import Dynamics
from safety_filter.core.robot_model import RobotModel
from safety_filter.errors import InvalidValue
from safety_filter.simulation.command_sources import LargeSinusoid, PDBeyondLimits, ZeroTorque

BEHAVIOURS = ('pd_beyond_limits', 'jerk', 'slack', 'sinusoid')
OUTPUT_CONVENTIONS = ('full', 'driver_compensated')


@dataclass(frozen=True)
class Segment:
    """One stretch of the schedule.

    Attributes:
        index: position in the schedule (0, 1, ...).
        behaviour: one of :data:`BEHAVIOURS`.
        start_s: start time [s] since the operator started.
        duration_s: length [s].
        seed: seed of the segment's own parameters (pulse times, frequencies, ...).
    """

    index: int
    behaviour: str
    start_s: float
    duration_s: float
    seed: int

    @property
    def end_s(self) -> float:
        """End time [s]."""
        return self.start_s + self.duration_s


class _Jerks:
    """Gravity compensation plus full-effort pulses on random joints (seeded)."""

    def __init__(self, model: RobotModel, duration_s: float, seed: int,
                 gravity: Callable[[np.ndarray], np.ndarray]) -> None:
        rng = np.random.default_rng(seed)
        n = model.n_joints
        effort = np.array(model.effort_limit)
        self.gravity = gravity
        starts, ends, torques = [], [], []
        t = float(rng.uniform(0.05, 0.3))
        while t < duration_s:
            length = float(rng.uniform(0.05, 0.25))
            joints = rng.random(n) < max(0.35, 1.5 / n)
            if not joints.any():
                joints[rng.integers(n)] = True
            sign = rng.choice((-1.0, 1.0), size=n)
            starts.append(t)
            ends.append(t + length)
            torques.append(np.where(joints, sign * effort, 0.0))
            t += length + float(rng.uniform(0.25, 0.7))
        self.starts = np.array(starts)
        self.ends = np.array(ends)
        self.torques = np.array(torques).reshape(len(starts), n)

    def __call__(self, t: float, q: np.ndarray, v: np.ndarray) -> np.ndarray:
        u = np.array(self.gravity(q), dtype=float)
        k = int(np.searchsorted(self.starts, t, side='right')) - 1
        if k >= 0 and t < self.ends[k]:
            pulse = self.torques[k]
            u = np.where(pulse != 0.0, pulse, u)
        return u


class CarelessOperator:
    """Seeded schedule of careless behaviours; call it as ``operator(t, q, v) -> u_nom``.

    Args:
        model: the robot model (limits, and gravity for the feedforward).
        seed: the schedule's seed; equal seeds give equal schedules and torques.
        segment_s: ``(shortest, longest)`` segment duration [s].
        behaviours: the behaviours to cycle through (a subset of :data:`BEHAVIOURS`, each
            at most once).
        output_convention: ``'full'`` (the torque the joint should get) or
            ``'driver_compensated'`` (the driver adds ``g(q)`` itself: ``g(q)`` is
            subtracted from the output).
        payload_mass: payload the operator's gravity model assumes [kg].
        gravity: ``g(q)`` [N m] to use instead of the model's (shape (n,) -> (n,)).

    Raises:
        SafetyFilterError: an invalid option.
    """

    def __init__(self, model: RobotModel, seed: int = 0,
                 segment_s: tuple[float, float] = (2.0, 4.0),
                 behaviours: Sequence[str] = BEHAVIOURS,
                 output_convention: str = 'full', payload_mass: float = 0.0,
                 gravity: Callable[[np.ndarray], np.ndarray] | None = None) -> None:
        low, high = (float(x) for x in segment_s)
        if not (math.isfinite(low) and math.isfinite(high) and 0.0 < low <= high):
            raise InvalidValue('segment_s', segment_s, '0 < shortest <= longest')
        behaviours = tuple(str(b) for b in behaviours)
        unknown = [b for b in behaviours if b not in BEHAVIOURS]
        if not behaviours or unknown or len(set(behaviours)) != len(behaviours):
            raise InvalidValue('behaviours', list(behaviours),
                               f'distinct names from {", ".join(BEHAVIOURS)}')
        if output_convention not in OUTPUT_CONVENTIONS:
            raise InvalidValue('output_convention', output_convention,
                               f'one of {", ".join(OUTPUT_CONVENTIONS)}')
        self.model = model
        self.seed = int(seed)
        self.segment_s = (low, high)
        self.behaviours = behaviours
        self.output_convention = output_convention
        if gravity is None:
            gravity = Dynamics(model, payload_mass=payload_mass).gravity_torque
        self.gravity = gravity
        self._rng = np.random.default_rng(self.seed)
        self._segments: list[Segment] = []
        self._policies: dict[int, Callable[[float, np.ndarray, np.ndarray], np.ndarray]] = {}
        self._order: list[str] = []

    # ------------------------------------------------------------------ schedule
    def _extend(self) -> None:
        if not self._order:
            self._order = [self.behaviours[i]
                           for i in self._rng.permutation(len(self.behaviours))]
        behaviour = self._order.pop(0)
        start = self._segments[-1].end_s if self._segments else 0.0
        low, high = self.segment_s
        duration = float(self._rng.uniform(low, high)) if high > low else low
        seed = int(self._rng.integers(0, 2**31 - 1))
        self._segments.append(Segment(len(self._segments), behaviour, start, duration, seed))

    def segment_at(self, t: float) -> Segment:
        """The segment running at time ``t`` [s] (``t < 0`` counts as 0)."""
        t = max(float(t), 0.0)
        while not self._segments or self._segments[-1].end_s <= t:
            self._extend()
        for segment in reversed(self._segments):
            if segment.start_s <= t:
                return segment
        return self._segments[0]

    def schedule(self, duration_s: float) -> list[Segment]:
        """The segments that start before ``duration_s`` [s]."""
        if duration_s > 0.0:
            self.segment_at(duration_s)
        return [s for s in self._segments if s.start_s < duration_s]

    # ------------------------------------------------------------------ torques
    def _policy(self, segment: Segment) -> Callable[[float, np.ndarray, np.ndarray], np.ndarray]:
        policy = self._policies.get(segment.index)
        if policy is not None:
            return policy
        rng = np.random.default_rng(segment.seed)
        model = self.model
        if segment.behaviour == 'pd_beyond_limits':
            policy = PDBeyondLimits(model, overshoot=float(rng.uniform(0.3, 0.8)),
                                    period_s=float(rng.uniform(1.0, 2.0)),
                                    gravity=self.gravity)
            if rng.random() < 0.5:  # start toward the lower limits half of the time
                pd = policy
                shift = pd.period_s

                def policy(t: float, q: np.ndarray, v: np.ndarray, pd: PDBeyondLimits = pd,
                           shift: float = shift) -> np.ndarray:
                    return pd(t + shift, q, v)
        elif segment.behaviour == 'jerk':
            policy = _Jerks(model, segment.duration_s, segment.seed, self.gravity)
        elif segment.behaviour == 'slack':
            policy = ZeroTorque(model)
        else:
            policy = LargeSinusoid(model, scale=float(rng.uniform(1.2, 2.0)),
                                   frequency_hz=float(rng.uniform(0.4, 1.0)),
                                   seed=segment.seed)
        self._policies = {k: p for k, p in self._policies.items() if k >= segment.index - 1}
        self._policies[segment.index] = policy
        return policy

    def __call__(self, t: float, q: np.ndarray, v: np.ndarray) -> np.ndarray:
        """Nominal torque [N m], shape (n,), at time ``t`` [s] and state ``(q, v)``."""
        segment = self.segment_at(t)
        u = np.array(self._policy(segment)(max(float(t), 0.0) - segment.start_s, q, v),
                     dtype=float)
        if self.output_convention == 'driver_compensated':
            u = u - np.asarray(self.gravity(q), dtype=float)
        return u
