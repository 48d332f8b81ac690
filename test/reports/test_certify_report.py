"""The engineer's report of a certification: terminal table, HTML page, plots, JSON."""

from __future__ import annotations

import copy
import dataclasses
import html
import json
import re
from pathlib import Path

import numpy as np
import pytest
import yaml

from safety_filter.certification.certify import (
    CertificationOutcome,
    CertifySettings,
    certify_with_evidence,
)
from safety_filter.certification.dynamics_bounds import BoundSettings
from safety_filter.core.robot_model import RobotModel
from safety_filter.reports.certificate_report import (
    REPORT_HTML,
    REPORT_JSON,
    SAFETY_NOTICE,
    design_lines,
    format_joint_table,
    joint_rows,
    plot_file_names,
    write_report,
)
from safety_filter.simulation.demo_arms import demo_arm_files, load_demo_arm

PNG_SIGNATURE = b'\x89PNG\r\n\x1a\n'  # PNG specification (ISO/IEC 15948), section 5.2
FAST = CertifySettings(bounds=BoundSettings(samples=256), falsifier_states=2000)
# Certifies planar2 and a weak-shouldered planar2 with real (if reduced) settings, and
# draws the plots: some ten seconds in all.
pytestmark = pytest.mark.slow


def weak_shoulder_planar2() -> RobotModel:
    """planar2 with a 5 N m shoulder, below its gravity load (about 14 N m)."""
    urdf, limits = demo_arm_files('planar2')
    spec = yaml.safe_load(limits.read_text(encoding='utf-8'))
    weak = {'format': spec['format'], 'chain': spec['chain'],
            'joints': {'shoulder': {'effort': 5.0}}}
    return RobotModel.from_urdf(urdf, limits=weak)


@pytest.fixture(scope='module')
def planar2() -> tuple[CertificationOutcome, RobotModel]:
    model = load_demo_arm('planar2')
    return certify_with_evidence(model, FAST), model


@pytest.fixture(scope='module')
def weak() -> tuple[CertificationOutcome, RobotModel]:
    model = weak_shoulder_planar2()
    return certify_with_evidence(model, FAST), model


def _referenced_files(page: str) -> list[str]:
    return re.findall(r'(?:src|href)="([^"]+)"', page)


def test_table_lists_every_joint_and_the_verdict(planar2) -> None:
    outcome, model = planar2
    assert outcome.certified
    table = format_joint_table(outcome, model)
    main_table = table.split('\n\n')[0]  # the model-error table below names the joints too
    rows = {line.split()[0]: line for line in main_table.splitlines() if line.split()}
    for name in model.joint_names:
        assert name in rows and rows[name].rstrip().endswith('ok')
    assert 'verdict: CERTIFIED' in table
    assert 'falsifier: 2000 states in S' in table
    recovery = ' '.join(table.split('recovery: ', 1)[1].split('\n\n')[0].split())
    worst = outcome.certificate.worst_recovery_time()
    for name, seconds in zip(model.joint_names, worst):
        assert 0.0 < seconds < np.inf
        assert f'{name} {seconds:.3g}' in recovery
    assert 'why not certified' not in table
    assert all(len(line) <= 100 for line in table.splitlines())
    assert table.isascii()


def test_rows_match_the_certificate(planar2) -> None:
    outcome, model = planar2
    cert = outcome.certificate
    rows = joint_rows(outcome, model)
    assert [row['joint'] for row in rows] == list(model.joint_names)
    for i, row in enumerate(rows):
        # The fastest speed in S: gamma alpha1(range) (the velocity lemma bound), within the
        # velocity box where S keeps it by velocity barriers.
        reach = cert.gamma[i] * float(cert.alpha1.value(model.position_range[i]))
        if cert.velocity_beta[i] > 0.0:
            reach = min(reach, cert.velocity_bound[i])
        assert row['certified_velocity'] == pytest.approx(reach, rel=1e-12)
        assert row['certified_velocity'] <= model.velocity_limit[i] * (1 + 1e-9)
        assert row['usable_authority'] == pytest.approx(
            cert.authority[i] - cert.sampling_margin[i])
        assert row['beta_star'] <= row['beta'] <= row['beta_cap']
        assert row['passed']


def test_table_marks_the_joint_a_reason_names(planar2) -> None:
    outcome, model = planar2
    failed = copy.deepcopy(outcome)
    failed.certificate = dataclasses.replace(
        failed.certificate, certified=False,
        reasons=["joint 'elbow': invented finding for the test"])
    table = format_joint_table(failed, model)
    main_table = table.split('\n\n')[0]  # the model-error table below names the joints too
    rows = {line.split()[0]: line for line in main_table.splitlines() if line.split()}
    assert rows['elbow'].rstrip().endswith('FAIL')
    assert rows['shoulder'].rstrip().endswith('ok')
    assert 'verdict: NOT CERTIFIED' in table
    assert "  1. joint 'elbow': invented finding" in table
    assert 'recovery:' not in table  # no statement without a certificate


def test_table_explains_a_torque_limit_below_the_gravity_load(weak) -> None:
    outcome, model = weak
    assert not outcome.certified
    table = format_joint_table(outcome, model)
    assert 'verdict: NOT CERTIFIED' in table
    assert re.search(r"1\. joint 'shoulder': .*short by [0-9.]+ N m", table.replace('\n', ' '))
    assert 'falsifier: not run' in table
    assert all(len(line) <= 100 for line in table.splitlines())


def _check_report_folder(outcome: CertificationOutcome, model: RobotModel, folder: Path
                         ) -> tuple[str, dict]:
    page_path = write_report(outcome, model, folder)
    assert page_path == folder / REPORT_HTML
    files = plot_file_names(outcome)
    assert len(files['ratio']) == len(files['safe_set']) == model.n_joints
    assert len(set(files['ratio'] + files['safe_set'] + files['summary'])) == \
        2 * model.n_joints + 1
    for name in files['ratio'] + files['safe_set'] + files['summary']:
        data = (folder / name).read_bytes()
        assert data.startswith(PNG_SIGNATURE), name
        assert len(data) > 1000, name
    assert len(list(folder.glob('*.png'))) == 2 * model.n_joints + 1
    page = page_path.read_text(encoding='utf-8')
    referenced = _referenced_files(page)
    assert set(files['ratio'] + files['safe_set'] + files['summary']) <= set(referenced)
    for name in referenced:
        assert '://' not in name and (folder / name).is_file(), name
    assert 'http://' not in page and 'https://' not in page
    data = json.loads((folder / REPORT_JSON).read_text(encoding='utf-8'))
    return page, data


def test_report_folder_is_complete_and_self_contained(planar2, tmp_path) -> None:
    outcome, model = planar2
    page, data = _check_report_folder(outcome, model, tmp_path / 'report')
    assert 'CERTIFIED' in page and 'NOT CERTIFIED' not in page
    for name in model.joint_names:
        assert f'<td>{name}</td>' in page
    assert outcome.certificate.model_hash in page
    assert html.escape(SAFETY_NOTICE) in page
    assert data['verdict'] == 'certified'
    assert data['certificate']['joint_names'] == list(model.joint_names)
    assert data['certificate']['certificate_id'] == outcome.certificate.certificate_id
    assert set(data['stage_seconds']) == set(outcome.stage_seconds)
    assert data['falsifier']['states'] == 2000
    assert data['falsifier']['infeasible'] == 0
    assert len(data['falsifier']['worst_states']) == len(outcome.falsifier.worst_states)
    assert np.allclose([row['gamma'] for row in data['joints']], outcome.certificate.gamma)


def test_report_of_a_failed_certification_says_why(weak, tmp_path) -> None:
    outcome, model = weak
    page, data = _check_report_folder(outcome, model, tmp_path / 'report')
    assert 'NOT CERTIFIED' in page
    assert 'joint &#x27;shoulder&#x27;' in page and 'short by' in page
    assert data['verdict'] == 'not certified'
    assert data['falsifier'] is None
    assert any('shoulder' in reason for reason in data['certificate']['reasons'])


def test_report_lists_the_designs_tried(planar2) -> None:
    """Every family certification tried is listed with its outcome, one of them chosen; the
    certificate's own alpha1 is the chosen family's. On the damped demo arm the chosen
    family is also tried with mean accelerations over the hold, and says so; without the
    lookahead (the default) no line says it plans ahead."""
    outcome, model = planar2
    cert = outcome.certificate
    lines = design_lines(cert, model)
    tried = cert.settings['designs_tried']
    assert len(tried) == len(FAST.families) + 1 and len(lines) >= len(tried)
    assert [entry['mean_over_hold'] for entry in tried] == [False] * len(FAST.families) + [True]
    assert sum('mean acceleration over the hold' in line for line in lines) == 1
    assert not any(entry['lookahead'] for entry in tried) and cert.lookahead_s is None
    assert not any('planned half the hold ahead' in line for line in lines)
    chosen = [line for line in lines if ': chosen' in line]
    assert len(chosen) == 1 and chosen[0].startswith(cert.alpha1.kind)
    table = format_joint_table(outcome, model)
    assert 'designs tried' in table
    for entry in tried:
        assert any(line.startswith(entry['alpha1']) for line in lines)


def test_the_lookahead_left_to_certification_is_tried_both_ways() -> None:
    """With ``lookahead=None`` the families and forms are taken through with the lookahead,
    then the chosen family and form without it; the report lists each, and the certificate
    plans ahead exactly when the chosen design does."""
    from dataclasses import replace

    model = load_demo_arm('planar2')
    outcome = certify_with_evidence(model, replace(FAST, lookahead=None))
    cert = outcome.certificate
    tried = cert.settings['designs_tried']
    families = len(FAST.families)
    assert [entry['lookahead'] for entry in tried] == [True] * (families + 1) + [False]
    lines = design_lines(cert, model)
    assert sum('planned half the hold ahead' in line for line in lines[:len(tried)]) == \
        families + 1
    chosen = next(entry for entry in tried if entry['outcome'] == 'chosen')
    assert (cert.lookahead_s is not None) == chosen['lookahead']


def test_the_report_says_whether_the_slow_design_was_kept_and_why_not() -> None:
    from certify_fixtures import certified_demo_arm

    from safety_filter.reports.certificate_tables import (
        design_lines,
        format_joint_table,
        slow_design_rows,
    )

    model, outcome = certified_demo_arm('bench6')
    assert outcome.certificate.slow_design is not None
    assert any(line.startswith('slow design (velocity boxes up to 60 %') and 'kept' in line
               for line in design_lines(outcome.certificate, model))
    rows = slow_design_rows(outcome, model)
    assert [row['joint'] for row in rows] == list(model.joint_names)
    # the union holds the main set, so it is never smaller; on bench6 the shoulder gains most
    assert all(row['union_growth_percent'] >= -1e-9 for row in rows)
    assert max(rows, key=lambda row: row['union_growth_percent'])['joint'] == 'shoulder_pitch'
    assert 'slow design (velocity boxes up to 60 %' in format_joint_table(outcome, model)
    model, outcome = certified_demo_arm('planar2')
    assert outcome.certificate.slow_design is None
    lines = design_lines(outcome.certificate, model)
    assert any(line.startswith('slow design left out: it enlarges no joint') for line in lines)
    assert not slow_design_rows(outcome, model)
