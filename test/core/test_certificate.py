"""The certificate file's key, and what its model-mismatch error says.

A certificate records the model's joints, limits, friction, payload and declared uncertainty
beside the model hash; when the hash differs, the error must name the likely cause (another
chain, a missing or different limits file, another URDF) rather than always advise
recertifying. The certificates here are built by hand around the demo arms' models (the
gains are irrelevant to the check), so no certification runs.
"""

from __future__ import annotations

from pathlib import Path

import numpy as np
import pytest
import yaml

from safety_filter.core.certificate import PARAMETER_FILE_KEY, Certificate, CertificateMismatch
from safety_filter.core.class_k import ClassK
from safety_filter.core.robot_model import RobotModel
from safety_filter.simulation.demo_arms import demo_arm_files


def certificate_for(model: RobotModel) -> Certificate:
    n = model.n_joints
    ones = np.ones(n)
    return Certificate(
        joint_names=list(model.joint_names), position_lower=model.position_lower,
        position_upper=model.position_upper, velocity_limit=model.velocity_limit,
        effort_limit=model.effort_limit, velocity_bound=0.5 * model.velocity_limit,
        gamma=ones, gamma_star=ones, beta=ones, beta_star=ones, beta_floor=ones,
        beta_cap=ones, authority=ones, sampling_margin=0.1 * ones,
        viscous_friction=model.viscous_friction, coulomb_friction=model.coulomb_friction,
        condition='acceleration_authority', alpha1=ClassK('linear', 1.0),
        alpha2=ClassK('linear', 1.0), control_rate_hz=1000.0, sampling_factor=1.0,
        payload_mass_range=(model.payload.mass_min, model.payload.mass_max),
        payload_point=tuple(model.payload.point), model_hash=model.content_hash(),
        package_version='test', created='2024-01-01T00:00:00+00:00',
        settings={'uncertainty': model.uncertainty.record()})


def cause(certificate: Certificate, model: RobotModel) -> str:
    with pytest.raises(CertificateMismatch) as raised:
        certificate.check_model(model)
    assert raised.value.cause in str(raised.value)
    assert 'hash' in str(raised.value)
    return raised.value.cause


@pytest.fixture(scope='module')
def planar2() -> tuple[RobotModel, Certificate, Path, Path]:
    urdf, limits = demo_arm_files('planar2')
    model = RobotModel.from_urdf(urdf, limits=limits)
    return model, certificate_for(model), Path(urdf), Path(limits)


def test_the_file_is_keyed_for_any_namespace_and_still_checks_its_id(
        planar2: tuple, tmp_path: Path) -> None:
    model, certificate, _, _ = planar2
    path = certificate.save(tmp_path / 'c.yaml')
    document = yaml.safe_load(path.read_text(encoding='utf-8'))
    assert list(document) == [PARAMETER_FILE_KEY] == ['/**']
    assert Certificate.load(path, model).certificate_id == certificate.certificate_id
    # The key is not part of the content: a file keyed by the node name (earlier releases)
    # loads to the same certificate; an edited value is still refused.
    legacy = certificate.save(tmp_path / 'legacy.yaml', node_name='safety_filter')
    assert Certificate.load(legacy, model).certificate_id == certificate.certificate_id
    document['/**']['ros__parameters']['gamma'][0] = 2.0
    path.write_text(yaml.safe_dump(document), encoding='utf-8')
    with pytest.raises(Exception, match='edited after certification'):
        Certificate.load(path, model)


def test_the_same_model_passes(planar2: tuple) -> None:
    model, certificate, urdf, limits = planar2
    certificate.check_model(RobotModel.from_urdf(urdf, limits=limits))


def test_a_missing_limits_file_is_named(planar2: tuple) -> None:
    _, certificate, urdf, _ = planar2
    text = cause(certificate, RobotModel.from_urdf(urdf))  # same chain, URDF values only
    assert text.startswith('no limits file was given') and 'payload' in text
    assert 'URDF differs' not in text


def test_another_chain_is_named_with_the_joints(tmp_path: Path) -> None:
    urdf, limits = demo_arm_files('bench6')
    model = RobotModel.from_urdf(urdf, limits=limits)
    certificate = certificate_for(model)
    shorter = yaml.safe_load(Path(limits).read_text(encoding='utf-8'))
    shorter['chain']['tip_link'] = model_link_before_tip(urdf, shorter['chain']['tip_link'])
    other = RobotModel.from_urdf(urdf, limits=shorter)
    text = cause(certificate, other)
    assert 'another chain' in text and f'missing: [{model.joint_names[-1]!r}]' in text
    assert 'limits file' in text and 'no limits file' not in text  # where the chain is set


def model_link_before_tip(urdf: str | Path, tip: str) -> str:
    """The parent link of the joint that moves ``tip`` (parsed with xml.etree)."""
    import xml.etree.ElementTree as ElementTree

    root = ElementTree.parse(urdf).getroot()
    link = tip
    while True:  # up through fixed joints to the last movable one, then its parent
        (joint,) = [j for j in root.findall('joint') if j.find('child').get('link') == link]
        link = joint.find('parent').get('link')
        if joint.get('type') != 'fixed':
            return link


@pytest.mark.parametrize(('override', 'expected'), [
    ({'joints': {'shoulder': {'effort': 35.0}}},
     'effort limits of 1 joint(s), e.g. shoulder: [35] in the model, [40] certified'),
    ({'joints': {'elbow': {'position': [-2.0, 2.4]}}}, 'position limits of 1 joint(s)'),
    ({'joints': {'elbow': {'viscous_friction': 0.2}}}, 'viscous friction'),
    ({'payload': {'mass': [0.0, 1.0], 'point': [0.0, 0.0, 0.0]}}, 'payload: [0.0, 1.0] kg'),
    ({'uncertainty': {'link_mass_error': 0.2}}, 'declared uncertainty'),
])
def test_a_different_limits_file_is_named_with_what_differs(
        planar2: tuple, override: dict, expected: str) -> None:
    model, certificate, urdf, limits = planar2
    spec = yaml.safe_load(limits.read_text(encoding='utf-8'))
    spec.update(override)
    text = cause(certificate, RobotModel.from_urdf(urdf, limits=spec))
    assert text.startswith('the limits file differs')
    assert expected in text, text
    assert 'no limits file' not in text and 'URDF differs' not in text


def test_a_different_urdf_is_the_remaining_cause(planar2: tuple) -> None:
    _, certificate, urdf, limits = planar2
    heavier = urdf.read_text(encoding='utf-8').replace('<mass value="1.2"/>',
                                                       '<mass value="1.3"/>')
    assert heavier != urdf.read_text(encoding='utf-8')
    text = cause(certificate, RobotModel.from_urdf(heavier, limits=limits))
    assert text.startswith('the URDF differs')
    assert 'certify this one again' in text


def test_the_hold_of_mean_accelerations_is_kept_and_covered_by_the_id(
        planar2: tuple, tmp_path: Path) -> None:
    """acceleration_hold_s survives the parameter file, changes the id when set (a
    certificate without it keeps its id), and an invalid value is refused."""
    import dataclasses

    from safety_filter.core.certificate import CertificateError

    model, certificate, _, _ = planar2
    assert certificate.acceleration_hold_s is None
    assert 'acceleration_hold_s' not in certificate.to_parameters()
    held = dataclasses.replace(certificate, acceleration_hold_s=0.001)
    assert held.certificate_id != certificate.certificate_id
    loaded = Certificate.load(held.save(tmp_path / 'held.yaml'), model)
    assert loaded.acceleration_hold_s == 0.001
    assert loaded.certificate_id == held.certificate_id
    for bad in (0.0, -1.0, float('nan')):
        with pytest.raises(CertificateError, match='acceleration_hold_s'):
            dataclasses.replace(certificate, acceleration_hold_s=bad)


@pytest.mark.parametrize('entry, value, bad_values', [
    ('prediction_s', 1e-3, (0.0, -1e-3, float('inf'))),
    ('lookahead_s', 5e-4, (0.0, -1e-3, float('nan'))),
])
def test_optional_timing_entries_are_kept_and_covered_by_the_id(
        planar2: tuple, tmp_path: Path, entry: str, value: float,
        bad_values: tuple[float, ...]) -> None:
    """prediction_s (the delay predicted) and lookahead_s (the plan ahead) survive the
    parameter file and are part of the id; a certificate without them (the delay as an
    upper bound, no lookahead, older certificates) has no such entry; an invalid value is
    refused."""
    import dataclasses

    from safety_filter.core.certificate import CertificateError

    model, plain, _, _ = planar2
    assert getattr(plain, entry) is None
    certificate = dataclasses.replace(plain, **{entry: value})
    assert entry not in plain.to_parameters()
    assert plain.certificate_id != certificate.certificate_id
    loaded = Certificate.load(certificate.save(tmp_path / 'ahead.yaml'), model)
    assert getattr(loaded, entry) == value
    assert loaded.certificate_id == certificate.certificate_id
    assert getattr(Certificate.load(plain.save(tmp_path / 'plain.yaml'), model), entry) is None
    for bad in bad_values:
        with pytest.raises(CertificateError, match=entry):
            dataclasses.replace(certificate, **{entry: bad})
