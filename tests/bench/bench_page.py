"""Time the served page as a user feels it, run by hand:

    python tests/bench/bench_page.py

Starts `quietlayer serve` on a free port with an empty reference cache (its
start-up, which may compile the kernels, is not timed) and opens the page in
headless Chromium, the same way as the browser tests (tests/browser/conftest.py).
- first page: from navigation to the first finite headline figures;
- slider: 20 keyboard steps of the grading-order slider, back and forth
  between two values whose worst peak error differs, each timed from the key
  press until the worst-peak-error card shows the new figure (and, for the
  record, until the run spinner stops, i.e. the figures are redrawn too).
Last lines: first_page_s=<s>, then slider_to_update_s=<median>.
"""

from __future__ import annotations

import importlib.util
import statistics
import sys
import tempfile
import time
from pathlib import Path

CHANGES = 20
SLIDER = "Grading order m"
POLL_MS = 10  # finer than the tests: this is the figure being measured


def _browser_helpers():
    # the tests' own server and page helpers, so the bench drives the page exactly as they do
    path = Path(__file__).resolve().parents[1] / "browser" / "conftest.py"
    spec = importlib.util.spec_from_file_location("quietlayer_browser_helpers", path)
    module = importlib.util.module_from_spec(spec)
    spec.loader.exec_module(module)
    return module


def _keys_that_change(dash, before: str) -> int:
    """Arrow steps up from the start that change the worst peak error (usually one)."""
    for steps in range(1, 6):
        dash.press_slider(SLIDER, "ArrowRight")
        try:
            dash.wait_card_change("worst", before, timeout=20)
        except AssertionError:
            continue
        dash.wait_idle()
        return steps
    raise SystemExit(f"five steps of {SLIDER!r} did not change the worst peak error")


def main() -> int:
    helpers = _browser_helpers()
    problem = helpers.browser_problem()
    if problem:
        print(f"bench_page: {problem}", file=sys.stderr)
        return 2
    with tempfile.TemporaryDirectory(prefix="quietlayer-bench-") as workdir:
        server = helpers.Server(Path(workdir))
        started = time.perf_counter()
        url = server.start()
        print(f"server ready on {url} in {time.perf_counter() - started:.1f} s (not counted)")
        try:
            with helpers.sync_playwright() as playwright:
                browser = helpers.launch_browser(playwright)
                try:
                    context, _ = helpers.new_context(browser, url)
                    dash = helpers.Dashboard(context.new_page(), url)
                    first_page = dash.open()
                    print(f"first finite headline {first_page:.3f} s after navigation")
                    start_value = dash.slider_value(SLIDER)
                    steps = _keys_that_change(dash, dash.card("worst"))
                    headline, redrawn = [], []
                    for n in range(CHANGES):
                        key = "ArrowLeft" if n % 2 == 0 else "ArrowRight"
                        before = dash.card("worst")
                        dash.page.wait_for_timeout(300)  # let the last redraw's messages settle
                        t0 = time.perf_counter()
                        dash.press_slider(SLIDER, key, steps)
                        after = dash.wait_card_change("worst", before, poll_ms=POLL_MS)
                        headline.append(time.perf_counter() - t0)
                        dash.wait_idle()
                        redrawn.append(time.perf_counter() - t0)
                        print(f"change {n + 1:2d}: m = {dash.slider_value(SLIDER):g}  {before} -> {after}  "
                              f"headline {headline[-1]:.3f} s, figures done {redrawn[-1]:.3f} s")
                    print(f"{SLIDER} {start_value:g} <-> {start_value + 0.1 * steps:g}, {CHANGES} changes: "
                          f"headline median {statistics.median(headline):.3f} s "
                          f"(min {min(headline):.3f}, max {max(headline):.3f}); "
                          f"figures done median {statistics.median(redrawn):.3f} s")
                finally:
                    browser.close()
        finally:
            server.stop()
    print(f"first_page_s={first_page:.3f}")
    print(f"slider_to_update_s={statistics.median(headline):.3f}")
    return 0


if __name__ == "__main__":
    sys.exit(main())
