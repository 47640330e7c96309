"""The "Pick for me" tab in a real browser: the smallest search (8 runs) on the
demo shows its progress, fills the path figures and states the best setting;
"Load the result" puts it into the controls and the headline re-measures it;
Cancel stops a long search for the thinnest layer and keeps the best so far."""

from __future__ import annotations

import math
import re
from urllib.parse import parse_qs, urlsplit

import pytest

from quietlayer.engine.search import MIN_BUDGET

from .conftest import REPO, parse_db
from .test_sweep_view import MARKDOWN_TEXT_JS, sweep_alerts

pytestmark = pytest.mark.browser

SEARCH_S = 120.0  # eight runs take about a second on two idle cores; slack for a loaded machine
RUNS_TITLE = "worst peak error of each run"
POINTS_TITLE = "tried points"


def text_of(dashboard, css_class: str) -> str:
    box = dashboard.page.locator(f".{css_class}")
    return " ".join(box.first.evaluate(MARKDOWN_TEXT_JS).split()) if box.count() else ""


def status(dashboard) -> str:
    return text_of(dashboard, "ql-pick-status")


def progress_bar(dashboard) -> tuple[float, float]:
    bar = dashboard.page.locator("progress:visible").first
    return float(bar.get_attribute("value") or 0), float(bar.get_attribute("max") or 0)


def fill(dashboard, label: str, text: str) -> None:
    box = dashboard.page.get_by_label(label, exact=True)
    box.fill(text)
    box.press("Enter")


def open_pick(dashboard) -> None:
    dashboard.open()
    dashboard.open_tab("Pick for me")


def runs_plot(dashboard) -> dict:
    """Runs (number, score) by stage of the live figure, and its best-so-far line."""
    figures = dashboard.figure_data(RUNS_TITLE)
    assert len(figures) == 1, f"expected one live run figure, found {len(figures)}"
    points = [d for d in figures[0] if "seq" in d]
    line = next(d for d in figures[0] if set(d) == {"x", "y"})
    return {"runs": sorted((s, v) for d in points for s, v in zip(d["seq"], d["score"])), "best": line}


def test_smallest_search_states_and_loads_the_best_layer(dashboard):
    open_pick(dashboard)
    fill(dashboard, "Runs", "3")
    dashboard.page.get_by_role("button", name="Pick for me").click()
    message = dashboard.wait_for("the form to name the bad field", lambda: sweep_alerts(dashboard),
                                 lambda texts: len(texts) == 1, timeout=15)[0]
    assert "Runs = 3" in message and "from 8 to 500" in message, message

    fill(dashboard, "Runs", str(MIN_BUDGET))
    dashboard.page.get_by_role("button", name="Pick for me").click()
    done = dashboard.wait_for("the 8-run search to finish", lambda: status(dashboard),
                              lambda t: t.startswith("Done:"), timeout=SEARCH_S)
    assert re.match(r"Done: 8 runs in \d+\.\d s\.", done), done
    assert sweep_alerts(dashboard) == [] and progress_bar(dashboard) == (8.0, 8.0)

    # the path: eight runs, numbered 1..8, and the best so far never rises and ends at the stated best
    plot = runs_plot(dashboard)
    assert [s for s, _ in plot["runs"]] == list(range(1, 9)), plot["runs"]
    scores = [v for _, v in plot["runs"]]
    assert all(math.isfinite(v) and -200 < v < 0 for v in scores), scores
    best_line = plot["best"]["y"]
    assert len(best_line) == 8 and all(b <= a for a, b in zip(best_line, best_line[1:]))
    assert best_line[-1] == min(scores)
    points = dashboard.figure_data(POINTS_TITLE)[0]
    dots = next(d for d in points if "px" in d and len(d.get("seq", [])) > 0)
    assert len(dots["seq"]) == 8 and "diamond" in dots["marker"]  # the refinement's steps among them
    assert len(next(d for d in points if "xs" in d)["xs"]) == 1  # and joined by one line

    result = text_of(dashboard, "ql-pick-result")
    assert result.startswith("Best setting for 10 cells"), result
    for words in ("grading order m", "sigma_max", "× sigma_opt", "S/m", "kappa_max", "alpha_max",
                  "thickness 10 cells"):
        assert words in result, (words, result)
    stated = float(re.search(r"worst peak error: (-?\d+\.\d) dB", result).group(1))
    assert stated == pytest.approx(min(scores), abs=0.051)
    order = float(re.search(r"grading order m (\d+(?:\.\d+)?)", result).group(1))
    kappa = float(re.search(r"kappa_max (\d+(?:\.\d+)?)", result).group(1))

    before = dashboard.card("worst")
    assert dashboard.slider_value("Grading order m") == 3.0 and dashboard.slider_value("kappa_max") == 1.0
    dashboard.page.get_by_role("button", name="Load the result").click()

    def link():  # the address bar holds the controls' exact values (a slider shows them on its steps)
        query = {k: v[-1] for k, v in parse_qs(urlsplit(dashboard.href()).query).items()}
        return float(query.get("m", 3)), float(query.get("kappa", 1))

    # the result is stated to 4 significant digits
    dashboard.wait_for("the controls to take the result", link,
                       lambda v: v[0] == pytest.approx(order, rel=6e-4) and v[1] == pytest.approx(kappa, rel=6e-4),
                       timeout=15)
    assert dashboard.slider_value("Grading order m") == pytest.approx(order, abs=0.051)
    shown = parse_db(dashboard.wait_card_change("worst", before))
    dashboard.settle()
    assert math.isfinite(shown) and shown < parse_db(before), (before, shown)
    # the controls keep the found values exactly (not the sliders' steps): the same score comes back
    assert dashboard.db("worst") == pytest.approx(stated, abs=0.051), (stated, dashboard.card("worst"))
    assert "Loaded the best 10-cell layer into the controls" in status(dashboard)

    dashboard.page.mouse.move(5, 5)
    artifacts = REPO / "test-artifacts"
    artifacts.mkdir(exist_ok=True)
    dashboard.page.screenshot(path=str(artifacts / "pick-1366.png"), full_page=True)
    dashboard.page.set_viewport_size({"width": 1920, "height": 1080})
    dashboard.page.wait_for_timeout(800)  # the figures re-lay themselves out
    dashboard.page.screenshot(path=str(artifacts / "pick-1920.png"), full_page=True)


def test_cancel_keeps_the_best_so_far(dashboard):
    open_pick(dashboard)
    dashboard.page.get_by_role("button", name="Thinnest for a target").click()
    fill(dashboard, "Target (dB)", "-150")  # out of reach: every thickness from 4 to 40 would be tuned
    fill(dashboard, "Runs per thickness", "400")
    dashboard.page.get_by_role("button", name="Pick for me").click()
    running = dashboard.wait_for("the search to be under way", lambda: status(dashboard),
                                 lambda t: re.search(r"run (\d+) of at most 400", t) is not None
                                 and int(re.search(r"run (\d+) of", t).group(1)) >= 5, timeout=SEARCH_S)
    assert "Tuning 4 cells (thickness 1 of at most 10)" in running and "left at most" in running, running
    value, most = progress_bar(dashboard)
    assert most == 400 and value >= 5

    dashboard.page.get_by_role("button", name="Cancel").click()
    done = dashboard.wait_for("the search to stop", lambda: status(dashboard),
                              lambda t: t.startswith("Cancelled:"), timeout=SEARCH_S)
    runs = int(re.search(r"Cancelled: (\d+) runs", done).group(1))
    assert "the best so far is kept" in done
    result = text_of(dashboard, "ql-pick-result")
    assert "met -150 dB before the search was cancelled" in result, result
    plot = runs_plot(dashboard)
    assert [s for s, _ in plot["runs"]] == list(range(1, runs + 1)) and runs < 10 * 400
    lowest = min(v for _, v in plot["runs"])
    assert re.search(r"The lowest score was (-?\d+\.\d) dB", result).group(1) == f"{lowest:.1f}"
    dashboard.page.mouse.move(5, 5)
    dashboard.page.screenshot(path=str(REPO / "test-artifacts" / "pick-cancelled.png"), full_page=True)

    # the best try so far loads, at its thickness
    cells = int(re.search(r"dB at (\d+) cells", result).group(1))
    before = dashboard.card("worst")
    dashboard.page.get_by_role("button", name="Load the result").click()
    dashboard.wait_for("the thickness to follow the result", lambda: dashboard.slider_value("Layer thickness (cells)"),
                       lambda v: v == cells, timeout=15)
    dashboard.wait_card_change("worst", before)
