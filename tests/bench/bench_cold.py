"""First start on a machine whose numba cache is empty, run by hand:

    python tests/bench/bench_cold.py

Starts `quietlayer serve` with a fresh, empty NUMBA_CACHE_DIR and reference
cache, opens the page in headless Chromium as soon as the server answers,
and times from the start of the process:
- the first finite headline (while the kernels compile, from the NumPy loops);
- the compiled engine in use (the server's log says so);
- for comparison, the first result of a page opened after that (compiled).
Last line: cold_first_headline_s=… compiled_in_use_s=…
"""

from __future__ import annotations

import os
import re
import sys
import tempfile
import time
from pathlib import Path

import browser_helpers  # beside this script


def main() -> int:
    helpers = browser_helpers.load()
    problem = helpers.browser_problem()
    if problem:
        print(f"bench_cold: {problem}", file=sys.stderr)
        return 2
    with tempfile.TemporaryDirectory(prefix="quietlayer-cold-") as workdir, helpers.sync_playwright() as playwright:
        os.environ["NUMBA_CACHE_DIR"] = str(Path(workdir) / "numba")
        browser = helpers.launch_browser(playwright)  # before the clock: a browser is already open
        server = helpers.Server(Path(workdir))
        started = time.perf_counter()
        try:
            url = server.start(timeout=300)
            answered = time.perf_counter() - started
            context, _ = helpers.new_context(browser, url)
            dash = helpers.Dashboard(context.new_page(), url)
            dash.open(settle=False)
            first = time.perf_counter() - started
            runtime_note = dash.page.locator('[data-key="runtime"] .ql-sub').first.text_content()
            print(f"server answered after {answered:.1f} s; first finite headline after {first:.1f} s "
                  f"({dash.card('worst')}, run time card: {runtime_note})")
            deadline = time.monotonic() + 300
            compiled = None
            while time.monotonic() < deadline:
                found = re.search(r"compiled engine in use after ([\d.]+) s", server.output(200))
                if found:
                    compiled = float(found.group(1))
                    break
                time.sleep(0.5)
            print(f"compiled engine in use {compiled} s after the server's start (its own clock)")
            later = helpers.Dashboard(context.new_page(), url)
            print(f"a page opened after that: first headline in {later.open(settle=False):.2f} s")
            context.close()
            print("server log:\n  " + server.output(12).replace("\n", "\n  "))
        finally:
            server.stop()
            browser.close()
    print(f"cold_first_headline_s={first:.1f} compiled_in_use_s={compiled}")
    return 0


if __name__ == "__main__":
    sys.exit(main())
