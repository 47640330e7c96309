"""The dashboard in a real browser: headline figures, live controls, invalid
input, links that carry the state, downloads and uploads, and sessions that
do not leak into each other."""

from __future__ import annotations

import math
import re
from dataclasses import replace
from urllib.parse import parse_qs, urlsplit

import numpy as np
import pytest

from quietlayer.engine import Scenario, parse_length
from quietlayer.engine.export import read_coefficients_csv

from .conftest import LATE_S, REPO, SIDE_NAMES, parse_db

pytestmark = pytest.mark.browser

ORDER = "Grading order m"
RATIO = "sigma_max / sigma_opt"
CELLS = "Layer thickness (cells)"
CELL_SIZE = "Cell size (dx = dy)"
CAUTION = "certifies no RF-exposure, EMC or safety compliance"


def query(href: str) -> dict[str, str]:
    return {k: v[-1] for k, v in parse_qs(urlsplit(href).query).items()}


def curves_differ(before, after) -> bool:
    if len(before) != len(after):
        return True
    for a, b in zip(before, after):
        if a.keys() != b.keys():
            return True
        for key in a:
            x, y = np.asarray(a[key], float), np.asarray(b[key], float)
            if x.shape != y.shape or not np.allclose(x, y, rtol=0, atol=1e-9, equal_nan=True):
                return True
    return False


def test_demo_page_loads_with_finite_headline(dashboard):
    dashboard.open()
    worst, global_db = dashboard.db("worst"), dashboard.db("global")
    # an echo is weaker than what was sent, and the demo's layer is far from a bare wall
    assert -200.0 < worst < 0.0, dashboard.card("worst")
    assert -200.0 < global_db < 0.0, dashboard.card("global")
    assert float(dashboard.card("cpw")) == 20.0  # 1 mm cells, 15 GHz in air: 19.986 mm / 1 mm
    assert re.fullmatch(r"\d+ ms", dashboard.card("runtime")), dashboard.card("runtime")
    assert dashboard.page.get_by_text(CAUTION).first.is_visible()
    dashboard.wait_for("the late-time check to say stable", lambda: dashboard.card("late"),
                       lambda t: t == "stable", timeout=LATE_S)
    assert dashboard.refused == [], "the page asked for addresses beyond its own server"
    artifacts = REPO / "test-artifacts"
    artifacts.mkdir(exist_ok=True)
    dashboard.page.screenshot(path=str(artifacts / "page.png"), full_page=True)


def test_grading_order_slider_updates_headline_and_spectrum(dashboard):
    dashboard.open()
    assert dashboard.slider_value(ORDER) == pytest.approx(3.0)
    before_text, before_curves = dashboard.card("worst"), dashboard.spectrum()

    after_text = dashboard.move_slider(ORDER, "ArrowRight", 5)

    assert dashboard.slider_value(ORDER) == pytest.approx(3.5)
    assert after_text != before_text and math.isfinite(parse_db(after_text))
    # the headline is drawn before the figures, so the curves may still be on their way
    after_curves = dashboard.wait_for("the spectrum to change with the grading order", dashboard.spectrum,
                                      lambda c: curves_differ(before_curves, c), timeout=15)
    assert len(after_curves) == len(before_curves) > 0
    assert float(query(dashboard.href())["m"]) == pytest.approx(3.5)


def test_invalid_cell_size_shows_message_and_keeps_figures(dashboard):
    dashboard.open()
    before_text, before_curves = dashboard.card("worst"), dashboard.spectrum()
    box = dashboard.page.get_by_label(CELL_SIZE)

    seen = None
    for bad in ("-1 mm", "0 mm"):
        box.fill(bad)
        box.press("Enter")
        seen = dashboard.wait_for(f"a message about the cell size {bad!r}", dashboard.alert,
                                  lambda t, last=seen: t is not None and t != last, timeout=15)
        assert "not allowed" in seen, seen
        assert re.search(r"\bdx\b|cell size", seen, re.IGNORECASE), f"the message names no field: {seen}"
        # a run, had one started, would light the spinner within a round trip
        dashboard.page.wait_for_timeout(1500)
        assert not dashboard.busy(), f"a run started for the cell size {bad!r}"
        assert dashboard.card("worst") == before_text
        assert not curves_differ(before_curves, dashboard.spectrum()), "the figures changed after invalid input"

    box.fill("0.9 mm")
    box.press("Enter")
    dashboard.wait_card_change("worst", before_text)
    assert dashboard.alert() is None, "the message stayed after a valid cell size"


def test_copied_link_restores_the_state(dashboard, open_dashboard):
    dashboard.open()
    dashboard.move_slider(ORDER, "ArrowLeft", 5)
    dashboard.move_slider(RATIO, "ArrowRight", 4)

    order, ratio = dashboard.slider_value(ORDER), dashboard.slider_value(RATIO)
    assert order == pytest.approx(2.5) and ratio == pytest.approx(1.2)
    shown = {key: dashboard.card(key) for key in ("worst", "global", "cpw")}
    sigma_text = dashboard.text_of(r"^sigma_max = ")
    link = dashboard.href()
    assert float(query(link)["m"]) == pytest.approx(order)
    assert float(query(link)["ratio"]) == pytest.approx(ratio)

    other = open_dashboard()  # a separate browser context: nothing shared but the link
    other.open(link)
    assert other.slider_value(ORDER) == pytest.approx(order)
    assert other.slider_value(RATIO) == pytest.approx(ratio)
    assert {key: other.card(key) for key in shown} == shown
    assert other.text_of(r"^sigma_max = ") == sigma_text


def test_toml_and_csv_downloads_parse_and_reload(dashboard, tmp_path):
    dashboard.open()
    dashboard.move_slider(CELLS, "ArrowRight", 2)

    cells = dashboard.slider_value(CELLS)
    order, ratio = dashboard.slider_value(ORDER), dashboard.slider_value(RATIO)
    assert cells == 12
    sides = dashboard.active_sides()
    assert sides == list(SIDE_NAMES)
    dx = parse_length("cell size", dashboard.page.get_by_label(CELL_SIZE).input_value())
    status = dashboard.text_of(r"interior cells")
    sigma_max = float(re.search(r"sigma_max = ([\d.eE+-]+) S/m", dashboard.text_of(r"^sigma_max = ")).group(1))

    dashboard.open_card("Take it away")
    scenario = Scenario.from_toml(dashboard.download("Scenario (TOML)"))
    assert scenario.dx == pytest.approx(dx) and scenario.dy == pytest.approx(dx)
    assert f"{scenario.nx} × {scenario.ny} interior cells" in status and f"{scenario.steps} steps" in status
    for name in SIDE_NAMES:
        side = getattr(scenario.boundary, name)
        assert side.kind == "cpml", name
        assert side.cells == cells, name
        assert side.order == pytest.approx(order) and side.sigma_ratio == pytest.approx(ratio), name

    table = read_coefficients_csv(dashboard.download("Coefficients (CSV)"))
    assert sorted(table) == sorted(sides)
    for name, positions in table.items():
        node = positions["node"]
        assert node["depth_m"].size == cells + 1, name  # whole-cell depths 0..N
        assert node["depth_m"][-1] == pytest.approx(cells * dx), name
        assert node["sigma_S_per_m"][-1] == pytest.approx(sigma_max, rel=1e-3), name
        for position in positions.values():
            assert np.all((position["b"] > 0) & (position["b"] <= 1)), name

    # the downloaded file, one value changed, back in through the upload
    thicker = replace(scenario, boundary=replace(
        scenario.boundary, **{n: replace(getattr(scenario.boundary, n), cells=14) for n in SIDE_NAMES}))
    path = tmp_path / "thicker.toml"
    path.write_text(thicker.to_toml(), "utf-8")
    shown = dashboard.card("worst")
    dashboard.page.locator('input[type="file"][accept=".toml"]').set_input_files(path)
    dashboard.wait_for("the layer thickness from the file", lambda: dashboard.slider_value(CELLS),
                       lambda v: v == 14, timeout=30)
    dashboard.wait_card_change("worst", shown)
    dashboard.wait_idle()
    assert dashboard.alert() is None, dashboard.alert()
    assert math.isfinite(dashboard.db("worst")) and math.isfinite(dashboard.db("global"))


def test_two_sessions_do_not_share_changes(open_dashboard):
    one, two = open_dashboard(), open_dashboard()
    one.page.goto(one.url)  # both sessions start before either has a result
    two.page.goto(two.url)
    for dash in (one, two):
        dash.wait_first_result()
        dash.wait_idle()
    two_text, two_curves = two.card("worst"), two.spectrum()

    one.move_slider(ORDER, "ArrowRight", 5)
    # give a leaked update time to arrive in the other session
    two.page.wait_for_timeout(2000)

    assert one.slider_value(ORDER) == pytest.approx(3.5)
    assert two.slider_value(ORDER) == pytest.approx(3.0)
    assert two.card("worst") == two_text
    assert not two.busy()
    assert not curves_differ(two_curves, two.spectrum())
    assert "m" not in query(two.href())


def field_steps(dashboard) -> list[int]:
    """The time step in the titles of the two field images."""
    found = (re.search(r"^(total field|reflected only), step (\d+)$", t) for t in dashboard.figure_titles())
    return [int(m.group(2)) for m in found if m]


def test_time_scrubber_moves_both_field_images(dashboard):
    dashboard.open()
    # the figures follow the headline one by one: wait for both images' titles
    shown = dashboard.wait_for("both field images", lambda: field_steps(dashboard), lambda s: len(s) == 2,
                               timeout=30)
    assert shown[0] == shown[1] > 0, shown

    scrubber = dashboard.scrubber()
    scrubber.fill("0")  # dragged to the start of the run
    first = dashboard.wait_for("the field images to go to the first frame", lambda: field_steps(dashboard),
                               lambda s: len(s) == 2 and s[0] == s[1] < shown[0], timeout=15)
    scrubber.press("ArrowRight")
    dashboard.wait_for("the field images to step forward", lambda: field_steps(dashboard),
                       lambda s: len(s) == 2 and s[0] == s[1] > first[0], timeout=15)


def test_time_scrubber_is_drawn_at_the_frame_on_display(dashboard):
    dashboard.open()
    state = dashboard.scrubber_state()
    assert state["model"]["end"] > 1, state
    assert state["drawn"] == state["model"], state


PROBLEM_FIELDS = ("Cell size (dx = dy)", "Host eps_r", "Host conductivity (S/m)", "f_min", "f_max",
                  "Interior nx (cells)", "Interior ny (cells)", "Run length (steps)")


def test_every_problem_field_lies_inside_the_control_column(dashboard):
    dashboard.open()
    card = dashboard.page.locator(".card", has=dashboard.page.get_by_label("f_min", exact=True)).last.bounding_box()
    outside = []
    for label in PROBLEM_FIELDS:
        box = dashboard.page.get_by_label(label, exact=True).bounding_box()
        if box["x"] < card["x"] or box["x"] + box["width"] > card["x"] + card["width"]:
            outside.append(f"{label} at x = {box['x']:.0f}..{box['x'] + box['width']:.0f}")
    assert not outside, f"beyond the card at x = {card['x']:.0f}..{card['x'] + card['width']:.0f}: {outside}"


def test_dragging_a_slider_updates_the_headline_before_release(dashboard):
    dashboard.open()
    page = dashboard.page
    handle = dashboard.slider_handle(ORDER)
    handle.scroll_into_view_if_needed()
    box = handle.bounding_box()
    x, y = box["x"] + box["width"] / 2, box["y"] + box["height"] / 2
    seen = [dashboard.card("worst")]
    page.mouse.move(x, y)
    page.mouse.down()
    try:
        for step in range(1, 13):  # to the left, a few pixels at a time, as a hand would
            page.mouse.move(x - 6 * step, y)
            page.wait_for_timeout(150)
            text = dashboard.card("worst")
            if text is not None and text != seen[-1]:
                seen.append(text)
        during = dashboard.card("late")
    finally:
        page.mouse.up()
    assert len(seen) >= 3, f"the headline followed the drag only {len(seen) - 1} times: {seen}"
    assert all(math.isfinite(parse_db(t)) for t in seen), seen
    assert during in ("…", "checking…", "waiting…", "stable"), during
    # on release every figure follows, and the link holds the new value
    dashboard.settle()
    released = dashboard.slider_value(ORDER)
    assert released < 3.0
    assert float(query(dashboard.href())["m"]) == pytest.approx(released)
    assert math.isfinite(dashboard.db("global"))
