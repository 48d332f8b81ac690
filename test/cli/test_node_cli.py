"""``safety-filter node``: the filter node started from the command line, in a subprocess.

The node process and this test process talk over DDS on loopback (their own domain). The
test feeds joint states and nominal torques, receives filtered torques, replays the node's
status records through a separate SafetyFilter, then ends the node with SIGINT and checks
that it exits cleanly (exit code 0, shutdown transition, no traceback).
"""

from __future__ import annotations

import os
import signal
import subprocess
import sys
import time
from pathlib import Path
from typing import Any

import numpy as np
import pytest
from ros_fixtures import (
    CertifiedArm,
    Harness,
    certified_arm,
    isolate_ros_domain,
    joint_state,
    match_filtered_to_statuses,
    mid_range,
    nominal,
    parse_status,
    replay_statuses,
    unique_namespace,
    wait_for,
)

pytestmark = [pytest.mark.ros, pytest.mark.slow]

REPO = Path(__file__).resolve().parents[2]
START_TIMEOUT_S = 120.0  # imports take a while on a loaded machine


@pytest.fixture(scope='module')
def domain_id() -> int:
    return isolate_ros_domain()


@pytest.fixture(scope='session')
def planar2() -> CertifiedArm:
    return certified_arm('planar2')


class NodeProcess:
    """``python -m safety_filter.cli.main node ...`` with its output in files."""

    def __init__(self, arguments: list[str], folder: Path) -> None:
        env = dict(os.environ)
        env['PYTHONPATH'] = os.pathsep.join(
            [str(REPO)] + [p for p in [env.get('PYTHONPATH')] if p])
        env['PYTHONUNBUFFERED'] = '1'
        self.stdout_path = folder / 'node_stdout.txt'
        self.stderr_path = folder / 'node_stderr.txt'
        with open(self.stdout_path, 'wb') as out, open(self.stderr_path, 'wb') as err:
            self.process = subprocess.Popen(
                [sys.executable, '-m', 'safety_filter.cli.main', 'node', *arguments],
                stdout=out, stderr=err, env=env, cwd=folder)

    def output(self) -> str:
        return (self.stdout_path.read_text(errors='replace')
                + self.stderr_path.read_text(errors='replace'))

    def interrupt(self, timeout: float = 30.0) -> int:
        self.process.send_signal(signal.SIGINT)
        return self.process.wait(timeout=timeout)

    def kill(self) -> None:
        if self.process.poll() is None:
            self.process.kill()
            self.process.wait(timeout=10.0)


@pytest.fixture
def node_process(tmp_path: Path) -> Any:
    processes: list[NodeProcess] = []

    def start(arguments: list[str]) -> NodeProcess:
        process = NodeProcess(arguments, tmp_path)
        processes.append(process)
        return process

    yield start
    for process in processes:
        process.kill()


@pytest.mark.parametrize('executor', ['single_threaded', 'events'])
def test_cli_node_filters_and_exits_cleanly_on_sigint(
        executor: str, planar2: CertifiedArm, domain_id: int, node_process: Any) -> None:
    arm = planar2
    # The certificate file as `safety-filter certify` writes it (keyed /**: any namespace),
    # the URDF and limits by path. single_threaded: the node in the root namespace.
    namespace = '' if executor == 'single_threaded' else unique_namespace()
    certificate = arm.default_certificate_path
    node = node_process(['--certificate', str(certificate), '--urdf', str(arm.urdf_path),
                         '--limits', str(arm.limits_path), '--executor', executor,
                         '--activate-at-start', '--namespace', namespace or '/',
                         '--ros-args', '-p', 'diagnostics_rate_hz:=5.0'])
    harness = Harness(domain_id, namespace)
    try:
        harness.wait_for_subscribers(START_TIMEOUT_S)
        harness.wait_for_publishers(START_TIMEOUT_S)
        assert harness.get_state() == 'active'  # --activate-at-start
        names = list(arm.model.joint_names)
        gravity = arm.reference_filter().dynamics

        def source(k: int) -> tuple[Any, Any]:
            q = mid_range(arm.model) + 0.5 * np.sin([1e-3 * k, 2e-3 * k])
            v = 0.3 * np.cos([1e-3 * k, 2e-3 * k])
            u = gravity.gravity_torque(q) + np.array([8.0, 4.0]) * np.sin(
                [3e-3 * k, 5e-3 * k]) * (1.0 + 4.0 * (k % 2))
            return joint_state(names, q, v), nominal(u)

        started = time.monotonic()
        harness.start_source(source)
        wait_for(lambda: False, 3.0)
        harness.set_source(None)
        assert len(harness.filtered.since(started)) >= 100, node.output()
        diagnostics = harness.latest_diagnostic(started)
        assert diagnostics is not None
        values = {kv.key: kv.value for kv in diagnostics.values}
        assert values['certificate_id'] == arm.certificate.certificate_id

        assert harness.change_state('deactivate')  # stop outputs, then compare
        wait_for(lambda: False, 0.5)
        records = [parse_status(m, names) for m in harness.status.messages()]
        assert replay_statuses(records, arm.reference_filter()) >= 100
        # The last message is the hold command sent on deactivate (not a step).
        assert match_filtered_to_statuses(harness.filtered.messages()[:-1], records) >= 100
    finally:
        harness.close()
    code = node.interrupt()
    output = node.output()
    assert code == 0, output
    assert 'Traceback' not in output, output
    assert 'configured' in output and 'active: filtering' in output


def test_cli_node_no_autostart_waits_unconfigured(
        planar2: CertifiedArm, domain_id: int, node_process: Any) -> None:
    arm = planar2
    namespace = unique_namespace()
    node = node_process(['--certificate', str(arm.certificate_path), '--demo', 'planar2',
                         '--no-autostart', '--ros-args', '-r', f'__ns:={namespace}'])
    harness = Harness(domain_id, namespace)
    try:
        assert harness.get_state_client.wait_for_service(timeout_sec=START_TIMEOUT_S), \
            node.output()
        assert harness.get_state() == 'unconfigured'
        assert harness.change_state('configure'), node.output()
        assert harness.get_state() == 'inactive'
    finally:
        harness.close()
    assert node.interrupt() == 0, node.output()
    assert 'Traceback' not in node.output()


def test_cli_node_exits_with_failure_for_another_models_certificate(
        planar2: CertifiedArm, domain_id: int, node_process: Any) -> None:
    node = node_process(['--certificate', str(planar2.default_certificate_path),
                         '--demo', 'bench6'])
    code = node.process.wait(timeout=START_TIMEOUT_S)
    output = node.output()
    assert code == 1, output
    assert 'configure failed' in output and 'hash' in output, output
    assert 'Traceback' not in output, output


def test_cli_node_starts_configured_and_inactive_by_default(
        planar2: CertifiedArm, domain_id: int, node_process: Any) -> None:
    arm = planar2
    namespace = unique_namespace()
    node = node_process(['--certificate', str(arm.certificate_path), '--urdf',
                         str(arm.urdf_path), '--limits', str(arm.limits_path),
                         '--ros-args', '-r', f'__ns:={namespace}'])
    harness = Harness(domain_id, namespace)
    try:
        assert harness.get_state_client.wait_for_service(timeout_sec=START_TIMEOUT_S), \
            node.output()
        assert wait_for(lambda: harness.get_state() == 'inactive', 30.0), node.output()
        names = list(arm.model.joint_names)
        q = mid_range(arm.model)
        harness.start_source(lambda k: (joint_state(names, q, np.zeros(2)), nominal([0, 0])))
        wait_for(lambda: False, 1.0)
        assert len(harness.filtered) == 0, 'an inactive node published a torque'
    finally:
        harness.close()
    assert node.interrupt() == 0, node.output()


@pytest.mark.parametrize('missing', ['robot', 'limits', 'certificate'])
@pytest.mark.parametrize('command', ['node', 'hardware'])
def test_no_default_robot_or_certificate_for_a_real_arm(
        command: str, missing: str, planar2: CertifiedArm, capsys: Any) -> None:
    """`safety-filter node` and `run-graph --graph hardware` never fall back to a demo arm
    or certificate: without the robot, its limits or the certificate they exit 2 and say
    what is missing."""
    from safety_filter.cli.main import main
    from safety_filter.errors import ExitCode

    arm = planar2
    options = {'robot': ['--urdf', str(arm.urdf_path)],
               'limits': ['--limits', str(arm.limits_path)],
               'certificate': ['--certificate', str(arm.certificate_path)]}
    arguments = [part for key, value in options.items() if key != missing for part in value]
    prefix = ['node'] if command == 'node' else ['run-graph', '--graph', 'hardware']
    assert main([*prefix, *arguments]) == ExitCode.BAD_INPUT
    err = capsys.readouterr().err
    expected = {'robot': '--urdf', 'limits': '--limits', 'certificate': '--certificate'}
    assert expected[missing] in err, err
    if missing != 'certificate' or command == 'hardware':
        assert 'error:' in err and '--demo' in err, err


def test_robot_description_text_instead_of_a_urdf_file(
        planar2: CertifiedArm, domain_id: int, node_process: Any) -> None:
    arm = planar2
    namespace = unique_namespace()
    node = node_process(['--certificate', str(arm.certificate_path), '--robot-description',
                         arm.urdf_path.read_text(encoding='utf-8'), '--limits',
                         str(arm.limits_path), '--ros-args', '-r', f'__ns:={namespace}'])
    harness = Harness(domain_id, namespace)
    try:
        assert harness.get_state_client.wait_for_service(timeout_sec=START_TIMEOUT_S), \
            node.output()
        assert wait_for(lambda: harness.get_state() == 'inactive', 30.0), node.output()
    finally:
        harness.close()
    assert node.interrupt() == 0, node.output()


def test_the_default_executor_is_the_single_threaded_one() -> None:
    """Not the experimental EventsExecutor on the safety path (it stays an option)."""
    from safety_filter.cli.main import build_parser
    from safety_filter.ros.filter_node import _parse_own_arguments

    assert _parse_own_arguments([]).executor == 'single_threaded'
    assert _parse_own_arguments(['--executor', 'events']).executor == 'events'
    args = build_parser().parse_args(['node', '--certificate', 'c.yaml', '--demo', 'planar2'])
    assert args.executor == 'single_threaded'
