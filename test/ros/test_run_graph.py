"""``safety-filter run-graph``: its exit code says what went wrong, its namespace holds.

The exit-code rule is checked on hand-made results; the rest runs real graphs in this
process over DDS on loopback (a DDS domain of this module's own, drawn from 60..99): a short
sim graph in a namespace, recorded, that keeps its limits (0); the same graph with a filter
whose step raises (1); and the simulated arm's limit bookkeeping on a state and a command
beyond the limits.
"""

from __future__ import annotations

import json
import os
import random
from pathlib import Path
from typing import Any

import numpy as np
import pytest

from safety_filter.cli.demo import graph_exit_code
from safety_filter.errors import ExitCode
from safety_filter.ros.runner import LIMIT_TOLERANCE, GraphResult


def test_exit_code_a_failed_node_first_then_a_broken_limit(capsys: Any) -> None:
    kept = GraphResult(wall_s=1.0, joint_names=['a', 'b'],
                       excursions={'position': [0.0, LIMIT_TOLERANCE], 'velocity': [0.0, 0.0],
                                   'torque': [0.0, 0.0]})
    assert graph_exit_code(kept) == ExitCode.OK == 0
    assert 'kept every limit' in capsys.readouterr().out
    broken = GraphResult(wall_s=1.0, joint_names=['a', 'b'],
                         excursions={'position': [0.0, 0.02], 'velocity': [0.5, 0.0],
                                     'torque': [0.0, 0.0]})
    assert broken.broken_limits == ['b position by 0.02', 'a velocity by 0.5']
    assert graph_exit_code(broken) == ExitCode.LIMIT_BROKEN == 4
    assert 'BROKE LIMITS' in capsys.readouterr().out
    broken.failures.append('/x/safety_filter exited early (code 1)')
    assert graph_exit_code(broken) == ExitCode.FAILED == 1  # the cause, not its effect
    out = capsys.readouterr().out
    assert 'NODE FAILED: /x/safety_filter exited early' in out and 'BROKE LIMITS' in out
    assert graph_exit_code(GraphResult(wall_s=1.0)) == 0  # hardware graph: nothing to check


def test_run_graph_description_gives_every_exit_code() -> None:
    from safety_filter.cli.main import build_parser

    parser = build_parser()
    (commands,) = [a for a in parser._actions if hasattr(a, 'choices') and a.choices
                   and 'run-graph' in a.choices]
    description = commands.choices['run-graph'].description
    for code in ('Exit code 0:', '1: a node failed', '2: bad input', '4: sim graph'):
        assert code in description, code


# ---------------------------------------------------------------------- real graphs
ros = pytest.mark.ros


@pytest.fixture(scope='module')
def domain() -> int:
    pytest.importorskip('rclpy', reason="rclpy is missing: pip install -e '.[ros]'")
    os.environ['ROS_AUTOMATIC_DISCOVERY_RANGE'] = 'LOCALHOST'
    return random.SystemRandom().randint(60, 99)


@pytest.fixture(scope='module')
def arm() -> Any:
    ros_fixtures = pytest.importorskip('ros_fixtures', reason="rclpy is missing: pip install "
                                       "-e '.[ros]'")
    return ros_fixtures.certified_arm('planar2')


@ros
def test_sim_graph_in_a_namespace_keeps_its_limits_and_exits_0(
        arm: Any, domain: int, tmp_path: Path, capsys: Any) -> None:
    from safety_filter.cli.main import main
    from safety_filter.recordings import bags

    namespace = f'/rg_{os.getpid()}'
    bag = tmp_path / 'bag'
    code = main(['run-graph', '--urdf', str(arm.urdf_path), '--limits', str(arm.limits_path),
                 '--certificate', str(arm.default_certificate_path), '--duration', '0.3',
                 '--domain-id', str(domain), '--namespace', namespace, '--output-dir',
                 str(bag), '--executor', 'single_threaded'])
    out = capsys.readouterr().out
    assert code == 0, out
    assert 'kept every limit' in out and f'{namespace}/safety_filter' in out
    # Recorded under the namespace, with the status field names (latched) beside the
    # records: the bag reads without knowing the robot.
    summary = bags.topic_summary(bag)
    assert summary[f'{namespace}/joint_states'].count > 100
    assert summary[f'{namespace}/safety_filter/status_fields'].count == 1
    status = bags.read_status(bag, f'{namespace}/safety_filter/status')
    assert len(status['step']) > 100
    assert set(status['mode']) <= {0.0, 1.0, 2.0}
    assert np.all(np.diff(status['step']) == 1)


@ros
def test_a_node_that_raises_makes_the_graph_exit_1(
        arm: Any, domain: int, monkeypatch: pytest.MonkeyPatch, capsys: Any) -> None:
    from safety_filter.cli.main import main
    from safety_filter.ros.filter_node import SafetyFilterNode

    original = SafetyFilterNode._run_step
    calls = {'n': 0}

    def failing_step(self: Any, now: float) -> None:
        calls['n'] += 1
        if calls['n'] > 50:
            raise RuntimeError('injected failure of the filter step')
        original(self, now)

    monkeypatch.setattr(SafetyFilterNode, '_run_step', failing_step)
    code = main(['run-graph', '--urdf', str(arm.urdf_path), '--limits', str(arm.limits_path),
                 '--certificate', str(arm.default_certificate_path), '--duration', '5',
                 '--domain-id', str(domain), '--executor', 'single_threaded'])
    out = capsys.readouterr().out
    assert code == ExitCode.FAILED, out
    assert 'NODE FAILED' in out and 'injected failure of the filter step' in out
    assert 'in failing_step' in out  # where it was raised


@ros
def test_simulated_arm_keeps_the_largest_excursion_past_each_limit(
        arm: Any, domain: int, tmp_path: Path) -> None:
    import rclpy
    from std_msgs.msg import Float64MultiArray

    from safety_filter.ros.sim_arm_node import SimArmNode

    model = arm.model
    start = np.array(model.position_upper) + np.array([0.05, 0.0])  # past a limit already
    start[1] = 0.5 * (model.position_lower[1] + model.position_upper[1])
    report = tmp_path / 'sim_report.json'
    context = rclpy.context.Context()
    rclpy.init(context=context, domain_id=domain)
    try:
        node = SimArmNode(context=context, cli_args=[
            '--ros-args', '-p', f'urdf_path:={arm.urdf_path}', '-p',
            f'limits_path:={arm.limits_path}', '-p',
            f'initial_positions:=[{float(start[0])!r}, {float(start[1])!r}]', '-p',
            f'report_path:={report}'])
        try:
            assert not np.any(node.excursions['position'])  # nothing counts before release
            command = np.array([0.0, 3.0 * model.effort_limit[1]])
            node._on_command(Float64MultiArray(data=command.tolist()))
            for _ in range(3):
                node._tick()
            excursions = node.excursions
            assert excursions['position'][0] > 0.04 and excursions['position'][1] == 0.0
            np.testing.assert_allclose(excursions['torque'],
                                       [0.0, 2.0 * model.effort_limit[1]])
            node.close()  # the executable's way out: the report file
            written = json.loads(report.read_text(encoding='utf-8'))
            assert written['joint_names'] == list(model.joint_names)
            assert written['excursions']['torque'][1] == pytest.approx(
                2.0 * model.effort_limit[1])
            result = GraphResult(wall_s=0.0)
            result._take_sim_report(written)
            assert [b.split()[:2] for b in result.broken_limits] == [
                [model.joint_names[0], 'position'], [model.joint_names[1], 'torque']]
        finally:
            node.destroy_node()
    finally:
        context.try_shutdown()


@ros
def test_hardware_graph_takes_the_robot_from_a_latched_description(
        arm: Any, domain: int, capsys: Any) -> None:
    """run-graph --graph hardware --robot-description-topic: the filter configures from the
    URDF that a robot_state_publisher stand-in published before the graph started."""
    import rclpy
    from rclpy.qos import DurabilityPolicy, QoSProfile, ReliabilityPolicy
    from std_msgs.msg import String

    from safety_filter.cli.main import main

    namespace = f'/rg_hw_{os.getpid()}'
    context = rclpy.context.Context()
    rclpy.init(context=context, domain_id=domain)
    try:
        publisher_node = rclpy.create_node('description_stand_in', context=context,
                                           namespace=namespace)
        publisher = publisher_node.create_publisher(
            String, 'robot_description',
            QoSProfile(depth=1, reliability=ReliabilityPolicy.RELIABLE,
                       durability=DurabilityPolicy.TRANSIENT_LOCAL))
        publisher.publish(String(data=Path(arm.urdf_path).read_text(encoding='utf-8')))
        code = main(['run-graph', '--graph', 'hardware', '--robot-description-topic',
                     'robot_description', '--limits', str(arm.limits_path), '--certificate',
                     str(arm.default_certificate_path), '--namespace', namespace,
                     '--duration', '1', '--domain-id', str(domain)])
        publisher_node.destroy_node()
    finally:
        context.try_shutdown()
    out = capsys.readouterr().out
    assert code == ExitCode.OK, out
    assert f'ros2 lifecycle set {namespace}/safety_filter activate' in out
    assert 'NODE FAILED' not in out
