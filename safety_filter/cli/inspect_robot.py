"""``safety-filter inspect``: load a robot and print its chain, limits and dynamics.

(Not named ``inspect.py``: run as a script from this folder, that name would hide the
standard library's ``inspect``.)
"""

from __future__ import annotations

import argparse

from safety_filter.cli.robot_options import add_robot_arguments, load_robot
from safety_filter.errors import ExitCode


def add_inspect_parser(commands: argparse._SubParsersAction) -> None:
    """Add ``safety-filter inspect``."""
    inspect = commands.add_parser(
        'inspect',
        description='Load a robot (a demo arm, or a URDF with its limits file), check it, and '
        'print its chain, limits, model hash, and the mass matrix, bias and gravity torques at '
        'the middle of the joint ranges and at a few random states. Exit code 0: the robot '
        'loaded; 2: bad input (options, URDF, limits file).')
    add_robot_arguments(inspect)
    inspect.add_argument('--states', type=int, default=2,
                         help='random states to evaluate (default: 2)')
    inspect.add_argument('--seed', type=int, default=0,
                         help='seed of the random states (default: 0)')
    inspect.add_argument('--backend', choices=('auto', 'numpy', 'pinocchio'), default='auto',
                         help='dynamics backend (default auto: Pinocchio when it is '
                         'installed, else numpy)')
    inspect.set_defaults(handler=command_inspect)


def command_inspect(args: argparse.Namespace) -> int:
    """Run ``safety-filter inspect``: exit code 0, or an input error (2)."""
    import numpy as np

    from safety_filter.core.dynamics import Dynamics

    model = load_robot(args)
    print(model.describe())
    print(f'model hash: {model.content_hash()}')
    dynamics = Dynamics(model, backend=args.backend)
    print(f'dynamics backend: {dynamics.backend}')
    rng = np.random.default_rng(args.seed)
    np.set_printoptions(precision=4, suppress=True, linewidth=110)
    states = [('mid-range at rest', 0.5 * (model.position_lower + model.position_upper),
               np.zeros(model.n_joints))]
    for k in range(args.states):
        q = rng.uniform(model.position_lower, model.position_upper)
        v = rng.uniform(-model.velocity_limit, model.velocity_limit)
        states.append((f'random state {k + 1}', q, v))
    for label, q, v in states:
        mass, bias = dynamics.mass_and_bias(q, v)
        gravity = dynamics.gravity_torque(q)
        print(f'\n{label}:\n  q = {q}\n  v = {v}')
        print(f'  g(q) = {gravity}\n  h(q, v) = {bias}')
        print(f'  g / effort limit = {np.abs(gravity) / model.effort_limit}')
        print('  M(q) =\n' + '\n'.join('    ' + line for line in str(mass).splitlines()))
    return ExitCode.OK
