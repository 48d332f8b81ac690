#!/usr/bin/env python3
"""Benchmark of certification: wall time per stage for the 7-joint and the 6-joint demo arm.

Usage::

    python3 benchmarks/bench_certify.py [--quick] [--arms reach7 bench6]

Certifies each arm (default: reach7, then bench6) with the default
:class:`safety_filter.certification.certify.CertifySettings` and prints the time of every stage as
certification records it (``CertificationOutcome.stage_seconds``: bounds, authority,
sampling margin, gains, falsifier) and the total, with the outcome (certified or not, the
condition used, the certified velocity fraction) and the falsifier's smallest slack. Then
the cost of robustness: each arm certified again for its declared uncertainty set (the
defaults), a narrower set and none, with the authority and certified velocity fraction per
joint of each.

``--quick`` uses fewer samples where that is safe (1024 bound samples refined from one start
instead of 4096 from two, 2000 falsifier states instead of 100 000): it checks that the
pipeline runs end to end, its timings say little. The sampling-margin rollouts keep their
default count: with fewer, or with cruder bounds, the margin iteration settles later and the
run takes longer, not shorter (and reach7 stops certifying).
Figures depend on the machine and
its load (printed, with a yardstick: the time of one small numpy call); there are no timed
assertions anywhere.
"""

from __future__ import annotations

import argparse
import os
import platform
import sys
import time
from pathlib import Path

import numpy as np

ROOT = Path(__file__).resolve().parent.parent
try:
    import safety_filter  # noqa: F401
except ImportError:  # run from a source checkout without installing
    sys.path.insert(0, str(ROOT))
    import safety_filter  # noqa: F401

from safety_filter.certification.certify import CertifySettings, certify_with_evidence  # noqa: E402
from safety_filter.certification.dynamics_bounds import BoundSettings  # noqa: E402
from safety_filter.core.model_uncertainty import model_with_inertials  # noqa: E402
from safety_filter.core.uncertainty_set import UncertaintySet  # noqa: E402
from safety_filter.simulation.demo_arms import DEMO_ARMS, load_demo_arm  # noqa: E402

STAGES = ('bounds', 'authority', 'sampling margin', 'gains', 'falsifier')


def quick_settings() -> CertifySettings:
    """Far fewer samples everywhere: a smoke run of the whole pipeline."""
    return CertifySettings(
        bounds=BoundSettings(samples=1024, refine_starts=1),
        falsifier_states=2000,
    )


def yardstick_us() -> float:
    """Median time of one small numpy call [us], to compare machines and loads."""
    a = np.random.default_rng(0).random((6, 6))
    times = []
    for _ in range(2000):
        start = time.perf_counter()
        np.dot(a, a)
        times.append(time.perf_counter() - start)
    return 1e6 * float(np.median(times))


def bench_arm(name: str, settings: CertifySettings) -> dict[str, float]:
    """Certify one demo arm and print its stage times; returns them with the total."""
    model = load_demo_arm(name)
    start = time.perf_counter()
    outcome = certify_with_evidence(model, settings)
    total = time.perf_counter() - start
    c = outcome.certificate
    print(f'\n{name} ({model.n_joints} joints): certified {c.certified}, condition '
          f'{c.condition}, velocity scale {outcome.velocity_scale:.3f}')
    if not c.certified:
        for reason in c.reasons:
            print(f'  reason: {reason}')
    reach = c.gamma * np.array([float(c.alpha1.value(r)) for r in model.position_range])
    print('  certified velocity fraction per joint: '
          + ' '.join(f'{x:.2f}' for x in reach / np.array(model.velocity_limit)))
    if outcome.falsifier is not None:
        f = outcome.falsifier
        print(f'  falsifier: {f.states} states, {f.lp_solved} LPs, {f.infeasible} infeasible, '
              f'smallest slack {f.min_slack:.4f}')
    print(f'  {"stage":<16} {"seconds":>8} {"share":>6}')
    for stage in STAGES:
        if stage in outcome.stage_seconds:
            seconds = outcome.stage_seconds[stage]
            print(f'  {stage:<16} {seconds:8.2f} {100 * seconds / total:5.1f}%')
    for stage, seconds in outcome.stage_seconds.items():
        if stage not in STAGES:  # a stage added later still shows up
            print(f'  {stage:<16} {seconds:8.2f} {100 * seconds / total:5.1f}%')
    print(f'  {"total":<16} {total:8.2f}')
    return {**outcome.stage_seconds, 'total': total}


UNCERTAINTY_SETS = {
    'default': UncertaintySet(),
    'narrower': UncertaintySet(payload_told_within=0.1, link_mass_error=0.05,
                               link_inertia_error=0.05, com_error=0.002,
                               viscous_friction_spread=0.01, coulomb_friction_spread=0.01,
                               torque_error_relative=0.01, torque_error_absolute=0.002,
                               velocity_noise=0.003),
    'none': UncertaintySet.exact(),
}


def cost_of_robustness(name: str, settings: CertifySettings) -> None:
    """Certify one arm for the default uncertainty set, a narrower one and none; print the
    authority and the certified velocity fraction per joint for each."""
    base = load_demo_arm(name)
    print(f'\ncost of robustness, {name}: authority e [rad/s^2] / certified velocity '
          'fraction per joint')
    for label, uncertainty in UNCERTAINTY_SETS.items():
        model = model_with_inertials(base, uncertainty=uncertainty)
        start = time.perf_counter()
        c = certify_with_evidence(model, settings).certificate
        seconds = time.perf_counter() - start
        reach = c.gamma * np.array([float(c.alpha1.value(r)) for r in model.position_range])
        fraction = reach / np.array(model.velocity_limit)
        print(f'  {label:<9} certified {str(c.certified):<5} ({seconds:5.1f} s): '
              + ' '.join(f'{e:.3g}/{f:.2f}' for e, f in zip(c.authority, fraction)))


def main(argv: list[str] | None = None) -> int:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument('--quick', action='store_true', help='far fewer samples (smoke run)')
    parser.add_argument('--arms', nargs='+', default=['reach7', 'bench6'], choices=DEMO_ARMS,
                        help='demo arms to certify (default: reach7 bench6)')
    parser.add_argument('--no-robustness', action='store_true',
                        help='skip the cost-of-robustness runs (three more certifications '
                             'per arm)')
    args = parser.parse_args(argv)
    settings = quick_settings() if args.quick else CertifySettings()
    print(f'certification benchmark ({"quick" if args.quick else "default settings"}); '
          f'Python {platform.python_version()}, numpy {np.__version__}, '
          f'{os.cpu_count()} CPUs, yardstick (6x6 np.dot) {yardstick_us():.2f} us')
    for name in args.arms:
        bench_arm(name, settings)
    if not args.no_robustness:
        for name in args.arms:
            cost_of_robustness(name, settings)
    return 0


if __name__ == '__main__':
    sys.exit(main())
