"""Links from strangers: a page served with --address takes its controls from
the query string, so a link may carry huge sizes, NaN, script text, unknown
keys or very long values.  Each is refused with the page's inline message
naming the control (or ignored), runs nothing beyond the page's work budget,
never runs script text, and leaves the server answering other sessions within
1 s (the requirement itself, not a speed target) with nothing in its log."""

from __future__ import annotations

import time
import urllib.request
from urllib.parse import quote

import pytest

from .conftest import REPO, Dashboard, log_trouble, new_context

pytestmark = pytest.mark.browser

PWNED_JS = "() => window.__quietlayer_pwned === true"
SCRIPT = "<img src=x onerror=window.__quietlayer_pwned=true><script>window.__quietlayer_pwned=true</script>"

HOSTILE = [  # (query, words of which the inline message carries one; None: the link is ignored)
    ("nx=1000000000&ny=1000000000&steps=100000000", "Interior nx (cells) = 1000000000 is not allowed"),
    ("nx=600&ny=600&steps=6000", "steps = 6000 is not allowed: a whole number from 1 to"),
    ("courant=nan", "Courant number (x 2D limit) = nan is not allowed"),
    ("eps=inf&sigma=-1e308", "Host eps_r = inf is not allowed"),
    ("m=1e400", "Grading order m = inf is not allowed"),
    ("cell=" + quote(SCRIPT), "cell size"),
    ("fmax=" + quote(SCRIPT), "f_max"),
    ("fmax=" + "9" * 20_000, "f_max"),
    ("cell=" + "x" * 30_000, "cell size"),
    ("colour=red&__proto__=1&constructor=x&" + "&".join(f"k{i}=1" for i in range(100)), None),
    ("sides=" + quote('["nowhere", "<b>x</b>"]') + "&pol=" + quote("TMz'); alert(1)//"), ...),
]


# the alert's own text, without the style sheets in its shadow root
ALERT_TEXT_JS = """e => e.shadowRoot ? [...e.shadowRoot.children].filter(c => !["STYLE", "LINK"].includes(c.tagName))
    .map(c => c.textContent).join(" ") : e.textContent"""


def _alert(visitor: Dashboard) -> str | None:
    box = visitor.page.locator(".alert-danger")
    if box.count() == 0 or not box.first.is_visible():
        return None
    return " ".join(box.first.evaluate(ALERT_TEXT_JS).split())


def _static_answer_s(server_url: str) -> float:
    """Seconds the server takes to answer a plain request (its event loop's health)."""
    opener = urllib.request.build_opener(urllib.request.ProxyHandler({}))
    started = time.perf_counter()
    with opener.open(server_url + "static/js/bokeh.min.js", timeout=30) as response:
        response.read()
    return time.perf_counter() - started


def test_hostile_links_are_refused_and_others_are_served(browser, logged_server):
    url = logged_server.url
    log_start = logged_server.log_path.stat().st_size
    context, _ = new_context(browser, url)
    bystander = Dashboard(context.new_page(), url)
    bystander.open()
    answers = []
    try:
        for query, words in HOSTILE:
            hostile_context, refused = new_context(browser, url)
            try:
                visitor = Dashboard(hostile_context.new_page(), url)
                visitor.page.goto(f"{url}?{query}")
                refused_at_once = words not in (None, ...)
                if refused_at_once:
                    answers.append(_static_answer_s(url))  # while the hostile session starts
                seen = visitor.wait_for("a message or a result", lambda: (_alert(visitor), visitor.card("worst")),
                                        lambda v: bool(v[0]) or "dB" in (v[1] or "") and v[1] != "… dB")
                if refused_at_once:  # a link that is ignored opens an ordinary page: its figures take their time
                    answers.append(_static_answer_s(url))
                message = seen[0] or ""
                if words is None:
                    assert not message, f"{query[:60]}: {message[-300:]}"
                elif words is not ...:
                    assert words in message, f"{query[:60]}: {message[-300:]}"
                if query.startswith("nx=600"):  # the budget's refusal, as a visitor sees it
                    (REPO / "test-artifacts").mkdir(exist_ok=True)
                    visitor.page.screenshot(path=str(REPO / "test-artifacts" / "hostile-link.png"))
                assert len(message) < 2_000  # cut, not the 30,000 characters given
                assert not visitor.page.evaluate(PWNED_JS), f"script text ran: {query[:60]}"
                assert not refused
            finally:
                hostile_context.close()
        # the bystander's session still answers its own controls
        bystander.move_slider("Grading order m", "ArrowRight")
    finally:
        context.close()
    print(f"slowest plain answer while hostile links opened: {max(answers):.3f} s", [round(a, 3) for a in answers])
    assert max(answers) < 1.0
    time.sleep(1.0)  # closed tabs: let the server notice
    assert not log_trouble(logged_server, log_start), log_trouble(logged_server, log_start)[:10]


SESSION_END_S = 22.0  # Bokeh ends a session 15 s after its tab closed; serve checks every 5 s


def test_closed_tabs_leave_no_traceback(browser, logged_server):
    """Tabs closed at every stage: after the first result, mid-run, during the
    late-time check, mid-sweep and mid-3D-run.  Results still on their way and
    the end of each session (which stops its workers) leave nothing in the log."""
    url = logged_server.url
    log_start = logged_server.log_path.stat().st_size

    def visit(until, query: str = "") -> None:
        context, refused = new_context(browser, url)
        try:
            visitor = Dashboard(context.new_page(), url)
            visitor.page.goto(url + query)
            visitor.wait_first_result()
            until(visitor)
            assert not refused
        finally:
            context.close()

    def after_the_figures(v: Dashboard):
        v.wait_idle()
        v.wait_figures()

    def mid_run(v: Dashboard):
        v.settle()
        v.press_slider("Grading order m", "ArrowRight", 3)
        v.wait_for("a run in progress", v.busy, bool)  # closed while it runs

    def during_the_late_check(v: Dashboard):
        v.wait_for("the late-time check to run", lambda: v.card("late"), lambda t: t == "checking…", timeout=120)

    def mid_sweep(v: Dashboard):
        v.settle()
        v.open_tab("Sweep")
        v.page.get_by_role("button", name="Run sweep").click()
        v.wait_for("the sweep to start", lambda: v.page.get_by_role("button", name="Cancel").first.is_enabled(),
                   bool)

    def mid_3d_run(v: Dashboard):
        v.settle()
        v.open_tab("Confirm in 3D")
        v.page.get_by_role("button", name="Confirm in 3D").click()
        v.page.wait_for_timeout(1500)

    for until in (after_the_figures, mid_run, mid_sweep, mid_3d_run):
        visit(until)
    visit(during_the_late_check, "?nx=300&ny=300")  # a larger grid: its late-time check lasts seconds
    time.sleep(SESSION_END_S)  # every closed tab's session ends (and page.close() runs) meanwhile
    trouble = log_trouble(logged_server, log_start)
    assert not trouble, trouble[:10]
    log = logged_server.log_path.read_bytes()[log_start:].decode("utf-8", errors="replace")
    assert "WARNING" not in log, log[-2000:]  # not even Bokeh's notice of a message a closed tab missed
