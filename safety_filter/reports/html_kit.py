"""What the HTML/JSON reports share: JSON conversion, the base style sheet, and the scripts a
page inlines (private)."""

from __future__ import annotations

import json
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


# ---------------------------------------------------------------------- inlined scripts
# Pages carry their scripts and data inline, so that a report works from its folder alone,
# offline, and keeps working when one HTML file is mailed or copied elsewhere.
ASSETS = Path(__file__).resolve().parent / 'report_assets'
UPLOT_DIR = ASSETS / 'uplot'
UPLOT_VERSION = '1.6.32'


def asset_text(relative: str) -> str:
    """The text of a file under ``safety_filter/report_assets``."""
    return (ASSETS / relative).read_text(encoding='utf-8')


def script_element(code: str) -> str:
    """``code`` as an inline ``<script>`` element.

    ``</script`` inside the code would end the element early; it is written as
    ``<\\/script``, which means the same inside JavaScript strings and regular expressions
    (the only places it can occur).
    """
    return '<script>' + code.replace('</script', '<\\/script') + '</script>'


def json_script_element(element_id: str, value: Any) -> str:
    """``value`` as an inline JSON data block ``<script type="application/json">``.

    ``</`` is written ``<\\/``, an escape JSON allows, so no text in the data can end the
    element.
    """
    text = json.dumps(value, allow_nan=False, separators=(',', ':')).replace('</', '<\\/')
    return f'<script type="application/json" id="{element_id}">{text}</script>'


def uplot_elements() -> tuple[str, str]:
    """The vendored uPlot plotting library as ``(style element, script element)``.

    uPlot is MIT-licensed; its licence text goes into the page as a comment ahead of the
    code, as the licence asks of copies (see ``report_assets/uplot/SOURCE.md``).
    """
    licence = (UPLOT_DIR / 'LICENSE').read_text(encoding='utf-8').strip()
    code = (UPLOT_DIR / 'uPlot.iife.min.js').read_text(encoding='utf-8')
    style = (UPLOT_DIR / 'uPlot.min.css').read_text(encoding='utf-8')
    header = (f'/* uPlot {UPLOT_VERSION}, included in this page under its licence:\n'
              + licence.replace('*/', '* /') + '\n*/\n')
    return f'<style>{style}</style>', script_element(header + code)
