#!/usr/bin/env python3
"""Benchmark of the guarantee under model error: the filter on arms that are not its model.

Usage::

    python3 benchmarks/bench_model_error.py [--quick] [--arm bench6] [--duration 6]

The arm's certificate (certified here with the default settings and 20 000 falsifier
states, as the demo does) drives, in closed loop, plants that differ from the filter's model:
the same model (matched), the payload at either end of its range while the filter is not told
it, and every link mass and inertia 10 % heavier or lighter with the payload matched. The
plant is the package's dynamics of the perturbed model integrated with RK4 at 10 kHz, the
filter runs at 1 kHz and the driver clips the torque to the box. The nominal is benign:
computed-torque tracking, with the filter's model, of sinusoids that stay 10 % of the range
inside every position limit and reach half the rated speed (without a filter this motion
keeps every limit). Printed per plant, with the disturbance observer on (the default) and
off (the filter then trusts its model exactly): the largest excursion past the position,
velocity and torque limits, the share of steps outside the safe set S, and the filter's
modes. No timing here: the figures are what the closed loop did.
"""

from __future__ import annotations

import argparse
import sys
from pathlib import Path

import numpy as np

ROOT = Path(__file__).resolve().parent.parent
try:
    import safety_filter  # noqa: F401
except ImportError:  # run from a source checkout without installing
    sys.path.insert(0, str(ROOT))
    import safety_filter  # noqa: F401

from safety_filter import SafetyFilter  # noqa: E402
from safety_filter.certification.certify import CertifySettings, certify  # noqa: E402
from safety_filter.core.model_uncertainty import model_with_inertials  # noqa: E402
from safety_filter.simulation.command_sources import SafeTracking  # noqa: E402
from safety_filter.simulation.demo_arms import DEMO_ARMS, load_demo_arm  # noqa: E402
from safety_filter.simulation.plant import limit_violations, run_closed_loop  # noqa: E402


def plants(model):  # noqa: ANN001, ANN201
    """(label, plant model, plant payload) of the runs; the filter's payload is the middle."""
    low, high = model.payload.mass_min, model.payload.mass_max
    middle = 0.5 * (low + high)

    def scaled(factor: float):  # noqa: ANN202
        return model_with_inertials(model, body_mass=np.array(model.body_mass) * factor,
                                    body_inertia=np.array(model.body_inertia) * factor)

    return [('matched', model, middle), (f'payload {low:g} kg', model, low),
            (f'payload {high:g} kg', model, high), ('links +10 %', scaled(1.1), middle),
            ('links -10 %', scaled(0.9), middle)]


def main(argv: list[str] | None = None) -> int:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument('--arm', default='bench6', choices=DEMO_ARMS,
                        help='the demo arm (default: bench6)')
    parser.add_argument('--duration', type=float, default=6.0, help='seconds per run')
    parser.add_argument('--quick', action='store_true', help='1 s runs (a smoke run)')
    args = parser.parse_args(argv)
    duration = 1.0 if args.quick else args.duration
    model = load_demo_arm(args.arm)
    certificate = certify(model, CertifySettings(falsifier_states=20_000))
    if not certificate.certified:
        print(f'{args.arm} did not certify: {certificate.reasons}')
        return 1
    rate = certificate.control_rate_hz
    print(f'{args.arm}: benign tracking at half the rated speed, {duration:g} s per run, '
          f'filter at {rate:g} Hz not told the payload, plant RK4 at 10 kHz')
    print(f'{"plant":<16} {"observer":>8} {"pos over":>9} {"vel over":>9} {"trq over":>9} '
          f'{"out of S":>8}  modes')
    for label, plant, payload in plants(model):
        for observer in (True, False):
            filt = SafetyFilter(model, certificate,
                                observer_time_constant_s=None if observer else 0.0)
            nominal = SafeTracking(model, filt.payload_mass, 0.5, seed=0)
            q0, v0, _ = nominal.reference(0.0)
            for _ in range(60):  # start inside S
                if np.all(filt.constraint_bounds(q0, v0).smallest > 0.0):
                    break
                v0 = 0.5 * v0
            log = run_closed_loop(plant, filt.step, nominal, duration, rate, q0, v0,
                                  payload_mass=payload)
            broken = limit_violations(model, log.q, log.v, log.torque)
            outside = float(np.mean(np.min(filt.constraint_bounds(log.q, log.v).smallest,
                                           axis=1) < 0.0))
            modes = {m: float(np.mean(log.mode == m)) for m in sorted(set(log.mode))}
            text = ' '.join(f'{m} {100 * share:.0f}%' for m, share in modes.items())
            print(f'{label:<16} {"on" if observer else "off":>8} '
                  f'{np.max(broken["position"]):9.3g} {np.max(broken["velocity"]):9.3g} '
                  f'{np.max(broken["torque"]):9.3g} {100 * outside:7.1f}%  {text}')
    return 0


if __name__ == '__main__':
    sys.exit(main())
