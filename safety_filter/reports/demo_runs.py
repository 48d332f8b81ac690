"""The demo's recorded runs: read from their bags, and what they did to the limits.

:func:`load_run` reads one run's bag (:mod:`safety_filter.recordings.bags`) into arrays
(:class:`RunData`); :func:`run_violations` measures how far each joint went past each of its
limits and :func:`broken_limits` counts the broken ones; :func:`barrier_margins` evaluates
the certificate's barriers along a run (also for the unfiltered run, which never saw the
filter: it shows where that run left the safe set); :func:`range_and_speed_used` and
:func:`mode_counts` say how much of the arm and of the filter's modes a run used.
"""

from __future__ import annotations

from dataclasses import dataclass, field
from pathlib import Path

import numpy as np

from safety_filter.core.certificate import Certificate
from safety_filter.core.limit_tolerance import count_broken_limits
from safety_filter.core.robot_model import RobotModel
from safety_filter.online.mode_codes import MODE_NAMES
from safety_filter.recordings import bags
from safety_filter.simulation.plant import limit_violations

LIMITS = ('position', 'velocity', 'torque')


@dataclass
class RunData:
    """One recorded run, in the model's joint order; times [s] from the run's first state.

    Attributes:
        label: ``'unfiltered'`` or ``'filtered'``.
        bag: the bag folder.
        time_s, q, v, effort: joint states (effort: the torque the driver applied).
        command_time_s, command: the torque sent to the driver.
        nominal_time_s, nominal: the operator's torque.
        status: the filter's status records (``'time_s'`` and the field names of
            :mod:`safety_filter.ros.filter_node`); empty without a filter.
        diagnostics: the filter's diagnostics.
        counts: messages per topic in the bag.
        start_ns: bag time of ``time_s = 0`` [ns].
    """

    label: str
    bag: Path
    time_s: np.ndarray
    q: np.ndarray
    v: np.ndarray
    effort: np.ndarray
    command_time_s: np.ndarray
    command: np.ndarray
    nominal_time_s: np.ndarray
    nominal: np.ndarray
    status: dict[str, np.ndarray] = field(default_factory=dict)
    diagnostics: list[bags.DiagnosticRecord] = field(default_factory=list)
    counts: dict[str, int] = field(default_factory=dict)
    start_ns: int = 0

    @property
    def duration_s(self) -> float:
        """Time covered by the joint states [s]."""
        return float(self.time_s[-1] - self.time_s[0]) if self.time_s.size else 0.0


def load_run(bag: str | Path, model: RobotModel, label: str, command_topic: str
             ) -> RunData:
    """Read one run's bag (see :class:`RunData`).

    Args:
        bag: the bag folder.
        model: the robot (joint order, limits).
        label: the run's name.
        command_topic: the topic of the torque the driver was sent
            (:data:`safety_filter.recordings.bags.TOPIC_NOMINAL` in the unfiltered run,
            :data:`safety_filter.recordings.bags.TOPIC_COMMAND` in the filtered one).
    """
    bag = Path(bag)
    counts = {t: i.count for t, i in bags.topic_summary(bag).items()}
    messages = bags.read_topics(bag, sorted({bags.TOPIC_JOINT_STATES, bags.TOPIC_NOMINAL,
                                             command_topic, bags.TOPIC_STATUS,
                                             bags.TOPIC_STATUS_FIELDS,
                                             bags.TOPIC_DIAGNOSTICS}))
    states = bags.joint_state_series(messages.get(bags.TOPIC_JOINT_STATES, []),
                                     model.joint_names)
    if states.stamp_ns.size == 0:
        raise bags.BagError(f'{bag}: no joint states recorded')
    start = int(states.stamp_ns[0])
    n = model.n_joints

    def relative(ns: np.ndarray) -> np.ndarray:
        return 1e-9 * (ns - start)

    def arrays(topic: str) -> tuple[np.ndarray, np.ndarray]:
        if topic not in counts:
            return np.zeros(0), np.zeros((0, n))
        series = bags.float64_array_series(messages[topic])
        if series.data.shape[1] != n:
            raise bags.BagError(f'{bag}: {topic} has {series.data.shape[1]} values per '
                                f'message, the model {n} joints')
        return relative(series.log_time_ns), series.data

    command_time, command = arrays(command_topic)
    nominal_time, nominal = arrays(bags.TOPIC_NOMINAL)
    status = bags.status_records(
        messages.get(bags.TOPIC_STATUS, []),
        fields=bags.last_text(messages.get(bags.TOPIC_STATUS_FIELDS, [])),
        joint_names=model.joint_names)
    if status:
        status['time_s'] = relative(status['log_time_ns'])
    diagnostics = bags.diagnostic_records(messages.get(bags.TOPIC_DIAGNOSTICS, []))
    return RunData(label, bag, relative(states.stamp_ns), states.position, states.velocity,
                   states.effort, command_time, command, nominal_time, nominal, status,
                   diagnostics, counts, start)


def run_violations(model: RobotModel, run: RunData) -> dict[str, np.ndarray]:
    """Largest excursion past each limit, per joint (0 when kept): ``'position'`` [rad],
    ``'velocity'`` [rad/s] (joint states) and ``'torque'`` [N m] (the torque sent to the
    driver), each of shape (n,)."""
    command = run.command if run.command.shape[0] else np.zeros((1, model.n_joints))
    return limit_violations(model, run.q, run.v, command)


def broken_limits(violations: dict[str, np.ndarray]) -> int:
    """How many (joint, limit) pairs were broken (excursion above
    :data:`~safety_filter.core.limit_tolerance.LIMIT_TOLERANCE`)."""
    return count_broken_limits(violations, LIMITS)


def barrier_margins(certificate: Certificate, run: RunData) -> np.ndarray:
    """Smallest of the certificate's barrier values per joint along the run's joint states,
    shape (T, n) (negative: outside the safe set S; ``Certificate.safe_set_margins``)."""
    return certificate.safe_set_margins(run.q, run.v)


def mode_counts(run: RunData) -> dict[str, int]:
    """Filter steps per mode in a run (empty without a filter)."""
    if not run.status:
        return {}
    codes = run.status['mode'].astype(int)
    return {name: int(np.count_nonzero(codes == k)) for k, name in enumerate(MODE_NAMES)}


def range_and_speed_used(model: RobotModel, run: RunData) -> tuple[np.ndarray, np.ndarray]:
    """Per joint: the largest speed over the rated speed, and the nearest approach to a
    position limit over the joint's range (negative: past a limit), from the joint states."""
    speed = np.max(np.abs(run.v), axis=0) / np.array(model.velocity_limit)
    nearest = np.min(np.minimum(run.q - model.position_lower, model.position_upper - run.q),
                     axis=0) / np.array(model.position_range)
    return speed, nearest
