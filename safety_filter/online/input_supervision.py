"""What the filter does when its inputs are late, missing or invalid: the one policy.

The filter node, the open-loop replay and the closed-loop re-simulation of a bag all face
the same question at every step: how old are the joint state and the nominal, and what is
filtered or sent then. This module answers it without ROS, from timestamps (any clock, in
seconds, the same one for all the times given; the node uses its steady clock at receipt,
the replay the bag times).

The policy (docs/node.md, "Timeouts and the watchdog"):

* **No valid joint state yet**: nothing is published (there is no safe command to give).
* **Joint states stale** (the last valid one older than ``joint_state_timeout_s``): the
  filter's hold command at the last valid position with the velocity unknown (gravity
  compensation only: no damping computed from a stale velocity). The node runs it as a
  filter step with NaN velocity and nominal (the filter's rejection path, which restarts its
  disturbance observer); its status mode is ``'stale'`` (code 4).
* **Nominal stale or never received** (older than ``nominal_timeout_s``): never used. The
  "hold still" command at the current state, ``g(q) - hold_damping v``
  (:meth:`SafetyFilter.hold_torque`), is the nominal instead, and it is still filtered.
* **Both fresh**: the nominal is filtered.
* **Last command** (the node going inactive): the hold command at the last valid joint
  state, with its velocity while that state is fresh, without (no damping) once stale.
* **Watchdog**: with ``trigger='joint_state'`` steps run on each joint state, with
  ``trigger='nominal'`` on each nominal; when the trigger topic has been silent for its
  timeout (:meth:`InputSupervisor.silence_limit`) a timer runs the steps instead.

API::

    supervisor = InputSupervisor(joint_state_timeout_s=0.02, nominal_timeout_s=0.1,
                                 trigger='joint_state')
    decision = supervisor.decide(now, joint_state_time=t_js, nominal_time=t_nom,
                                 has_joint_state=True)
    # decision.publish, .joint_state_stale, .nominal_stale, .hold_nominal, ages [s]
    step = supervised_step(filt, decision, q, v, u_nom, last_valid_q)
    # step.output (FilterOutput), step.q/.v/.nominal (what the filter was given),
    # step.mode_code (mode_codes), step.reason, step.hold_nominal
    torque, fresh = supervisor.last_command(filt, now, t_js, last_valid_q, last_valid_v)

``joint_state_time`` is the time of the last VALID joint state; ``-inf`` (or None) means
none; ``nominal_time`` likewise for the nominal (``-inf``: never received, so stale).
"""

from __future__ import annotations

import math
from dataclasses import dataclass
from typing import Any

import numpy as np

from safety_filter.errors import InvalidValue
from safety_filter.online.barrier_filter import SafetyFilter
from safety_filter.online.filter_output import FilterOutput
from safety_filter.online.mode_codes import MODE_CODES, MODE_STALE

JOINT_STATE_TIMEOUT_S = 0.02  # [s] default: 20 periods of a 1 kHz loop (docs/node.md)
NOMINAL_TIMEOUT_S = 0.1  # [s] default
TRIGGERS = ('nominal', 'joint_state')
STALE_REASON = 'joint states stale: holding'  # the age is in the status and diagnostics


def positive_finite(name: str, value: Any) -> float:
    """``value`` as a positive finite float.

    Raises:
        InvalidValue: not a number (bools are not), or not positive and finite.
    """
    if isinstance(value, bool) or not isinstance(value, (int, float)):
        raise InvalidValue(name, value, 'a number')
    number = float(value)
    if not (math.isfinite(number) and number > 0.0):
        raise InvalidValue(name, value, 'positive and finite')
    return number


def check_trigger(value: Any) -> str:
    """``value`` if it is one of :data:`TRIGGERS`.

    Raises:
        InvalidValue: another value.
    """
    if value not in TRIGGERS:
        raise InvalidValue('trigger', value, f'one of {", ".join(TRIGGERS)}')
    return str(value)


@dataclass(frozen=True, slots=True)
class InputDecision:
    """What to do at one step, from the inputs' ages.

    Attributes:
        publish: a valid joint state exists, so there is a command to send.
        joint_state_age_s: age of the last valid joint state [s] (inf: none).
        nominal_age_s: age of the last nominal [s] (inf: none).
        joint_state_stale: that state is older than the joint-state timeout: hold at the
            last valid position, velocity unknown.
        nominal_stale: the nominal is older than its timeout (or missing).
    """

    publish: bool
    joint_state_age_s: float
    nominal_age_s: float
    joint_state_stale: bool
    nominal_stale: bool

    @property
    def hold_nominal(self) -> bool:
        """The hold-still command replaces the nominal (fresh state, stale nominal)."""
        return self.publish and not self.joint_state_stale and self.nominal_stale


@dataclass(frozen=True, slots=True)
class SupervisedStep:
    """One step under the input policy (what the node publishes and records).

    Attributes:
        output: the filter's answer.
        q, v, nominal: the arrays given to :meth:`SafetyFilter.step` (NaN where unknown).
        mode_code: the status mode code (:mod:`safety_filter.online.mode_codes`).
        reason: why the step was not 'filtered' ('' when it was).
        hold_nominal: the hold-still command replaced a stale nominal.
    """

    output: FilterOutput
    q: np.ndarray
    v: np.ndarray
    nominal: np.ndarray
    mode_code: int
    reason: str
    hold_nominal: bool


class InputSupervisor:
    """The timeouts on the joint states and the nominal, and the trigger of the steps.

    Args:
        joint_state_timeout_s: joint states older than this [s] are stale (> 0, finite).
        nominal_timeout_s: a nominal older than this [s] is never used (> 0, finite).
        trigger: ``'joint_state'`` (a step per joint state) or ``'nominal'``.

    Raises:
        InvalidValue: a timeout that is not positive and finite, an unknown trigger.
    """

    def __init__(self, joint_state_timeout_s: float = JOINT_STATE_TIMEOUT_S,
                 nominal_timeout_s: float = NOMINAL_TIMEOUT_S,
                 trigger: str = 'joint_state') -> None:
        self.joint_state_timeout_s = positive_finite('joint_state_timeout_s',
                                                     joint_state_timeout_s)
        self.nominal_timeout_s = positive_finite('nominal_timeout_s', nominal_timeout_s)
        self.trigger = check_trigger(trigger)

    def decide(self, now: float, joint_state_time: float | None, nominal_time: float | None,
               has_joint_state: bool = True) -> InputDecision:
        """The decision at ``now`` given the times of the last valid joint state and of the
        last nominal (None or ``-inf``: none). ``has_joint_state`` False: no valid joint
        state to hold at (e.g. forgotten at activation), so nothing is published."""
        js_age = now - (-math.inf if joint_state_time is None else joint_state_time)
        nominal_age = now - (-math.inf if nominal_time is None else nominal_time)
        publish = has_joint_state and math.isfinite(js_age)
        return InputDecision(publish, js_age, nominal_age,
                             js_age > self.joint_state_timeout_s,
                             not nominal_age <= self.nominal_timeout_s)

    def joint_state_fresh(self, now: float, joint_state_time: float | None) -> bool:
        """The last valid joint state is not older than the timeout."""
        return joint_state_time is not None and \
            now - joint_state_time <= self.joint_state_timeout_s

    def silence_limit(self) -> float:
        """How long the trigger topic may be silent before the watchdog steps in [s]."""
        if self.trigger == 'nominal':
            return self.nominal_timeout_s
        return self.joint_state_timeout_s

    def trigger_silent(self, now: float, joint_state_time: float,
                       nominal_time: float) -> bool:
        """The trigger topic has been silent for longer than its timeout.

        ``joint_state_time``: the last joint state received, valid or not (an invalid one
        still runs a step, with the rejection semantics).
        """
        if self.trigger == 'nominal':
            return now - nominal_time > self.nominal_timeout_s
        return now - joint_state_time > self.joint_state_timeout_s

    def last_command(self, filt: SafetyFilter, now: float, joint_state_time: float | None,
                     q: np.ndarray, v: np.ndarray) -> tuple[np.ndarray, bool]:
        """The one command sent on going inactive, and whether the state was fresh.

        The hold command at the last valid joint state ``(q, v)``; the velocity counts as
        unknown (no damping) once that state is stale.
        """
        fresh = self.joint_state_fresh(now, joint_state_time)
        nan = np.full(filt.n, math.nan)
        return filt.hold_torque(q, v if fresh else nan), fresh


def supervised_step(filt: SafetyFilter, decision: InputDecision, q: np.ndarray,
                    v: np.ndarray, u_nom: np.ndarray, last_valid_q: np.ndarray
                    ) -> SupervisedStep:
    """One filter step under ``decision`` (which must have ``publish`` set).

    Args:
        filt: the filter.
        decision: from :meth:`InputSupervisor.decide`.
        q, v: the latest joint state (NaN where the last message was invalid).
        u_nom: the latest nominal (NaN where invalid).
        last_valid_q: the position of the last valid joint state.
    """
    if decision.joint_state_stale:
        # The filter's hold command at the last valid position, velocity unknown.
        nan = np.full(filt.n, math.nan)
        output = filt.step(last_valid_q, nan, nan)
        return SupervisedStep(output, last_valid_q, nan, nan, MODE_STALE, STALE_REASON, False)
    hold_nominal = decision.nominal_stale
    if hold_nominal:
        # Never use a stale nominal: the hold command (g(q) - D v) is the nominal. (
        # hold_torque, not a rejected step: a step would count and would restart the
        # disturbance observer, which a replay of ~/status could not know.)
        u_nom = filt.hold_torque(q, v)
    output = filt.step(q, v, u_nom)
    return SupervisedStep(output, q, v, u_nom, MODE_CODES[output.mode.value], output.reason,
                          hold_nominal)
