"""What the HTML/JSON reports share: JSON conversion and the base style sheet (private)."""

from __future__ import annotations

import math
from pathlib import Path
from typing import Any

import numpy as np


def json_ready(value: Any) -> Any:
    """Plain JSON content: numpy to Python, paths to text, non-finite floats to None."""
    if isinstance(value, dict):
        return {str(k): json_ready(v) for k, v in value.items()}
    if isinstance(value, (list, tuple)):
        return [json_ready(v) for v in value]
    if isinstance(value, np.ndarray):
        return [json_ready(v) for v in value.tolist()]
    if isinstance(value, Path):
        return str(value)
    if isinstance(value, (np.bool_, bool)):
        return bool(value)
    if isinstance(value, (np.integer, int)):
        return int(value)
    if isinstance(value, (np.floating, float)):
        return float(value) if math.isfinite(float(value)) else None
    return value


BASE_CSS = """
body { font-family: -apple-system, 'Segoe UI', Helvetica, Arial, sans-serif; margin: 2em auto;
       max-width: 72em; padding: 0 1em; color: #1d1d1f; line-height: 1.45; }
h1 { font-size: 1.6em; margin-bottom: 0.2em; }
h2 { font-size: 1.25em; margin-top: 1.8em; border-bottom: 1px solid #ccc; }
.caution { background: #fff4e0; border-left: 5px solid #e08a00; padding: 0.6em 1em; }
table { border-collapse: collapse; margin: 0.8em 0; font-size: 0.92em; }
th, td { border: 1px solid #d0d0d0; padding: 0.25em 0.6em; }
th { background: #f0f2f5; }
td.num { text-align: right; font-variant-numeric: tabular-nums; }
figure img { max-width: 100%; border: 1px solid #ddd; }
"""
