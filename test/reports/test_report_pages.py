"""The HTML reports as a person sees them: opened in headless Chromium.

Each report (certification, demo, replay, stress) is written by its command, run as a
subprocess (``command_runs.py``), and opened in Debian's Chromium over the DevTools
protocol (``browser_fixtures.py``). A page fails on a script exception, a console error, a
failed or remote request, a broken image or an empty page; a screenshot of each stays in
the test's ``tmp_path``. The replay report's time plots must zoom and pan: through their
script interface, and through mouse input as a person gives it (drag, Shift+drag,
Ctrl+wheel, double click, the moments tables' buttons). Without scripts and in print, the
static PNGs take their place.

The checks on the interactive data (the time axes, thinning of long trials, the encoding)
and on the vendored library need no browser.
"""

from __future__ import annotations

import base64
import hashlib
import html
import json
import re
from pathlib import Path
from typing import Any

import numpy as np
import pytest
from browser_fixtures import HeadlessChromium, chromium, image_statistics
from command_runs import certify_run, demo_run, replay_run, stress_run

from safety_filter.reports import html_kit, replay_report
from safety_filter.reports.replay_interactive import (
    INTERACTIVE_BUCKETS,
    INTERACTIVE_FULL_SAMPLES,
    MOMENT_WINDOW_S,
    _Line,
    _time_axis,
)

UPLOT_FILES = ('uPlot.iife.min.js', 'uPlot.min.css', 'LICENSE')
SHIFT, CTRL = 8, 2  # DevTools modifier bits


# ---------------------------------------------------------------------- without a browser
def test_the_vendored_plotting_library_is_the_recorded_release() -> None:
    folder = html_kit.UPLOT_DIR
    source = (folder / 'SOURCE.md').read_text(encoding='utf-8')
    for name in UPLOT_FILES:
        digest = hashlib.sha256((folder / name).read_bytes()).hexdigest()
        assert f'{digest}  {name}' in source, f'{name} differs from the copy SOURCE.md names'
    code = (folder / 'uPlot.iife.min.js').read_text(encoding='utf-8')
    assert f'(v{html_kit.UPLOT_VERSION})' in code.splitlines()[0]
    assert 'MIT License' in (folder / 'LICENSE').read_text(encoding='utf-8')
    assert '</script' not in code  # inlined as is


def test_lines_on_different_clocks_share_one_axis_with_breaks_at_their_gaps() -> None:
    states = np.array([0.0, 0.001, 0.002, 0.003, 0.010, 0.011])  # a gap after 0.003
    steps = np.array([0.0005, 0.0015, 0.0025])
    lines = [_Line('a', states, np.arange(6.0), '#000'), _Line('b', steps, [7.0, np.nan, 9.0],
                                                                '#000'),
             _Line('limit', None, 2.0, '#000')]
    axis, columns, thinned = _time_axis(lines, ())
    assert not thinned
    # Every time of both lines, and one break in the middle of a's gap.
    middle = states[3] + 0.5 * (states[4] - states[3])
    assert np.array_equal(axis, np.unique(np.concatenate([states, steps, [middle]])))
    a, b, limit = columns
    assert limit is None
    assert np.array_equal(a[np.searchsorted(axis, states)], np.arange(6.0))
    assert np.isnan(a[np.searchsorted(axis, middle)])  # a breaks across its gap
    assert np.all(np.isinf(a[np.searchsorted(axis, steps)]))  # no sample of a: drawn across
    assert b[np.searchsorted(axis, 0.0005)] == 7.0 and np.isnan(b[np.searchsorted(axis, 0.0015)])
    assert np.all(np.isinf(b[np.searchsorted(axis, states)]))


def test_a_long_trial_keeps_every_spike_and_full_resolution_around_its_moments() -> None:
    count = 3 * INTERACTIVE_FULL_SAMPLES
    t = np.arange(count) * 1e-3
    rng = np.random.default_rng(4)
    y = rng.normal(size=count)
    spikes = rng.choice(count, size=40, replace=False)
    y[spikes] = 100.0 + np.arange(40)
    moment = float(t[count // 3])
    axis, (column,), thinned = _time_axis([_Line('y', t, y, '#000')], [moment])
    assert thinned
    assert len(axis) <= 2 * INTERACTIVE_BUCKETS + 2 * MOMENT_WINDOW_S / 1e-3 + 10
    kept = np.searchsorted(t, axis)
    assert np.array_equal(t[kept], axis) and np.array_equal(y[kept], column)
    assert set(spikes) <= set(kept)  # every spike is some bucket's largest value
    near = np.flatnonzero(np.abs(t - moment) <= MOMENT_WINDOW_S)
    assert set(near) <= set(kept)


def _page_data(page: str) -> dict[str, Any]:
    match = re.search(r'<script type="application/json" id="sf-plot-data">(.*?)</script>',
                      page, re.S)
    assert match, 'no plot data in the page'
    return json.loads(match.group(1))


@pytest.mark.slow
def test_the_replay_page_carries_its_scripts_and_data_inline() -> None:
    folder = replay_run().output
    page = (folder / replay_report.REPORT_HTML).read_text(encoding='utf-8')
    assert not re.search(r'<(script|link|img)[^>]+(src|href)="(https?:)?//', page)
    assert '<script src' not in page
    assert 'Permission is hereby granted' in page  # uPlot's licence travels with its code
    data = _page_data(page)
    report = json.loads((folder / replay_report.REPORT_JSON).read_text(encoding='utf-8'))
    assert [f['id'] for f in data['figures']] == [
        'position', 'velocity', 'torque', 'intervention', 'margin', 'compare_intervention',
        'compare_margin']
    # The intervention series is the replay's, sample for sample (float32).
    chart = next(f for f in data['figures'] if f['id'] == 'intervention')['charts'][0]
    times = np.frombuffer(base64.b64decode(data['bases'][chart['base']]), '<f8')
    values = np.frombuffer(base64.b64decode(chart['series'][0]['values']), '<f4')
    largest = report['runs'][0]['moments']['largest_intervention'][0]
    k = int(np.argmin(np.abs(times - largest['at_rel_s'])))
    assert times[k] == pytest.approx(largest['at_rel_s'], abs=1e-9)
    assert values[k] == pytest.approx(largest['value'], rel=1e-6)
    assert np.nanmax(values[np.isfinite(values)]) == pytest.approx(largest['value'], rel=1e-6)
    for figure in data['figures']:  # every PNG of a time plot has its zoomable twin
        assert f'id="sf-live-{figure["id"]}"' in page
        assert f'src="{html.escape(figure["id"])}.png"' in page


# ---------------------------------------------------------------------- the browser
def test_the_page_checks_catch_broken_pages(tmp_path: Path) -> None:
    """The checks below could fail: a page with each fault is caught for each of them."""
    page = tmp_path / 'broken.html'
    page.write_text(
        '<!DOCTYPE html><html><body><h1>Broken</h1><p>short</p>'
        '<img src="missing.png" alt="missing">'
        '<script>console.error("reported failure");</script>'
        '<script>fetch("http://198.51.100.1/x").catch(() => null);</script>'
        '<script>undefinedFunction();</script></body></html>', encoding='utf-8')
    with chromium() as browser:
        visit = browser.open(page)
        browser.screenshot(tmp_path / 'broken.png')
    problems = '\n'.join(visit.problems())
    for expected in ('script exception: ReferenceError', 'console error: reported failure',
                     'network request: http://198.51.100.1/x', 'broken image: missing.png',
                     'page nearly empty'):
        assert expected in problems, problems


def _check_report(browser: HeadlessChromium, page: Path, tmp_path: Path, name: str,
                  min_images: int) -> None:
    visit = browser.open(page)
    shot = browser.full_page_screenshot(tmp_path / f'{name}.png')
    assert not visit.problems(), '\n'.join(visit.problems())
    assert visit.title.startswith('safety_filter')
    assert sum(i['loaded'] for i in visit.images) >= min_images, visit.images
    stats = image_statistics(shot)
    assert stats['height'] > 1000 and stats['non_white'] > 0.03 and stats['colours'] > 50, stats


@pytest.mark.slow
def test_the_certification_report_opens_cleanly(tmp_path: Path) -> None:
    page = certify_run().output / 'certificate_report.html'
    with chromium() as browser:
        _check_report(browser, page, tmp_path, 'certificate_report', min_images=5)


@pytest.mark.ros
@pytest.mark.slow
def test_the_demo_report_opens_cleanly(tmp_path: Path) -> None:
    page = demo_run().output / 'demo_report.html'
    with chromium() as browser:
        _check_report(browser, page, tmp_path, 'demo_report', min_images=6)


@pytest.mark.slow
def test_the_stress_report_opens_cleanly(tmp_path: Path) -> None:
    page = stress_run().output / 'stress_report.html'
    with chromium() as browser:
        _check_report(browser, page, tmp_path, 'stress_report', min_images=4)


@pytest.mark.slow
def test_the_replay_report_and_its_index_open_cleanly(tmp_path: Path) -> None:
    folder = replay_run().output
    with chromium() as browser:
        _check_report(browser, folder / replay_report.REPORT_HTML, tmp_path, 'replay_report',
                      min_images=8)
        # Every time plot drawn live (the PNGs hidden on screen), the solve-time one static.
        assert browser.evaluate('document.documentElement.classList.contains("sf-js")')
        charts = browser.evaluate('document.querySelectorAll(".sf-chart canvas").length')
        assert charts >= 2 + 2 + 2 + 4  # 2 joints x 3 figures + 4 single charts
        shown = browser.evaluate('Array.from(document.images).filter(i => '
                                 'i.getClientRects().length).map(i => i.getAttribute("src"))')
        assert shown == ['solve_time.png']
        visit = browser.open(folder.parent / replay_report.SUMMARY_HTML)
        assert not visit.problems(), visit.problems()


def _view(browser: HeadlessChromium) -> dict[str, float]:
    return browser.evaluate('safetyFilterPlots.view()')


def _assert_charts_follow(browser: HeadlessChromium, view: dict[str, float]) -> None:
    charts = browser.evaluate('safetyFilterPlots.chartViews()')
    assert len(charts) >= 10
    for chart in charts:
        assert chart['min'] == pytest.approx(view['min'], abs=1e-9), chart
        assert chart['max'] == pytest.approx(view['max'], abs=1e-9), chart
    section = browser.evaluate('[document.getElementById("sf-time-plots").dataset.viewMin, '
                               'document.getElementById("sf-time-plots").dataset.viewMax]')
    assert [float(x) for x in section] == pytest.approx([view['min'], view['max']], abs=1e-9)


@pytest.mark.slow
def test_zooming_the_replay_plots_to_50_ms_around_the_largest_intervention(
        tmp_path: Path) -> None:
    folder = replay_run().output
    report = json.loads((folder / replay_report.REPORT_JSON).read_text(encoding='utf-8'))
    moment = report['runs'][0]['moments']['largest_intervention'][0]['at_rel_s']
    with chromium() as browser:
        visit = browser.open(folder / replay_report.REPORT_HTML)
        assert not visit.problems(), visit.problems()
        whole = _view(browser)
        assert whole['min'] == pytest.approx(0.0, abs=1e-3)
        assert whole['max'] == pytest.approx(report['duration_s'], abs=2e-3)
        before = browser.element_screenshot('#sf-live-intervention',
                                            tmp_path / 'intervention_whole.png')
        shown = browser.evaluate(f'safetyFilterPlots.show({moment - 0.025!r}, '
                                 f'{moment + 0.025!r})')
        browser.settle()
        assert shown['max'] - shown['min'] == pytest.approx(0.05, abs=1e-9)
        assert shown['min'] <= moment <= shown['max']
        _assert_charts_follow(browser, shown)
        label = browser.evaluate('document.getElementById("sf-view-label").textContent')
        assert '(50.0 ms)' in label, label
        after = browser.element_screenshot('#sf-live-intervention',
                                           tmp_path / 'intervention_zoomed.png')
        stats = image_statistics(after)
        assert stats['non_white'] > 0.02 and stats['colours'] > 20, stats
        # The zoom changed what is drawn, not only the numbers.
        from matplotlib.image import imread

        old, new = imread(str(before)), imread(str(after))
        assert old.shape == new.shape
        assert np.mean(np.any(np.abs(old - new) > 0.05, axis=-1)) > 0.01
        browser.full_page_screenshot(tmp_path / 'replay_zoomed_page.png')


@pytest.mark.slow
def test_an_address_with_a_time_window_opens_the_plots_on_it() -> None:
    folder = replay_run().output
    with chromium() as browser:
        visit = browser.open(folder / replay_report.REPORT_HTML, fragment='t=0.61,0.66')
        assert not visit.problems(), visit.problems()
        view = _view(browser)
        assert view == pytest.approx({'min': 0.61, 'max': 0.66}, abs=1e-12)
        _assert_charts_follow(browser, view)
        # Outside the trial, the window is moved back inside it, keeping its width.
        browser.open(folder / replay_report.REPORT_HTML, fragment='t=-1,-0.9')
        assert _view(browser) == pytest.approx({'min': 0.0, 'max': 0.1}, abs=1e-9)


@pytest.mark.slow
def test_the_replay_plots_answer_the_mouse(tmp_path: Path) -> None:
    folder = replay_run().output
    with chromium(height=1100) as browser:
        browser.open(folder / replay_report.REPORT_HTML)
        browser.evaluate('document.getElementById("sf-live-intervention")'
                         '.scrollIntoView({block: "center"})')
        browser.settle()
        over = browser.rect('#sf-live-intervention .u-over')
        y = over['y'] + 0.5 * over['height']

        def time_at(x: float) -> float:
            whole = _view(browser)
            return whole['min'] + (x - over['x']) / over['width'] * (whole['max'] - whole['min'])

        # Drag across a span: the plots show that span.
        x0, x1 = over['x'] + 0.3 * over['width'], over['x'] + 0.5 * over['width']
        expected = (time_at(x0), time_at(x1))
        browser.drag((x0, y), (x1, y))
        browser.settle()
        dragged = _view(browser)
        width = expected[1] - expected[0]
        assert dragged['min'] == pytest.approx(expected[0], abs=0.02 * width)
        assert dragged['max'] == pytest.approx(expected[1], abs=0.02 * width)
        _assert_charts_follow(browser, dragged)
        # Shift+drag pans: the same width, moved back by the distance dragged.
        browser.drag((over['x'] + 0.6 * over['width'], y), (over['x'] + 0.4 * over['width'], y),
                     modifiers=SHIFT)
        browser.settle()
        panned = _view(browser)
        span = dragged['max'] - dragged['min']
        assert panned['max'] - panned['min'] == pytest.approx(span, rel=1e-6)
        assert panned['min'] - dragged['min'] == pytest.approx(0.2 * span, rel=0.05)
        _assert_charts_follow(browser, panned)
        # A plain wheel scrolls the page; Ctrl+wheel zooms in at the pointer.
        at = over['x'] + 0.25 * over['width']
        pointer_time = panned['min'] + 0.25 * span
        browser.wheel(at, y, -400, modifiers=CTRL)
        browser.settle()
        zoomed = _view(browser)
        assert zoomed['max'] - zoomed['min'] < 0.6 * span
        fraction = (pointer_time - zoomed['min']) / (zoomed['max'] - zoomed['min'])
        assert fraction == pytest.approx(0.25, abs=0.01)
        browser.screenshot(tmp_path / 'after_mouse.png')
        # Double click: the whole trial again.
        browser.double_click(at, y)
        browser.settle()
        assert _view(browser) == browser.evaluate('safetyFilterPlots.full')
        # A moment's button: 50 ms around it.
        moment = float(browser.evaluate('document.querySelector("button.sf-moment")'
                                        '.dataset.t'))
        browser.evaluate('document.querySelector("button.sf-moment").click()')
        browser.settle()
        view = _view(browser)
        assert view['max'] - view['min'] == pytest.approx(0.05, abs=1e-9)
        assert view['min'] <= moment <= view['max']


@pytest.mark.slow
def test_without_scripts_and_in_print_the_static_plots_show(tmp_path: Path) -> None:
    folder = replay_run().output
    page = folder / replay_report.REPORT_HTML
    with chromium() as browser:
        browser.call('Emulation.setEmulatedMedia', media='print')
        visit = browser.open(page)
        assert not visit.problems(), visit.problems()
        assert browser.evaluate('document.documentElement.classList.contains("sf-js")')
        assert all(i['shown'] and i['width'] > 100 for i in visit.images), visit.images
        assert browser.evaluate('Array.from(document.querySelectorAll(".sf-live, .sf-toolbar"))'
                                '.every(e => e.getClientRects().length === 0)')
    # A browser without scripts: the same page with its script elements left out (beside
    # the original, for the PNGs' relative paths).
    text = page.read_text(encoding='utf-8')
    bare = re.sub(r'<script\b.*?</script>', '', text, flags=re.S)
    assert '<script' not in bare and len(bare) < len(text)
    copy = folder / 'replay_report_without_scripts.html'
    copy.write_text(bare, encoding='utf-8')
    with chromium() as browser:
        visit = browser.open(copy)
        browser.full_page_screenshot(tmp_path / 'replay_without_scripts.png')
        assert not visit.problems(), visit.problems()
        assert len(visit.images) == 8
        assert all(i['shown'] and i['width'] > 100 for i in visit.images), visit.images
        assert browser.evaluate('document.querySelectorAll("button.sf-moment").length') > 0
        assert browser.evaluate('Array.from(document.querySelectorAll(".sf-js-only, .sf-live"))'
                                '.every(e => e.getClientRects().length === 0)')
