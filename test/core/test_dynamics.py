"""Tests of the rigid-body dynamics against references from outside the package.

References (METHOD section 6):

* the closed-form two-link planar arm (Spong, Hutchinson, Vidyasagar, *Robot Modeling and
  Control*, Wiley 2006, ch. 7, the "planar elbow manipulator" example, sec. 7.4 -- section
  number from memory);
* the skew symmetry of ``dM/dt - 2C`` for the Christoffel-symbol ``C`` (same book, ch. 7,
  "skew symmetry" property -- a standard property), with ``dM/dt`` from finite differences;
* conservation of total energy of the unforced frictionless motion, integrated with SciPy's
  ``solve_ivp`` (DOP853) at tight tolerances;
* Pinocchio (package ``pin``), a general-purpose rigid-body dynamics library, built straight
  from the URDF (see ``conftest.pinocchio_reference``).
"""

from __future__ import annotations

import math
from typing import Any

import numpy as np
import pytest
from conftest import (
    STANDARD_GRAVITY,
    assert_matches_pinocchio,
    demo_limits_path,
    demo_limits_spec,
    demo_urdf_path,
    frictionless_limits,
    limits_gravity,
    origin_of,
    pinocchio_reference,
    random_chain_urdf,
    relative_error,
    urdf_tree,
)

from safety_filter.core.dynamics import (
    Dynamics,
    christoffel_batch,
    gravity_torque_batch,
    mass_matrix_batch,
    rnea_batch,
)
from safety_filter.core.robot_model import RobotModel
from safety_filter.errors import InvalidValue, ShapeMismatch

try:
    import pinocchio  # noqa: F401
    HAVE_PINOCCHIO = True
except ImportError:
    HAVE_PINOCCHIO = False
NEEDS_PINOCCHIO = pytest.mark.skipif(not HAVE_PINOCCHIO,
                                     reason='needs Pinocchio: pip install pin')
BACKENDS = ['numpy', pytest.param('pinocchio', marks=NEEDS_PINOCCHIO)]
RANDOM_SEEDS = range(48)  # 1 + seed % 8 joints: six chains of each size 1..8


# ---------------------------------------------------------------------- helpers
def load_demo(name: str, limits: dict[str, Any] | None = None) -> RobotModel:
    """A demo arm with its limits file (or with the given limits mapping instead)."""
    return RobotModel.from_urdf(demo_urdf_path(name),
                                limits=demo_limits_path(name) if limits is None else limits)


def demo_locked(name: str) -> dict[str, float]:
    """Locked joint positions of a demo arm from its limits file, with mimic followers
    resolved from the URDF (``<mimic joint multiplier offset>``, read with xml.etree)."""
    locked = {k: float(v) for k, v in (demo_limits_spec(name).get('locked_joints') or {}).items()}
    for joint in urdf_tree(demo_urdf_path(name)).iter('joint'):
        mimic = joint.find('mimic')
        if mimic is not None and joint.get('name') not in locked \
                and mimic.get('joint') in locked:
            locked[joint.get('name')] = (float(mimic.get('multiplier', 1.0))
                                         * locked[mimic.get('joint')]
                                         + float(mimic.get('offset', 0.0)))
    return locked


def demo_reference(name: str) -> Any:
    """Pinocchio model of a demo arm from its URDF, locked joints removed, the limits file's
    gravity set."""
    return pinocchio_reference(demo_urdf_path(name), locked=demo_locked(name),
                               gravity=limits_gravity(demo_limits_spec(name)))


def sample_states(model: RobotModel, seed: int, count: int) -> tuple[np.ndarray, np.ndarray]:
    """Random positions inside the limits and velocities up to the velocity limits."""
    rng = np.random.default_rng(seed)
    q = rng.uniform(model.position_lower, model.position_upper, size=(count, model.n_joints))
    v = rng.uniform(-model.velocity_limit, model.velocity_limit, size=(count, model.n_joints))
    return q, v


def compare_with_pinocchio(model: RobotModel, reference: Any, backend: str, seed: int,
                           count: int, label: str, payload_mass: float = 0.0) -> None:
    """M, g, C v, C(q, v) and the Christoffel symbols of ``Dynamics`` and of the batched
    functions against Pinocchio, to 1e-9 relative."""
    assert reference.joint_names == model.joint_names
    dynamics = Dynamics(model, payload_mass=payload_mass, backend=backend)
    q_all, v_all = sample_states(model, seed, count)
    for q, v in zip(q_all, v_all):
        mass_ref = reference.mass_matrix(q)
        mass_scale = float(np.max(np.abs(mass_ref)))
        v_scale = float(np.max(np.abs(v)))
        assert_matches_pinocchio(f'M ({label})', dynamics.mass_matrix(q), mass_ref)
        assert_matches_pinocchio(f'g ({label})', dynamics.gravity_torque(q),
                                 reference.gravity(q), scale=mass_scale * 9.81)
        cv_ref = reference.coriolis_torque(q, v)
        cv_scale = mass_scale * v_scale ** 2
        assert_matches_pinocchio(f'C v ({label})', dynamics.coriolis_torque(q, v), cv_ref,
                                 scale=cv_scale)
        coriolis_ref = reference.coriolis_matrix(q, v)
        assert_matches_pinocchio(f'C matrix ({label})', dynamics.coriolis_matrix(q, v),
                                 coriolis_ref, scale=mass_scale * v_scale)
        mass, bias = dynamics.mass_and_bias(q, v)
        friction = model.viscous_friction * v + model.coulomb_friction * np.sign(v)
        assert_matches_pinocchio(f'M ({label})', mass, mass_ref)
        assert_matches_pinocchio(f'h ({label})', bias,
                                 cv_ref + reference.gravity(q) + friction,
                                 scale=mass_scale * (9.81 + v_scale ** 2))
    # The batched functions exist in both backends: check each against the reference.
    masses = np.array([reference.mass_matrix(q) for q in q_all])
    gravities = np.array([reference.gravity(q) for q in q_all])
    mass_scale = float(np.max(np.abs(masses)))
    assert_matches_pinocchio(f'M batch ({label})',
                             mass_matrix_batch(model, q_all, payload_mass=payload_mass,
                                               backend=backend), masses)
    assert_matches_pinocchio(f'g batch ({label})',
                             gravity_torque_batch(model, q_all, payload_mass=payload_mass,
                                                  backend=backend),
                             gravities, scale=mass_scale * 9.81)
    gamma = christoffel_batch(model, q_all, payload_mass=payload_mass, backend=backend)
    for k, (q, v) in enumerate(zip(q_all, v_all)):
        scale = mass_scale * float(np.max(np.abs(v)))
        assert_matches_pinocchio(f'Gamma v ({label})', gamma[k] @ v,
                                 reference.coriolis_matrix(q, v), scale=scale)
        assert_matches_pinocchio(f'Gamma v v ({label})', (gamma[k] @ v) @ v,
                                 reference.coriolis_torque(q, v), scale=scale * np.max(np.abs(v)))


# ---------------------------------------------------------------------- closed form
def planar2_parameters() -> dict[str, float]:
    """Lengths, masses and inertias of planar2, read from its URDF with xml.etree.

    Also asserts the geometric assumptions of the textbook formulas: both axes along
    -y (so a positive angle turns +x toward +z), joint and centre-of-mass offsets along the
    link's own x axis, no rotated origins.
    """
    root = urdf_tree(demo_urdf_path('planar2'))
    joints = {j.get('name'): j for j in root.iter('joint')}
    links = {k.get('name'): k for k in root.iter('link')}
    for name in ('shoulder', 'elbow'):
        assert joints[name].get('type') == 'revolute'
        axis = [float(x) for x in joints[name].find('axis').get('xyz').split()]
        assert axis == [0.0, -1.0, 0.0]
    rotation, shoulder_at = origin_of(joints['shoulder'])
    assert np.allclose(rotation, np.eye(3)) and np.allclose(shoulder_at, 0.0)
    rotation, elbow_at = origin_of(joints['elbow'])
    assert np.allclose(rotation, np.eye(3)) and np.allclose(elbow_at[1:], 0.0)
    params = {'l1': float(elbow_at[0])}
    for k, link in ((1, 'upper'), (2, 'fore')):
        inertial = links[link].find('inertial')
        rotation, com = origin_of(inertial)
        assert np.allclose(rotation, np.eye(3)) and np.allclose(com[1:], 0.0)
        inertia = inertial.find('inertia')
        for off_diagonal in ('ixy', 'ixz', 'iyz'):
            assert float(inertia.get(off_diagonal)) == 0.0
        params[f'lc{k}'] = float(com[0])
        params[f'm{k}'] = float(inertial.find('mass').get('value'))
        params[f'I{k}'] = float(inertia.get('iyy'))  # moment about the joint axis (y)
    return params


def planar2_closed_form(p: dict[str, float], g0: float, q: np.ndarray, v: np.ndarray
                        ) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """M, C, g of the two-link planar arm, angles counter-clockwise from the horizontal,
    gravity -g0 along the vertical.

    Spong, Hutchinson, Vidyasagar, Robot Modeling and Control, 2006, planar elbow
    manipulator, sec. 7.4 (section number from memory):
        d11 = m1 lc1^2 + m2 (l1^2 + lc2^2 + 2 l1 lc2 cos q2) + I1 + I2
        d12 = d21 = m2 (lc2^2 + l1 lc2 cos q2) + I2,   d22 = m2 lc2^2 + I2
        c121 = c211 = c221 = -m2 l1 lc2 sin q2 =: h,   c112 = -h,  others 0
        C = [[h q2', h (q1' + q2')], [-h q1', 0]]
        g1 = (m1 lc1 + m2 l1) g cos q1 + m2 lc2 g cos(q1 + q2),  g2 = m2 lc2 g cos(q1 + q2)
    """
    m1, m2, l1, lc1, lc2, i1, i2 = (p[k] for k in ('m1', 'm2', 'l1', 'lc1', 'lc2', 'I1', 'I2'))
    c2, s2 = math.cos(q[1]), math.sin(q[1])
    d11 = m1 * lc1 ** 2 + m2 * (l1 ** 2 + lc2 ** 2 + 2 * l1 * lc2 * c2) + i1 + i2
    d12 = m2 * (lc2 ** 2 + l1 * lc2 * c2) + i2
    d22 = m2 * lc2 ** 2 + i2
    h = -m2 * l1 * lc2 * s2
    mass = np.array([[d11, d12], [d12, d22]])
    coriolis = np.array([[h * v[1], h * (v[0] + v[1])], [-h * v[0], 0.0]])
    c1, c12 = math.cos(q[0]), math.cos(q[0] + q[1])
    gravity = np.array([(m1 * lc1 + m2 * l1) * g0 * c1 + m2 * lc2 * g0 * c12,
                        m2 * lc2 * g0 * c12])
    return mass, coriolis, gravity


def planar2_potential(p: dict[str, float], g0: float, q: np.ndarray) -> float:
    """Potential energy of the two links, heights of the centres of mass above the shoulder
    (same textbook example)."""
    return g0 * (p['m1'] * p['lc1'] * math.sin(q[0])
                 + p['m2'] * (p['l1'] * math.sin(q[0]) + p['lc2'] * math.sin(q[0] + q[1])))


def planar2_g0() -> float:
    """Magnitude of gravity for planar2: its limits file declares it along -z."""
    gravity = limits_gravity(demo_limits_spec('planar2'))
    assert gravity[0] == 0.0 and gravity[1] == 0.0 and gravity[2] < 0.0
    return float(-gravity[2])


@pytest.mark.parametrize('backend', BACKENDS)
def test_planar2_matches_textbook_closed_form(backend: str) -> None:
    params = planar2_parameters()
    g0 = planar2_g0()
    model = load_demo('planar2')
    dynamics = Dynamics(model, backend=backend)
    rng = np.random.default_rng(7)
    states = [(np.zeros(2), np.zeros(2))] + [
        (rng.uniform(-2.4, 2.4, 2), rng.uniform(-3.0, 3.0, 2)) for _ in range(8)]
    for q, v in states:
        mass, coriolis, gravity = planar2_closed_form(params, g0, q, v)
        assert np.allclose(dynamics.mass_matrix(q), mass, rtol=0, atol=1e-10)
        assert np.allclose(dynamics.gravity_torque(q), gravity, rtol=0, atol=1e-10)
        assert np.allclose(dynamics.coriolis_torque(q, v), coriolis @ v, rtol=0, atol=1e-10)
        assert np.allclose(dynamics.coriolis_matrix(q, v), coriolis, rtol=0, atol=1e-10)
        damping = np.array([0.05, 0.05])  # planar2.urdf <dynamics damping>, no Coulomb
        assert np.allclose(dynamics.bias_torque(q, v), coriolis @ v + gravity + damping * v,
                           rtol=0, atol=1e-10)


def test_planar2_sign_convention_lifting_is_positive() -> None:
    """A positive shoulder angle lifts the arm: at q1 = pi/2 (pointing up) gravity exerts no
    shoulder torque, and the potential energy grows with q1 near zero (g1 = dV/dq1 > 0)."""
    dynamics = Dynamics(load_demo('planar2'), backend='numpy')
    assert dynamics.gravity_torque(np.array([math.pi / 2, 0.0])) == pytest.approx(
        [0.0, 0.0], abs=1e-12)
    assert dynamics.gravity_torque(np.array([0.3, 0.0]))[0] > 0.0


# ---------------------------------------------------------------------- skew symmetry
def skew_cases() -> list[Any]:
    return ['bench6', 'reach7'] + [f'random{seed}' for seed in (3, 5, 6, 7, 12, 13, 15)]


def load_case(case: str) -> RobotModel:
    if case.startswith('random'):
        return RobotModel.from_urdf(random_chain_urdf(int(case[len('random'):])))
    return load_demo(case)


@pytest.mark.parametrize('case', skew_cases())
def test_mass_derivative_minus_two_coriolis_is_skew(case: str) -> None:
    """N = dM/dt - 2C is skew-symmetric (Spong et al. 2006, ch. 7, a standard property);
    dM/dt = (M(q + e v) - M(q - e v)) / 2e, central differences, independent of our
    Christoffel code."""
    model = load_case(case)
    dynamics = Dynamics(model, backend='numpy')
    q_all, v_all = sample_states(model, 11, 3)
    step = 1e-5
    for q, v in zip(q_all, v_all):
        mass_dot = (dynamics.mass_matrix(q + step * v) - dynamics.mass_matrix(q - step * v)) \
            / (2 * step)
        skew = mass_dot - 2 * dynamics.coriolis_matrix(q, v)
        scale = float(np.max(np.abs(mass_dot)))
        assert scale > 0.0
        assert np.max(np.abs(skew + skew.T)) <= 1e-6 * scale
        # And C v is the velocity-quadratic torque of the recursion.
        assert relative_error(dynamics.coriolis_matrix(q, v) @ v, dynamics.coriolis_torque(q, v),
                              scale=scale * float(np.max(np.abs(v)))) <= 1e-9


# ---------------------------------------------------------------------- energy
def frictionless(name: str) -> RobotModel:
    model = load_demo(name)
    return load_demo(name, frictionless_limits(demo_limits_spec(name), model.joint_names))


@pytest.mark.parametrize('name, backend, duration', [
    ('planar2', 'numpy', 1.0),
    pytest.param('planar2', 'pinocchio', 2.0, marks=NEEDS_PINOCCHIO),
    pytest.param('bench6', 'pinocchio', 2.0, marks=NEEDS_PINOCCHIO),
])
def test_unforced_frictionless_motion_conserves_energy(name: str, backend: str,
                                                       duration: float) -> None:
    """Total energy 1/2 v^T M v + V(q) of the unforced frictionless arm is constant along a
    reference integration (scipy solve_ivp, DOP853, rtol 1e-10, atol 1e-12).

    V is independent of our code: the closed form for planar2, Pinocchio's
    computePotentialEnergy for bench6 (locked fingers included as rigid load).
    The numpy backend costs ~1-5 ms per call (DOP853 needs ~1200 calls for 1 s of planar2
    and ~16000 for 2 s of bench6), so bench6 runs on the Pinocchio backend only; the numpy
    recursion is checked against Pinocchio state by state elsewhere.
    """
    solve_ivp = pytest.importorskip('scipy.integrate').solve_ivp
    model = frictionless(name)
    assert not np.any(model.viscous_friction) and not np.any(model.coulomb_friction)
    dynamics = Dynamics(model, backend=backend)
    n = model.n_joints
    if name == 'planar2':
        params, g0 = planar2_parameters(), planar2_g0()

        def potential(q: np.ndarray) -> float:
            return planar2_potential(params, g0, q)
    else:
        reference = demo_reference(name)
        potential = reference.potential_energy
    q0, v0 = sample_states(model, 5, 1)
    q0, v0 = q0[0], 0.5 * v0[0]

    def rhs(_t: float, state: np.ndarray) -> np.ndarray:
        q, v = state[:n], state[n:]
        return np.concatenate([v, dynamics.forward_dynamics(q, v, np.zeros(n))])

    solution = solve_ivp(rhs, (0.0, duration), np.concatenate([q0, v0]), method='DOP853',
                         rtol=1e-10, atol=1e-12, dense_output=False,
                         t_eval=np.linspace(0.0, duration, 41))
    assert solution.success
    kinetic = np.array([dynamics.kinetic_energy(x[:n], x[n:]) for x in solution.y.T])
    potentials = np.array([potential(x[:n]) for x in solution.y.T])
    total = kinetic + potentials
    scale = max(float(np.max(kinetic)), float(np.ptp(potentials)))
    assert float(np.ptp(potentials)) > 0.1 * scale  # the arm really falls and swings
    assert float(np.max(np.abs(total - total[0]))) <= 1e-7 * scale


# ---------------------------------------------------------------------- Pinocchio
@pytest.mark.parametrize('backend', BACKENDS)
@pytest.mark.parametrize('name', ['planar2', 'bench6', 'reach7'])
def test_demo_arms_match_pinocchio(name: str, backend: str) -> None:
    model = load_demo(name)
    reference = demo_reference(name)
    assert np.array_equal(model.gravity, limits_gravity(demo_limits_spec(name)))
    compare_with_pinocchio(model, reference, backend, seed=1, count=4, label=name)


@pytest.mark.parametrize('backend', BACKENDS)
@pytest.mark.parametrize('seed', RANDOM_SEEDS)
def test_random_chains_match_pinocchio(seed: int, backend: str) -> None:
    urdf = random_chain_urdf(seed)
    model = RobotModel.from_urdf(urdf)
    assert model.n_joints == 1 + seed % 8
    assert np.array_equal(model.gravity, STANDARD_GRAVITY)
    reference = pinocchio_reference(urdf, gravity=STANDARD_GRAVITY)
    compare_with_pinocchio(model, reference, backend, seed=seed, count=2, label='random')


def test_random_chains_cover_prismatic_joints() -> None:
    """The random chains above do exercise prismatic joints (about a quarter of them)."""
    kinds = [k for seed in RANDOM_SEEDS
             for k in RobotModel.from_urdf(random_chain_urdf(seed)).joint_kinds]
    assert 0.1 < kinds.count('prismatic') / len(kinds) < 0.4


def test_continuous_joint_matches_pinocchio(pin_module: Any) -> None:
    """A URDF continuous joint (position limits from the limits file) is an ordinary
    revolute joint for the dynamics; Pinocchio represents it by (cos q, sin q)."""
    urdf = random_chain_urdf(20).replace('name="j2" type="revolute"',
                                         'name="j2" type="continuous"')
    assert 'type="continuous"' in urdf
    model = RobotModel.from_urdf(urdf, limits={'joints': {'j2': {'position': [-6.0, 6.0]}}})
    assert model.joint_kinds[2] == 'continuous'
    reference = pinocchio_reference(urdf, gravity=STANDARD_GRAVITY)
    assert reference.model.nq == model.n_joints + 1
    compare_with_pinocchio(model, reference, 'numpy', seed=2, count=3, label='continuous')


# ---------------------------------------------------------------------- payload
def tip_point_in_last_body(urdf: str, tip: str, point: np.ndarray) -> tuple[str, np.ndarray]:
    """Name of the last movable joint above ``tip`` and ``point`` (given in the tip frame)
    expressed in that joint's frame, by composing the fixed joints' origins (xml.etree)."""
    root = urdf_tree(urdf)
    joint_into = {j.find('child').get('link'): j for j in root.iter('joint')}
    link = tip
    while joint_into[link].get('type') == 'fixed':
        rotation, translation = origin_of(joint_into[link])
        point = rotation @ point + translation
        link = joint_into[link].find('parent').get('link')
    return joint_into[link].get('name'), point


@pytest.mark.parametrize('backend', BACKENDS)
@pytest.mark.parametrize('case', ['planar2', 'random4', 'random13', 'random22', 'random31'])
def test_payload_is_a_point_mass_on_the_tip(case: str, backend: str, pin_module: Any) -> None:
    """Dynamics(model, payload_mass=m) equals Pinocchio with a point-mass body of mass m
    appended to the last joint at the payload point (pin.Model.appendBodyToJoint)."""
    pin = pin_module
    point = np.array([0.03, -0.02, 0.05])
    mass = 0.7
    limits = {'payload': {'mass': [0.0, 1.0], 'point': point.tolist()}}
    if case == 'planar2':
        urdf = demo_urdf_path('planar2').read_text(encoding='utf-8')
        tip = 'tool'
        gravity = limits_gravity(demo_limits_spec('planar2'))
        limits.update(gravity=gravity.tolist(), chain={'tip_link': 'tool'})
    else:
        urdf = random_chain_urdf(int(case[len('random'):]))
        tip = 'tip'
        gravity = np.array(STANDARD_GRAVITY)
        limits.update(chain={'tip_link': 'tip'})
    model = RobotModel.from_urdf(urdf, limits=limits)
    reference = pinocchio_reference(urdf, gravity=gravity)
    joint_name, point_in_joint = tip_point_in_last_body(urdf, tip, point)
    joint_id = reference.model.getJointId(joint_name)
    assert joint_id == reference.model.njoints - 1
    point_mass = pin.Inertia(mass, point_in_joint, np.zeros((3, 3)))
    reference.model.appendBodyToJoint(joint_id, point_mass, pin.SE3.Identity())
    reference.data = reference.model.createData()
    compare_with_pinocchio(model, reference, backend, seed=3, count=3, label='payload',
                           payload_mass=mass)
    # The payload changes something (else the comparison above would prove little).
    q = sample_states(model, 3, 1)[0][0]
    assert not np.allclose(Dynamics(model, backend=backend).gravity_torque(q),
                           Dynamics(model, payload_mass=mass, backend=backend).gravity_torque(q))


def test_negative_payload_mass_is_rejected() -> None:
    model = load_demo('planar2')
    with pytest.raises(InvalidValue, match='payload'):
        Dynamics(model, payload_mass=-0.1)
    with pytest.raises(InvalidValue, match='payload'):
        mass_matrix_batch(model, np.zeros(2), payload_mass=-1.0)


# ---------------------------------------------------------------------- consistency
@pytest.mark.parametrize('backend', BACKENDS)
@pytest.mark.parametrize('case', ['planar2', 'bench6', 'random9', 'random23'])
def test_forward_dynamics_inverts_inverse_dynamics(case: str, backend: str) -> None:
    model = load_case(case)
    dynamics = Dynamics(model, payload_mass=0.3, backend=backend)
    rng = np.random.default_rng(4)
    q_all, v_all = sample_states(model, 4, 3)
    for q, v in zip(q_all, v_all):
        acceleration = rng.normal(scale=5.0, size=model.n_joints)
        torque = dynamics.inverse_dynamics(q, v, acceleration)
        assert np.allclose(dynamics.forward_dynamics(q, v, torque), acceleration,
                           rtol=1e-9, atol=1e-9)
        # and u = M a + h by definition
        mass, bias = dynamics.mass_and_bias(q, v)
        assert np.allclose(torque, mass @ acceleration + bias, rtol=1e-12, atol=1e-12)


@pytest.mark.parametrize('backend', ['numpy', 'pinocchio'])
def test_batched_functions_equal_per_state(backend: str) -> None:
    if backend == 'pinocchio':
        pytest.importorskip('pinocchio', reason='pip install pin')
    model = load_demo('reach7')
    dynamics = Dynamics(model, payload_mass=0.4, backend='numpy')
    rng = np.random.default_rng(8)
    q = rng.uniform(model.position_lower, model.position_upper, size=(2, 3, 7))
    v = rng.uniform(-1.0, 1.0, size=(2, 3, 7))
    a = rng.uniform(-1.0, 1.0, size=(2, 3, 7))
    masses = mass_matrix_batch(model, q, payload_mass=0.4, backend=backend)
    gravities = gravity_torque_batch(model, q, payload_mass=0.4, backend=backend)
    gammas = christoffel_batch(model, q, payload_mass=0.4, backend=backend)
    torques = rnea_batch(model, q, v, a, payload_mass=0.4, backend=backend)
    assert masses.shape == (2, 3, 7, 7) and gravities.shape == (2, 3, 7)
    assert gammas.shape == (2, 3, 7, 7, 7) and torques.shape == (2, 3, 7)
    for i in range(2):
        for j in range(3):
            qi, vi, ai = q[i, j], v[i, j], a[i, j]
            assert np.allclose(masses[i, j], dynamics.mass_matrix(qi), rtol=1e-12, atol=1e-13)
            assert np.allclose(gravities[i, j], dynamics.gravity_torque(qi), rtol=1e-12,
                               atol=1e-12)
            assert np.allclose(gammas[i, j], dynamics.christoffel(qi), rtol=1e-12, atol=1e-13)
            rigid = dynamics.mass_matrix(qi) @ ai + dynamics.coriolis_torque(qi, vi) \
                + dynamics.gravity_torque(qi)
            assert np.allclose(torques[i, j], rigid, rtol=1e-10, atol=1e-10)
    # Christoffel symbols are symmetric in the last two indices.
    assert np.allclose(gammas, np.swapaxes(gammas, -1, -2), rtol=0, atol=1e-13)


@pytest.mark.parametrize('backend', BACKENDS)
def test_friction_enters_the_bias_torque(backend: str) -> None:
    """h = C v + g + D v + f_c sign(v) (METHOD section 1), friction from the limits file."""
    urdf = random_chain_urdf(14)  # seven joints
    plain = RobotModel.from_urdf(urdf)
    viscous = np.linspace(0.1, 0.7, plain.n_joints)
    coulomb = np.linspace(1.5, 0.3, plain.n_joints)
    limits = {'joints': {name: {'viscous_friction': float(d), 'coulomb_friction': float(c)}
                         for name, d, c in zip(plain.joint_names, viscous, coulomb)}}
    model = RobotModel.from_urdf(urdf, limits=limits)
    assert np.array_equal(model.viscous_friction, viscous)
    assert np.array_equal(model.coulomb_friction, coulomb)
    with_friction = Dynamics(model, backend=backend)
    without = Dynamics(plain, backend=backend)
    q = sample_states(model, 6, 1)[0][0]
    v = np.array([0.4, -0.3, 0.0, 1.2, -2.0, 0.05, -0.01])
    expected = viscous * v + coulomb * np.sign(v)
    assert expected[2] == 0.0  # sign(0) = 0: no Coulomb torque at rest
    assert np.allclose(with_friction.friction_torque(v), expected, rtol=1e-15, atol=0)
    assert np.allclose(with_friction.bias_torque(q, v) - without.bias_torque(q, v), expected,
                       rtol=1e-12, atol=1e-12)
    # Friction is not part of the rigid-body terms.
    assert np.allclose(with_friction.coriolis_torque(q, v), without.coriolis_torque(q, v))
    assert np.allclose(with_friction.gravity_torque(q), without.gravity_torque(q))


def test_shape_errors_raise_value_error() -> None:
    model = load_demo('planar2')
    dynamics = Dynamics(model, backend='numpy')
    good, bad = np.zeros(2), np.zeros(3)
    calls = [
        lambda: dynamics.mass_matrix(bad),
        lambda: dynamics.mass_matrix(np.zeros((1, 2))),
        lambda: dynamics.gravity_torque(0.0),
        lambda: dynamics.coriolis_torque(good, bad),
        lambda: dynamics.bias_torque(bad, good),
        lambda: dynamics.mass_and_bias(good, bad),
        lambda: dynamics.friction_torque(bad),
        lambda: dynamics.inverse_dynamics(good, good, bad),
        lambda: dynamics.forward_dynamics(good, good, bad),
        lambda: dynamics.coriolis_matrix(good, bad),
        lambda: dynamics.christoffel(bad),
        lambda: dynamics.kinetic_energy(good, bad),
        lambda: mass_matrix_batch(model, np.zeros((5, 3))),
        lambda: gravity_torque_batch(model, 0.0),
        lambda: christoffel_batch(model, np.zeros((4, 1))),
        lambda: rnea_batch(model, np.zeros((4, 2)), np.zeros((4, 3))),
    ]
    for call in calls:
        with pytest.raises(ShapeMismatch):
            call()


def test_unknown_backend_is_rejected() -> None:
    with pytest.raises(InvalidValue, match='backend'):
        Dynamics(load_demo('planar2'), backend='casadi')


@pytest.mark.parametrize('damping_scale', [0.0, 0.05, 30.0])
def test_hold_mass_matrix_is_the_exact_zero_order_hold(damping_scale: float) -> None:
    """dynamics.hold_mass_matrix: a torque u held for T moves v by exactly T abar with
    u = M_hold abar + D v0 (M frozen, no other forces), checked against SciPy's matrix
    exponential of the augmented system [[-M^-1 D, I], [0, 0]] (the standard zero-order-hold
    discretisation, Van Loan's method); M_hold is symmetric and equals M without damping.
    Both the series branch (small ||M^-1 D T||) and the eigen branch are covered."""
    from scipy.linalg import expm

    from safety_filter.core.dynamics import hold_mass_matrix

    rng = np.random.default_rng(3)
    n, hold = 5, 0.002
    root = rng.normal(size=(n, n))
    mass = root @ root.T + 0.05 * np.eye(n)
    damping = damping_scale * rng.uniform(0.2, 1.0, n)
    held = hold_mass_matrix(mass, damping, hold)
    np.testing.assert_allclose(held, held.T, atol=1e-12)
    decay = np.linalg.solve(mass, np.diag(damping))
    augmented = np.zeros((2 * n, 2 * n))
    augmented[:n, :n] = -decay
    augmented[:n, n:] = np.eye(n)
    transition = expm(augmented * hold)
    for _ in range(3):
        u, v0 = rng.normal(size=n), rng.normal(size=n)
        v_end = transition[:n, :n] @ v0 + transition[:n, n:] @ np.linalg.solve(mass, u)
        mean = (v_end - v0) / hold
        np.testing.assert_allclose(held @ mean + damping * v0, u, rtol=1e-6, atol=1e-9)
    if damping_scale == 0.0:
        np.testing.assert_array_equal(held, mass)
    batch = hold_mass_matrix(np.stack([mass, 2.0 * mass]), damping, hold)
    np.testing.assert_allclose(batch[0], held, rtol=1e-12)


def test_the_kernels_friction_is_the_one_of_core_friction() -> None:
    """The filter's compiled kernel keeps an inline copy of the friction formula; it must
    give what :func:`safety_filter.core.friction.friction_torque` gives (and what the
    dynamics add to the bias)."""
    from safety_filter.core.friction import friction_torque
    from safety_filter.online import kernels

    rng = np.random.default_rng(3)
    model = load_demo('planar2')
    for v in (rng.normal(size=2), np.zeros(2), np.array([0.0, -0.3])):
        viscous, coulomb = rng.uniform(0.0, 2.0, 2), rng.uniform(0.0, 1.0, 2)
        friction, bias = np.zeros(2), np.ones(2)
        kernels.add_friction(v, viscous, coulomb, friction, bias)
        expected = friction_torque(v, viscous, coulomb)
        assert np.array_equal(friction, expected)
        assert np.array_equal(bias, 1.0 + expected)
    dynamics = Dynamics(model, backend='numpy')
    v = np.array([0.4, -0.2])
    assert np.array_equal(dynamics.friction_torque(v), friction_torque(
        v, np.array(model.viscous_friction), np.array(model.coulomb_friction)))
