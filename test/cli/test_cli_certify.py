"""``safety-filter certify``: exit codes, the files it writes and what it prints."""

from __future__ import annotations

from dataclasses import replace
from pathlib import Path

import pytest
import yaml

from safety_filter.cli.main import main
from safety_filter.core.certificate import Certificate
from safety_filter.core.robot_model import RobotModel
from safety_filter.errors import ExitCode
from safety_filter.simulation.demo_arms import demo_arm_files, load_demo_arm

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


@pytest.mark.slow
def test_certify_planar2_writes_a_loadable_certificate_and_report(tmp_path, capsys) -> None:
    output = tmp_path / 'out' / 'planar2.yaml'
    code = main(['certify', '--demo', 'planar2', *FAST, '--output', str(output)])
    captured = capsys.readouterr()
    assert code == ExitCode.OK, captured.err
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
    assert 'delay: up to 1 ms, covered as part of the hold' in captured.out
    assert certificate.prediction_s is None


def test_certify_with_the_delay_predicted_says_so_and_how_to_check_it(tmp_path,
                                                                        capsys) -> None:
    output = tmp_path / 'planar2.yaml'
    code = main(['certify', '--demo', 'planar2', *FAST, '--no-report', '--delay', 'fixed',
                 '--output', str(output)])
    printed = ' '.join(capsys.readouterr().out.split())
    assert code == ExitCode.OK, printed
    assert Certificate.load(output).prediction_s == pytest.approx(1e-3)
    assert 'delay: 1 ms, predicted (--delay fixed)' in printed
    assert 'safety-filter stress' in printed


def test_torque_below_gravity_load_exits_3_and_says_why(tmp_path, capsys, weak_limits) -> None:
    urdf = demo_arm_files('planar2')[0]
    output = tmp_path / 'weak.yaml'
    code = main(['certify', '--urdf', str(urdf), '--limits', str(weak_limits), *FAST,
                 '--output', str(output)])
    captured = capsys.readouterr()
    assert code == ExitCode.NOT_CERTIFIED
    assert 'NOT CERTIFIED' in captured.out
    text = ' '.join(captured.out.split())
    assert "joint 'shoulder'" in text
    assert float(text.split('short by ')[1].split()[0]) > 0.0
    model = RobotModel.from_urdf(urdf, limits=weak_limits)
    assert not output.exists()  # --output only ever receives a certified certificate
    failed = tmp_path / 'weak.failed.yaml'
    assert str(failed.resolve()) in captured.out
    certificate = Certificate.load(failed, model)
    assert not certificate.certified
    assert any('shoulder' in reason for reason in certificate.reasons)
    assert (tmp_path / 'weak.failed_report' / 'certificate_report.html').is_file()


def test_quiet_and_no_report_still_give_the_reasons(tmp_path, capsys, weak_limits,
                                                    monkeypatch) -> None:
    monkeypatch.chdir(tmp_path)
    urdf = demo_arm_files('planar2')[0]
    code = main(['certify', '--urdf', str(urdf), '--limits', str(weak_limits), *FAST,
                 '--no-report', '--quiet'])
    captured = capsys.readouterr()
    assert code == ExitCode.NOT_CERTIFIED
    assert 'verdict: NOT CERTIFIED' in captured.out and 'shoulder' in captured.out
    assert 'gamma*' not in captured.out  # no table
    written = sorted(p.name for p in tmp_path.iterdir())
    # The failed attempt beside the default name, no report.
    assert written == ['planar2_certificate.failed.yaml', 'weak_limits.yaml']


@pytest.mark.slow
def test_failed_certify_leaves_a_good_certificate_untouched(tmp_path, capsys,
                                                           weak_limits) -> None:
    """A certified file at --output survives a failed run over the same path byte for byte,
    with its report; the failed attempt and its report go next to it, and the output says
    so. A later certified run replaces the file atomically (no temporary file is left)."""
    output = tmp_path / 'arm.yaml'
    assert main(['certify', '--demo', 'planar2', *FAST, '--output', str(output)]) == ExitCode.OK
    good = output.read_bytes()
    report = tmp_path / 'arm_report' / 'certificate_report.json'
    good_report = report.read_bytes()
    capsys.readouterr()

    code = main(['certify', '--urdf', str(demo_arm_files('planar2')[0]), '--limits',
                 str(weak_limits), *FAST, '--output', str(output)])
    captured = capsys.readouterr()
    assert code == ExitCode.NOT_CERTIFIED
    assert output.read_bytes() == good
    assert report.read_bytes() == good_report
    assert Certificate.load(output, load_demo_arm('planar2')).certified
    failed = tmp_path / 'arm.failed.yaml'
    assert not yaml.safe_load(failed.read_text(encoding='utf-8'))['/**'][
        'ros__parameters']['certified']
    assert (tmp_path / 'arm.failed_report' / 'certificate_report.html').is_file()
    assert str(failed.resolve()) in captured.out
    assert f'{output} left untouched' in captured.out

    output.write_text('stale\n', encoding='utf-8')
    output.chmod(0o640)
    assert main(['certify', '--demo', 'planar2', *FAST, '--output', str(output),
                 '--no-report']) == ExitCode.OK
    assert Certificate.load(output, load_demo_arm('planar2')).certified
    assert output.stat().st_mode & 0o777 == 0o640  # the replaced file keeps its mode
    assert not [p.name for p in tmp_path.iterdir() if p.name.endswith('.tmp')]


@pytest.mark.slow
def test_interrupted_write_keeps_the_old_file(tmp_path, capsys, monkeypatch) -> None:
    """A write that fails half-way (here a disk-full error after some bytes) leaves the
    previous file at --output and no temporary file behind: the new one is written to a
    temporary file in the same folder and renamed over the old one only when complete."""
    output = tmp_path / 'arm.yaml'
    output.write_text('previous certificate\n', encoding='utf-8')

    def partial_save(self, path, node_name='safety_filter'):
        Path(path).write_text('# safety_filter certificate: trunc', encoding='utf-8')
        raise OSError(28, 'No space left on device')

    monkeypatch.setattr(Certificate, 'save', partial_save)
    code = main(['certify', '--demo', 'planar2', *FAST, '--output', str(output),
                 '--no-report', '--quiet'])
    assert code == ExitCode.BAD_INPUT
    assert 'No space left on device' in capsys.readouterr().err
    assert output.read_text(encoding='utf-8') == 'previous certificate\n'
    assert sorted(p.name for p in tmp_path.iterdir()) == ['arm.yaml']


def test_missing_urdf_exits_2(tmp_path, capsys) -> None:
    code = main(['certify', '--urdf', str(tmp_path / 'nowhere.urdf'), '--output',
                 str(tmp_path / 'x.yaml')])
    captured = capsys.readouterr()
    assert code == ExitCode.BAD_INPUT
    assert 'nowhere.urdf' in captured.err
    assert not (tmp_path / 'x.yaml').exists()


def test_malformed_limits_file_exits_2(tmp_path, capsys) -> None:
    limits = tmp_path / 'bad_limits.yaml'
    limits.write_text('format: safety_filter/limits-1\njoints: [shoulder: {effort: 5\n',
                      encoding='utf-8')
    code = main(['certify', '--urdf', str(demo_arm_files('planar2')[0]), '--limits',
                 str(limits), '--output', str(tmp_path / 'x.yaml')])
    captured = capsys.readouterr()
    assert code == ExitCode.BAD_INPUT
    assert 'bad_limits.yaml' in captured.err
    assert not (tmp_path / 'x.yaml').exists()


@pytest.mark.parametrize('options', [
    ['--alpha1', 'cubic'],          # argparse: not an alpha1 family
    ['--control-rate', 'fast'],     # argparse: not a number
    ['--gamma-margin', '1.5'],      # settings: gamma margin must be below 1
    ['--samples', '4'],             # bound settings: too few samples
    ['--alpha1', 'atan', '--alpha1-scale', '-1'],
    ['--falsifier-states', '-5'],
    ['--sampling-factor', '0.5'],   # settings: a hold shorter than one period
    ['--acceleration-form', 'end'],  # argparse: not a form
    ['--lookahead', 'yes'],         # argparse: not a choice
    ['--beta-cap-share', '1.5'],    # settings: a share of the cap is at most 1
    ['--velocity-headroom', '-0.1'],  # settings: no box above the rated speed
    ['--slow-box', '0.95'],         # settings: a slow box above the top box
    ['--slow-box', '0.5', '--delay', 'fixed'],  # one design only with the delay predicted
])
def test_bad_options_exit_2(tmp_path, capsys, options) -> None:
    code = main(['certify', '--demo', 'planar2', *options, '--output', str(tmp_path / 'x.yaml')])
    assert code == ExitCode.BAD_INPUT
    assert not (tmp_path / 'x.yaml').exists()
    assert capsys.readouterr().err


def test_inspect_still_works(capsys) -> None:
    assert main(['inspect', '--demo', 'planar2', '--states', '0']) == ExitCode.OK
    assert 'model hash' in capsys.readouterr().out


def test_permissiveness_options_reach_the_settings() -> None:
    from safety_filter.cli.certify import certify_settings
    from safety_filter.cli.main import build_parser

    parser = build_parser()
    args = parser.parse_args(['certify', '--demo', 'planar2', '--beta-cap-share', '0.3',
                              '--velocity-headroom', '0.15'])
    settings = certify_settings(args)
    assert settings.beta_cap_share == 0.3
    assert settings.top_velocity_fraction == pytest.approx(0.85)
    default = certify_settings(parser.parse_args(['certify', '--demo', 'planar2']))
    assert (default.cap_share, default.gamma_share, default.velocity_headroom) == (0.05, 0.9, 0.1)
    predicted = replace(default, delay_predicted=True)
    assert (predicted.cap_share, predicted.gamma_share) == (0.2, 0.95)


@pytest.mark.parametrize('family', ['sqrt', 'parabola'])
def test_a_braking_family_without_a_scale_gets_the_automatic_eps(family: str) -> None:
    """--alpha1 sqrt/parabola alone: certification picks eps (the family is the only one
    tried); with --alpha1-scale the given eps; atan without a scale bends at 1."""
    from safety_filter.cli.certify import certify_settings
    from safety_filter.cli.main import build_parser
    from safety_filter.core.class_k import ClassK

    parser = build_parser()
    automatic = certify_settings(parser.parse_args(['certify', '--alpha1', family]))
    assert automatic.alpha1 is None and automatic.families == (family,)
    given = certify_settings(parser.parse_args(['certify', '--alpha1', family,
                                                '--alpha1-scale', '0.004']))
    assert given.alpha1 == ClassK(family, 0.004)
    bent = certify_settings(parser.parse_args(['certify', '--alpha1', 'atan']))
    assert bent.alpha1 == ClassK('atan', 1.0)


def test_the_delay_option_says_whether_the_filter_predicts_over_it() -> None:
    """--delay up-to (default): no prediction, the hold covers the delay too; --delay fixed:
    the filter predicts over the declared delay and the margin covers one hold."""
    from safety_filter.cli.certify import certify_settings
    from safety_filter.cli.main import build_parser

    parser = build_parser()
    assert certify_settings(parser.parse_args(['certify'])).delay_predicted is False
    fixed = replace(certify_settings(parser.parse_args(['certify', '--delay', 'fixed'])),
                    delay_periods=1)
    up_to = replace(certify_settings(parser.parse_args(
        ['certify', '--demo', 'planar2', '--delay', 'up-to'])), delay_periods=1)
    period = 1.0 / fixed.control_rate_hz
    assert (fixed.delay_predicted, up_to.delay_predicted) == (True, False)
    assert (fixed.prediction_s, fixed.hold_period_s) == (pytest.approx(period),
                                                         pytest.approx(period))
    assert (up_to.prediction_s, up_to.hold_period_s) == (0.0, pytest.approx(2 * period))
    with pytest.raises(SystemExit):
        parser.parse_args(['certify', '--demo', 'planar2', '--delay', 'sometimes'])


def test_sampling_factor_reaches_the_settings(capsys) -> None:
    from safety_filter.cli.certify import certify_settings
    from safety_filter.cli.main import build_parser

    parser = build_parser()
    args = parser.parse_args(['certify', '--demo', 'planar2', '--sampling-factor', '2'])
    settings = certify_settings(args)
    assert settings.sampling_factor == 2.0
    assert settings.hold_period_s == pytest.approx(2.0 / settings.control_rate_hz)
    default = certify_settings(parser.parse_args(['certify', '--demo', 'planar2']))
    assert default.sampling_factor == 1.0
    assert main(['certify', '--help']) == 0
    assert '--sampling-factor' in capsys.readouterr().out


@pytest.mark.parametrize('form, expected', [('auto', None), ('start', False), ('mean', True)])
def test_acceleration_form_reaches_the_settings(form: str, expected: bool | None) -> None:
    from safety_filter.cli.certify import certify_settings
    from safety_filter.cli.main import build_parser

    args = build_parser().parse_args(['certify', '--demo', 'planar2',
                                      '--acceleration-form', form])
    settings = certify_settings(args)
    assert settings.mean_over_hold is expected


@pytest.mark.parametrize('choice, expected', [('auto', None), ('on', True), ('off', False)])
def test_lookahead_reaches_the_settings(choice: str, expected: bool | None) -> None:
    from safety_filter.cli.certify import certify_settings
    from safety_filter.cli.main import build_parser

    args = build_parser().parse_args(['certify', '--demo', 'planar2', '--lookahead', choice])
    assert certify_settings(args).lookahead is expected
    default = build_parser().parse_args(['certify', '--demo', 'planar2'])
    assert certify_settings(default).lookahead is False


@pytest.mark.parametrize('options, expected', [
    ([], 0.6), (['--slow-box', '0.4'], 0.4), (['--slow-box', '0'], 0.0),
    (['--delay', 'fixed'], 0.0)])
def test_slow_box_reaches_the_settings(options: list[str], expected: float) -> None:
    from safety_filter.cli.certify import certify_settings
    from safety_filter.cli.main import build_parser

    args = build_parser().parse_args(['certify', '--demo', 'planar2', *options])
    assert certify_settings(args).slow_box_share == pytest.approx(expected)
