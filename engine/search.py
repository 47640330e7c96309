"""Search: the best layer for a thickness, and the thinnest layer for a target.

    best = tune_layer(base, cells=10, budget=40)       # best.point, best.row, best.runs
    thin = thinnest_layer(base, target_db=-60.0)       # thin.cells, thin.tune
    layer_setting(best.scenario)                       # the tuned layer in words and S/m

tune_layer works in two stages, both on the sweep machinery: a Latin-
hypercube sample of the free parameters (scipy.stats.qmc), measured in
parallel, then scipy.optimize.minimize (Nelder-Mead, bounded) from the best
sample.  Every measurement counts against the budget, repeats are looked up,
and a point that is invalid or diverges scores PENALTY_DB.  Both take
progress callbacks called after every run, which may stop the search (the
best setting so far is kept, and the result says it was stopped).
"""

from __future__ import annotations

import math
from dataclasses import dataclass, field

import numpy as np
from scipy.optimize import minimize
from scipy.stats import qmc

from .errors import ScenarioError
from .layer import resolved_sigma_max, side_cell, sigma_opt
from .scenario import SIDES, Scenario
from .sweep import SCORES, LocalPool, apply_point, run_sweep
from .units import EPS0

FREE_DEFAULT = ("order", "sigma_ratio", "kappa_max", "alpha_max")
PENALTY_DB = 0.0  # a failed point scores as a total reflection
MIN_BUDGET = 8


@dataclass(frozen=True)
class Bound:
    """Search range of one parameter; log: searched on a log scale."""

    name: str
    lo: float
    hi: float
    log: bool = False

    def to_unit(self, value: float) -> float:
        if self.hi == self.lo:
            return 0.0
        if self.log:
            return (math.log(value) - math.log(self.lo)) / (math.log(self.hi) - math.log(self.lo))
        return (value - self.lo) / (self.hi - self.lo)

    def from_unit(self, u: float) -> float:
        u = min(max(float(u), 0.0), 1.0)
        if self.log:
            return math.exp(math.log(self.lo) + u * (math.log(self.hi) - math.log(self.lo)))
        return self.lo + u * (self.hi - self.lo)


def default_bounds(base: Scenario, free=FREE_DEFAULT) -> list[Bound]:
    """Ranges used in practice (common practice, no source): m 1..6,
    sigma_max 0.05..3 sigma_opt, kappa_max 1..15, and alpha_max up to the
    value whose CFS corner alpha / (2 pi eps0 eps_r) sits at the band's
    lowest frequency (a tenth of f_max when the band starts at 0)."""
    f_corner = base.source.f_min if base.source.f_min > 0 else base.source.f_max / 10
    table = {
        "order": Bound("order", 1.0, 6.0),
        "sigma_ratio": Bound("sigma_ratio", 0.05, 3.0, log=True),
        "kappa_max": Bound("kappa_max", 1.0, 15.0),
        "alpha_max": Bound("alpha_max", 0.0, 2 * math.pi * EPS0 * base.eps_r * f_corner),
        "alpha_order": Bound("alpha_order", 0.5, 4.0),
    }
    unknown = [name for name in free if name not in table]
    if unknown:
        raise ScenarioError("free", unknown[0], "parameters among " + ", ".join(table))
    return [table[name] for name in free]


@dataclass
class TuneResult:
    """The best setting found for one thickness."""

    cells: int
    score: str
    point: dict  # the best parameter values
    row: dict  # its sweep row (every score)
    scenario: Scenario  # the base with the best layer on it
    runs: int
    path: list = field(default_factory=list)  # every row measured, in order, with its 'stage' and 'run'
    stopped: bool = False  # the progress callback stopped the search before its budget or convergence

    @property
    def value(self) -> float:
        return self.row.get(self.score, math.nan)


@dataclass
class ThinnestResult:
    """The thinnest tuned layer that meets the target (cells None if none did)."""

    target_db: float
    cells: int | None
    tune: TuneResult | None
    tried: dict  # cells -> TuneResult
    runs: int
    stopped: bool = False  # the progress callback stopped the search

    @property
    def met(self) -> bool:
        return self.cells is not None


def _score_of(row: dict, score: str) -> float:
    value = row.get(score, math.nan) if row["status"] == "ok" else math.nan
    return value if math.isfinite(value) else PENALTY_DB


def _with_cells(base: Scenario, cells: int | None) -> Scenario:
    if cells is None:
        return base
    return apply_point(base, {"cells": cells})


def current_cells(base: Scenario) -> int:
    sides = [getattr(base.boundary, n) for n in SIDES if getattr(base.boundary, n).kind == "cpml"]
    if not sides:
        raise ScenarioError("layer", "no CPML side", "at least one side of kind 'cpml' to tune")
    return max(s.cells for s in sides)


def _first_layer(s: Scenario) -> tuple[str, object]:
    current_cells(s)  # at least one CPML side, or a clear error
    name = next(n for n in SIDES if getattr(s.boundary, n).kind == "cpml")
    return name, getattr(s.boundary, name)


def layer_setting(s: Scenario) -> dict:
    """The layer of the first CPML side as numbers: cells, order, sigma_ratio,
    sigma_max and sigma_opt (S/m), kappa_max, alpha_max (S/m), alpha_order."""
    name, side = _first_layer(s)
    cell = side_cell(s, name)
    smax = resolved_sigma_max(side, cell, s.eps_r)
    opt = sigma_opt(side.order, cell, s.eps_r)
    return {"side": name, "cells": side.cells, "order": side.order, "sigma_ratio": smax / opt, "sigma_max": smax,
            "sigma_opt": opt, "kappa_max": side.kappa_max, "alpha_max": side.alpha_max,
            "alpha_order": side.alpha_order}


def start_point(s: Scenario, free=FREE_DEFAULT) -> dict:
    """The scenario's own setting of the free parameters (its first CPML
    side), clipped into the search ranges: passed as `start`, the search
    measures it, so its result is never worse than the scenario's layer."""
    setting = layer_setting(s)
    return {b.name: min(max(setting[b.name], b.lo), b.hi) for b in default_bounds(s, free)}


def max_thicknesses(cells_range=(4, 40)) -> int:
    """The most thicknesses thinnest_layer can tune in cells_range: the
    growth steps up to the first passing one, then bisection of the gap
    below it (ceil(log2(gap)) steps at most)."""
    lo, hi = cells_range
    grown, fail, cells = [], lo - 1, lo
    worst = 0
    while True:
        grown.append(cells)
        worst = max(worst, len(grown) + max(0, math.ceil(math.log2(cells - fail)) if cells - fail > 1 else 0))
        if cells == hi:
            return worst
        fail, cells = cells, min(hi, max(cells + 1, round(cells * 1.5)))


def tune_layer(base: Scenario, cells: int | None = None, *, budget: int = 40, score: str = "worst_peak_db",
               free=FREE_DEFAULT, bounds: list[Bound] | None = None, executor=None, start: dict | None = None,
               progress=None, seed: int = 0) -> TuneResult:
    """Minimise `score` over the free layer parameters at a fixed thickness.

    budget: measurements at most (>= 8); start: a point to include (e.g. the
    best of a neighbouring thickness); progress(runs, budget, row) after each
    run (row with its 'stage', 'sample' or 'refine', and 'run', its number in
    the result's path) may return False to stop early with the best so far.
    """
    if score not in SCORES:
        raise ScenarioError("score", score, "one of " + ", ".join(SCORES))
    if not isinstance(budget, int) or budget < MIN_BUDGET:
        raise ScenarioError("budget", budget, f"a whole number of runs >= {MIN_BUDGET}")
    s = _with_cells(base, cells)
    cells = current_cells(s)
    bounds = bounds or default_bounds(s, free)
    own = executor is None
    executor = executor or LocalPool()
    seen: dict[tuple, dict] = {}
    path: list[dict] = []
    stopped = False

    def to_point(u) -> dict:
        return {b.name: round(b.from_unit(x), 6) for b, x in zip(bounds, u)}

    def measure_points(points: list[dict], stage: str) -> list[dict]:
        nonlocal stopped
        fresh = [p for p in points if tuple(p.values()) not in seen]
        fresh = list({tuple(p.values()): p for p in fresh}.values())[: max(0, budget - len(path))]
        if fresh and not stopped:
            def report(done, total, index, row):
                nonlocal stopped
                if progress is not None and progress(len(path) + done, budget,
                                                     dict(row, stage=stage, run=len(path) + index + 1)) is False:
                    stopped = True  # also when it was this batch's last run
                    return False
                return None
            table = run_sweep(s, fresh, executor, progress=report)
            for i in sorted(table.rows):
                row = dict(table.rows[i], stage=stage, run=len(path) + 1)
                seen[tuple(fresh[i].values())] = row
                path.append(row)
        return [seen.get(tuple(p.values())) for p in points]

    try:
        # stage 1: a space-filling sample, measured in parallel
        n_sample = max(4, min(budget // 3, 4 * len(bounds)))
        sample = qmc.LatinHypercube(d=len(bounds), seed=seed).random(n_sample)
        points = [to_point(u) for u in sample]
        if start is not None:
            points.insert(0, {b.name: start[b.name] for b in bounds if b.name in start} | {
                b.name: round(b.from_unit(0.5), 6) for b in bounds if b.name not in start})
        measure_points(points, "sample")

        # stage 2: Nelder-Mead in the unit cube from the best sample
        best_row = min(path, key=lambda r: _score_of(r, score))
        u0 = np.clip([b.to_unit(best_row["point"][b.name]) for b in bounds], 0.0, 1.0)

        def objective(u):
            if len(path) >= budget or stopped:
                raise _StopSearch
            row = measure_points([to_point(u)], "refine")[0]
            return _score_of(row, score) if row is not None else PENALTY_DB

        simplex = [u0] + [np.clip(u0 + 0.15 * np.eye(len(bounds))[k] * (1 if u0[k] < 0.85 else -1), 0, 1)
                          for k in range(len(bounds))]
        try:
            minimize(objective, u0, method="Nelder-Mead", bounds=[(0.0, 1.0)] * len(bounds),
                     options={"initial_simplex": np.array(simplex), "maxfev": 10 * budget,
                              "xatol": 1e-3, "fatol": 0.05})
        except _StopSearch:
            pass
    finally:
        if own:
            executor.close()
    best_row = min(path, key=lambda r: _score_of(r, score))
    return TuneResult(cells=cells, score=score, point=dict(best_row["point"]), row=best_row,
                      scenario=apply_point(s, best_row["point"]), runs=len(path), path=path, stopped=stopped)


class _StopSearch(Exception):
    """The run budget is spent, or the caller's progress callback asked to stop."""


def thinnest_layer(base: Scenario, target_db: float, *, cells_range=(4, 40), budget: int = 30,
                   score: str = "worst_peak_db", free=FREE_DEFAULT, executor=None, progress=None,
                   run_progress=None) -> ThinnestResult:
    """The thinnest layer whose tuned `score` is at or below target_db.

    Thicknesses grow by about 1.5x from cells_range[0] until one passes, then
    bisection finds the thinnest passing one (thicker tuned layers reflect
    less: an assumption checked by the tests on the default bench, not a
    law).  Each thickness is tuned with `budget` runs, starting from the
    best setting of the last thickness tried.  progress(cells, result) after
    each thickness, run_progress(cells, runs, budget, row) after each run
    (runs: of this thickness; row as for tune_layer); either may return False
    to stop.  A stopped search reports the thinnest thickness tried so far
    that met the target, if any.
    """
    if not isinstance(target_db, (int, float)) or not math.isfinite(target_db) or target_db >= 0:
        raise ScenarioError("target", target_db, "a reflection target in dB below 0")
    lo, hi = cells_range
    if not (isinstance(lo, int) and isinstance(hi, int) and 1 <= lo <= hi <= 500):
        raise ScenarioError("cells_range", cells_range, "whole numbers 1 <= first <= last <= 500")
    own = executor is None
    executor = executor or LocalPool()
    tried: dict[int, TuneResult] = {}
    last_point: dict | None = None
    stopped = False

    def tuned(cells: int) -> TuneResult:
        nonlocal last_point, stopped
        if cells not in tried:
            each_run = None if run_progress is None else \
                (lambda runs, total, row: run_progress(cells, runs, total, row))
            tried[cells] = tune_layer(base, cells, budget=budget, score=score, free=free, executor=executor,
                                      start=last_point, progress=each_run)
            last_point = tried[cells].point
            stopped = tried[cells].stopped
            if not stopped and progress is not None:
                stopped = progress(cells, tried[cells]) is False
            if stopped:
                raise _StopSearch
        return tried[cells]

    passing = lambda cells: tuned(cells).value <= target_db
    found = None
    try:
        fail, cells = lo - 1, lo
        while True:
            if passing(cells):
                found = cells
                break
            fail = cells
            if cells == hi:
                break
            cells = min(hi, max(cells + 1, round(cells * 1.5)))
        while found is not None and found - fail > 1:
            mid = (found + fail) // 2
            if passing(mid):
                found = mid
            else:
                fail = mid
    except _StopSearch:
        # a tuned layer that met the target did so, stopped or not: the thinnest of those
        found = min((c for c, t in tried.items() if t.value <= target_db), default=None)
    finally:
        if own:
            executor.close()
    runs = sum(t.runs for t in tried.values())
    return ThinnestResult(target_db=float(target_db), cells=found, tune=tried.get(found) if found else None,
                          tried=dict(sorted(tried.items())), runs=runs, stopped=stopped)
