#!/usr/bin/env python3
"""Benchmark of the filter step: SafetyFilter.step next to the same QP rebuilt per step.

Usage::

    python3 benchmarks/bench_filter_step.py [--quick] [--steps N] [--arms planar2 reach7]

For each demo arm: random states inside the safe set S (30 % of the joints on or next to the
boundary) and random nominal torques (a third inside the torque box, a third up to 5x and a
third up to 1000x outside), fed to ``SafetyFilter.step``. Reported per step: median, 99th
percentile and maximum wall time (``time.perf_counter``; also the thread's CPU time, which
leaves out time the thread spent descheduled on a loaded machine), the split into dynamics
(M and h, timed separately on the same states), QP update and solve
(``FilterOutput.solve_time_s``) and the rest (validation, barriers, checks, output), and the
modes.

Next to it, in the same run and on the same states: the straightforward version, the same QP
written with CVXPY and rebuilt every step (dynamics from ``Dynamics.mass_and_bias``, bounds
from ``evaluate_barriers``), solved with OSQP through CVXPY at the accurate tolerance
(polished), and the ratio of the medians. It needs ``pip install cvxpy``; without it that
column is skipped.

The certificates are the hand-built ones of ``test/filter_fixtures.py`` (a crude recipe,
independent of the certification code). The states are independent draws, so the warm start
helps less than on a real trajectory: these are pessimistic figures. Timings depend on the
machine and its load (printed, with a yardstick: the time of one small numpy call); there
are no timed assertions. The per-step budget: 7-joint step p99 <= 200 us. A second table
times the step along a closed-loop run toward the limits, where the warm start helps, with
the disturbance observer off, on (its per-state range included: the hand-built
certificates carry one), on with a one-period delay predicted, and on with a lookahead of a
period, in interleaved rounds, and prints the ratios.
"""

from __future__ import annotations

import argparse
import math
import os
import sys
import time
import warnings
from dataclasses import replace
from pathlib import Path
from typing import Any

import numpy as np

ROOT = Path(__file__).resolve().parent.parent
try:
    import safety_filter  # noqa: F401
except ImportError:  # run from a source checkout without installing
    sys.path.insert(0, str(ROOT))
    import safety_filter  # noqa: F401
sys.path.insert(0, str(ROOT / 'test'))

from filter_fixtures import (  # noqa: E402
    demo_arm_and_certificate,
    random_nominal,
    random_state_in_safe_set,
)

from safety_filter.online.barrier_filter import FilterMode, SafetyFilter  # noqa: E402
from safety_filter.online.qp_solver import ACCURATE_EPS  # noqa: E402
from safety_filter.simulation.demo_arms import DEMO_ARMS  # noqa: E402

HEADER = (f'{"arm":<8} {"n":>2} {"median":>8} {"p99":>8} {"max":>8} {"dyn":>6} {"solve":>6} '
          f'{"rest":>6} {"cvxpy med":>10} {"ratio":>6}  modes')


def percentile_us(samples: list[float], q: float) -> float:
    return float(np.percentile(np.array(samples) * 1e6, q))


class CvxpyRebuilt:
    """The filter QP written straightforwardly: built with CVXPY and solved every step."""

    def __init__(self, filt: SafetyFilter) -> None:
        import cvxpy as cp

        self.cp = cp
        self.filt = filt

    def step(self, q: np.ndarray, v: np.ndarray, u_nom: np.ndarray) -> np.ndarray:
        cp = self.cp
        filt = self.filt
        mass, bias = filt.dynamics.mass_and_bias(q, v)
        bounds = filt.constraint_bounds(q, v)
        a = cp.Variable(filt.n)
        torque = mass @ a + bias
        problem = cp.Problem(cp.Minimize(cp.sum_squares(torque - u_nom)), [
            a >= bounds.accel_lower, a <= bounds.accel_upper,
            torque <= filt.torque_limit, torque >= -filt.torque_limit])
        problem.solve(solver=cp.OSQP, eps_abs=ACCURATE_EPS, eps_rel=ACCURATE_EPS, polish=True,
                      max_iter=4000, warm_start=False)
        if a.value is None:
            return np.zeros(filt.n)
        return np.clip(mass @ a.value + bias, -filt.torque_limit, filt.torque_limit)


def ufunc_call_us() -> float:
    """Time of one small numpy ufunc call [us]: a yardstick for comparing machines (the
    step is dominated by a few dozen such calls)."""
    x, y, out = np.ones(7), np.ones(7), np.empty(7)
    best = math.inf
    for _ in range(5):
        start = time.perf_counter()
        for _ in range(20000):
            np.add(x, y, out=out)
        best = min(best, (time.perf_counter() - start) / 20000)
    return best * 1e6


def bench_arm(name: str, steps: int, cvxpy_steps: int, seed: int) -> dict[str, Any]:
    model, certificate = demo_arm_and_certificate(name)
    # Unrelated random states, one per step: the observer would see each as a position jump
    # and refuse it (its cost is measured by bench_closed_loop below).
    filt = SafetyFilter(model, certificate, observer_time_constant_s=0.0)
    rng = np.random.default_rng(seed)
    states = [random_state_in_safe_set(rng, certificate) for _ in range(steps)]
    nominals = [random_nominal(rng, certificate) for _ in range(steps)]
    for (q, v), u in zip(states[:50], nominals[:50]):  # warm up (imports, caches)
        filt.step(q, v, u)
    filt.reset()

    totals, cpu, solves = [], [], []
    modes = {mode.value: 0 for mode in FilterMode}
    for (q, v), u in zip(states, nominals):
        start_cpu = time.thread_time()
        start = time.perf_counter()
        out = filt.step(q, v, u)
        totals.append(time.perf_counter() - start)
        cpu.append(time.thread_time() - start_cpu)
        solves.append(out.solve_time_s)
        modes[out.mode.value] += 1

    # Dynamics alone, as the step calls it, on the same states.
    mass, bias = np.empty((filt.n, filt.n)), np.empty(filt.n)
    dynamics = []
    for q, v in states:
        start = time.perf_counter()
        filt._dyn.mass_and_bias(q, v, mass, bias)
        dynamics.append(time.perf_counter() - start)

    result: dict[str, Any] = {
        'n': filt.n,
        'median': percentile_us(totals, 50), 'p99': percentile_us(totals, 99),
        'max': percentile_us(totals, 100),
        'cpu_median': percentile_us(cpu, 50), 'cpu_p99': percentile_us(cpu, 99),
        'dyn': percentile_us(dynamics, 50),
        'solve': percentile_us(solves, 50),  # 0 for steps without a solve
        'solve_p99': percentile_us(solves, 99),
        'modes': {k: v for k, v in modes.items() if v},
        'reasons': filt.statistics()['reasons'],
        'solved_share': float(np.mean(np.array(solves) > 0)),
    }
    result['rest'] = result['median'] - result['dyn'] - result['solve']
    result['cvxpy'] = None
    if cvxpy_steps:
        try:
            reference = CvxpyRebuilt(filt)
        except ImportError:
            return result
        times = []
        for (q, v), u in list(zip(states, nominals))[:cvxpy_steps]:
            start = time.perf_counter()
            reference.step(q, v, u)
            times.append(time.perf_counter() - start)
        result['cvxpy'] = percentile_us(times, 50)
    return result


def bench_closed_loop(name: str, steps: int, observer: bool = True,
                      predict: bool = False, lookahead: bool = False,
                      slow: bool = False) -> dict[str, Any]:
    """Step times along a closed-loop run (consecutive states, so the warm start helps):
    the model integrated with the held torque, started next to the limits and heading for
    them, with a nominal pushing outward at 3x the torque limit (as in test_filter).
    ``predict``: the certificate declares a one-period delay to predict over (``prediction_s``;
    the step then also evaluates the dynamics at the predicted state). ``lookahead``: the
    certificate plans a period ahead (``lookahead_s``; the step also evaluates the velocity
    term ``dC v/dv``). ``slow``: the certificate carries a slow design (here the same gains
    with 1.5 times gamma in a box of 0.6 times the velocity bound: the step evaluates both
    designs' barriers, and solves both QPs where the state is in both sets and both change
    the nominal; docs/method.md, "The slow set")."""
    model, certificate = demo_arm_and_certificate(name)
    if slow:
        certificate = replace(certificate, slow_design=replace(
            certificate, gamma=1.5 * certificate.gamma,
            velocity_bound=0.6 * certificate.velocity_bound))
    if predict:
        certificate = replace(certificate, prediction_s=1.0 / certificate.control_rate_hz)
    if lookahead:
        certificate = replace(certificate, lookahead_s=1.0 / certificate.control_rate_hz)
    filt = SafetyFilter(model, certificate,
                        observer_time_constant_s=None if observer else 0.0)
    plant = filt.dynamics
    period = 1.0 / certificate.control_rate_hz
    sign = np.where(np.arange(filt.n) % 2 == 0, 1.0, -1.0)
    q = np.where(sign > 0, certificate.position_upper - 0.3, certificate.position_lower + 0.3)
    v = sign * certificate.gamma * 0.3 * 0.99
    nominal = 3.0 * sign * filt.torque_limit
    totals = []
    for _ in range(steps):
        start = time.perf_counter()
        out = filt.step(q, v, nominal)
        totals.append(time.perf_counter() - start)
        for _ in range(2):
            v = v + plant.forward_dynamics(q, v, out.torque) * period / 2
            q = q + v * period / 2
    stats = filt.statistics()
    return {'n': filt.n, 'median': percentile_us(totals, 50), 'p99': percentile_us(totals, 99),
            'max': percentile_us(totals, 100),
            'modes': {k: v for k, v in stats['modes'].items() if v}}


def main(argv: list[str] | None = None) -> int:
    parser = argparse.ArgumentParser(description=__doc__.split('\n')[0])
    parser.add_argument('--quick', action='store_true', help='few steps (a smoke run)')
    parser.add_argument('--steps', type=int, default=None, help='filter steps per arm')
    parser.add_argument('--cvxpy-steps', type=int, default=None,
                        help='steps of the CVXPY version per arm (0: skip)')
    parser.add_argument('--arms', nargs='+', default=list(DEMO_ARMS), choices=DEMO_ARMS,
                        help='demo arms to step (default: all)')
    parser.add_argument('--seed', type=int, default=1,
                        help='seed of the random states and nominals (default: 1)')
    args = parser.parse_args(argv)
    steps = args.steps or (300 if args.quick else 5000)
    cvxpy_steps = args.cvxpy_steps if args.cvxpy_steps is not None else (
        20 if args.quick else 200)

    warnings.filterwarnings('ignore', message='Solution may be inaccurate')  # CVXPY's OSQP
    load = ', '.join(f'{x:.2f}' for x in os.getloadavg())
    print(f'filter step, {steps} random states in S per arm (nominals up to 1000x the box); '
          f'CVXPY rebuilt per step on the first {cvxpy_steps}; load average {load}; '
          f'times in microseconds')
    print(f'yardstick: one small numpy ufunc call takes {ufunc_call_us():.2f} us here')
    print('dyn: M and h alone (median); solve: QP update + OSQP solve (median over all steps, '
          '0 where no solve was needed); rest = median - dyn - solve')
    print(HEADER)
    for name in args.arms:
        r = bench_arm(name, steps, cvxpy_steps, args.seed)
        cvxpy = f'{r["cvxpy"]:10.0f}' if r['cvxpy'] is not None else f'{"n/a":>10}'
        ratio = f'{r["cvxpy"] / r["median"]:6.0f}' if r['cvxpy'] is not None else f'{"":>6}'
        modes = ' '.join(f'{k}={v}' for k, v in r['modes'].items())
        print(f'{name:<8} {r["n"]:>2} {r["median"]:8.0f} {r["p99"]:8.0f} {r["max"]:8.0f} '
              f'{r["dyn"]:6.1f} {r["solve"]:6.0f} {r["rest"]:6.0f} {cvxpy} {ratio}  {modes}')
        if r['reasons']:
            print(f'{"":<12}fallback reasons: {r["reasons"]}')
        print(f'{"":<12}QP solved on {100 * r["solved_share"]:.0f} % of steps; solve p99 '
              f'{r["solve_p99"]:.0f} us; thread CPU time per step: median '
              f'{r["cpu_median"]:.0f} us, p99 {r["cpu_p99"]:.0f} us')
        if r['n'] == 7:
            verdict = 'within' if r['p99'] <= 200.0 else 'over'
            print(f'{"":<12}budget 7-joint p99 <= 200 us: {verdict} ({r["p99"]:.0f} us)')
    loop_steps = 300 if args.quick else 2000
    print(f'\nclosed loop, {loop_steps} steps per arm: the model driven by the filtered torque '
          'toward the limits (consecutive states: the warm start helps)')
    print('observer: off, on, on with a one-period delay predicted (+delay), on with a '
          'lookahead of a period (+ahead), or on with a slow design (+slow)')
    print(f'{"arm":<8} {"n":>2} {"observer":>8} {"median":>8} {"p99":>8} {"max":>8}  modes')
    variants = {'off': (False, False, False, False), 'on': (True, False, False, False),
                '+delay': (True, True, False, False), '+ahead': (True, False, True, False),
                '+slow': (True, False, False, True)}
    for name in args.arms:
        rounds: dict[str, list[dict[str, Any]]] = {key: [] for key in variants}
        for _ in range(3):  # interleaved, so that load changes hit all alike
            for key, (observer, predict, ahead, slow) in variants.items():
                rounds[key].append(bench_closed_loop(name, loop_steps // 3, observer, predict,
                                                     ahead, slow))
        medians = {}
        for key, runs in rounds.items():
            medians[key] = float(np.median([r['median'] for r in runs]))
            p99 = float(np.median([r['p99'] for r in runs]))
            worst = max(r['max'] for r in runs)
            modes = ' '.join(f'{k}={v}' for k, v in runs[-1]['modes'].items())
            print(f'{name:<8} {runs[0]["n"]:>2} {key:>8} '
                  f'{medians[key]:8.0f} {p99:8.0f} {worst:8.0f}  {modes}')
        print(f'{"":<12}observer cost: median step {medians["on"] / medians["off"]:.2f}x '
              'the step without it; predicting the delay: '
              f'{medians["+delay"] / medians["on"]:.2f}x the step with the observer alone; '
              f'the lookahead: {medians["+ahead"] / medians["on"]:.2f}x; a slow design: '
              f'{medians["+slow"] / medians["on"]:.2f}x')
    return 0


if __name__ == '__main__':
    sys.exit(main())
