"""The simulated driver (safety_filter.simulation.sim_driver): the plant of the sim_arm node, no
ROS.

The accelerated simulator is checked against the package's reference simulator
(:class:`safety_filter.simulation.plant.ArmSimulator`, itself checked against SciPy's ``solve_ivp``
in test_simulate.py); the driver's rules (brakes, saturation, command timeout, latency, noise)
against hand-computed expectations.
"""

from __future__ import annotations

import numpy as np
import pytest

from safety_filter.core.dynamics import Dynamics
from safety_filter.errors import InvalidValue
from safety_filter.simulation.demo_arms import load_demo_arm
from safety_filter.simulation.plant import ArmSimulator
from safety_filter.simulation.sim_driver import SimulatedDriver

RATE = 1000.0
PERIOD = 1.0 / RATE


@pytest.fixture(scope='module', params=['planar2', 'bench6'])
def model(request):
    return load_demo_arm(request.param)


@pytest.mark.slow
def test_pinocchio_simulator_matches_the_numpy_reference(model) -> None:
    # The simulator's forward dynamics go through Pinocchio's ABA when it is installed; the
    # numpy recursion (checked against closed forms and Pinocchio in test_dynamics) is the
    # reference.
    pytest.importorskip('pinocchio', reason='the fast path needs Pinocchio: pip install pin')
    rng = np.random.default_rng(1)
    fast = ArmSimulator(model, payload_mass=0.4, internal_rate_hz=5000.0, backend='pinocchio')
    reference = ArmSimulator(model, payload_mass=0.4, internal_rate_hz=5000.0, backend='numpy')
    q0 = rng.uniform(model.position_lower, model.position_upper)
    v0 = rng.uniform(-1.0, 1.0, model.n_joints)
    fast.reset(q0, v0)
    reference.reset(q0, v0)
    effort = np.array(model.effort_limit)
    for _ in range(50):
        u = rng.uniform(-effort, effort)
        fast.advance(u, 0.004)
        reference.advance(u, 0.004)
    np.testing.assert_allclose(fast.q, reference.q, rtol=0, atol=1e-9)
    np.testing.assert_allclose(fast.v, reference.v, rtol=0, atol=1e-8)


def test_held_still_until_the_first_command(model) -> None:
    driver = SimulatedDriver(model, RATE)
    q0 = driver.position
    np.testing.assert_allclose(q0, 0.5 * (model.position_lower + model.position_upper))
    for _ in range(20):
        measurement = driver.tick()
    assert not driver.released
    np.testing.assert_array_equal(measurement.position, q0)
    np.testing.assert_array_equal(measurement.velocity, 0.0)
    assert driver.time_s == pytest.approx(20 * PERIOD)
    assert driver.command(np.zeros(model.n_joints))
    driver.tick()
    assert driver.released
    assert not np.allclose(driver.position, q0)  # gravity acts on a zero command


def test_commands_are_saturated_like_a_driver(model) -> None:
    driver = SimulatedDriver(model, RATE, initial_positions=np.zeros(model.n_joints)
                             + 0.5 * (model.position_lower + model.position_upper))
    effort = np.array(model.effort_limit)
    command = 3.0 * effort * np.where(np.arange(model.n_joints) % 2 == 0, 1.0, -1.0)
    reference = ArmSimulator(model, internal_rate_hz=10 * RATE)
    reference.reset(driver.position)
    driver.command(command)
    measurement = driver.tick()
    reference.advance(np.clip(command, -effort, effort), PERIOD)
    np.testing.assert_array_equal(measurement.effort, np.clip(command, -effort, effort))
    np.testing.assert_allclose(measurement.position, reference.q, atol=1e-10)


def test_stale_command_gives_zero_torque(model) -> None:
    driver = SimulatedDriver(model, RATE, command_timeout_s=0.0045)
    hold = Dynamics(model).gravity_torque(driver.position)
    driver.command(hold)
    for _ in range(5):  # command ages 0 .. 4 ms
        assert np.allclose(driver.tick().effort, np.clip(hold, -model.effort_limit,
                                                         model.effort_limit))
    assert driver.stale_ticks == 0
    for _ in range(3):
        assert np.all(driver.tick().effort == 0.0)  # command timeout: zero torque
    assert driver.stale_ticks == 3
    driver.command(hold)  # commands resume
    assert np.any(driver.tick().effort != 0.0)


def test_a_pipeline_delay_applies_each_command_that_many_ticks_late(model) -> None:
    """With a delay of two ticks the command of tick k acts in tick k + 2 (the first one
    until then); after a command timeout the commands resume afresh."""
    driver = SimulatedDriver(model, RATE, command_delay_ticks=2, command_timeout_s=0.0025)
    n = model.n_joints
    commands = [np.full(n, 0.01 * (k + 1)) for k in range(5)]
    applied = []
    for command in commands:
        driver.command(command)
        applied.append(driver.tick().effort)
    expected = [commands[0], commands[0], commands[0], commands[1], commands[2]]
    np.testing.assert_allclose(applied, expected)
    for _ in range(4):
        driver.tick()  # the last command grows stale: zero torque
    driver.command(commands[4])
    np.testing.assert_allclose(driver.tick().effort, commands[4])


def test_invalid_commands_are_ignored(model) -> None:
    driver = SimulatedDriver(model, RATE)
    assert not driver.command(np.zeros(model.n_joints + 1))
    assert not driver.command(np.full(model.n_joints, np.nan))
    assert driver.invalid_commands == 2
    assert not driver.released


def test_driver_compensated_adds_gravity(model) -> None:
    driver = SimulatedDriver(model, RATE, gravity_convention='driver_compensated')
    gravity = Dynamics(model).gravity_torque(driver.position)
    driver.command(np.zeros(model.n_joints))
    measurement = driver.tick()
    np.testing.assert_allclose(measurement.effort,
                               np.clip(gravity, -model.effort_limit, model.effort_limit))


def test_latency_publishes_the_state_measured_that_long_ago(model) -> None:
    # The newest state at least latency_s old is published, with its own stamp.
    delayed = SimulatedDriver(model, RATE, latency_s=3 * PERIOD)
    prompt = SimulatedDriver(model, RATE)
    rng = np.random.default_rng(2)
    truth = {0.0: prompt.position}
    for k in range(30):
        u = rng.uniform(-1.0, 1.0, model.n_joints)
        delayed.command(u)
        prompt.command(u)
        late = delayed.tick()
        now = prompt.tick()
        truth[round(now.stamp_s, 9)] = now.position
        assert delayed.time_s - late.stamp_s == pytest.approx(min(3, k + 1) * PERIOD,
                                                              abs=1e-12)
        np.testing.assert_array_equal(late.position, truth[round(late.stamp_s, 9)])


def test_noise_is_seeded_and_has_the_asked_spread(model) -> None:
    def samples(seed: int) -> np.ndarray:
        driver = SimulatedDriver(model, RATE, position_noise_std=0.01,
                                 velocity_noise_std=0.1, noise_seed=seed)
        return np.array([np.concatenate([m.position - driver.position,
                                         m.velocity - driver.velocity])
                         for m in (driver.tick() for _ in range(2000))])

    first, again, other = samples(7), samples(7), samples(8)
    np.testing.assert_array_equal(first, again)
    assert not np.array_equal(first, other)
    n = model.n_joints
    assert np.std(first[:, :n]) == pytest.approx(0.01, rel=0.1)
    assert np.std(first[:, n:]) == pytest.approx(0.1, rel=0.1)


@pytest.mark.parametrize('options', [
    {'control_rate_hz': 0.0}, {'internal_rate_hz': 10.0}, {'latency_s': -1.0},
    {'command_timeout_s': 0.0}, {'gravity_convention': 'none'},
    {'initial_positions': [0.0]}, {'position_noise_std': float('nan')},
    {'command_delay_ticks': -1}, {'command_delay_ticks': 1.5},
    {'command_delay_ticks': float('nan')}])
def test_bad_options_are_refused(options) -> None:
    model = load_demo_arm('planar2')
    kwargs = {'control_rate_hz': RATE, **options}
    (name,) = options  # the message names the option refused
    with pytest.raises(InvalidValue, match=name) as raised:
        SimulatedDriver(model, **kwargs)
    assert raised.value.what == name

