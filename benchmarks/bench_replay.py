#!/usr/bin/env python3
"""Benchmark of bag replay: steps per second, as multiples of real time at 1 kHz.

Usage::

    python3 benchmarks/bench_replay.py [--quick] [--seconds S] [--bags N]

A run of the bench6 demo arm (6 joints) is simulated with the filter at 1 kHz against large
sinusoidal nominal torques and written as an MCAP bag the way the node's topics would be
recorded (joint state, nominal, filtered torque: three messages per step). Then, timed with
``time.perf_counter``:

* one process: reading the bag (``read_trial``), the open-loop replay
  (``replay_open_loop``), both, and the whole per-bag job as ``safety-filter replay`` does
  it (``replay_bag``: summaries, JSON and HTML report), without and with the plots;
* the same job (without plots) over ``--bags`` copies of the bag, in one process
  (jobs = 1) and as a batch on 2 cores (jobs = 2, worker processes started by the batch,
  their start-up included).

Figures are steps per second of wall time and the same divided by 1000 steps per second
(a real-time 1 kHz control loop): 20x means a 10-minute trial replays in 30 s. The
certificate is the hand-built one of ``test/filter_fixtures.py`` (as in
``bench_filter_step.py``). Timings depend on the machine and its load (printed); there are
no timed assertions.
"""

from __future__ import annotations

import argparse
import os
import shutil
import sys
import tempfile
import time
from pathlib import Path

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
from safety_filter.replay.open_loop import replay_open_loop  # noqa: E402
from safety_filter.replay.trial import read_trial  # noqa: E402
from safety_filter.simulation.command_sources import LargeSinusoid  # noqa: E402

RATE_HZ = 1000.0
HEADER = (f'{"what":<52} {"bags":>4} {"steps":>7} {"wall [s]":>9} {"steps/s":>9} '
          f'{"x real time at 1 kHz":>21}')


def _row(what: str, bags: int, steps: int, seconds: float) -> str:
    rate = steps / seconds
    return (f'{what:<52} {bags:>4} {steps:>7} {seconds:>9.3f} {rate:>9.0f} '
            f'{rate / RATE_HZ:>20.1f}x')


def main() -> int:
    parser = argparse.ArgumentParser(description=__doc__.split('\n\n')[0])
    parser.add_argument('--quick', action='store_true',
                        help='0.5 s runs, 2 bags, no plots row, no serial batch: a smoke test')
    parser.add_argument('--seconds', type=float, default=None,
                        help='recorded duration per bag [s] (default: 10, quick: 0.5)')
    parser.add_argument('--bags', type=int, default=None,
                        help='bags in the batch (default: 4, quick: 2)')
    args = parser.parse_args()
    seconds = args.seconds or (0.5 if args.quick else 10.0)
    count = args.bags or (2 if args.quick else 4)

    model, certificate = demo_arm_and_certificate('bench6')
    work = Path(tempfile.mkdtemp(prefix='bench_replay_'))
    try:
        started = time.perf_counter()
        run = record_filtered_run(model, certificate, LargeSinusoid(model), seconds,
                                  rate_hz=RATE_HZ, internal_rate_hz=2 * RATE_HZ)
        source = write_run_bag(work / 'bags' / 'trial_0', run, 'mcap', extra_topic=False)
        for k in range(1, count):
            shutil.copytree(source, work / 'bags' / f'trial_{k}')
        bags = sorted((work / 'bags').iterdir())
        steps = len(run.stamp_ns)
        print(f'replay throughput: {model.name} ({model.n_joints} joints), {seconds:g} s '
              f'recorded at {RATE_HZ / 1000:g} kHz ({steps} steps, {3 * steps} messages per '
              f'bag, MCAP); recording took {time.perf_counter() - started:.1f} s')
        load = os.getloadavg() if hasattr(os, 'getloadavg') else (float('nan'),) * 3
        print(f'machine: {os.cpu_count()} cores, load average {load[0]:.2f} (1 min)')
        print()
        print(HEADER)

        # Warm-up (imports, the filter's first set-up), not timed.
        replay_open_loop(read_trial(source, model), model, certificate)
        t0 = time.perf_counter()
        trial = read_trial(source, model)
        t1 = time.perf_counter()
        replay_open_loop(trial, model, certificate)
        t2 = time.perf_counter()
        print(_row('one process: read the bag', 1, steps, t1 - t0))
        print(_row('one process: open-loop replay', 1, steps, t2 - t1))
        print(_row('one process: read + replay', 1, steps, t2 - t0))

        choices = [CertificateChoice('bench6', certificate)]
        reports = ReplayOptions(plots=False)  # JSON and HTML tables: the replay's own cost
        t0 = time.perf_counter()
        entry = replay_bag(source, 'single', model, choices, reports, work / 'out_single')
        t1 = time.perf_counter()
        if entry['status'] != 'ok':
            print(f'replay failed: {entry["error"]}')
            return 1
        print(_row('one process: read + replay + report', 1, steps, t1 - t0))
        if not args.quick:
            plotted = replay_bag(source, 'plots', model, choices, ReplayOptions(),
                                 work / 'out_plots')
            t2 = time.perf_counter()
            if plotted['status'] != 'ok':
                print(f'replay failed: {plotted["error"]}')
                return 1
            print(_row('one process: read + replay + report + plots', 1, steps, t2 - t1))

        serial_seconds = None
        if not args.quick:
            t0 = time.perf_counter()
            serial = replay_bags(bags, model, choices, reports, work / 'out_serial', jobs=1,
                                 progress=False)
            serial_seconds = time.perf_counter() - t0
            if any(e['status'] != 'ok' for e in serial):
                print('replay failed')
                return 1
            print(_row('one process (jobs = 1): read + replay + report', count, count * steps,
                       serial_seconds))
        t0 = time.perf_counter()
        batch = replay_bags(bags, model, choices, reports, work / 'out_batch', jobs=2,
                            progress=False)
        batch_seconds = time.perf_counter() - t0
        if any(e['status'] != 'ok' for e in batch):
            print(f'replay failed: {[e["error"] for e in batch if e["error"]]}')
            return 1
        print(_row('batch on 2 cores (jobs = 2): read + replay + report', count,
                   count * steps, batch_seconds))
        print()
        print('report: replay_report.json and an HTML page of tables; plots: the PNG figures')
        if serial_seconds is not None:
            print(f'batch speed-up over one process: {serial_seconds / batch_seconds:.2f}x on '
                  '2 cores (worker start-up included)')
    finally:
        shutil.rmtree(work, ignore_errors=True)
    return 0


if __name__ == '__main__':
    sys.exit(main())
