"""``safety-filter certify``: exit codes, the files it writes and what it prints."""

from __future__ import annotations

from pathlib import Path

import pytest
import yaml

from safety_filter.certificate import Certificate
from safety_filter.cli import EXIT_BAD_INPUT, EXIT_NOT_CERTIFIED, EXIT_OK, main
from safety_filter.demo_arms import demo_arm_files, load_demo_arm
from safety_filter.model import RobotModel

FAST = ['--samples', '256', '--falsifier-states', '2000']


@pytest.fixture
def weak_limits(tmp_path: Path) -> Path:
    """planar2's limits with the shoulder's effort at 5 N m, below its gravity load."""
    spec = yaml.safe_load(demo_arm_files('planar2')[1].read_text(encoding='utf-8'))
    weak = {'format': spec['format'], 'chain': spec['chain'],
            'joints': {'shoulder': {'effort': 5.0}}}
    path = tmp_path / 'weak_limits.yaml'
    path.write_text(yaml.safe_dump(weak), encoding='utf-8')
    return path


def test_certify_planar2_writes_a_loadable_certificate_and_report(tmp_path, capsys) -> None:
    output = tmp_path / 'out' / 'planar2.yaml'
    code = main(['certify', '--demo', 'planar2', *FAST, '--output', str(output)])
    captured = capsys.readouterr()
    assert code == EXIT_OK, captured.err
    certificate = Certificate.load(output, load_demo_arm('planar2'))
    assert certificate.certified and not certificate.reasons
    assert certificate.falsifier['states'] == 2000
    report = tmp_path / 'out' / 'planar2_report'
    assert (report / 'certificate_report.html').is_file()
    assert (report / 'certificate_report.json').is_file()
    assert 'verdict: CERTIFIED' in captured.out
    for name in ('shoulder', 'elbow'):
        assert name in captured.out
    assert str(output.resolve()) in captured.out
    assert 'not a certified safety function' in captured.err


def test_torque_below_gravity_load_exits_3_and_says_why(tmp_path, capsys, weak_limits) -> None:
    urdf = demo_arm_files('planar2')[0]
    output = tmp_path / 'weak.yaml'
    code = main(['certify', '--urdf', str(urdf), '--limits', str(weak_limits), *FAST,
                 '--output', str(output)])
    captured = capsys.readouterr()
    assert code == EXIT_NOT_CERTIFIED
    assert 'NOT CERTIFIED' in captured.out
    text = ' '.join(captured.out.split())
    assert "joint 'shoulder'" in text
    assert float(text.split('short by ')[1].split()[0]) > 0.0
    model = RobotModel.from_urdf(urdf, limits=weak_limits)
    certificate = Certificate.load(output, model)
    assert not certificate.certified
    assert any('shoulder' in reason for reason in certificate.reasons)
    assert (tmp_path / 'weak_report' / 'certificate_report.html').is_file()


def test_quiet_and_no_report_still_give_the_reasons(tmp_path, capsys, weak_limits,
                                                    monkeypatch) -> None:
    monkeypatch.chdir(tmp_path)
    urdf = demo_arm_files('planar2')[0]
    code = main(['certify', '--urdf', str(urdf), '--limits', str(weak_limits), *FAST,
                 '--no-report', '--quiet'])
    captured = capsys.readouterr()
    assert code == EXIT_NOT_CERTIFIED
    assert 'verdict: NOT CERTIFIED' in captured.out and 'shoulder' in captured.out
    assert 'gamma*' not in captured.out  # no table
    written = sorted(p.name for p in tmp_path.iterdir())
    assert written == ['planar2_certificate.yaml', 'weak_limits.yaml']  # default name, no report


def test_missing_urdf_exits_2(tmp_path, capsys) -> None:
    code = main(['certify', '--urdf', str(tmp_path / 'nowhere.urdf'), '--output',
                 str(tmp_path / 'x.yaml')])
    captured = capsys.readouterr()
    assert code == EXIT_BAD_INPUT
    assert 'nowhere.urdf' in captured.err
    assert not (tmp_path / 'x.yaml').exists()


def test_malformed_limits_file_exits_2(tmp_path, capsys) -> None:
    limits = tmp_path / 'bad_limits.yaml'
    limits.write_text('format: safety_filter/limits-1\njoints: [shoulder: {effort: 5\n',
                      encoding='utf-8')
    code = main(['certify', '--urdf', str(demo_arm_files('planar2')[0]), '--limits',
                 str(limits), '--output', str(tmp_path / 'x.yaml')])
    captured = capsys.readouterr()
    assert code == EXIT_BAD_INPUT
    assert 'bad_limits.yaml' in captured.err
    assert not (tmp_path / 'x.yaml').exists()


@pytest.mark.parametrize('options', [
    ['--alpha1', 'cubic'],          # argparse: not an alpha1 family
    ['--control-rate', 'fast'],     # argparse: not a number
    ['--gamma-margin', '1.5'],      # settings: gamma margin must be below 1
    ['--samples', '4'],             # bound settings: too few samples
    ['--alpha1', 'atan', '--alpha1-scale', '-1'],
    ['--falsifier-states', '-5'],
])
def test_bad_options_exit_2(tmp_path, capsys, options) -> None:
    code = main(['certify', '--demo', 'planar2', *options, '--output', str(tmp_path / 'x.yaml')])
    assert code == EXIT_BAD_INPUT
    assert not (tmp_path / 'x.yaml').exists()
    assert capsys.readouterr().err


def test_inspect_still_works(capsys) -> None:
    assert main(['inspect', '--demo', 'planar2', '--states', '0']) == EXIT_OK
    assert 'model hash' in capsys.readouterr().out
