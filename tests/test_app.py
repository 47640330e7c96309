"""The page's logic without a browser: controls to scenario, downloads, report."""

import math

import pytest

from quietlayer.app.page import QuietlayerPage, load_preset
from quietlayer.app.report import report_html
from quietlayer.engine import Scenario, ScenarioError
from quietlayer.engine.defaults import default_scenario
from quietlayer.engine.export import read_coefficients_csv
from quietlayer.engine.measure import measure


@pytest.fixture
def page():
    p = QuietlayerPage()
    yield p
    p.measure_pool.shutdown(wait=False)
    p.late_pool.shutdown(wait=False)


def test_controls_start_on_the_demo(page):
    assert page.scenario_from_controls() == default_scenario()


def test_controls_change_the_layer_and_problem(page):
    page.w_order.value = 4.0
    page.w_ratio.value = 0.6
    page.w_sides.value = ["right", "top"]
    page.w_cell.value = "0.5 mm"
    s = page.scenario_from_controls()
    assert s.boundary.right.order == 4.0 and s.boundary.right.sigma_ratio == 0.6
    assert s.boundary.left.kind == "wall" and s.boundary.top.kind == "cpml"
    assert s.dx == s.dy == 0.5e-3


@pytest.mark.parametrize("text", ["-1 mm", "0 mm", "one mm", ""])
def test_bad_cell_size_is_a_named_error(page, text):
    page.w_cell.value = text
    with pytest.raises(ScenarioError) as err:
        page.scenario_from_controls()
    assert err.value.field in ("cell size", "dx")


def test_resizing_the_interior_keeps_the_bench_layout(page):
    page.w_nx.value = 120
    page.w_ny.value = 150
    s = page.scenario_from_controls()
    assert s.source.x == 120 - 12
    assert all(p.x == 117 for p in s.probes)
    assert max(p.y for p in s.probes) <= 147


def test_every_preset_fills_the_controls(page):
    for name in page.w_preset.options:
        base = load_preset(name)
        page.base = base
        page._set_widgets_from(base)
        s = page.scenario_from_controls()
        assert s.dx == pytest.approx(base.dx) and s.eps_r == base.eps_r and s.steps == base.steps


def test_downloads_parse_and_reload(page):
    page.last_good = page.scenario_from_controls()
    assert Scenario.from_toml(page._toml_file().getvalue()) == page.last_good
    tables = read_coefficients_csv(page._csv_file().getvalue())
    assert set(tables) == {"left", "right", "bottom", "top"}


def test_report_is_standalone_and_carries_the_caution():
    m = measure(default_scenario(steps=300), parts={"probes", "spectra", "angles", "global", "snapshots"})
    text = report_html(m)
    assert "certifies no RF-exposure, EMC or safety compliance" in text
    assert "Bokeh" in text and "cdn.bokeh.org" not in text  # scripts inlined: opens offline
    assert f"{m.worst_peak_db:.1f}" in text
    assert math.isfinite(m.worst_peak_db)
