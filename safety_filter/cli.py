"""Command line: ``safety-filter <command>``.

Commands grow with the package; each one loads the robot the same way (a demo arm by name,
or a URDF with an optional limits file and chain selection).
"""

from __future__ import annotations

import argparse
import sys
from collections.abc import Sequence

import numpy as np

from safety_filter.demo_arms import DEMO_ARMS, load_demo_arm
from safety_filter.dynamics import Dynamics
from safety_filter.errors import SafetyFilterError
from safety_filter.model import RobotModel

EXIT_OK = 0
EXIT_BAD_INPUT = 2
EXIT_NOT_CERTIFIED = 3

SAFETY_NOTICE = (
    'CAUTION: safety_filter is not a certified safety function. It does not replace '
    'hardware emergency stops, safety-rated monitoring or a risk assessment; local '
    'regulations and qualified safety engineers have the last word.')


def add_robot_arguments(parser: argparse.ArgumentParser) -> None:
    """Options that select the robot: a demo arm, or a URDF with limits and chain."""
    group = parser.add_argument_group('robot')
    group.add_argument('--demo', choices=DEMO_ARMS, default=None,
                       help='a built-in demo arm (default: bench6 when no --urdf is given)')
    group.add_argument('--urdf', help='path of the robot URDF')
    group.add_argument('--limits', help='limits file (YAML) overriding URDF limits')
    group.add_argument('--base-link', help='first link of the chain (default: URDF root)')
    group.add_argument('--tip-link', help='last link of the chain')
    group.add_argument('--joints', help='comma-separated chain joints, base to tip')


def load_robot(args: argparse.Namespace) -> RobotModel:
    """The robot model that the robot options describe."""
    if args.urdf is None:
        if args.limits or args.base_link or args.tip_link or args.joints:
            raise SafetyFilterError('--limits, --base-link, --tip-link and --joints need --urdf')
        return load_demo_arm(args.demo or 'bench6')
    if args.demo is not None:
        raise SafetyFilterError('give either --demo or --urdf, not both')
    joints = [j.strip() for j in args.joints.split(',') if j.strip()] if args.joints else None
    return RobotModel.from_urdf(args.urdf, limits=args.limits, base_link=args.base_link,
                                tip_link=args.tip_link, joints=joints)


def _command_inspect(args: argparse.Namespace) -> int:
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
    return EXIT_OK


def build_parser() -> argparse.ArgumentParser:
    """The argument parser of ``safety-filter``."""
    parser = argparse.ArgumentParser(
        prog='safety-filter',
        description='Certified barrier safety filter for torque-controlled arms. '
        + SAFETY_NOTICE)
    commands = parser.add_subparsers(dest='command', required=True)
    inspect = commands.add_parser(
        'inspect', help='load a robot and print its chain, limits and dynamics at a few states')
    add_robot_arguments(inspect)
    inspect.add_argument('--states', type=int, default=2, help='random states to evaluate')
    inspect.add_argument('--seed', type=int, default=0)
    inspect.add_argument('--backend', choices=('auto', 'numpy', 'pinocchio'), default='auto')
    inspect.set_defaults(handler=_command_inspect)
    return parser


def main(argv: Sequence[str] | None = None) -> int:
    """Entry point of the ``safety-filter`` command."""
    parser = build_parser()
    args = parser.parse_args(argv)
    print(SAFETY_NOTICE, file=sys.stderr)
    try:
        return int(args.handler(args))
    except SafetyFilterError as err:
        print(f'error: {err}', file=sys.stderr)
        return EXIT_BAD_INPUT


if __name__ == '__main__':
    sys.exit(main())
