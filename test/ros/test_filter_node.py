"""The lifecycle filter node over real DDS (rclpy on loopback, no mocked ROS).

The node runs in this process in its own rclpy context (its own DDS participant and executor
thread); the test side is another context (:class:`ros_fixtures.Harness`). The exactness
checks replay the node's ``~/status`` records (the exact inputs it gave to
``SafetyFilter.step``, every step since activation) through a separate ``SafetyFilter`` with
the same model, certificate and options, and compare the torques to 1e-9; the received
``filtered_torque`` messages must each be one of those torques, in order, and the recorded
inputs must be the ones the test published. Minimum counts keep the checks from passing
vacuously. The machine may be loaded: rates are nominal (1 kHz timers), and no assertion
depends on timing beyond generous waits.
"""

from __future__ import annotations

import math
import time
from collections import Counter
from dataclasses import replace
from typing import Any

import numpy as np
import pytest
from ros_fixtures import (
    LEVEL_NAMES,
    CertifiedArm,
    Harness,
    NodeRunner,
    StatusRecord,
    certified_arm,
    isolate_ros_domain,
    joint_state,
    match_filtered_to_statuses,
    mid_range,
    node_arguments,
    nominal,
    parse_status,
    replay_statuses,
    unique_namespace,
    wait_for,
)

from safety_filter.core.certificate import Certificate
from safety_filter.ros.filter_node import (
    CERTIFICATE_PARAMETERS,
    MODE_FILTERED,
    MODE_RECOVERING,
    MODE_REJECTED,
    MODE_STALE,
)

pytestmark = pytest.mark.ros

MIN_MATCHED = 400  # samples that must be compared exactly in a streaming test


@pytest.fixture(scope='module')
def domain_id() -> int:
    return isolate_ros_domain()


@pytest.fixture(scope='session')
def planar2() -> CertifiedArm:
    return certified_arm('planar2')


@pytest.fixture(scope='session')
def bench6() -> CertifiedArm:
    return certified_arm('bench6')


@pytest.fixture
def namespace() -> str:
    return unique_namespace()


@pytest.fixture
def harness(domain_id: int, namespace: str) -> Any:
    side = Harness(domain_id, namespace)
    yield side
    side.close()


@pytest.fixture
def start_node(domain_id: int, namespace: str) -> Any:
    """Start a filter node (in this process) with given ROS arguments; closed afterwards."""
    runners: list[NodeRunner] = []

    def start(arguments: list[str], executor: str = 'single_threaded') -> NodeRunner:
        runner = NodeRunner(domain_id, arguments, namespace, executor)
        runners.append(runner)
        return runner

    yield start
    for runner in runners:
        runner.close()


def activate(harness: Harness) -> None:
    assert harness.get_state() == 'unconfigured'
    assert harness.change_state('configure'), 'configure failed (see the node log)'
    assert harness.change_state('activate')
    assert harness.get_state() == 'active'
    harness.wait_for_subscribers()
    harness.wait_for_publishers()  # so that no status is lost: the replay needs them all


def stream(harness: Harness, source: Any, statuses: int, timeout: float = 60.0) -> None:
    """Publish from ``source`` at 1 kHz until ``statuses`` status messages arrived."""
    harness.start_source(source)
    wait_for(lambda: len(harness.status) >= statuses, timeout)
    harness.set_source(None)


def stop_and_collect(harness: Harness, arm: CertifiedArm) -> tuple[list[StatusRecord], list]:
    """Deactivate the node (outputs stop), then return its statuses and the filtered torques
    of its steps (without the last command it sends on deactivate, which is not a step and
    has no status: test_deactivate_and_shutdown_send_the_hold_command_last checks it)."""
    assert harness.change_state('deactivate')
    count = -1
    while count != len(harness.status):  # let the last messages arrive
        count = len(harness.status)
        wait_for(lambda: False, 0.3)
    records = [parse_status(msg, arm.model.joint_names) for msg in harness.status.messages()]
    filtered = harness.filtered.messages()
    assert filtered, 'no filtered torque, not even the last command'
    return records, filtered[:-1]


def random_inputs(arm: CertifiedArm, seed: int, driver_compensated: bool = False) -> Any:
    """A deterministic source of distinct states and nominals for tick ``k``.

    States: positions uniform in the joint box, velocities inside the safe set
    (``-gamma hn < v < gamma hp``, METHOD 2) and the certified velocity bound (every third
    tick mid-range and slow); every 7th tick
    one joint a little beyond a limit and moving on (outside S: recovery). Nominals: on the
    calm ticks ``M a + h`` with a small acceleration (mostly passed through unchanged), else
    gravity plus up to 1.5 times the torque limit (QP) or up to 20 times (far outside).
    ``driver_compensated``: the nominals without gravity (the driver adds it).
    """
    model = arm.model
    dynamics = arm.reference_filter().dynamics
    usable = np.array(arm.certificate.authority - arm.certificate.sampling_margin)
    lower, upper = np.array(model.position_lower), np.array(model.position_upper)
    effort = np.array(model.effort_limit)
    gamma = np.array(arm.certificate.gamma)
    bound = np.array(arm.certificate.velocity_bound)
    n = model.n_joints

    def inputs(k: int) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
        rng = np.random.default_rng([seed, k])
        calm = k % 3 == 0  # mid-range, slow, small nominal: mostly passed through
        middle, half = 0.5 * (lower + upper), (0.3 if calm else 0.5) * (upper - lower)
        q = rng.uniform(middle - half, middle + half)
        v = (0.1 if calm else 0.9) * rng.uniform(
            np.maximum(-gamma * (q - lower), -bound), np.minimum(gamma * (upper - q), bound))
        if k % 7 == 0:
            j = k % n
            q[j] = upper[j] + 0.01
            v[j] = 0.1 * bound[j]
        gravity = dynamics.gravity_torque(q)
        if calm:  # u = M a + h with a small acceleration a
            mass, bias = dynamics.mass_and_bias(q, v)
            u = mass @ (0.2 * usable * rng.uniform(-1, 1, n)) + bias
        else:
            u = gravity + (1.5 if k % 3 == 1 else 20.0) * effort * rng.uniform(-1, 1, n)
        return q, v, u - gravity if driver_compensated else u

    return inputs


# ---------------------------------------------------------------------- static
def test_node_declares_every_certificate_entry(planar2: CertifiedArm) -> None:
    import dataclasses

    # every optional entry set (the demo arm's certificate bounds start-of-hold accelerations
    # and plans at the measured state, without a lookahead); a slow design needs the delay
    # as an upper bound, so the predicted delay and the slow design are in two certificates
    certificate = dataclasses.replace(planar2.certificate, slow_design=None)
    timing = dict(acceleration_hold_s=0.001, lookahead_s=0.001)
    predicted = dataclasses.replace(certificate, prediction_s=0.001, **timing)
    plain = dataclasses.replace(certificate, **timing)  # (itself as its slow design)
    slow = dataclasses.replace(plain, slow_design=plain)
    assert set(CERTIFICATE_PARAMETERS) == (set(predicted.to_parameters())
                                           | set(slow.to_parameters()))
    assert len(CERTIFICATE_PARAMETERS) == len(set(CERTIFICATE_PARAMETERS))


def test_defaults_are_the_values_of_config_filter_yaml(planar2: CertifiedArm,
                                                      start_node: Any) -> None:
    """The node's operational defaults are config/filter.yaml's (trigger joint_state): a
    node started without that file (e.g. in a namespace, where its key does not match)
    behaves as one started with it."""
    import yaml

    from safety_filter.ros.graph_specs import FILTER_CONFIG, config_file

    values = yaml.safe_load(config_file(FILTER_CONFIG).read_text(encoding='utf-8'))
    values = values['/**/safety_filter']['ros__parameters']
    assert values['trigger'] == 'joint_state'
    node = start_node(node_arguments(planar2)).node
    for name, value in values.items():
        assert node.get_parameter(name).value == value, name


# ---------------------------------------------------------------------- 1. exactness
@pytest.mark.parametrize('arm_name, options', [
    ('bench6', {'trigger': 'nominal'}),
    ('planar2', {'trigger': 'joint_state', 'gravity_convention': 'driver_compensated',
                 'payload_mass': 0.5}),
], ids=['bench6-nominal-trigger', 'planar2-joint-state-trigger-driver-compensated'])
def test_filtered_torque_equals_the_filter_step_on_the_same_inputs(
        arm_name: str, options: dict[str, Any], harness: Harness, start_node: Any,
        request: pytest.FixtureRequest) -> None:
    arm: CertifiedArm = request.getfixturevalue(arm_name)
    # Long timeouts: this test is about the numbers; the timeouts have their own tests.
    # The inputs are independent random states, not a motion: the disturbance observer
    # would read them as model error, so it is off here (test_observer.py covers it).
    start_node(node_arguments(arm, joint_state_timeout_s=5.0, nominal_timeout_s=5.0,
                              disturbance_observer=False, **options))
    activate(harness)
    harness.nominal_first = options['trigger'] == 'joint_state'
    names = list(arm.model.joint_names)
    inputs = random_inputs(arm, seed=1, driver_compensated=options.get(
        'gravity_convention') == 'driver_compensated')
    sent_states: dict[tuple, int] = {}
    sent_nominals: dict[tuple, int] = {}

    def source(k: int) -> tuple[Any, Any]:
        q, v, u = inputs(k)
        sent_states[tuple(q) + tuple(v)] = k
        sent_nominals[tuple(u)] = k
        return joint_state(names, q, v), nominal(u)

    stream(harness, source, statuses=1500)
    records, filtered = stop_and_collect(harness, arm)

    reference = arm.reference_filter(
        gravity_convention=options.get('gravity_convention', 'full'),
        payload_mass=options.get('payload_mass'), observer_time_constant_s=0.0)
    replayed = replay_statuses(records, reference)
    matched = match_filtered_to_statuses(filtered, records)
    assert replayed >= MIN_MATCHED and matched >= MIN_MATCHED, (replayed, matched)
    if arm.certificate.slow_design is not None:
        # the node rebuilt the slow design from its parameters: the steps it served match too
        assert reference.slow_steps > 10, reference.statistics()
    assert arm_name != 'bench6' or arm.certificate.slow_design is not None
    # The inputs the node used are the ones published (names mapped, values exact).
    fresh = arm.reference_filter(
        gravity_convention=options.get('gravity_convention', 'full'),
        payload_mass=options.get('payload_mass'), observer_time_constant_s=0.0)
    for record in records:
        assert record.mode != MODE_STALE
        assert tuple(record.position) + tuple(record.velocity) in sent_states
        if record.hold_nominal:  # a joint state before the first nominal: hold still
            hold = fresh.step(record.position, record.velocity, np.full(len(names), math.nan))
            np.testing.assert_array_equal(record.nominal, hold.torque)
        else:
            assert tuple(record.nominal) in sent_nominals
    assert sum(not record.hold_nominal for record in records) >= MIN_MATCHED
    # Not vacuous: QP solves, pass-throughs and recoveries all occurred.
    modes = Counter(record.mode for record in records)
    assert modes[MODE_FILTERED] > 50 and modes[MODE_RECOVERING] > 10, modes
    assert sum(record.solve_time_s > 0 for record in records) > 50
    assert sum(np.array_equal(r.torque, r.nominal) for r in records) > 20


# ---------------------------------------------------------------------- 2. joint names
def test_joint_states_are_matched_by_name(bench6: CertifiedArm, harness: Harness,
                                          start_node: Any) -> None:
    """Shuffled names plus joints outside the chain give the inputs (and so the output) of
    the ordered message: the node's step inputs are the chain-ordered values, exactly."""
    arm = bench6
    start_node(node_arguments(arm, trigger='nominal', joint_state_timeout_s=5.0,
                              nominal_timeout_s=5.0))
    activate(harness)
    names = list(arm.model.joint_names)
    extras = ['gripper_left_finger', 'camera_pan', 'gripper_right_finger']
    inputs = random_inputs(arm, seed=2)
    truth: dict[tuple, tuple[int, bool]] = {}

    def source(k: int) -> tuple[Any, Any]:
        q, v, u = inputs(k)
        shuffled = k % 2 == 1
        truth[tuple(q) + tuple(v)] = (k, shuffled)
        if not shuffled:
            return joint_state(names, q, v), nominal(u)
        rng = np.random.default_rng(k)
        all_names = names + extras
        all_q = np.concatenate([q, rng.uniform(-1, 1, len(extras))])
        all_v = np.concatenate([v, rng.uniform(-1, 1, len(extras))])
        order = rng.permutation(len(all_names))
        return (joint_state([all_names[i] for i in order], all_q[order], all_v[order],
                            effort=rng.uniform(-1, 1, len(all_names))), nominal(u))

    stream(harness, source, statuses=1000)
    records, filtered = stop_and_collect(harness, arm)
    kinds = Counter()
    for record in records:
        key = tuple(record.position) + tuple(record.velocity)
        assert key in truth, f'the node stepped on a state that was never sent: {key}'
        kinds[truth[key][1]] += 1
    assert kinds[True] >= MIN_MATCHED // 2 and kinds[False] >= MIN_MATCHED // 2, kinds
    assert replay_statuses(records, arm.reference_filter()) >= MIN_MATCHED
    assert match_filtered_to_statuses(filtered, records) >= MIN_MATCHED


# ---------------------------------------------------------------------- invalid input
def test_invalid_messages_are_counted_and_get_the_hold_command(
        planar2: CertifiedArm, harness: Harness, start_node: Any) -> None:
    arm = planar2
    start_node(node_arguments(arm, trigger='nominal', joint_state_timeout_s=5.0,
                              nominal_timeout_s=5.0, diagnostics_rate_hz=20.0))
    activate(harness)
    names = list(arm.model.joint_names)
    q = mid_range(arm.model) + 0.1
    v = np.array([0.2, -0.1])
    u = np.array([1.0, 0.5])
    good = (joint_state(names, q, v), nominal(u))
    phases = {
        'missing joint': (joint_state(names[:1], q[:1], v[:1]), nominal(u)),
        'no velocity': (joint_state(names, q, []), nominal(u)),
        'short positions': (joint_state(names, q[:1], v), nominal(u)),
        'wrong nominal length': (joint_state(names, q, v), nominal([1.0, 2.0, 3.0])),
    }
    hold = arm.reference_filter().step(q, np.full(2, math.nan), np.full(2, math.nan)).torque
    for label, bad in phases.items():
        stream(harness, lambda k: good, statuses=len(harness.status) + 30)
        t0 = time.monotonic()
        stream(harness, lambda k, bad=bad: bad, statuses=len(harness.status) + 30)
        recent = [parse_status(msg, names) for msg in harness.status.since(t0)][-5:]
        assert recent and all(r.mode == MODE_REJECTED for r in recent), (label, recent)
        if label != 'wrong nominal length':  # the state is invalid: hold at the last valid q
            for record in recent:
                np.testing.assert_array_equal(record.torque, hold)
    since = time.monotonic()
    assert wait_for(lambda: harness.latest_diagnostic(since) is not None, 10.0)
    diagnostic = harness.latest_diagnostic(since)
    assert LEVEL_NAMES[diagnostic.level] == 'ERROR', diagnostic.message
    values = {kv.key: kv.value for kv in diagnostic.values}
    # 3 phases of >= 30 invalid joint states and one of >= 30 invalid nominals were sent;
    # with keep-last-1 QoS the node may see fewer than were sent (a newer sample replaces
    # one not yet taken), so ask for most of them, not all.
    assert int(values['invalid.joint_state']) >= 60
    assert int(values['invalid.nominal']) >= 20
    assert values['invalid.nominal_last'] == '3 values for 2 joints'
    # The 'arm' here never moves whatever it is sent: the disturbance observer reports that as
    # model error (a torque the model does not account for) on some joint.
    errors = [float(values[f'model_error.{joint}']) for joint in names]
    assert all(math.isfinite(x) for x in errors) and max(abs(x) for x in errors) > 0.01
    records, _ = stop_and_collect(harness, arm)
    assert replay_statuses(records, arm.reference_filter()) >= 200


# ---------------------------------------------------------------------- 3. timeouts
@pytest.mark.parametrize('executor', ['single_threaded', 'events'])
def test_stale_joint_states_send_the_hold_command(executor: str, planar2: CertifiedArm,
                                                  harness: Harness, start_node: Any) -> None:
    """Under both executors (the watchdog timer is restarted by every message and changes
    its period when it trips)."""
    arm = planar2
    # Default timeouts; steps on the nominals, which keep coming when the states stop.
    start_node(node_arguments(arm, trigger='nominal', diagnostics_rate_hz=20.0), executor)
    activate(harness)
    names = list(arm.model.joint_names)
    q = mid_range(arm.model) + np.array([0.3, -0.2])
    v = np.array([0.4, -0.3])
    u = np.array([2.0, -1.0])
    stream(harness, lambda k: (joint_state(names, q, v), nominal(u)), statuses=100)
    # Joint states stop; nominals keep coming.
    stopped = time.monotonic()
    harness.start_source(lambda k: (None, nominal(u)))
    assert wait_for(lambda: any(parse_status(m, names).mode == MODE_STALE
                                for m in harness.status.since(stopped)), 10.0)
    hold = arm.reference_filter().step(q, np.full(2, math.nan), np.full(2, math.nan)).torque
    assert not np.allclose(hold, u)
    assert wait_for(lambda: harness.latest_diagnostic(stopped) is not None
                    and harness.latest_diagnostic(stopped).level == b'\x02', 10.0), \
        'no ERROR diagnostics after the joint states stopped'
    error = harness.latest_diagnostic(stopped)
    assert 'watchdog' in error.message, error.message
    # Both inputs stop: the watchdog keeps sending the hold command.
    harness.set_source(None)
    silent = time.monotonic()
    assert wait_for(lambda: len(harness.filtered.since(silent + 0.2)) >= 20, 10.0), \
        'the watchdog did not keep publishing'
    for msg in harness.filtered.since(silent + 0.2):
        np.testing.assert_array_equal(np.array(msg.data), hold)
    records, _ = stop_and_collect(harness, arm)
    stale = [r for r in records if r.mode == MODE_STALE]
    assert len(stale) >= 20
    for record in stale:
        np.testing.assert_array_equal(record.position, q)  # the last valid state
        assert np.all(np.isnan(record.velocity)) and np.all(np.isnan(record.nominal))
        np.testing.assert_array_equal(record.torque, hold)
    assert replay_statuses(records, arm.reference_filter()) >= 100


@pytest.mark.parametrize(('trigger', 'executor'), [('nominal', 'single_threaded'),
                                                   ('joint_state', 'single_threaded'),
                                                   ('nominal', 'events')])
def test_stale_nominal_is_never_used(trigger: str, executor: str, planar2: CertifiedArm,
                                     harness: Harness, start_node: Any) -> None:
    """After nominal_timeout_s the last nominal is not used: the step filters the hold
    command (gravity compensation with damping toward rest) instead. With trigger
    'nominal' the watchdog runs those steps, starting one timeout after the last nominal."""
    arm = planar2
    start_node(node_arguments(arm, trigger=trigger, diagnostics_rate_hz=20.0,
                              joint_state_timeout_s=5.0), executor)
    activate(harness)
    names = list(arm.model.joint_names)
    model = arm.model
    # Inside the safe set, moving toward the upper limits fast enough that the filter
    # modifies the hold command.
    q = np.array(model.position_upper) - 0.5
    v = 0.6 * np.array(arm.certificate.gamma) * 0.5
    u = 0.9 * np.array(model.effort_limit)  # a nominal pushing on
    stream(harness, lambda k: (joint_state(names, q, v), nominal(u)), statuses=100)
    stopped = time.monotonic()
    harness.start_source(lambda k: (joint_state(names, q, v), None))
    assert wait_for(lambda: sum(parse_status(m, names).hold_nominal
                                for m in harness.status.since(stopped)) >= 50, 10.0)
    assert wait_for(lambda: harness.latest_diagnostic(stopped) is not None
                    and harness.latest_diagnostic(stopped).level == b'\x03', 10.0), \
        'no STALE diagnostics after the nominal stopped'
    status = harness.latest_diagnostic(stopped)
    assert 'nominal stale' in status.message
    age = float({kv.key: kv.value for kv in status.values}['age.nominal_ms'])
    assert age > 100.0
    records, filtered = stop_and_collect(harness, arm)
    fresh = arm.reference_filter()
    hold = fresh.step(q, v, np.full(2, math.nan)).torque  # g(q) - D v
    held = [r for r in records if r.hold_nominal]
    assert len(held) >= 50
    # Never held before the nominal's timeout (0.1 s), and once held, steps keep coming at
    # about the watchdog rate (planar2: 1 kHz; generous bound for a loaded machine).
    assert min(r.nominal_age for r in held) > 0.1
    if trigger == 'nominal':
        stamps = np.array([r.stamp for r in held])
        assert np.median(np.diff(stamps)) < 0.01
    for record in held:
        np.testing.assert_array_equal(record.nominal, hold)
        assert not np.allclose(record.torque, u)
    for record in records:
        if not record.hold_nominal:
            np.testing.assert_array_equal(record.nominal, u)
    # The hold nominal is filtered too (here it is modified: the state is near the limits).
    assert any(not np.array_equal(r.torque, r.nominal) for r in held)
    assert replay_statuses(records, arm.reference_filter()) >= 150
    assert match_filtered_to_statuses(filtered, records) >= 150


# ---------------------------------------------------------------------- measured loop
@pytest.mark.parametrize('rate_factor', [1.0, 0.5], ids=['certified-rate', 'half-rate'])
@pytest.mark.slow
def test_diagnostics_warn_when_the_loop_is_slower_than_the_certified_hold(
        rate_factor: float, harness: Harness, start_node: Any) -> None:
    """Joint states at the certified rate: the measured step period is the certified hold and
    no step-period warning; at half that rate the period is twice the hold: WARN. planar2 is
    certified at 100 Hz here so that a loaded machine keeps the rates (a 1 kHz loop in this
    one Python process would not); the diagnostics compare with ``control_period_s *
    sampling_factor`` of whatever certificate is loaded."""
    arm = certified_arm('planar2', control_rate_hz=100.0)
    hold_ms = arm.certificate.control_period_s * arm.certificate.sampling_factor * 1e3
    assert hold_ms == pytest.approx(10.0)
    start_node(node_arguments(arm, joint_state_timeout_s=5.0, nominal_timeout_s=5.0,
                              diagnostics_rate_hz=2.0))
    activate(harness)
    names = list(arm.model.joint_names)
    q = mid_range(arm.model)
    u = arm.reference_filter().dynamics.gravity_torque(q)
    harness.nominal_first = True
    harness.start_source(lambda k: (joint_state(names, q, np.zeros(2)), nominal(u)),
                         rate_hz=rate_factor * arm.certificate.control_rate_hz)
    started = time.monotonic() + 1.2  # a report window wholly inside the stream
    assert wait_for(lambda: harness.latest_diagnostic(started) is not None, 20.0)
    status = harness.latest_diagnostic(started)
    values = {kv.key: kv.value for kv in status.values}
    period = float(values['step_period.median_ms'])
    assert float(values['step_period.certified_hold_ms']) == pytest.approx(hold_ms)
    assert math.isfinite(float(values['step_period.jitter_ms']))
    assert period == pytest.approx(hold_ms / rate_factor, rel=0.1), values
    if rate_factor < 1.0:
        assert LEVEL_NAMES[status.level] == 'WARN', status.message
        assert 'step period' in status.message and 'certified hold' in status.message
    else:
        assert 'step period' not in status.message, status.message
        assert LEVEL_NAMES[status.level] in ('OK', 'WARN'), status.message


# ---------------------------------------------------------------------- 4. parameters
def test_runtime_parameter_changes(planar2: CertifiedArm, harness: Harness,
                                   start_node: Any) -> None:
    arm = planar2
    start_node(node_arguments(arm, trigger='nominal'))  # steps on the nominals alone below
    activate(harness)
    for name, value in (('gamma', [1.0, 1.0]), ('payload_mass', 0.1),
                        ('gravity_convention', 'driver_compensated'),
                        ('urdf_path', '/tmp/other.urdf'), ('certified', True)):
        result = harness.set_parameter(name, value)
        assert not result.successful and result.reason, (name, result)
    assert 'safety parameter' in harness.set_parameter('payload_mass', 0.1).reason
    for name, value in (('joint_state_timeout_s', -1.0), ('nominal_timeout_s', math.inf),
                        ('nominal_timeout_s', 'soon')):
        result = harness.set_parameter(name, value)
        assert not result.successful and result.reason, (name, value, result)
    result = harness.set_parameter('trigger', 'joint_state')
    assert not result.successful and 'configure' in result.reason
    assert harness.get_parameter('payload_mass') == -1.0
    # Accepted: a timeout. It takes effect: with 10 s the watchdog does not trip at 50 ms.
    result = harness.set_parameter('joint_state_timeout_s', 10.0)
    assert result.successful, result.reason
    assert harness.get_parameter('joint_state_timeout_s') == 10.0
    names = list(arm.model.joint_names)
    q = mid_range(arm.model)
    stream(harness, lambda k: (joint_state(names, q, np.zeros(2)), nominal([0.0, 0.0])),
           statuses=50)
    stopped = time.monotonic()
    harness.start_source(lambda k: (None, nominal([0.0, 0.0])))
    wait_for(lambda: len(harness.status.since(stopped + 0.3)) >= 50, 10.0)
    later = [parse_status(m, names) for m in harness.status.since(stopped + 0.3)]
    assert len(later) >= 50 and all(r.mode != MODE_STALE for r in later)


# ---------------------------------------------------------------------- 5. lifecycle
@pytest.mark.parametrize('namespace', [''], ids=['root-namespace'])
def test_lifecycle_transitions_switch_the_outputs(planar2: CertifiedArm, harness: Harness,
                                                  start_node: Any) -> None:
    """Also: the certificate file exactly as Certificate.save writes it (keyed /**), for the
    node in the root namespace."""
    arm = planar2
    start_node(node_arguments(arm, arm.default_certificate_path, diagnostics_rate_hz=20.0))
    names = list(arm.model.joint_names)
    q = mid_range(arm.model)
    harness.start_source(lambda k: (joint_state(names, q, np.zeros(2)), nominal([0.5, 0.1])))
    assert harness.get_state() == 'unconfigured'
    assert not harness.change_state('activate')  # not a transition from unconfigured
    assert harness.change_state('configure')
    assert harness.get_state() == 'inactive'
    harness.wait_for_subscribers()
    t0 = time.monotonic()
    assert wait_for(lambda: harness.latest_diagnostic(t0) is not None, 10.0)
    assert LEVEL_NAMES[harness.latest_diagnostic(t0).level] == 'STALE'
    assert 'inactive' in harness.latest_diagnostic(t0).message
    wait_for(lambda: False, 0.5)
    assert len(harness.filtered) == 0 and len(harness.status) == 0, 'inactive node published'

    for round_ in range(2):  # the second round checks that configure works again
        assert harness.change_state('activate')
        assert harness.get_state() == 'active'
        assert wait_for(lambda: len(harness.filtered) >= 50, 20.0), 'no output while active'
        assert harness.change_state('deactivate')
        assert harness.get_state() == 'inactive'
        wait_for(lambda: False, 0.3)  # messages in flight
        harness.filtered.clear()
        harness.status.clear()
        wait_for(lambda: False, 0.5)
        assert len(harness.filtered) == 0 and len(harness.status) == 0, \
            'outputs continued after deactivate'
        assert harness.change_state('cleanup')
        assert harness.get_state() == 'unconfigured'
        if round_ == 0:
            assert harness.change_state('configure')


@pytest.mark.parametrize(('transition', 'convention'), [
    ('deactivate', 'full'), ('deactivate', 'driver_compensated'), ('shutdown', 'full')])
def test_deactivate_and_shutdown_send_the_hold_command_last(
        transition: str, convention: str, planar2: CertifiedArm, harness: Harness,
        start_node: Any) -> None:
    """Leaving active, the node publishes one last filtered_torque, the hold command
    hold_torque(q, v) at the last valid joint state in the driver's convention, and then
    nothing."""
    arm = planar2
    start_node(node_arguments(arm, gravity_convention=convention,
                              joint_state_timeout_s=5.0, nominal_timeout_s=5.0))
    activate(harness)
    names = list(arm.model.joint_names)
    q = mid_range(arm.model) + np.array([0.2, -0.3])
    v = np.array([0.3, -0.2])
    harness.nominal_first = True
    harness.start_source(lambda k: (joint_state(names, q, v), nominal([0.5, -0.4])))
    assert wait_for(lambda: len(harness.status) >= 50, 20.0)
    harness.set_source(None)
    wait_for(lambda: False, 0.2)
    steps = len(harness.status)
    assert harness.change_state('deactivate' if transition == 'deactivate'
                                else 'shutdown_from_active')
    wait_for(lambda: False, 0.5)
    filtered = harness.filtered.messages()
    hold = arm.reference_filter(gravity_convention=convention).hold_torque(q, v)
    np.testing.assert_allclose(np.array(filtered[-1].data), hold, rtol=0, atol=1e-12)
    assert len(harness.status) == steps, 'the last command is not a filter step'
    last_step = parse_status(harness.status.messages()[-1], names)
    assert not np.allclose(last_step.torque, hold)  # a different command than the steps'
    if convention == 'driver_compensated':  # on top of the driver's gravity compensation
        full = arm.reference_filter().hold_torque(q, v)
        assert not np.allclose(hold, full)
    count = len(harness.filtered)
    wait_for(lambda: False, 0.5)
    assert len(harness.filtered) == count, 'outputs continued after the last command'


def test_configure_fails_with_a_certificate_for_another_model(
        planar2: CertifiedArm, bench6: CertifiedArm, harness: Harness,
        start_node: Any) -> None:
    # planar2's certificate, bench6's URDF and limits: model hash mismatch.
    start_node(['--ros-args', '--params-file', str(planar2.certificate_path),
                '-p', f'urdf_path:={bench6.urdf_path}', '-p',
                f'limits_path:={bench6.limits_path}'])
    assert harness.get_state() == 'unconfigured'
    assert not harness.change_state('configure')
    assert harness.get_state() == 'unconfigured'
    assert not harness.change_state('activate')


def test_configure_refuses_uncertified_and_edited_certificates(
        planar2: CertifiedArm, harness: Harness, start_node: Any,
        tmp_path: Any) -> None:
    uncertified = replace(planar2.certificate, certified=False, reasons=['made up for a test'])
    path = uncertified.save(tmp_path / 'uncertified.yaml')
    assert Certificate.load(path).certified is False
    start_node(['--ros-args', '--params-file', str(path),
                '-p', f'urdf_path:={planar2.urdf_path}',
                '-p', f'limits_path:={planar2.limits_path}'])
    assert not harness.change_state('configure')
    assert harness.get_state() == 'unconfigured'


def test_configure_refuses_an_edited_certificate(planar2: CertifiedArm, harness: Harness,
                                                 start_node: Any, tmp_path: Any) -> None:
    text = planar2.certificate_path.read_text(encoding='utf-8')
    gamma = planar2.certificate.gamma
    edited = text.replace(repr(float(gamma[0])), repr(float(gamma[0]) * 2.0), 1)
    assert edited != text
    path = tmp_path / 'edited.yaml'
    path.write_text(edited, encoding='utf-8')
    start_node(['--ros-args', '--params-file', str(path),
                '-p', f'urdf_path:={planar2.urdf_path}',
                '-p', f'limits_path:={planar2.limits_path}'])
    assert not harness.change_state('configure')
    assert harness.get_state() == 'unconfigured'
