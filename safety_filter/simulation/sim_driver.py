"""A simulated arm as its driver presents it: the ROS-free core of the ``sim_arm`` node.

:class:`SimulatedDriver` wraps :class:`safety_filter.simulation.plant.ArmSimulator` (the package's
one
simulation of the dynamics: fixed-step RK4 at an internal rate above the control rate) with
what a torque driver adds around the arm, one control period per :meth:`SimulatedDriver.tick`:

* **Brakes until the first command.** Until a first valid command arrives the arm is held
  still (as a driver keeps the brakes on until it is commanded); the clock runs.
* **Saturation.** The applied torque is the command clipped to the effort limits (after
  adding ``g(q)`` when the driver compensates gravity itself).
* **Command timeout: zero torque.** A command older than ``command_timeout_s`` of simulated
  time is not used: the driver applies zero torque, so the arm then moves under gravity
  alone, like a real arm with torque off and no brakes, until commands resume. (A plain
  timeout of the simulation, not a safety-rated drive function.)
* **Friction.** Coulomb friction acts as the physical stick-slip law by default (a joint
  that comes to rest sticks while its friction can hold it; ``coulomb_law``, see
  :class:`safety_filter.simulation.plant.ArmSimulator`).
* **Pipeline delay.** A command acts ``command_delay_ticks`` ticks after the tick it arrived
  for (a driver's bus pipeline: the limits file's declared ``delay_periods``); until that
  many have passed, the first command acts.
* **Measurement.** The published state can carry Gaussian noise (seeded) and a latency: the
  state measured ``latency_s`` ago is published, with its own time stamp.

Times are simulated time [s]; units [rad], [rad/s], [N m] ([m], [m/s], [N] for prismatic
joints). No ROS imports here.
"""

from __future__ import annotations

import math
from collections import deque
from collections.abc import Sequence
from dataclasses import dataclass

import numpy as np

from safety_filter.core.friction import COULOMB_LAWS
from safety_filter.core.robot_model import RobotModel
from safety_filter.errors import InvalidValue
from safety_filter.simulation.plant import ArmSimulator

GRAVITY_CONVENTIONS = ('full', 'driver_compensated')
DEFAULT_INTERNAL_RATE_FACTOR = 10.0


@dataclass(frozen=True)
class Measurement:
    """What the driver publishes after a tick (arrays of shape (n,), joint order).

    Attributes:
        stamp_s: time the state was measured [s] (earlier than the clock under latency).
        position, velocity: measured state (noise included).
        effort: torque applied over the period that ended at ``stamp_s`` [N m].
    """

    stamp_s: float
    position: np.ndarray
    velocity: np.ndarray
    effort: np.ndarray


class SimulatedDriver:
    """The simulated arm behind a torque driver (see the module docstring).

    Args:
        model: the robot model.
        control_rate_hz: ticks per second of simulated time [Hz].
        internal_rate_hz: RK4 steps per second [Hz]; None: 10 times the control rate.
        payload_mass: payload on the tip [kg].
        initial_positions: start positions [rad or m]; None: the middle of each range.
        position_noise_std, velocity_noise_std: standard deviation of the Gaussian noise
            on the published state [rad], [rad/s].
        noise_seed: seed of the noise.
        latency_s: age of the published state [s] (0: the state at the end of the tick).
        command_timeout_s: commands older than this [s] give zero torque.
        gravity_convention: ``'full'`` (commands are full torques) or
            ``'driver_compensated'`` (the driver adds ``g(q)`` to each command).
        start_time_s: simulated time at start [s].
        backend: dynamics backend (see :class:`safety_filter.core.dynamics.Dynamics`).
        coulomb_law: ``'stick_slip'`` (default) or ``'sign'``: how the simulation treats
            Coulomb friction (:class:`safety_filter.simulation.plant.ArmSimulator`).
        command_delay_ticks: ticks between a command's arrival and the tick it acts in.

    Raises:
        SafetyFilterError: an invalid option.
    """

    def __init__(self, model: RobotModel, control_rate_hz: float,
                 internal_rate_hz: float | None = None, payload_mass: float = 0.0,
                 initial_positions: Sequence[float] | None = None,
                 position_noise_std: float = 0.0, velocity_noise_std: float = 0.0,
                 noise_seed: int = 0, latency_s: float = 0.0, command_timeout_s: float = 0.1,
                 gravity_convention: str = 'full', start_time_s: float = 0.0,
                 backend: str = 'auto', coulomb_law: str = 'stick_slip',
                 command_delay_ticks: int = 0) -> None:
        def check(name: str, value: float, positive: bool = False) -> float:
            value = float(value)
            if not math.isfinite(value) or value < 0.0 or (positive and value == 0.0):
                kind = 'positive' if positive else '>= 0'
                raise InvalidValue(name, value, f'finite and {kind}')
            return value

        control_rate_hz = check('control_rate_hz', control_rate_hz, positive=True)
        if internal_rate_hz is None or internal_rate_hz == 0:
            internal_rate_hz = DEFAULT_INTERNAL_RATE_FACTOR * control_rate_hz
        internal_rate_hz = check('internal_rate_hz', internal_rate_hz, positive=True)
        if internal_rate_hz < control_rate_hz:
            raise InvalidValue('internal_rate_hz', internal_rate_hz,
                               f'at least the control rate {control_rate_hz:g}')
        if gravity_convention not in GRAVITY_CONVENTIONS:
            raise InvalidValue('gravity_convention', gravity_convention,
                               f'one of {", ".join(GRAVITY_CONVENTIONS)}')
        self.model = model
        self.n = model.n_joints
        self.control_period_s = 1.0 / control_rate_hz
        self.internal_rate_hz = internal_rate_hz
        self.payload_mass = check('payload_mass', payload_mass)
        self.position_noise_std = check('position_noise_std', position_noise_std)
        self.velocity_noise_std = check('velocity_noise_std', velocity_noise_std)
        self.latency_s = check('latency_s', latency_s)
        self.command_timeout_s = check('command_timeout_s', command_timeout_s, positive=True)
        self.gravity_convention = gravity_convention
        if not (float(command_delay_ticks).is_integer() and command_delay_ticks >= 0):
            raise InvalidValue('command_delay_ticks', command_delay_ticks, 'a whole number >= 0')
        self.command_delay_ticks = int(command_delay_ticks)
        # the latest command at each of the last command_delay_ticks + 1 ticks, oldest first
        self._pipeline: deque[np.ndarray] = deque(maxlen=self.command_delay_ticks + 1)
        if coulomb_law not in COULOMB_LAWS:
            raise InvalidValue('coulomb_law', coulomb_law, f'one of {", ".join(COULOMB_LAWS)}')
        self.simulator = ArmSimulator(model, self.payload_mass, internal_rate_hz, backend,
                                      coulomb_law=coulomb_law)
        q0 = (0.5 * (np.array(model.position_lower) + np.array(model.position_upper))
              if initial_positions is None or len(initial_positions) == 0
              else np.asarray(initial_positions, dtype=float))
        if q0.shape != (self.n,) or not np.all(np.isfinite(q0)):
            raise InvalidValue('initial_positions', q0.tolist(),
                               f'{self.n} finite entries (joints {list(model.joint_names)})')
        self.simulator.reset(q0, None, float(start_time_s))
        self.effort_limit = np.array(model.effort_limit)
        self._rng = np.random.default_rng(int(noise_seed))
        self._command: np.ndarray | None = None
        self._command_time_s = -math.inf
        self.released = False
        self.ticks = 0
        self.stale_ticks = 0  # ticks run at zero torque because the command was stale
        self.invalid_commands = 0
        self.applied_torque = np.zeros(self.n)
        self._history: deque[tuple[float, np.ndarray, np.ndarray, np.ndarray]] = deque()
        self._history.append((self.time_s, self.simulator.q.copy(), self.simulator.v.copy(),
                              self.applied_torque.copy()))

    @property
    def time_s(self) -> float:
        """Simulated time [s]."""
        return self.simulator.time_s

    @property
    def position(self) -> np.ndarray:
        """True joint positions (no noise, no latency)."""
        return self.simulator.q.copy()

    @property
    def velocity(self) -> np.ndarray:
        """True joint velocities (no noise, no latency)."""
        return self.simulator.v.copy()

    def command(self, torque: Sequence[float]) -> bool:
        """Take a torque command (joint order) now; False (and counted) when invalid."""
        u = np.asarray(torque, dtype=float).reshape(-1)
        if u.shape != (self.n,) or not np.all(np.isfinite(u)):
            self.invalid_commands += 1
            return False
        self._command = u
        self._command_time_s = self.time_s
        self.released = True
        return True

    def command_age_s(self) -> float:
        """Age of the latest valid command [s] (inf when none came yet)."""
        return self.time_s - self._command_time_s

    def _torque_to_apply(self) -> np.ndarray:
        if self._command is None or self.command_age_s() > self.command_timeout_s + 1e-12:
            self.stale_ticks += self._command is not None
            self._pipeline.clear()  # commands resume afresh, not with ones from before
            return np.zeros(self.n)
        self._pipeline.append(self._command)
        u = self._pipeline[0]  # the first command stands in until the pipeline has filled
        if self.gravity_convention == 'driver_compensated':
            u = u + self.simulator.dynamics.gravity_torque(self.simulator.q)
        return np.clip(u, -self.effort_limit, self.effort_limit)

    def tick(self) -> Measurement:
        """Apply the latest command over one control period, then measure."""
        period = self.control_period_s
        if self.released:
            self.applied_torque = self._torque_to_apply()
            self.simulator.advance(self.applied_torque, period)
        else:  # brakes on: the clock runs, the arm does not move
            self.applied_torque = np.zeros(self.n)
            self.simulator.time_s += period
        self.ticks += 1
        now = self.time_s
        history = self._history
        history.append((now, self.simulator.q.copy(), self.simulator.v.copy(),
                        self.applied_torque.copy()))
        horizon = now - self.latency_s + 1e-9 * period
        while len(history) > 1 and history[1][0] <= horizon:
            history.popleft()
        stamp, q, v, effort = history[0]
        if self.position_noise_std > 0.0:
            q = q + self._rng.normal(0.0, self.position_noise_std, self.n)
        if self.velocity_noise_std > 0.0:
            v = v + self._rng.normal(0.0, self.velocity_noise_std, self.n)
        return Measurement(stamp, q, v, effort)
