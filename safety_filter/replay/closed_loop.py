"""Closed-loop re-simulation of a recorded trial: the recorded nominals drive a simulated arm.

:func:`resimulate` starts the simulated arm (:class:`safety_filter.simulation.plant.ArmSimulator`)
at the trial's recorded initial state and drives it with the recorded nominal commands
through a certificate's filter; the result (:class:`ClosedLoopResult`) says whether a limit
would have been broken and how far the motion departs from the recorded one. Where the
nominal falls silent, the node's input policy
(:mod:`safety_filter.online.input_supervision`) says what is filtered.
"""

from __future__ import annotations

from collections import deque
from dataclasses import dataclass
from typing import Any

import numpy as np

from safety_filter.core.certificate import Certificate
from safety_filter.core.robot_model import RobotModel
from safety_filter.online.barrier_filter import SafetyFilter
from safety_filter.online.input_supervision import InputSupervisor
from safety_filter.replay.trial import Trial
from safety_filter.simulation.plant import ArmSimulator, limit_violations


@dataclass
class ClosedLoopResult:
    """A re-simulation driven by the recorded nominal commands."""

    time: np.ndarray
    q: np.ndarray
    v: np.ndarray
    torque: np.ndarray
    mode: np.ndarray
    violations: dict[str, np.ndarray]
    difference: dict[str, np.ndarray]  # vs the recorded motion: 'position_rms', 'position_max'


def resimulate(
    trial: Trial,
    model: RobotModel,
    certificate: Certificate,
    *,
    payload_mass: float | None = None,
    internal_rate_hz: float = 10_000.0,
    nominal_timeout_s: float = 0.1,
    **filter_options: Any,
) -> ClosedLoopResult:
    """Start the simulated arm at the recorded initial state and drive it with the recorded
    nominal commands through ``certificate``'s filter, one step per recorded nominal.

    The driver holds each torque until the next step; with a certificate that predicts over
    the declared delay (``prediction_s``) each torque acts from that long after its step,
    as the filter planned it (until then the one before). Where the nominal topic falls silent
    for longer than a control period, the node's watchdog keeps stepping at the control rate
    (the last nominal while it is fresh, the hold command after ``nominal_timeout_s``); the
    re-simulation does the same, so those steps appear in the result too. With
    ``gravity_convention='driver_compensated'`` the simulated driver adds ``g(q)`` to the
    filter's output, and the logged torque is the full torque applied.
    """
    if payload_mass is None:
        low, high = certificate.payload_mass_range
        payload_mass = 0.5 * (low + high)
    filt = SafetyFilter(model, certificate, payload_mass=payload_mass, **filter_options)
    driver_compensated = filt.gravity_convention == 'driver_compensated'
    simulator = ArmSimulator(model, payload_mass, internal_rate_hz)
    first = int(np.searchsorted(trial.state_time, trial.nominal_time[0], side='right')) - 1
    first = max(first, 0)
    simulator.reset(trial.q[first], trial.v[first], float(trial.nominal_time[0]))
    period = certificate.control_period_s
    supervisor = InputSupervisor(nominal_timeout_s=nominal_timeout_s, trigger='nominal')
    nominal_times = trial.nominal_time
    count = len(nominal_times)
    t_log: list[float] = []
    q_log: list[np.ndarray] = []
    v_log: list[np.ndarray] = []
    u_log: list[np.ndarray] = []
    modes: list[str] = []

    delay = float(certificate.prediction_s or 0.0)
    pending: deque[tuple[float, np.ndarray]] = deque()  # (time it acts from, torque)
    acting: list[np.ndarray] = []  # the torque the driver applies now

    def step(t: float, nominal: np.ndarray, hold: float) -> None:
        q, v = simulator.q, simulator.v
        out = filt.step(q, v, nominal)
        applied = out.torque + filt.dynamics.gravity_torque(q) if driver_compensated \
            else out.torque
        t_log.append(t)
        q_log.append(q)
        v_log.append(v)
        u_log.append(np.array(applied))
        modes.append(str(out.mode))
        pending.append((t + delay, np.array(applied)))
        if not acting:
            acting.append(pending[0][1])  # the first torque stands in before it acts
        now, end = t, t + max(hold, 1e-6)
        while pending and pending[0][0] < end - 1e-12:
            start, torque = pending.popleft()
            if start > now:
                simulator.advance(acting[0], start - now)
                now = start
            acting[0] = torque
        simulator.advance(acting[0], end - now)

    for k in range(count):
        t = float(nominal_times[k])
        end = float(nominal_times[k + 1]) if k + 1 < count else t + period
        if end - t <= 1.5 * period:
            step(t, trial.nominal[k], end - t)
            continue
        # The nominal falls silent: the watchdog steps at the control rate, under the node's
        # input policy (the simulated joint states are always fresh).
        ticks = int(np.floor((end - t) / period + 1e-9))
        for j in range(ticks):
            start = t + j * period
            hold = period if j + 1 < ticks else end - start
            decision = supervisor.decide(start, joint_state_time=start, nominal_time=t)
            nominal = (filt.hold_torque(simulator.q, simulator.v) if decision.hold_nominal
                       else trial.nominal[k])
            step(start, nominal, hold)
    times = np.array(t_log)
    q_arr, v_arr, u_arr = np.array(q_log), np.array(v_log), np.array(u_log)
    recorded_index = np.clip(np.searchsorted(trial.state_time, times, side='right') - 1, 0,
                             len(trial.state_time) - 1)
    delta = q_arr - trial.q[recorded_index]
    return ClosedLoopResult(
        times, q_arr, v_arr, u_arr, np.array(modes, dtype=object),
        limit_violations(model, q_arr, v_arr, u_arr),
        {'position_rms': np.sqrt(np.mean(delta ** 2, axis=0)),
         'position_max': np.max(np.abs(delta), axis=0)})
