"""``safety-filter replay``: replay recorded bags through the filter, write reports.

It loads the robot with the same options as every other command
(:mod:`safety_filter.cli.robot_options`).
"""

from __future__ import annotations

import argparse
from pathlib import Path

from safety_filter.cli.robot_options import (
    add_certificate_argument,
    add_gravity_convention_argument,
    add_payload_mass_argument,
    add_progress_arguments,
    add_robot_arguments,
    deprecated,
    load_robot,
)
from safety_filter.errors import BagError, ExitCode, FileFormatError, InvalidValue
from safety_filter.recordings.bags import STORAGES

DEFAULT_OUT = Path('out') / 'replay'

_DESCRIPTION = (
    'Replay recorded bags (rosbag2 folders in MCAP or SQLite 3 storage, or bare .mcap/.db3 '
    'files; a folder is searched for bags) through the filter with a certificate: open loop '
    "at the recorded times with the node's pairing rule, optionally against a second "
    'certificate (--compare) and in closed loop on the simulated arm (--closed-loop). Writes '
    'per bag an HTML report with plots and a JSON report under --output-dir, and a summary '
    'of the run (index.html, replay_summary.json); prints a summary. Input bags are only '
    'read. '
    'A bag that cannot be replayed is listed with its error and does not stop the others. '
    'With --cluster the bags are replayed on the workers of a running Dask cluster, with the '
    'same reports. '
    'Exit code 0: at least one bag replayed; 1: every bag failed; 2: bad input (options, '
    'robot, certificate, a path that does not exist or holds no bag, a cluster that cannot '
    'be reached or cannot see the bags).')


def add_replay_parser(commands: argparse._SubParsersAction) -> None:
    """Add the ``replay`` subcommand to ``safety-filter``'s subparsers."""
    from safety_filter.campaigns.defaults import DEFAULT_REPLAY_JOBS

    replay = commands.add_parser(
        'replay',
        description=_DESCRIPTION)
    replay.add_argument('bags', metavar='BAG_OR_FOLDER',
                        help='a bag (rosbag2 folder, .mcap or .db3 file) or a folder of bags')
    add_robot_arguments(replay)
    filt = replay.add_argument_group('filter')
    add_certificate_argument(filt)
    filt.add_argument('--compare', metavar='PATH',
                      help='a second certificate (other gains) to compare with, side by side')
    filt.add_argument('--closed-loop', action='store_true',
                      help='also re-simulate the arm from the recorded initial state, driven '
                      "by the recorded nominal through each certificate's filter")
    filt.add_argument('--sim-rate', type=float, default=10_000.0, metavar='HZ',
                      help='integration rate of the closed-loop re-simulation (RK4) [Hz] '
                      '(default: 10000)')
    filt.add_argument('--trigger', choices=('nominal', 'joint_state'), default='nominal',
                      help="what starts a step, as the node's trigger parameter (default: "
                      'nominal)')
    add_gravity_convention_argument(filt)
    add_payload_mass_argument(filt)
    filt.add_argument('--joint-state-timeout', type=float, default=0.05, metavar='S',
                      help="joint states older than this are a gap; the node's watchdog "
                      'holds [s] (default: 0.05)')
    filt.add_argument('--nominal-timeout', type=float, default=0.1, metavar='S',
                      help='a nominal older than this is replaced by the hold command [s] '
                      '(default: 0.1)')
    topics = replay.add_argument_group('topics')
    topics.add_argument('--joint-states-topic', default='/joint_states', metavar='TOPIC',
                        help='sensor_msgs/JointState topic (default: /joint_states)')
    topics.add_argument('--nominal-topic', default='/nominal_torque', metavar='TOPIC',
                        help='nominal torque topic (default: /nominal_torque)')
    topics.add_argument('--filtered-topic', default='/filtered_torque', metavar='TOPIC',
                        help='recorded filtered torque, for the agreement check (default: '
                        '/filtered_torque; the demo recorder uses /sim_effort_command)')
    output = replay.add_argument_group('output')
    output.add_argument('--output-dir', '--out', dest='output_dir', default=str(DEFAULT_OUT),
                        metavar='DIR', help=deprecated(f'output folder (default: {DEFAULT_OUT})',
                                                       '--out'))
    output.add_argument('--write-bags', action='store_true',
                        help='write a new bag per input: all of its messages plus '
                        '/replay/filtered_torque and /replay/status')
    output.add_argument('--storage', '--bag-storage', dest='storage', choices=STORAGES,
                        default='mcap', help=deprecated('storage of the bags --write-bags '
                                                        'writes (default: mcap)',
                                                        '--bag-storage'))
    output.add_argument('--jobs', type=int, default=None, metavar='N',
                        help='bags replayed in parallel on this machine (processes; default: '
                        f'{DEFAULT_REPLAY_JOBS}; not with --cluster)')
    output.add_argument('--cluster', metavar='ADDRESS',
                        help='replay on the workers of a running Dask cluster instead: the '
                        "scheduler's address, tcp://HOST:PORT; the bags and --output-dir "
                        'must be at the same paths on every worker (docs/replay.md)')
    output.add_argument('--event-log', metavar='PATH',
                        help='JSON-lines event log of the live monitor (one object per line '
                        'with t [s, bag time] and kind): events are marked on the time plots; '
                        'a missing file is ignored, malformed lines are reported')
    output.add_argument('--no-plots', action='store_true',
                        help='reports without plots (JSON and tables: faster for big batches)')
    add_progress_arguments(output, quiet_help='print only the count of bags replayed, the '
                           'failed ones and the files written, not the per-bag summaries '
                           '(implies --no-progress)')
    replay.set_defaults(handler=command_replay)


def _check_positive(value: float, option: str) -> None:
    if not (value > 0.0 and value < float('inf')):
        raise InvalidValue(option, value, 'a positive finite number')


def command_replay(args: argparse.Namespace) -> int:
    """Run ``safety-filter replay`` (see the parser's description for the exit codes)."""
    from safety_filter.campaigns.defaults import DEFAULT_REPLAY_JOBS
    from safety_filter.campaigns.replay_batch import replay_bags
    from safety_filter.campaigns.replay_job import CertificateChoice, ReplayOptions, bag_names
    from safety_filter.core.certificate import Certificate
    from safety_filter.online.barrier_filter import SafetyFilter
    from safety_filter.recordings.bags import find_bags
    from safety_filter.recordings.event_log import read_event_log
    from safety_filter.replay.trial import ReplayTopics
    from safety_filter.reports.replay_report import format_batch_summary, write_batch_summary

    if args.cluster is not None and args.jobs is not None:
        raise InvalidValue('--jobs', args.jobs, detail='--jobs and --cluster exclude each '
                           'other: on a cluster, its workers replay the bags')
    jobs = DEFAULT_REPLAY_JOBS if args.jobs is None else args.jobs
    if jobs < 1:
        raise InvalidValue('--jobs', jobs, '>= 1')
    if args.cluster is not None:
        from safety_filter.campaigns.replay_cluster import parse_address

        parse_address(args.cluster)  # a malformed address is bad input, found before any work
    _check_positive(args.joint_state_timeout, '--joint-state-timeout')
    _check_positive(args.nominal_timeout, '--nominal-timeout')
    _check_positive(args.sim_rate, '--sim-rate')
    model = load_robot(args)
    choices = []
    for option, path in (('--certificate', args.certificate), ('--compare', args.compare)):
        if path is None:
            continue
        certificate = Certificate.load(path, model)
        # The filter's own checks (certified, payload, gravity convention), once, up front.
        SafetyFilter(model, certificate, gravity_convention=args.gravity_convention,
                     payload_mass=args.payload_mass)
        choices.append(CertificateChoice(Path(path).name, certificate, str(path)))
    if len(choices) == 2 and choices[0].label == choices[1].label:
        choices = [CertificateChoice(f'{c.label} ({c.certificate.certificate_id})',
                                     c.certificate, c.source) for c in choices]
    source = Path(args.bags)
    out = Path(args.output_dir)
    bags = find_bags(source, exclude=[out])
    if not bags:
        raise BagError('no bags found (rosbag2 folders with metadata.yaml, .mcap or .db3 '
                       'files)', source)
    resolved_out = out.resolve()
    for bag in bags:
        root = bag.resolve()
        if bag.is_dir() and (resolved_out == root or root in resolved_out.parents):
            raise InvalidValue('--output-dir', str(out), detail=f'it lies inside the bag {bag}; '
                               'the input is never written to: choose another folder')
    if source.is_dir() and not (source / 'metadata.yaml').is_file():
        names = bag_names(bags, source)  # a folder of bags
    else:
        names = [bags[0].stem if bags[0].is_file() else bags[0].name]
    events = read_event_log(args.event_log) if args.event_log else None
    options = ReplayOptions(
        topics=ReplayTopics(args.joint_states_topic, args.nominal_topic, args.filtered_topic),
        trigger=args.trigger, gravity_convention=args.gravity_convention,
        payload_mass=args.payload_mass, joint_state_timeout_s=args.joint_state_timeout,
        nominal_timeout_s=args.nominal_timeout, closed_loop=args.closed_loop,
        internal_rate_hz=args.sim_rate,
        write_bags=args.write_bags, bag_storage=args.storage, plots=not args.no_plots)
    try:
        out.mkdir(parents=True, exist_ok=True)
    except OSError as err:
        raise FileFormatError(f'cannot create --output-dir {out}: {err}', out) from err
    entries = replay_bags(bags, model, choices, options, out, names=names, jobs=jobs,
                          events=events, progress=not (args.quiet or args.no_progress),
                          cluster=args.cluster)
    try:
        summary_path = write_batch_summary(out, entries, options=options.record(),
                                           events=events)
    except OSError as err:
        raise FileFormatError(f'cannot write the summary in {out}: {err}', out) from err
    if args.quiet:
        ok = sum(entry['status'] == 'ok' for entry in entries)
        print('\n'.join([f'FAILED {e["name"]}: {e["error"]}' for e in entries
                         if e['status'] != 'ok']
                        + [f'{ok} of {len(entries)} bags replayed, {len(entries) - ok} failed']))
    elif len(entries) == 1:
        entry = entries[0]
        print(entry['summary'] if entry['status'] == 'ok' else f'FAILED {entry["name"]}: '
              f'{entry["error"]}')
    else:
        print(format_batch_summary(entries))
    if events is not None and events.missing:
        print(f'event log {events.path}: not found (ignored)')
    print(f'summary: {(out / "index.html").resolve()} ({summary_path.name})')
    ok = any(entry['status'] == 'ok' for entry in entries)
    return ExitCode.OK if ok else ExitCode.FAILED
