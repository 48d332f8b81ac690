"""The one HTML/plot toolkit of the reports: page shell, style sheet, tables, figures, JSON.

Every report (certificate, demo, replay, stress) builds its page from these pieces, so the
pages look alike and escape alike:

* :data:`SAFETY_NOTICE`, shown on every page;
* :func:`page` (the HTML document around a body, with :data:`BASE_CSS` and the report's own
  style rules), :func:`table` (a header row and rows, numbers right-aligned),
  :func:`facts_table` (name/value pairs), :func:`figure_element` (a PNG with a caption),
  :func:`verdict_element`, :func:`number_text`, :func:`written_at`;
* :func:`new_figure` (a Matplotlib figure on the Agg canvas, object-oriented API only, so
  the caller's pyplot backend is left alone; Matplotlib is imported only then);
* :func:`json_ready` and :func:`write_json` (plain, strict JSON);
* the scripts and data a page inlines (:func:`script_element`, :func:`json_script_element`,
  :func:`uplot_elements`).
"""

from __future__ import annotations

import datetime as _dt
import html
import json
import math
from collections.abc import Sequence
from pathlib import Path
from typing import Any

import numpy as np

from safety_filter.safety_notice import SAFETY_NOTICE  # noqa: F401 (the reports' caution)


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
figure { margin: 0.8em 0; }
figcaption { font-size: 0.88em; color: #444; }
code { font-size: 0.95em; }
.verdict { font-size: 1.2em; font-weight: bold; padding: 0.5em 1em; border-radius: 4px; }
.pass { background: #e3f4e3; color: #14601a; }
.fail { background: #fbe4e4; color: #8a1010; }
.ok, td.ok { color: #14601a; font-weight: bold; }
.bad, td.bad { color: #8a1010; font-weight: bold; }
table.facts td:first-child { font-weight: bold; background: #f7f7f9; }
"""


# ---------------------------------------------------------------------- page pieces
def number_text(value: Any, digits: int = 4) -> str:
    """A number as the reports print it: ``digits`` significant digits, ``-`` for None,
    ``nan``/``inf`` as such; text is returned as it is."""
    if value is None:
        return '-'
    if isinstance(value, str):
        return value
    x = float(value)
    return f'{x:.{digits}g}' if math.isfinite(x) else str(x)


def written_at() -> str:
    """The time a report is written: UTC, ISO 8601 to the second."""
    return _dt.datetime.now(_dt.timezone.utc).isoformat(timespec='seconds')


def page(title: str, body: Sequence[str], css: str = '', head: Sequence[str] = ()) -> str:
    """A whole HTML document: ``title``, :data:`BASE_CSS` plus ``css`` (the report's own
    rules, after the base ones so that they win), extra ``head`` elements and the ``body``
    elements (HTML, joined by newlines)."""
    return '\n'.join(['<!DOCTYPE html>', '<html lang="en">', '<head>', '<meta charset="utf-8">',
                      f'<title>{html.escape(title)}</title>', f'<style>{BASE_CSS}{css}</style>',
                      *head, '</head>', '<body>', *body, '</body>', '</html>']) + '\n'


def table(header: Sequence[str], rows: Sequence[Sequence[Any]], digits: int = 4,
          css_class: str = '') -> str:
    """An HTML table: a header row, then one row per item of ``rows``.

    Numbers go in right-aligned cells with ``digits`` significant digits, None as ``-``,
    anything else as escaped text.
    """
    esc = html.escape
    head = '<tr>' + ''.join(f'<th>{esc(str(h))}</th>' for h in header) + '</tr>'
    body = []
    for row in rows:
        cells = []
        for value in row:
            if isinstance(value, (int, float, np.integer, np.floating)) \
                    and not isinstance(value, (bool, np.bool_)):
                cells.append(f'<td class="num">{esc(number_text(value, digits))}</td>')
            else:
                cells.append(f'<td>{esc("-" if value is None else str(value))}</td>')
        body.append('<tr>' + ''.join(cells) + '</tr>')
    opening = f'<table class="{css_class}">' if css_class else '<table>'
    return opening + head + ''.join(body) + '</table>'


def facts_table(pairs: Sequence[tuple[str, str]]) -> str:
    """A two-column table of ``(name, value)`` texts, the names in bold."""
    rows = ''.join(f'<tr><td>{html.escape(k)}</td><td>{html.escape(v)}</td></tr>'
                   for k, v in pairs)
    return f'<table class="facts">{rows}</table>'


def figure_element(src: str, caption: str, alt: str | None = None, css_class: str = '') -> str:
    """A PNG next to the page with its caption (``caption`` is plain text, escaped)."""
    esc = html.escape
    opening = f'<figure class="{css_class}">' if css_class else '<figure>'
    return (f'{opening}<img src="{esc(src)}" alt="{esc(src if alt is None else alt)}">'
            f'<figcaption>{esc(caption)}</figcaption></figure>')


def verdict_element(passed: bool, text: str) -> str:
    """The verdict line of a page, green when ``passed``, red otherwise."""
    return f'<p class="verdict {"pass" if passed else "fail"}">{html.escape(text)}</p>'


def caution_element() -> str:
    """The :data:`SAFETY_NOTICE` paragraph every page shows near its top."""
    return f'<p class="caution">{html.escape(SAFETY_NOTICE)}</p>'


def new_figure(width: float, height: float, dpi: int = 100) -> Any:
    """A Matplotlib figure on the Agg canvas (``figure.savefig`` writes a PNG)."""
    from matplotlib.backends.backend_agg import FigureCanvasAgg
    from matplotlib.figure import Figure

    figure = Figure(figsize=(width, height), dpi=dpi)
    FigureCanvasAgg(figure)
    return figure


def write_json(path: Path, data: Any, indent: int = 2) -> Path:
    """Write ``data`` as strict JSON (:func:`json_ready` first) with a final newline."""
    path.write_text(json.dumps(json_ready(data), indent=indent, allow_nan=False) + '\n',
                    encoding='utf-8')
    return path


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
