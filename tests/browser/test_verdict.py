"""The page answers "is this layer good enough?": the verdict against a budget, the
difference to a pinned setting, figures marked while they show the previous setting,
a long run's progress and Cancel, and the short-run warning."""

from __future__ import annotations

import math
import re

import pytest

from quietlayer.engine.run_checks import MIN_PERIODS, record_length
from quietlayer.app.page import load_preset

from .conftest import LATE_S, RESULT_S, parse_db

pytestmark = pytest.mark.browser

BUDGET = "Budget: worst peak error (dB)"
STEPS = "Run length (steps)"
STALE = "Faded figures show the previous setting"
SHORT = "Short run for f_min"
FADED_JS = """() => {  // elements drawn faded, shadow roots included
    let count = 0;
    const walk = root => root.querySelectorAll('*').forEach(e => {
        if (e.style && e.style.opacity === '0.35') count++;
        if (e.shadowRoot) walk(e.shadowRoot);
    });
    walk(document);
    return count;
}"""


def set_number(dashboard, label: str, value) -> None:
    box = dashboard.page.get_by_label(label)
    box.fill(str(value))
    box.press("Enter")


def visible(dashboard, text: str) -> bool:
    found = dashboard.page.get_by_text(text)
    return found.count() > 0 and found.first.is_visible()


def verdict_sub(dashboard) -> str:
    return " ".join(dashboard.page.locator('[data-key="verdict"] .ql-sub').first.text_content().split())


def test_verdict_follows_the_budget_with_the_rule_of_check(dashboard):
    dashboard.open()
    # the rule of `quietlayer check`: within the budget and a stable late-time check
    dashboard.wait_for("the late-time check", lambda: dashboard.card("late"), lambda t: t == "stable", LATE_S)
    worst = dashboard.db("worst")
    budget = math.floor(worst) + 5.0  # comfortably above the worst peak error
    set_number(dashboard, BUDGET, budget)
    dashboard.wait_for("PASS", lambda: (dashboard.card("verdict"), verdict_sub(dashboard)),
                       lambda v: v[0] == "PASS" and f"the {budget:g} dB budget" in v[1])
    margin = float(re.match(r"([\d.]+) dB below", verdict_sub(dashboard)).group(1))
    assert margin == pytest.approx(budget - worst, abs=0.051)
    tight = math.floor(worst) - 3.0  # below the worst peak error: fails by worst - tight
    set_number(dashboard, BUDGET, tight)
    dashboard.wait_for("FAIL", lambda: (dashboard.card("verdict"), verdict_sub(dashboard)),
                       lambda v: v[0] == "FAIL" and f"the {tight:g} dB budget" in v[1])
    over = float(re.match(r"([\d.]+) dB above", verdict_sub(dashboard)).group(1))
    assert over == pytest.approx(worst - tight, abs=0.051)
    assert dashboard.db("worst") == worst  # the budget only changes the verdict: no new run
    # the field cannot be set above 0 dB; a link can, and is refused at the field
    dashboard.page.goto(dashboard.url + "?budget=5")
    dashboard.wait_for("the refusal", dashboard.alert, lambda t: t is not None and "from -200 to 0" in t)
    outlined = dashboard.page.get_by_label(BUDGET).evaluate(
        "e => { for (let n = e; n; n = n.parentNode || n.host) { if (n.style && n.style.outline) return n.style.outline; }"
        " return ''; }")
    assert "solid" in outlined, "the refused budget is not marked at its own field"


def test_difference_to_a_says_better_or_worse(dashboard):
    dashboard.open()
    a = dashboard.db("worst")
    dashboard.page.get_by_role("button", name="Pin as A").click()
    dashboard.wait_for("the difference card", lambda: dashboard.card("delta"), lambda t: t == "the same")
    after = parse_db(dashboard.move_slider("sigma_max / sigma_opt", "ArrowLeft", 6))  # far below sigma_opt
    delta = dashboard.wait_for("the difference card", lambda: dashboard.card("delta"),
                               lambda t: t is not None and t.endswith(("better", "worse")))
    word = "worse" if after > a else "better"
    assert delta == f"{abs(after - a):.1f} dB {word}", (a, after, delta)


def test_figures_are_faded_while_stale_and_a_long_run_can_be_cancelled(dashboard):
    dashboard.open()
    assert not visible(dashboard, STALE)
    set_number(dashboard, STEPS, 1400)  # a new reference and a longer run: a few seconds
    dashboard.wait_for("the stale mark", lambda: visible(dashboard, STALE), bool)
    faded = dashboard.page.evaluate(FADED_JS)
    assert faded >= 5, f"only {faded} figures faded while they show the previous setting"
    dashboard.wait_for("the figures to be redrawn", lambda: visible(dashboard, STALE), lambda v: not v, RESULT_S)
    dashboard.wait_idle()
    # a longer run still: its progress, an estimate and Cancel, which keeps the last figures
    worst = dashboard.card("worst")
    set_number(dashboard, STEPS, 1700)  # within the page's work budget
    dashboard.wait_for("the progress line", lambda: visible(dashboard, "Cancel the run"), bool, RESULT_S)
    assert re.search(r"step \d+ of \d+, \d+ s so far, about \d+ s left",
                     dashboard.text_of(r"step \d+ of \d+")), "no estimate of the time left"
    dashboard.page.get_by_role("button", name="Cancel the run").click()
    dashboard.wait_for("the cancelled note", dashboard.alert, lambda t: t is not None and "Run cancelled" in t)
    assert dashboard.card("worst") == worst  # the last finished setting stays on show
    assert visible(dashboard, STALE)  # and its figures say they are not the controls' setting
    assert not dashboard.busy()


def test_short_run_warning_and_its_remedy(dashboard):
    demo = load_preset("demo")
    record = record_length(demo)
    assert record.short  # the demo records under MIN_PERIODS periods of f_min at its farthest probe
    dashboard.open()
    dashboard.wait_for("the short-run warning", lambda: visible(dashboard, SHORT), bool)
    text = " ".join(dashboard.page.locator('[data-key="warnings"]').first.text_content().split())
    assert f"{record.periods:.1f} periods" in text and f"{MIN_PERIODS:g} wanted" in text
    assert f"About {record.steps_needed} steps" in text
    set_number(dashboard, STEPS, record.steps_needed)
    dashboard.wait_for("the warning to go", lambda: visible(dashboard, SHORT), lambda v: not v, RESULT_S)
