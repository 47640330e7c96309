"""Search for the best layer at a thickness, and the thinnest layer for a target."""

from __future__ import annotations

import math

import pytest

from quietlayer.engine import ScenarioError
from quietlayer.engine.defaults import default_scenario
from quietlayer.engine.search import default_bounds, thinnest_layer, tune_layer
from quietlayer.engine.sweep import LocalPool, grid_points, parse_vary, run_sweep
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
