"""A simulated torque-controlled arm as a ROS 2 node (``sim_arm``): the plant of the demo.

The node wraps :class:`safety_filter.simulation.sim_driver.SimulatedDriver` (which wraps the
package's
one simulation, :class:`safety_filter.simulation.plant.ArmSimulator`): each control period it
applies
the latest torque command, integrates the arm's dynamics over the period with RK4 at
``internal_rate_hz`` and publishes the measured state.

Topics
------
* ``sim_effort_command`` (subscribed, ``std_msgs/Float64MultiArray``): torques in the model's
  joint order, as a ``ros2_control`` effort controller takes them. The driver **saturates**
  them to the effort limits; a command of the wrong length or with non-finite values is
  ignored (counted). Until the first valid command the arm is held still (brakes on) while
  the clock runs. A command older than ``command_timeout_s`` (simulated time) is not used:
  on this command timeout the driver applies **zero torque**, so the arm moves under gravity
  alone, as a real arm with torque off and no brakes would, until commands resume.
* ``joint_states`` (published, ``sensor_msgs/JointState``, once per control period): names,
  position, velocity and ``effort`` = the torque applied over the last period (saturated).
  Optional Gaussian noise (``position_noise_std``, ``velocity_noise_std``, seeded by
  ``noise_seed``) and latency (``latency_s``: the state measured that long ago is published,
  stamped with the time it was measured).
* ``/clock`` (published, ``rosgraph_msgs/Clock``, when ``publish_clock`` is true): the
  simulated time, so that nodes started with ``use_sim_time: true`` follow it.

Time
----
Simulated time starts at the wall-clock time the node starts and advances by exactly one
control period per tick; stamps carry it. The ticks come from a steady (wall) timer at the
control rate (``use_sim_time`` does not apply to this node: it *makes* the time). When a
tick takes longer than the period (a slow machine, a 1 kHz loop in Python), simulated time
runs slower than wall time; the other nodes stay consistent when they use ``/clock``.

With ``lockstep: true`` the arm waits, after publishing a state, for the command that answers
it (any valid command received after the publish), and ticks as soon as it arrives, like a
lock-stepped simulator. If none comes within ``lockstep_timeout_s`` of wall time it ticks
with the command it holds (counted). Use it with a filter triggered by joint states
(``trigger: joint_state``): then every period's torque is computed from that period's state,
the zero-order hold the certificate's sampled-data margin assumes, however slow the machine.

``duration_s`` > 0 ends the simulation that long (simulated time) after the arm was
released: the node stops publishing and :attr:`SimArmNode.finished` becomes true (the
executable then exits).

Limits
------
The node keeps the largest excursion past the arm's limits since its release
(:attr:`SimArmNode.excursions`): of the true position and velocity after each tick (no
noise) and of each valid torque command before the driver saturates it, per joint, in the
limits' units (0: kept). ``safety-filter run-graph`` turns them into its exit code. With
``report_path`` set, the node writes them and its counters as JSON to that file when it
finishes or stops (:meth:`SimArmNode.report`), for a runner in another process.

Parameters (read at start): ``urdf_path``, ``limits_path`` (the robot), ``payload_mass``
[kg] (negative: the top of the payload range), ``link_mass_scale`` (1: every link mass and
inertia as in the URDF; the demo uses 1.1 so that the arm is not the filter's model),
``control_rate_hz`` (1000), ``internal_rate_hz`` (0: ten times the control rate),
``initial_positions`` (empty: the middle of each range), ``position_noise_std`` [rad],
``velocity_noise_std`` [rad/s], ``noise_seed``, ``latency_s``, ``command_delay_ticks`` (-1:
the limits file's declared delay), ``command_timeout_s`` (0.1 s),
``gravity_convention`` (``'full'``, or ``'driver_compensated'``: the driver adds ``g(q)`` to
each command), ``lockstep`` (false), ``lockstep_timeout_s`` (0.1 s), ``publish_clock``
(false), ``duration_s`` (0: run until stopped), ``report_path`` ('': no report file).
"""

from __future__ import annotations

import array
import json
import math
import os
import sys
import time
from collections.abc import Sequence
from typing import Any

import numpy as np
from rclpy.clock import Clock, ClockType
from rclpy.exceptions import ParameterUninitializedException
from rclpy.node import Node
from rclpy.parameter import Parameter
from rosgraph_msgs.msg import Clock as ClockMessage
from sensor_msgs.msg import JointState
from std_msgs.msg import Float64MultiArray

from safety_filter.core.model_uncertainty import model_with_inertials
from safety_filter.errors import InvalidValue
from safety_filter.ros._common import describe, latest_qos, load_model, spin_node, state_qos
from safety_filter.simulation.sim_driver import GRAVITY_CONVENTIONS, SimulatedDriver

NODE_NAME = 'sim_arm'
# Not the hardware launch's default command topic (effort_command): a sim graph's filter
# and a real arm's driver cannot meet on it by accident.
COMMAND_TOPIC = 'sim_effort_command'
JOINT_STATES_TOPIC = 'joint_states'
CLOCK_TOPIC = '/clock'


class SimArmNode(Node):
    """The node ``sim_arm`` (see the module docstring).

    Args:
        node_name: the node's name.
        **kwargs: passed to :class:`rclpy.node.Node` (``context``, ``cli_args``, ...).

    Raises:
        SafetyFilterError: invalid parameters (the robot cannot be loaded, bad options).
    """

    def __init__(self, node_name: str = NODE_NAME, **kwargs: Any) -> None:
        super().__init__(node_name, **kwargs)
        declare = self.declare_parameter
        declare('urdf_path', '', describe('path of the robot URDF'))
        declare('limits_path', '', describe('limits file (YAML) of the robot'))
        declare('payload_mass', 0.0, describe(
            "payload on the tip [kg]; negative: the top of the limits file's payload range"))
        declare('link_mass_scale', 1.0, describe(
            'every link mass and inertia times this: an arm heavier or lighter than its URDF'))
        declare('control_rate_hz', 1000.0, describe('ticks per second [Hz]'))
        declare('internal_rate_hz', 0.0, describe(
            'RK4 steps per second [Hz]; 0: ten times the control rate'))
        declare('initial_positions', Parameter.Type.DOUBLE_ARRAY, describe(
            'start positions in joint order [rad or m]; empty: mid-range'))
        declare('position_noise_std', 0.0, describe('position noise (std) [rad or m]'))
        declare('velocity_noise_std', 0.0, describe('velocity noise (std) [rad/s or m/s]'))
        declare('noise_seed', 0, describe('seed of the noise'))
        declare('latency_s', 0.0, describe('age of the published state [s]'))
        declare('command_delay_ticks', -1, describe(
            "ticks between a command's arrival and the tick it acts in; -1: the limits file's "
            'declared delay (uncertainty: delay_periods)'))
        declare('command_timeout_s', 0.1, describe(
            'command timeout: older commands give zero torque [s of simulated time]'))
        declare('gravity_convention', 'full', describe(
            "'full' or 'driver_compensated' (the driver adds g(q) to each command)"))
        declare('lockstep', False, describe(
            'tick as soon as the command answering the last state arrives'))
        declare('lockstep_timeout_s', 0.1, describe(
            'lockstep: tick with the held command after this long without one [s, wall]'))
        declare('publish_clock', False, describe('publish the simulated time on /clock'))
        declare('duration_s', 0.0, describe(
            'stop this long after the arm was released [s, simulated]; 0: never'))
        declare('report_path', '', describe(
            'write the counters and limit excursions as JSON here when finished or stopped'))

        def value(name: str) -> Any:
            return self.get_parameter(name).value

        model = load_model(str(value('urdf_path')), str(value('limits_path')))
        scale = float(value('link_mass_scale'))
        if not (math.isfinite(scale) and scale > 0.0):
            raise InvalidValue('link_mass_scale', scale, 'a positive number')
        if scale != 1.0:
            model = model_with_inertials(model, body_mass=np.array(model.body_mass) * scale,
                                         body_inertia=np.array(model.body_inertia) * scale)
        convention = str(value('gravity_convention'))
        if convention not in GRAVITY_CONVENTIONS:
            raise InvalidValue('gravity_convention', convention,
                               f'one of {", ".join(GRAVITY_CONVENTIONS)}')
        rate = float(value('control_rate_hz'))
        try:
            initial = value('initial_positions')
        except ParameterUninitializedException:
            initial = None
        self._start_ns = self.get_clock().now().nanoseconds  # simulated time starts now
        self.driver = SimulatedDriver(
            model, rate, internal_rate_hz=float(value('internal_rate_hz')) or None,
            payload_mass=(float(value('payload_mass')) if float(value('payload_mass')) >= 0.0
                          else model.payload.mass_max),
            initial_positions=list(initial) if initial is not None else None,
            position_noise_std=float(value('position_noise_std')),
            velocity_noise_std=float(value('velocity_noise_std')),
            noise_seed=int(value('noise_seed')), latency_s=float(value('latency_s')),
            command_timeout_s=float(value('command_timeout_s')), gravity_convention=convention,
            command_delay_ticks=(int(value('command_delay_ticks'))
                                 if int(value('command_delay_ticks')) >= 0
                                 else int(model.uncertainty.delay_periods)))
        self.model = model
        self._lockstep = bool(value('lockstep'))
        self._lockstep_timeout = float(value('lockstep_timeout_s'))
        self._duration = float(value('duration_s'))
        if not (math.isfinite(self._duration) and self._duration >= 0.0):
            raise InvalidValue('duration_s', self._duration, 'finite and >= 0')
        if not (math.isfinite(self._lockstep_timeout) and self._lockstep_timeout > 0.0):
            raise InvalidValue('lockstep_timeout_s', self._lockstep_timeout, 'a positive number')
        self.finished = False
        self.lockstep_timeouts = 0
        self._report_path = str(value('report_path'))
        n = model.n_joints
        self.excursions = {'position': np.zeros(n), 'velocity': np.zeros(n),
                           'torque': np.zeros(n)}
        self._release_time_s: float | None = None
        self._answered = False  # a command arrived since the last publish
        self._published_at = time.monotonic()
        self._names = list(model.joint_names)

        self._state_pub = self.create_publisher(JointState, JOINT_STATES_TOPIC, state_qos())
        self._clock_pub = (self.create_publisher(ClockMessage, CLOCK_TOPIC, 10)
                           if bool(value('publish_clock')) else None)
        self.create_subscription(Float64MultiArray, COMMAND_TOPIC, self._on_command,
                                 latest_qos())
        self._timer = self.create_timer(1.0 / rate, self._on_timer,
                                        clock=Clock(clock_type=ClockType.STEADY_TIME))
        self._publish_clock()
        self.get_logger().info(
            f'simulating {model.name!r} ({model.n_joints} joints) at {rate:g} Hz, RK4 at '
            f'{self.driver.internal_rate_hz:g} Hz, payload {self.driver.payload_mass:g} kg'
            f'{", lockstep" if self._lockstep else ""}; held still until the first command '
            f'on {self.resolve_topic_name(COMMAND_TOPIC)}')

    # ------------------------------------------------------------------ time
    def _stamp_ns(self, time_s: float) -> int:
        return self._start_ns + int(round(time_s * 1e9))

    @property
    def simulated_time_s(self) -> float:
        """Simulated time since the node started [s]."""
        return self.driver.time_s

    @property
    def released_for_s(self) -> float:
        """Simulated time since the arm was released [s] (0 before)."""
        if self._release_time_s is None:
            return 0.0
        return self.driver.time_s - self._release_time_s

    def _publish_clock(self) -> None:
        if self._clock_pub is not None:
            msg = ClockMessage()
            sec, nanosec = divmod(self._stamp_ns(self.driver.time_s), 1_000_000_000)
            msg.clock.sec, msg.clock.nanosec = sec, nanosec
            self._clock_pub.publish(msg)

    # ------------------------------------------------------------------ callbacks
    def _on_command(self, msg: Float64MultiArray) -> None:
        if self.finished:
            return
        was_released = self.driver.released
        if not self.driver.command(msg.data):
            self.get_logger().warning(
                f'ignoring a command of {len(msg.data)} values (need {self.driver.n} finite '
                'torques in joint order)', throttle_duration_sec=2.0)
            return
        if not was_released:
            self._release_time_s = self.driver.time_s
            self.get_logger().info('first command received: arm released')
        # The command as sent, before the driver saturates it: a torque beyond the limits
        # is a broken limit of the command source (the filter), even though it is clipped.
        np.maximum(self.excursions['torque'],
                   np.abs(np.asarray(msg.data, dtype=float)) - self.model.effort_limit,
                   out=self.excursions['torque'])
        self._answered = True
        if self._lockstep:
            self._tick()

    def _on_timer(self) -> None:
        if self.finished:
            return
        if self._lockstep and self.driver.released and not self._answered:
            if time.monotonic() - self._published_at < self._lockstep_timeout:
                return
            self.lockstep_timeouts += 1
        self._tick()

    def _tick(self) -> None:
        measurement = self.driver.tick()
        self._answered = False
        if self._release_time_s is not None:
            model, driver = self.model, self.driver
            q, v = driver.position, driver.velocity
            np.maximum(self.excursions['position'], np.maximum(
                q - model.position_upper, model.position_lower - q),
                out=self.excursions['position'])
            np.maximum(self.excursions['velocity'], np.abs(v) - model.velocity_limit,
                       out=self.excursions['velocity'])
        self._publish_clock()
        msg = JointState()
        sec, nanosec = divmod(self._stamp_ns(measurement.stamp_s), 1_000_000_000)
        msg.header.stamp.sec, msg.header.stamp.nanosec = sec, nanosec
        msg.name = self._names
        msg.position = array.array('d', measurement.position.tobytes())
        msg.velocity = array.array('d', measurement.velocity.tobytes())
        msg.effort = array.array('d', measurement.effort.tobytes())
        self._state_pub.publish(msg)
        self._published_at = time.monotonic()
        if self._duration > 0.0 and self._release_time_s is not None \
                and self.released_for_s >= self._duration - 1e-9:
            self.finish()

    def finish(self) -> None:
        """Stop simulating (no more ticks or publications)."""
        if self.finished:
            return
        self.finished = True
        self._timer.cancel()
        driver = self.driver
        self.get_logger().info(
            f'finished after {self.released_for_s:.3f} s of simulated motion: {driver.ticks} '
            f'ticks, {driver.stale_ticks} at zero torque (stale command), '
            f'{driver.invalid_commands} invalid commands, {self.lockstep_timeouts} lockstep '
            'timeouts')
        self.write_report()

    def report(self) -> dict[str, Any]:
        """Counters and limit excursions, JSON-ready: ``joint_names``, ``ticks``,
        ``stale_ticks``, ``invalid_commands``, ``lockstep_timeouts``, ``released_for_s``,
        ``finished``, ``excursions`` (``{'position'|'velocity'|'torque': [per joint]}``)."""
        driver = self.driver
        return {'joint_names': list(self._names), 'ticks': int(driver.ticks),
                'stale_ticks': int(driver.stale_ticks),
                'invalid_commands': int(driver.invalid_commands),
                'lockstep_timeouts': int(self.lockstep_timeouts),
                'released_for_s': float(self.released_for_s), 'finished': bool(self.finished),
                'excursions': {kind: [float(x) for x in values]
                               for kind, values in self.excursions.items()}}

    def write_report(self) -> None:
        """Write :meth:`report` to ``report_path`` (if set), replacing the file at once."""
        if not self._report_path:
            return
        temporary = f'{self._report_path}.tmp'
        with open(temporary, 'w', encoding='utf-8') as handle:
            json.dump(self.report(), handle)
        os.replace(temporary, self._report_path)

    def close(self) -> None:
        """Called by the executable on the way out: the report, if not written yet."""
        if not self.finished:
            self.write_report()


# ---------------------------------------------------------------------- executable
def main(args: Sequence[str] | None = None) -> int:
    """Run ``sim_arm`` until SIGINT/SIGTERM, or until ``duration_s`` of simulated motion."""
    return spin_node(lambda context: SimArmNode(context=context), args,
                     done=lambda node: node.finished)


if __name__ == '__main__':
    sys.exit(main())
