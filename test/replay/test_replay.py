"""Replay of recorded bags: reading, open and closed loop, comparison, bags out, reports, CLI.

The bags are written by ``test/replay_fixtures.py`` from simulated runs of the filter on the
planar2 demo arm, in both rosbag2 storages (SQLite 3 and MCAP), with the timing the node sees
(joint state at t, nominal at t + 1 us, filtered torque at t + 2 us). A bag recorded from
the filter must replay to the very same torques: the filter is deterministic for the same
input sequence (the warm start included) and CDR carries float64 exactly.
"""

from __future__ import annotations

import json
import subprocess
import sys
from dataclasses import replace
from pathlib import Path
from typing import Any

import numpy as np
import pytest
from replay_fixtures import (
    START_NS,
    RecordedRun,
    planar2_certificate,
    record_filtered_run,
    tree_digest,
    truncate_storage,
    write_run_bag,
)

from safety_filter.campaigns.replay_batch import replay_bags
from safety_filter.campaigns.replay_job import CertificateChoice, ReplayOptions
from safety_filter.cli.main import main
from safety_filter.core.dynamics import Dynamics
from safety_filter.errors import BagError
from safety_filter.recordings.bags import find_bags, read_status
from safety_filter.recordings.event_log import read_event_log
from safety_filter.replay.closed_loop import resimulate
from safety_filter.replay.open_loop import agreement, compare, replay_open_loop, summarize
from safety_filter.replay.replay_bag import (
    REPLAY_FILTERED_TOPIC,
    REPLAY_STATUS_FIELDS_TOPIC,
    REPLAY_STATUS_TOPIC,
    status_field_names,
    write_replay_bag,
)
from safety_filter.replay.trial import Trial, read_trial
from safety_filter.reports.replay_report import (
    REPORT_HTML,
    REPORT_JSON,
    SUMMARY_HTML,
    SUMMARY_JSON,
)
from safety_filter.simulation.command_sources import PDBeyondLimits

REPO = Path(__file__).resolve().parents[2]
STORAGES = ('sqlite3', 'mcap')
SIM_RATE_HZ = 2000.0  # RK4 rate of the simulated arm: enough for planar2, and fast


@pytest.fixture(scope='session')
def arm() -> Any:
    """planar2 and the session's certificate of it (the real certification, default settings)."""
    return planar2_certificate()


@pytest.fixture(scope='session')
def files(arm: Any, tmp_path_factory: pytest.TempPathFactory) -> dict[str, Path]:
    """Certificate files: the certified one and one with smaller beta (still >= beta*)."""
    model, certificate = arm
    folder = tmp_path_factory.mktemp('certificates')
    smaller = _smaller_beta(certificate)
    return {'certificate': certificate.save(folder / 'planar2_certificate.yaml'),
            'smaller_beta': smaller.save(folder / 'planar2_smaller_beta.yaml')}


def _smaller_beta(certificate: Any) -> Any:
    """The certificate with a smaller beta (its slow design's too, when it has one)."""
    beta = np.maximum(certificate.beta_star * 1.05, 0.4 * certificate.beta)
    assert np.all(beta < certificate.beta) and np.all(beta >= certificate.beta_star)
    slow = certificate.slow_design
    return replace(certificate, beta=beta,
                   slow_design=None if slow is None else _smaller_beta(slow))


@pytest.fixture(scope='session')
def run(arm: Any) -> RecordedRun:
    """0.6 s of the filter against a PD controller that drags the arm past its limits."""
    model, certificate = arm
    return record_filtered_run(model, certificate, PDBeyondLimits(model, period_s=0.3), 0.6,
                               internal_rate_hz=SIM_RATE_HZ)


@pytest.fixture(scope='session')
def bags(run: RecordedRun, tmp_path_factory: pytest.TempPathFactory) -> dict[str, Path]:
    """The run written plainly in each storage (read-only use: tests must not damage them)."""
    folder = tmp_path_factory.mktemp('bags')
    return {storage: write_run_bag(folder / f'run_{storage}', run, storage)
            for storage in STORAGES}


# ---------------------------------------------------------------------- open loop
@pytest.mark.parametrize('storage', STORAGES)
def test_open_loop_reproduces_the_recorded_filtered_torques(arm: Any, bags: dict[str, Path],
                                                            run: RecordedRun,
                                                            storage: str) -> None:
    model, certificate = arm
    trial = read_trial(bags[storage], model)
    assert trial.warnings == []
    assert trial.topics['/chatter'] > 0 and trial.topics['/joint_states'] == len(run.stamp_ns)
    np.testing.assert_array_equal(trial.state_stamp_ns, run.stamp_ns)
    result = replay_open_loop(trial, model, certificate)
    stats = agreement(result)
    assert stats['matched_steps'] == len(run.stamp_ns)
    assert stats['max_abs_diff'] <= 1e-9
    np.testing.assert_allclose(result.torque, run.torque, rtol=0.0, atol=1e-9)
    assert list(result.mode) == run.modes
    assert np.all(result.state_age > 0) and np.all(result.state_age < 2e-6)


def test_open_loop_matches_joints_by_name_and_ignores_extra_joints(
        arm: Any, run: RecordedRun, tmp_path: Path) -> None:
    model, certificate = arm
    bag = write_run_bag(tmp_path / 'shuffled', run, 'mcap', joint_order=[1, 0],
                        extra_joints={'gripper_finger': 0.01})
    trial = read_trial(bag, model)
    assert trial.warnings == []
    np.testing.assert_array_equal(trial.q, run.q)
    result = replay_open_loop(trial, model, certificate)
    assert agreement(result)['max_abs_diff'] <= 1e-9


def test_trigger_joint_state_pairs_each_state_with_the_newest_older_nominal(
        arm: Any, bags: dict[str, Path], run: RecordedRun) -> None:
    model, certificate = arm
    trial = read_trial(bags['mcap'], model)
    result = replay_open_loop(trial, model, certificate, trigger='joint_state')
    # The nominal of step k arrives 1 us after state k: state k pairs with nominal k - 1,
    # and the first state has no nominal yet (the hold command stands in for it).
    np.testing.assert_array_equal(result.nominal[1:], run.nominal[:-1])
    assert result.hold_nominal[0] and not result.hold_nominal[1:].any()
    assert result.nominal_age[1] == pytest.approx(1e-3 - 1e-6, abs=1e-12)


# ---------------------------------------------------------------------- closed loop, compare
def test_closed_loop_resimulation_of_a_filtered_run_keeps_the_limits(
        arm: Any, bags: dict[str, Path], run: RecordedRun) -> None:
    model, certificate = arm
    trial = read_trial(bags['sqlite3'], model)
    closed = resimulate(trial, model, certificate, internal_rate_hz=SIM_RATE_HZ)
    assert len(closed.time) == len(run.stamp_ns)
    for kind, excess in closed.violations.items():
        assert np.all(excess <= 1e-9), (kind, excess)
    # Same filter, same plant, same commands: the recorded motion comes back.
    assert np.all(closed.difference['position_max'] < 1e-6)


def test_closed_loop_with_a_driver_that_compensates_gravity_adds_it(arm: Any) -> None:
    # A zero nominal means "hold still" for a driver that adds g(q) itself, and "let go"
    # for one that takes the full torque.
    model, certificate = arm
    steps = 200
    stamps = START_NS + 1_000_000 * np.arange(steps)
    q0 = 0.5 * (model.position_lower + model.position_upper) + 0.3
    trial = Trial(Path('by-hand'), stamps * 1e-9, np.tile(q0, (steps, 1)),
                  np.zeros((steps, 2)), (stamps + 1000) * 1e-9, np.zeros((steps, 2)),
                  np.zeros(0), np.zeros((0, 2)), [], stamps, stamps + 1000)
    held = resimulate(trial, model, certificate, internal_rate_hz=SIM_RATE_HZ,
                      gravity_convention='driver_compensated')
    dropped = resimulate(trial, model, certificate, internal_rate_hz=SIM_RATE_HZ)
    assert np.abs(held.v).max() < 1e-9
    assert np.abs(dropped.v).max() > 0.1
    payload = 0.5 * sum(certificate.payload_mass_range)  # resimulate's default
    np.testing.assert_allclose(held.torque[0], Dynamics(model, payload).gravity_torque(q0))


def test_a_smaller_beta_gives_different_intervention_figures(
        arm: Any, bags: dict[str, Path]) -> None:
    model, certificate = arm
    trial = read_trial(bags['mcap'], model)
    figures = compare(trial, model, {'certified': certificate,
                                     'smaller beta': _smaller_beta(certificate)})
    a, b = figures['certified']['intervention'], figures['smaller beta']['intervention']
    print(f"\nintervention mean {a['mean']:.4g} / {b['mean']:.4g}, p95 {a['p95']:.4g} / "
          f"{b['p95']:.4g}, max {a['max']:.4g} / {b['max']:.4g} [N m] (certified / smaller beta)")
    assert a['mean'] != pytest.approx(b['mean'], rel=1e-3)
    # (not the max: on planar2's certificate both betas' largest interventions, 70.48 and
    # 70.50 N m, came within 0.03 % of each other)
    assert a['p95'] != pytest.approx(b['p95'], rel=1e-3)
    # A smaller beta lets the bounds close in sooner: the filter intervenes more.
    assert b['mean'] > a['mean']


# ---------------------------------------------------------------------- bags out
@pytest.mark.parametrize('storage', STORAGES)
def test_replay_bag_holds_the_input_and_the_replay_and_the_input_is_untouched(
        arm: Any, run: RecordedRun, tmp_path: Path, storage: str) -> None:
    from rosbags.highlevel import AnyReader

    model, certificate = arm
    source = write_run_bag(tmp_path / 'input', run, storage)
    before = tree_digest(source)
    trial = read_trial(source, model)
    result = replay_open_loop(trial, model, certificate)
    out = write_replay_bag(source, result, tmp_path / 'replayed', storage=storage)
    assert tree_digest(source) == before
    with AnyReader([source]) as original, AnyReader([out]) as copy:
        recorded = [(c.topic, c.msgtype, t, bytes(raw)) for c, t, raw in original.messages()]
        written = [(c.topic, c.msgtype, t, bytes(raw)) for c, t, raw in copy.messages()]
        replay = [(c.topic, t, copy.deserialize(raw, c.msgtype)) for c, t, raw in
                  copy.messages() if c.topic.startswith('/replay/')]
    assert [m for m in written if not m[0].startswith('/replay/')] == recorded
    filtered = [m for m in replay if m[0] == REPLAY_FILTERED_TOPIC]
    status = [m for m in replay if m[0] == REPLAY_STATUS_TOPIC]
    assert len(filtered) == len(status) == len(run.stamp_ns)
    np.testing.assert_array_equal([t for _, t, _ in filtered], result.stamp_ns)
    np.testing.assert_array_equal(np.array([m.data for _, _, m in filtered]), run.torque)
    # The field names once, at the first step, on their own topic; the records lean.
    (announced,) = [m for m in replay if m[0] == REPLAY_STATUS_FIELDS_TOPIC]
    assert announced[1] == status[0][1]
    fields = announced[2].data.split(',')
    assert fields == status_field_names(model.joint_names)
    assert fields[:3] == ['stamp_s', 'step', 'mode']
    assert all(not m.layout.dim and len(m.data) == len(fields) for _, _, m in status)
    read = read_status(out, REPLAY_STATUS_TOPIC)
    assert set(read) == set(fields) | {'log_time_ns'}
    np.testing.assert_array_equal(read['torque.elbow'], run.torque[:, 1])
    rows = np.array([m.data for _, _, m in status])
    np.testing.assert_array_equal(rows[:, fields.index('torque.elbow')], run.torque[:, 1])
    np.testing.assert_array_equal(rows[:, fields.index('step')], np.arange(len(rows)))
    assert set(rows[:, fields.index('mode')]) <= {0.0, 1.0, 2.0}
    with pytest.raises(BagError, match='exists already'):
        write_replay_bag(source, result, out)
    with pytest.raises(BagError, match='inside the input bag'):
        write_replay_bag(source, result, source / 'nested')
    assert tree_digest(source) == before


def test_find_bags_lists_folders_and_bare_files(run: RecordedRun, tmp_path: Path) -> None:
    write_run_bag(tmp_path / 'a', run, 'mcap')
    (tmp_path / 'deeper').mkdir()
    write_run_bag(tmp_path / 'deeper' / 'b.db3', run, 'sqlite3', bare=True)
    write_run_bag(tmp_path / 'c.mcap', run, 'mcap', bare=True)
    (tmp_path / 'notes.txt').write_text('not a bag')
    (tmp_path / '.hidden').mkdir()
    write_run_bag(tmp_path / '.hidden' / 'd', run, 'mcap')
    found = find_bags(tmp_path)
    assert found == sorted([tmp_path / 'a', tmp_path / 'c.mcap', tmp_path / 'deeper' / 'b.db3'])
    assert find_bags(tmp_path / 'a') == [tmp_path / 'a']
    assert find_bags(tmp_path, exclude=[tmp_path / 'deeper']) == [tmp_path / 'a',
                                                                  tmp_path / 'c.mcap']
    with pytest.raises(BagError, match='no such'):
        find_bags(tmp_path / 'missing')


# ---------------------------------------------------------------------- robustness
def test_duplicated_and_reordered_messages_warn_and_replay_proceeds(
        arm: Any, run: RecordedRun, tmp_path: Path) -> None:
    model, certificate = arm
    bag = write_run_bag(tmp_path / 'damaged', run, 'sqlite3', duplicate_states=[5, 9],
                        swap_states=[20])
    trial = read_trial(bag, model)
    text = ' '.join(trial.warnings)
    assert '2 messages with a duplicated timestamp dropped' in text
    assert 'header stamps go backwards 1 times' in text
    assert len(trial.state_time) == len(run.stamp_ns)
    np.testing.assert_array_equal(trial.q[5], run.q[5])  # the first of the duplicates kept
    result = replay_open_loop(trial, model, certificate)
    assert len(result.time) == len(run.stamp_ns)
    # Until the swapped pair the inputs are those of the recording.
    assert np.abs(result.torque[:20] - run.torque[:20]).max() <= 1e-9


def test_gaps_are_listed(arm: Any, run: RecordedRun, tmp_path: Path) -> None:
    model, certificate = arm
    bag = write_run_bag(tmp_path / 'gap.mcap', run, 'mcap', gap=(200, 300), bare=True)
    result = replay_open_loop(read_trial(bag, model), model, certificate)
    gaps = summarize(result, model)['gaps']
    assert {g['topic'] for g in gaps} == {'joint_states', 'nominal'}
    for gap in gaps:
        assert gap['from_s'] == pytest.approx((START_NS + 199_000_000) * 1e-9, abs=1e-5)
        assert gap['to_s'] == pytest.approx((START_NS + 300_000_000) * 1e-9, abs=1e-5)


@pytest.mark.parametrize('storage', STORAGES)
def test_a_missing_topic_is_a_clear_error(arm: Any, run: RecordedRun, tmp_path: Path,
                                          storage: str) -> None:
    model, _ = arm
    bag = write_run_bag(tmp_path / 'no_nominal', run, storage, omit=['nominal'])
    with pytest.raises(BagError, match='topic /nominal_torque not in the bag'):
        read_trial(bag, model)


def test_joint_states_without_a_chain_joint_name_it(arm: Any, run: RecordedRun,
                                                    tmp_path: Path) -> None:
    model, _ = arm
    bag = write_run_bag(tmp_path / 'renamed', run, 'mcap', rename={'elbow': 'elbow_joint'})
    with pytest.raises(BagError, match=r"lack the chain joint\(s\) \['elbow'\]") as error:
        read_trial(bag, model)
    assert 'elbow_joint' in str(error.value)


@pytest.mark.parametrize('storage', STORAGES)
@pytest.mark.parametrize('bare', [False, True])
def test_a_truncated_bag_is_a_clear_error(arm: Any, run: RecordedRun, tmp_path: Path,
                                          storage: str, bare: bool) -> None:
    model, _ = arm
    suffix = ('.mcap' if storage == 'mcap' else '.db3') if bare else ''
    bag = write_run_bag(tmp_path / f'cut{suffix}', run, storage, bare=bare)
    truncate_storage(bag)
    with pytest.raises(BagError, match='cannot read the bag'):
        read_trial(bag, model)


def test_files_that_are_not_bags_are_clear_errors(arm: Any, tmp_path: Path) -> None:
    model, _ = arm
    (tmp_path / 'fake.mcap').write_text('this is not an MCAP file')
    (tmp_path / 'notes.txt').write_text('notes')
    (tmp_path / 'empty').mkdir()
    with pytest.raises(BagError, match='cannot read the bag'):
        read_trial(tmp_path / 'fake.mcap', model)
    with pytest.raises(BagError, match='not a bag'):
        read_trial(tmp_path / 'notes.txt', model)
    with pytest.raises(BagError, match='not a bag'):
        read_trial(tmp_path / 'empty', model)
    with pytest.raises(BagError, match='no such bag'):
        read_trial(tmp_path / 'missing', model)


# ---------------------------------------------------------------------- event log
def test_event_log_reading_reports_malformed_lines(tmp_path: Path) -> None:
    log = tmp_path / 'events.jsonl'
    log.write_text('{"t": 2.5, "kind": "stop", "joint": "elbow"}\n'
                   'not json\n\n'
                   '[1, 2]\n'
                   '{"t": "soon", "kind": "x"}\n'
                   '{"t": 1.0}\n'
                   '{"t": 1.5, "kind": "margin_low"}\n')
    events = read_event_log(log)
    assert [(e.t, e.kind) for e in events.events] == [(1.5, 'margin_low'), (2.5, 'stop')]
    assert events.events[1].data == {'joint': 'elbow'}
    assert [m['line'] for m in events.malformed] == [2, 4, 5, 6]
    missing = read_event_log(tmp_path / 'nothing.jsonl')
    assert missing.missing and not missing.events and not missing.malformed


# ---------------------------------------------------------------------- batch, report, CLI
REPORT_KEYS = {'format', 'name', 'bag', 'robot', 'joint_names', 'options', 'start_time_s',
               'end_time_s', 'duration_s', 'topics', 'warnings', 'gaps', 'runs',
               'comparison', 'events', 'plots', 'html'}
RUN_KEYS = {'label', 'role', 'source', 'certificate_id', 'summary', 'moments',
            'solve_time_histogram', 'agreement', 'closed_loop'}


def test_cli_replays_one_bag_with_a_comparison_and_writes_the_report(
        arm: Any, files: dict[str, Path], run: RecordedRun, tmp_path: Path,
        capsys: pytest.CaptureFixture[str]) -> None:
    bag = write_run_bag(tmp_path / 'trial.mcap', run, 'mcap', bare=True, gap=(400, 520))
    before = tree_digest(bag)
    events = tmp_path / 'events.jsonl'
    events.write_text(f'{{"t": {(START_NS + 100_000_000) * 1e-9}, "kind": "operator_stop"}}\n'
                      'garbage line\n'
                      '{"t": 5.0, "kind": "long_before"}\n')
    out = tmp_path / 'out'
    code = main(['replay', str(bag), '--demo', 'planar2', '--certificate',
                 str(files['certificate']), '--compare', str(files['smaller_beta']),
                 '--closed-loop', '--sim-rate', str(SIM_RATE_HZ), '--output-dir', str(out),
                 '--write-bags', '--event-log', str(events), '--no-progress'])
    printed = capsys.readouterr().out
    assert code == 0, printed
    assert tree_digest(bag) == before
    for text in ('bag trial:', 'intervention [N m]: mean', 'smallest margin:',
                 'solve time [us]', 'fallback episodes: none', 'input gaps: 2:',
                 'agreement with the recorded filtered torque: 480 steps, max |diff|',
                 'closed loop: no limit violated', 'comparison:', 'intervention p95 [N m]',
                 'event log line 2: not JSON', 'event log: 1 of 2 events within this trial'):
        assert text in printed, text
    folder = out / 'trial'
    data = json.loads((folder / REPORT_JSON).read_text())
    assert REPORT_KEYS <= set(data)
    assert data['format'] == 'safety_filter/replay-report-1'
    assert [r['role'] for r in data['runs']] == ['certificate', 'compare']
    for entry in data['runs']:
        assert RUN_KEYS <= set(entry)
        assert entry['closed_loop']['violated'] is False
        assert set(entry['moments']) == {'largest_intervention', 'smallest_margin'}
        assert sum(entry['solve_time_histogram']['counts']) > 0
    first = data['runs'][0]['moments']['largest_intervention'][0]
    assert first['value'] == pytest.approx(data['runs'][0]['summary']['intervention']['max'])
    rows = {row['metric']: row['values'] for row in data['comparison']['rows']}
    assert rows['intervention mean'][0] != rows['intervention mean'][1]
    assert len(data['gaps']) == 2
    assert [e['kind'] for e in data['events']['in_trial']] == ['operator_stop']
    assert [bad['line'] for bad in data['events']['malformed']] == [2]
    for plot in data['plots']:
        assert (folder / plot).stat().st_size > 1000
    assert {'position.png', 'intervention.png', 'margin.png', 'solve_time.png',
            'compare_intervention.png', 'compare_margin.png'} <= set(data['plots'])
    page = (folder / REPORT_HTML).read_text()
    assert 'not a certified safety function' in page and 'Comparison' in page
    replayed = Path(data['replay_bag'])
    assert (replayed / 'metadata.yaml').is_file()
    assert (out / SUMMARY_HTML).is_file() and (out / SUMMARY_JSON).is_file()
    # Again into the same folder: the old replay bag is replaced, not an error.
    assert main(['replay', str(bag), '--demo', 'planar2', '--certificate',
                 str(files['certificate']), '--output-dir', str(out), '--write-bags',
                 '--no-plots', '--no-progress']) == 0
    assert tree_digest(bag) == before


def test_batch_lists_bad_bags_and_goes_on(arm: Any, files: dict[str, Path], run: RecordedRun,
                                          tmp_path: Path,
                                          capsys: pytest.CaptureFixture[str]) -> None:
    folder = tmp_path / 'trials'
    folder.mkdir()
    write_run_bag(folder / 'good_sqlite', run, 'sqlite3')
    write_run_bag(folder / 'good.mcap', run, 'mcap', bare=True)
    write_run_bag(folder / 'no_nominal', run, 'mcap', omit=['nominal'])
    truncate_storage(write_run_bag(folder / 'cut', run, 'sqlite3'))
    (folder / 'fake.mcap').write_text('not a bag')
    (folder / 'README.txt').write_text('trial notes')
    before = tree_digest(folder)
    out = tmp_path / 'out'
    code = main(['replay', str(folder), '--demo', 'planar2', '--certificate',
                 str(files['certificate']), '--output-dir', str(out), '--jobs', '2',
                 '--no-plots', '--no-progress'])
    printed = capsys.readouterr().out
    assert code == 0, printed
    assert tree_digest(folder) == before
    assert '2 of 5 bags replayed, 3 failed' in printed
    assert 'Traceback' not in printed
    summary = json.loads((out / SUMMARY_JSON).read_text())
    assert summary['counts'] == {'bags': 5, 'ok': 2, 'failed': 3}
    status = {entry['name']: entry for entry in summary['bags']}
    assert set(status) == {'good_sqlite', 'good', 'no_nominal', 'cut', 'fake'}
    assert 'topic /nominal_torque not in the bag' in status['no_nominal']['error']
    assert 'cannot read the bag' in status['cut']['error']
    assert 'cannot read the bag' in status['fake']['error']
    for name in ('good_sqlite', 'good'):
        assert status[name]['status'] == 'ok' and status[name]['error'] is None
        assert (out / status[name]['report']).is_file()
        assert status[name]['figures']['steps'] == len(run.stamp_ns)


def test_cli_exit_codes(files: dict[str, Path], tmp_path: Path,
                        capsys: pytest.CaptureFixture[str]) -> None:
    (tmp_path / 'bad').mkdir()
    (tmp_path / 'bad' / 'one.mcap').write_text('not a bag')
    (tmp_path / 'bad' / 'two.db3').write_text('not a bag either')
    out = str(tmp_path / 'out')
    common = ['--demo', 'planar2', '--output-dir', out, '--no-progress', '--jobs', '1']
    assert main(['replay', str(tmp_path / 'bad'), '--certificate', str(files['certificate']),
                 *common]) == 1  # every bag failed
    printed = capsys.readouterr()
    assert '0 of 2 bags replayed, 2 failed' in printed.out
    assert main(['replay', str(tmp_path / 'bad'), *common]) == 2  # no --certificate
    assert main(['replay', str(tmp_path / 'nowhere'), '--certificate',
                 str(files['certificate']), *common]) == 2
    (tmp_path / 'empty').mkdir()
    assert main(['replay', str(tmp_path / 'empty'), '--certificate',
                 str(files['certificate']), *common]) == 2
    assert main(['replay', str(tmp_path / 'bad'), '--certificate',
                 str(files['certificate']), '--demo', 'bench6', '--output-dir', out]) == 2
    assert main(['replay', str(tmp_path / 'bad'), '--certificate',
                 str(files['certificate']), '--jobs', '0', *common[:-2]]) == 2
    errors = capsys.readouterr().err
    assert 'Traceback' not in errors
    assert 'no bags found' in errors and 'no such file or folder' in errors
    assert 'certificate was computed for model hash' in errors


def test_batch_api_in_one_process_matches_workers(arm: Any, files: dict[str, Path],
                                                   bags: dict[str, Path],
                                                   tmp_path: Path) -> None:
    model, certificate = arm
    choices = [CertificateChoice('cert', certificate)]
    options = ReplayOptions(plots=False)
    entries = replay_bags([bags['mcap'], bags['sqlite3']], model, choices, options,
                          tmp_path / 'workers', jobs=2, progress=False)
    alone = replay_bags([bags['mcap']], model, choices, options, tmp_path / 'alone',
                        progress=False)
    assert [e['status'] for e in entries] == ['ok', 'ok']
    assert entries[0]['figures'] == alone[0]['figures']


# ---------------------------------------------------------------------- benchmark
@pytest.mark.slow
def test_bench_replay_quick_runs_and_prints_its_figures() -> None:
    result = subprocess.run([sys.executable, str(REPO / 'benchmarks' / 'bench_replay.py'),
                             '--quick'], capture_output=True, text=True, timeout=240, cwd=REPO)
    assert result.returncode == 0, result.stdout + result.stderr
    for label in ('one process', 'batch on 2 cores', 'steps/s', 'x real time at 1 kHz'):
        assert label in result.stdout, result.stdout
