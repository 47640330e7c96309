"""Time the served page as a user feels it, run by hand:

    python tests/bench/bench_page.py

Starts `quietlayer serve` on a free port with an empty reference cache (its
start-up, which may compile the kernels, is not timed) and opens the page in
headless Chromium, the same way as the browser tests (tests/browser/conftest.py).
- first page: from navigation to the first finite headline figures;
- slider: 20 keyboard steps of the grading-order slider, back and forth
  between two values whose worst peak error differs, each timed from the key
  press until the worst-peak-error card shows the new figure (headline), and
  until the spectrum figure holds the new curves (figures: the page sends the
  spectrum's data last);
- drag: the grading-order handle dragged with the mouse across its track for
  about three seconds; the page itself counts how often the headline changes
  meanwhile (updates per second of dragging);
- problem change: a second server with no reference cache at all
  (QUIETLAYER_REFERENCE_CACHE=off), host eps_r 1 -> 1.1 -> 1 -> ..., each
  change timed until the headline changes: every one computes a new reference.
Last line: slider_to_update_s=… figures_s=… problem_change_s=… drag_updates_per_s=…
(medians; drag: over the whole drag).
"""

from __future__ import annotations

import os
import statistics
import sys
import tempfile
import time
from pathlib import Path

import browser_helpers  # beside this script

CHANGES = 20
PROBLEM_CHANGES = 6
SLIDER = "Grading order m"
POLL_MS = 10  # finer than the tests: this is the figure being measured
DRAG_S = 3.0

# Counts, inside the page, every change of the worst-peak-error card's text:
# polling from the test would take turns with the mouse moves.
WATCH_JS = """() => {
  const find = (root) => {
    const hit = root.querySelector('[data-value="worst"]');
    if (hit) return hit;
    for (const el of root.querySelectorAll('*')) {
      if (el.shadowRoot) { const deep = find(el.shadowRoot); if (deep) return deep; }
    }
    return null;
  };
  window.__qlChanges = [];
  let last = null, root = null;
  window.__qlWatch = setInterval(() => {
    if (!root || !root.isConnected) { const el = find(document); root = el ? el.getRootNode() : null; }
    const el = root ? root.querySelector('[data-value="worst"]') : null;
    const text = el ? el.textContent : null;
    if (text !== null && text !== last) { if (last !== null) window.__qlChanges.push(performance.now()); last = text; }
  }, 5);
}"""


def _keys_that_change(dash, before: str) -> int:
    """Arrow steps up from the start that change the worst peak error (usually one)."""
    for steps in range(1, 6):
        dash.press_slider(SLIDER, "ArrowRight")
        try:
            dash.wait_card_change("worst", before, timeout=20)
        except AssertionError:
            continue
        dash.settle()
        return steps
    raise SystemExit(f"five steps of {SLIDER!r} did not change the worst peak error")


def slider_changes(dash, helpers) -> tuple[list[float], list[float]]:
    steps = _keys_that_change(dash, dash.card("worst"))
    headline, figures = [], []
    for n in range(CHANGES):
        key = "ArrowLeft" if n % 2 == 0 else "ArrowRight"
        before, curves = dash.card("worst"), dash.spectrum()
        dash.page.wait_for_timeout(300)  # let the last redraw's messages settle
        t0 = time.perf_counter()
        dash.press_slider(SLIDER, key, steps)
        after = dash.wait_card_change("worst", before, poll_ms=POLL_MS)
        headline.append(time.perf_counter() - t0)
        dash.wait_for("the spectrum to change", dash.spectrum, lambda c: c != curves, poll_ms=POLL_MS)
        figures.append(time.perf_counter() - t0)
        dash.settle(quiet_s=0.3)
        print(f"change {n + 1:2d}: m = {dash.slider_value(SLIDER):g}  {before} -> {after}  "
              f"headline {headline[-1]:.3f} s, figures {figures[-1]:.3f} s")
    return headline, figures


def drag_rate(dash) -> float:
    """Headline changes per second while the grading-order handle is dragged."""
    handle = dash.slider_handle(SLIDER)
    handle.scroll_into_view_if_needed()
    track = dash.page.locator(".bk-input-group").filter(has=dash.page.locator(
        ".bk-slider-title", has_text=SLIDER)).locator(".noUi-target").first.bounding_box()
    box = handle.bounding_box()
    y = box["y"] + box["height"] / 2
    x_from, x_to = track["x"] + 0.15 * track["width"], track["x"] + 0.85 * track["width"]
    dash.page.evaluate(WATCH_JS)
    mouse = dash.page.mouse
    mouse.move(box["x"] + box["width"] / 2, y)
    mouse.down()
    mouse.move(x_from, y, steps=5)
    moves = 60
    started = dash.page.evaluate("() => performance.now()")
    for k in range(moves + 1):  # there and back, at an even pace
        frac = 2 * k / moves if k <= moves // 2 else 2 - 2 * k / moves
        mouse.move(x_from + frac * (x_to - x_from), y)
        dash.page.wait_for_timeout(DRAG_S * 1000 / moves)
    ended = dash.page.evaluate("() => performance.now()")
    mouse.up()
    changes = dash.page.evaluate("() => window.__qlChanges")
    during = [t for t in changes if started <= t <= ended]
    seconds = (ended - started) / 1000
    print(f"drag: {len(during)} headline updates in {seconds:.2f} s of dragging")
    dash.settle()
    return len(during) / seconds


def problem_changes(dash) -> list[float]:
    box = dash.page.get_by_label("Host eps_r")
    times = []
    for n in range(PROBLEM_CHANGES):
        value = "1.1" if n % 2 == 0 else "1"
        before = dash.card("worst")
        t0 = time.perf_counter()
        box.fill(value)
        box.press("Enter")
        after = dash.wait_card_change("worst", before, poll_ms=POLL_MS)
        times.append(time.perf_counter() - t0)
        dash.settle(quiet_s=0.3)
        print(f"eps_r -> {value}: {before} -> {after} in {times[-1]:.3f} s (new reference)")
    return times


def main() -> int:
    helpers = browser_helpers.load()
    problem = helpers.browser_problem()
    if problem:
        print(f"bench_page: {problem}", file=sys.stderr)
        return 2
    with tempfile.TemporaryDirectory(prefix="quietlayer-bench-") as workdir, helpers.sync_playwright() as playwright:
        browser = helpers.launch_browser(playwright)
        try:
            server = helpers.Server(Path(workdir) / "cached")
            (Path(workdir) / "cached").mkdir()
            url = server.start()
            try:
                context, _ = helpers.new_context(browser, url)
                dash = helpers.Dashboard(context.new_page(), url)
                first_page = dash.open()
                print(f"first finite headline {first_page:.3f} s after navigation")
                headline, figures = slider_changes(dash, helpers)
                drag = drag_rate(dash)
                context.close()
            finally:
                server.stop()
            os.environ["QUIETLAYER_REFERENCE_CACHE"] = "off"
            (Path(workdir) / "uncached").mkdir()
            server = helpers.Server(Path(workdir) / "uncached")
            url = server.start()
            try:
                context, _ = helpers.new_context(browser, url)
                dash = helpers.Dashboard(context.new_page(), url)
                dash.open()
                problem_s = problem_changes(dash)
                context.close()
            finally:
                server.stop()
        finally:
            browser.close()
    print(f"{SLIDER}, {CHANGES} keyboard changes: headline median {statistics.median(headline):.3f} s "
          f"(min {min(headline):.3f}, max {max(headline):.3f}); figures median {statistics.median(figures):.3f} s "
          f"(min {min(figures):.3f}, max {max(figures):.3f})")
    print(f"host eps_r, {PROBLEM_CHANGES} changes without a reference cache: median "
          f"{statistics.median(problem_s):.3f} s (min {min(problem_s):.3f}, max {max(problem_s):.3f})")
    print(f"first_page_s={first_page:.3f}")
    print(f"slider_to_update_s={statistics.median(headline):.3f} figures_s={statistics.median(figures):.3f} "
          f"problem_change_s={statistics.median(problem_s):.3f} drag_updates_per_s={drag:.1f}")
    return 0


if __name__ == "__main__":
    sys.exit(main())
