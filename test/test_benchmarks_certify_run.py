"""The certification benchmark still runs (no timing assertions: figures depend on the machine).

It runs with ``--quick`` on planar2 only: the quick run of its default arms (reach7, bench6)
takes about 40 s of CPU, too much for every test run; the code path is the same.
"""

from __future__ import annotations

import os
import subprocess
import sys
from pathlib import Path

import pytest

REPO = Path(__file__).resolve().parent.parent


@pytest.mark.slow
def test_bench_certify_quick_runs_and_prints_the_stages() -> None:
    env = dict(os.environ)
    env['PYTHONPATH'] = os.pathsep.join([str(REPO)] + [p for p in [env.get('PYTHONPATH')] if p])
    result = subprocess.run(
        [sys.executable, str(REPO / 'benchmarks' / 'bench_certify.py'), '--quick',
         '--arms', 'planar2'],
        capture_output=True, text=True, timeout=600, env=env, cwd=REPO)
    assert result.returncode == 0, result.stderr
    out = result.stdout
    assert 'planar2 (2 joints): certified True' in out, out
    for stage in ('bounds', 'authority', 'sampling margin', 'gains', 'falsifier', 'total'):
        assert out.count(f'  {stage} ') == 1, (stage, out)
    # the cost of robustness: three uncertainty sets, each certified, and less uncertainty
    # never certifies a slower arm (the narrower set is inside the default one)
    fractions = {}
    for label in ('default', 'narrower', 'none'):
        line = next(x for x in out.splitlines() if x.strip().startswith(label))
        assert 'certified True' in line, line
        fractions[label] = [float(pair.split('/')[1]) for pair in line.split(':', 1)[1].split()]
    for joint in range(2):
        assert fractions['default'][joint] <= fractions['narrower'][joint] + 1e-9
        assert fractions['narrower'][joint] <= fractions['none'][joint] + 1e-9
