"""Throughput of the numba engine against the NumPy reference, run by hand:

    python tests/bench/bench_engine.py

Grids of 256x256 and 2048x2048 cells in total (a 10-cell CPML on four sides
included), float32 and float64; the engine with 1 and 2 threads, NumPy in
one thread.  Mcells/s = total cells x steps / seconds of stepping, timed
inside the run (RunResult.elapsed_s for the engine).  Each case is the median
of several runs of at least MIN_RUN_S, the cases interleaved so that a burst
of load on a shared machine hits them alike.  For 2048x2048 it also prints a
memory-traffic bound from a stream bandwidth measured in the same run.  The
last line is the 256x256 float32 summary.
"""

from __future__ import annotations

import os

# NumPy's BLAS pool; elementwise ufuncs never thread anyway.  OMP_NUM_THREADS
# is left alone: numba runs on OpenMP here and would obey it.
os.environ.setdefault("OPENBLAS_NUM_THREADS", "1")
os.environ.setdefault("MKL_NUM_THREADS", "1")

import math  # noqa: E402
import platform  # noqa: E402
import statistics  # noqa: E402
import sys  # noqa: E402
import threading  # noqa: E402
import time  # noqa: E402
import warnings  # noqa: E402

import numba  # noqa: E402
import numpy as np  # noqa: E402

from quietlayer.engine import Boundary, Probe, ResolutionWarning, Scenario, Side, Source, build_grid, simulate  # noqa: E402

from numpy_reference import NumpyStepper, check_against_engine, grid_slabs, run_numpy  # noqa: E402

GRID_SIZES = (256, 2048)  # total cells per axis, layers included
PRECISIONS = ("float32", "float64")
ENGINE_THREADS = (1, 2)
LAYER_CELLS = 10
REPEATS = 7
MIN_RUN_S = 0.3
TARGET_RUN_S = 0.45  # aim above MIN_RUN_S so a quiet spell still clears it
STRIP_BYTES = 512 * 1024  # NumPy scratch strip sized to stay in a 1 MiB L2
STREAM_MBYTES = 256
# Field and coefficient arrays touched per cell and step by two sweeps:
# secondary reads P, S1, S2 and writes S1, S2; primary reads P, S1, S2, ca, cb
# and writes P.
TWO_SWEEP_ACCESSES = 5 + 6


def bench_scenario(total_cells: int, precision: str, steps: int) -> Scenario:
    interior = total_cells - 2 * LAYER_CELLS
    centre = interior // 2
    return Scenario(dx=1e-3, dy=1e-3, nx=interior, ny=interior, steps=steps, courant=0.99,
                    precision=precision, source=Source(x=centre, y=centre, f_max=10e9),
                    probes=(Probe("near_source", centre + 5, centre),),
                    boundary=Boundary.all_sides(Side(kind="cpml", cells=LAYER_CELLS)))


def clear_psi(grid) -> None:
    """The grid owns the engine's psi arrays and keeps them between runs."""
    for slabs in grid_slabs(grid).values():
        for slab in slabs:
            slab[3].fill(0)


class EngineCase:
    def __init__(self, grid, threads: int):
        self.grid, self.threads = grid, threads
        self.label, self.detail = "engine", f"{threads} thread" + ("s" if threads > 1 else "")

    def run(self, steps: int) -> float:
        clear_psi(self.grid)
        scenario = self.grid.scenario.with_changes(steps=steps)
        return simulate(scenario, grid=self.grid, threads=self.threads).elapsed_s


class NumpyCase:
    def __init__(self, grid, block_rows: int | None):
        self.stepper = NumpyStepper(grid, block_rows=block_rows)
        self.grid = grid
        self.label = "numpy"
        self.detail = "whole arrays" if block_rows is None else f"{block_rows}-row strips"

    def run(self, steps: int) -> float:
        scenario = self.grid.scenario.with_changes(steps=steps)
        return run_numpy(scenario, stepper=self.stepper)[1]


def strip_rows(grid) -> int | None:
    """Rows per NumPy strip, or None when one strip would hold the whole grid."""
    row_bytes = (grid.cells[1] + 1) * grid.dtype.itemsize
    rows = max(8, STRIP_BYTES // row_bytes)
    return None if rows >= grid.cells[0] + 1 else int(rows)


def steps_for(case, probe_steps: int) -> int:
    """Steps that make one run last about TARGET_RUN_S, from a short probe run."""
    case.run(probe_steps)  # first touch of the arrays
    seconds = case.run(probe_steps)
    return max(probe_steps, math.ceil(TARGET_RUN_S * probe_steps / max(seconds, 1e-9)))


def bench_grid(total_cells: int, precision: str):
    """Rows of the table for one grid size and precision."""
    grid = build_grid(bench_scenario(total_cells, precision, steps=1))
    nx, ny = grid.cells
    cases = [EngineCase(grid, t) for t in ENGINE_THREADS]
    strips = strip_rows(grid)
    cases += [NumpyCase(grid, None)] + ([NumpyCase(grid, strips)] if strips else [])
    probe_steps = 40 if total_cells <= 512 else 2
    steps = [steps_for(case, probe_steps) for case in cases]
    times = [[] for _ in cases]
    for _ in range(REPEATS):
        for case, n, record in zip(cases, steps, times):
            record.append(case.run(n))
    rows = []
    for case, n, record in zip(cases, steps, times):
        rates = [nx * ny * n / t / 1e6 for t in record]
        rows.append(dict(grid=f"{nx}x{ny}", cells=nx, precision=precision, label=case.label,
                         detail=case.detail, steps=n, median_s=statistics.median(record),
                         shortest_s=min(record), mcells=statistics.median(rates),
                         low=min(rates), high=max(rates)))
    return rows


def print_table(rows) -> None:
    header = (f"{'grid':>9}  {'dtype':7}  {'impl':6}  {'variant':16}  {'steps':>6}  {'median s':>8}  "
              f"{'Mcells/s':>9}  {'range (min..max)':>17}  {'x numpy':>7}")
    print(header)
    print("-" * len(header))
    for r in rows:
        numpy_best = max(o["mcells"] for o in rows
                         if o["label"] == "numpy" and o["grid"] == r["grid"] and o["precision"] == r["precision"])
        flag = "  (a run under %.1f s)" % MIN_RUN_S if r["shortest_s"] < MIN_RUN_S else ""
        print(f"{r['grid']:>9}  {r['precision']:7}  {r['label']:6}  {r['detail']:16}  {r['steps']:>6}  "
              f"{r['median_s']:>8.3f}  {r['mcells']:>9.1f}  {r['low']:>8.1f}..{r['high']:<8.1f}  "
              f"{r['mcells'] / numpy_best:>7.2f}{flag}")


# --- stream bandwidth and the traffic bound ---------------------------------

def _best_seconds(run, repeats: int = 5) -> float:
    best = math.inf
    for _ in range(repeats):
        t0 = time.perf_counter()
        run()
        best = min(best, time.perf_counter() - t0)
    return best


def _in_threads(op, n: int, threads: int):
    """op(slice) over `threads` equal parts at once (ufuncs release the GIL)."""
    parts = [slice(k * n // threads, (k + 1) * n // threads) for k in range(threads)]

    def run():
        workers = [threading.Thread(target=op, args=(part,)) for part in parts]
        for w in workers:
            w.start()
        for w in workers:
            w.join()
    return run


def stream_bandwidth(mbytes: int = STREAM_MBYTES) -> dict:
    """Bytes/s of a NumPy copy and triad on arrays of `mbytes` MB each, in 1 and
    2 threads.  Bytes are those the NumPy calls move: the triad a = b + s c
    takes two passes (s c into a, then a + b into a), five array transfers."""
    n = mbytes * 2**20 // 8
    a, b, c = np.ones(n), np.zeros(n), np.full(n, 2.0)  # written now, so no page faults later

    def copy(part=slice(None)):
        np.copyto(b[part], a[part])

    def triad(part=slice(None)):
        np.multiply(c[part], 3.0, out=b[part])
        np.add(b[part], a[part], out=b[part])

    result = {}
    for name, op, transfers in (("copy", copy, 2), ("triad", triad, 5)):
        for threads in (1, 2):
            result[f"{name}, {threads} thread" + ("s" if threads > 1 else "")] = (
                transfers * n * 8 / _best_seconds(_in_threads(op, n, threads)))
    return result


def print_bound(rows, bandwidth: dict) -> None:
    print()
    print(f"stream bandwidth, {STREAM_MBYTES} MB arrays (best of 5):")
    for name, bps in bandwidth.items():
        print(f"  {name:18} {bps / 1e9:6.1f} GB/s")
    peak = max(bandwidth.values())
    print(f"  bound uses the highest: {peak / 1e9:.1f} GB/s")
    print()
    print("memory-traffic bound, 2048x2048 (every array streamed from memory once per sweep):")
    forms = (("two sweeps, ca/cb arrays", TWO_SWEEP_ACCESSES),
             ("two sweeps, scalar ca/cb", TWO_SWEEP_ACCESSES - 2),
             ("one fused sweep, scalar ca/cb", 6))
    for precision in PRECISIONS:
        here = [r for r in rows if r["cells"] == max(GRID_SIZES) and r["precision"] == precision]
        if not here:
            continue
        engine = max(r["mcells"] for r in here if r["label"] == "engine")
        numpy_best = max(r["mcells"] for r in here if r["label"] == "numpy")
        itemsize = np.dtype(precision).itemsize
        for name, accesses in forms:
            per_cell = accesses * itemsize
            bound = peak / per_cell / 1e6
            print(f"  {precision}  {name:30} {per_cell:3d} B/cell/step  bound {bound:7.1f} Mcells/s  "
                  f"engine {engine:6.1f} = {engine / bound:4.0%}  numpy {numpy_best:6.1f} = {numpy_best / bound:4.0%}")
        print()


def main() -> int:
    warnings.simplefilter("ignore", ResolutionWarning)
    t_start = time.perf_counter()
    print(f"python {platform.python_version()}, numpy {np.__version__}, numba {numba.__version__}, "
          f"{os.cpu_count()} CPUs, numba threads {numba.config.NUMBA_NUM_THREADS}")
    print("NumPy reference against the engine (float64 must agree to 1e-12):")
    try:
        check_against_engine("float64", rtol=1e-12)
        check_against_engine("float32", rtol=1e-4)
    except AssertionError as err:
        print(f"ABORT: {err}")
        return 1
    print(f"numba threading layer: {numba.threading_layer()}")
    print()

    rows = []
    for total in GRID_SIZES:
        for precision in PRECISIONS:
            rows += bench_grid(total, precision)
            print(f"  measured {total}x{total} {precision} ({time.perf_counter() - t_start:.0f} s so far)",
                  flush=True)
    print()
    print_table(rows)
    print_bound(rows, stream_bandwidth())

    small = [r for r in rows if r["cells"] == min(GRID_SIZES) and r["precision"] == "float32"]
    engine = max(r["mcells"] for r in small if r["label"] == "engine")
    numpy_rate = max(r["mcells"] for r in small if r["label"] == "numpy")
    print(f"total bench time {time.perf_counter() - t_start:.0f} s")
    print(f"engine_mcells_per_s={engine:.1f} numpy_mcells_per_s={numpy_rate:.1f} "
          f"speedup={engine / numpy_rate:.2f}")
    return 0


if __name__ == "__main__":
    sys.exit(main())
