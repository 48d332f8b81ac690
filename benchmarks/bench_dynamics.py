#!/usr/bin/env python3
"""Benchmark of the dynamics: per-step M + h and batched M + g, next to raw Pinocchio.

Usage::

    python3 benchmarks/bench_dynamics.py [--quick]

Per call: ``Dynamics.mass_and_bias(q, v)`` with the numpy backend and the pinocchio backend,
each next to raw Pinocchio (``pin.crba`` + ``pin.nonLinearEffects`` on a model loaded
directly from the URDF, locked joints removed) measured in the same run.
Batched: ``mass_matrix_batch`` + ``gravity_torque_batch`` over many configurations, in
configurations per second, next to a Python loop over raw Pinocchio (``pin.crba`` +
``pin.computeGeneralizedGravity``).

Times are medians over repeats (``time.perf_counter``). Figures depend on the machine; the
ratios are the meaningful part.
"""

from __future__ import annotations

import argparse
import statistics
import sys
import time
from collections.abc import Callable
from pathlib import Path
from typing import Any

import numpy as np
import yaml

try:
    import safety_filter  # noqa: F401
except ImportError:  # run from a source checkout without installing
    sys.path.insert(0, str(Path(__file__).resolve().parent.parent))

from safety_filter.core.dynamics import (  # noqa: E402
    Dynamics,
    gravity_torque_batch,
    mass_matrix_batch,
)
from safety_filter.simulation.demo_arms import (  # noqa: E402
    DEMO_ARMS,
    demo_arm_files,
    load_demo_arm,
)

PER_CALL_HEADER = (f'{"arm":<8} {"n":>2} {"numpy [us]":>11} {"pinocchio [us]":>15} '
                   f'{"raw pin [us]":>13} {"numpy/raw":>10} {"pinocchio/raw":>14}')
BATCH_HEADER = (f'{"arm":<8} {"n":>2} {"batch [cfg/s]":>14} {"raw pin loop [cfg/s]":>21} '
                f'{"batch/loop":>11}')


def median_time(call: Callable[[], Any], number: int, repeats: int) -> float:
    """Median over ``repeats`` of the mean time [s] of ``number`` calls."""
    call()  # warm up
    samples = []
    for _ in range(repeats):
        start = time.perf_counter()
        for _ in range(number):
            call()
        samples.append((time.perf_counter() - start) / number)
    return statistics.median(samples)


def raw_pinocchio(name: str) -> tuple[Any, Any, Any]:
    """(pin module, model, data) of a demo arm loaded straight from its URDF."""
    import pinocchio as pin

    urdf, limits = demo_arm_files(name)
    spec = yaml.safe_load(limits.read_text(encoding='utf-8')) or {}
    model = pin.buildModelFromUrdf(str(urdf))
    locked = spec.get('locked_joints') or {}
    if locked:
        reference = pin.neutral(model)
        ids = []
        for joint, position in locked.items():
            joint_id = model.getJointId(joint)
            reference[model.joints[joint_id].idx_q] = position
            ids.append(joint_id)
        model = pin.buildReducedModel(model, sorted(ids), reference)
    model.gravity.linear = np.array(spec.get('gravity', [0.0, 0.0, -9.80665]), dtype=float)
    return pin, model, model.createData()


def main(argv: list[str] | None = None) -> int:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument('--quick', action='store_true', help='few repeats, small batches')
    args = parser.parse_args(argv)
    number, repeats = (20, 3) if args.quick else (300, 7)
    batch_size, batch_repeats = (500, 1) if args.quick else (20000, 3)
    try:
        import pinocchio  # noqa: F401
        have_pin = True
    except ImportError:
        have_pin = False
        print('Pinocchio is not installed (pip install pin): raw Pinocchio columns are empty')

    rng = np.random.default_rng(0)
    print(f'per-call M + h (Dynamics.mass_and_bias), median of {repeats} x {number} calls')
    print(PER_CALL_HEADER)
    for name in DEMO_ARMS:
        model = load_demo_arm(name)
        n = model.n_joints
        q = rng.uniform(model.position_lower, model.position_upper)
        v = rng.uniform(-model.velocity_limit, model.velocity_limit)
        numpy_dyn = Dynamics(model, backend='numpy')
        t_numpy = median_time(lambda d=numpy_dyn: d.mass_and_bias(q, v), number, repeats)
        if have_pin:
            pin_dyn = Dynamics(model, backend='pinocchio')
            t_pin = median_time(lambda d=pin_dyn: d.mass_and_bias(q, v), number, repeats)
            pin, raw_model, raw_data = raw_pinocchio(name)

            def raw_call() -> None:
                pin.crba(raw_model, raw_data, q)
                pin.nonLinearEffects(raw_model, raw_data, q, v)
            t_raw = median_time(raw_call, number, repeats)
            print(f'{name:<8} {n:>2} {t_numpy * 1e6:>11.1f} {t_pin * 1e6:>15.1f} '
                  f'{t_raw * 1e6:>13.1f} {t_numpy / t_raw:>10.1f} {t_pin / t_raw:>14.2f}')
        else:
            print(f'{name:<8} {n:>2} {t_numpy * 1e6:>11.1f} {"-":>15} {"-":>13} {"-":>10} '
                  f'{"-":>14}')

    print()
    print(f'batched M + g (mass_matrix_batch + gravity_torque_batch) over {batch_size} '
          f'configurations, median of {batch_repeats}')
    print(BATCH_HEADER)
    for name in DEMO_ARMS:
        model = load_demo_arm(name)
        n = model.n_joints
        q_batch = rng.uniform(model.position_lower, model.position_upper, size=(batch_size, n))

        def batch_call(m: Any = model, qs: np.ndarray = q_batch) -> None:
            mass_matrix_batch(m, qs)
            gravity_torque_batch(m, qs)
        rate = batch_size / median_time(batch_call, 1, batch_repeats)
        if have_pin:
            pin, raw_model, raw_data = raw_pinocchio(name)

            def loop_call(qs: np.ndarray = q_batch) -> None:
                for q in qs:
                    pin.crba(raw_model, raw_data, q)
                    pin.computeGeneralizedGravity(raw_model, raw_data, q)
            loop_rate = batch_size / median_time(loop_call, 1, batch_repeats)
            print(f'{name:<8} {n:>2} {rate:>14.0f} {loop_rate:>21.0f} {rate / loop_rate:>11.2f}')
        else:
            print(f'{name:<8} {n:>2} {rate:>14.0f} {"-":>21} {"-":>11}')
    return 0


if __name__ == '__main__':
    sys.exit(main())
