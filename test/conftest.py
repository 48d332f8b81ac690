"""Shared fixtures of the model and dynamics tests.

* :func:`random_chain_urdf` writes the URDF text of a random serial chain (seeded), with
  physically valid inertials, so that the dynamics can be compared with an outside library
  on many geometries.
* :func:`pinocchio_reference` builds a Pinocchio model straight from the URDF, without any
  of our code: Pinocchio (package ``pin``) is the outside reference of METHOD section 6.
* :func:`demo_arm` and friends read the demo arms' files and parse their URDFs with
  ``xml.etree`` (again without our loader), for closed-form checks.
* ``demo_certificate_files``: the session's certificate file of each demo arm (default
  certification settings, certified once per session: ``certify_fixtures.py``).
"""

from __future__ import annotations

import math
import xml.etree.ElementTree as ET
from collections.abc import Mapping, Sequence
from pathlib import Path
from typing import TYPE_CHECKING, Any

import numpy as np
import pytest
import yaml

if TYPE_CHECKING:  # imported by the fixture itself: it loads the certification
    from certify_fixtures import DemoCertificateFiles

ROBOTS = Path(__file__).resolve().parent.parent / 'safety_filter' / 'robots'
TEST_URDF = Path(__file__).resolve().parent / 'urdf'
# ISO 80000-3 standard acceleration of free fall [m/s^2] (common-practice constant); the
# package's default gravity when a limits file does not set one.
STANDARD_GRAVITY = (0.0, 0.0, -9.80665)


# ---------------------------------------------------------------------- demo arm files
def demo_urdf_path(name: str) -> Path:
    """Path of a demo arm's URDF in the package tree."""
    return ROBOTS / f'{name}.urdf'


def demo_limits_path(name: str) -> Path:
    """Path of a demo arm's limits file; skips the test while it does not exist yet."""
    path = ROBOTS / f'{name}_limits.yaml'
    if not path.is_file():
        pytest.skip(f'{path.name} is not there yet')
    return path


def demo_limits_spec(name: str) -> dict[str, Any]:
    """The parsed limits file of a demo arm (plain ``yaml.safe_load``)."""
    return yaml.safe_load(demo_limits_path(name).read_text(encoding='utf-8')) or {}


def limits_gravity(spec: Mapping[str, Any]) -> np.ndarray:
    """Gravity declared by a limits file, or the standard one (base frame = URDF root)."""
    return np.array(spec.get('gravity', STANDARD_GRAVITY), dtype=float)


def parse_floats(text: str | None, default: Sequence[float]) -> np.ndarray:
    """Floats of a URDF attribute like ``xyz="0 0 1"`` (the default when absent)."""
    if text is None:
        return np.array(default, dtype=float)
    return np.array([float(x) for x in text.split()], dtype=float)


def urdf_tree(urdf: str | Path) -> ET.Element:
    """The ``<robot>`` element of a URDF file or text, parsed with ``xml.etree``."""
    if isinstance(urdf, Path):
        return ET.parse(urdf).getroot()
    return ET.fromstring(urdf)


def origin_of(element: ET.Element) -> tuple[np.ndarray, np.ndarray]:
    """``(rotation, translation)`` of the ``<origin>`` child of an element (URDF spec:
    rpy are fixed-axis roll, pitch, yaw, R = Rz(yaw) Ry(pitch) Rx(roll))."""
    origin = element.find('origin')
    xyz = parse_floats(None if origin is None else origin.get('xyz'), (0, 0, 0))
    rpy = parse_floats(None if origin is None else origin.get('rpy'), (0, 0, 0))
    return rpy_matrix(rpy), xyz


def rpy_matrix(rpy: Sequence[float]) -> np.ndarray:
    """URDF roll-pitch-yaw to a rotation matrix, composed from elementary rotations."""
    roll, pitch, yaw = rpy
    c, s = math.cos, math.sin
    rx = np.array([[1, 0, 0], [0, c(roll), -s(roll)], [0, s(roll), c(roll)]])
    ry = np.array([[c(pitch), 0, s(pitch)], [0, 1, 0], [-s(pitch), 0, c(pitch)]])
    rz = np.array([[c(yaw), -s(yaw), 0], [s(yaw), c(yaw), 0], [0, 0, 1]])
    return rz @ ry @ rx


# ---------------------------------------------------------------------- random chains
def random_rotation(rng: np.random.Generator) -> np.ndarray:
    """A uniformly random rotation matrix (QR of a Gaussian matrix, sign-fixed)."""
    q, r = np.linalg.qr(rng.normal(size=(3, 3)))
    q = q @ np.diag(np.sign(np.diag(r)))
    if np.linalg.det(q) < 0:
        q[:, 0] = -q[:, 0]
    return q


def random_inertial_xml(rng: np.random.Generator, indent: str = '    ') -> str:
    """An ``<inertial>`` of a random solid box: mass 0.1..5 kg, sides 0.02..0.3 m.

    Principal moments of a solid box about its centre, m/12 (b^2 + c^2) etc. (common
    textbook fact), rotated by a random rotation, then placed with a random origin rpy.
    """
    mass = rng.uniform(0.1, 5.0)
    a, b, c = rng.uniform(0.02, 0.3, size=3)
    principal = mass / 12.0 * np.array([b * b + c * c, a * a + c * c, a * a + b * b])
    rotation = random_rotation(rng)
    inertia = rotation @ np.diag(principal) @ rotation.T
    xyz = rng.uniform(-0.2, 0.2, size=3)
    rpy = rng.uniform(-math.pi, math.pi, size=3)
    return (
        f'{indent}<inertial>\n'
        f'{indent}  <origin xyz="{_floats(xyz)}" rpy="{_floats(rpy)}"/>\n'
        f'{indent}  <mass value="{float(mass)!r}"/>\n'
        f'{indent}  <inertia ixx="{float(inertia[0, 0])!r}" ixy="{float(inertia[0, 1])!r}" '
        f'ixz="{float(inertia[0, 2])!r}" iyy="{float(inertia[1, 1])!r}" '
        f'iyz="{float(inertia[1, 2])!r}" izz="{float(inertia[2, 2])!r}"/>\n'
        f'{indent}</inertial>\n'
    )


def _floats(values: Sequence[float]) -> str:
    return ' '.join(repr(float(x)) for x in values)


def _random_origin_xml(rng: np.random.Generator) -> str:
    xyz = rng.uniform(-0.3, 0.3, size=3)
    rpy = rng.uniform(-math.pi, math.pi, size=3)
    return f'<origin xyz="{_floats(xyz)}" rpy="{_floats(rpy)}"/>'


def random_chain_urdf(seed: int, n_joints: int | None = None,
                      prismatic_fraction: float = 0.25) -> str:
    """URDF text of a random serial chain of revolute and prismatic joints.

    Args:
        seed: seed of the generator (the chain is a pure function of it).
        n_joints: number of movable joints; default ``1 + seed % 8`` (so 8 consecutive
            seeds cover 1..8 joints).
        prismatic_fraction: probability that a movable joint is prismatic.

    Every movable joint has a random unit axis, a random origin (xyz and rpy) and a child
    link with a random solid-box inertial. After some links a fixed joint carries an extra
    rigid body (with or without mass) that must be merged into the moving body. The chain
    ends with a massless ``tip`` frame on a fixed joint. Joint names are ``j0, j1, ...``.
    """
    rng = np.random.default_rng(seed)
    n = 1 + seed % 8 if n_joints is None else n_joints
    parts = ['<?xml version="1.0"?>', f'<robot name="chain{seed}">',
             '  <link name="root">', random_inertial_xml(rng).rstrip('\n'), '  </link>']
    parent = 'root'
    for i in range(n):
        kind = 'prismatic' if rng.random() < prismatic_fraction else 'revolute'
        axis = rng.normal(size=3)
        axis /= np.linalg.norm(axis)
        if kind == 'prismatic':
            limit = '<limit lower="-0.5" upper="0.5" velocity="1.0" effort="100.0"/>'
        else:
            limit = '<limit lower="-3.0" upper="3.0" velocity="2.0" effort="50.0"/>'
        link = f'l{i}'
        parts += [
            f'  <joint name="j{i}" type="{kind}">',
            f'    <parent link="{parent}"/>', f'    <child link="{link}"/>',
            f'    {_random_origin_xml(rng)}', f'    <axis xyz="{_floats(axis)}"/>',
            f'    {limit}', '  </joint>',
            f'  <link name="{link}">', random_inertial_xml(rng).rstrip('\n'), '  </link>',
        ]
        parent = link
        if rng.random() < 0.3:  # a rigidly attached extra body (massless one time in three)
            extra = f'l{i}_extra'
            inertial = random_inertial_xml(rng).rstrip('\n') if rng.random() < 0.67 else ''
            parts += [
                f'  <joint name="j{i}_fixed" type="fixed">', f'    <parent link="{link}"/>',
                f'    <child link="{extra}"/>', f'    {_random_origin_xml(rng)}', '  </joint>',
                f'  <link name="{extra}">', *([inertial] if inertial else []), '  </link>',
            ]
            parent = extra if rng.random() < 0.5 else link
    parts += [
        '  <joint name="tip_mount" type="fixed">', f'    <parent link="{parent}"/>',
        '    <child link="tip"/>', f'    {_random_origin_xml(rng)}', '  </joint>',
        '  <link name="tip"/>', '</robot>',
    ]
    return '\n'.join(parts) + '\n'


def frictionless_limits(spec: Mapping[str, Any] | None, joint_names: Sequence[str]
                        ) -> dict[str, Any]:
    """A copy of a limits mapping with zero viscous and Coulomb friction on every joint."""
    spec = dict(spec or {})
    joints = {name: dict(entry) for name, entry in (spec.get('joints') or {}).items()}
    for name in joint_names:
        entry = joints.setdefault(name, {})
        entry['viscous_friction'] = 0.0
        entry['coulomb_friction'] = 0.0
    spec['joints'] = joints
    return spec


# ---------------------------------------------------------------------- Pinocchio reference
class PinocchioReference:
    """A Pinocchio model built from the URDF alone, with accessors in a given joint order.

    Attributes:
        model, data: the Pinocchio model (reduced if joints were locked) and its data.
        joint_names: names of its joints (universe excluded), in Pinocchio's order.
    """

    def __init__(self, model: Any) -> None:
        import pinocchio as pin

        self.pin = pin
        self.model = model
        self.data = model.createData()
        self.joint_names = tuple(model.names[1:])
        self._idx_q = [model.joints[j].idx_q for j in range(1, model.njoints)]
        self._nq = [model.joints[j].nq for j in range(1, model.njoints)]
        self.nv = model.nv

    def configuration(self, q: np.ndarray) -> np.ndarray:
        """Pinocchio's configuration vector for joint positions ``q`` (one per joint):
        unbounded revolute (URDF continuous) joints take (cos q, sin q)."""
        config = np.zeros(self.model.nq)
        for k, (start, nq) in enumerate(zip(self._idx_q, self._nq)):
            if nq == 1:
                config[start] = q[k]
            else:
                config[start:start + 2] = math.cos(q[k]), math.sin(q[k])
        return config

    def mass_matrix(self, q: np.ndarray) -> np.ndarray:
        mass = self.pin.crba(self.model, self.data, self.configuration(q))
        return np.triu(mass) + np.triu(mass, 1).T

    def gravity(self, q: np.ndarray) -> np.ndarray:
        return np.array(self.pin.computeGeneralizedGravity(
            self.model, self.data, self.configuration(q)))

    def coriolis_torque(self, q: np.ndarray, v: np.ndarray) -> np.ndarray:
        """``C v = nonLinearEffects - g``."""
        config = self.configuration(q)
        nle = np.array(self.pin.nonLinearEffects(self.model, self.data, config, v))
        return nle - self.gravity(q)

    def coriolis_matrix(self, q: np.ndarray, v: np.ndarray) -> np.ndarray:
        return np.array(self.pin.computeCoriolisMatrix(
            self.model, self.data, self.configuration(q), v))

    def potential_energy(self, q: np.ndarray) -> float:
        return float(self.pin.computePotentialEnergy(
            self.model, self.data, self.configuration(q)))

    def kinetic_energy(self, q: np.ndarray, v: np.ndarray) -> float:
        return float(self.pin.computeKineticEnergy(
            self.model, self.data, self.configuration(q), v))


def pinocchio_reference(
    urdf: str | Path,
    locked: Mapping[str, float] | None = None,
    gravity: Sequence[float] = STANDARD_GRAVITY,
) -> PinocchioReference:
    """Pinocchio model of a URDF (path or text), built without any code of ours.

    Args:
        urdf: URDF file path or text.
        locked: joints to remove at a fixed position (``pin.buildReducedModel``); mimic
            joints are loaded as ordinary joints, so lock both leader and follower.
        gravity: gravity in the URDF root frame [m/s^2].
    """
    pin = pytest.importorskip('pinocchio', reason='Pinocchio reference missing: pip install pin')
    if isinstance(urdf, Path):
        model = pin.buildModelFromUrdf(str(urdf))
    else:
        model = pin.buildModelFromXML(urdf)
    if locked:
        reference_q = pin.neutral(model)
        ids = []
        for name, position in locked.items():
            joint_id = model.getJointId(name)
            if joint_id >= model.njoints:
                raise KeyError(f'no joint {name!r} in the Pinocchio model')
            reference_q[model.joints[joint_id].idx_q] = position
            ids.append(joint_id)
        model = pin.buildReducedModel(model, sorted(ids), reference_q)
    model.gravity.linear = np.array(gravity, dtype=float)
    return PinocchioReference(model)


# ---------------------------------------------------------------------- comparisons
def relative_error(actual: np.ndarray, reference: np.ndarray, scale: float = 0.0) -> float:
    """``max|actual - reference| / max(max|reference|, scale)``.

    ``scale`` is the natural size of the quantity (e.g. ``max|M| max|v|^2`` for ``C v``), so
    that a reference that vanishes (a single joint has no Coriolis torque) is not compared
    relative to zero.
    """
    actual = np.asarray(actual, dtype=float)
    reference = np.asarray(reference, dtype=float)
    assert actual.shape == reference.shape, (actual.shape, reference.shape)
    denominator = max(float(np.max(np.abs(reference), initial=0.0)), scale, 1e-300)
    return float(np.max(np.abs(actual - reference), initial=0.0)) / denominator


def random_states(rng: np.random.Generator, lower: np.ndarray, upper: np.ndarray,
                  speed: np.ndarray, count: int) -> tuple[np.ndarray, np.ndarray]:
    """``count`` random positions inside [lower, upper] and velocities in [-speed, speed]."""
    q = rng.uniform(lower, upper, size=(count, len(lower)))
    v = rng.uniform(-speed, speed, size=(count, len(lower)))
    return q, v


@pytest.fixture(scope='session')
def demo_certificate_files(tmp_path_factory: pytest.TempPathFactory) -> DemoCertificateFiles:
    """The demo arms' certificates as files in a session folder, ``.path('planar2')``
    (``certify_fixtures.DemoCertificateFiles``; each arm certified once per session)."""
    from certify_fixtures import DemoCertificateFiles

    return DemoCertificateFiles(tmp_path_factory.mktemp('demo_certificates'))


@pytest.fixture(scope='session')
def pin_module() -> Any:
    """The ``pinocchio`` module, or skip with an install hint."""
    return pytest.importorskip('pinocchio', reason='Pinocchio reference missing: pip install pin')


# Worst relative error against Pinocchio seen in this session, per quantity (printed in the
# terminal summary so that a run shows the margin to the 1e-9 tolerance).
WORST_VS_PINOCCHIO: dict[str, float] = {}


def assert_matches_pinocchio(what: str, actual: np.ndarray, reference: np.ndarray,
                             scale: float = 0.0, rtol: float = 1e-9) -> None:
    """Assert ``relative_error(actual, reference, scale) <= rtol`` and record the error."""
    error = relative_error(actual, reference, scale)
    WORST_VS_PINOCCHIO[what] = max(WORST_VS_PINOCCHIO.get(what, 0.0), error)
    assert error <= rtol, f'{what}: relative error {error:.3e} > {rtol:g}'


def pytest_terminal_summary(terminalreporter: Any) -> None:
    if WORST_VS_PINOCCHIO:
        terminalreporter.write_sep('-', 'worst relative error vs Pinocchio')
        for what, error in sorted(WORST_VS_PINOCCHIO.items()):
            terminalreporter.write_line(f'{what:<40} {error:.2e}')
