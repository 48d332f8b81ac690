"""The dynamics benchmark still runs (no timing assertions: figures depend on the machine)."""

from __future__ import annotations

import os
import subprocess
import sys
from pathlib import Path

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
