"""Open the HTML reports in a real browser: headless Chromium over the DevTools protocol.

Why this way. The reports are meant for a person with a browser, so the tests open them in
one: Debian's ``chromium`` package (``apt-get install chromium``; ``.ci/run`` installs it),
started headless with a throw-away profile, and driven over its DevTools protocol with the
small synchronous ``websocket-client`` package from PyPI. Browser automation frameworks
that download their own browser cannot work offline, and Chromium's one-shot command-line
modes (dump the DOM, take a screenshot) see neither console errors nor failed image loads,
and cannot act on the page between loading and the screenshot. The protocol gives all of
it: script exceptions and console errors as events, every request the page makes (so a
page that reaches for the network fails the test), expressions evaluated in the page, and
screenshots.

:func:`find_chromium` locates the browser, :class:`HeadlessChromium` runs one, and
:meth:`HeadlessChromium.open` loads a page and returns a :class:`PageVisit` with what went
wrong on it.
"""

from __future__ import annotations

import base64
import itertools
import json
import os
import shutil
import subprocess
import tempfile
import time
import urllib.request
from collections.abc import Iterator
from contextlib import contextmanager
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

import numpy as np
import pytest

CHROMIUM_NAMES = ('chromium', 'chromium-browser', 'google-chrome', 'google-chrome-stable')
INSTALL_HINT = ("install Debian's chromium (apt-get install chromium; .ci/run does) and "
                "pip install websocket-client (part of the package's test extra)")
# Schemes a report may load from: its own folder and inline data. Anything else (http,
# https, ws, ...) is a network fetch, which a report must not make.
LOCAL_SCHEMES = ('file:', 'data:', 'about:', 'blob:', 'chrome-error:')


def find_chromium() -> str | None:
    """Path of a Chromium executable (``$CHROMIUM`` first), or None."""
    explicit = os.environ.get('CHROMIUM')
    if explicit and Path(explicit).is_file():
        return explicit
    for name in CHROMIUM_NAMES:
        path = shutil.which(name)
        if path:
            return path
    return None


def require_browser() -> str:
    """The Chromium executable; skips the test, saying how to install what is missing."""
    pytest.importorskip('websocket', reason=f'websocket-client is missing: {INSTALL_HINT}')
    path = find_chromium()
    if path is None:
        pytest.skip(f'no Chromium found: {INSTALL_HINT}')
    return path


@dataclass
class PageVisit:
    """What happened while a page loaded and was inspected.

    Attributes:
        url: the page.
        exceptions: uncaught script exceptions (text with location).
        console_errors: ``console.error``/``console.assert`` calls and browser log entries
            of level error (failed resource loads among them).
        failed_requests: requests that failed (URL and reason).
        remote_requests: requests to anything but the page's folder or inline data.
        images: per ``<img>``: ``src``, ``loaded`` (complete with a non-zero natural size),
            ``shown`` (has a layout box: not hidden by the page), ``width`` and ``height``
            as laid out [CSS px].
        text_length: length of the page's visible text (None: not looked at).
        title: the document title.
    """

    url: str
    exceptions: list[str] = field(default_factory=list)
    console_errors: list[str] = field(default_factory=list)
    failed_requests: list[str] = field(default_factory=list)
    remote_requests: list[str] = field(default_factory=list)
    images: list[dict[str, Any]] = field(default_factory=list)
    text_length: int | None = None
    title: str = ''

    def problems(self) -> list[str]:
        """Every reason to call the page broken (empty when it is fine)."""
        found = [f'script exception: {e}' for e in self.exceptions]
        found += [f'console error: {e}' for e in self.console_errors]
        found += [f'failed request: {e}' for e in self.failed_requests]
        found += [f'network request: {e}' for e in self.remote_requests]
        found += [f'broken image: {i["src"]}' for i in self.images if not i['loaded']]
        # An image the page hides on purpose (display: none) has no layout box; one that
        # is shown must not collapse.
        found += [f'image laid out with no size: {i["src"]}' for i in self.images
                  if i['loaded'] and i['shown'] and (i['width'] < 2 or i['height'] < 2)]
        if self.text_length is not None and self.text_length < 200:
            found.append(f'page nearly empty: {self.text_length} characters of text')
        return found


class BrowserError(RuntimeError):
    """The browser did not start, answer or load a page in time."""


class HeadlessChromium:
    """A headless Chromium with a fresh profile, driven over the DevTools protocol.

    Use as a context manager; the browser process (started here) is stopped on exit.

    Args:
        executable: the Chromium binary.
        width, height: the viewport [CSS px].
        timeout_s: how long to wait for the browser, a page load or an answer.
    """

    def __init__(self, executable: str, width: int = 1280, height: int = 900,
                 timeout_s: float = 60.0) -> None:
        self.executable = executable
        self.width = width
        self.height = height
        self.timeout_s = timeout_s
        self._ids = itertools.count(1)
        self._events: list[dict[str, Any]] = []
        self._process: subprocess.Popen[bytes] | None = None
        self._socket: Any = None
        self._profile = Path(tempfile.mkdtemp(prefix='safety_filter_chromium_'))

    # ------------------------------------------------------------------ process
    def __enter__(self) -> HeadlessChromium:
        self.start()
        return self

    def __exit__(self, *exc: object) -> None:
        self.close()

    def start(self) -> None:
        """Start the browser and connect to its page."""
        import websocket

        command = [
            self.executable, '--headless', '--remote-debugging-port=0',
            f'--user-data-dir={self._profile}', f'--window-size={self.width},{self.height}',
            '--no-first-run', '--no-default-browser-check', '--disable-extensions',
            '--disable-background-networking', '--disable-component-update', '--disable-sync',
            '--disable-default-apps', '--mute-audio', '--hide-scrollbars',
            # /dev/shm is small in containers; the renderer would crash on large pages.
            '--disable-dev-shm-usage',
            # Software rendering: the same pixels with or without a GPU.
            '--disable-gpu', '--force-device-scale-factor=1',
            'about:blank',
        ]
        if hasattr(os, 'geteuid') and os.geteuid() == 0:
            # Chromium refuses to start as root with its sandbox (CI containers run as root).
            command.insert(1, '--no-sandbox')
        log = open(self._profile / 'chromium.log', 'wb')  # noqa: SIM115 - closed in close()
        self._log = log
        self._process = subprocess.Popen(command, stdout=log, stderr=subprocess.STDOUT,
                                         stdin=subprocess.DEVNULL)
        port_file = self._profile / 'DevToolsActivePort'
        deadline = time.monotonic() + self.timeout_s
        while not (port_file.is_file() and port_file.read_text().strip()):
            if self._process.poll() is not None or time.monotonic() > deadline:
                raise BrowserError(f'Chromium did not start: {self.browser_log()[-2000:]}')
            time.sleep(0.05)
        port = int(port_file.read_text().split()[0])
        pages = []
        while not pages:
            with urllib.request.urlopen(f'http://127.0.0.1:{port}/json/list',
                                        timeout=self.timeout_s) as answer:
                pages = [t for t in json.loads(answer.read()) if t.get('type') == 'page']
            if time.monotonic() > deadline:
                raise BrowserError('Chromium has no page to drive')
            time.sleep(0.05)
        self._socket = websocket.create_connection(
            pages[0]['webSocketDebuggerUrl'], timeout=self.timeout_s,
            suppress_origin=True)
        for domain in ('Page', 'Runtime', 'Log', 'Network'):
            self.call(f'{domain}.enable')
        self.call('Emulation.setDeviceMetricsOverride', width=self.width, height=self.height,
                  deviceScaleFactor=1, mobile=False)

    def close(self) -> None:
        """Disconnect and stop the browser (the process this object started)."""
        if self._socket is not None:
            try:
                self._socket.close()
            except Exception:  # noqa: BLE001 - closing a dead socket is fine
                pass
            self._socket = None
        if self._process is not None and self._process.poll() is None:
            self._process.terminate()
            try:
                self._process.wait(timeout=10)
            except subprocess.TimeoutExpired:
                self._process.kill()
                self._process.wait()
        if getattr(self, '_log', None) is not None:
            self._log.close()
        shutil.rmtree(self._profile, ignore_errors=True)

    def browser_log(self) -> str:
        """What the browser process wrote to its stdout and stderr so far."""
        path = self._profile / 'chromium.log'
        return path.read_text(errors='replace') if path.is_file() else ''

    # ------------------------------------------------------------------ protocol
    def call(self, method: str, **params: Any) -> dict[str, Any]:
        """Send one DevTools command and return its result (events seen meanwhile are kept)."""
        if self._socket is None:
            raise BrowserError('the browser is not running')
        ident = next(self._ids)
        self._socket.settimeout(self.timeout_s)
        self._socket.send(json.dumps({'id': ident, 'method': method, 'params': params}))
        deadline = time.monotonic() + self.timeout_s
        while time.monotonic() < deadline:
            message = json.loads(self._socket.recv())
            if message.get('id') == ident:
                if 'error' in message:
                    raise BrowserError(f'{method}: {message["error"]}')
                return message.get('result', {})
            if 'method' in message:
                self._events.append(message)
        raise BrowserError(f'{method}: no answer within {self.timeout_s} s')

    def evaluate(self, expression: str, await_promise: bool = False) -> Any:
        """The value of a JavaScript expression in the page (JSON-serialisable values)."""
        result = self.call('Runtime.evaluate', expression=expression, returnByValue=True,
                           awaitPromise=await_promise)
        if 'exceptionDetails' in result:
            details = result['exceptionDetails']
            text = details.get('exception', {}).get('description') or details.get('text')
            raise BrowserError(f'evaluating {expression[:80]!r}: {text}')
        return result.get('result', {}).get('value')

    def _wait_for_event(self, method: str) -> None:
        deadline = time.monotonic() + self.timeout_s
        while time.monotonic() < deadline:
            if any(e['method'] == method for e in self._events):
                return
            self._socket.settimeout(max(0.05, deadline - time.monotonic()))
            message = json.loads(self._socket.recv())
            if 'method' in message:
                self._events.append(message)
        raise BrowserError(f'no {method} within {self.timeout_s} s')

    def settle(self) -> None:
        """Wait until the page has drawn its current state (two animation frames)."""
        self.evaluate('new Promise(r => requestAnimationFrame(() => requestAnimationFrame('
                      '() => r(true))))', await_promise=True)

    # ------------------------------------------------------------------ pages
    def open(self, path: str | Path, fragment: str = '') -> PageVisit:
        """Load a local page (with ``#fragment`` when given), wait for its load event and
        inspect it."""
        url = Path(path).resolve().as_uri() + (f'#{fragment}' if fragment else '')
        # By way of an empty page: a new fragment on the page already shown would only
        # scroll it, without loading it again.
        self._events.clear()
        self.call('Page.navigate', url='about:blank')
        self._wait_for_event('Page.loadEventFired')
        self._events.clear()
        self.call('Page.navigate', url=url)
        self._wait_for_event('Page.loadEventFired')
        self.settle()
        visit = self.collect(url)
        visit.images = self.evaluate(
            'Array.from(document.images).map(i => ({src: i.getAttribute("src"), '
            'loaded: i.complete && i.naturalWidth > 0 && i.naturalHeight > 0, '
            'shown: i.getClientRects().length > 0, '
            'width: i.getBoundingClientRect().width, '
            'height: i.getBoundingClientRect().height}))') or []
        visit.text_length = int(self.evaluate('document.body ? document.body.innerText.trim()'
                                              '.length : 0') or 0)
        visit.title = str(self.evaluate('document.title') or '')
        return visit

    def collect(self, url: str = '') -> PageVisit:
        """The problems reported by the browser since the last :meth:`open`."""
        visit = PageVisit(url)
        for event in self._events:
            method, params = event['method'], event.get('params', {})
            if method == 'Runtime.exceptionThrown':
                details = params.get('exceptionDetails', {})
                text = details.get('exception', {}).get('description') or details.get('text')
                visit.exceptions.append(f'{text} at {details.get("url", "?")}:'
                                        f'{details.get("lineNumber", "?")}')
            elif method == 'Runtime.consoleAPICalled' and params.get('type') in (
                    'error', 'assert'):
                args = ' '.join(str(a.get('value', a.get('description', '')))
                                for a in params.get('args', []))
                visit.console_errors.append(args)
            elif method == 'Log.entryAdded' and params.get('entry', {}).get('level') == 'error':
                entry = params['entry']
                visit.console_errors.append(f'{entry.get("text")} ({entry.get("url", "")})')
            elif method == 'Network.requestWillBeSent':
                target = params.get('request', {}).get('url', '')
                if not target.startswith(LOCAL_SCHEMES):
                    visit.remote_requests.append(target)
            elif method == 'Network.loadingFailed':
                visit.failed_requests.append(f'{params.get("errorText")} '
                                             f'(request {params.get("requestId")})')
        return visit

    def mouse(self, kind: str, x: float, y: float, *, modifiers: int = 0,
              pressed: bool = False, clicks: int = 1) -> None:
        """One mouse event at viewport point ``(x, y)`` [CSS px]: ``kind`` is ``'press'``,
        ``'move'`` or ``'release'`` (left button); ``modifiers``: 2 Ctrl, 8 Shift."""
        types = {'press': 'mousePressed', 'move': 'mouseMoved', 'release': 'mouseReleased'}
        self.call('Input.dispatchMouseEvent', type=types[kind], x=x, y=y, button='left',
                  buttons=1 if pressed or kind == 'press' else 0, clickCount=clicks,
                  modifiers=modifiers)

    def drag(self, start: tuple[float, float], end: tuple[float, float], *,
             modifiers: int = 0, steps: int = 8) -> None:
        """Press the left button at ``start``, move to ``end`` in ``steps``, release."""
        self.mouse('move', *start, modifiers=modifiers)
        self.mouse('press', *start, modifiers=modifiers)
        for k in range(1, steps + 1):
            x = start[0] + (end[0] - start[0]) * k / steps
            y = start[1] + (end[1] - start[1]) * k / steps
            self.mouse('move', x, y, modifiers=modifiers, pressed=True)
        self.mouse('release', *end, modifiers=modifiers)

    def wheel(self, x: float, y: float, delta_y: float, *, modifiers: int = 0) -> None:
        """A mouse wheel turn at ``(x, y)``; negative ``delta_y`` turns away (zoom in)."""
        self.call('Input.dispatchMouseEvent', type='mouseWheel', x=x, y=y, deltaX=0,
                  deltaY=delta_y, modifiers=modifiers)

    def double_click(self, x: float, y: float) -> None:
        """A left double click at ``(x, y)``."""
        for clicks in (1, 2):
            self.mouse('press', x, y, clicks=clicks)
            self.mouse('release', x, y, clicks=clicks)

    def rect(self, selector: str) -> dict[str, float]:
        """The viewport rectangle (x, y, width, height) [CSS px] of the first element that
        matches ``selector``."""
        value = self.evaluate(
            f'(() => {{ const r = document.querySelector({json.dumps(selector)})'
            '.getBoundingClientRect(); return {x: r.x, y: r.y, width: r.width, '
            'height: r.height}; })()')
        return {key: float(value[key]) for key in ('x', 'y', 'width', 'height')}

    def element_screenshot(self, selector: str, path: str | Path) -> Path:
        """Save a PNG of the element that matches ``selector`` (scrolled into view)."""
        self.evaluate(f'document.querySelector({json.dumps(selector)})'
                      '.scrollIntoView({block: "center"})')
        self.settle()
        box = self.rect(selector)
        scroll = self.evaluate('({x: window.scrollX, y: window.scrollY})')
        return self.screenshot(path, {'x': box['x'] + scroll['x'], 'y': box['y'] + scroll['y'],
                                      'width': box['width'], 'height': box['height']})

    def screenshot(self, path: str | Path, clip: dict[str, float] | None = None) -> Path:
        """Save a PNG of the viewport (or of ``clip``: x, y, width, height in page px)."""
        params: dict[str, Any] = {'format': 'png'}
        if clip is not None:
            params['clip'] = {**clip, 'scale': 1}
            params['captureBeyondViewport'] = True
        data = self.call('Page.captureScreenshot', **params)['data']
        path = Path(path)
        path.write_bytes(base64.b64decode(data))
        return path

    def full_page_screenshot(self, path: str | Path, max_height: int = 12_000) -> Path:
        """Save a PNG of the whole page (up to ``max_height`` px tall)."""
        height = int(self.evaluate('Math.ceil(document.documentElement.scrollHeight)') or 0)
        height = max(1, min(height, max_height))
        return self.screenshot(path, {'x': 0, 'y': 0, 'width': self.width, 'height': height})


@contextmanager
def chromium(width: int = 1280, height: int = 900) -> Iterator[HeadlessChromium]:
    """A started :class:`HeadlessChromium` (skips the test when none can be had)."""
    executable = require_browser()
    browser = HeadlessChromium(executable, width, height)
    try:
        browser.start()
    except (BrowserError, OSError) as err:
        browser.close()
        pytest.fail(f'Chromium ({executable}) is installed but did not start: {err}')
    try:
        yield browser
    finally:
        browser.close()


def image_statistics(path: str | Path) -> dict[str, float]:
    """How much a PNG shows: its size, the share of pixels that are not (near) white, and
    the number of distinct colours (a blank or single-colour screenshot has one or two)."""
    from matplotlib.image import imread

    pixels = np.asarray(imread(str(path)))
    rgb = pixels[..., :3].astype(float)
    if rgb.max() > 1.0:  # 8-bit integers rather than floats in [0, 1]
        rgb = rgb / 255.0
    non_white = float(np.mean(np.any(rgb < 0.94, axis=-1)))
    quantised = np.round(rgb.reshape(-1, 3) * 31).astype(np.int64)
    colours = len(np.unique(quantised[:, 0] * 1024 + quantised[:, 1] * 32 + quantised[:, 2]))
    return {'height': float(pixels.shape[0]), 'width': float(pixels.shape[1]),
            'non_white': non_white, 'colours': float(colours)}
