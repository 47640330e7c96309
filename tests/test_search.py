"""Search for the best layer at a thickness, and the thinnest layer for a target."""

from __future__ import annotations

import math

import pytest
import scipy.constants

from quietlayer.engine import ScenarioError, search
from quietlayer.engine.defaults import default_scenario
from quietlayer.engine.search import (default_bounds, layer_setting, max_thicknesses, start_point, thinnest_layer,
                                      tune_layer)
from quietlayer.engine.sweep import LocalPool, apply_point, grid_points, parse_vary, run_sweep
from quietlayer.engine.units import EPS0

BASE = default_scenario()


@pytest.fixture(scope="module")
def pool():
    return LocalPool(2)


@pytest.fixture(scope="module")
def grid_best(pool):
    """Best point of a 6 x 8 grid over order and sigma ratio on the default bench."""
    axes = [parse_vary("order=1:6:6"), parse_vary("sigma_ratio=0.25:2:8:log")]
    table = run_sweep(BASE, grid_points(axes), pool)
    index, row = table.best("worst_peak_db")
    return row, len(table.points)


def test_search_beats_the_grid_in_fewer_runs(pool, grid_best):
    row, grid_runs = grid_best
    result = tune_layer(BASE, budget=40, executor=pool)
    assert result.runs <= 40 < grid_runs
    assert result.value <= row["worst_peak_db"], (result.point, result.value, row)
    assert result.row["status"] == "ok" and result.scenario.boundary.right.order == result.point["order"]
    # the same search over the grid's own two parameters also does at least as well
    two = tune_layer(BASE, budget=40, free=("order", "sigma_ratio"), executor=pool)
    assert two.runs <= 40 and two.value <= row["worst_peak_db"] + 0.5


def test_search_stays_in_bounds_and_is_repeatable(pool):
    bounds = default_bounds(BASE)
    first = tune_layer(BASE, budget=12, executor=pool, seed=3)
    again = tune_layer(BASE, budget=12, executor=pool, seed=3)
    assert [r["point"] for r in first.path] == [r["point"] for r in again.path]
    assert first.runs == len(first.path) <= 12
    assert len({tuple(r["point"].values()) for r in first.path}) == first.runs  # no point measured twice
    for r in first.path:
        for b in bounds:
            assert b.lo <= r["point"][b.name] <= b.hi
    # alpha's bound puts the CFS corner alpha / (2 pi eps0) at f_min (common practice, no source)
    alpha = next(b for b in bounds if b.name == "alpha_max")
    assert alpha.hi / (2 * math.pi * EPS0) == pytest.approx(BASE.source.f_min)


def test_thinnest_layer_meets_the_target_and_one_cell_less_does_not(pool):
    target = -60.0
    result = thinnest_layer(BASE, target, cells_range=(3, 20), budget=16, executor=pool)
    assert result.met, {c: t.value for c, t in result.tried.items()}
    assert result.tune.value <= target
    if result.cells > 3:
        assert result.tried[result.cells - 1].value > target
    assert result.runs == sum(t.runs for t in result.tried.values())


def test_search_inputs_are_checked():
    with pytest.raises(ScenarioError) as info:
        tune_layer(BASE, budget=3)
    assert info.value.field == "budget"
    with pytest.raises(ScenarioError) as info:
        tune_layer(BASE, free=("loudness",))
    assert info.value.field == "free"
    with pytest.raises(ScenarioError) as info:
        thinnest_layer(BASE, 5.0)
    assert info.value.field == "target"


def test_progress_reports_every_run_with_its_stage_and_can_stop_the_search(pool):
    seen = []

    def progress(runs, budget, row):
        seen.append((runs, budget, row["run"], row["stage"], row["point"]))
        return runs < 5  # stop after the fifth run

    result = tune_layer(BASE, budget=12, executor=pool, progress=progress)
    assert result.stopped and result.runs == 5 == len(seen)
    assert [s[0] for s in seen] == [1, 2, 3, 4, 5] and all(s[1] == 12 for s in seen)
    # each reported row carries the stage and run number it has in the result's path
    by_run = {r["run"]: r for r in result.path}
    assert sorted(by_run) == [1, 2, 3, 4, 5]
    for _, _, run, stage, point in seen:
        assert by_run[run]["stage"] == stage and by_run[run]["point"] == point
    assert result.value == min(r["worst_peak_db"] for r in result.path if r["status"] == "ok")
    whole = tune_layer(BASE, budget=8, executor=pool, progress=lambda *a: None)
    assert not whole.stopped and whole.runs == 8


def _fake_tuning(monkeypatch, passes_from: int, stop_at: int | None = None):
    """thinnest_layer over a stand-in tune_layer whose tuned value meets -60 dB
    from `passes_from` cells on (no runs); stop_at: the thickness whose second
    run asks to stop.  Returns the thicknesses tuned, in order."""
    order = []

    def fake(base, cells, *, budget, progress=None, **_):
        order.append(cells)
        value = -70.0 if cells >= passes_from else -50.0
        stopped = False
        for run in (1, 2):
            if progress is not None and progress(run, budget, {"run": run, "stage": "sample"}) is False:
                stopped = True
                break
        return search.TuneResult(cells=cells, score="worst_peak_db", point={}, row={"worst_peak_db": value},
                                 scenario=base, runs=run, stopped=stopped)

    monkeypatch.setattr(search, "tune_layer", fake)
    return order


def test_thinnest_layer_bounds_its_thicknesses_and_stops_on_request(monkeypatch):
    # growth 4, 6, 9, 14, 21, 32, 40; the worst is a pass at 32 (bisection of 21..32: 4 more) -> 10
    assert max_thicknesses((4, 40)) == 10 and max_thicknesses((5, 5)) == 1
    for lo, hi in ((4, 40), (3, 20), (2, 9)):
        counts = []
        for passes_from in range(lo, hi + 2):
            order = _fake_tuning(monkeypatch, passes_from)
            result = thinnest_layer(BASE, -60.0, cells_range=(lo, hi), budget=8)
            assert result.cells == (passes_from if passes_from <= hi else None) and not result.stopped
            assert len(order) == len(set(order))
            counts.append(len(order))
        assert max(counts) == max_thicknesses((lo, hi)), counts

    # a stop mid-thickness keeps the thinnest thickness tried that met the target
    order = _fake_tuning(monkeypatch, passes_from=8)
    calls = []

    def each_run(cells, runs, budget, row):
        calls.append((cells, runs))
        return not (cells == 7 and runs == 2)

    result = thinnest_layer(BASE, -60.0, cells_range=(4, 40), budget=8, run_progress=each_run)
    assert order == [4, 6, 9, 7] and result.stopped and result.cells == 9 and result.tune.cells == 9
    assert calls[:2] == [(4, 1), (4, 2)] and calls[-1] == (7, 2)
    order = _fake_tuning(monkeypatch, passes_from=7)
    result = thinnest_layer(BASE, -60.0, cells_range=(4, 40), budget=8, progress=lambda cells, t: cells < 6)
    assert order == [4, 6] and result.stopped and result.cells is None


def test_layer_setting_and_start_point_read_the_scenario_layer():
    s = apply_point(BASE, {"order": 2.5, "sigma_ratio": 0.7, "kappa_max": 20.0, "alpha_max": 0.01})
    setting = layer_setting(s)
    # sigma_opt = 0.8 (m + 1) / (eta0 dx sqrt(eps_r)) (Taflove & Hagness), eta0 = mu0 c0 (CODATA via scipy)
    eta0 = scipy.constants.mu_0 * scipy.constants.c
    opt = 0.8 * 3.5 / (eta0 * s.dx * math.sqrt(s.eps_r))
    assert setting["sigma_opt"] == pytest.approx(opt, rel=1e-9)
    assert setting["sigma_max"] == pytest.approx(0.7 * opt, rel=1e-9) and setting["sigma_ratio"] == pytest.approx(0.7)
    assert (setting["order"], setting["kappa_max"], setting["alpha_max"], setting["cells"]) == (2.5, 20.0, 0.01, 10)
    start = start_point(s)
    assert start["kappa_max"] == 15.0  # clipped into the search range 1..15
    assert start["order"] == 2.5 and start["sigma_ratio"] == pytest.approx(0.7)
