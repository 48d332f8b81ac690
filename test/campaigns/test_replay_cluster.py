"""Replay on a Dask cluster: a real local cluster of worker processes on the loopback.

The cluster (:class:`distributed.LocalCluster`, two worker processes of one thread each) is
started before the tests change their working folder, so the workers run elsewhere than
the client: the relative bag and output paths of the command line work only because the
client sends absolute ones, and the reports must still spell them as the local run does.

What the cluster's output is compared with: the local run of the same command into the
same folder name. Two local runs differ only in measured solve times (the JSON's and the
HTML's solve-time figures, ``solve_time.png``, the ``solve_time_s`` field of
``/replay/status``), the ``seconds`` a bag took and the HTML's "Written" stamp;
:func:`comparable` blanks exactly those and keeps everything else byte for byte.
"""

from __future__ import annotations

import hashlib
import json
import os
import re
import shutil
import signal
import subprocess
import sys
import threading
import time
from pathlib import Path
from typing import Any

import dask
import numpy as np
import pytest
from distributed import Client, LocalCluster
from replay_fixtures import (
    planar2_certificate,
    record_filtered_run,
    truncate_storage,
    write_run_bag,
)

from safety_filter.campaigns.replay_batch import replay_bags
from safety_filter.campaigns.replay_cluster import ClusterError, inspect_worker, parse_address
from safety_filter.campaigns.replay_job import CertificateChoice, ReplayOptions
from safety_filter.cli.main import main
from safety_filter.replay.replay_bag import status_field_names
from safety_filter.simulation.command_sources import PDBeyondLimits

pytestmark = pytest.mark.slow
REPO = Path(__file__).resolve().parents[2]
KEY_PREFIX = 'safety-filter-replay-'  # the cluster tasks' keys (replay_cluster)


@pytest.fixture(scope='module')
def arm() -> Any:
    """planar2 and a certificate from the real certification (reduced settings)."""
    return planar2_certificate()


@pytest.fixture(scope='module')
def cluster() -> Any:
    """A scheduler and two worker processes on 127.0.0.1; one task per worker at a time
    (worker-saturation 1.0), so that a worker's processing task is the one it executes."""
    with dask.config.set({'distributed.scheduler.worker-saturation': 1.0}):
        local = LocalCluster(processes=True, host='127.0.0.1', n_workers=2,
                             threads_per_worker=1, dashboard_address='127.0.0.1:0')
    client = Client(local.scheduler_address, set_as_default=False)
    try:
        yield local, client
    finally:
        client.close()
        local.close()


@pytest.fixture(scope='module')
def trials(arm: Any, tmp_path_factory: pytest.TempPathFactory) -> Path:
    """A folder of bags: three good ones (both storages, one bare file) of 1.5 s of the
    filter against a PD pulling past the limits, a truncated one and a file that is not a
    bag. Read-only for the tests."""
    model, certificate = arm
    run = record_filtered_run(model, certificate, PDBeyondLimits(model, period_s=0.3), 1.5,
                              internal_rate_hz=2000.0)
    folder = tmp_path_factory.mktemp('fleet') / 'trials'
    folder.mkdir()
    write_run_bag(folder / 'arm_a', run, 'mcap')
    write_run_bag(folder / 'arm_b', run, 'sqlite3')
    (folder / 'day2').mkdir()
    write_run_bag(folder / 'day2' / 'arm_c.mcap', run, 'mcap', bare=True)
    truncate_storage(write_run_bag(folder / 'cut', run, 'mcap'))
    (folder / 'fake.db3').write_text('not a bag')
    return folder


@pytest.fixture(scope='module')
def certificate_file(arm: Any, tmp_path_factory: pytest.TempPathFactory) -> Path:
    return arm[1].save(tmp_path_factory.mktemp('certificates') / 'planar2_certificate.yaml')


# ---------------------------------------------------------------------- comparison
def _status_solve_index(joint_names: list[str]) -> int:
    return status_field_names(joint_names).index('solve_time_s')


def _bag_messages(path: Path, solve_index: int) -> list[tuple[str, int, str]]:
    """Every message of a bag as (topic, bag time, digest), the status records with their
    measured solve time blanked."""
    from rosbags.highlevel import AnyReader

    from safety_filter.recordings.bags import typestore

    messages = []
    with AnyReader([path], default_typestore=typestore()) as reader:
        for connection, stamp, raw in reader.messages():
            if connection.topic == '/replay/status':
                message = reader.deserialize(raw, connection.msgtype)
                data = np.array(message.data, dtype=float)
                if data.size > solve_index:
                    data[solve_index] = 0.0
                raw = data.tobytes()
            messages.append((connection.topic, stamp, hashlib.sha256(raw).hexdigest()))
    return messages


def _without_timings(value: Any) -> Any:
    if isinstance(value, dict):
        return {k: _without_timings(v) for k, v in value.items()
                if 'solve_time' not in k and k != 'seconds'}
    if isinstance(value, list):
        return [_without_timings(v) for v in value]
    if isinstance(value, str):
        return '\n'.join(line for line in value.split('\n') if 'solve time' not in line)
    return value


def comparable(out: Path, joint_names: list[str]) -> dict[str, Any]:
    """Every file under ``out`` by relative path, with the measured timings blanked."""
    solve_index = _status_solve_index(joint_names)
    files: dict[str, Any] = {}
    for path in sorted(out.rglob('*')):
        relative = str(path.relative_to(out))
        if path.is_dir():
            if (path / 'metadata.yaml').is_file():
                files[relative + ' (messages)'] = _bag_messages(path, solve_index)
            continue
        if path.suffix in ('.mcap', '.db3'):
            files[relative] = 'storage file'  # compared through its bag's messages
        elif path.name == 'solve_time.png':
            files[relative] = 'measured solve times'
        elif path.suffix == '.json':
            files[relative] = _without_timings(json.loads(path.read_text(encoding='utf-8')))
        elif path.suffix == '.html':
            text = path.read_text(encoding='utf-8')
            text = re.sub(r'Written [0-9T:+\-]+\.', 'Written', text)
            files[relative] = re.sub(r'<tr><td>solve time[^\n]*?</tr>', '', text)
        else:
            files[relative] = hashlib.sha256(path.read_bytes()).hexdigest()
    return files


def _replay_args(certificate_file: Path, *extra: str) -> list[str]:
    return ['replay', 'trials', '--demo', 'planar2', '--certificate', str(certificate_file),
            '--output-dir', 'out', '--write-bags', '--no-progress', *extra]


# ---------------------------------------------------------------------- the tests
def test_cluster_run_equals_the_local_run(arm: Any, cluster: Any, trials: Path,
                                          certificate_file: Path, tmp_path: Path,
                                          monkeypatch: pytest.MonkeyPatch,
                                          capsys: pytest.CaptureFixture[str]) -> None:
    local_cluster, _ = cluster
    shutil.copytree(trials, tmp_path / 'trials')
    monkeypatch.chdir(tmp_path)
    assert main(_replay_args(certificate_file, '--jobs', '1')) == 0
    local_printed = capsys.readouterr().out
    Path('out').rename('out_local')
    assert main(_replay_args(certificate_file, '--cluster',
                             local_cluster.scheduler_address)) == 0
    cluster_printed = capsys.readouterr().out
    assert cluster_printed == local_printed
    assert '3 of 5 bags replayed, 2 failed' in cluster_printed
    assert re.search(r'FAILED +cut +trials/cut: cannot read the bag', cluster_printed)
    assert re.search(r'FAILED +fake +trials/fake.db3: ', cluster_printed)
    joints = list(arm[0].joint_names)
    local, distributed = comparable(Path('out_local'), joints), comparable(Path('out'), joints)
    assert sorted(distributed) == sorted(local)
    assert distributed == local
    # What the comparison rests on: the reports name the paths as given on this machine,
    # and the replay bags hold the replayed messages.
    report = json.loads(Path('out/day2__arm_c/replay_report.json').read_text())
    assert report['bag'] == 'trials/day2/arm_c.mcap'
    assert report['html'] == 'out/day2__arm_c/replay_report.html'
    assert report['replay_bag'] == 'out/day2__arm_c/day2__arm_c_replay'
    topics = {topic for topic, _, _ in distributed['arm_a/arm_a_replay (messages)']}
    assert {'/joint_states', '/replay/filtered_torque', '/replay/status'} <= topics
    assert not list(Path('out').rglob('.partial-*'))


def _kill_the_first_busy_worker(client: Client, pids: dict[str, int],
                                killed: dict[str, Any]) -> None:
    """SIGKILL the first worker seen executing a replay task, 0.1 s into it (a bag with
    plots takes most of a second)."""
    deadline = time.monotonic() + 60.0
    while time.monotonic() < deadline:
        for worker, keys in client.processing().items():
            keys = [str(k) for k in keys if str(k).startswith(KEY_PREFIX)]
            if keys and worker in pids:
                time.sleep(0.1)
                still = [str(k) for k in client.processing().get(worker, ())]
                os.kill(pids[worker], signal.SIGKILL)
                killed.update(worker=worker, pid=pids[worker], keys=keys, still=still)
                return
        time.sleep(0.02)


def _replay_while_killing(arm: Any, client: Client, address: str, trials: Path,
                          out: Path) -> tuple[list[dict[str, Any]], dict[str, Any]]:
    model, certificate = arm
    bags = [trials / 'arm_a', trials / 'arm_b', trials / 'day2' / 'arm_c.mcap', trials / 'cut']
    pids = client.run(os.getpid)
    killed: dict[str, Any] = {}
    killer = threading.Thread(target=_kill_the_first_busy_worker, args=(client, pids, killed))
    killer.start()
    try:
        entries = replay_bags(bags, model, [CertificateChoice('cert', certificate)],
                              ReplayOptions(write_bags=True), out,
                              names=[b.name.split('.')[0] for b in bags], cluster=address,
                              progress=False)
    finally:
        killer.join()
    assert killed, 'no worker was seen replaying a bag'
    assert set(killed['keys']) <= set(killed['still']), 'the task ended before the kill'
    with pytest.raises(ProcessLookupError):
        os.kill(killed['pid'], 0)
    return entries, killed


def test_a_worker_killed_mid_bag_is_retried_and_nothing_is_lost(
        arm: Any, cluster: Any, trials: Path, tmp_path: Path) -> None:
    local_cluster, client = cluster
    expected = replay_bags([trials / 'arm_a'], arm[0], [CertificateChoice('cert', arm[1])],
                           ReplayOptions(), tmp_path / 'alone', progress=False)
    entries, killed = _replay_while_killing(arm, client, local_cluster.scheduler_address,
                                            trials, tmp_path / 'out')
    status = {e['name']: e for e in entries}
    assert {name: e['status'] for name, e in status.items()} == {
        'arm_a': 'ok', 'arm_b': 'ok', 'arm_c': 'ok', 'cut': 'failed'}, entries
    assert 'cannot read the bag' in status['cut']['error']
    for entry in entries:
        if entry['name'] == 'cut':
            continue
        assert entry['figures'] == expected[0]['figures']
        assert (tmp_path / 'out' / entry['report_json']).is_file()
        assert Path(entry['replay_bag'], 'metadata.yaml').is_file()
    # The killed task went to a worker twice: once to the one killed, then again.
    # (scheduler records: ('scheduler', key, start state, finish state, ...))
    story = client.story(*killed['keys'])
    starts = [event for event in story if event[0] == 'scheduler'
              and event[1] in killed['keys'] and event[3] == 'processing']
    assert len(starts) >= 2, story
    assert not list((tmp_path / 'out').rglob('.partial-*'))
    client.wait_for_workers(2, timeout=60)  # the nanny restarts the killed one


def test_a_bag_the_scheduler_gives_up_on_is_reported_and_the_others_kept(
        arm: Any, cluster: Any, trials: Path, tmp_path: Path) -> None:
    local_cluster, client = cluster

    def allow_no_failure(dask_scheduler: Any, value: int) -> int:
        before = dask_scheduler.allowed_failures
        dask_scheduler.allowed_failures = value
        return before

    client.wait_for_workers(2, timeout=60)
    before = client.run_on_scheduler(allow_no_failure, value=0)
    try:
        entries, killed = _replay_while_killing(arm, client, local_cluster.scheduler_address,
                                                trials, tmp_path / 'out')
    finally:
        client.run_on_scheduler(allow_no_failure, value=before)
    # The task keys end in the bag's index in the list given (replay_cluster).
    hit = {int(key.rsplit('-', 1)[1]) for key in killed['still']}
    lost = {k for k, e in enumerate(entries)
            if 'every worker that replayed it died' in (e['error'] or '')}
    assert lost and lost <= hit, (killed, entries)
    assert 'the scheduler stopped retrying it' in entries[min(lost)]['error']
    for k, entry in enumerate(entries):
        if k in lost:
            assert entry['status'] == 'failed' and entry['report'] is None
        elif entry['name'] == 'cut':
            assert 'cannot read the bag' in entry['error']
        else:  # every other bag's result is kept
            assert entry['status'] == 'ok', entry
            assert (tmp_path / 'out' / entry['report_json']).is_file()
    client.wait_for_workers(2, timeout=60)


def test_a_lost_scheduler_fails_the_unfinished_bags_and_keeps_the_rest(
        arm: Any, trials: Path, tmp_path: Path) -> None:
    """A scheduler and a worker as separate processes (as `dask scheduler` and `dask worker`
    run them); the scheduler is killed once the first bag is done."""
    model, certificate = arm
    folder = tmp_path / 'bags'
    for k in range(6):
        shutil.copytree(trials / 'arm_a', folder / f'run{k}')
    bags = sorted(folder.iterdir())
    out = tmp_path / 'out'
    env = dict(os.environ)
    env['PYTHONPATH'] = os.pathsep.join([str(REPO)] + [p for p in [env.get('PYTHONPATH')] if p])
    scheduler_file = tmp_path / 'scheduler.json'
    common = ['--no-dashboard', '--host', '127.0.0.1', '--scheduler-file', str(scheduler_file)]
    scheduler = subprocess.Popen(
        [sys.executable, '-m', 'distributed.cli.dask_scheduler', '--port', '0', *common],
        env=env, stdout=subprocess.DEVNULL, stderr=subprocess.DEVNULL, start_new_session=True)
    worker = None
    try:
        deadline = time.monotonic() + 60.0
        while not scheduler_file.is_file() and time.monotonic() < deadline:
            time.sleep(0.05)
        time.sleep(0.2)  # the file is written whole, but give the writer its close
        address = json.loads(scheduler_file.read_text())['address']
        worker = subprocess.Popen(
            [sys.executable, '-m', 'distributed.cli.dask_worker', '--nthreads', '1',
             '--nworkers', '1', *common], env=env, stdout=subprocess.DEVNULL,
            stderr=subprocess.DEVNULL, start_new_session=True, cwd=tmp_path)

        def kill_after_the_first_bag() -> None:
            while time.monotonic() < deadline + 60.0:
                if any((out / bag.name / 'replay_report.json').is_file() for bag in bags):
                    time.sleep(0.3)  # its result on its way to the client
                    os.killpg(scheduler.pid, signal.SIGKILL)
                    return
                time.sleep(0.02)

        killer = threading.Thread(target=kill_after_the_first_bag)
        killer.start()
        try:
            entries = replay_bags(bags, model, [CertificateChoice('cert', certificate)],
                                  ReplayOptions(), out, cluster=address, progress=False)
        finally:
            killer.join()
    finally:
        for process in (worker, scheduler):
            if process is not None and process.poll() is None:
                os.killpg(process.pid, signal.SIGKILL)
            if process is not None:
                process.wait(timeout=30)
    assert scheduler.returncode == -signal.SIGKILL
    assert [e['name'] for e in entries] == [b.name for b in bags]
    done = [e for e in entries if e['status'] == 'ok']
    dropped = [e for e in entries if e['status'] != 'ok']
    assert done and dropped, entries
    for entry in done:  # kept, with their reports
        assert (out / entry['report_json']).is_file()
    for entry in dropped:
        assert 'the cluster dropped it before it finished' in entry['error'], entry
        assert '\n' not in entry['error']


def test_bad_cluster_addresses_are_clear_errors(trials: Path, certificate_file: Path,
                                                cluster: Any, tmp_path: Path,
                                                monkeypatch: pytest.MonkeyPatch,
                                                capsys: pytest.CaptureFixture[str]) -> None:
    local_cluster, _ = cluster
    shutil.copytree(trials, tmp_path / 'trials')
    monkeypatch.chdir(tmp_path)
    worker = next(iter(local_cluster.scheduler_info['workers']))
    import socket

    with socket.socket() as closed:  # a port nobody listens on
        closed.bind(('127.0.0.1', 0))
        free = closed.getsockname()[1]
    cases = {f'tcp://127.0.0.1:{free}': 'cannot reach the cluster scheduler at',
             worker: 'is a Dask worker; give the address of the scheduler',
             'scheduler': 'is not tcp://HOST:PORT',
             'http://127.0.0.1:8786': 'only tcp://HOST:PORT addresses'}
    for address, message in cases.items():
        assert main(_replay_args(certificate_file, '--cluster', address)) == 2, address
        printed = capsys.readouterr()
        assert message in printed.err, (address, printed.err)
        assert 'Traceback' not in printed.err + printed.out
    assert main(_replay_args(certificate_file, '--cluster', local_cluster.scheduler_address,
                             '--jobs', '2')) == 2
    assert '--jobs and --cluster exclude each other' in capsys.readouterr().err
    assert not Path('out/replay_summary.json').exists()  # nothing replayed, nothing claimed


def test_without_dask_the_cluster_option_says_what_to_install(
        trials: Path, certificate_file: Path, tmp_path: Path,
        monkeypatch: pytest.MonkeyPatch, capsys: pytest.CaptureFixture[str]) -> None:
    monkeypatch.setitem(sys.modules, 'distributed', None)  # import distributed fails
    shutil.copytree(trials, tmp_path / 'trials')
    monkeypatch.chdir(tmp_path)
    assert main(_replay_args(certificate_file, '--cluster', 'tcp://127.0.0.1:8786')) == 2
    error = capsys.readouterr().err
    assert 'needs Dask distributed, which is not installed' in error
    assert "pip install 'distributed" in error


def test_a_worker_reports_what_it_does_not_see(tmp_path: Path) -> None:
    (tmp_path / 'marker').write_text('token-1')
    (tmp_path / 'bag.mcap').write_bytes(b'')
    seen = inspect_worker(str(tmp_path), 'marker', 'token-1',
                          [str(tmp_path / 'bag.mcap'), str(tmp_path / 'gone.mcap')])
    assert seen['error'] is None and seen['sees_output'] and seen['writes_output']
    assert seen['missing'] == [str(tmp_path / 'gone.mcap')]
    assert seen['environment']['safety_filter']
    other = inspect_worker(str(tmp_path), 'marker', 'token-2', [])
    assert not other['sees_output']  # a folder of the same name elsewhere: another token
    assert sorted(p.name for p in tmp_path.iterdir()) == ['bag.mcap', 'marker']


def test_addresses_parse_to_tcp() -> None:
    assert parse_address('10.0.0.5:8786') == ('tcp://10.0.0.5:8786', '10.0.0.5', 8786)
    assert parse_address(' tcp://[::1]:8786 ')[1:] == ('::1', 8786)
    for bad in ('', 'host', 'tcp://host:', 'tcp://:8786', 'tcp://host:99999',
                'tls://host:8786'):
        with pytest.raises(ClusterError):
            parse_address(bad)


def test_a_local_replay_does_not_import_dask() -> None:
    code = ('import sys\n'
            'from safety_filter.cli.main import build_parser\n'
            'import safety_filter.campaigns.replay_batch, safety_filter.cli.replay\n'
            "build_parser().parse_args(['replay', 'x', '--certificate', 'c'])\n"
            "print(sorted(m for m in sys.modules if m.split('.')[0] in "
            "('dask', 'distributed')))\n")
    result = subprocess.run([sys.executable, '-c', code], capture_output=True, text=True,
                            cwd=REPO, timeout=120)
    assert result.returncode == 0, result.stderr
    assert result.stdout.strip() == '[]'
