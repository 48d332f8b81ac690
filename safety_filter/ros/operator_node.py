"""A careless operator as a ROS 2 node (``careless_operator``): the demo's command source.

It emulates a person teleoperating the arm carelessly, with the seeded behaviour schedule of
:class:`safety_filter.simulation.careless_operator.CarelessOperator` (PD toward targets beyond the
limits, sudden
full-effort jerks, a slack hold that lets gravity act, large sinusoids; a few seconds each,
cycling). The same ``seed`` gives the same schedule, and the same torque for the same state.

Topics
------
* ``joint_states`` (subscribed, ``sensor_msgs/JointState``): the arm's state, matched by joint
  name. Nothing is published before the first joint state that has every joint.
* ``nominal_torque`` (published, ``std_msgs/Float64MultiArray``, at ``rate_hz`` on the node's
  clock, so on simulated time under ``use_sim_time``): torques in the model's joint order.
  The schedule's time starts at the first publication.

Parameters (read at start): ``urdf_path``, ``limits_path`` (the robot), ``payload_mass`` [kg]
(what the operator's gravity feedforward assumes), ``rate_hz`` (100), ``seed`` (0),
``segment_min_s`` and ``segment_max_s`` (2 and 4 s), ``behaviours`` (the behaviours to cycle
through; default all), ``output_convention`` (``'full'``, or ``'driver_compensated'`` to
leave gravity to the driver).

This node exists to show what the filter does against a careless command source. Never
connect it to a real arm without the filter in between.
"""

from __future__ import annotations

import array
import sys
from collections.abc import Sequence
from typing import Any

import numpy as np
from rclpy.node import Node
from sensor_msgs.msg import JointState
from std_msgs.msg import Float64MultiArray, MultiArrayDimension

from safety_filter.errors import InvalidValue
from safety_filter.ros._common import (
    JointOrder,
    describe,
    latest_qos,
    load_model,
    spin_node,
    state_qos,
)
from safety_filter.simulation.careless_operator import BEHAVIOURS, CarelessOperator

NODE_NAME = 'careless_operator'
NOMINAL_TOPIC = 'nominal_torque'
JOINT_STATES_TOPIC = 'joint_states'


class CarelessOperatorNode(Node):
    """The node ``careless_operator`` (see the module docstring).

    Args:
        node_name: the node's name.
        **kwargs: passed to :class:`rclpy.node.Node` (``context``, ``cli_args``, ...).

    Raises:
        SafetyFilterError: invalid parameters.
    """

    def __init__(self, node_name: str = NODE_NAME, **kwargs: Any) -> None:
        super().__init__(node_name, **kwargs)
        declare = self.declare_parameter
        declare('urdf_path', '', describe('path of the robot URDF'))
        declare('limits_path', '', describe('limits file (YAML) of the robot'))
        declare('payload_mass', 0.0, describe('payload the gravity feedforward assumes [kg]'))
        declare('rate_hz', 100.0, describe('publication rate [Hz]'))
        declare('seed', 0, describe('seed of the behaviour schedule'))
        declare('segment_min_s', 2.0, describe('shortest behaviour segment [s]'))
        declare('segment_max_s', 4.0, describe('longest behaviour segment [s]'))
        declare('behaviours', list(BEHAVIOURS), describe(
            f'behaviours to cycle through, a subset of {list(BEHAVIOURS)}'))
        declare('output_convention', 'full', describe(
            "'full' torques, or 'driver_compensated' (gravity left to the driver)"))

        def value(name: str) -> Any:
            return self.get_parameter(name).value

        model = load_model(str(value('urdf_path')), str(value('limits_path')))
        rate = float(value('rate_hz'))
        if not rate > 0.0:
            raise InvalidValue('rate_hz', rate, 'a positive number')
        self.operator = CarelessOperator(
            model, seed=int(value('seed')),
            segment_s=(float(value('segment_min_s')), float(value('segment_max_s'))),
            behaviours=list(value('behaviours')),
            output_convention=str(value('output_convention')),
            payload_mass=float(value('payload_mass')))
        self.model = model
        self.published = 0
        self._order = JointOrder(model.joint_names)
        self._q: np.ndarray | None = None
        self._v: np.ndarray | None = None
        self._start_ns: int | None = None
        self._segment = -1
        self._msg = Float64MultiArray()
        n = model.n_joints
        self._msg.layout.dim = [MultiArrayDimension(label='joints', size=n, stride=n)]
        self._publisher = self.create_publisher(Float64MultiArray, NOMINAL_TOPIC, state_qos())
        self.create_subscription(JointState, JOINT_STATES_TOPIC, self._on_joint_state,
                                 latest_qos())
        self.create_timer(1.0 / rate, self._on_timer)
        self.get_logger().info(
            f'careless operator for {model.name!r} at {rate:g} Hz, seed {self.operator.seed}, '
            f'behaviours {list(self.operator.behaviours)}; publishing on '
            f'{self.resolve_topic_name(NOMINAL_TOPIC)} once joint states arrive')

    def _on_joint_state(self, msg: JointState) -> None:
        index = self._order.index(msg.name)
        if index is None or len(msg.position) != len(msg.name) \
                or len(msg.velocity) != len(msg.name):
            return
        self._q = np.asarray(msg.position)[index]
        self._v = np.asarray(msg.velocity)[index]

    def _on_timer(self) -> None:
        if self._q is None or self._v is None:
            return
        now = self.get_clock().now().nanoseconds
        if self._start_ns is None:
            self._start_ns = now
        t = 1e-9 * (now - self._start_ns)
        segment = self.operator.segment_at(t)
        if segment.index != self._segment:
            self._segment = segment.index
            self.get_logger().info(
                f'segment {segment.index}: {segment.behaviour} for {segment.duration_s:.1f} s')
        torque = self.operator(t, self._q, self._v)
        self._msg.data = array.array('d', np.asarray(torque, dtype=float).tobytes())
        self._publisher.publish(self._msg)
        self.published += 1


def main(args: Sequence[str] | None = None) -> int:
    """Run ``careless_operator`` until SIGINT/SIGTERM."""
    return spin_node(lambda context: CarelessOperatorNode(context=context), args)


if __name__ == '__main__':
    sys.exit(main())
