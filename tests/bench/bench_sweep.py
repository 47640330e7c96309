"""A 100-point sweep of the default scenario, run by hand:

    python tests/bench/bench_sweep.py [--dask local:2]

The same 100 points (order 1..6 x sigma_max/sigma_opt 0.25..2, 10 x 10) are
measured five times each way, interleaved, after one untimed pool sweep that
starts the worker processes (its time is printed too):
- pool: run_sweep with the local pool as it chooses (processes for 100 points);
- pool, threads: the local pool held to threads;
- one thread: evaluate_point on each point, one after another.
With --dask, a Dask LocalCluster on 127.0.0.1 is timed too (started before
the timing; its workers load the kernels from the numba cache).
Last line: sweep_100_s=<median pool time> parallel_speedup=<median one-thread / median pool>
"""

from __future__ import annotations

import argparse
import os
import statistics
import time

from quietlayer.engine.defaults import default_scenario
from quietlayer.engine.sweep import LocalPool, evaluate_point, grid_points, make_executor, parse_vary, run_sweep

REPEATS = 5


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__, formatter_class=argparse.RawDescriptionHelpFormatter)
    parser.add_argument("--dask", help="also time a Dask executor, e.g. local:2")
    args = parser.parse_args()
    s = default_scenario()
    points = grid_points([parse_vary("order=1:6:10"), parse_vary("sigma_ratio=0.25:2:10")])
    assert len(points) == 100
    pool = LocalPool()
    threads = LocalPool(mode="threads")
    evaluate_point(s, points[0], threads=1)  # compile, and fill the reference cache
    t = time.perf_counter()
    run_sweep(s, points, pool)  # the first sweep starts the worker processes
    cold_s = time.perf_counter() - t
    times = {"pool": [], "pool, threads": [], "one thread": []}
    dask = make_executor(dask=args.dask) if args.dask else None
    if dask is not None:
        times["dask"] = []
        run_sweep(s, points[:4], dask)  # workers load kernels and the reference
    for _ in range(REPEATS):
        t = time.perf_counter()
        table = run_sweep(s, points, pool)
        times["pool"].append(time.perf_counter() - t)
        assert table.complete and all(r["status"] == "ok" for r in table.rows.values())
        t = time.perf_counter()
        run_sweep(s, points, threads)
        times["pool, threads"].append(time.perf_counter() - t)
        t = time.perf_counter()
        for p in points:
            evaluate_point(s, p, threads=1)
        times["one thread"].append(time.perf_counter() - t)
        if dask is not None:
            t = time.perf_counter()
            run_sweep(s, points, dask)
            times["dask"].append(time.perf_counter() - t)
    if dask is not None:
        dask.close()
    print(f"default scenario: {s.nx} x {s.ny} interior, {s.steps} steps, {s.precision}; "
          f"{len(points)} points; {os.cpu_count()} cores; {pool.description}")
    print(f"  first pool sweep, starting the worker processes: {cold_s:.2f} s")
    for name, values in times.items():
        print(f"  {name:<13} median {statistics.median(values):6.2f} s  (min {min(values):.2f}, max {max(values):.2f}); "
              f"{statistics.median(values) / len(points) * 1e3:.1f} ms per point")
    pool_s = statistics.median(times["pool"])
    speedup = statistics.median(times["one thread"]) / pool_s
    print(f"sweep_100_s={pool_s:.2f} parallel_speedup={speedup:.2f}")


if __name__ == "__main__":
    main()
