"""``safety-filter --version``: prints the package version and exits 0."""

from __future__ import annotations

import shutil
import subprocess
import sys
import xml.etree.ElementTree as ElementTree
from pathlib import Path

import pytest

from safety_filter._version import __version__
from safety_filter.cli.main import main
from safety_filter.errors import ExitCode

PACKAGE_XML = Path(__file__).resolve().parents[2] / 'package.xml'


def test_version_prints_the_package_version(capsys) -> None:
    assert main(['--version']) == ExitCode.OK
    captured = capsys.readouterr()
    assert captured.out.strip() == f'safety-filter {__version__}'
    # The released version, as the ROS package manifest states it (read with xml.etree).
    assert __version__ == ElementTree.parse(PACKAGE_XML).getroot().findtext('version')


def test_version_from_the_installed_command() -> None:
    command = shutil.which('safety-filter')
    if command is None:
        pytest.skip('the safety-filter console script is not on PATH')
    result = subprocess.run([command, '--version'], capture_output=True, text=True,
                            timeout=120, check=False)
    assert result.returncode == 0, result.stderr
    assert result.stdout.strip() == f'safety-filter {__version__}'


def test_version_with_python_dash_m() -> None:
    result = subprocess.run([sys.executable, '-m', 'safety_filter.cli.main', '--version'],
                            capture_output=True, text=True, timeout=120, check=False)
    assert result.returncode == 0, result.stderr
    assert result.stdout.strip().endswith(__version__)
