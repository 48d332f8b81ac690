"""``safety-filter stress``: its options, and the run from options to exit code.

The stress test itself is in :mod:`safety_filter.campaigns` (matrix, runs, verdict); its
report in :mod:`safety_filter.reports.stress_report`. This module parses the options,
prints the table and the files written, and returns the exit code
(:class:`~safety_filter.errors.ExitCode`).
"""

from __future__ import annotations

import argparse
import sys
from pathlib import Path

from safety_filter.campaigns.defaults import (
    DEFAULT_DURATION_S,
    DEFAULT_JOBS,
    DEFAULT_PLANTS,
)
from safety_filter.cli.robot_options import deprecated
from safety_filter.errors import CertificateError, ExitCode, FileFormatError, InvalidValue

DEFAULT_OUT = Path('out') / 'stress'


_DESCRIPTION = (
    'Stress-test an arm before hardware: run its model, certificate and filter in closed '
    'loop against plants drawn from the declared uncertainty set (payload ends, link masses '
    'and inertias at their error bounds, random draws; with the measurement noise, delay '
    'and driver torque error applied), adversarial and benign nominals, the control rates '
    'the certificate covers, and external torque pushes. Prints a table (worst run first) '
    'and a verdict; writes stress_summary.json and stress_report.html with plots of the '
    'worst run. Exit code 0: every run passed; 5: some run failed the verdict; 3: the demo '
    "arm's certification failed; 2: bad input (options, robot, certificate).")


def add_stress_parser(commands: argparse._SubParsersAction) -> None:
    """Add the ``stress`` subcommand to ``safety-filter``'s subparsers."""
    from safety_filter.cli.robot_options import add_robot_arguments

    stress = commands.add_parser(
        'stress',
        description=_DESCRIPTION)
    add_robot_arguments(stress)
    filt = stress.add_argument_group('filter')
    filt.add_argument('--certificate', metavar='PATH',
                      help='certificate parameter file written by `safety-filter certify`; '
                      'required with --urdf; a demo arm without it is certified first (20000 '
                      'falsifier states, as the demo) or its certificate in --output-dir is '
                      'reused')
    runs = stress.add_argument_group('runs')
    runs.add_argument('--duration', type=float, default=DEFAULT_DURATION_S, metavar='S',
                      help=f'simulated seconds per run (default: {DEFAULT_DURATION_S:g})')
    runs.add_argument('--plants', type=int, default=DEFAULT_PLANTS, metavar='K',
                      help='random plants drawn from the uncertainty set, besides the fixed '
                      f'ones (default: {DEFAULT_PLANTS})')
    runs.add_argument('--pushes', type=int, default=2, metavar='N',
                      help='external torque pushes per push run (default: 2)')
    runs.add_argument('--push-fraction', type=float, default=0.2, metavar='F',
                      help="a push's largest joint torque as a fraction of that joint's "
                      'effort limit (default: 0.2; each push lasts 20 ms)')
    runs.add_argument('--seed', type=int, default=0,
                      help='seed of plants, nominals, noise and pushes (default: 0)')
    output = stress.add_argument_group('output')
    output.add_argument('--output-dir', '--out', dest='output_dir', default=str(DEFAULT_OUT),
                        metavar='DIR', help=deprecated(f'output folder (default: {DEFAULT_OUT})',
                                                       '--out'))
    output.add_argument('--jobs', type=int, default=DEFAULT_JOBS, metavar='N',
                        help='runs in parallel (processes; default: the number of cores, '
                        f'{DEFAULT_JOBS} here)')
    output.add_argument('--no-plots', action='store_true',
                        help='report without plots (JSON and tables only)')
    output.add_argument('--no-progress', action='store_true', help='no progress bar')
    output.add_argument('--quiet', action='store_true',
                        help='print only the verdict and the files written (no table; '
                        'implies --no-progress)')
    stress.set_defaults(handler=command_stress)


def command_stress(args: argparse.Namespace) -> int:
    """Run ``safety-filter stress`` (see the parser's description for the exit codes)."""
    # The numeric libraries are imported when the command runs, not when the parser is built.
    from safety_filter.campaigns.stress_matrix import StressSettings
    from safety_filter.campaigns.stress_runs import demo_arm_certificate, run_stress
    from safety_filter.cli.progress_bar import ProgressBar as _ProgressBar
    from safety_filter.cli.robot_options import load_robot
    from safety_filter.core.certificate import Certificate
    from safety_filter.core.uncertainty_set import UncertaintySet
    from safety_filter.reports.stress_report import format_table, write_report

    settings = StressSettings(duration_s=args.duration, plants=args.plants, seed=args.seed,
                              pushes=args.pushes, push_fraction=args.push_fraction)
    settings.check()
    if args.jobs < 1:
        raise InvalidValue('--jobs', args.jobs, '>= 1')
    if args.urdf is not None and args.certificate is None:
        raise InvalidValue('--certificate with --urdf', 'missing',
                           'a certificate file written by `safety-filter certify`')
    model = load_robot(args)
    out = Path(args.output_dir)
    try:
        out.mkdir(parents=True, exist_ok=True)
    except OSError as err:
        raise FileFormatError(f'cannot create --output-dir {out}: {err}', out) from err
    bar = _ProgressBar(enabled=not (args.quiet or args.no_progress))
    try:
        if args.certificate is not None:
            if not Path(args.certificate).is_file():
                raise CertificateError(f'certificate file not found: {args.certificate}',
                                       args.certificate)
            certificate = Certificate.load(args.certificate, model)
            source = str(args.certificate)
        else:
            certificate, source = demo_arm_certificate(model, args.demo or 'bench6', out, bar)
            if not certificate.certified:
                bar.close()
                print(f'the demo arm could not be certified: {"; ".join(certificate.reasons)}')
                return ExitCode.NOT_CERTIFIED
        uncertainty = getattr(model, 'uncertainty', None) or UncertaintySet()
        result = run_stress(model, certificate, uncertainty, settings, jobs=args.jobs,
                            progress=bar)
    finally:
        bar.close()
    table = format_table(result, source)
    if args.quiet:
        print('\n'.join(line for line in table.splitlines() if line.startswith('verdict:')))
    else:
        print(table)
    try:
        page, summary = write_report(out, result, source, plots=not args.no_plots)
    except OSError as err:
        raise FileFormatError(f'cannot write the report in {out}: {err}', out) from err
    print(f'\nsummary: {summary.resolve()}\nreport: {page.resolve()}')
    print(f'wall time: {result.wall_s:.1f} s', file=sys.stderr)
    return ExitCode.OK if result.passed else ExitCode.STRESS_FAILED
