#!/usr/bin/env python3
"""Benchmark of start-up: ``import safety_filter`` and ``safety-filter --help``, now and before.

Usage::

    python3 benchmarks/bench_import.py [--quick] [--baseline REF] [--repeats N]

Times, as wall time of a fresh Python process (``time.perf_counter`` around
``subprocess.run``):

* ``python -c pass``: the interpreter's own start-up, the floor under every row;
* ``python -c "import safety_filter"``;
* ``safety-filter --help``: the console script's entry point, read from the tree's own
  ``setup.py`` (``safety-filter = module:function``) and run as the installed script runs
  it (``from module import function; sys.exit(function())`` with ``argv`` set), so that the
  layout of either tree is measured the same way.

Each command runs for the working tree and for the baseline, a git ref (default
``435f4cc``, the last commit before the package was split into layer subpackages) checked
out for this run with ``git worktree add --detach`` in a temporary folder and removed
afterwards. Every process gets a clean environment (``PATH``, ``HOME``, ``LANG`` and
``PYTHONPATH`` set to the tree, nothing else: no ROS setup, no inherited ``PYTHONPATH``)
and starts in an empty folder; the benchmark checks that ``safety_filter`` is imported from
the tree meant. One untimed run of each command first fills both trees' bytecode caches.
Baseline and current runs alternate within each round (the order flips every round), so
that a change of machine load falls on both alike.

Figures are the median and the smallest time over ``--repeats`` runs (default 15,
``--quick`` 5) and the ratio of the medians (baseline / current: above 1x the working tree
starts faster). Timings depend on the machine and its load (printed); there are no
pass/fail thresholds.
"""

from __future__ import annotations

import argparse
import os
import re
import statistics
import subprocess
import sys
import tempfile
import time
from collections.abc import Sequence
from pathlib import Path

ROOT = Path(__file__).resolve().parent.parent
DEFAULT_BASELINE = '435f4cc'
HEADER = (f'{"command":<28} {"baseline median":>16} {"min":>8} {"current median":>15} '
          f'{"min":>8} {"baseline/current":>17}')


def _console_script(tree: Path) -> tuple[str, str]:
    """The ``safety-filter`` entry point (module, function) that ``tree``'s setup.py
    declares."""
    text = (tree / 'setup.py').read_text(encoding='utf-8')
    found = re.search(r"['\"]safety-filter\s*=\s*([\w.]+):(\w+)['\"]", text)
    if found is None:
        raise SystemExit(f'{tree / "setup.py"} declares no safety-filter console script')
    return found.group(1), found.group(2)


def _commands(tree: Path) -> dict[str, list[str]]:
    """The timed commands for one tree, by row name."""
    module, function = _console_script(tree)
    help_runner = (f"import sys; sys.argv = ['safety-filter', '--help']; "
                   f'from {module} import {function}; sys.exit({function}())')
    return {
        'python -c pass': [sys.executable, '-c', 'pass'],
        'import safety_filter': [sys.executable, '-c', 'import safety_filter'],
        'safety-filter --help': [sys.executable, '-c', help_runner],
    }


def _environment(tree: Path) -> dict[str, str]:
    """A clean environment whose only package path is ``tree``."""
    env = {'PATH': os.environ.get('PATH', '/usr/bin:/bin'), 'PYTHONPATH': str(tree),
           'LANG': 'C.UTF-8'}
    if 'HOME' in os.environ:
        env['HOME'] = os.environ['HOME']
    return env


def _check_tree(tree: Path, env: dict[str, str], cwd: Path) -> None:
    """Stop unless ``import safety_filter`` in ``env`` loads the package of ``tree`` (an
    editable install elsewhere must not be what is measured)."""
    done = subprocess.run([sys.executable, '-c', 'import safety_filter; '
                           'print(safety_filter.__file__)'],
                          env=env, cwd=cwd, capture_output=True, text=True, timeout=120)
    if done.returncode != 0:
        raise SystemExit(f'import safety_filter fails in {tree}:\n{done.stderr[-2000:]}')
    where = Path(done.stdout.strip()).resolve()
    if not where.is_relative_to(tree.resolve()):
        raise SystemExit(f'PYTHONPATH={tree} imports safety_filter from {where}')


def _run(command: Sequence[str], env: dict[str, str], cwd: Path) -> tuple[float, str]:
    """Wall time of one run [s], and the error output if it failed ('' if it did not)."""
    start = time.perf_counter()
    done = subprocess.run(list(command), env=env, cwd=cwd, stdout=subprocess.DEVNULL,
                          stderr=subprocess.PIPE, text=True, timeout=300)
    seconds = time.perf_counter() - start
    return seconds, ('' if done.returncode == 0 else
                     f'exit code {done.returncode}: {done.stderr[-1500:]}')


def _milliseconds(values: list[float]) -> tuple[str, str]:
    return f'{1e3 * statistics.median(values):.1f} ms', f'{1e3 * min(values):.1f}'


def measure(baseline_tree: Path, current_tree: Path, repeats: int,
            cwd: Path) -> dict[str, dict[str, list[float]]]:
    """Times of every command, ``{row: {'baseline': [...], 'current': [...]}}``; a row whose
    command fails in either tree is reported and left out."""
    trees = {'baseline': baseline_tree, 'current': current_tree}
    envs = {side: _environment(tree) for side, tree in trees.items()}
    for side, tree in trees.items():
        _check_tree(tree, envs[side], cwd)
    commands = {side: _commands(tree) for side, tree in trees.items()}
    rows: dict[str, dict[str, list[float]]] = {}
    for row in commands['current']:
        errors = {side: _run(commands[side][row], envs[side], cwd)[1] for side in trees}
        failed = {side: error for side, error in errors.items() if error}
        for side, error in failed.items():
            print(f'{row}: fails in the {side} tree ({trees[side]}): {error}')
        if not failed:
            rows[row] = {'baseline': [], 'current': []}
    for round_index in range(repeats):
        order = ['baseline', 'current'] if round_index % 2 == 0 else ['current', 'baseline']
        for row, times in rows.items():
            for side in order:
                seconds, _ = _run(commands[side][row], envs[side], cwd)
                times[side].append(seconds)
    return rows


def main() -> int:
    parser = argparse.ArgumentParser(description=__doc__.split('\n\n')[0])
    parser.add_argument('--quick', action='store_true',
                        help='5 runs per command instead of 15: a smoke test')
    parser.add_argument('--baseline', default=DEFAULT_BASELINE, metavar='REF',
                        help=f'git ref to compare with (default: {DEFAULT_BASELINE}, the '
                             'commit before the restructuring)')
    parser.add_argument('--repeats', type=int, default=None,
                        help='timed runs per command and tree (default: 15, quick: 5)')
    args = parser.parse_args()
    repeats = args.repeats or (5 if args.quick else 15)

    with tempfile.TemporaryDirectory(prefix='bench_import_') as folder:
        baseline_tree = Path(folder) / 'baseline'
        empty = Path(folder) / 'cwd'
        empty.mkdir()
        added = subprocess.run(['git', 'worktree', 'add', '--detach', str(baseline_tree),
                                args.baseline], cwd=ROOT, capture_output=True, text=True)
        if added.returncode != 0:
            print(f'cannot check out {args.baseline}: {added.stderr.strip()}', file=sys.stderr)
            return 2
        try:
            described = subprocess.run(['git', 'log', '-1', '--format=%h %s', args.baseline],
                                       cwd=ROOT, capture_output=True, text=True).stdout
            print('start-up time: a fresh python process per run')
            print(f'baseline: {described.strip()[:90]}')
            print(f'current:  the working tree {ROOT}')
            load = os.getloadavg() if hasattr(os, 'getloadavg') else (float('nan'),) * 3
            print(f'machine: {os.cpu_count()} cores, load average {load[0]:.2f} (1 min); '
                  f'{repeats} runs per command and tree, interleaved; python '
                  f'{sys.version.split()[0]}')
            print()
            rows = measure(baseline_tree, ROOT, repeats, empty)
        finally:
            subprocess.run(['git', 'worktree', 'remove', '--force', str(baseline_tree)],
                           cwd=ROOT, capture_output=True)
            subprocess.run(['git', 'worktree', 'prune'], cwd=ROOT, capture_output=True)
    print(HEADER)
    for row, times in rows.items():
        base_median, base_min = _milliseconds(times['baseline'])
        now_median, now_min = _milliseconds(times['current'])
        ratio = statistics.median(times['baseline']) / statistics.median(times['current'])
        print(f'{row:<28} {base_median:>16} {base_min:>8} {now_median:>15} {now_min:>8} '
              f'{ratio:>16.2f}x')
    print()
    print('ms: wall time of the whole process (interpreter start-up included: the first row);'
          ' min: the fastest run')
    return 0


if __name__ == '__main__':
    sys.exit(main())
