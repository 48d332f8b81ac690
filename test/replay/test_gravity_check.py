"""``safety-filter check-gravity`` (safety_filter.replay.gravity_check) on bags written here.

The bags hold what a driver would publish: the arm moves between rest poses (efforts during
motion are nonsense on purpose: they must be ignored), then rests at each pose with velocity
and effort noise. Efforts at rest are the model's own ``g(q)`` (a driver that reports the
full torque), zeros (a driver that compensates gravity itself) or ``g(q)`` of a model with a
30 % heavier link (a URDF mass error: inconclusive). ``g(q)`` for the bags comes from
``Dynamics(model, payload).gravity_torque(q)``, one state at a time (Pinocchio when
installed), not from the batched call the check uses.
"""

from __future__ import annotations

import math
import threading
import time
from collections.abc import Callable
from pathlib import Path

import numpy as np
import pytest

from safety_filter.cli.main import SAFETY_NOTICE, main
from safety_filter.core.dynamics import Dynamics
from safety_filter.core.model_uncertainty import model_with_inertials
from safety_filter.core.robot_model import RobotModel
from safety_filter.errors import ExitCode, InvalidValue
from safety_filter.recordings import bags
from safety_filter.replay import gravity_check as gc
from safety_filter.simulation.demo_arms import load_demo_arm

START_NS = 1_700_000_000_000_000_000
BENCH6_POSES = np.array([[0.3, 0.7, -1.2, 0.2, 0.4, 0.1],
                         [-0.5, -0.4, -0.8, 0.0, -0.6, 0.3]])
PLANAR2_POSES = np.array([[0.3, -0.4], [-0.4, 0.3]])

EffortFn = Callable[[np.ndarray], np.ndarray]


def gravity_of(model: RobotModel, payload_mass: float) -> EffortFn:
    dynamics = Dynamics(model, payload_mass)
    return dynamics.gravity_torque


def heavier_link(model: RobotModel, body: int, factor: float = 1.3) -> RobotModel:
    mass = np.array(model.body_mass)
    mass[body] *= factor
    return model_with_inertials(model, body_mass=mass)


def write_rest_bag(path: Path, model: RobotModel, poses: np.ndarray, effort: EffortFn | None,
                   *, rate_hz: float = 200.0, rest_s: float = 1.0, move_s: float = 0.5,
                   velocity: bool = True, storage: str = 'mcap', seed: int = 0,
                   topic: str = bags.TOPIC_JOINT_STATES) -> None:
    """Move to each pose (nonsense efforts), rest there ``rest_s`` (``effort(q)`` + noise);
    messages name the chain joints in reverse order plus a gripper joint."""
    rng = np.random.default_rng(seed)
    names = [*reversed(model.joint_names), 'gripper_finger']
    dt = 1.0 / rate_hz
    k = 0
    q_prev = np.array(poses[0]) + 0.5

    def publish(writer: bags.BagWriter, q: np.ndarray, v: np.ndarray, e: np.ndarray | None
                ) -> None:
        nonlocal k
        t = START_NS + int(round(k * dt * 1e9))
        k += 1
        position = [*reversed(q), 0.01]
        vel = [*reversed(v), 0.0] if velocity else []
        eff = [*reversed(e), 0.3] if e is not None else []
        writer.write_joint_state(topic, t, t - 1000, names, position, vel, eff)

    with bags.BagWriter(path, storage) as writer:
        for pose in poses:
            steps = int(move_s * rate_hz)
            for s in range(steps):
                # a smooth move (half a cosine): fast in the middle
                phase = math.pi * (s + 0.5) / steps
                q = q_prev + 0.5 * (1 - math.cos(phase)) * (pose - q_prev)
                v = (pose - q_prev) * 0.5 * math.pi / move_s * math.sin(phase)
                nonsense = rng.normal(0.0, 5.0, model.n_joints) if effort is not None else None
                publish(writer, q, v, nonsense)
            for _ in range(int(rest_s * rate_hz)):
                q = pose + rng.normal(0.0, 1e-5, model.n_joints)
                v = rng.normal(0.0, 0.004, model.n_joints)
                e = None
                if effort is not None:
                    e = effort(q) + rng.normal(0.0, 0.02, model.n_joints)
                publish(writer, q, v, e)
            q_prev = np.array(pose)


def check_bag(path: Path, model: RobotModel, **options: float) -> gc.GravityCheck:
    samples = gc.read_bag_samples(path, 'joint_states', model.joint_names)
    return gc.check_gravity(model, samples, **options)


@pytest.fixture(scope='module')
def bench6() -> RobotModel:
    return load_demo_arm('bench6')


@pytest.fixture(scope='module')
def planar2() -> RobotModel:
    return load_demo_arm('planar2')


# ---------------------------------------------------------------------- the core
def test_efforts_equal_to_g_read_as_full(tmp_path: Path, bench6: RobotModel) -> None:
    # The limits file's payload range is [0, 1] kg: the default model payload is 0.5 kg.
    path = tmp_path / 'full'
    write_rest_bag(path, bench6, BENCH6_POSES, gravity_of(bench6, 0.5))
    result = check_bag(path, bench6)
    assert result.convention == 'full', result.format()
    assert result.exit_code == ExitCode.OK
    assert result.payload_mass == 0.5
    assert result.rest_samples == 2 * 200  # every rest sample, no moving one
    verdicts = {j.name: j.verdict for j in result.joints}
    assert verdicts['shoulder_pitch'] == verdicts['elbow_pitch'] == gc.FULL
    # base_yaw turns about the vertical: no gravity there, it cannot tell.
    assert verdicts['base_yaw'] == gc.TOO_LITTLE
    shoulder = result.joints[1]
    expected = np.mean([gravity_of(bench6, 0.5)(p)[1] for p in BENCH6_POSES])
    assert shoulder.gravity == pytest.approx(expected, abs=1e-3)
    assert abs(shoulder.residual) < 0.01
    text = result.format()
    assert 'verdict: full' in text and 'gravity_convention: full' in text


def test_zero_efforts_read_as_driver_compensated(tmp_path: Path, bench6: RobotModel) -> None:
    path = tmp_path / 'zero'
    write_rest_bag(path, bench6, BENCH6_POSES, lambda q: np.zeros(6), storage='sqlite3')
    result = check_bag(path, bench6)
    assert result.convention == 'driver_compensated', result.format()
    assert result.exit_code == ExitCode.OK
    verdicts = {j.name: j.verdict for j in result.joints}
    assert verdicts['shoulder_pitch'] == verdicts['elbow_pitch'] == gc.NO_GRAVITY
    assert 'gravity_convention: driver_compensated' in result.format()


def test_thirty_percent_heavier_link_is_inconclusive(tmp_path: Path,
                                                     planar2: RobotModel) -> None:
    # planar2 without payload: the elbow carries only the forearm, so a forearm 30 %
    # heavier than the URDF says makes the elbow's gravity 30 % larger than the model's.
    path = tmp_path / 'heavy'
    write_rest_bag(path, planar2, PLANAR2_POSES, gravity_of(heavier_link(planar2, 1), 0.0))
    result = check_bag(path, planar2, payload_mass=0.0)
    assert result.convention is None
    assert result.exit_code == ExitCode.INCONCLUSIVE
    elbow = result.joints[1]
    assert elbow.verdict == gc.INCONCLUSIVE
    assert elbow.residual == pytest.approx(0.3 * elbow.gravity, rel=0.05)
    assert any(r.startswith('large residual at') and 'elbow' in r for r in result.reasons)
    # The same bag with the heavier model is full: the flag is the mass, not the bag.
    assert check_bag(path, heavier_link(planar2, 1), payload_mass=0.0).convention == 'full'


def test_velocities_missing_use_position_differences(tmp_path: Path,
                                                     planar2: RobotModel) -> None:
    path = tmp_path / 'no_velocity'
    write_rest_bag(path, planar2, PLANAR2_POSES, gravity_of(planar2, 0.25), velocity=False)
    samples = gc.read_bag_samples(path, '/joint_states', planar2.joint_names)
    assert np.isnan(samples.velocity).all()
    result = gc.check_gravity(planar2, samples)
    assert result.convention == 'full', result.format()
    # Rest starts once the position has been still for the difference window.
    assert 2 * 200 - 2 * 15 <= result.rest_samples <= 2 * 200


def test_motion_only_gives_too_few_rest_samples(tmp_path: Path, planar2: RobotModel) -> None:
    # A swinging arm passes v = 0 at its turning points; those are not rest.
    path = tmp_path / 'swing'
    gravity = gravity_of(planar2, 0.25)
    with bags.BagWriter(path) as writer:
        for k in range(1000):
            t = 0.005 * k
            q = np.array([0.5 * math.sin(2 * t), 0.3 * math.cos(3 * t)])
            v = np.array([1.0 * math.cos(2 * t), -0.9 * math.sin(3 * t)])
            ns = START_NS + 5_000_000 * k
            writer.write_joint_state(bags.TOPIC_JOINT_STATES, ns, ns, planar2.joint_names, q,
                                     v, gravity(q))
    result = check_bag(path, planar2)
    assert result.rest_samples == 0
    assert result.exit_code == ExitCode.INCONCLUSIVE
    assert result.reasons[0].startswith('too few rest samples')


def test_short_rests_do_not_count(tmp_path: Path, planar2: RobotModel) -> None:
    path = tmp_path / 'short'
    write_rest_bag(path, planar2, PLANAR2_POSES, gravity_of(planar2, 0.25), rest_s=0.15)
    result = check_bag(path, planar2)
    assert result.rest_samples == 0 and result.convention is None


def test_efforts_missing_is_inconclusive(tmp_path: Path, planar2: RobotModel) -> None:
    path = tmp_path / 'no_effort'
    write_rest_bag(path, planar2, PLANAR2_POSES, None)
    result = check_bag(path, planar2)
    assert result.exit_code == ExitCode.INCONCLUSIVE
    assert any(r.startswith('efforts missing') for r in result.reasons)
    assert all(j.verdict == gc.INCONCLUSIVE and j.reason == 'no effort reported'
               for j in result.joints)


def test_gravity_too_small_to_tell(tmp_path: Path, bench6: RobotModel) -> None:
    # Upright: shoulder and elbow straight up, the arm's weight on the base.
    pose = np.zeros((1, 6))
    path = tmp_path / 'upright'
    write_rest_bag(path, bench6, pose, gravity_of(bench6, 0.5))
    result = check_bag(path, bench6)
    assert result.convention is None
    assert all(j.verdict == gc.TOO_LITTLE for j in result.joints), result.format()
    assert 'no joint carries enough gravity' in result.reasons[0]


def test_pairing_skips_messages_without_the_chain() -> None:
    types = bags.typestore().types

    def message(names: list[str], position: list[float], effort: list[float]) -> object:
        return bags.joint_state_message(0, names, position, [], effort)

    messages = [(30, message(['b', 'a'], [2.0, 1.0], [20.0, 10.0])),
                (10, message(['a', 'x'], [1.0, 0.0], [])),
                (20, message(['a', 'b', 'c'], [1.5, 2.5, 0.0], []))]
    samples = gc.pair_samples(messages, ['a', 'b'])
    assert (samples.messages, samples.skipped, samples.count) == (3, 1, 2)
    np.testing.assert_allclose(samples.time_s, [0.0, 1e-8])
    np.testing.assert_array_equal(samples.position, [[1.5, 2.5], [1.0, 2.0]])
    assert np.isnan(samples.effort[0]).all()
    np.testing.assert_array_equal(samples.effort[1], [10.0, 20.0])
    assert np.isnan(samples.velocity).all()
    assert types  # the typestore built the messages


def test_bad_options_raise(planar2: RobotModel) -> None:
    samples = gc.pair_samples([], planar2.joint_names)
    for options, option in (({'tolerance': 1.5}, '--tolerance'),
                            ({'rest_velocity': 0.0}, '--rest-velocity'),
                            ({'min_samples': 0}, '--min-samples'),
                            ({'payload_mass': -1.0}, '--payload-mass')):
        with pytest.raises(InvalidValue, match=option) as raised:
            gc.check_gravity(planar2, samples, **options)
        assert raised.value.what == option and raised.value.exit_code == ExitCode.BAD_INPUT


# ---------------------------------------------------------------------- the command
def test_cli_full_and_driver_compensated(tmp_path: Path, bench6: RobotModel,
                                         capsys: pytest.CaptureFixture[str]) -> None:
    full, zero = tmp_path / 'full', tmp_path / 'zero'
    write_rest_bag(full, bench6, BENCH6_POSES, gravity_of(bench6, 0.2))
    write_rest_bag(zero, bench6, BENCH6_POSES, lambda q: np.zeros(6))
    # the storage file works as well as the folder
    assert main(['check-gravity', str(next(full.glob('*.mcap'))), '--demo', 'bench6',
                 '--payload-mass', '0.2']) == 0
    out, err = capsys.readouterr()
    assert SAFETY_NOTICE in err
    assert 'verdict: full' in out and 'shoulder_pitch' in out
    assert 'measured' in out and 'g(q)' in out and 'residual' in out
    assert main(['check-gravity', str(zero), '--demo', 'bench6']) == 0
    out, _ = capsys.readouterr()
    assert 'driver_compensated' in out


def test_cli_inconclusive_exit_code(tmp_path: Path, planar2: RobotModel,
                                    capsys: pytest.CaptureFixture[str]) -> None:
    from safety_filter.simulation.demo_arms import demo_arm_files

    urdf, limits = demo_arm_files('planar2')
    path = tmp_path / 'heavy'
    write_rest_bag(path, planar2, PLANAR2_POSES, gravity_of(heavier_link(planar2, 1), 0.0))
    code = main(['check-gravity', str(path), '--urdf', str(urdf), '--limits', str(limits),
                 '--payload-mass', '0'])
    out, _ = capsys.readouterr()
    assert code == ExitCode.INCONCLUSIVE == 6
    assert 'verdict: inconclusive' in out
    assert any(line.startswith('  - large residual at') and 'elbow' in line
               for line in out.splitlines()), out
    # a looser tolerance accepts the heavier forearm
    assert main(['check-gravity', str(path), '--demo', 'planar2', '--payload-mass', '0',
                 '--tolerance', '0.4']) == 0


def test_cli_bad_input(tmp_path: Path, planar2: RobotModel,
                       capsys: pytest.CaptureFixture[str]) -> None:
    path = tmp_path / 'bag'
    write_rest_bag(path, planar2, PLANAR2_POSES, gravity_of(planar2, 0.25),
                   topic='/arm/joint_states')
    cases = [
        (['check-gravity', str(tmp_path / 'nothing'), '--demo', 'planar2'], 'bag not found'),
        (['check-gravity', str(tmp_path), '--demo', 'planar2'], 'not a rosbag2 bag'),
        (['check-gravity', str(path), '--demo', 'planar2'], 'has no topic /joint_states'),
        (['check-gravity', str(path), '--demo', 'bench6', '--joint-states-topic',
          '/arm/joint_states'], 'carries every chain joint'),
        (['check-gravity', str(path)], 'the robot is required'),
        (['check-gravity', str(path), '--demo', 'planar2', '--joint-states-topic',
          'arm/joint_states', '--tolerance', '2'], '--tolerance'),
    ]
    for argv, message in cases:
        assert main(argv) == 2, argv
        _, err = capsys.readouterr()
        assert message in err, (argv, err)
    assert main(['check-gravity', str(path), '--demo', 'planar2',
                 '--joint-states-topic', 'arm/joint_states']) == 0


# ---------------------------------------------------------------------- live
@pytest.mark.ros
def test_live_topic(planar2: RobotModel, capsys: pytest.CaptureFixture[str],
                    monkeypatch: pytest.MonkeyPatch) -> None:
    rclpy = pytest.importorskip('rclpy')
    import random

    from rclpy.executors import SingleThreadedExecutor
    from sensor_msgs.msg import JointState

    domain = random.SystemRandom().randint(100, 200)
    monkeypatch.setenv('ROS_AUTOMATIC_DISCOVERY_RANGE', 'LOCALHOST')
    gravity = gravity_of(planar2, 0.25)
    pose = PLANAR2_POSES[0]
    context = rclpy.context.Context()
    rclpy.init(context=context, domain_id=domain)
    node = rclpy.create_node('fake_driver', context=context)
    publisher = node.create_publisher(JointState, 'joint_states', 10)
    done = threading.Event()

    def publish() -> None:
        while not done.is_set():
            msg = JointState()
            msg.name = list(planar2.joint_names)
            msg.position = [float(x) for x in pose]
            msg.velocity = [0.0, 0.0]
            msg.effort = [float(x) for x in gravity(pose)]
            publisher.publish(msg)
            time.sleep(0.01)

    thread = threading.Thread(target=publish, daemon=True)
    thread.start()
    executor = SingleThreadedExecutor(context=context)
    executor.add_node(node)
    try:
        code = main(['check-gravity', '--demo', 'planar2', '--duration', '4',
                     '--domain-id', str(domain)])
    finally:
        done.set()
        thread.join(timeout=5.0)
        executor.shutdown(timeout_sec=1.0)
        node.destroy_node()
        context.try_shutdown()
    out, _ = capsys.readouterr()
    assert code == 0, out
    assert 'verdict: full' in out and '(live, 4 s)' in out
