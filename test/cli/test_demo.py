"""The demo graph end to end: real rclpy nodes over DDS on loopback, recorded to bags.

A short ``safety-filter demo`` on planar2 (3 s of simulated motion per run, with a
certificate from the session's reduced-settings certification) must break at least one limit
without the filter, keep all of them with it, and leave bags with the expected topics and
message counts. The graph runner is also run across processes and stopped with SIGINT.
Each module gets its own DDS domain, with discovery limited to this machine.
"""

from __future__ import annotations

import os
import shutil
import signal
import subprocess
import sys
import time
from pathlib import Path

import numpy as np
import pytest

pytest.importorskip('rclpy', reason='rclpy is missing: install the ROS 2 wheels with '
                    "pip install -e '.[ros]' (or source a ROS 2 Jazzy install)")

from ros_fixtures import certified_arm, isolate_ros_domain  # noqa: E402

from safety_filter.certification.certify_settings import CertifySettings  # noqa: E402
from safety_filter.recordings import bags  # noqa: E402
from safety_filter.reports.demo_report import (  # noqa: E402
    PLOTS,
    REPORT_HTML,
    SUMMARY_JSON,
    range_and_speed_used,
)
from safety_filter.ros.demo_graph import DemoOptions, run_demo  # noqa: E402
from safety_filter.ros.graph_specs import sim_demo_graph  # noqa: E402
from safety_filter.ros.runner import run_graph  # noqa: E402
from safety_filter.simulation.demo_arms import load_demo_arm  # noqa: E402

pytestmark = [pytest.mark.ros, pytest.mark.slow]

ARM = 'planar2'
DURATION_S = 3.0
RATE_HZ = 1000.0  # config/sim_demo.yaml and the certificate
OPERATOR_RATE_HZ = 100.0


@pytest.fixture(scope='module')
def domain() -> int:
    return isolate_ros_domain()


@pytest.fixture(scope='module')
def demo(tmp_path_factory: pytest.TempPathFactory, domain: int):
    arm = certified_arm(ARM)
    assert arm.certificate.control_rate_hz == RATE_HZ
    output = tmp_path_factory.mktemp('demo')
    shutil.copy(arm.certificate_path, output / f'{ARM}_certificate.yaml')
    result = run_demo(DemoOptions(arm=ARM, output=output, duration_s=DURATION_S,
                                  domain_id=domain, progress=False, wall_timeout_s=300.0))
    return result, output


def test_the_demo_reuses_a_valid_certificate(demo) -> None:
    result, output = demo
    assert result.certificate_reused
    assert result.certificate_path == output / f'{ARM}_certificate.yaml'


def test_unfiltered_run_breaks_a_limit_and_filtered_run_keeps_all(demo) -> None:
    result, _ = demo
    assert result.unfiltered_broke_some, result.summary
    assert result.filtered_kept_all, result.summary
    filtered = result.runs['filtered']
    # The simulated arm is not the filter's model (links 10 % heavier, a payload it is not
    # told): what the disturbance observer has not yet removed may carry the state past the
    # boundary of S for a few periods (docs/method.md, "What the certificate covers"), by
    # less than the velocity headroom that the velocity boxes keep below the rated speeds.
    margins = np.column_stack([filtered.status[f'margin.{joint}']
                               for joint in ('shoulder', 'elbow')])
    headroom = CertifySettings().velocity_headroom * np.min(load_demo_arm(ARM).velocity_limit)
    assert np.nanmin(margins) >= -headroom
    # filtered, fallback or (in those periods) recovering; no input rejected, none stale
    assert set(np.unique(filtered.status['mode'])) <= {0.0, 1.0, 2.0}


def _released_states(run) -> int:
    """Joint states from the arm's release (its first command) on."""
    first_command = run.command_time_s[0]
    return int(np.count_nonzero(run.time_s >= first_command - 0.5 / RATE_HZ))


def test_bags_hold_the_expected_topics_and_counts(demo) -> None:
    result, output = demo
    unfiltered = bags.topic_summary(output / 'bags' / 'unfiltered')
    filtered = bags.topic_summary(output / 'bags' / 'filtered')
    assert set(unfiltered) == {bags.TOPIC_JOINT_STATES, bags.TOPIC_NOMINAL}
    assert set(filtered) == {bags.TOPIC_JOINT_STATES, bags.TOPIC_NOMINAL, bags.TOPIC_COMMAND,
                             bags.TOPIC_DIAGNOSTICS, bags.TOPIC_STATUS,
                             bags.TOPIC_STATUS_FIELDS}
    assert filtered[bags.TOPIC_STATUS_FIELDS].count == 1  # the field names, sent once
    for summary in (unfiltered, filtered):
        for topic, info in summary.items():
            assert info.msgtype == bags.TOPIC_TYPES[topic]
    expected_states = DURATION_S * RATE_HZ
    for label in ('unfiltered', 'filtered'):
        run = result.runs[label]
        assert run.counts[bags.TOPIC_JOINT_STATES] >= 0.98 * expected_states
        assert _released_states(run) == pytest.approx(expected_states, abs=0.02 * expected_states)
        assert run.duration_s >= DURATION_S - 1.0 / RATE_HZ
        assert run.counts[bags.TOPIC_NOMINAL] == pytest.approx(
            DURATION_S * OPERATOR_RATE_HZ, rel=0.1)
    run = result.runs['filtered']
    # Lockstep: one filtered torque (and one status record) per joint state.
    commands = run.counts[bags.TOPIC_COMMAND]
    assert commands == pytest.approx(_released_states(run), abs=0.02 * expected_states)
    assert run.counts[bags.TOPIC_STATUS] == commands
    assert run.counts[bags.TOPIC_DIAGNOSTICS] >= 2  # 2 Hz on simulated time
    assert bags.TOPIC_COMMAND not in result.runs['unfiltered'].counts


def test_report_is_written(demo) -> None:
    result, output = demo
    folder = output / 'report'
    assert result.report == folder / REPORT_HTML
    page = result.report.read_text(encoding='utf-8')
    for name in PLOTS.values():
        assert (folder / name).stat().st_size > 10_000, name
        assert name in page
    assert (folder / SUMMARY_JSON).is_file()
    assert 'all 6 limits kept' in result.summary
    assert 'not a certified safety function' in page
    # How much of its speed and range each joint used, per run, from the joint states.
    assert 'How much of its range and speed each joint used' in page
    model = load_demo_arm(ARM)
    speed, nearest = range_and_speed_used(model, result.runs['filtered'])
    filtered = result.runs['filtered']
    expected = np.max(np.abs(filtered.v), axis=0) / np.array(model.velocity_limit)
    np.testing.assert_allclose(speed, expected)
    assert np.all(nearest >= 0.0) and np.all(nearest <= 0.5)
    for i in range(model.n_joints):
        assert f'{100 * speed[i]:.0f} %' in page


def test_graph_across_processes_stops_cleanly_on_sigint(tmp_path: Path, domain: int) -> None:
    arm = certified_arm(ARM)
    bag = tmp_path / 'bag'
    env = dict(os.environ, ROS_DOMAIN_ID=str(domain), ROS_AUTOMATIC_DISCOVERY_RANGE='LOCALHOST')
    command = [sys.executable, '-m', 'safety_filter.cli.main', 'run-graph', '--demo', ARM,
               '--certificate', str(arm.certificate_path), '--output-dir', str(bag), '--processes',
               '--domain-id', str(domain)]
    process = subprocess.Popen(command, env=env, stdout=subprocess.PIPE,
                               stderr=subprocess.STDOUT, text=True)
    try:
        # Nodes start one after the other (the recorder first, the arm last); wait until the
        # recording has grown well past its start: the per-step topics (joint states, status
        # and commands at 1 kHz) fill a megabyte in seconds, the slow ones (nominals,
        # diagnostics) alone would not, so the arm is running by then even on a loaded machine.
        deadline = time.monotonic() + 180.0
        while time.monotonic() < deadline and process.poll() is None:
            files = list(bag.glob('*.mcap'))
            if files and files[0].stat().st_size > 1_000_000:
                break
            time.sleep(0.5)
        assert process.poll() is None, process.communicate()[0]
        process.send_signal(signal.SIGINT)
        output, _ = process.communicate(timeout=60.0)
    finally:
        if process.poll() is None:
            process.kill()
            process.communicate()
    assert process.returncode == 0, output
    assert 'interrupted' in output
    summary = bags.topic_summary(bag)  # a finished, readable bag
    assert summary[bags.TOPIC_JOINT_STATES].count > 100
    assert summary[bags.TOPIC_COMMAND].count > 100


def test_unfiltered_graph_exists_only_around_the_simulated_arm(tmp_path: Path) -> None:
    arm = certified_arm(ARM)
    specs = sim_demo_graph(urdf_path=arm.urdf_path, limits_path=arm.limits_path,
                           certificate=None, filtered=False, control_rate_hz=RATE_HZ)
    assert [s.executable for s in specs] == ['careless_operator', 'sim_arm']
    assert specs[-1].remappings == [('sim_effort_command', 'nominal_torque')]
    # The filter node has no option to pass the nominal through.
    ros_folder = Path(__file__).resolve().parents[2] / 'safety_filter' / 'ros'
    source = ''.join((ros_folder / name).read_text(encoding='utf-8') for name in (
        'filter_node.py', 'filter_node_lifecycle.py', 'filter_node_parameters.py'))
    for word in ('bypass', 'passthrough', 'pass_through'):
        assert f"'{word}" not in source


def test_a_timed_sim_graph_in_one_process(tmp_path: Path, domain: int) -> None:
    arm = certified_arm(ARM)
    bag = tmp_path / 'bag'
    specs = sim_demo_graph(urdf_path=arm.urdf_path, limits_path=arm.limits_path,
                           certificate=arm.certificate_path, duration_s=0.5, bag_path=bag,
                           storage='sqlite3')
    result = run_graph(specs, domain_id=domain, localhost_only=True, log_level='warn',
                       wall_timeout_s=120.0, executor='single_threaded')
    assert result.finished and not result.interrupted
    assert result.simulated_s == pytest.approx(0.5, abs=1.5 / RATE_HZ)
    assert (bag / 'metadata.yaml').is_file() and any(bag.glob('*.db3'))
    assert result.counts[bags.TOPIC_COMMAND] == pytest.approx(500, abs=10)
