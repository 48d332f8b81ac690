#!/usr/bin/env python3
"""End-to-end latency of the filter node at 1 kHz, next to a bare echo node.

Usage::

    python3 benchmarks/bench_node_latency.py [--duration 60] [--quick] [--arm bench6]

This process plays teleoperation and driver at once: a thread publishes a joint state and a
nominal torque (``std_msgs/Float64MultiArray``, every nominal distinct) on a fixed 1 kHz
schedule (a slot missed by more than half a period is skipped, never sent late and bunched),
and it records when each output comes back. It spins with rclpy's events executor, whose overhead
(part of every measured latency) is several times smaller than the single-threaded one's.
The node under test runs in its own process (started with ``safety-filter node``; the
``--executor`` option picks its executor and the echo's), one workload after the other:

* **echo**: a bare rclpy node with the same QoS (keep-last 1, reliable, volatile) and the same
  traffic (subscribes to the joint states and nominals; per nominal publishes the data on
  ``filtered_torque`` and a copy on ``~/status``); the baseline.
* **filter, pass-through**: the filter node, nominals inside every constraint (the filter
  checks them and sends them unchanged, no QP solve).

The arm stands still mid-range (constant joint states).
* **filter, intervening**: nominals asking the first joint for more acceleration than its
  barrier allows, so the QP runs on every step (one constraint active, distinct outputs).

Latency = receipt of the filtered torque minus the ``publish`` of the nominal, both on this
process's steady clock. A received torque is traced to its nominal exactly: the node's
``~/status`` record holds the nominal it used and the torque it sent (the echo's output is
the nominal itself). Dropped = nominals sent in the measured window whose output never came
back (the node skipped them, or an output was lost). The first second is warm-up.

Reported: the rate actually achieved, median, 99th percentile and maximum latency [us], drops,
the ratios to the echo (the node's latency budget: median within 1.5x of the echo, no drops
over 60 s at 1 kHz), and the CPU time the node process spent per nominal (from /proc; less
sensitive to other load on the machine than the latencies). Each workload is measured for
``--duration`` seconds in all, split into ``--rounds`` runs that alternate with the other
workloads (echo, pass-through, intervening, echo, ...), so that a change in the machine's
load hits baseline and filter alike; the per-round ratios are printed too. Figures depend on
the machine and its load (the load average is printed); there are no assertions.
"""

from __future__ import annotations

import argparse
import array
import gc
import math
import os
import random
import signal
import subprocess
import sys
import tempfile
import threading
import time
from pathlib import Path
from typing import Any

ROOT = Path(__file__).resolve().parent.parent
try:
    import safety_filter  # noqa: F401
except ImportError:  # run from a source checkout without installing
    sys.path.insert(0, str(ROOT))
    import safety_filter  # noqa: F401

STARTUP_TIMEOUT_S = 120.0
WARMUP_S = 1.0
DRAIN_S = 1.0
HEADER = (f'{"workload":<24} {"rate":>6} {"sent":>7} {"back":>7} {"dropped":>7} '
          f'{"median":>8} {"p99":>8} {"max":>8} {"median/echo":>11} {"p99/echo":>9} '
          f'{"cpu/msg":>8}')


# ---------------------------------------------------------------------- the echo node
def _interrupt(signum: int, frame: Any) -> None:
    raise KeyboardInterrupt


def run_echo_node(namespace: str, executor_kind: str) -> int:
    """The baseline: per nominal, publish its data on filtered_torque and on ~/status."""
    import rclpy
    from rclpy.signals import SignalHandlerOptions
    from sensor_msgs.msg import JointState
    from std_msgs.msg import Float64MultiArray

    from safety_filter.ros.filter_node import control_qos, make_executor

    rclpy.init(signal_handler_options=SignalHandlerOptions.NO)
    node = rclpy.create_node('echo', namespace=namespace)
    qos = control_qos()
    output = node.create_publisher(Float64MultiArray, 'filtered_torque', qos)
    status = node.create_publisher(Float64MultiArray, '~/status', qos)
    latest: dict[str, Any] = {}

    def on_joint_state(msg: JointState) -> None:
        latest['joint_state'] = msg

    def on_nominal(msg: Float64MultiArray) -> None:
        reply = Float64MultiArray()
        reply.data = msg.data
        output.publish(reply)
        status.publish(reply)

    node.create_subscription(JointState, 'joint_states', on_joint_state, qos)
    node.create_subscription(Float64MultiArray, 'nominal_torque', on_nominal, qos)
    executor = make_executor(executor_kind, rclpy.get_default_context())
    executor.add_node(node)
    signal.signal(signal.SIGTERM, _interrupt)
    try:
        while rclpy.ok():
            executor.spin_once(timeout_sec=0.1)
    except KeyboardInterrupt:
        pass
    node.destroy_node()
    rclpy.try_shutdown()
    return 0


# ---------------------------------------------------------------------- certificate
def certificate_for(arm: str) -> Path:
    """A certificate of the demo arm (reduced certification settings, cached in /tmp)."""
    from safety_filter.certification.certify import CertifySettings, certify
    from safety_filter.certification.dynamics_bounds import BoundSettings
    from safety_filter.core.certificate import Certificate, CertificateError
    from safety_filter.simulation.demo_arms import load_demo_arm

    model = load_demo_arm(arm)
    folder = Path(tempfile.gettempdir()) / 'safety_filter_bench_certificates'
    path = folder / f'{arm}-{model.content_hash()[:16]}-{safety_filter.__version__}.yaml'
    if path.is_file():
        try:
            if Certificate.load(path, model).certified:
                return path
        except CertificateError:
            pass
    print(f'certifying {arm} (reduced settings, once; cached in {folder}) ...', flush=True)
    certificate = certify(model, CertifySettings(bounds=BoundSettings(samples=512),
                                                 falsifier_states=2000))
    if not certificate.certified:
        raise SystemExit(f'{arm} did not certify: {certificate.reasons}')
    return certificate.save(path)


def process_cpu_seconds(pid: int) -> float:
    """User plus system CPU time of a process [s] (Linux /proc), NaN elsewhere."""
    try:
        fields = Path(f'/proc/{pid}/stat').read_text().rsplit(')', 1)[1].split()
        return (int(fields[11]) + int(fields[12])) / os.sysconf('SC_CLK_TCK')
    except (OSError, IndexError, ValueError):
        return math.nan


# ---------------------------------------------------------------------- the driver side
class Driver:
    """Publishes joint states and nominals at 1 kHz; records outputs and status records."""

    def __init__(self, namespace: str, node_name: str, joint_names: list[str],
                 position: Any, nominal_of: Any, rate_hz: float, executor_kind: str) -> None:
        import rclpy
        from rclpy.qos import QoSProfile, ReliabilityPolicy
        from sensor_msgs.msg import JointState
        from std_msgs.msg import Float64MultiArray

        from safety_filter.ros.filter_node import control_qos, make_executor

        self.context = rclpy.context.Context()
        rclpy.init(context=self.context)
        node = rclpy.create_node('latency_driver', namespace=namespace, context=self.context)
        self.node = node
        qos = control_qos()
        self.joint_state_pub = node.create_publisher(JointState, 'joint_states', qos)
        self.nominal_pub = node.create_publisher(Float64MultiArray, 'nominal_torque', qos)
        deep = QoSProfile(depth=100_000, reliability=ReliabilityPolicy.RELIABLE)
        self.outputs: list[tuple[int, tuple]] = []  # (receipt ns, data)
        self.statuses: list[Any] = []
        self.output_sub = node.create_subscription(
            Float64MultiArray, 'filtered_torque',
            lambda msg: self.outputs.append((time.perf_counter_ns(), tuple(msg.data))), deep)
        self.status_sub = node.create_subscription(
            Float64MultiArray, f'{namespace}/{node_name}/status',
            lambda msg: self.statuses.append(msg), deep)
        self.sent: dict[tuple, tuple[int, int]] = {}  # nominal data -> (seq, send ns)
        self.measuring_from = 0
        self._seq = 0
        self._publishing = False
        self._joint_state = JointState()
        self._joint_state.name = list(joint_names)
        self._joint_state.position = [float(x) for x in position]
        self._joint_state.velocity = [0.0] * len(joint_names)
        self._nominal_of = nominal_of
        self._nominal_msg_type = Float64MultiArray
        self._period_ns = round(1e9 / rate_hz)
        self.executor = make_executor(executor_kind, self.context)
        self.executor.add_node(node)
        self._running = True
        self._thread = threading.Thread(target=self._spin, daemon=True)
        self._thread.start()
        self._source = threading.Thread(target=self._publish_on_schedule, daemon=True)
        self._source.start()

    def _spin(self) -> None:
        while self._running and self.context.ok():
            self.executor.spin_once(timeout_sec=0.05)

    def _publish_on_schedule(self) -> None:
        """Publish on a fixed schedule of ``period`` steps, from a thread of its own.

        A slot missed by more than half a period is skipped rather than sent late: a timer
        that catches up sends two nominals back to back, and with keep-last-1 the second
        then overwrites the first in the node's queue (a "drop" caused by the source). Real
        command sources tick at a steady rate; skipped slots show in the achieved rate.
        """
        period = self._period_ns
        deadline = time.perf_counter_ns()
        while self._running:
            deadline += period
            delay = deadline - time.perf_counter_ns()
            if delay > 0:
                time.sleep(delay * 1e-9)
            elif -delay > period // 2:
                continue  # too late for this slot
            if self._publishing:
                self._publish_one()

    def _publish_one(self) -> None:
        self._seq += 1
        msg = self._nominal_msg_type()
        data = self._nominal_of(self._seq)
        msg.data = array.array('d', data.tobytes())
        self.joint_state_pub.publish(self._joint_state)
        sent = time.perf_counter_ns()
        self.nominal_pub.publish(msg)
        self.sent[tuple(msg.data)] = (self._seq, sent)

    def wait_for_node(self, timeout: float) -> bool:
        deadline = time.monotonic() + timeout
        while time.monotonic() < deadline:
            if (self.nominal_pub.get_subscription_count() > 0
                    and self.joint_state_pub.get_subscription_count() > 0
                    and self.output_sub.get_publisher_count() > 0
                    and self.status_sub.get_publisher_count() > 0):
                return True
            time.sleep(0.05)
        return False

    def run(self, duration: float, pid: int) -> float:
        """Publish for warm-up plus ``duration``; returns the node process's CPU time [s]
        over the measured window (NaN where /proc is not available)."""
        self._publishing = True
        time.sleep(WARMUP_S)
        # No garbage collection in this process while measuring: a collection walks the tens
        # of thousands of messages stored here and pauses the receiving thread, which would
        # count as latency of the node under test. (With this and the fixed schedule, the
        # largest latencies of all three workloads fell from hundreds of ms to a few ms.)
        gc.disable()
        try:
            self.measuring_from = self._seq + 1
            cpu = process_cpu_seconds(pid)
            time.sleep(duration)
            cpu = process_cpu_seconds(pid) - cpu
            self._publishing = False
            self.measured_until = self._seq
            time.sleep(DRAIN_S)
        finally:
            gc.enable()
        return cpu

    def close(self) -> None:
        self._running = False
        self._thread.join(timeout=5.0)
        self._source.join(timeout=5.0)
        self.node.destroy_node()
        self.executor.shutdown(timeout_sec=1.0)
        self.context.try_shutdown()


def evaluate(driver: Driver, echo: bool, n: int) -> dict[str, Any]:
    """Latencies [us] of the measured window, and the drops."""
    import numpy as np

    from safety_filter.ros.filter_node import STATUS_SCALAR_FIELDS

    # Output data -> the nominal it came from: the echo returns the nominal itself; the
    # filter's status records carry (nominal, torque) per step. A torque sent for two
    # different nominals cannot be traced (None); the nominals are chosen so that it does
    # not happen, and such outputs would count as dropped.
    source_of: dict[tuple, tuple | None] = {}
    modes: dict[int, int] = {}
    if not echo:
        base = len(STATUS_SCALAR_FIELDS)
        for msg in driver.statuses:
            data = msg.data
            nominal = tuple(data[base + 2 * n:base + 3 * n])
            torque = tuple(data[base + n:base + 2 * n])
            if source_of.get(torque, nominal) != nominal:
                nominal = None
            source_of[torque] = nominal
            # Modes of the steps on nominals of the measured window only (before and after
            # it the node holds on its watchdog: stale, by design).
            seq = driver.sent.get(nominal, (0, 0))[0]
            if driver.measuring_from <= seq <= driver.measured_until:
                mode = int(data[2])
                modes[mode] = modes.get(mode, 0) + 1
    latencies = []
    seen: set[int] = set()
    for received, data in driver.outputs:
        nominal = data if echo else source_of.get(data)
        if nominal is None or nominal not in driver.sent:
            continue
        seq, sent = driver.sent[nominal]
        if driver.measuring_from <= seq <= driver.measured_until and seq not in seen:
            seen.add(seq)
            latencies.append((received - sent) * 1e-3)
    count = driver.measured_until - driver.measuring_from + 1
    values = np.array(latencies) if latencies else np.array([math.nan])
    return {'sent': count, 'back': len(seen), 'dropped': count - len(seen),
            'median': float(np.median(values)), 'p99': float(np.percentile(values, 99)),
            'max': float(np.max(values)), 'modes': modes, 'latencies': latencies}


def run_workload(label: str, command: list[str], namespace: str, node_name: str,
                 joint_names: list[str], position: Any, nominal_of: Any, duration: float,
                 rate_hz: float, echo: bool) -> dict[str, Any]:
    env = dict(os.environ)
    env['PYTHONPATH'] = os.pathsep.join([str(ROOT)] + [p for p in [env.get('PYTHONPATH')] if p])
    log = tempfile.TemporaryFile()
    process = subprocess.Popen(command, env=env, stdout=log, stderr=subprocess.STDOUT)
    # The measuring side always spins with the events executor: its own overhead is part of
    # every latency, so keep it small (the node under test and the echo use --executor).
    driver = Driver(namespace, node_name, joint_names, position, nominal_of, rate_hz,
                    'events')
    try:
        if not driver.wait_for_node(STARTUP_TIMEOUT_S):
            log.seek(0)
            raise SystemExit(f'{label}: the node did not come up:\n{log.read().decode()}')
        time.sleep(0.5)
        cpu = driver.run(duration, process.pid)
        result = evaluate(driver, echo, len(joint_names))
        result['cpu_us'] = cpu / max(result['sent'], 1) * 1e6
        result['rate'] = result['sent'] / duration
    finally:
        driver.close()
        if process.poll() is None:
            process.send_signal(signal.SIGINT)
            try:
                process.wait(timeout=30)
            except subprocess.TimeoutExpired:
                process.kill()
    result['label'] = label
    return result


def main(argv: list[str] | None = None) -> int:
    parser = argparse.ArgumentParser(description=__doc__.split('\n\n')[0])
    parser.add_argument('--duration', type=float, default=60.0,
                        help='measured seconds per workload (default 60)')
    parser.add_argument('--quick', action='store_true', help='5 s per workload, one round')
    parser.add_argument('--rounds', type=int, default=3,
                        help='split each workload into this many runs, interleaved with the '
                        'others (default 3)')
    parser.add_argument('--arm', default='bench6', help='demo arm (default bench6)')
    parser.add_argument('--rate', type=float, default=1000.0, help='publish rate [Hz]')
    parser.add_argument('--node-ros-args', default='', metavar='ARGS',
                        help="extra ROS arguments of the filter node, e.g. '-p "
                        "trigger:=joint_state'")
    parser.add_argument('--executor', choices=('single_threaded', 'events'),
                        default='single_threaded',
                        help="rclpy executor of the node under test and of the echo (default "
                        "single_threaded, the node's own default; this process always uses "
                        'events)')
    parser.add_argument('--echo-node', metavar='NAMESPACE', help=argparse.SUPPRESS)
    args = parser.parse_args(argv)
    if args.echo_node is not None:
        return run_echo_node(args.echo_node, args.executor)
    duration = 5.0 if args.quick else args.duration

    import numpy as np

    from safety_filter.core.certificate import Certificate
    from safety_filter.online.barrier_filter import SafetyFilter
    from safety_filter.simulation.demo_arms import load_demo_arm

    os.environ.setdefault('ROS_AUTOMATIC_DISCOVERY_RANGE', 'LOCALHOST')
    os.environ.setdefault('ROS_DOMAIN_ID', str(random.SystemRandom().randint(100, 200)))
    certificate_path = certificate_for(args.arm)
    model = load_demo_arm(args.arm)
    filt = SafetyFilter(model, Certificate.load(certificate_path, model))
    names = list(model.joint_names)
    n = len(names)
    position = 0.5 * (np.array(model.position_lower) + np.array(model.position_upper))
    gravity = filt.dynamics.gravity_torque(position)
    mass = filt.dynamics.mass_matrix(position)
    usable = np.array(filt.usable_authority)
    phases = np.arange(n)

    def inside(seq: int) -> np.ndarray:  # M a + g with a small acceleration: passed through
        return gravity + mass @ (0.1 * usable * np.sin(1e-3 * seq + phases))

    accel_upper = np.array(filt.constraint_bounds(position, np.zeros(n)).accel_upper)

    def beyond(seq: int) -> np.ndarray:  # the first joint past its acceleration bound: QP
        acceleration = 0.1 * usable * np.sin(1e-3 * seq + phases)
        acceleration[0] = accel_upper[0] + 0.5 * usable[0]
        return gravity + mass @ acceleration

    for label, nominal_of in (('pass-through', inside), ('intervening', beyond)):
        outputs = [filt.step(position, np.zeros(n), nominal_of(seq)) for seq in range(1, 200)]
        distinct = len({tuple(out.torque) for out in outputs})
        print(f'check: {label} nominals -> modes {sorted({o.mode.value for o in outputs})}, '
              f'solver {sorted({o.solver_status for o in outputs})}, {distinct} distinct '
              f'outputs of {len(outputs)}', flush=True)

    print(f'{args.arm}: {n} joints, {args.rate:g} Hz, {duration:g} s per workload, '
          f'executor {args.executor}, {os.cpu_count()} CPUs, load average before '
          f'{os.getloadavg()[0]:.2f}, ROS_DOMAIN_ID {os.environ["ROS_DOMAIN_ID"]}', flush=True)
    # The nodes run in namespaces: the parameter file must be keyed for any namespace.
    any_namespace = certificate_path.with_name(certificate_path.stem + '-any.yaml')
    Certificate.load(certificate_path).save(any_namespace, node_name='/**/safety_filter')
    node_command = [sys.executable, '-m', 'safety_filter.cli.main', 'node', '--certificate',
                    str(any_namespace), '--demo', args.arm, '--executor', args.executor,
                    '--activate-at-start',
                    # One step per nominal: the latency is traced from each nominal.
                    '--ros-args', '-p', 'trigger:=nominal', '-r']
    extra = args.node_ros_args.split()
    workloads = [
        ('echo (bare rclpy)', [sys.executable, str(Path(__file__).resolve()), '--echo-node',
                               '/bench_echo', '--executor', args.executor], '/bench_echo',
         'echo', inside, True),
        ('filter, pass-through', node_command + ['__ns:=/bench_pass', *extra], '/bench_pass',
         'safety_filter', inside, False),
        ('filter, intervening', node_command + ['__ns:=/bench_qp', *extra], '/bench_qp',
         'safety_filter', beyond, False),
    ]
    # Rounds: echo, pass-through, intervening, echo, ... so that a change in the machine's
    # load during the run hits the baseline and the filter alike.
    rounds = 1 if args.quick else max(1, args.rounds)
    per_round: list[list[dict[str, Any]]] = [[] for _ in workloads]
    for round_index in range(rounds):
        for index, (label, command, namespace, node_name, nominal_of, echo) in enumerate(
                workloads):
            print(f'round {round_index + 1}/{rounds}: {label} ...', flush=True)
            per_round[index].append(run_workload(
                label, command, namespace, node_name, names, position, nominal_of,
                duration / rounds, args.rate, echo))
    results = [pool(label_runs) for label_runs in per_round]
    echo = results[0]
    round_ratios = [[run['median'] / base['median'] for run, base in zip(runs, per_round[0])]
                    for runs in per_round]
    print()
    print(HEADER)
    for result in results:
        print(f'{result["label"]:<24} {result["rate"]:>6.0f} {result["sent"]:>7} '
              f'{result["back"]:>7} {result["dropped"]:>7} {result["median"]:>8.0f} '
              f'{result["p99"]:>8.0f} {result["max"]:>8.0f} '
              f'{result["median"] / echo["median"]:>11.2f} {result["p99"] / echo["p99"]:>9.2f} '
              f'{result["cpu_us"]:>8.0f}')
    print('rate: nominals actually sent per second [Hz]; latencies and cpu/msg (CPU time of the '
          'node process per nominal sent) in microseconds.')
    print('modes of the filter steps (0 filtered, 1 fallback, 2 recovering, 3 rejected, '
          '4 stale):')
    for result in results[1:]:
        print(f'  {result["label"]}: {dict(sorted(result["modes"].items()))}')
    if rounds > 1:
        print('median/echo per round (each round runs the three workloads back to back):')
        for result, ratios in zip(results[1:], round_ratios[1:]):
            print(f'  {result["label"]}: ' + ', '.join(f'{r:.2f}' for r in ratios))
    print(f'load average after: {os.getloadavg()[0]:.2f}')
    worst = max(r['median'] / echo['median'] for r in results[1:])
    filter_drops = sum(r['dropped'] for r in results[1:])
    print(f'latency budget: median within 1.5x of the echo: '
          f'{"met" if worst <= 1.5 else "NOT met"} (worst {worst:.2f}x); no drops: '
          f'{"met" if filter_drops == 0 else f"NOT met ({filter_drops} dropped)"} '
          f'(the bare echo dropped {echo["dropped"]} in the same run)')
    return 0


def pool(runs: list[dict[str, Any]]) -> dict[str, Any]:
    """The runs of one workload as one: summed counts, statistics of all latencies."""
    import numpy as np

    latencies = np.array([x for run in runs for x in run['latencies']] or [math.nan])
    modes: dict[int, int] = {}
    for run in runs:
        for mode, count in run['modes'].items():
            modes[mode] = modes.get(mode, 0) + count
    sent = sum(run['sent'] for run in runs)
    seconds = sum(run['sent'] / run['rate'] for run in runs if run['rate'] > 0)
    cpu = sum(run['cpu_us'] * run['sent'] for run in runs)
    return {'label': runs[0]['label'], 'sent': sent,
            'back': sum(run['back'] for run in runs),
            'dropped': sum(run['dropped'] for run in runs),
            'median': float(np.median(latencies)), 'p99': float(np.percentile(latencies, 99)),
            'max': float(np.max(latencies)), 'modes': modes,
            'rate': sent / seconds if seconds > 0 else math.nan,
            'cpu_us': cpu / max(sent, 1)}


if __name__ == '__main__':
    sys.exit(main())
