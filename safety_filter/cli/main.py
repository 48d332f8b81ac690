"""Command line: ``safety-filter <command>``.

Commands grow with the package; each one loads the robot the same way (a demo arm by name,
or a URDF with an optional limits file and chain selection).
"""

from __future__ import annotations

import argparse
import os
import re
import sys
import tempfile
from collections.abc import Sequence
from pathlib import Path
from typing import TYPE_CHECKING, Any

import numpy as np

from safety_filter._version import __version__
from safety_filter.cli.robot_options import GRAVITY_CONVENTIONS, namespace_argument
from safety_filter.core.dynamics import Dynamics
from safety_filter.core.robot_model import RobotModel
from safety_filter.errors import SafetyFilterError
from safety_filter.simulation.demo_arms import DEMO_ARMS, load_demo_arm

if TYPE_CHECKING:
    from safety_filter.certification.certify import CertifySettings
    from safety_filter.core.certificate import Certificate

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


def _certify_settings(args: argparse.Namespace) -> CertifySettings:
    """The :class:`CertifySettings` the certify options describe (SafetyFilterError if bad)."""
    from safety_filter.certification.certify import CertifySettings
    from safety_filter.certification.dynamics_bounds import BoundSettings
    from safety_filter.core.class_k import ClassK

    bounds = BoundSettings(samples=args.samples, inflation=args.inflation, seed=args.seed)
    if args.falsifier_states < 0:
        raise SafetyFilterError('--falsifier-states must be >= 0')
    extra = {}
    if args.gamma_margin is not None:
        extra['gamma_margin'] = args.gamma_margin
    if args.beta_margin is not None:
        extra['beta_margin'] = args.beta_margin
    return CertifySettings(
        alpha1=None if args.alpha1 == 'auto' else ClassK(args.alpha1, args.alpha1_scale),
        alpha2=ClassK(args.alpha2, args.alpha2_scale),
        control_rate_hz=args.control_rate,
        sampling_factor=args.sampling_factor,
        falsifier_states=args.falsifier_states,
        bounds=bounds,
        seed=args.seed,
        mean_over_hold={'auto': None, 'start': False, 'mean': True}[args.acceleration_form],
        **extra)


class _ProgressBar:
    """A tqdm bar on stderr driven by certification's ``(stage, fraction)`` callback."""

    def __init__(self, enabled: bool) -> None:
        self._bar = None
        self._stage = None
        if enabled:
            from tqdm import tqdm

            # disable=None: no bar when stderr is not a terminal (logs, CI, pipes).
            self._bar = tqdm(total=100, desc='starting', file=sys.stderr, leave=False,
                             disable=None,
                             bar_format='{desc:<28} {percentage:3.0f}%|{bar}| {elapsed}')

    def __call__(self, stage: str, fraction: float) -> None:
        if self._bar is None:
            return
        if stage != self._stage:
            self._stage = stage
            self._bar.reset(total=100)
            self._bar.set_description_str(stage)
        done = int(round(100 * min(max(fraction, 0.0), 1.0)))
        if done != self._bar.n:
            self._bar.n = done
            self._bar.refresh()

    def close(self) -> None:
        if self._bar is not None:
            self._bar.close()


def failed_attempt_path(output: Path) -> Path:
    """Where ``certify`` writes a failed attempt for ``--output`` (``<stem>.failed.yaml``)."""
    return output.with_name(f'{output.stem}.failed{output.suffix or ".yaml"}')


def _save_atomically(certificate: Certificate, path: Path) -> Path:
    """Write ``certificate`` to a temporary file in ``path``'s folder, then rename it over
    ``path`` (``os.replace``): readers see the old file or the new one, never a partial one."""
    path.parent.mkdir(parents=True, exist_ok=True)
    if path.exists():
        mode = path.stat().st_mode & 0o777
    else:
        umask = os.umask(0)
        os.umask(umask)
        mode = 0o666 & ~umask
    handle, temporary = tempfile.mkstemp(dir=path.parent, prefix=f'.{path.name}.',
                                         suffix='.tmp')
    os.close(handle)
    try:
        certificate.save(temporary)
        os.chmod(temporary, mode)
        os.replace(temporary, path)
    except BaseException:
        Path(temporary).unlink(missing_ok=True)
        raise
    return path


def _command_certify(args: argparse.Namespace) -> int:
    from safety_filter.certification.certify import certify_with_evidence
    from safety_filter.reports.certificate_report import format_joint_table, write_report

    model = load_robot(args)
    settings = _certify_settings(args)
    default_name = re.sub(r'[^A-Za-z0-9_.-]', '_', model.name) + '_certificate.yaml'
    output = Path(args.output) if args.output else Path(default_name)
    if output.is_dir():
        raise SafetyFilterError(f'--output {output} is a folder; give the file to write')
    bar = _ProgressBar(enabled=not (args.quiet or args.no_progress))
    try:
        outcome = certify_with_evidence(model, settings, progress=bar)
    finally:
        bar.close()
    certificate = outcome.certificate
    table = format_joint_table(outcome, model)
    if args.quiet:
        lines = [line for line in table.splitlines() if line.startswith('verdict:')]
        if not outcome.certified:
            start = table.find('why not certified:')
            lines.append(table[start:] if start >= 0 else '')
        print('\n'.join(lines))
    else:
        print(table)
    # Only a certified certificate goes to --output; a failed attempt goes next to it, so
    # that it never replaces a good certificate (nor its default report folder).
    target = output if outcome.certified else failed_attempt_path(output)
    report_dir = None
    if not args.no_report:
        report_dir = (Path(args.report_dir) if args.report_dir
                      else target.parent / f'{target.stem}_report')
    try:
        written = _save_atomically(certificate, target)
        page = write_report(outcome, model, report_dir) if report_dir is not None else None
    except OSError as err:
        raise SafetyFilterError(f'cannot write the results: {err}') from err
    if outcome.certified:
        print(f'\ncertificate (certified: true): {written.resolve()}')
    else:
        kept = ('left untouched' if output.exists() else 'not written')
        print(f'\nfailed attempt (certified: false, the filter refuses it): '
              f'{written.resolve()}\n{output} {kept}: certify writes it only when the arm is '
              'certified')
    if page is not None:
        print(f'report: {page.resolve()}')
    return EXIT_OK if outcome.certified else EXIT_NOT_CERTIFIED


def _add_certify_parser(commands: argparse._SubParsersAction) -> None:
    from safety_filter.core.class_k import ALPHA1_KINDS, ALPHA2_KINDS

    certify = commands.add_parser(
        'certify', help='certify barrier gains for a robot; write the parameter file and a '
        'report', description='Certify per-joint barrier gains for which the safety QP is '
        'feasible everywhere in the safe set, write them as a ROS 2 parameter file and write '
        'a report for the engineer. The file is replaced atomically, and only by a certified '
        'result: a failed attempt is written to <output stem>.failed.yaml (certified: false '
        'and the reasons, report in <output stem>.failed_report) and leaves --output as it '
        'was. Exit code 0: certified, 3: not certifiable, 2: bad input.')
    add_robot_arguments(certify)
    files = certify.add_argument_group('output')
    files.add_argument('--output', metavar='PATH',
                       help='parameter file to write (default: <robot name>_certificate.yaml '
                       'in the current folder)')
    files.add_argument('--report-dir', metavar='DIR',
                       help='report folder (default: <output stem>_report next to the output, '
                       '<output stem>.failed_report for a failed attempt)')
    files.add_argument('--no-report', action='store_true', help='do not write the report')
    files.add_argument('--no-progress', action='store_true', help='no progress bar')
    files.add_argument('--quiet', action='store_true',
                       help='print only the verdict, the reasons and the files written (no '
                       'table; implies --no-progress)')
    method = certify.add_argument_group('certification')
    method.add_argument('--control-rate', type=float, default=1000.0, metavar='HZ',
                        help='the control rate to certify: one filter step per period of the '
                        "driver's control loop [Hz] (default: 1000)")
    method.add_argument('--sampling-factor', type=float, default=1.0, metavar='K',
                        help='the sampled-data margin covers a zero-order hold of up to K '
                        'control periods, >= 1 (default: 1, one filter step per control '
                        'period). Give 2 when the filter may step at half the control rate: '
                        'a larger margin, so less usable torque. The filter node warns when '
                        'its measured step period exceeds this hold')
    method.add_argument('--acceleration-form', choices=('auto', 'start', 'mean'),
                        default='auto',
                        help='what the filter bounds on an arm with viscous damping: the '
                        'acceleration at the start of each control period (start), its mean '
                        'over the period, the exact response of the damped joints (mean), or '
                        'whichever certifies the larger safe set (default: auto; see '
                        'docs/method.md)')
    method.add_argument('--alpha1', choices=('auto',) + ALPHA1_KINDS, default='auto',
                        help='class-K family of the velocity barrier (default: auto, the '
                        'design with the largest safe set that certifies; see '
                        'docs/method.md)')
    method.add_argument('--alpha1-scale', type=float, default=1.0,
                        help='bend of atan/tanh alpha1, eps of sqrt [rad or m] (default: 1)')
    method.add_argument('--alpha2', choices=ALPHA2_KINDS, default='linear',
                        help='class-K family of the rate condition (default: linear)')
    method.add_argument('--alpha2-scale', type=float, default=1.0,
                        help='bend of atan/tanh alpha2 [rad/s or m/s] (default: 1)')
    method.add_argument('--gamma-margin', type=float, default=None,
                        help='gamma <= this * gamma*, in (0, 1) (default: 0.9)')
    method.add_argument('--beta-margin', type=float, default=None,
                        help='beta >= this * beta*, > 1 (default: 1.2)')
    method.add_argument('--samples', type=int, default=4096,
                        help='quasi-random samples of the joint box for the dynamics bounds '
                        '(default: 4096)')
    method.add_argument('--inflation', type=float, default=1.1,
                        help='factor on the estimated dynamics bounds, >= 1 (default: 1.1)')
    method.add_argument('--falsifier-states', type=int, default=100_000,
                        help='states the independent falsifier checks (default: 100000)')
    method.add_argument('--seed', type=int, default=0, help='random seed (default: 0)')
    certify.set_defaults(handler=_command_certify)


def _command_node(args: argparse.Namespace) -> int:
    from safety_filter.simulation.demo_arms import demo_arm_files

    try:
        from safety_filter.ros import filter_node
    except ImportError as err:
        raise SafetyFilterError(
            f'the node needs rclpy and the ROS 2 message packages ({err}); install them with '
            "pip install -e '.[ros]' or source a ROS 2 Jazzy install") from err
    # No fallback to a demo arm: the robot, its limits and its certificate are required
    # (--demo <arm> names a demo arm explicitly).
    given = [flag for flag, value in (('--demo', args.demo), ('--urdf', args.urdf),
                                      ('--robot-description', args.robot_description),
                                      ('--robot-description-topic',
                                       args.robot_description_topic))
             if value is not None]
    if len(given) > 1:
        raise SafetyFilterError(f'give one of --urdf, --robot-description, '
                                f'--robot-description-topic or --demo, not '
                                f'{" and ".join(given)}')
    description = None
    if args.demo is not None:
        if args.limits:
            raise SafetyFilterError('--demo brings its own limits file; drop --limits')
        urdf, limits = demo_arm_files(args.demo)
    elif not given or not args.limits:
        missing = [text for text, absent in (
            ('--urdf ARM.urdf (or --robot-description URDF_XML, or '
             '--robot-description-topic TOPIC)', not given),
            ('--limits ARM_LIMITS.yaml', not args.limits)) if absent]
        raise SafetyFilterError(
            f'the robot is required: give {" and ".join(missing)} (the robot the certificate '
            'was computed for), or --demo <arm> for a demo arm')
    else:
        urdf, limits = (Path(args.urdf) if args.urdf else None), Path(args.limits)
        description = args.robot_description
        if urdf is not None and not urdf.is_file():
            raise SafetyFilterError(f'URDF file not found: {urdf}')
        if not limits.is_file():
            raise SafetyFilterError(f'limits file not found: {limits}')
    certificate = Path(args.certificate)
    if not certificate.is_file():
        raise SafetyFilterError(f'certificate file not found: {certificate}')
    from safety_filter.ros.runner import FILTER_CONFIG, config_file

    # The operational parameters of config/filter.yaml (trigger joint_state, timeouts), as
    # the hardware launch file loads them; options and --ros-args given later win.
    ros_args = ['--ros-args', '--params-file', str(certificate),
                '--params-file', str(config_file(FILTER_CONFIG))]
    with tempfile.TemporaryDirectory(prefix='safety_filter_node_') as folder:
        if description is not None:
            # The URDF text through a parameter file: no shell or YAML quoting of XML.
            import yaml

            path = Path(folder) / 'robot_description.yaml'
            path.write_text(yaml.safe_dump({'/**': {'ros__parameters': {
                'robot_description': description}}}), encoding='utf-8')
            ros_args += ['--params-file', str(path)]
        elif args.robot_description_topic is not None:
            ros_args += ['-p', f'robot_description_topic:={args.robot_description_topic}']
        else:
            ros_args += ['-p', f'urdf_path:={Path(urdf).resolve()}']
        ros_args += ['-p', f'limits_path:={Path(limits).resolve()}']
        if args.namespace:
            ros_args += ['-r', f'__ns:={args.namespace}']
        return _run_node(filter_node, args, ros_args)


def _run_node(filter_node: Any, args: argparse.Namespace, ros_args: list[str]) -> int:
    if args.gravity_convention is not None:
        ros_args += ['-p', f'gravity_convention:={args.gravity_convention}']
    if args.payload_mass is not None:
        ros_args += ['-p', f'payload_mass:={float(args.payload_mass)!r}']
    ros_args += list(args.ros_args or [])
    if args.no_autostart and args.activate_at_start:
        raise SafetyFilterError('give --no-autostart or --activate-at-start, not both')
    start = ('--autostart' if args.activate_at_start
             else [] if args.no_autostart else '--configure-at-start')
    own = ['--executor', args.executor] + ([start] if start else [])
    return filter_node.main(['safety-filter-node', *own, *ros_args])


def _add_node_parser(commands: argparse._SubParsersAction) -> None:
    node = commands.add_parser(
        'node', help='run the safety filter ROS 2 node (configured, inactive until '
        'activated)',
        description='Run the safety_filter lifecycle node in this process, with the '
        'certificate parameter file, the URDF and the limits file, and the operational '
        'parameters of config/filter.yaml (one filter step per joint state). It configures '
        'itself at start-up and stays inactive (publishing no torque) until activated with '
        '`ros2 lifecycle set /safety_filter activate` (/<namespace>/safety_filter with '
        '--namespace), or at once with --activate-at-start; '
        'SIGINT or SIGTERM end it cleanly. Topics: '
        'joint_states, nominal_torque in, filtered_torque, ~/status, /diagnostics out (remap '
        'with --ros-args -r filtered_torque:=/driver/commands). Exit code 0 on a clean stop, 1 '
        'when configure/activate failed (reason in the log), 2 on bad options.')
    node.add_argument('--certificate', required=True, metavar='PATH',
                      help='certificate parameter file written by `safety-filter certify`')
    robot = node.add_argument_group('robot')
    robot.add_argument('--urdf', help='path of the robot URDF, or a .xacro file when the '
                       'xacro package is installed (required, or --robot-description, '
                       '--robot-description-topic or --demo)')
    robot.add_argument('--robot-description', metavar='URDF_XML',
                       help='the URDF as XML text, instead of --urdf')
    robot.add_argument('--robot-description-topic', metavar='TOPIC', default=None,
                       help='read the URDF at configure from this std_msgs/String topic '
                       '(transient-local, as robot_state_publisher publishes '
                       'robot_description; relative names resolve in --namespace), instead '
                       'of --urdf; configure waits up to 10 s for it')
    robot.add_argument('--limits', help='limits file (YAML; also selects the chain); required '
                       'with --urdf, --robot-description or --robot-description-topic')
    robot.add_argument('--demo', choices=DEMO_ARMS, default=None,
                       help='a built-in demo arm instead (its URDF and limits)')
    node.add_argument('--namespace', type=namespace_argument, default='', metavar='NS',
                      help="the node's ROS namespace, e.g. /arm1 (default: the root): its "
                      'topics, ~/status and lifecycle services resolve in it (the same as '
                      '--ros-args -r __ns:=/arm1)')
    node.add_argument('--gravity-convention', choices=GRAVITY_CONVENTIONS,
                      default=None, help="what the driver takes (default: 'full' torque)")
    node.add_argument('--payload-mass', type=float, default=None, metavar='KG',
                      help='payload mass of the model [kg] (default: middle of the certified '
                      'range)')
    node.add_argument('--activate-at-start', action='store_true',
                      help='activate at start-up: the node starts commanding the driver as '
                      'soon as joint states arrive (default: configured and inactive)')
    node.add_argument('--no-autostart', action='store_true',
                      help='start unconfigured; drive it with the lifecycle services')
    node.add_argument('--executor', choices=('single_threaded', 'events'),
                      default='single_threaded',
                      help="rclpy executor (default single_threaded: rclpy's "
                      "SingleThreadedExecutor; 'events': rclpy.experimental.EventsExecutor, "
                      'experimental in Jazzy)')
    node.add_argument('--ros-args', dest='ros_args', nargs=argparse.REMAINDER, default=[],
                      metavar='ROS_ARGS', help='everything after this goes to ROS, e.g. '
                      '--ros-args -r filtered_torque:=/arm/commands -p payload_mass:=0.5')
    node.set_defaults(handler=_command_node)


def build_parser() -> argparse.ArgumentParser:
    """The argument parser of ``safety-filter``."""
    parser = argparse.ArgumentParser(
        prog='safety-filter',
        description='Certified barrier safety filter for torque-controlled arms. '
        + SAFETY_NOTICE)
    parser.add_argument('--version', action='version', version=f'%(prog)s {__version__}',
                        help='print the package version and exit')
    commands = parser.add_subparsers(dest='command', required=True)
    inspect = commands.add_parser(
        'inspect', help='load a robot and print its chain, limits and dynamics at a few states',
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
    inspect.set_defaults(handler=_command_inspect)
    _add_certify_parser(commands)
    _add_node_parser(commands)
    from safety_filter.cli.replay import add_replay_parser

    add_replay_parser(commands)
    from safety_filter.cli.demo import add_demo_parser, add_run_graph_parser

    add_demo_parser(commands)
    add_run_graph_parser(commands)
    from safety_filter.cli.monitor import add_monitor_parser

    add_monitor_parser(commands)
    from safety_filter.simulation.stress_test import add_stress_parser

    add_stress_parser(commands)
    from safety_filter.replay.gravity_convention import add_check_gravity_parser

    add_check_gravity_parser(commands)
    return parser


def main(argv: Sequence[str] | None = None) -> int:
    """Entry point of the ``safety-filter`` command."""
    parser = build_parser()
    try:
        args = parser.parse_args(argv)
    except SystemExit as err:  # argparse: --help (0) or bad options (2)
        return err.code if isinstance(err.code, int) else EXIT_BAD_INPUT
    print(SAFETY_NOTICE, file=sys.stderr)
    try:
        return int(args.handler(args))
    except SafetyFilterError as err:
        print(f'error: {err}', file=sys.stderr)
        return EXIT_BAD_INPUT


if __name__ == '__main__':
    sys.exit(main())
