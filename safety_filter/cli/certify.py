"""``safety-filter certify``: certify barrier gains for a robot, write the certificate
parameter file (atomically, and only when certified) and the report."""

from __future__ import annotations

import argparse
import os
import re
import tempfile
from pathlib import Path
from typing import TYPE_CHECKING

from safety_filter.cli.progress_bar import ProgressBar
from safety_filter.cli.robot_options import add_progress_arguments, add_robot_arguments, load_robot
from safety_filter.errors import ExitCode, FileFormatError, InvalidValue

# certify_settings.DEFAULT_SLOW_BOX, for the help without importing numpy (a test checks
# that they agree).
SLOW_BOX_SHOWN = 0.6

if TYPE_CHECKING:
    from safety_filter.certification.certify import CertifySettings
    from safety_filter.core.certificate import Certificate



def certify_settings(args: argparse.Namespace) -> CertifySettings:
    """The :class:`CertifySettings` the certify options describe.

    Raises:
        InvalidValue: an option value out of range.
    """
    from safety_filter.certification.certify import CertifySettings
    from safety_filter.certification.dynamics_bounds import BoundSettings
    from safety_filter.core.class_k import BRAKING_FAMILIES, ClassK

    bounds = BoundSettings(samples=args.samples, inflation=args.inflation, seed=args.seed)
    if args.falsifier_states < 0:
        raise InvalidValue('--falsifier-states', args.falsifier_states, '>= 0')
    if args.slow_box and args.delay == 'fixed':
        raise InvalidValue('--slow-box', args.slow_box, '0 with --delay fixed (the filter '
                           'predicts over the delay with one design only)')
    extra = {}
    if args.gamma_margin is not None:
        extra['gamma_margin'] = args.gamma_margin
    if args.beta_margin is not None:
        extra['beta_margin'] = args.beta_margin
    if args.beta_cap_share is not None:
        extra['beta_cap_share'] = args.beta_cap_share
    if args.velocity_headroom is not None:
        extra['velocity_headroom'] = args.velocity_headroom
    if args.alpha1 in BRAKING_FAMILIES and args.alpha1_scale is None:
        # the braking families' eps follows from the authority and the hold period
        extra['families'] = (args.alpha1,)
        alpha1 = None
    else:
        alpha1 = None if args.alpha1 == 'auto' else ClassK(
            args.alpha1, 1.0 if args.alpha1_scale is None else args.alpha1_scale)
    return CertifySettings(
        alpha1=alpha1,
        alpha2=ClassK(args.alpha2, args.alpha2_scale),
        control_rate_hz=args.control_rate,
        sampling_factor=args.sampling_factor,
        falsifier_states=args.falsifier_states,
        bounds=bounds,
        seed=args.seed,
        mean_over_hold={'auto': None, 'start': False, 'mean': True}[args.acceleration_form],
        lookahead={'auto': None, 'on': True, 'off': False}[args.lookahead],
        delay_predicted=args.delay == 'fixed',
        slow_box=args.slow_box,
        **extra)


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


def command_certify(args: argparse.Namespace) -> int:
    """Run ``safety-filter certify``: exit code 0 (certified), 3 (not certified), or an input
    error (2)."""
    from safety_filter.certification.certify import certify_with_evidence
    from safety_filter.reports.certificate_report import format_joint_table, write_report

    model = load_robot(args)
    settings = certify_settings(args)
    default_name = re.sub(r'[^A-Za-z0-9_.-]', '_', model.name) + '_certificate.yaml'
    output = Path(args.output) if args.output else Path(default_name)
    if output.is_dir():
        raise InvalidValue('--output', str(output), 'a file',
                           detail=f'{output} is a folder; give the file to write')
    bar = ProgressBar(enabled=not (args.quiet or args.no_progress))
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
        raise FileFormatError(f'cannot write the results: {err}', err.filename) from err
    if outcome.certified:
        print(f'\ncertificate (certified: true): {written.resolve()}')
    else:
        kept = ('left untouched' if output.exists() else 'not written')
        print(f'\nfailed attempt (certified: false, the filter refuses it): '
              f'{written.resolve()}\n{output} {kept}: certify writes it only when the arm is '
              'certified')
    if page is not None:
        print(f'report: {page.resolve()}')
    return ExitCode.OK if outcome.certified else ExitCode.NOT_CERTIFIED


def add_certify_parser(commands: argparse._SubParsersAction) -> None:
    """Add ``safety-filter certify``."""
    from safety_filter.core.class_k import ALPHA1_KINDS, ALPHA2_KINDS

    certify = commands.add_parser(
        'certify', description='Certify per-joint barrier gains for which the safety QP is '
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
    add_progress_arguments(files, quiet_help='print only the verdict, the reasons and the '
                           'files written (no table; implies --no-progress)')
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
    method.add_argument('--lookahead', choices=('auto', 'on', 'off'), default='off',
                        help='on: the filter plans each torque for the state in the middle '
                        'of the hold the sampled-data margin covers (the dynamics there, to '
                        'first order), so the margin need not cover their drift along the '
                        'motion: a larger safe set on the demo arms, but an exact-model '
                        'closed loop left the safe set slightly (run `safety-filter stress`); '
                        'off: for the measured (or predicted) state; auto: whichever '
                        'certifies the larger safe set (default: off; docs/method.md, '
                        '"Lookahead")')
    method.add_argument('--slow-box', type=float, default=None, metavar='FRACTION',
                        help='velocity boxes of the slow design, as a share of the rated '
                        'speeds: a second certified design that, with the Coriolis torque of '
                        'the smaller boxes freed, brakes harder; the safe set is the union of '
                        'the two (kept when it enlarges it), so slower motions may run closer '
                        'to the limits. 0: none (default: %g, or 0 with --delay fixed; '
                        'docs/method.md, "The slow set")' % SLOW_BOX_SHOWN)
    method.add_argument('--delay', choices=('up-to', 'fixed'), default='up-to',
                        help="how the limits file's declared delay (uncertainty: "
                        'delay_periods) is read: up-to, any delay up to it, covered as a '
                        "longer hold; fixed, the driver's own delay, which the filter "
                        'predicts over, planning each torque for the state where it will act: '
                        'a larger safe set, less robust to measurement noise (run '
                        '`safety-filter stress` before hardware) (default: up-to; '
                        'docs/method.md)')
    method.add_argument('--alpha1', choices=('auto',) + ALPHA1_KINDS, default='auto',
                        help='class-K family of the velocity barrier (default: auto, the '
                        'design with the largest safe set that certifies; see '
                        'docs/method.md)')
    method.add_argument('--alpha1-scale', type=float, default=None,
                        help='bend of atan/tanh alpha1, eps of sqrt and parabola [rad or m] '
                        '(default: 1 for atan/tanh; for sqrt and parabola the eps that '
                        'keeps the drift of their slope over a hold at a tenth of the '
                        'authority, docs/method.md)')
    method.add_argument('--alpha2', choices=ALPHA2_KINDS, default='linear',
                        help='class-K family of the rate condition (default: linear)')
    method.add_argument('--alpha2-scale', type=float, default=1.0,
                        help='bend of atan/tanh alpha2 [rad/s or m/s] (default: 1)')
    method.add_argument('--gamma-margin', type=float, default=None,
                        help='gamma <= this * gamma*, in (0, 1) (default: 0.9, or 0.95 '
                        'with --delay fixed)')
    method.add_argument('--beta-margin', type=float, default=None,
                        help='beta >= this * beta*, > 1 (default: 1.2)')
    method.add_argument('--beta-cap-share', type=float, default=None,
                        help='beta >= this share of its sampled-data cap, in [0, 1]: larger '
                        'lets a joint run closer to the boundary of S before it is slowed '
                        '(default: 0.05, or 0.2 with --delay fixed; docs/method.md)')
    method.add_argument('--velocity-headroom', type=float, default=None,
                        help='velocity boxes stay this share of the rated speed below it, '
                        'for model error the disturbance observer has not yet removed '
                        '(default: 0.1; docs/method.md)')
    method.add_argument('--samples', type=int, default=4096,
                        help='quasi-random samples of the joint box for the dynamics bounds '
                        '(default: 4096)')
    method.add_argument('--inflation', type=float, default=1.1,
                        help='factor on the estimated dynamics bounds, >= 1 (default: 1.1)')
    method.add_argument('--falsifier-states', type=int, default=100_000,
                        help='states the independent falsifier checks (default: 100000)')
    method.add_argument('--seed', type=int, default=0, help='random seed (default: 0)')
    certify.set_defaults(handler=command_certify)


