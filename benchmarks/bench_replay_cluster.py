#!/usr/bin/env python3
"""Benchmark of fleet replay: bags per minute on a Dask cluster against the local batch.

Usage::

    python3 benchmarks/bench_replay_cluster.py [--quick] [--seconds S] [--bags N]
        [--workers 1 2 4] [--plots] [--repeat N]

A run of the bench6 demo arm (6 joints) is simulated with the filter at 1 kHz against large
sinusoidal nominal torques and written as an MCAP bag (as ``bench_replay.py`` does); the
batch is ``--bags`` copies of it. The same batch (reports without plots unless ``--plots``)
is then replayed, timed with ``time.perf_counter``:

* locally, as ``safety-filter replay`` does without ``--cluster``: in this process
  (``jobs = 1``, the baseline of every ratio) and in the local process pool
  (``jobs = 2`` and ``4``; its worker start-up included);
* on a Dask cluster on the loopback interface (``distributed.LocalCluster``, worker
  processes of one thread each) with 1, 2 and 4 workers, as ``--cluster`` does it: connect,
  check the workers, send the bags, collect the entries. The cluster is started and its
  workers warmed up (one short bag replayed on each) before the clock starts, as for a
  cluster that serves many runs; its start-up is printed on its own line;
* in this process once more, last, to show how much the machine's load moved meanwhile.

Figures (with ``--repeat N``, of the shortest of N runs of each row): wall time, bags per
minute, the recorded time replayed per second of wall time
(x real time) and the ratio of bags per minute to the one-process baseline. They depend on
the machine, its cores and its load (printed); there are no timed assertions. Every run's
entries must agree with the baseline's figures, or the benchmark fails.
"""

from __future__ import annotations

import argparse
import os
import shutil
import sys
import tempfile
import time
from pathlib import Path
from typing import Any

ROOT = Path(__file__).resolve().parent.parent
try:
    import safety_filter  # noqa: F401
except ImportError:  # run from a source checkout without installing
    sys.path.insert(0, str(ROOT))
    import safety_filter  # noqa: F401
sys.path.insert(0, str(ROOT / 'test'))

from filter_fixtures import demo_arm_and_certificate  # noqa: E402
from replay_fixtures import record_filtered_run, write_run_bag  # noqa: E402

from safety_filter.campaigns.replay_batch import replay_bags  # noqa: E402
from safety_filter.campaigns.replay_job import (  # noqa: E402
    CertificateChoice,
    ReplayOptions,
    replay_bag,
)
from safety_filter.simulation.command_sources import LargeSinusoid  # noqa: E402

RATE_HZ = 1000.0
HEADER = (f'{"what":<44} {"workers":>7} {"bags":>4} {"wall [s]":>9} {"bags/min":>9} '
          f'{"x real time":>11} {"vs 1 process":>12}')


def _row(what: str, workers: int, bags: int, seconds: float, recorded_s: float,
         baseline_per_min: float | None) -> tuple[str, float]:
    per_min = 60.0 * bags / seconds
    ratio = '' if baseline_per_min is None else f'{per_min / baseline_per_min:.2f}x'
    return (f'{what:<44} {workers:>7} {bags:>4} {seconds:>9.2f} {per_min:>9.1f} '
            f'{bags * recorded_s / seconds:>10.1f}x {ratio:>12}', per_min)


def _warm_up(bag: str, out_dir: str, model: Any, choices: Any, options: Any) -> str:
    """Replay one short bag in a worker (imports, compiled kernels, Pinocchio model)."""
    entry = replay_bag(bag, f'warm_{os.getpid()}', model, choices, options, out_dir)
    return entry['status']


def _timed(repeat: int, replay: Any) -> tuple[float, list[dict[str, Any]]]:
    """The shortest wall time of ``repeat`` calls of ``replay()`` (the machine is shared: the
    shortest is the least disturbed) and the entries of the last call."""
    best, entries = float('inf'), []
    for _ in range(repeat):
        t0 = time.perf_counter()
        entries = replay()
        best = min(best, time.perf_counter() - t0)
    return best, entries


def _check(entries: list[dict[str, Any]], baseline: list[dict[str, Any]], what: str) -> None:
    bad = [e for e in entries if e['status'] != 'ok']
    if bad:
        raise SystemExit(f'{what}: {len(bad)} bags failed: {bad[0]["error"]}')
    if [e['figures'] for e in entries] != [e['figures'] for e in baseline]:
        raise SystemExit(f'{what}: the figures differ from the one-process run')


def main() -> int:
    parser = argparse.ArgumentParser(description=__doc__.split('\n\n')[0])
    parser.add_argument('--quick', action='store_true',
                        help='0.5 s bags, 4 bags, 1 and 2 workers, pool of 2: a smoke test')
    parser.add_argument('--seconds', type=float, default=None,
                        help='recorded duration per bag [s] (default: 10, quick: 0.5)')
    parser.add_argument('--bags', type=int, default=None,
                        help='bags in the batch (default: 8, quick: 4)')
    parser.add_argument('--workers', type=int, nargs='+', default=None,
                        help='cluster sizes to time (default: 1 2 4, quick: 1 2)')
    parser.add_argument('--plots', action='store_true', help='reports with their plots')
    parser.add_argument('--repeat', type=int, default=1,
                        help='time each row this many times and keep the shortest (default: 1)')
    args = parser.parse_args()
    seconds = args.seconds or (0.5 if args.quick else 10.0)
    count = args.bags or (4 if args.quick else 8)
    sizes = args.workers or ([1, 2] if args.quick else [1, 2, 4])
    pools = [2] if args.quick else [2, 4]

    from distributed import Client, LocalCluster

    model, certificate = demo_arm_and_certificate('bench6')
    choices = [CertificateChoice('bench6', certificate)]
    options = ReplayOptions(plots=args.plots)
    work = Path(tempfile.mkdtemp(prefix='bench_replay_cluster_'))
    try:
        started = time.perf_counter()
        run = record_filtered_run(model, certificate, LargeSinusoid(model), seconds,
                                  rate_hz=RATE_HZ, internal_rate_hz=2 * RATE_HZ)
        source = write_run_bag(work / 'bags' / 'trial_00', run, 'mcap', extra_topic=False)
        for k in range(1, count):
            shutil.copytree(source, work / 'bags' / f'trial_{k:02d}')
        bags = sorted((work / 'bags').iterdir())
        short_run = record_filtered_run(model, certificate, LargeSinusoid(model), 0.2,
                                        rate_hz=RATE_HZ, internal_rate_hz=2 * RATE_HZ)
        warm_bag = write_run_bag(work / 'warm' / 'warm', short_run, 'mcap', extra_topic=False)
        steps = len(run.stamp_ns)
        print(f'fleet replay: {count} bags of {model.name} ({model.n_joints} joints), '
              f'{seconds:g} s each at {RATE_HZ / 1000:g} kHz ({steps} steps, MCAP); reports '
              f'{"with" if args.plots else "without"} plots; recording took '
              f'{time.perf_counter() - started:.1f} s')
        load = os.getloadavg() if hasattr(os, 'getloadavg') else (float('nan'),) * 3
        print(f'machine: {os.cpu_count()} cores, load average {load[0]:.2f} (1 min)')

        _warm_up(str(warm_bag), str(work / 'warm_out'), model, choices, options)
        wall, baseline = _timed(args.repeat, lambda: replay_bags(
            bags, model, choices, options, work / 'out_local_1', jobs=1, progress=False))
        _check(baseline, baseline, 'local, one process')
        rows = []
        line, baseline_per_min = _row('local, this process (jobs = 1)', 1, count, wall,
                                      seconds, None)
        rows.append(line.rstrip() + f' {"1.00x":>12}')
        for jobs in pools:
            wall, entries = _timed(args.repeat, lambda: replay_bags(
                bags, model, choices, options, work / f'out_pool_{jobs}', jobs=jobs,
                progress=False))
            _check(entries, baseline, f'local pool of {jobs}')
            rows.append(_row(f'local process pool (jobs = {jobs})', jobs, count, wall,
                             seconds, baseline_per_min)[0])
        startup = []
        for size in sizes:
            t0 = time.perf_counter()
            cluster = LocalCluster(processes=True, host='127.0.0.1', n_workers=size,
                                   threads_per_worker=1, dashboard_address='127.0.0.1:0')
            try:
                with Client(cluster.scheduler_address, set_as_default=False) as client:
                    client.wait_for_workers(size)
                    client.run(_warm_up, str(warm_bag), str(work / 'warm_out'), model,
                               choices, options)
                startup.append(f'{size}: {time.perf_counter() - t0:.1f} s')
                wall, entries = _timed(args.repeat, lambda: replay_bags(
                    bags, model, choices, options, work / f'out_cluster_{size}',
                    progress=False, cluster=cluster.scheduler_address))
            finally:
                cluster.close()
            _check(entries, baseline, f'cluster of {size}')
            rows.append(_row('Dask cluster on 127.0.0.1 (--cluster)', size, count, wall,
                             seconds, baseline_per_min)[0])
        # The baseline once more: the machine's load may change during the run (other users),
        # which this row shows.
        wall, again = _timed(args.repeat, lambda: replay_bags(
            bags, model, choices, options, work / 'out_local_1_again', jobs=1,
            progress=False))
        _check(again, baseline, 'local, one process, again')
        rows.append(_row('local, this process (jobs = 1), again', 1, count, wall, seconds,
                         baseline_per_min)[0])
        print()
        print(HEADER)
        print('\n'.join(rows))
        print()
        print(f'cluster start-up and warm-up, not timed above (workers: seconds): '
              f'{", ".join(startup)}')
        print('local pool: its worker start-up is inside its wall time; cluster: connecting, '
              'checking the workers and collecting the results are')
    finally:
        shutil.rmtree(work, ignore_errors=True)
    return 0


if __name__ == '__main__':
    sys.exit(main())
