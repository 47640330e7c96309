"""Browser tests of the dashboard: one `quietlayer serve` and one headless
Chromium per run, a fresh page per test.

The server, browser and page helpers are plain functions and classes as well
as fixtures, so the page benchmark (tests/bench/bench_page.py) drives the page
exactly as the tests do.
"""

from __future__ import annotations

import math
import os
import re
import socket
import subprocess
import sys
import time
import urllib.error
import urllib.request
from pathlib import Path

import pytest

try:
    from playwright.sync_api import Error as PlaywrightError
    from playwright.sync_api import sync_playwright
except ImportError:  # reported by pytest_runtest_call, so the tests fail instead of vanishing
    PlaywrightError = Exception
    sync_playwright = None

CHROMIUM = os.environ.get("QUIETLAYER_CHROMIUM", "/usr/bin/chromium")
CHROMIUM_ARGS = ["--headless", "--no-sandbox", "--disable-gpu", "--disable-background-networking",
                 "--disable-component-update", "--no-first-run"]
VIEWPORT = {"width": 1366, "height": 768}
SERVER_START_S = 180.0  # a cold numba cache compiles for about a minute before the first page
RESULT_S = 60.0  # one run plus the redraw of every figure, with slack for a loaded machine
LATE_S = 120.0  # the 20,000-step late-time check runs after the first result
DB_TEXT = re.compile(r"^\s*(-?\d+(?:\.\d+)?)\s*dB\s*$")
SIDE_NAMES = ("left", "right", "bottom", "top")
REPO = Path(__file__).resolve().parents[2]

# The live spectrum figure's curves.  Bokeh keeps replaced models in
# all_models, so only models reachable from the document's roots count.
SPECTRUM_JS = """() => {
  const doc = window.Bokeh.documents[0];
  const live = new Set();
  for (const root of doc.roots()) for (const m of root.references()) live.add(m);
  const figures = [...live].filter(m => m.title != null && typeof m.title === "object" &&
      String(m.title.text).startsWith("reflection spectrum") && Array.isArray(m.renderers));
  return figures.map(f => f.renderers.filter(r => r.data_source && r.data_source.data).map(r => {
    const data = r.data_source.data;
    const entries = data instanceof Map ? [...data.entries()] : Object.entries(data);
    return Object.fromEntries(entries.map(([k, v]) => [k, Array.from(v, Number)]));
  }));
}"""

# The time scrubber as the server's model has it, and as the browser draws it.
PLAYER_JS = """() => {
  const doc = window.Bokeh.documents[0];
  const live = new Set();
  for (const root of doc.roots()) for (const m of root.references()) live.add(m);
  const player = [...live].find(m => m.type === "panel.models.widgets.Player");
  const titles = [...live].filter(m => m.title != null && typeof m.title === "object" &&
      Array.isArray(m.renderers)).map(m => String(m.title.text));
  return {model: player ? {start: player.start, end: player.end, value: player.value} : null, titles};
}"""

# The live figure whose title starts with a given text: each renderer's data
# (columns as arrays of numbers or texts) and where a data point lies on the
# screen.  Views are walked from the document's root views, so only the
# figure on display is found.
FIGURE_VIEW_JS = """
function liveFigureViews(prefix) {
  const found = [], seen = new Set();
  const walk = (view) => {
    if (!view || seen.has(view)) return;
    seen.add(view);
    const m = view.model;
    if (m && m.title != null && typeof m.title === "object" && String(m.title.text).startsWith(prefix) &&
        view.frame) found.push(view);
    const children = view.child_views;
    if (children && children[Symbol.iterator]) for (const child of children) walk(child);
  };
  for (const root of Object.values(window.Bokeh.index)) walk(root);
  return found;
}"""
FIGURE_DATA_JS = "(prefix) => {" + FIGURE_VIEW_JS + """
  return liveFigureViews(prefix).map(view => view.model.renderers
    .filter(r => r.data_source && r.data_source.data).map(r => {
      const data = r.data_source.data;
      const entries = data instanceof Map ? [...data.entries()] : Object.entries(data);
      return Object.fromEntries(entries.map(([k, v]) =>
        [k, Array.from(v, x => (typeof x === "string" ? x : Number(x)))]));
    }));
}"""
FIGURE_POINT_JS = "([prefix, x, y]) => {" + FIGURE_VIEW_JS + """
  const view = liveFigureViews(prefix)[0];
  if (!view) return null;
  view.el.scrollIntoView({block: "center"});
  const box = view.el.getBoundingClientRect();
  return {x: box.left + view.frame.x_scale.compute(x), y: box.top + view.frame.y_scale.compute(y)};
}"""

# Panel's Markdown pane draws its text inside the element's own shadow root.
SHADOW_TEXT_JS = "e => (e.shadowRoot ? e.shadowRoot.textContent : e.textContent)"


def pytest_configure(config):
    config.addinivalue_line("markers", "browser: drives the dashboard in headless Chromium (needs playwright)")


@pytest.hookimpl(tryfirst=True)
def pytest_runtest_call(item):
    # a missing browser is a failure of each test, not a skip and not a setup error:
    # CI installs Chromium and playwright, so their absence must turn the run red
    if item.get_closest_marker("browser") is not None:
        problem = browser_problem()
        if problem:
            pytest.fail(problem, pytrace=False)


# --- the server ---------------------------------------------------------------

def free_port() -> int:
    with socket.socket() as probe:
        probe.bind(("127.0.0.1", 0))
        return probe.getsockname()[1]


class Server:
    """`quietlayer serve` in a subprocess with its own reference cache directory."""

    def __init__(self, workdir: Path):
        self.workdir = Path(workdir)
        self.log_path = self.workdir / "server.log"
        self.proc: subprocess.Popen | None = None
        self.url = ""

    def start(self, timeout: float = SERVER_START_S) -> str:
        port = free_port()
        self.url = f"http://127.0.0.1:{port}/"
        env = dict(os.environ, QUIETLAYER_CACHE_DIR=str(self.workdir / "cache"), PYTHONUNBUFFERED="1")
        with open(self.log_path, "wb") as log:
            self.proc = subprocess.Popen(
                [sys.executable, "-m", "quietlayer.app.cli", "serve", "--port", str(port), "--no-show"],
                stdout=log, stderr=subprocess.STDOUT, stdin=subprocess.DEVNULL, env=env, cwd=self.workdir)
        # no proxy: an http_proxy in the environment must not see loopback traffic
        opener = urllib.request.build_opener(urllib.request.ProxyHandler({}))
        deadline = time.monotonic() + timeout
        while True:
            if self.proc.poll() is not None:
                raise RuntimeError(f"quietlayer serve exited with code {self.proc.returncode} before "
                                   f"answering on {self.url}; its output:\n{self.output()}")
            try:
                with opener.open(self.url, timeout=10) as response:
                    if response.status == 200:
                        return self.url
            except (urllib.error.URLError, OSError):
                pass
            if time.monotonic() > deadline:
                self.stop()
                raise RuntimeError(f"quietlayer serve gave no HTTP 200 on {self.url} within {timeout:.0f} s; "
                                   f"its output:\n{self.output()}")
            time.sleep(0.5)

    def stop(self) -> None:
        if self.proc is None or self.proc.poll() is not None:
            return
        self.proc.terminate()
        try:
            self.proc.wait(timeout=15)
        except subprocess.TimeoutExpired:
            self.proc.kill()
            self.proc.wait(timeout=15)

    def output(self, lines: int = 40) -> str:
        try:
            text = self.log_path.read_text("utf-8", errors="replace")
        except OSError:
            return "(no output)"
        return "\n".join(text.splitlines()[-lines:]) or "(no output)"


# --- the browser ----------------------------------------------------------------

def browser_problem() -> str | None:
    """Why the browser tests cannot run here, or None."""
    if sync_playwright is None:
        return ("the browser tests need the `playwright` Python package (pip install playwright); "
                "they drive the system Chromium, so `playwright install` is not needed")
    if not Path(CHROMIUM).exists():
        return (f"the browser tests need Chromium at {CHROMIUM} (apt-get install chromium, "
                "or point QUIETLAYER_CHROMIUM at another build)")
    return None


def launch_browser(playwright):
    return playwright.chromium.launch(executable_path=CHROMIUM, args=CHROMIUM_ARGS)


def new_context(browser, server_url: str):
    """A context with the test viewport that lets nothing past the local server.
    Returns (context, list of the addresses it refused)."""
    refused: list[str] = []
    origin = server_url.rstrip("/")

    def only_local(route):
        url = route.request.url
        if url == origin or url.startswith(origin + "/"):
            route.continue_()
        else:
            refused.append(url)
            route.abort()

    context = browser.new_context(viewport=VIEWPORT, accept_downloads=True)
    context.route("**/*", only_local)
    return context, refused


# --- reading and driving the page -------------------------------------------------

def parse_db(text: str | None) -> float:
    """'-40.6 dB' -> -40.6; anything else (the page's '– dB' for no value) -> nan."""
    match = DB_TEXT.match(text or "")
    return float(match.group(1)) if match else math.nan


class Dashboard:
    """One open dashboard page, read and driven the way a user sees it."""

    def __init__(self, page, url: str, refused: list[str] | None = None):
        self.page = page
        self.url = url
        self.refused = refused if refused is not None else []

    # navigation and waiting
    def open(self, url: str | None = None, settle: bool = True) -> float:
        """Load the page and wait for finite headline figures (and, with `settle`,
        for the figures under them); seconds from navigation to the headline."""
        started = time.perf_counter()
        self.page.goto(url or self.url)
        self.wait_first_result()
        seconds = time.perf_counter() - started
        if settle:
            self.wait_idle()
            self.wait_figures()
        return seconds

    def wait_figures(self, timeout: float = RESULT_S) -> None:
        """The figures follow the headline one by one: wait for the spectrum and both field images."""
        def ready():
            titles = self.figure_titles()
            images = [t for t in titles if t.startswith(("total field", "reflected only"))]
            return len(self.page.evaluate(SPECTRUM_JS)), len(images)
        self.wait_for("the spectrum and both field images", ready, lambda v: v == (1, 2), timeout)

    def wait_for(self, what: str, read, ok, timeout: float = RESULT_S, poll_ms: float = 40):
        deadline = time.monotonic() + timeout
        while True:
            value = read()
            if ok(value):
                return value
            if time.monotonic() > deadline:
                raise AssertionError(f"waited {timeout:.0f} s for {what}; last seen {value!r}")
            self.page.wait_for_timeout(poll_ms)

    def wait_first_result(self, timeout: float = RESULT_S) -> str:
        self.wait_for("finite headline figures", lambda: (self.card("worst"), self.card("global")),
                      lambda v: all(math.isfinite(parse_db(t)) for t in v), timeout)
        return self.card("worst")

    def wait_card_change(self, key: str, before: str | None, timeout: float = RESULT_S, poll_ms: float = 40) -> str:
        """Wait until card `key` shows a finite figure other than `before`."""
        return self.wait_for(f"the {key!r} card to change from {before!r}", lambda: self.card(key),
                             lambda t: t is not None and t != before and math.isfinite(parse_db(t)),
                             timeout, poll_ms)

    def busy(self) -> bool:
        return self.page.locator(".loader.spin").count() > 0

    def wait_idle(self, timeout: float = RESULT_S) -> None:
        self.wait_for("the run spinner to stop", self.busy, lambda b: not b, timeout)

    # headline
    def card(self, key: str) -> str | None:
        """Text of the headline card `key`, or None while it is not on the page."""
        found = self.page.locator(f'[data-value="{key}"]')
        if found.count() == 0:
            return None
        try:
            return (found.first.text_content(timeout=2000) or "").strip()
        except PlaywrightError:  # replaced between the count and the read
            return None

    def db(self, key: str) -> float:
        return parse_db(self.card(key))

    def alert(self) -> str | None:
        """The danger message, or None while it is hidden."""
        box = self.page.locator(".alert-danger")
        if box.count() == 0 or not box.first.is_visible():
            return None
        return " ".join(box.first.evaluate(SHADOW_TEXT_JS).split())

    def text_of(self, pattern: str) -> str:
        """Text of the first element whose text matches `pattern` (a regular expression)."""
        return " ".join((self.page.get_by_text(re.compile(pattern)).first.text_content(timeout=5000)).split())

    # controls
    def slider_handle(self, title: str):
        titled = self.page.locator(".bk-slider-title", has_text=re.compile("^" + re.escape(title) + ":"))
        return self.page.locator(".bk-input-group").filter(has=titled).locator(".noUi-handle")

    def slider_value(self, title: str) -> float:
        return float(self.slider_handle(title).get_attribute("aria-valuenow", timeout=5000))

    def press_slider(self, title: str, key: str, times: int = 1) -> None:
        """Move a slider with the keyboard, as a user would after clicking its handle."""
        handle = self.slider_handle(title)
        handle.focus()
        for _ in range(times):
            handle.press(key)

    def move_slider(self, title: str, key: str, times: int = 1) -> str:
        """Step a slider and wait until its result is drawn; the new worst peak error."""
        before = self.card("worst")
        self.press_slider(title, key, times)
        self.wait_card_change("worst", before)
        self.settle()
        return self.card("worst")

    def settle(self, quiet_s: float = 0.8, timeout: float = RESULT_S) -> None:
        """Wait until no run is going and the headline has not changed for quiet_s:
        key presses that arrive one by one can start a second run after the first."""
        deadline = time.monotonic() + timeout
        last, since = None, time.monotonic()
        while time.monotonic() < deadline:
            now = (self.busy(), self.card("worst"), self.card("global"))
            if now != last:
                last, since = now, time.monotonic()
            elif not now[0] and time.monotonic() - since >= quiet_s:
                return
            self.page.wait_for_timeout(50)
        raise AssertionError(f"the page did not settle within {timeout:.0f} s; last seen {last!r}")

    def active_sides(self) -> list[str]:
        active = self.page.locator(".bk-btn-group .bk-btn.bk-active")
        return [t.strip() for t in active.all_text_contents() if t.strip() in SIDE_NAMES]

    def open_card(self, title: str) -> None:
        self.page.locator(".card-header", has_text=title).first.click()

    def download(self, label: str) -> str:
        with self.page.expect_download(timeout=30_000) as info:
            self.page.get_by_role("button", name=label).click()
        return Path(info.value.path()).read_text("utf-8")

    # figures
    def spectrum(self) -> list[dict[str, list[float]]]:
        """Data of every curve of the live spectrum figure."""
        figures = self.page.evaluate(SPECTRUM_JS)
        assert len(figures) == 1, f"expected one live spectrum figure, found {len(figures)}"
        return figures[0]

    def figure_titles(self) -> list[str]:
        return self.page.evaluate(PLAYER_JS)["titles"]

    def scrubber(self):
        return self.page.locator(".bk-panel-models-widgets-Player input[type=range]")

    def scrubber_state(self) -> dict:
        """{'model': start/end/value on the server's side, 'drawn': min/max/value of the range input}."""
        state = self.page.evaluate(PLAYER_JS)
        state["drawn"] = self.scrubber().evaluate(
            "e => ({start: Number(e.min), end: Number(e.max), value: Number(e.value)})")
        return state

    def figure_data(self, title_prefix: str) -> list[list[dict]]:
        """Per live figure whose title starts with `title_prefix`: each renderer's data columns."""
        return self.page.evaluate(FIGURE_DATA_JS, title_prefix)

    def click_figure(self, title_prefix: str, x: float, y: float) -> None:
        """Click the live figure at data coordinates (x, y), as a user would."""
        where = self.page.evaluate(FIGURE_POINT_JS, [title_prefix, x, y])
        assert where is not None, f"no live figure titled {title_prefix!r}…"
        self.page.mouse.click(where["x"], where["y"])

    def open_tab(self, title: str) -> None:
        self.page.locator(".bk-tab", has_text=title).first.click()

    def href(self) -> str:
        # page.url trails history.replaceState by one change; the address bar does not
        return self.page.evaluate("() => window.location.href")


# --- fixtures ---------------------------------------------------------------------

@pytest.fixture(scope="session")
def browser():
    if browser_problem():
        yield None  # pytest_runtest_call fails the test with the reason
        return
    with sync_playwright() as playwright:
        chromium = launch_browser(playwright)
        yield chromium
        chromium.close()


@pytest.fixture(scope="session")
def server_url(browser, tmp_path_factory):
    # after `browser`, so a missing browser fails at once rather than after the server start
    if browser is None:
        yield None
        return
    server = Server(tmp_path_factory.mktemp("quietlayer-serve"))
    try:
        url = server.start()
    except RuntimeError as exc:
        pytest.fail(str(exc), pytrace=False)
    yield url
    server.stop()


@pytest.fixture
def open_dashboard(browser, server_url):
    """Factory: a Dashboard on a page in its own browser context (closed after the test)."""
    contexts = []

    def make() -> Dashboard | None:
        if browser is None:
            return None
        context, refused = new_context(browser, server_url)
        contexts.append(context)
        return Dashboard(context.new_page(), server_url, refused)

    yield make
    for context in contexts:
        context.close()


@pytest.fixture
def dashboard(open_dashboard) -> Dashboard:
    return open_dashboard()


@pytest.fixture
def page(dashboard):
    return dashboard.page if dashboard is not None else None


@pytest.fixture(scope="session")
def logged_server(browser, tmp_path_factory):
    """A server of its own whose log a test reads (many visitors, hostile links)."""
    if browser is None:
        yield None
        return
    server = Server(tmp_path_factory.mktemp("quietlayer-serve-logged"))
    try:
        server.start()
    except RuntimeError as exc:
        pytest.fail(str(exc), pytrace=False)
    yield server
    server.stop()


LOG_TROUBLE = re.compile(r"Traceback|\bERROR\b|Exception|exception was never retrieved")


def log_trouble(server: Server, since: int = 0) -> list[str]:
    """Lines of the server's log from byte `since` on that report an error."""
    text = server.log_path.read_bytes()[since:].decode("utf-8", errors="replace")
    return [line for line in text.splitlines() if LOG_TROUBLE.search(line)]
