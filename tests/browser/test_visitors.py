"""Many visitors: eight sessions on one server, each moving its own
controls at the same time.  Each headline must equal a measurement of its
own settings made alone (sessions never see each other's parameters or
results), a tab closed mid-run leaves nothing in the server's log, and the
slowest session's update time is reported (test-artifacts/visitors.txt; a
figure, not a pass mark: speed belongs to the benchmarks)."""

from __future__ import annotations

import math
import time
from urllib.parse import parse_qs, urlsplit

import pytest

from .conftest import REPO, Dashboard, log_trouble, new_context, parse_db

pytestmark = pytest.mark.browser

SESSIONS = 8
# (slider title, key, presses) per session: eight different settings
MOVES = [("Grading order m", "ArrowRight", 1), ("Grading order m", "ArrowLeft", 2),
         ("sigma_max / sigma_opt", "ArrowRight", 3), ("sigma_max / sigma_opt", "ArrowLeft", 4),
         ("kappa_max", "ArrowRight", 2), ("Layer thickness (cells)", "ArrowLeft", 3),
         ("Layer thickness (cells)", "ArrowRight", 2), ("alpha_max (S/m)", "ArrowRight", 3)]
# slider title: (the page's widget, its key in the page's link, which carries the exact value)
CONTROLS = {"Grading order m": ("w_order", "m"), "sigma_max / sigma_opt": ("w_ratio", "ratio"),
            "kappa_max": ("w_kappa", "kappa"), "Layer thickness (cells)": ("w_cells", "cells"),
            "alpha_max (S/m)": ("w_alpha", "alpha")}


def _link_value(visitor: Dashboard, title: str) -> float:
    query = parse_qs(urlsplit(visitor.href()).query)
    return float(query[CONTROLS[title][1]][0])


def _alone(title: str, value: float):
    """The page's measurement of the demo with one control set, made in this process alone."""
    from quietlayer.app.page import PAGE_PARTS, QuietlayerPage
    from quietlayer.engine.measure import measure
    page = QuietlayerPage()
    try:
        widget = getattr(page.controls, CONTROLS[title][0])
        widget.value = int(value) if isinstance(widget.value, int) else value
        return measure(page.scenario_from_controls(), parts=PAGE_PARTS)
    finally:
        page.measure_pool.shutdown(wait=False)
        page.late_pool.shutdown(wait=False)


def test_eight_sessions_each_see_their_own_settings(browser, logged_server):
    url = logged_server.url
    log_start = logged_server.log_path.stat().st_size
    contexts, visitors = [], []
    try:
        for _ in range(SESSIONS):
            context, _ = new_context(browser, url)
            contexts.append(context)
            visitors.append(Dashboard(context.new_page(), url))
        for v in visitors:  # all load at once, then each settles
            v.page.goto(url)
        for v in visitors:
            v.wait_first_result()
            v.settle()
        before = [v.card("worst") for v in visitors]
        pressed = []
        for v, (title, key, times) in zip(visitors, MOVES):  # eight changes in flight together
            v.press_slider(title, key, times)
            pressed.append(time.perf_counter())
        updated = [math.nan] * SESSIONS
        deadline = time.monotonic() + 300
        while any(math.isnan(t) for t in updated):  # first new headline of each, in whatever order they come
            assert time.monotonic() < deadline, f"sessions without an update: {updated}"
            for i, v in enumerate(visitors):
                if math.isnan(updated[i]):
                    now = v.card("worst")
                    if now not in (None, before[i]) and math.isfinite(parse_db(now)):
                        updated[i] = time.perf_counter() - pressed[i]
            visitors[0].page.wait_for_timeout(20)
        # a tab closed while its late-time check runs
        extra_context, _ = new_context(browser, url)
        extra = Dashboard(extra_context.new_page(), url)
        extra.page.goto(url)
        extra.wait_first_result()
        extra.press_slider("kappa_max", "ArrowRight", 4)
        extra_context.close()
        for v in visitors:
            v.settle(timeout=300)
        shown = [(v.db("worst"), v.db("global")) for v in visitors]
        settings = [(title, _link_value(v, title)) for v, (title, _, _) in zip(visitors, MOVES)]
    finally:
        for context in contexts:
            context.close()
    mismatches = []
    for (title, value), (worst, overall) in zip(settings, shown):
        m = _alone(title, value)
        # the headline shows one decimal: equal to the lone measurement rounded the same way
        if (round(m.worst_peak_db, 1), round(m.global_db, 1)) != (worst, overall):
            mismatches.append((title, value, (worst, overall), (m.worst_peak_db, m.global_db)))
    assert not mismatches, mismatches
    assert len({s for s in settings}) == SESSIONS  # eight different settings really were compared
    slowest = max(updated)
    report = (f"{SESSIONS} sessions, one change each at once: update times "
              + ", ".join(f"{t:.2f}" for t in updated) + f" s; slowest {slowest:.2f} s, "
              f"median {sorted(updated)[SESSIONS // 2]:.2f} s\n")
    out = REPO / "test-artifacts"
    out.mkdir(exist_ok=True)
    (out / "visitors.txt").write_text(report)
    print(report)
    time.sleep(2.0)  # the closed tab's session ends meanwhile
    trouble = log_trouble(logged_server, log_start)
    assert not trouble, trouble[:10]
