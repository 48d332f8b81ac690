"""Tests of the robot model loader: every validation with a bad input, and the good paths.

Fixtures: ``test/urdf/gripper3.urdf`` (a three-joint arm with a fixed tool frame and two
independent gripper fingers, written for these tests), mutated inline per case, and the
demo arms. Expected values are read from the URDF files with ``xml.etree`` and from the
limits files with ``yaml.safe_load``, not through the loader under test.
"""

from __future__ import annotations

import math
from pathlib import Path
from typing import Any

import numpy as np
import pytest
import yaml
from conftest import (
    STANDARD_GRAVITY,
    TEST_URDF,
    demo_limits_path,
    demo_limits_spec,
    demo_urdf_path,
    origin_of,
    pinocchio_reference,
    relative_error,
    rpy_matrix,
    urdf_tree,
)

from safety_filter.core.dynamics import Dynamics
from safety_filter.core.robot_model import RobotModel
from safety_filter.errors import (
    InvalidInertia,
    InvalidLimits,
    InvalidValue,
    RobotDescriptionError,
    SafetyFilterError,
    UnknownJoint,
    UnknownLink,
    UnsupportedChain,
)

GRIPPER3 = TEST_URDF / 'gripper3.urdf'
GRIPPER3_TEXT = GRIPPER3.read_text(encoding='utf-8')
ARM_ONLY = {'tip_link': 'tool'}  # the serial arm yaw, pitch, slide; fingers locked at 0

PITCH_LIMIT = '<limit lower="-1.5" upper="1.5" velocity="2" effort="40"/>'
ARM_INERTIA = '<inertia ixx="0.0009" ixy="0" ixz="0" iyy="0.02045" iyz="0" izz="0.02045"/>'
RIGHT_FINGER_END = ('<limit lower="0" upper="0.03" velocity="0.1" effort="10"/>\n  </joint>\n'
                    '  <link name="finger_right_link">')


def mutated(old: str, new: str, text: str = GRIPPER3_TEXT) -> str:
    """The fixture text with one exact substring replaced (which must occur once)."""
    assert text.count(old) == 1, old
    return text.replace(old, new)


def with_right_finger_mimic(target: str) -> str:
    """gripper3 whose right finger mimics ``target``."""
    return mutated(RIGHT_FINGER_END, RIGHT_FINGER_END.replace(
        '</joint>', f'<mimic joint="{target}" multiplier="1" offset="0"/>\n  </joint>'))


def write(tmp_path: Path, name: str, text: str) -> Path:
    path = tmp_path / name
    path.write_text(text, encoding='utf-8')
    return path


# ---------------------------------------------------------------------- bad URDFs
# (id, URDF text, keyword arguments of from_urdf, exception type, fragments of its message)
BAD_URDFS = [
    ('malformed-xml', GRIPPER3_TEXT.replace('</robot>', ''), ARM_ONLY,
     RobotDescriptionError, ['does not parse']),
    ('not-xml-at-all', '<robot name="x"><link name="a"></robot>', {},
     RobotDescriptionError, ['does not parse']),
    ('no-links', '<robot name="empty"/>', {}, RobotDescriptionError, ['no links']),
    ('two-roots', mutated('<link name="tool"/>', '<link name="tool"/><link name="orphan"/>'),
     ARM_ONLY, RobotDescriptionError, ['root', 'orphan']),
    ('joint-parent-unknown', mutated('<parent link="arm"/>', '<parent link="arm_x"/>'),
     ARM_ONLY, UnknownLink, ['arm_x']),
    ('limit-without-velocity', mutated(PITCH_LIMIT, PITCH_LIMIT.replace('velocity="2" ', '')),
     ARM_ONLY, RobotDescriptionError, ['velocity']),
    ('limit-without-effort', mutated(PITCH_LIMIT, PITCH_LIMIT.replace('effort="40"', '')),
     ARM_ONLY, RobotDescriptionError, ['effort']),
    ('revolute-without-limit', mutated(PITCH_LIMIT, ''), ARM_ONLY,
     InvalidLimits, ["'pitch'", 'position limits']),
    ('revolute-lower-equals-upper', mutated(PITCH_LIMIT, PITCH_LIMIT.replace('-1.5', '1.5')),
     ARM_ONLY, InvalidLimits, ["'pitch'", 'not below']),
    ('revolute-lower-above-upper', mutated(PITCH_LIMIT, PITCH_LIMIT.replace('-1.5', '1.6')),
     ARM_ONLY, InvalidLimits, ["'pitch'", 'not below']),
    ('zero-velocity', mutated(PITCH_LIMIT, PITCH_LIMIT.replace('velocity="2"', 'velocity="0"')),
     ARM_ONLY, InvalidLimits, ["'pitch'", 'velocity']),
    ('negative-velocity',
     mutated(PITCH_LIMIT, PITCH_LIMIT.replace('velocity="2"', 'velocity="-2"')),
     ARM_ONLY, InvalidLimits, ["'pitch'", 'velocity']),
    ('zero-effort', mutated(PITCH_LIMIT, PITCH_LIMIT.replace('effort="40"', 'effort="0"')),
     ARM_ONLY, InvalidLimits, ["'pitch'", 'effort']),
    ('negative-effort', mutated(PITCH_LIMIT, PITCH_LIMIT.replace('effort="40"', 'effort="-1"')),
     ARM_ONLY, InvalidLimits, ["'pitch'", 'effort']),
    ('negative-damping', mutated('damping="0.2"', 'damping="-0.2"'), ARM_ONLY,
     InvalidLimits, ["'yaw'", 'viscous']),
    ('negative-friction', mutated('friction="0.1"', 'friction="-0.1"'), ARM_ONLY,
     InvalidLimits, ["'yaw'", 'Coulomb']),
    ('zero-axis', mutated('<axis xyz="0 1 0"/>\n    ' + PITCH_LIMIT,
                          '<axis xyz="0 0 0"/>\n    ' + PITCH_LIMIT),
     ARM_ONLY, RobotDescriptionError, ["'pitch'", 'axis']),
    ('inertial-without-mass', mutated('<mass value="1.5"/>', ''), ARM_ONLY,
     RobotDescriptionError, ['mass']),
    ('inertial-without-inertia', mutated(ARM_INERTIA, ''), ARM_ONLY,
     InvalidInertia, ["'arm'", 'inertia']),
    # Mass 0 with the arm's non-zero inertia: a massless link must have a zero inertia.
    ('zero-mass-with-inertia', mutated('<mass value="1.5"/>', '<mass value="0"/>'), ARM_ONLY,
     InvalidInertia, ["'arm'", 'mass is 0', 'not zero']),
    ('negative-mass', mutated('<mass value="1.5"/>', '<mass value="-1.5"/>'), ARM_ONLY,
     InvalidInertia, ["'arm'", 'mass']),
    ('nan-mass', mutated('<mass value="1.5"/>', '<mass value="nan"/>'), ARM_ONLY,
     InvalidInertia, ["'arm'", 'mass']),
    ('nan-inertia', mutated(ARM_INERTIA, ARM_INERTIA.replace('iyy="0.02045"', 'iyy="nan"')),
     ARM_ONLY, InvalidInertia, ["'arm'", 'non-finite']),
    ('inertia-negative-moment',
     mutated(ARM_INERTIA, ARM_INERTIA.replace('ixx="0.0009"', 'ixx="-0.0009"')),
     ARM_ONLY, InvalidInertia, ["'arm'", 'positive semidefinite']),
    # Positive diagonal but indefinite: principal moments of [[1, 2], [2, 1]] are -1, 3.
    ('inertia-indefinite', mutated(ARM_INERTIA, '<inertia ixx="1" ixy="2" ixz="0" iyy="1" '
                                                'iyz="0" izz="1"/>'),
     ARM_ONLY, InvalidInertia, ["'arm'", 'positive semidefinite']),
    # Principal moments 0.1, 0.1, 1: 0.1 + 0.1 < 1 breaks I1 + I2 >= I3 (a real body has
    # non-negative second moments along each axis -- a standard fact of rigid bodies).
    ('inertia-triangle-inequality',
     mutated(ARM_INERTIA, '<inertia ixx="0.1" ixy="0" ixz="0" iyy="0.1" iyz="0" izz="1"/>'),
     ARM_ONLY, InvalidInertia, ["'arm'", 'triangle']),
]


@pytest.mark.parametrize('text, kwargs, error, fragments',
                         [pytest.param(*case[1:], id=case[0]) for case in BAD_URDFS])
def test_bad_urdf_is_rejected(text: str, kwargs: dict[str, Any], error: type,
                              fragments: list[str]) -> None:
    with pytest.raises(error) as info:
        RobotModel.from_urdf(text, **kwargs)
    for fragment in fragments:
        assert fragment in str(info.value)
    assert isinstance(info.value, SafetyFilterError)


def test_triangle_inequality_accepts_the_equality_case() -> None:
    """A thin plate has principal moments a, b, a + b (perpendicular-axis theorem, a common
    textbook fact): the equality case of I1 + I2 >= I3 is physical and must be accepted."""
    plate = '<inertia ixx="0.01" ixy="0" ixz="0" iyy="0.03" iyz="0" izz="0.04"/>'
    model = RobotModel.from_urdf(mutated(ARM_INERTIA, plate), **ARM_ONLY)
    assert model.body_inertia[1][2, 2] == pytest.approx(0.04)


def test_missing_urdf_file(tmp_path: Path) -> None:
    for missing in (tmp_path / 'nope.urdf', str(tmp_path / 'nope.urdf')):
        with pytest.raises(RobotDescriptionError, match='not found'):
            RobotModel.from_urdf(missing)


def test_unknown_joint_names_the_joint() -> None:
    with pytest.raises(UnknownJoint) as info:
        RobotModel.from_urdf(GRIPPER3, joints=['yaw', 'elbow_x'])
    assert info.value.joint == 'elbow_x'
    assert 'elbow_x' in str(info.value) and 'pitch' in info.value.known
    with pytest.raises(UnknownJoint, match='finger_x'):
        RobotModel.from_urdf(GRIPPER3, tip_link='tool', locked_positions={'finger_x': 0.0})
    with pytest.raises(UnknownJoint, match='finger_y'):
        RobotModel.from_urdf(GRIPPER3, limits={'locked_joints': {'finger_y': 0.0}},
                             tip_link='tool')


@pytest.mark.parametrize('kwargs', [{'tip_link': 'hand'}, {'base_link': 'hand'},
                                    {'base_link': 'hand', 'tip_link': 'tool'}])
def test_unknown_link_names_the_link(kwargs: dict[str, str]) -> None:
    with pytest.raises(UnknownLink) as info:
        RobotModel.from_urdf(GRIPPER3, **kwargs)
    assert info.value.link == 'hand' and 'hand' in str(info.value)


# ---------------------------------------------------------------------- massless frames
# Real URDFs carry massless frame links (world, base, flange, tool frames: mass 0 and zero
# inertia, or no <inertial> at all) and mesh paths in package:// form. The URDFs below are
# written inline for these tests.
MASSLESS = ('<inertial><origin xyz="0 0 0"/><mass value="0"/>'
            '<inertia ixx="0" ixy="0" ixz="0" iyy="0" iyz="0" izz="0"/></inertial>')
UPPER = ('<inertial><origin xyz="0 0 0.15"/><mass value="2"/>'
         '<inertia ixx="0.016" ixy="0" ixz="0" iyy="0.016" iyz="0" izz="0.002"/></inertial>')
FORE = ('<inertial><origin xyz="0.2 0 0"/><mass value="1.2"/>'
        '<inertia ixx="0.0006" ixy="0" ixz="0" iyy="0.0162" iyz="0" izz="0.0162"/></inertial>')


def mesh(name: str) -> str:
    """<visual> and <collision> with package:// meshes of a package that does not exist."""
    return (f'<visual><geometry><mesh filename="package://no_such_pkg/meshes/{name}.dae"/>'
            '</geometry></visual><collision><geometry><mesh '
            f'filename="package://no_such_pkg/meshes/{name}.stl" scale="0.001 0.001 0.001"/>'
            '</geometry></collision>')


def framed(base: str = MASSLESS, upper: str = UPPER, fore: str = FORE,
           flange: str = MASSLESS, elbow_axis: str = '0 1 0', meshes: bool = True) -> str:
    """A two-joint arm between a fixed world -> base_link frame chain and a fixed
    fore -> flange -> tool0 frame chain; the arguments are the links' <inertial> text."""
    def visual(name: str) -> str:
        return mesh(name) if meshes else ''
    return f"""<?xml version="1.0"?>
<robot name="framed">
  <link name="world"/>
  <joint name="world_to_base" type="fixed">
    <parent link="world"/><child link="base_link"/><origin xyz="0 0 0.5"/>
  </joint>
  <link name="base_link">{base}{visual('base')}</link>
  <joint name="shoulder" type="revolute">
    <parent link="base_link"/><child link="upper"/><origin xyz="0 0 0.1"/>
    <axis xyz="0 0 1"/><limit lower="-2.5" upper="2.5" velocity="2" effort="50"/>
  </joint>
  <link name="upper">{upper}{visual('upper')}</link>
  <joint name="elbow" type="revolute">
    <parent link="upper"/><child link="fore"/><origin xyz="0 0 0.3"/>
    <axis xyz="{elbow_axis}"/><limit lower="-2" upper="2" velocity="2" effort="30"/>
  </joint>
  <link name="fore">{fore}{visual('fore')}</link>
  <joint name="fore_to_flange" type="fixed">
    <parent link="fore"/><child link="flange"/><origin xyz="0.4 0 0" rpy="0 1.5707963 0"/>
  </joint>
  <link name="flange">{flange}{visual('flange')}</link>
  <joint name="flange_to_tool" type="fixed">
    <parent link="flange"/><child link="tool0"/><origin xyz="0 0 0.05"/>
  </joint>
  <link name="tool0"/>
</robot>
"""


def assert_mass_matrix_matches_pinocchio(model: RobotModel, text: str,
                                         rng: np.random.Generator) -> None:
    """M(q) and g(q) of the package equal Pinocchio's CRBA and RNEA (pin.crba via
    conftest.pinocchio_reference, built with pin.buildModelFromXML on the same URDF)."""
    reference = pinocchio_reference(text)
    assert reference.joint_names == model.joint_names
    dynamics = Dynamics(model, backend='numpy')
    for q in rng.uniform(model.position_lower, model.position_upper, (5, model.n_joints)):
        mass_matrix = dynamics.mass_matrix(q)
        assert relative_error(mass_matrix, reference.mass_matrix(q)) < 1e-9
        assert relative_error(dynamics.gravity_torque(q), reference.gravity(q),
                              scale=1.0) < 1e-9
        assert np.linalg.eigvalsh(mass_matrix)[0] > 0.0


def test_massless_frame_chain_loads_and_matches_pinocchio() -> None:
    """world -> base_link (massless) -> two real links -> flange (massless) -> tool0 (no
    <inertial>), with package:// meshes: the chain is the two joints, the frames add no
    mass, and the mass matrix equals Pinocchio's CRBA on the same URDF text."""
    text = framed()
    model = RobotModel.from_urdf(text, tip_link='tool0')
    assert model.joint_names == ('shoulder', 'elbow')
    assert (model.base_link, model.tip_link) == ('world', 'tool0')
    masses = {link.get('name'): float(link.find('inertial/mass').get('value'))
              for link in urdf_tree(text).iter('link') if link.find('inertial') is not None}
    assert masses['base_link'] == masses['flange'] == 0.0
    assert list(model.body_mass) == [masses['upper'], masses['fore']]
    assert_mass_matrix_matches_pinocchio(model, text, np.random.default_rng(3))


def test_links_without_inertial_equal_massless_links() -> None:
    """A frame link without <inertial> and one with mass 0 and zero inertia load to the
    same model (same content hash)."""
    massless = RobotModel.from_urdf(framed())
    bare = RobotModel.from_urdf(framed(base='', flange=''))
    assert bare.content_hash() == massless.content_hash()


def test_package_mesh_paths_are_ignored() -> None:
    """Meshes of a package that is not installed are neither resolved nor needed."""
    with_meshes = RobotModel.from_urdf(framed(meshes=True))
    without = RobotModel.from_urdf(framed(meshes=False))
    assert with_meshes.content_hash() == without.content_hash()


def test_point_masses_match_the_double_pendulum() -> None:
    """Links with mass and zero inertia (point masses at the link ends) are valid. Their
    mass matrix is the double pendulum's (Spong, Hutchinson, Vidyasagar, *Robot Modeling
    and Control*, 2006, planar elbow arm of ch. 7 with I1 = I2 = 0, lc_i = l_i):
    M11 = (m1 + m2) l1^2 + m2 l2^2 + 2 m2 l1 l2 cos q2, M12 = m2 l2^2 + m2 l1 l2 cos q2,
    M22 = m2 l2^2."""
    m1, m2, l1, l2 = 1.5, 0.7, 0.4, 0.3
    point = ('<inertial><origin xyz="{l} 0 0"/><mass value="{m}"/>'
             '<inertia ixx="0" ixy="0" ixz="0" iyy="0" iyz="0" izz="0"/></inertial>')
    limit = '<limit lower="-3" upper="3" velocity="2" effort="20"/>'
    text = f"""<robot name="points">
  <link name="base"/>
  <joint name="j1" type="revolute"><parent link="base"/><child link="l1"/>
    <axis xyz="0 0 1"/>{limit}</joint>
  <link name="l1">{point.format(l=l1, m=m1)}</link>
  <joint name="j2" type="revolute"><parent link="l1"/><child link="l2"/>
    <origin xyz="{l1} 0 0"/><axis xyz="0 0 1"/>{limit}</joint>
  <link name="l2">{point.format(l=l2, m=m2)}</link>
</robot>"""
    model = RobotModel.from_urdf(text)
    assert np.max(np.abs(model.body_inertia)) < 1e-15  # zero up to rounding
    dynamics = Dynamics(model, backend='numpy')
    for q2 in (-2.0, 0.0, 0.9):
        c2 = math.cos(q2)
        off_diagonal = m2 * l2**2 + m2 * l1 * l2 * c2
        expected = np.array([
            [(m1 + m2) * l1**2 + m2 * l2**2 + 2 * m2 * l1 * l2 * c2, off_diagonal],
            [off_diagonal, m2 * l2**2]])
        assert relative_error(dynamics.mass_matrix(np.array([0.3, q2])), expected) < 1e-12
    assert_mass_matrix_matches_pinocchio(model, text, np.random.default_rng(4))


def gimbal_urdf(kind: str, second_axis: str, second_xyz: str = '0 0 0') -> str:
    """Two joints of ``kind`` with a massless link between them; the second moves a box."""
    limit = '<limit lower="-1" upper="1" velocity="1" effort="40"/>'
    return f"""<robot name="gimbal">
  <link name="base"/>
  <joint name="first" type="{kind}"><parent link="base"/><child link="between"/>
    <origin xyz="0 0 0.2"/><axis xyz="1 0 0"/>{limit}</joint>
  <link name="between">{MASSLESS}</link>
  <joint name="second" type="{kind}"><parent link="between"/><child link="body"/>
    <origin xyz="{second_xyz}"/><axis xyz="{second_axis}"/>{limit}</joint>
  <link name="body">{FORE}</link>
</robot>"""


@pytest.mark.parametrize('kind', ['revolute', 'prismatic'])
def test_massless_link_between_independent_joints_is_accepted(kind: str) -> None:
    """A massless link between two joints with independent motions (a gimbal, a gantry)
    is valid: the outer body's inertia sees both joints. Checked against Pinocchio's CRBA,
    and the mass matrix is positive definite."""
    text = gimbal_urdf(kind, '0 1 0')
    model = RobotModel.from_urdf(text)
    assert list(model.body_mass) == [0.0, 1.2]
    assert_mass_matrix_matches_pinocchio(model, text, np.random.default_rng(5))


# (id, URDF text, the link and the joint the error must name)
POINT_ON_AXIS = ('<inertial><origin xyz="0 0.1 0"/><mass value="1"/>'
                 '<inertia ixx="0" ixy="0" ixz="0" iyy="0" iyz="0" izz="0"/></inertial>')
JOINTS_MOVING_NOTHING = [
    ('tip-link-massless', framed(fore=MASSLESS), 'fore', 'elbow'),
    ('tip-link-without-inertial', framed(fore=''), 'fore', 'elbow'),
    # The outer body has inertia about the shoulder axis, but with the massless upper link
    # between two coaxial joints, qd = (1, -1) moves nothing: M is singular.
    ('coaxial-joints-massless-between', framed(upper=MASSLESS, elbow_axis='0 0 1'),
     'upper', 'shoulder'),
    # A point mass on the elbow axis has mass but no inertia about that axis.
    ('point-mass-on-the-axis', framed(fore=POINT_ON_AXIS), 'fore', 'elbow'),
    ('parallel-slides-massless-between', gimbal_urdf('prismatic', '1 0 0'),
     'between', 'first'),
    ('coaxial-revolutes-massless-between', gimbal_urdf('revolute', '1 0 0', '0.3 0 0'),
     'between', 'first'),
]


@pytest.mark.parametrize('text, link, joint',
                         [pytest.param(*case[1:], id=case[0]) for case in JOINTS_MOVING_NOTHING])
def test_joint_moving_nothing_is_refused(text: str, link: str, joint: str) -> None:
    with pytest.raises(InvalidInertia) as info:
        RobotModel.from_urdf(text)
    assert info.value.link == link
    assert f'{link!r}' in str(info.value) and f'joint {joint!r}' in str(info.value)
    assert 'singular' in str(info.value)


def inertial(mass: str, inertia: str = 'ixx="0" ixy="0" ixz="0" iyy="0" iyz="0" izz="0"'
             ) -> str:
    return f'<inertial><mass value="{mass}"/><inertia {inertia}/></inertial>'


# Inconsistent inertials on the frame links are still errors that name the link, whether
# the link moves (flange) or is fixed to the world (base_link).
BAD_FRAME_INERTIALS = [
    ('negative-mass', {'flange': inertial('-0.1')}, 'flange', 'mass'),
    ('nan-mass', {'base': inertial('nan')}, 'base_link', 'mass'),
    ('nan-inertia', {'flange': inertial('0.1', 'ixx="nan" ixy="0" ixz="0" iyy="0" iyz="0" '
                                        'izz="0"')}, 'flange', 'non-finite'),
    ('massless-with-inertia', {'flange': inertial('0', 'ixx="1e-6" ixy="0" ixz="0" '
                                                  'iyy="1e-6" iyz="0" izz="1e-6"')},
     'flange', 'not zero'),
    ('not-psd', {'base': inertial('1', 'ixx="0.01" ixy="0" ixz="0" iyy="0.01" iyz="0" '
                                  'izz="-0.001"')}, 'base_link', 'positive semidefinite'),
    ('triangle-inequality', {'flange': inertial('0.5', 'ixx="0.001" ixy="0" ixz="0" '
                                                'iyy="0.001" iyz="0" izz="0.01"')},
     'flange', 'triangle'),
]


@pytest.mark.parametrize('parts, link, fragment',
                         [pytest.param(*case[1:], id=case[0]) for case in BAD_FRAME_INERTIALS])
def test_inconsistent_frame_inertial_is_refused(parts: dict[str, str], link: str,
                                                fragment: str) -> None:
    with pytest.raises(InvalidInertia) as info:
        RobotModel.from_urdf(framed(**parts))
    assert info.value.link == link
    assert f'{link!r}' in str(info.value) and fragment in str(info.value)


# ---------------------------------------------------------------------- bad chain selections
BAD_SELECTIONS = [
    ('mimic-joint-in-chain', with_right_finger_mimic('finger_left'),
     {'joints': ['yaw', 'pitch', 'slide', 'finger_right']}, UnsupportedChain,
     ["'finger_right'", 'mimic']),
    ('mimic-follows-a-chain-joint', with_right_finger_mimic('slide'), ARM_ONLY,
     UnsupportedChain, ["'finger_right'", "'slide'"]),
    ('mimic-of-unknown-joint', with_right_finger_mimic('nosuch'), ARM_ONLY,
     UnsupportedChain, ["'finger_right'", 'mimic']),
    ('two-sibling-fingers', GRIPPER3_TEXT,
     {'joints': ['yaw', 'pitch', 'slide', 'finger_left', 'finger_right']}, UnsupportedChain,
     ['finger_left', 'finger_right', 'branches']),
    ('default-selection-branches', GRIPPER3_TEXT, {}, UnsupportedChain, ['branches']),
    ('joints-out-of-order', GRIPPER3_TEXT, {'joints': ['pitch', 'yaw']}, UnsupportedChain,
     ["'pitch'", "'yaw'"]),
    ('floating-joint-selected',
     mutated('name="finger_left" type="prismatic"', 'name="finger_left" type="floating"'),
     {'joints': ['yaw', 'pitch', 'slide', 'finger_left']}, UnsupportedChain,
     ["'finger_left'", 'floating']),
    ('floating-joint-on-tip-path',
     mutated('name="finger_left" type="prismatic"', 'name="finger_left" type="floating"'),
     {'tip_link': 'finger_left_link'}, UnsupportedChain, ["'finger_left'", 'floating']),
    ('planar-joint-as-rigid-load',
     mutated('name="finger_left" type="prismatic"', 'name="finger_left" type="planar"'),
     ARM_ONLY, UnsupportedChain, ["'finger_left'", 'planar']),
    ('empty-joint-list', GRIPPER3_TEXT, {'joints': []}, UnsupportedChain, ['empty']),
    ('only-fixed-joints', GRIPPER3_TEXT, {'tip_link': 'base_link'}, UnsupportedChain,
     ['no movable joint']),
    ('tip-not-below-base', GRIPPER3_TEXT, {'base_link': 'arm', 'tip_link': 'column'},
     UnsupportedChain, ["'column'", "'arm'"]),
    ('joints-not-below-base', GRIPPER3_TEXT, {'base_link': 'arm', 'joints': ['yaw', 'pitch']},
     UnsupportedChain, ["'yaw'", "'arm'"]),
    ('tip-not-on-last-joint', GRIPPER3_TEXT, {'joints': ['yaw', 'pitch'], 'tip_link': 'column'},
     UnsupportedChain, ["'column'"]),
    ('locked-joint-also-in-chain', GRIPPER3_TEXT,
     {'tip_link': 'tool', 'locked_positions': {'slide': 0.1}}, InvalidLimits, ["'slide'"]),
    ('locked-position-outside-limits', GRIPPER3_TEXT,
     {'tip_link': 'tool', 'locked_positions': {'finger_left': 0.1}}, InvalidLimits,
     ["'finger_left'", 'outside']),
    ('locked-position-not-finite', GRIPPER3_TEXT,
     {'tip_link': 'tool', 'locked_positions': {'finger_left': math.inf}}, InvalidLimits,
     ["'finger_left'", 'finite']),
]


@pytest.mark.parametrize('text, kwargs, error, fragments',
                         [pytest.param(*case[1:], id=case[0]) for case in BAD_SELECTIONS])
def test_bad_chain_selection_is_rejected(text: str, kwargs: dict[str, Any], error: type,
                                         fragments: list[str]) -> None:
    with pytest.raises(error) as info:
        RobotModel.from_urdf(text, **kwargs)
    for fragment in fragments:
        assert fragment in str(info.value)


# ---------------------------------------------------------------------- bad limits
def joint_limits(**entry: Any) -> dict[str, Any]:
    return {'chain': {'tip_link': 'tool'}, 'joints': {'pitch': entry}}


# (id, URDF text, limits mapping, fragments of the InvalidLimits message)
BAD_LIMITS = [
    ('unknown-top-level-key', GRIPPER3_TEXT, {'chain': {'tip_link': 'tool'}, 'speed': 1},
     ['unknown keys', 'speed']),
    ('wrong-format', GRIPPER3_TEXT, {'format': 'safety_filter/limits-0'}, ['format']),
    ('unknown-chain-key', GRIPPER3_TEXT, {'chain': {'tip': 'tool'}}, ['chain']),
    ('joints-not-a-mapping', GRIPPER3_TEXT, {'joints': ['pitch']}, ['joints']),
    ('locked-not-a-mapping', GRIPPER3_TEXT, {'locked_joints': [1]}, ['locked_joints']),
    ('unknown-joint-entry-key', GRIPPER3_TEXT, joint_limits(speed=1.0), ["'pitch'"]),
    ('joint-not-in-chain', GRIPPER3_TEXT,
     {'chain': {'tip_link': 'tool'}, 'joints': {'finger_left': {'velocity': 1.0}}},
     ['finger_left', 'not in the chain']),
    ('position-not-a-pair', GRIPPER3_TEXT, joint_limits(position=[0.0]), ["'pitch'"]),
    ('position-lower-above-upper', GRIPPER3_TEXT, joint_limits(position=[1.0, -1.0]),
     ["'pitch'", 'not below']),
    ('position-not-a-number', GRIPPER3_TEXT, joint_limits(position=['a', 1.0]),
     ["'pitch'", 'number']),
    ('velocity-not-finite', GRIPPER3_TEXT, joint_limits(velocity=math.inf),
     ["'pitch'", 'finite']),
    ('velocity-zero', GRIPPER3_TEXT, joint_limits(velocity=0.0), ["'pitch'", 'positive']),
    ('effort-negative', GRIPPER3_TEXT, joint_limits(effort=-3.0), ["'pitch'", 'positive']),
    ('velocity-range-not-around-zero', GRIPPER3_TEXT, joint_limits(velocity=[0.5, 2.0]),
     ["'pitch'", 'range']),
    ('friction-negative', GRIPPER3_TEXT, joint_limits(viscous_friction=-0.1),
     ["'pitch'", '>= 0']),
    ('continuous-without-position-limits',
     mutated('name="yaw" type="revolute"', 'name="yaw" type="continuous"'),
     {'chain': {'tip_link': 'tool'}}, ["'yaw'", 'position limits']),
    ('no-limit-and-no-velocity', mutated(PITCH_LIMIT, ''),
     joint_limits(position=[-1.0, 1.0], effort=10.0), ["'pitch'", 'velocity']),
    ('no-limit-and-no-effort', mutated(PITCH_LIMIT, ''),
     joint_limits(position=[-1.0, 1.0], velocity=1.0), ["'pitch'", 'effort']),
    ('payload-negative-mass', GRIPPER3_TEXT,
     {'chain': {'tip_link': 'tool'}, 'payload': {'mass': [-1.0, 1.0]}}, ['payload']),
    ('payload-min-above-max', GRIPPER3_TEXT,
     {'chain': {'tip_link': 'tool'}, 'payload': {'mass': [2.0, 1.0]}}, ['payload']),
    ('payload-point-two-numbers', GRIPPER3_TEXT,
     {'chain': {'tip_link': 'tool'}, 'payload': {'point': [0.0, 1.0]}}, ['payload point']),
    ('payload-unknown-key', GRIPPER3_TEXT,
     {'chain': {'tip_link': 'tool'}, 'payload': {'inertia': 1.0}}, ['payload']),
    ('payload-mass-not-numbers', GRIPPER3_TEXT,
     {'chain': {'tip_link': 'tool'}, 'payload': {'mass': 'heavy'}}, ['payload']),
    ('gravity-two-numbers', GRIPPER3_TEXT,
     {'chain': {'tip_link': 'tool'}, 'gravity': [0.0, -9.81]}, ['gravity']),
]


@pytest.mark.parametrize('text, limits, fragments',
                         [pytest.param(*case[1:], id=case[0]) for case in BAD_LIMITS])
def test_bad_limits_are_rejected(text: str, limits: dict[str, Any], fragments: list[str]
                                 ) -> None:
    with pytest.raises(InvalidLimits) as info:
        RobotModel.from_urdf(text, limits=limits)
    for fragment in fragments:
        assert fragment in str(info.value)


def test_limits_file_errors(tmp_path: Path) -> None:
    with pytest.raises(InvalidLimits, match='not found'):
        RobotModel.from_urdf(GRIPPER3, limits=tmp_path / 'missing.yaml')
    malformed = write(tmp_path, 'bad.yaml', 'chain: {tip_link: tool\njoints: [\n')
    with pytest.raises(InvalidLimits, match='not valid YAML'):
        RobotModel.from_urdf(GRIPPER3, limits=malformed)
    unknown = write(tmp_path, 'unknown.yaml', 'chain:\n  tip_link: tool\nspeeds: 3\n')
    with pytest.raises(InvalidLimits, match='speeds'):
        RobotModel.from_urdf(GRIPPER3, limits=unknown)
    not_mapping = write(tmp_path, 'list.yaml', '- 1\n- 2\n')
    with pytest.raises(InvalidLimits, match='mapping'):
        RobotModel.from_urdf(GRIPPER3, limits=not_mapping)
    empty = write(tmp_path, 'empty.yaml', '# nothing\n')
    assert RobotModel.from_urdf(GRIPPER3, limits=empty, tip_link='tool').n_joints == 3


def test_negative_payload_mass_for_the_inertials() -> None:
    model = RobotModel.from_urdf(GRIPPER3, **ARM_ONLY)
    with pytest.raises(InvalidValue, match='payload'):
        model.body_inertials(-0.5)
    with pytest.raises(InvalidValue, match='payload'):
        model.body_inertials(math.nan)


def test_asymmetric_velocity_limit_becomes_tighter_symmetric_bound_with_a_note() -> None:
    """METHOD section 1: an asymmetric bound is replaced by its tighter symmetric bound and
    the report says so."""
    model = RobotModel.from_urdf(GRIPPER3, limits=joint_limits(velocity=[-1.25, 2.0],
                                                               effort=[-40.0, 30.0]))
    assert model.velocity_limit[1] == 1.25
    assert model.effort_limit[1] == 30.0
    assert any('pitch' in note and 'velocity' in note and '1.25' in note for note in model.notes)
    assert any('pitch' in note and 'effort' in note for note in model.notes)
    assert 'note:' in model.describe()
    symmetric = RobotModel.from_urdf(GRIPPER3, limits=joint_limits(velocity=[-1.5, 1.5]))
    assert symmetric.velocity_limit[1] == 1.5 and symmetric.notes == ()


# ---------------------------------------------------------------------- good paths
def chain_joint_names_from_xml(urdf: Path | str, tip: str) -> list[str]:
    """Movable joints from the root to ``tip``, in order (xml.etree)."""
    root = urdf_tree(urdf)
    joint_into = {j.find('child').get('link'): j for j in root.iter('joint')}
    names, link = [], tip
    while link in joint_into:
        joint = joint_into[link]
        if joint.get('type') != 'fixed':
            names.append(joint.get('name'))
        link = joint.find('parent').get('link')
    return names[::-1]


def test_chain_by_base_and_tip_by_joints_and_default() -> None:
    by_tip = RobotModel.from_urdf(GRIPPER3, tip_link='tool')
    assert by_tip.joint_names == tuple(chain_joint_names_from_xml(GRIPPER3, 'tool'))
    assert by_tip.joint_names == ('yaw', 'pitch', 'slide')
    assert by_tip.joint_kinds == ('revolute', 'revolute', 'prismatic')
    assert list(by_tip.is_prismatic) == [False, False, True]
    assert by_tip.base_link == 'base_link' and by_tip.tip_link == 'tool'
    assert by_tip.locked_positions == {'finger_left': 0.0, 'finger_right': 0.0}

    by_base = RobotModel.from_urdf(GRIPPER3, base_link='column', tip_link='finger_left_link')
    assert by_base.joint_names == ('pitch', 'slide', 'finger_left')
    assert by_base.base_link == 'column'

    by_joints = RobotModel.from_urdf(GRIPPER3, joints=['yaw', 'pitch', 'slide'])
    assert by_joints.joint_names == by_tip.joint_names
    assert by_joints.tip_link == 'carriage'  # default tip: child of the last joint
    by_carriage = RobotModel.from_urdf(GRIPPER3, tip_link='carriage')
    assert by_joints.content_hash() == by_carriage.content_hash()
    # The tool is a massless frame 0.1 m along x of the carriage: only the payload point
    # (default: tip frame origin) differs between the two tips.
    assert np.array_equal(by_tip.body_mass, by_carriage.body_mass)
    assert np.allclose(by_tip.payload_point_in_body, [0.1, 0.0, 0.0])
    assert np.allclose(by_carriage.payload_point_in_body, 0.0)

    # Default: every movable joint of a URDF without branches (planar2, no limits file).
    planar = RobotModel.from_urdf(demo_urdf_path('planar2'))
    assert planar.joint_names == tuple(chain_joint_names_from_xml(demo_urdf_path('planar2'),
                                                                  'tool'))
    assert planar.tip_link == 'fore'
    assert np.array_equal(planar.gravity, STANDARD_GRAVITY)


def test_chain_selection_via_limits_mapping_and_keyword_precedence() -> None:
    from_spec = RobotModel.from_urdf(GRIPPER3, limits={'chain': {'joints': ['yaw', 'pitch']}})
    assert from_spec.joint_names == ('yaw', 'pitch')
    assert from_spec.locked_positions['slide'] == 0.0  # the slide rides along, locked
    keyword = RobotModel.from_urdf(GRIPPER3, limits={'chain': {'joints': ['yaw', 'pitch']}},
                                   tip_link='tool')
    assert keyword.joint_names == ('yaw', 'pitch', 'slide')


def test_base_below_root_rotates_gravity_and_matches_pinocchio() -> None:
    """Chain from base_link 'column' (yaw locked at 0.7 rad): gravity is expressed in the
    column frame, g_column = Rz(0.7)^T g_root, and the dynamics of the two remaining joints
    equal Pinocchio's reduced model (yaw and fingers locked)."""
    yaw = 0.7
    model = RobotModel.from_urdf(GRIPPER3, base_link='column', tip_link='tool',
                                 locked_positions={'yaw': yaw})
    assert model.joint_names == ('pitch', 'slide')
    rotation = rpy_matrix([0.0, 0.0, yaw])  # yaw axis is +z, origin without rotation
    assert np.allclose(model.gravity, rotation.T @ np.array(STANDARD_GRAVITY), atol=1e-15)
    reference = pinocchio_reference(GRIPPER3, locked={'yaw': yaw, 'finger_left': 0.0,
                                                      'finger_right': 0.0})
    dynamics = Dynamics(model, backend='numpy')
    for q in ([0.3, 0.1], [-1.2, 0.05], [1.4, 0.19]):
        q = np.array(q)
        assert relative_error(dynamics.mass_matrix(q), reference.mass_matrix(q)) < 1e-9
        assert relative_error(dynamics.gravity_torque(q), reference.gravity(q)) < 1e-9


def test_mounted_base_rotates_gravity() -> None:
    """A URDF whose chain base hangs below the root through a rotated fixed joint (a
    wall-mounted arm): gravity in base_link is R^T g_root, R from the origin rpy."""
    mount = ('<robot name="wall">\n  <link name="world"/>\n'
             '  <joint name="wall_mount" type="fixed">\n    <parent link="world"/>\n'
             '    <child link="base_link"/>\n'
             '    <origin xyz="0.1 0.2 1.0" rpy="1.5707963267948966 0.2 -0.4"/>\n  </joint>\n')
    text = GRIPPER3_TEXT.replace('<robot name="gripper3">\n', mount)
    model = RobotModel.from_urdf(text, base_link='base_link', tip_link='tool')
    rotation, _ = origin_of(urdf_tree(text).find("joint[@name='wall_mount']"))
    assert np.allclose(model.gravity, rotation.T @ np.array(STANDARD_GRAVITY), atol=1e-14)
    reference = pinocchio_reference(text, locked={'finger_left': 0.0, 'finger_right': 0.0})
    dynamics = Dynamics(model, backend='numpy')
    q = np.array([0.4, -0.6, 0.12])
    assert relative_error(dynamics.gravity_torque(q), reference.gravity(q)) < 1e-9


def link_masses_below(urdf: Path, joint_name: str) -> float:
    """Sum of the <mass> of every link at or below the child of a joint (xml.etree)."""
    root = urdf_tree(urdf)
    children: dict[str, list[str]] = {}
    child_of = {}
    for joint in root.iter('joint'):
        children.setdefault(joint.find('parent').get('link'), []).append(
            joint.find('child').get('link'))
        child_of[joint.get('name')] = joint.find('child').get('link')
    masses = {link.get('name'): float(link.find('inertial/mass').get('value'))
              for link in root.iter('link') if link.find('inertial') is not None}
    total, stack = 0.0, [child_of[joint_name]]
    while stack:
        link = stack.pop()
        total += masses.get(link, 0.0)
        stack.extend(children.get(link, []))
    return total


def test_bench6_with_locked_fingers() -> None:
    urdf = demo_urdf_path('bench6')
    spec = demo_limits_spec('bench6')
    model = RobotModel.from_urdf(urdf, limits=demo_limits_path('bench6'))
    tip = spec['chain']['tip_link']
    expected_joints = chain_joint_names_from_xml(urdf, tip)
    assert model.joint_names == tuple(expected_joints)
    assert model.n_joints == 6
    # Everything downstream of the first joint moves, the locked gripper included.
    assert float(np.sum(model.body_mass)) == pytest.approx(
        link_masses_below(urdf, expected_joints[0]), rel=1e-12)
    assert model.locked_positions == pytest.approx({'finger_left': 0.02, 'finger_right': 0.02})
    # Limits: URDF values unless the limits file overrides them.
    joints = {j.get('name'): j for j in urdf_tree(urdf).iter('joint')}
    overrides = spec.get('joints') or {}
    for i, name in enumerate(model.joint_names):
        limit = joints[name].find('limit')
        entry = overrides.get(name, {})
        assert model.position_lower[i] == float(entry.get('position', [limit.get('lower')])[0])
        assert model.position_upper[i] == float(entry.get('position', [0, limit.get('upper')])[1])
        assert model.velocity_limit[i] == float(entry.get('velocity', limit.get('velocity')))
        assert model.effort_limit[i] == float(entry.get('effort', limit.get('effort')))
        damping = float(joints[name].find('dynamics').get('damping'))
        assert model.viscous_friction[i] == float(entry.get('viscous_friction', damping))
    assert overrides, 'bench6_limits.yaml is expected to override at least one limit'
    assert np.array_equal(model.gravity, spec['gravity'])
    assert model.payload.mass_min == spec['payload']['mass'][0]
    assert model.payload.mass_max == spec['payload']['mass'][1]
    assert model.payload.point == tuple(spec['payload']['point'])


def test_limits_overrides_from_a_yaml_file(tmp_path: Path) -> None:
    spec = {
        'format': 'safety_filter/limits-1',
        'chain': {'base_link': 'base_link', 'tip_link': 'tool'},
        'locked_joints': {'finger_left': 0.01, 'finger_right': 0.02},
        'joints': {'yaw': {'position': [-1.0, 0.5], 'velocity': 0.7, 'effort': 12.0,
                           'viscous_friction': 0.3, 'coulomb_friction': 0.4},
                   'slide': {'position': [0.05, 0.1]}},
        'payload': {'mass': [0.1, 0.9], 'point': [0.01, 0.0, 0.02]},
        'gravity': [0.0, 0.0, -9.81],
    }
    path = write(tmp_path, 'limits.yaml', yaml.safe_dump(spec))
    model = RobotModel.from_urdf(GRIPPER3, limits=path)
    assert list(model.position_lower) == [-1.0, -1.5, 0.05]
    assert list(model.position_upper) == [0.5, 1.5, 0.1]
    assert list(model.velocity_limit) == [0.7, 2.0, 0.5]
    assert list(model.effort_limit) == [12.0, 40.0, 100.0]
    assert list(model.viscous_friction) == [0.3, 0.0, 0.0]
    assert list(model.coulomb_friction) == [0.4, 0.0, 0.0]
    assert model.locked_positions == {'finger_left': 0.01, 'finger_right': 0.02}
    assert model.payload.mass_min == 0.1 and model.payload.mass_max == 0.9
    # The payload point is given in the tool frame, 0.1 m along x of the carriage.
    assert np.allclose(model.payload_point_in_body, [0.11, 0.0, 0.02])
    assert list(model.gravity) == [0.0, 0.0, -9.81]
    # URDF friction of yaw (damping 0.2, friction 0.1) applies when not overridden.
    plain = RobotModel.from_urdf(GRIPPER3, tip_link='tool')
    assert plain.viscous_friction[0] == 0.2 and plain.coulomb_friction[0] == 0.1


def test_model_arrays_are_read_only() -> None:
    model = RobotModel.from_urdf(GRIPPER3, tip_link='tool')
    arrays = {name: value for name, value in vars(model).items()
              if isinstance(value, np.ndarray)}
    assert {'position_lower', 'velocity_limit', 'effort_limit', 'body_mass', 'body_inertia',
            'joint_axis', 'gravity', 'is_prismatic'} <= set(arrays)
    for name, array in arrays.items():
        with pytest.raises(ValueError):
            array[(0,) * array.ndim] = 1.0
    # Views and copies handed out keep the model intact.
    lower = np.array(model.position_lower)
    lower[0] = 99.0
    assert model.position_lower[0] == -2.5
    mass, _, _ = model.body_inertials(0.5)
    mass[0] = 99.0
    assert model.body_mass[0] == 2.0


def test_content_hash_is_stable_and_sees_every_limit(tmp_path: Path) -> None:
    first = RobotModel.from_urdf(GRIPPER3, tip_link='tool')
    second = RobotModel.from_urdf(GRIPPER3_TEXT, tip_link='tool')
    assert first.content_hash() == second.content_hash()
    assert len(first.content_hash()) == 64
    changed_effort = RobotModel.from_urdf(GRIPPER3, limits=joint_limits(effort=39.0))
    assert changed_effort.content_hash() != first.content_hash()
    changed_urdf = RobotModel.from_urdf(
        mutated(PITCH_LIMIT, PITCH_LIMIT.replace('upper="1.5"', 'upper="1.4"')), **ARM_ONLY)
    assert changed_urdf.content_hash() != first.content_hash()
    for entry in ({'velocity': 1.9}, {'viscous_friction': 0.01}, {'coulomb_friction': 0.01},
                  {'position': [-1.5, 1.49]}):
        other = RobotModel.from_urdf(GRIPPER3, limits=joint_limits(**entry))
        assert other.content_hash() != first.content_hash(), entry
    payload = RobotModel.from_urdf(GRIPPER3, limits={'chain': {'tip_link': 'tool'},
                                                     'payload': {'mass': [0.0, 0.1]}})
    assert payload.content_hash() != first.content_hash()
    locked = RobotModel.from_urdf(GRIPPER3, tip_link='tool',
                                  locked_positions={'finger_left': 0.03})
    assert locked.content_hash() != first.content_hash()  # the rigid load moved


def test_describe_lists_every_joint() -> None:
    model = RobotModel.from_urdf(GRIPPER3, tip_link='tool')
    text = model.describe()
    for name in model.joint_names:
        assert name in text
    assert 'finger_left=0' in text
    assert repr(model) == "RobotModel('gripper3', joints=['yaw', 'pitch', 'slide'])"


def test_model_survives_pickling_for_worker_processes() -> None:
    # Batch replay sends the model to worker processes; the cached Pinocchio twin must not
    # travel with it, and the arrays must stay read-only.
    import pickle

    from safety_filter.core.dynamics import Dynamics
    from safety_filter.simulation.demo_arms import load_demo_arm

    model = load_demo_arm('planar2')
    Dynamics(model).mass_matrix(np.zeros(2))  # fills the cache
    copy = pickle.loads(pickle.dumps(model))
    assert copy.content_hash() == model.content_hash()
    with pytest.raises(ValueError):
        copy.position_lower[0] = 0.0


# ---------------------------------------------------------------------- xacro
PLANAR2_XACRO = """<?xml version="1.0"?>
<robot xmlns:xacro="http://www.ros.org/wiki/xacro" name="planar2">
  <xacro:property name="upper_mass" value="1.2"/>
  <xacro:macro name="frame" params="name">
    <link name="${name}"/>
  </xacro:macro>
  BODY
</robot>
"""


def _planar2_as_xacro(folder: Path, name: str = 'planar2.urdf.xacro') -> Path:
    """planar2.urdf turned into a xacro file: the elbow link's mass from a property, the
    tool frame from a macro (so that both must be expanded to give the same model)."""
    from xml.etree import ElementTree

    urdf_text = demo_urdf_path('planar2').read_text(encoding='utf-8')
    root = ElementTree.fromstring(urdf_text)
    parts = []
    for child in root:
        if child.tag == 'link' and child.get('name') == 'tool':
            parts.append('<xacro:frame name="tool"/>')
            continue
        text = ElementTree.tostring(child, encoding='unicode')
        parts.append(text.replace('<mass value="1.2" />', '<mass value="${upper_mass}"/>'))
    assert any('${upper_mass}' in part for part in parts)
    path = folder / name
    path.write_text(PLANAR2_XACRO.replace('BODY', '\n  '.join(parts)), encoding='utf-8')
    return path


def test_a_xacro_file_gives_the_same_model_as_its_urdf(tmp_path: Path) -> None:
    pytest.importorskip('xacro', reason='the xacro package is not installed (pip install '
                        'xacro)')
    limits = demo_limits_path('planar2')
    reference = RobotModel.from_urdf(demo_urdf_path('planar2'), limits=limits)
    expanded = RobotModel.from_urdf(_planar2_as_xacro(tmp_path), limits=limits)
    assert expanded.content_hash() == reference.content_hash()
    # A file that holds xacro macros under a .urdf name is expanded too (not parsed as it
    # is, which would drop the macro's links silently).
    disguised = _planar2_as_xacro(tmp_path, 'disguised.urdf')
    assert RobotModel.from_urdf(disguised, limits=limits).content_hash() == \
        reference.content_hash()


def test_xacro_without_the_package_or_as_text_says_how_to_expand(
        tmp_path: Path, monkeypatch: pytest.MonkeyPatch) -> None:
    import sys

    path = _planar2_as_xacro(tmp_path)
    monkeypatch.setitem(sys.modules, 'xacro', None)  # as if not installed
    with pytest.raises(RobotDescriptionError, match='xacro package is not installed') as raised:
        RobotModel.from_urdf(path)
    message = str(raised.value)
    assert 'pip install xacro' in message
    assert f'xacro {path} > planar2.urdf' in message
    with pytest.raises(RobotDescriptionError, match='holds xacro macros'):
        RobotModel.from_urdf(path.read_text(encoding='utf-8'))
    monkeypatch.delitem(sys.modules, 'xacro')
    broken = tmp_path / 'broken.urdf.xacro'
    broken.write_text(PLANAR2_XACRO.replace('BODY', '<xacro:undefined_macro/>'),
                      encoding='utf-8')
    pytest.importorskip('xacro', reason='the xacro package is not installed')
    with pytest.raises(RobotDescriptionError, match='xacro could not expand'):
        RobotModel.from_urdf(broken)
