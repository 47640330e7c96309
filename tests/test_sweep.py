"""Sweeps: points, their table, the local pool and Dask.

A sweep is plumbing around measure(): its rows must be the single
measurements of the same points, bit for bit, whichever executor ran them
(identity checks, no outside source needed); the physics of each row is
checked against published theory in test_reflection.py.
"""

from __future__ import annotations

import csv
import io
import os
import signal
import subprocess
import sys
import time

import pytest

from quietlayer.engine import ScenarioError
from quietlayer.engine import sweep as sweep_module
from quietlayer.engine.defaults import default_scenario
from quietlayer.engine.errors import DivergenceError
from quietlayer.engine.measure import measure
from quietlayer.engine.sweep import (SWEEP_PARTS, DaskPool, LocalPool, SweepTable, apply_point, grid_points,
                                     parse_vary, run_sweep)

BASE = default_scenario()
POINTS = grid_points([parse_vary("order=2,4"), parse_vary("sigma_ratio=0.5:1.5:3")])


def same_scores(a: dict, b: dict) -> bool:
    keys = ("status", "worst_peak_db", "global_db", "worst_band_db", "worst_probe", "peak_db")
    return all(a.get(k) == b.get(k) for k in keys)


def test_parse_vary_ranges_lists_and_units():
    assert parse_vary("order=2:5:4").values == (2.0, 3.0, 4.0, 5.0)
    assert parse_vary("sigma_ratio=0.1:10:3:log").values == pytest.approx((0.1, 1.0, 10.0))
    assert parse_vary("cells=5:20:4").values == (5, 10, 15, 20)
    assert parse_vary("cells=5:6:5").values == (5, 6)  # rounded, repeats dropped
    assert parse_vary("cell=0.5 mm,1 mm").values == (0.5e-3, 1e-3)
    assert parse_vary("f_max=10 GHz:20 GHz:2").values == (10e9, 20e9)
    assert parse_vary("right.kappa_max=1,5").name == "right.kappa_max"


@pytest.mark.parametrize("text, field", [
    ("order", "vary"), ("thickness=1:2:3", "vary"), ("order=1:2", "vary order"),
    ("order=1:2:0", "vary order COUNT"), ("cells=5.5,6", "cells"), ("order=a,b", "order"),
    ("sigma_ratio=0:1:3:log", "vary sigma_ratio"), ("middle.order=1,2", "vary"),
])
def test_parse_vary_errors_name_the_field(text, field):
    with pytest.raises(ScenarioError) as info:
        parse_vary(text)
    assert info.value.field == field


def test_apply_point_sets_every_cpml_side_or_one():
    s = apply_point(BASE, {"order": 4, "sigma_max": 2.0, "cells": 12})
    for side in (s.boundary.left, s.boundary.top):
        assert (side.order, side.sigma_max, side.sigma_ratio, side.cells) == (4.0, 2.0, None, 12)
    one = apply_point(BASE, {"right.kappa_max": 7})
    assert one.boundary.right.kappa_max == 7.0 and one.boundary.left.kappa_max == 1.0
    moved = apply_point(BASE, {"cell": "0.5 mm", "f_max": "20 GHz"})
    assert (moved.dx, moved.dy, moved.source.f_max) == (0.5e-3, 0.5e-3, 20e9)


def test_sweep_rows_equal_single_measurements():
    table = run_sweep(BASE, POINTS, LocalPool(2))
    assert table.complete and sorted(table.rows) == list(range(len(POINTS)))
    for i, point in enumerate(POINTS):
        single = measure(apply_point(BASE, point), parts=SWEEP_PARTS, threads=1)
        row = table.rows[i]
        assert row["point"] == point and row["status"] == "ok"
        assert row["worst_peak_db"] == single.worst_peak_db
        assert row["global_db"] == single.global_db
        assert row["peak_db"] == single.peak_db
    # one thread, one after another, gives the same rows
    serial = run_sweep(BASE, POINTS, LocalPool(1))
    assert all(same_scores(serial.rows[i], table.rows[i]) for i in table.rows)


def test_worker_processes_give_the_same_rows_and_survive_a_lost_worker():
    pool = LocalPool(2, mode="processes")
    table = run_sweep(BASE, POINTS, pool)
    assert pool.last_mode == "processes" and table.complete
    threads = run_sweep(BASE, POINTS, LocalPool(2, mode="threads"))
    assert all(same_scores(table.rows[i], threads.rows[i]) for i in threads.rows)
    # a worker process killed mid-sweep: the points not yet done run in threads, each once
    points = grid_points([parse_vary("order=1:6:6"), parse_vary("sigma_ratio=0.25:2:4")])
    workers = list(sweep_module._shared_processes(2)._processes)

    def progress(done, total, index, row):
        if done == 2:
            os.kill(workers[0], signal.SIGKILL)

    table = run_sweep(BASE, points, pool, progress=progress)
    assert pool.last_mode == "threads", "the lost worker went unnoticed"
    assert table.complete and sorted(table.rows) == list(range(len(points)))
    assert all(table.rows[i]["point"] == points[i] and table.rows[i]["status"] == "ok" for i in table.rows)
    assert LocalPool(2).mode_for(sweep_module.PROCESS_MIN_POINTS - 1) == "threads"
    assert LocalPool(2).mode_for(sweep_module.PROCESS_MIN_POINTS) == "processes"
    assert LocalPool(1).mode_for(10_000) == "threads"


ORPHAN_SCRIPT = """
import os, signal, sys
from quietlayer.engine.defaults import default_scenario
from quietlayer.engine import sweep
pool = sweep.LocalPool(2, mode="processes")
sweep.run_sweep(default_scenario(), [{"order": 2}, {"order": 3}], pool)
print(" ".join(str(pid) for pid in sweep._shared_processes(2)._processes), flush=True)
os.kill(os.getpid(), signal.SIGKILL)  # killed outright: no chance to stop its pool
"""


def test_worker_processes_end_when_their_program_is_killed():
    # the program's output pipe stays open while its workers live: read one line, not to the end
    proc = subprocess.Popen([sys.executable, "-c", ORPHAN_SCRIPT], stdout=subprocess.PIPE, text=True)
    try:
        workers = [int(pid) for pid in proc.stdout.readline().split()]
        assert len(workers) == 2
        assert proc.wait(timeout=60) == -signal.SIGKILL
        deadline = time.monotonic() + 20
        alive = workers
        while alive and time.monotonic() < deadline:
            time.sleep(0.2)
            alive = [pid for pid in alive if sweep_module.process_running(pid)]
        assert not alive, f"worker processes {alive} outlived their program"
    finally:
        proc.kill()
        proc.stdout.close()


def test_a_bad_point_is_recorded_and_the_sweep_goes_on(monkeypatch):
    real = sweep_module.measure

    def diverging(s, **kw):
        if s.boundary.left.order == 5.0:
            raise DivergenceError(300, "the fields are no longer finite")
        return real(s, **kw)

    monkeypatch.setattr(sweep_module, "measure", diverging)
    points = [{"order": 3}, {"order": -1}, {"order": 5}, {"courant": 1.5}, {"order": 2}]
    table = run_sweep(BASE, points, LocalPool(2))
    status = [table.rows[i]["status"] for i in range(len(points))]
    assert status == ["ok", "invalid", "diverged", "invalid", "ok"]
    assert "order" in table.rows[1]["reason"] and "> 0" in table.rows[1]["reason"]
    assert "step 300" in table.rows[2]["reason"]
    assert "courant" in table.rows[3]["reason"]
    assert table.best()[0] in (0, 4)


def test_cancel_keeps_the_points_done_each_once():
    points = grid_points([parse_vary("order=1:6:6"), parse_vary("sigma_ratio=0.25:2:4")])
    seen = []

    def progress(done, total, index, row):
        seen.append(index)
        return done < 5

    table = run_sweep(BASE, points, LocalPool(2), progress=progress)
    assert not table.complete
    assert table.done == 5 and len(set(seen)) == len(seen) == 5
    assert sorted(table.rows) == sorted(seen)


def test_csv_table_round_trips(tmp_path):
    table = run_sweep(BASE, POINTS[:3] + [{"order": -1, "sigma_ratio": 1.0}], LocalPool(2))
    path = table.write_csv(tmp_path / "sweep.csv")
    rows = list(csv.DictReader(io.StringIO(path.read_text())))
    assert [r["index"] for r in rows] == ["0", "1", "2", "3"]
    assert rows[0]["order"] == "2.0" and float(rows[0]["worst_peak_db"]) == table.rows[0]["worst_peak_db"]
    assert float(rows[1]["peak_db[corner]"]) == table.rows[1]["peak_db"]["corner"]
    assert rows[3]["status"] == "invalid" and rows[3]["worst_peak_db"] == "" and "order" in rows[3]["reason"]
    assert not list(tmp_path.glob(".*.tmp"))  # nothing half-written left behind


def test_best_rejects_an_unknown_score():
    with pytest.raises(ScenarioError) as info:
        SweepTable(parameters=[], points=[]).best("loudness")
    assert info.value.field == "score"


@pytest.fixture(scope="module")
def dask_pool():
    pool = DaskPool("local:2")
    yield pool
    pool.close()


def test_dask_local_cluster_equals_the_local_pool(dask_pool):
    assert dask_pool.client.scheduler.address.startswith("tcp://127.0.0.1:")
    local = run_sweep(BASE, POINTS, LocalPool(2))
    remote = run_sweep(BASE, POINTS, dask_pool)
    assert remote.complete and sorted(remote.rows) == sorted(local.rows)
    for i in local.rows:
        assert same_scores(remote.rows[i], local.rows[i]), i


def test_a_worker_killed_mid_sweep_loses_no_point(dask_pool):
    points = grid_points([parse_vary("order=1:6:6"), parse_vary("sigma_ratio=0.25:2:5")])
    pids = dask_pool.client.run(os.getpid)
    victim = sorted(pids.values())[0]
    killed = []

    def progress(done, total, index, row):
        if done == 3 and not killed:
            os.kill(victim, signal.SIGKILL)  # a lost machine, not a polite shutdown
            killed.append(time.perf_counter())

    table = run_sweep(BASE, points, dask_pool, progress=progress)
    assert killed, "the worker was not killed"
    assert table.complete and sorted(table.rows) == list(range(len(points)))
    assert all(table.rows[i]["point"] == points[i] for i in table.rows)
    local = run_sweep(BASE, points, LocalPool(2))
    assert all(same_scores(table.rows[i], local.rows[i]) for i in local.rows)
    assert victim not in dask_pool.client.run(os.getpid).values()


def test_dask_address_errors_name_the_option():
    with pytest.raises(ScenarioError) as info:
        DaskPool("local:0")
    assert info.value.field == "dask"
    with pytest.raises(ScenarioError) as info:
        DaskPool("tcp://127.0.0.1:1", timeout=2)  # nothing listens on port 1
    assert info.value.field == "dask" and "reachable" in info.value.allowed
