"""The sweep tab in a real browser: a small sweep draws its map, a click on a
cell loads that setting into the controls and the headline re-measures it;
the live page keeps measuring during a sweep, and a cancelled sweep keeps the
points it measured."""

from __future__ import annotations

import math
import re
from urllib.parse import parse_qs, urlsplit

import pytest

from .conftest import REPO, SHADOW_TEXT_JS, parse_db

pytestmark = pytest.mark.browser

ORDER = "Grading order m"
RATIO = "sigma_max / sigma_opt"
MAP = "sweep map"
SWEEP_S = 180.0  # a few hundred points on a loaded two-core machine
# a Markdown pane's text without the style sheets that share its shadow root
MARKDOWN_TEXT_JS = ("e => [...(e.shadowRoot || e).children].filter(c => !['STYLE', 'LINK'].includes(c.tagName))"
                    ".map(c => c.textContent).join(' ')")


def sweep_alerts(dashboard) -> list[str]:
    """Texts of the danger messages on display."""
    boxes = dashboard.page.locator(".alert-danger")
    return [" ".join(boxes.nth(k).evaluate(SHADOW_TEXT_JS).split())
            for k in range(boxes.count()) if boxes.nth(k).is_visible()]


def set_axis(dashboard, which: int, parameter: str, start: str, stop: str, count: int) -> None:
    """Fill one parameter's fields of the sweep form (which: 0 for x, 1 for y)."""
    page = dashboard.page
    select = page.get_by_label(("x parameter", "y parameter")[which], exact=True)
    if select.evaluate("e => e.options[e.selectedIndex].text") != parameter:
        before = page.get_by_label("start", exact=True).nth(which).input_value()
        select.select_option(label=parameter)
        # the form puts in the parameter's usual range first: wait for it before typing
        dashboard.wait_for("the range to follow the parameter",
                           lambda: page.get_by_label("start", exact=True).nth(which).input_value(),
                           lambda v: v != before, timeout=15)
    for label, text in (("start", start), ("stop", stop), ("count", str(count))):
        box = page.get_by_label(label, exact=True).nth(which)
        box.fill(text)
        box.press("Enter")


def sweep_status(dashboard) -> str:
    """The line under the sweep buttons: progress, summary, or what a click did."""
    box = dashboard.page.locator(".ql-sweep-status")
    return " ".join(box.first.evaluate(MARKDOWN_TEXT_JS).split()) if box.count() else ""


def map_cells(dashboard) -> tuple[dict, int]:
    """The measured cells' columns of the live map, and the number of cells not yet measured."""
    figures = dashboard.figure_data(MAP)
    assert len(figures) == 1, f"expected one live sweep map, found {len(figures)}"
    with_scores = [d for d in figures[0] if "score" in d and "status" in d]
    scored = next(d for d in with_scores if set(d["status"]) <= {"ok"})
    unscored = next(d for d in with_scores if d is not scored)
    return scored, sum(s == "pending" for s in unscored["status"])


def start_sweep(dashboard, x: tuple, y: tuple) -> None:
    """Open the page's sweep tab, fill in both parameters and press Run."""
    dashboard.open()
    dashboard.open_tab("Sweep")
    set_axis(dashboard, 0, *x)
    set_axis(dashboard, 1, *y)
    dashboard.page.get_by_role("button", name="Run sweep").click()


def test_sweep_map_and_a_click_that_loads_the_cell(dashboard):
    start_sweep(dashboard, (ORDER, "0.5", "6", 3), (RATIO, "0.5", "1.5", 3))
    message = dashboard.wait_for("the sweep form to name the bad field", lambda: sweep_alerts(dashboard),
                                 lambda texts: len(texts) == 1, timeout=15)[0]
    assert "x start" in message and "from 1 to 6" in message, message

    set_axis(dashboard, 0, ORDER, "2", "6", 3)
    dashboard.page.get_by_role("button", name="Run sweep").click()
    dashboard.wait_for("the 3 x 3 sweep to finish", lambda: sweep_status(dashboard),
                       lambda t: "3 × 3 points in" in t, timeout=SWEEP_S)
    assert sweep_alerts(dashboard) == []

    scored, pending = map_cells(dashboard)
    assert len(scored["score"]) == 9 and pending == 0, scored
    assert all(math.isfinite(v) and -200.0 < v < 0.0 for v in scored["score"]), scored["score"]
    cells = {(x, y): v for x, y, v in zip(scored["x_text"], scored["y_text"], scored["score"])}
    assert set(cells) == {(x, y) for x in ("2", "4", "6") for y in ("0.5", "1", "1.5")}

    # a click on the (order 6, ratio 0.5) cell, away from its centre, loads that setting
    before = dashboard.card("worst")
    assert dashboard.slider_value(ORDER) == 3.0 and dashboard.slider_value(RATIO) == 1.0
    dashboard.click_figure(MAP, 5.6, 0.62)
    dashboard.wait_for("the sliders to take the clicked cell",
                       lambda: (dashboard.slider_value(ORDER), dashboard.slider_value(RATIO)),
                       lambda v: v == (6.0, 0.5), timeout=15)
    shown = dashboard.wait_card_change("worst", before)
    dashboard.settle()
    # the controls now describe the measured point, so the headline repeats the map's value
    assert parse_db(dashboard.card("worst")) == pytest.approx(cells[("6", "0.5")], abs=0.051), shown
    link = {k: v[-1] for k, v in parse_qs(urlsplit(dashboard.href()).query).items()}
    assert float(link["m"]) == 6.0 and float(link["ratio"]) == 0.5
    assert "Loaded Grading order m = 6, sigma_max / sigma_opt = 0.5 into the controls" in sweep_status(dashboard)

    dashboard.page.mouse.move(5, 5)  # no hover box over the map in the picture
    artifacts = REPO / "test-artifacts"
    artifacts.mkdir(exist_ok=True)
    dashboard.page.screenshot(path=str(artifacts / "sweep.png"), full_page=True)


def test_live_page_keeps_measuring_and_cancel_keeps_the_points(dashboard):
    start_sweep(dashboard, (ORDER, "1", "6", 30), (RATIO, "0.25", "2", 30))
    dashboard.wait_for("the first points of the sweep", lambda: sweep_status(dashboard),
                       lambda t: re.search(r"[1-9]\d* measured", t) is not None, timeout=SWEEP_S)

    # the live measurement of the controls goes on beside the sweep
    dashboard.move_slider(ORDER, "ArrowRight", 5)
    assert dashboard.slider_value(ORDER) == pytest.approx(3.5)
    assert "measured" in sweep_status(dashboard), "the sweep ended before the slider's result came back"

    dashboard.page.get_by_role("button", name="Cancel").click()
    status = dashboard.wait_for("the sweep to stop", lambda: sweep_status(dashboard),
                                lambda t: "cancelled after" in t, timeout=SWEEP_S)
    done = int(re.search(r"cancelled after (\d+) of 900", status).group(1))
    assert 0 < done < 900, status
    scored, pending = dashboard.wait_for("the map to show the points done", lambda: map_cells(dashboard),
                                         lambda m: m[1] == 900 - done, timeout=15)
    assert len(scored["score"]) == done and all(math.isfinite(v) for v in scored["score"])
