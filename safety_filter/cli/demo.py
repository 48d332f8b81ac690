"""``safety-filter demo`` and ``safety-filter run-graph``: the one-command demo, and a node
graph of the launch files run without ``ros2 launch``.

They need rclpy (the ``ros`` extra) at run time, not to build the parser: the handlers ask
:mod:`safety_filter.ros.availability` and import the ROS modules when they run.
"""

from __future__ import annotations

import argparse
import random
import time
from pathlib import Path
from typing import Any

from safety_filter.cli.robot_options import (
    add_graph_arguments,
    add_gravity_convention_argument,
    add_payload_mass_argument,
    deprecated,
    namespace_argument,
)
from safety_filter.errors import ExitCode, FileFormatError, InvalidValue
from safety_filter.recordings.bags import STORAGES
from safety_filter.simulation.demo_arms import DEMO_ARMS, demo_arm_files

GRAPHS = ('sim', 'hardware')


# ---------------------------------------------------------------------- demo
def _command_demo(args: argparse.Namespace) -> int:
    """Run ``safety-filter demo`` (exit codes: its parser's description)."""
    from safety_filter.ros.availability import require_rclpy

    require_rclpy('the demo')
    from safety_filter.ros.demo_graph import DEMO_FALSIFIER_STATES, DemoOptions, run_demo

    options = DemoOptions(
        arm=args.demo, output=Path(args.output_dir), duration_s=args.duration,
        seed=args.seed, processes=args.processes, executor=args.executor or 'events',
        domain_id=args.domain_id, storage=args.storage, recertify=args.recertify,
        falsifier_states=(DEMO_FALSIFIER_STATES if args.falsifier_states is None
                          else args.falsifier_states), log_level=args.log_level,
        progress=not args.quiet)
    start = time.monotonic()
    try:
        result = run_demo(options)
    except KeyboardInterrupt:
        print('interrupted', flush=True)
        return ExitCode.INTERRUPTED
    print()
    print(result.summary)
    print(f'\nreport: {result.report.resolve()}')
    print(f'bags: {(Path(args.output_dir) / "bags").resolve()}')
    print(f'certificate: {result.certificate_path.resolve()}')
    print(f'wall time: {time.monotonic() - start:.1f} s')
    if not result.unfiltered_broke_some:
        print('note: the unfiltered run broke no limit this time; try a longer --duration '
              'or another --seed')
    if not result.filtered_kept_all:
        print('FILTERED RUN BROKE A LIMIT: see the report')
        return ExitCode.LIMIT_BROKEN
    return ExitCode.OK


def add_demo_parser(commands: argparse._SubParsersAction) -> None:
    """Add ``safety-filter demo``."""
    demo = commands.add_parser(
        'demo',
        description='Certify a demo arm (or reuse its certificate in the output folder), run '
        'a simulated arm driven by a careless operator twice (unfiltered, possible only in '
        'simulation, then through the safety filter), record both runs to rosbag2 bags and '
        'write a report with the limit violations of each. Exit code 0: the filtered run '
        'kept every limit; 4: it did not; 1: a run failed; 2: bad input; 130: interrupted '
        '(Ctrl-C).')
    demo.add_argument('--demo', '--arm', dest='demo', choices=DEMO_ARMS, default='bench6',
                      help=deprecated('the demo arm (default: bench6)', '--arm'))
    demo.add_argument('--output-dir', default='out/demo', metavar='DIR',
                      help='output folder: certificate, bags, report (default: out/demo)')
    demo.add_argument('--duration', type=float, default=10.0, metavar='S',
                      help='simulated seconds of motion per run (default: 10)')
    demo.add_argument('--seed', type=int, default=None,
                      help="the operator's seed (default: config/sim_demo.yaml's)")
    demo.add_argument('--storage', choices=STORAGES, default='mcap',
                      help='bag storage (default: mcap)')
    demo.add_argument('--recertify', action='store_true',
                      help='certify even when a valid certificate is in the output folder')
    demo.add_argument('--falsifier-states', type=int, default=None, metavar='N',
                      help='falsifier states of a new certification (default: 20000)')
    demo.add_argument('--quiet', action='store_true',
                      help='print only the summary and the files written, not what is going '
                      'on')
    add_graph_arguments(demo)
    demo.set_defaults(handler=_command_demo)


# ---------------------------------------------------------------------- run-graph
def _robot_files(args: argparse.Namespace) -> tuple[Path | str, Path | str, str]:
    given = [flag for flag, value in (('--demo', args.demo), ('--urdf', args.urdf),
                                      ('--robot-description-topic',
                                       args.robot_description_topic)) if value is not None]
    if len(given) > 1:
        raise InvalidValue(given[1], 'given', detail=f'give one of {", ".join(given)}, not '
                           'several')
    if args.robot_description_topic is not None:
        if args.graph == 'sim':
            raise InvalidValue('--robot-description-topic', args.robot_description_topic,
                               detail='--robot-description-topic is for the hardware graph: '
                               "the sim graph's simulated arm loads the robot from --urdf (or "
                               '--demo)')
        return '', (Path(args.limits) if args.limits else ''), 'robot_description'
    if args.urdf is not None:
        return Path(args.urdf), (Path(args.limits) if args.limits else ''), Path(args.urdf).stem
    if args.limits:
        raise InvalidValue('--limits', args.limits,
                           detail='--limits needs --urdf or --robot-description-topic')
    arm = args.demo or 'bench6'
    urdf, limits = demo_arm_files(arm)
    return urdf, limits, arm


def _require_hardware_robot(args: argparse.Namespace) -> None:
    """The hardware graph never falls back to a demo arm or a demo certificate: it needs
    --urdf and --limits (or --demo <arm>, explicitly) and --certificate."""
    missing = []
    if args.demo is None:
        if args.urdf is None and args.robot_description_topic is None:
            missing.append('--urdf ARM.urdf (or --robot-description-topic TOPIC)')
        if not args.limits:
            missing.append('--limits ARM_LIMITS.yaml')
    if not args.certificate:
        missing.append('--certificate ARM_CERTIFICATE.yaml')
    if missing:
        raise InvalidValue(
            '--graph', 'hardware', detail=f'--graph hardware needs {", ".join(missing)}: the '
            'robot the filter guards and its certificate (there is no default robot for a '
            'real arm; --demo <arm> names a demo arm explicitly)')
    if args.limits and not Path(args.limits).is_file():
        raise FileFormatError(f'limits file not found: {args.limits}', args.limits)
    if args.urdf is not None and not Path(args.urdf).is_file():
        raise FileFormatError(f'URDF file not found: {args.urdf}', args.urdf)


def graph_domain(graph: str, domain_id: int | None) -> tuple[int | None, bool]:
    """The ROS domain and localhost-only discovery of a graph run by ``run-graph``.

    The sim graph runs isolated, like the demo: on ``domain_id`` or else a random domain of
    :data:`safety_filter.ros.graph_specs.SIM_DOMAIN_RANGE`, discovery on this machine only, so
    that its nodes and a real arm's cannot meet. The hardware graph joins the user's
    network: ``domain_id`` or the environment's ``ROS_DOMAIN_ID`` (None), any discovery.
    """
    from safety_filter.ros.graph_specs import SIM_DOMAIN_RANGE

    if graph != 'sim':
        return domain_id, False
    if domain_id is None:
        domain_id = random.SystemRandom().randint(*SIM_DOMAIN_RANGE)
    return domain_id, True


def _command_run_graph(args: argparse.Namespace) -> int:
    """Run ``safety-filter run-graph`` (exit codes: its parser's description)."""
    from safety_filter.ros.availability import require_rclpy

    require_rclpy('run-graph')
    from safety_filter.ros.graph_specs import hardware_graph, sim_demo_graph
    from safety_filter.ros.runner import run_graph

    if args.graph == 'hardware':
        _require_hardware_robot(args)
    namespace = args.namespace
    urdf, limits, name = _robot_files(args)
    certificate = (Path(args.certificate) if args.certificate
                   else Path('out/demo') / f'{name}_certificate.yaml')
    if not certificate.is_file():
        raise FileFormatError(
            f'no certificate at {certificate}: give --certificate, or write one with '
            f'`safety-filter certify` (or `safety-filter demo`, which puts it there)',
            certificate)
    if args.graph == 'sim':
        specs = sim_demo_graph(urdf_path=urdf, limits_path=limits, certificate=certificate,
                               duration_s=args.duration, seed=args.seed,
                               payload_mass=args.payload_mass, bag_path=args.output_dir,
                               storage=args.storage, namespace=namespace)
        duration = 0.0  # the simulated arm stops itself
    else:
        if args.output_dir:
            raise InvalidValue('--output-dir', args.output_dir, detail='--output-dir records '
                               'the sim graph only; use ros2 bag record')
        specs = hardware_graph(
            certificate=certificate, urdf_path=urdf, limits_path=limits,
            command_topic=args.command_topic, joint_states_topic=args.joint_states_topic,
            nominal_topic=args.nominal_topic, gravity_convention=args.gravity_convention,
            payload_mass=-1.0 if args.payload_mass is None else args.payload_mass,
            watchdog_rate_hz=args.watchdog_rate, activate_at_start=args.activate_at_start,
            namespace=namespace, robot_description_topic=args.robot_description_topic or '')
        duration = args.duration
        if not args.activate_at_start:
            print('the filter starts configured and INACTIVE (it publishes no torque): '
                  f'activate it with `ros2 lifecycle set {specs[0].fully_qualified_name} '
                  'activate`, or give --activate-at-start', flush=True)
    how = 'one process per node' if args.processes else 'one process'
    domain, localhost_only = graph_domain(args.graph, args.domain_id)
    where = (f'ROS domain {domain}, discovery on this machine only' if localhost_only
             else f'ROS domain {domain if domain is not None else "of ROS_DOMAIN_ID"}')
    print(f'running {[s.fully_qualified_name for s in specs]} ({how}, {where}); Ctrl-C '
          'stops', flush=True)
    executor = args.executor or ('events' if args.graph == 'sim' else 'single_threaded')
    result = run_graph(specs, processes=args.processes, executor=executor,
                       duration_s=duration, domain_id=domain,
                       localhost_only=localhost_only, log_level=args.log_level)
    state = 'interrupted' if result.interrupted else 'done'
    simulated = f', {result.simulated_s:.2f} s simulated' if result.simulated_s else ''
    print(f'{state} after {result.wall_s:.1f} s{simulated}')
    if result.counts:
        print('recorded: ' + ', '.join(f'{t} {c}' for t, c in sorted(result.counts.items())))
    return graph_exit_code(result)


def graph_exit_code(result: Any) -> int:
    """run-graph's exit code for a :class:`safety_filter.ros.runner.GraphResult`, after
    printing what failed: 1 when a node failed (first: a crash explains what follows it), 4
    when the simulated arm broke a limit, else 0."""
    for failure in result.failures:
        print(f'NODE FAILED: {failure}', flush=True)
    broken = result.broken_limits
    if broken:
        print('SIMULATED ARM BROKE LIMITS (largest excursion past each): '
              + '; '.join(broken), flush=True)
    elif result.excursions:
        print('the simulated arm kept every limit (position, velocity, commanded torque)')
    if result.failures:
        return ExitCode.FAILED
    return ExitCode.LIMIT_BROKEN if broken else ExitCode.OK


def add_run_graph_parser(commands: argparse._SubParsersAction) -> None:
    """Add ``safety-filter run-graph``."""
    run = commands.add_parser(
        'run-graph',
        description='Start the nodes of launch/sim_demo.launch.py (--graph sim: simulated '
        'arm, careless operator, filter) or launch/hardware.launch.py (--graph hardware: '
        'the filter alone) with the same parameter files and remappings, configure and '
        'activate the filter (the hardware graph: configure only, unless '
        '--activate-at-start), and stop cleanly on Ctrl-C or after --duration. --namespace '
        'runs every node of the graph in that namespace. Exit code 0: the graph ran and '
        'stopped (Ctrl-C, --duration, or the simulated arm finished) with every node '
        'healthy and, in the sim graph, every limit of the simulated arm kept; 1: a node '
        'failed while the graph ran (raised an exception, exited early or with an error '
        'code, or did not stop), or the graph could not start (a node not created, the '
        'filter not configured); 2: bad input (options, robot, certificate); 4: sim graph: the '
        'simulated arm went past a position or velocity limit, or was sent a torque beyond '
        'its effort limit.')
    run.add_argument('--graph', choices=GRAPHS, default='sim',
                     help='sim (default) or hardware')
    robot = run.add_argument_group('robot')
    robot.add_argument('--demo', '--arm', dest='demo', choices=DEMO_ARMS, default=None,
                       help=deprecated('a demo arm (sim default: bench6 when no --urdf; the '
                                       'hardware graph has no default robot)', '--arm'))
    robot.add_argument('--urdf', help='the robot URDF, or a .xacro file when the xacro '
                       'package is installed (hardware: required, or --demo or '
                       '--robot-description-topic)')
    robot.add_argument('--robot-description-topic', metavar='TOPIC', default=None,
                       help='hardware graph: read the URDF from this std_msgs/String topic '
                       '(transient-local, as robot_state_publisher publishes '
                       'robot_description; relative names resolve in --namespace) instead '
                       'of --urdf')
    robot.add_argument('--limits', help='its limits file (hardware: required with --urdf or '
                       '--robot-description-topic)')
    robot.add_argument('--certificate', metavar='PATH',
                       help='certificate parameter file (hardware: required; sim default: '
                       'out/demo/<arm or URDF stem>_certificate.yaml, where safety-filter '
                       'demo writes it)')
    add_payload_mass_argument(robot, help='mounted payload [kg] (hardware default: the '
                              'middle of the certified range)')
    run.add_argument('--namespace', type=namespace_argument, default='', metavar='NS',
                     help="the ROS namespace of the graph's nodes, e.g. /arm1 (default: the "
                     'root); their relative and ~/ topics and services resolve in it, the '
                     'certificate and config files apply there too; the sim graph records '
                     'its topics under it')
    run.add_argument('--duration', type=float, default=0.0, metavar='S',
                     help='sim: simulated seconds of motion; hardware: wall seconds '
                     '(default 0: until Ctrl-C)')
    sim = run.add_argument_group('sim graph')
    sim.add_argument('--seed', type=int, default=None, help="the operator's seed")
    sim.add_argument('--output-dir', '--bag', dest='output_dir', metavar='DIR', default=None,
                     help=deprecated('record the graph to a rosbag2 bag: the bag folder, which '
                                     'must not exist (default: no recording)', '--bag'))
    sim.add_argument('--storage', choices=STORAGES, default='mcap',
                     help='storage of the recorded bag (default: mcap)')
    hardware = run.add_argument_group('hardware graph')
    hardware.add_argument('--command-topic', default='effort_command',  # not the sim arm's
                          help="the driver's effort-command topic (filtered_torque goes "
                          'there; default: effort_command)')
    hardware.add_argument('--joint-states-topic', default='joint_states', metavar='TOPIC',
                          help="the driver's sensor_msgs/JointState topic (default: "
                          'joint_states)')
    hardware.add_argument('--nominal-topic', default='nominal_torque', metavar='TOPIC',
                          help="the command source's torque topic (default: nominal_torque)")
    add_gravity_convention_argument(hardware, help="what the driver takes (default: 'full' "
                                    'torque; driver_compensated: it adds gravity compensation '
                                    'itself)')
    hardware.add_argument('--activate-at-start', action='store_true',
                          help='activate the filter at once, so that it commands the driver '
                          'as soon as joint states arrive (default: configured and inactive '
                          'until `ros2 lifecycle set /safety_filter activate`)')
    hardware.add_argument('--watchdog-rate', type=float, default=0.0, metavar='HZ',
                          help="the filter's watchdog rate [Hz] (parameter "
                          "watchdog_rate_hz; default 0: the certificate's control rate)")
    add_graph_arguments(run)
    run.set_defaults(handler=_command_run_graph)
