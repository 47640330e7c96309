"""The "Confirm in 3D" tab in a real browser: the box is described before a
run, a run shows its progress and can be cancelled, and a finished run puts
the 3D scores beside the 2D ones with the face, edge and corner spectra."""

from __future__ import annotations

import math
import re

import pytest

from .conftest import REPO, parse_db
from .test_sweep_view import MARKDOWN_TEXT_JS

pytestmark = pytest.mark.browser

TAB = "Confirm in 3D"
SPECTRUM = "3D reflection spectrum"
RUN_S = 120.0  # the demo's confirmation takes about 2 s on two idle cores; a loaded machine is slower
STEP = re.compile(r"3D (reference|test run|late-time check).*: step \d+ of \d+")


def pane_text(dashboard, css_class: str) -> str:
    box = dashboard.page.locator(f".{css_class}")
    return " ".join(box.first.evaluate(MARKDOWN_TEXT_JS).split()) if box.count() else ""


def status(dashboard) -> str:
    return pane_text(dashboard, "ql-3d-status")


def score_rows(dashboard) -> dict[str, tuple[str, str]]:
    """The scores table as {row label: (2D text, 3D text)}."""
    rows = dashboard.page.locator(".ql-3d-table tr")
    table = {}
    for k in range(rows.count()):
        cells = [" ".join(t.split()) for t in rows.nth(k).locator("td").all_text_contents()]
        if len(cells) == 3:
            table[cells[0]] = (cells[1], cells[2])
    return table


def progress_value(dashboard) -> float:
    bar = dashboard.page.locator(".ql-3d-progress progress")
    return float(bar.first.evaluate("e => e.value")) if bar.count() else 0.0


def test_confirm_in_3d_shows_the_box_progress_cancel_and_scores(dashboard):
    page = dashboard.page
    dashboard.open()
    dashboard.open_tab(TAB)
    run = page.get_by_role("button", name=TAB, exact=True)
    cancel = page.get_by_role("button", name="Cancel", exact=True)

    # before any run: the box the demo would run on, and no 3D scores yet
    box = dashboard.wait_for("the box line", lambda: pane_text(dashboard, "ql-3d-box"),
                             lambda t: "interior cells" in t, timeout=15)
    assert re.search(r"3D box: 24 x 24 x 24 interior cells, 44 x 44 x 44 with the layers \(85,184 cells\), "
                     r"\d+ steps of", box), box
    assert "No 3D run yet" in pane_text(dashboard, "ql-3d-scores")
    assert cancel.is_disabled() and run.is_enabled()

    # a run reports its progress and stops when cancelled
    run.click()
    shown = dashboard.wait_for("progress of the run", lambda: (status(dashboard), progress_value(dashboard)),
                               lambda v: STEP.search(v[0]) and v[1] > 0, timeout=RUN_S)
    assert run.is_disabled() and cancel.is_enabled(), shown
    cancel.click()
    dashboard.wait_for("the run to stop", lambda: status(dashboard), lambda t: t.startswith("Cancelled"),
                       timeout=60)
    assert run.is_enabled() and cancel.is_disabled()
    assert "No 3D run yet" in pane_text(dashboard, "ql-3d-scores")

    # a whole run: its stages in turn, then the scores beside the 2D ones
    run.click()
    seen = set()

    def stage():
        text = status(dashboard)
        seen.update(match.group(1) for match in [STEP.search(text)] if match)
        return text

    done = dashboard.wait_for("the 3D confirmation to finish", stage, lambda t: t.startswith("Done in"),
                              timeout=RUN_S)
    assert seen, done  # some stage showed its progress (short ones may pass between two looks)
    # the reference may come from the cancelled run, which kept it if it got that far
    assert re.search(r"Done in \d+\.\d s \(reference (\d+\.\d s|cached), test \d+\.\d s, late-time \d+\.\d s\)",
                     done), done
    table = dashboard.wait_for("the 3D scores", lambda: score_rows(dashboard),
                               lambda t: math.isfinite(parse_db(t.get("worst peak error", ("", ""))[1])), timeout=30)
    for label in ("worst peak error", "face centre (2D: normal incidence)", "corner", "global error", "band worst"):
        two, three = table[label]
        assert math.isfinite(parse_db(two)) and math.isfinite(parse_db(three)), (label, table[label])
        assert parse_db(three) < -20.0, (label, table[label])  # the demo's layer holds in 3D
    assert math.isfinite(parse_db(table["edge (2D: none)"][1]))
    assert table["late-time check (3D)"][1] == "stable"
    # the worst of the three probes is the worst peak error
    worst = max(parse_db(table[k][1]) for k in ("face centre (2D: normal incidence)", "edge (2D: none)", "corner"))
    assert parse_db(table["worst peak error"][1]) == pytest.approx(worst, abs=0.051)
    assert "earlier setting" not in pane_text(dashboard, "ql-3d-scores")

    # the spectrum: one curve per probe, finite somewhere in the band
    figures = dashboard.wait_for("the 3D spectrum", lambda: dashboard.figure_data(SPECTRUM), lambda f: len(f) == 1,
                                 timeout=30)
    curves = [c for c in figures[0] if len(c) >= 2]
    assert len(curves) == 3, figures
    for curve in curves:
        columns = [v for v in curve.values() if v and isinstance(v[0], float)]
        assert len(columns) >= 2 and all(len(c) > 10 for c in columns), curve.keys()
        assert any(math.isfinite(x) and x < 0 for x in columns[-1]), "no finite reflection in dB"
    legend = page.evaluate("""() => {
      const doc = window.Bokeh.documents[0];
      const live = new Set();
      for (const root of doc.roots()) for (const m of root.references()) live.add(m);
      return [...live].filter(m => m.type === "LegendItem" || (m.label && m.renderers))
        .map(m => m.label && (m.label.value !== undefined ? m.label.value : String(m.label)));
    }""")
    assert {"face", "edge", "corner"} <= set(legend), legend

    page.mouse.move(5, 5)
    artifacts = REPO / "test-artifacts"
    artifacts.mkdir(exist_ok=True)
    page.screenshot(path=str(artifacts / "confirm3d.png"), full_page=True)
