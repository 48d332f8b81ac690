"""Reading the package's YAML files with errors that name the file (private)."""

from __future__ import annotations

from pathlib import Path
from typing import Any

import yaml


def read_yaml_file(path: str | Path, error: type[Exception], what: str) -> Any:
    """Parse a YAML file; a missing file or bad YAML raises ``error`` naming the file."""
    path = Path(path)
    if not path.is_file():
        raise error(f'{what} not found: {path}')
    try:
        return yaml.safe_load(path.read_text(encoding='utf-8'))
    except yaml.YAMLError as err:
        raise error(f'{path}: not valid YAML: {err}') from err
