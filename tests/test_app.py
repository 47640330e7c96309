"""The page's logic without a browser: controls to scenario, downloads, report."""

import math

import pytest

from quietlayer.app.page import QuietlayerPage, load_preset
from quietlayer.app.report import report_html
from dataclasses import replace

from quietlayer.app.controls import CUSTOM
from quietlayer.engine import Boundary, Scenario, ScenarioError, Side
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
    page.controls.w_order.value = 4.0
    page.controls.w_ratio.value = 0.6
    page.controls.w_sides.value = ["right", "top"]
    page.controls.w_cell.value = "0.5 mm"
    s = page.scenario_from_controls()
    assert s.boundary.right.order == 4.0 and s.boundary.right.sigma_ratio == 0.6
    assert s.boundary.left.kind == "wall" and s.boundary.top.kind == "cpml"
    assert s.dx == s.dy == 0.5e-3


@pytest.mark.parametrize("text", ["-1 mm", "0 mm", "one mm", ""])
def test_bad_cell_size_is_a_named_error(page, text):
    page.controls.w_cell.value = text
    with pytest.raises(ScenarioError) as err:
        page.scenario_from_controls()
    assert err.value.field in ("cell size", "dx")


def test_resizing_the_interior_keeps_the_bench_layout(page):
    page.controls.w_nx.value = 120
    page.controls.w_ny.value = 150
    s = page.scenario_from_controls()
    assert s.source.x == 120 - 12
    assert all(p.x == 117 for p in s.probes)
    assert max(p.y for p in s.probes) <= 147


def test_every_preset_fills_the_controls(page):
    for name in page.controls.w_preset.options:
        base = load_preset(name)
        page.base = base
        page._set_widgets_from(base)
        s = page.scenario_from_controls()
        assert s.dx == pytest.approx(base.dx) and s.eps_r == base.eps_r and s.steps == base.steps


class Upload:
    def __init__(self, data: bytes):
        self.new = data


def test_a_loaded_file_keeps_its_own_values_until_a_control_moves(page):
    """A tuned 8.605 S/m must not come back as the slider's 0.05 grid (8.651 S/m), and sides
    a file sets apart stay apart."""
    demo = default_scenario()
    tuned = Side(kind="cpml", cells=12, order=3.3, sigma_max=8.605, kappa_max=2.3, alpha_max=0.0137,
                 alpha_order=1.0)
    other = replace(tuned, cells=8, kappa_max=7.0)
    s = demo.with_changes(courant=0.987, dy=demo.dx / 2,
                          boundary=Boundary(left=tuned, right=tuned, bottom=other, top=Side(kind="wall")))
    page._scenario_uploaded(Upload(s.to_toml().encode()))
    assert page.controls.w_preset.value == CUSTOM  # the preset box says where the setting came from
    assert "dy = 500 µm as loaded" in page.controls.w_cell.name  # non-square cells are not hidden
    loaded = page.scenario_from_controls()
    assert loaded == s
    assert "sides differ" in page.controls.sigma_text(loaded)
    page.controls.w_kappa.value = 3.0  # a layer control moved: every layered side takes the controls' layer
    moved = page.scenario_from_controls()
    for name in ("left", "right", "bottom"):
        side = getattr(moved.boundary, name)
        assert side.kappa_max == 3.0 and side.sigma_max == 8.605 and side.order == 3.3 and side.cells == 12
    assert moved.boundary.top.kind == "wall" and moved.courant == 0.987 and moved.dy == demo.dx / 2
    page.controls.w_cell.value = "2 mm"  # a new cell size sets dx = dy, and the label says so again
    page.request()
    assert page.scenario_from_controls().dy == 2e-3 and page.controls.w_cell.name == "Cell size (dx = dy)"
    page.controls.w_cell.value = "1 mm"  # the loaded dx again: the loaded dy is measured and named
    page.request()
    assert page.scenario_from_controls().dy == demo.dx / 2 and "as loaded" in page.controls.w_cell.name
    page.controls.w_preset.value = "demo"  # back to a preset: the file's values are gone
    assert page.scenario_from_controls() == demo
    assert CUSTOM not in page.controls.w_preset.options
    assert page.controls.w_cell.name == "Cell size (dx = dy)"


def test_a_refused_value_is_marked_at_its_control(page):
    page.controls.w_cell.value = "3 parsecs"
    page.request()
    assert page.message.visible and "cell size" in page.message.object
    assert page.controls.w_cell.styles.get("outline", "").startswith("2px solid")
    assert not page.controls.w_steps.styles
    page.controls.w_cell.value = "1 mm"
    page.request()
    assert not page.controls.w_cell.styles and not page.message.visible


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


# --- the sweep view (page logic only: the physics of each point is the engine's) ----------------

import csv
import io
import time
from dataclasses import replace

import holoviews as hv
import numpy as np

from quietlayer.app import plots
from quietlayer.app.sweep_view import SWEEP_CHOICES, sweep_axis
from quietlayer.engine.sweep import Axis, SweepTable, apply_point, grid_points

SWEEP_WAIT_S = 120.0  # a 3 x 3 sweep takes about a second; slack for a loaded machine


def wait_for_sweep(view, timeout=SWEEP_WAIT_S):
    deadline = time.monotonic() + timeout
    while view.stop is not None:
        assert time.monotonic() < deadline, f"the sweep did not finish within {timeout:.0f} s"
        time.sleep(0.02)


def small_sweep(view, x=("order", "2", "6", 3), y=("sigma_ratio", "0.5", "1.5", 3), score="worst_peak_db"):
    for which, (name, start, stop, count) in (("x", x), ("y", y)):
        f = view.fields[which]
        f["name"].value = name
        f["start"].value, f["stop"].value, f["count"].value = start, stop, count
    view.w_score.value = score
    view.start()
    wait_for_sweep(view)
    return view.table


def made_up_table():
    """A hand-made table over order x sigma_ratio: one point invalid, one not back yet."""
    points = grid_points([Axis("order", (2.0, 4.0, 6.0)), Axis("sigma_ratio", (0.5, 1.0))])
    rows = {}
    for k, p in enumerate(points):
        score = -10.0 * p["order"] - 20.0 * p["sigma_ratio"]  # invented scores, lowest at (6, 1)
        rows[k] = {"point": p, "status": "ok", "reason": "", "worst_peak_db": score, "global_db": score - 15.0,
                   "worst_band_db": score + 5.0, "run_s": 0.01}
    rows[1] = {"point": points[1], "status": "invalid", "reason": "sigma_ratio = 1 is not allowed: invented",
               "run_s": 0.0}
    del rows[4]  # (6, 0.5) still running
    return SweepTable(parameters=["order", "sigma_ratio"], points=points, rows=rows)


def test_sweep_grid_arranges_the_table_by_value():
    grid = plots.sweep_grid(made_up_table(), "order", "sigma_ratio", "worst_peak_db")
    assert grid.x_values.tolist() == [2.0, 4.0, 6.0] and grid.y_values.tolist() == [0.5, 1.0]
    assert grid.z.shape == (2, 3)  # rows: sigma_ratio, columns: order
    assert grid.z[0, 1] == -50.0 and grid.z[1, 2] == -80.0
    assert grid.status[1, 0] == "invalid" and np.isnan(grid.z[1, 0]) and "invented" in grid.reason[1, 0]
    assert grid.status[0, 2] == "pending" and np.isnan(grid.z[0, 2])
    assert grid.index[1, 2] == 5 and grid.cell_of(5) == (2, 1)
    assert grid.best == (2, 1)  # the table's best, at (6, 1)
    # the axes may be swapped: the same cell under its other name
    swapped = plots.sweep_grid(made_up_table(), "sigma_ratio", "order", "global_db")
    assert swapped.z.shape == (3, 2) and swapped.z[2, 1] == -95.0 and swapped.best == (1, 2)


def test_sweep_grid_names_a_bad_choice():
    table = made_up_table()
    with pytest.raises(ScenarioError, match="x parameter"):
        plots.sweep_grid(table, "cells", "order", "worst_peak_db")
    with pytest.raises(ScenarioError, match="y parameter"):
        plots.sweep_grid(table, "order", "order", "worst_peak_db")
    with pytest.raises(ScenarioError, match="score"):
        plots.sweep_grid(table, "order", "sigma_ratio", "loudness")


def test_click_maps_to_the_nearest_grid_point():
    grid = plots.sweep_grid(made_up_table(), "order", "sigma_ratio", "worst_peak_db")
    assert plots.nearest_cell(grid, 2.9, 0.74) == (0, 0)
    assert plots.nearest_cell(grid, 3.1, 0.76) == (1, 1)
    assert plots.nearest_cell(grid, 99.0, -5.0) == (2, 0)  # beyond the map: the nearest edge cell
    # lengths are drawn in a readable unit: a click at 0.75 (mm) is the 0.75 mm cell size
    points = grid_points([Axis("cell", (0.5e-3, 0.75e-3, 1e-3)), Axis("order", (2.0, 3.0))])
    rows = {k: {"point": p, "status": "ok", "reason": "", "worst_peak_db": -40.0, "run_s": 0.0}
            for k, p in enumerate(points)}
    mm = plots.sweep_grid(SweepTable(["cell", "order"], points, rows), "cell", "order", "worst_peak_db")
    assert plots.nearest_cell(mm, 0.74, 3.2) == (1, 1)


def test_heatmap_figure_carries_every_cell():
    table = made_up_table()
    fig = hv.render(plots.sweep_heatmap(table, "order", "sigma_ratio", "worst_peak_db", chosen=3))
    sources = [r.data_source.data for r in fig.renderers]
    scored = next(d for d in sources if "score" in d and len(d["score"]) and np.isfinite(d["score"]).all())
    assert sorted(scored["score"]) == sorted(r["worst_peak_db"] for r in table.rows.values() if r["status"] == "ok")
    unscored = next(d for d in sources if "status" in d and set(d["status"]) == {"invalid", "pending"})
    assert any("invented" in r for r in unscored["reason"])
    best = next(d for d in sources if "best" in d)
    assert (best["x0"][0], best["y0"][0]) == (6.0, 1.0)
    levels = next(d for d in sources if "level" in d)["level"]
    assert len(levels) and all(level % 10 == 0 for level in levels)  # contours every 10 dB
    assert fig.title.text.startswith("sweep map: worst peak error")


def test_sweep_axis_snaps_to_the_control_and_names_bad_fields():
    assert sweep_axis("order", "1", "6", 6).values == (1.0, 2.0, 3.0, 4.0, 5.0, 6.0)
    assert sweep_axis("order", "1", "6", 4).values == (1.0, 2.7, 4.3, 6.0)  # the slider's 0.1 steps
    assert sweep_axis("sigma_ratio", "0.25", "2", 8).values == (0.25, 0.5, 0.75, 1.0, 1.25, 1.5, 1.75, 2.0)
    assert sweep_axis("cells", "2", "3", 5).values == (2, 3)  # whole cells, repeats dropped
    assert sweep_axis("cell", "0.5 mm", "1 mm", 3).values == (0.0005, 0.00075, 0.001)
    assert sweep_axis("order", "4", "4", 1).values == (4.0,)
    cases = [(("order", "0", "6", 3), "x start", "from 1 to 6"),
             (("order", "1", "7", 3), "x stop", "from 1 to 6"),
             (("sigma_ratio", "abc", "2", 3), "x start", "from 0.05 to 5"),
             (("cell", "1 mm", "2 m", 3), "x stop", "from 1 nm to 1 m"),
             (("order", "1", "6", 0), "x count", "from 1 to 40"),
             (("order", "1", "6", 41), "x count", "from 1 to 40"),
             (("order", "2", "2", 3), "x stop", "other than the start"),
             (("loudness", "1", "2", 3), "x parameter", "one of")]
    for args, field, allowed in cases:
        with pytest.raises(ScenarioError) as err:
            sweep_axis(*args)
        assert err.value.field == field and allowed in str(err.value), (args, str(err.value))


def test_every_offered_parameter_has_a_control_that_holds_its_range(page):
    """A swept value must be loadable: each control reaches its parameter's whole range."""
    controls = {"order": page.controls.w_order, "sigma_ratio": page.controls.w_ratio, "cells": page.controls.w_cells, "kappa_max": page.controls.w_kappa,
                "alpha_max": page.controls.w_alpha, "alpha_order": page.controls.w_alpha_order, "courant": page.controls.w_courant,
                "eps_r": page.controls.w_eps, "sigma": page.controls.w_sigma_host}
    assert set(SWEEP_CHOICES) == set(controls) | {"cell"}
    for name, widget in controls.items():
        choice = SWEEP_CHOICES[name]
        assert (widget.start, widget.end) == (choice.lo, choice.hi), name
        default = sweep_axis(name, choice.start, choice.stop, choice.count)
        assert len(default.values) >= 2, name


def test_sweep_form_errors_are_shown_inline(page):
    view = page.sweep
    view.fields["x"]["start"].value = "0.5"
    view.start()
    assert view.message.visible and "x start" in view.message.object and "from 1 to 6" in view.message.object
    assert view.table is None
    view.fields["x"]["start"].value = "1"
    view.fields["y"]["name"].value = "order"
    view.start()
    assert view.message.visible and "y parameter" in view.message.object
    page.controls.w_sides.value = []
    view.fields["y"]["name"].value = "eps_r"
    view.start()
    assert "no side carries a layer" in view.message.object


def test_choosing_a_parameter_resets_its_range(page):
    f = page.sweep.fields["y"]
    f["name"].value = "cell"
    assert (f["start"].value, f["stop"].value) == ("500 µm", "2 mm")  # around the 1 mm cells in the controls
    assert "1 nm" in f["hint"].object
    f["name"].value = "courant"
    assert (f["start"].value, f["stop"].value, f["count"].value) == ("0.5", "0.99", 8)


def test_sweep_runs_on_the_controls_and_a_click_loads_the_cell(page):
    view = page.sweep
    page.controls.w_kappa.value = 3.0  # a setting the sweep must carry along
    table = small_sweep(view)
    assert table.complete and table.done == 9
    assert all(r["status"] == "ok" for r in table.rows.values())
    assert view.base == page.scenario_from_controls()
    assert view.base.boundary.right.kappa_max == 3.0
    grid = plots.sweep_grid(table, "order", "sigma_ratio", "worst_peak_db")
    assert np.isfinite(grid.z).all()
    assert grid.best == grid.cell_of(table.best("worst_peak_db")[0])
    assert grid.z[grid.best[1], grid.best[0]] == np.nanmin(grid.z)

    page.controls.w_kappa.value = 1.0  # the controls move on; the map still stands for the sweep's scenario
    i, j = plots.nearest_cell(grid, 6.2, 0.45)
    assert (i, j) == (2, 0)
    assert view.load_cell(i, j)
    assert page.controls.w_order.value == 6.0 and page.controls.w_ratio.value == 0.5 and page.controls.w_kappa.value == 3.0
    loaded = page.scenario_from_controls()
    index = int(grid.index[j, i])
    assert loaded == apply_point(view.base, table.points[index])
    assert view.chosen == index and "Loaded" in view.status.object
    rows = list(csv.DictReader(io.StringIO(view._csv_file().getvalue())))
    assert len(rows) == 9 and {r["status"] for r in rows} == {"ok"}
    assert float(rows[index]["worst_peak_db"]) == table.rows[index]["worst_peak_db"]
    # the controls now hold exactly the measured setting: measuring them gives the cell's score
    again = measure(loaded, parts={"probes", "global", "spectra"})
    assert again.worst_peak_db == pytest.approx(table.rows[index]["worst_peak_db"], abs=1e-9)


def test_a_cell_without_a_measurement_is_not_loaded(page):
    view = page.sweep
    small_sweep(view)
    index = 4  # the centre cell
    view.table = replace(view.table, rows={**view.table.rows, index: {
        "point": view.table.points[index], "status": "diverged", "reason": "run diverged at step 90: made up",
        "run_s": 0.0}})
    before = page.scenario_from_controls()
    assert not view.load_cell(1, 1)
    assert "diverged" in view.status.object and "made up" in view.status.object
    assert page.scenario_from_controls() == before


def test_best_point_and_score_follow_the_chosen_score(page):
    view = page.sweep
    table = small_sweep(view)
    view.w_score.value = "global_db"
    best = table.best("global_db")
    assert "global error" in view.status.object and f"{best[1]['global_db']:.1f} dB" in view.status.object
    view.load_best()
    assert page.controls.w_order.value == best[1]["point"]["order"]
    assert page.controls.w_ratio.value == best[1]["point"]["sigma_ratio"]


def test_cancel_keeps_the_points_done(page, monkeypatch):
    view = page.sweep
    shown = view._progress

    def cancel_at_once(generation, done, copy):
        shown(generation, done, copy)
        view.cancel()

    monkeypatch.setattr(view, "_progress", cancel_at_once)
    view.start()  # the default 11 x 8 points
    wait_for_sweep(view)
    table = view.table
    assert not table.complete and 1 <= table.done < len(table.points)
    assert "cancelled after" in view.status.object
    grid = plots.sweep_grid(table, "order", "sigma_ratio", "worst_peak_db")
    assert np.isfinite(grid.z).sum() == table.done
    assert (grid.status == "pending").sum() == len(table.points) - table.done


def test_a_new_sweep_replaces_the_old(page, monkeypatch):
    view = page.sweep
    first = []
    shown = view._progress

    def restart_once(generation, done, copy):
        shown(generation, done, copy)
        if not first:
            first.append(generation)
            small_sweep_fields(view)
            view.start()

    def small_sweep_fields(v):
        for which, (name, start, stop, count) in (("x", ("cells", "6", "10", 3)), ("y", ("order", "2", "4", 2))):
            f = v.fields[which]
            f["name"].value = name
            f["start"].value, f["stop"].value, f["count"].value = start, stop, count

    monkeypatch.setattr(view, "_progress", restart_once)
    view.start()
    wait_for_sweep(view)
    assert view.generation == first[0] + 1
    assert view.names == ("cells", "order") and view.table.complete and view.table.done == 6
    assert {tuple(p) for p in view.table.points} == {("cells", "order")}


def test_closing_the_session_stops_the_sweep(page, monkeypatch):
    view = page.sweep
    calls = []
    shown = view._progress

    def close_at_once(generation, done, copy):
        calls.append(done)
        shown(generation, done, copy)
        page.close()

    monkeypatch.setattr(view, "_progress", close_at_once)
    view.start()
    view.pool.shutdown(wait=True)  # the worker has returned
    assert 1 <= max(calls) <= 4 < 88  # the point that told it to stop, and those already running
    with pytest.raises(RuntimeError):
        view.pool.submit(print)  # no more work is taken


def test_presentation_mode_redraws_the_map_larger(page):
    view = page.sweep
    small_sweep(view)
    key = view.figure_key
    page.w_present.value = True
    assert view.figure_key != key and view.figure_key[2] == page.fontscale > 1.0
    assert view.pane.object is not None
