"""The dynamics benchmark still runs (no timing assertions: figures depend on the machine)."""

from __future__ import annotations

import os
import subprocess
import sys
from pathlib import Path

import pytest

REPO = Path(__file__).resolve().parent.parent


def test_bench_dynamics_quick_runs_and_prints_its_tables() -> None:
    env = dict(os.environ)
    env['PYTHONPATH'] = os.pathsep.join([str(REPO)] + [p for p in [env.get('PYTHONPATH')] if p])
    result = subprocess.run(
        [sys.executable, str(REPO / 'benchmarks' / 'bench_dynamics.py'), '--quick'],
        capture_output=True, text=True, timeout=120, env=env, cwd=REPO)
    assert result.returncode == 0, result.stderr
    out = result.stdout
    assert 'per-call M + h (Dynamics.mass_and_bias)' in out
    assert 'arm' in out and 'numpy/raw' in out and 'pinocchio/raw' in out
    assert 'batched M + g' in out and 'batch/loop' in out
    for name in ('planar2', 'bench6', 'reach7'):
        assert out.count(name) == 2, out  # one row in each table


@pytest.mark.slow
def test_bench_model_error_quick_keeps_limits_with_the_observer() -> None:
    """The model-error benchmark runs, and with the observer on (its default) no plant of
    planar2's breaks a limit (the plants: payload at both ends untold, links +-10 %)."""
    env = dict(os.environ)
    env['PYTHONPATH'] = os.pathsep.join([str(REPO)] + [p for p in [env.get('PYTHONPATH')] if p])
    result = subprocess.run(
        [sys.executable, str(REPO / 'benchmarks' / 'bench_model_error.py'), '--quick',
         '--arm', 'planar2'], capture_output=True, text=True, timeout=300, env=env, cwd=REPO)
    assert result.returncode == 0, result.stderr
    rows = [line.split() for line in result.stdout.splitlines()
            if ' on ' in f' {line} ' or ' off ' in f' {line} ']
    observed = [row for row in rows if 'on' in row]
    assert len(observed) == 5 and len(rows) == 10, result.stdout
    for row in observed:
        at = row.index('on')
        assert [float(x) for x in row[at + 1:at + 4]] == [0.0, 0.0, 0.0], row


@pytest.mark.slow
def test_bench_replay_cluster_quick_prints_local_and_cluster_rows() -> None:
    """The fleet-replay benchmark runs on a real local Dask cluster (1 and 2 workers) next
    to the local batch, and every row carries its ratio to the one-process baseline (the
    benchmark itself fails when a run's figures differ from the baseline's)."""
    env = dict(os.environ)
    env['PYTHONPATH'] = os.pathsep.join([str(REPO)] + [p for p in [env.get('PYTHONPATH')] if p])
    result = subprocess.run(
        [sys.executable, str(REPO / 'benchmarks' / 'bench_replay_cluster.py'), '--quick'],
        capture_output=True, text=True, timeout=300, env=env, cwd=REPO)
    assert result.returncode == 0, result.stdout + result.stderr
    rows = [line for line in result.stdout.splitlines() if line.endswith('x')]
    assert len(rows) == 5, result.stdout
    assert rows[0].startswith('local, this process') and rows[0].endswith('1.00x')
    assert rows[1].startswith('local process pool (jobs = 2)')
    cluster = [row.split() for row in rows if row.startswith('Dask cluster')]
    assert [row[row.index('(--cluster)') + 1] for row in cluster] == ['1', '2']
    assert rows[4].startswith('local, this process (jobs = 1), again')
    assert 'bags/min' in result.stdout and 'vs 1 process' in result.stdout


@pytest.mark.slow
def test_bench_permissiveness_quick_prints_three_controllers_and_the_filter_keeps_limits(
        ) -> None:
    """The permissiveness benchmark runs its quick form on bench6: one row per controller
    (unfiltered, the braking-curve clamp, the certified filter) with the tracking errors'
    ratios to the unfiltered run, and the certified filter goes past no limit in any run (the
    benchmark lists every run of the clamp or the filter that did)."""
    env = dict(os.environ)
    env['PYTHONPATH'] = os.pathsep.join([str(REPO)] + [p for p in [env.get('PYTHONPATH')] if p])
    result = subprocess.run(
        [sys.executable, str(REPO / 'benchmarks' / 'bench_permissiveness.py'), '--quick'],
        capture_output=True, text=True, timeout=300, env=env, cwd=REPO)
    assert result.returncode == 0, result.stdout + result.stderr
    lines = result.stdout.splitlines()
    rows = {line[8:24].strip(): line[24:].split() for line in lines
            if line.startswith('bench6  ') and line[8:24].strip()}
    assert list(rows) == ['unfiltered', 'braking clamp', 'certified filter'], result.stdout
    assert rows['unfiltered'].count('(1.00x)') == 4, result.stdout  # 3 speeds and the reach
    assert [float(x) for x in rows['certified filter'][:2]] == [0.0, 0.0], result.stdout
    start = lines.index('limits broken by the braking clamp or the certified filter (any run):')
    listed = lines[start + 1:lines.index('', start)]
    assert listed and not any('certified filter' in line for line in listed), result.stdout


def test_bench_import_prints_both_trees_side_by_side() -> None:
    """The start-up benchmark runs against a baseline tree checked out from git (HEAD here,
    which every checkout has) and prints one row per command with both medians and a ratio."""
    if not (REPO / '.git').exists():
        pytest.skip('not a git checkout: the benchmark checks its baseline out with git')
    result = subprocess.run(
        [sys.executable, str(REPO / 'benchmarks' / 'bench_import.py'), '--baseline', 'HEAD',
         '--repeats', '2'], capture_output=True, text=True, timeout=300, cwd=REPO)
    assert result.returncode == 0, result.stderr
    rows = {line.split('  ')[0]: line.split() for line in result.stdout.splitlines()
            if line.endswith('x') and ' ms ' in line}
    assert set(rows) == {'python -c pass', 'import safety_filter', 'safety-filter --help'}, rows
    for cells in rows.values():
        assert float(cells[-1].rstrip('x')) > 0.0
