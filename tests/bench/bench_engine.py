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

from quietlayer.engine import (Boundary, Probe, ResolutionWarning, Scenario, Side, Source,  # noqa: E402
                               build_grid, simulate)

from numpy_reference import NumpyStepper, check_against_engine, grid_slabs, run_numpy  # noqa: E402

GRID_SIZES = (256, 2048)  # total cells per axis, layers included
PRECISIONS = ("float32", "float64")
ENGINE_THREADS = (1, 2)
LAYER_CELLS = 10
REPEATS = 7
MIN_RUN_S = 0.3
TARGET_RUN_S = 0.45  # aim above MIN_RUN_S so a quiet spell still clears it
# An engine run carries a fixed cost (first touch of its new fields, the final
# energy check), tens of ms on the large grid: longer runs there keep the
# figure close to the steady rate.
TARGET_RUN_S_LARGE_ENGINE = 1.0
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
    """Rows per NumPy strip, or None when the grid is only a few strips tall."""
    row_bytes = (grid.cells[1] + 1) * grid.dtype.itemsize
    rows = max(8, STRIP_BYTES // row_bytes)
    return None if 4 * rows > grid.cells[0] + 1 else int(rows)


def scaled_steps(steps: int, seconds: float, target_s: float) -> int:
    return max(1, math.ceil(1.1 * steps * target_s / max(seconds, 1e-9)))


def steps_for(case, first_steps: int, target_s: float) -> int:
    """Steps that make one run last about target_s: a short run, then one near
    the target, each rescaling the count (a short run overstates the cost per
    step, and either may have been slowed by other load)."""
    case.run(first_steps)  # first touch of the arrays
    steps = first_steps
    for _ in range(2):
        steps = max(first_steps, scaled_steps(steps, case.run(steps), target_s))
    return steps


def _cpu_snapshot():
    """(wall s, CPU s busy on the whole machine, CPU s of this process), or
    None where /proc/stat is missing."""
    try:
        with open("/proc/stat") as f:
            user, nice, system, _idle, _iowait, irq, softirq, steal = map(int, f.readline().split()[1:9])
    except (OSError, ValueError):
        return None
    mine = os.times()
    busy = (user + nice + system + irq + softirq + steal) / os.sysconf("SC_CLK_TCK")
    return time.perf_counter(), busy, mine.user + mine.system


def timed_run(case, steps: int, target_s: float):
    """(steps, seconds, cores used by other processes meanwhile) of one run of
    at least MIN_RUN_S; a run that came in short (its step count was set under
    heavier load) is redone longer."""
    for _ in range(4):
        before = _cpu_snapshot()
        seconds = case.run(steps)
        after = _cpu_snapshot()
        if seconds >= MIN_RUN_S:
            break
        steps = scaled_steps(steps, seconds, target_s)
    others = math.nan
    if before and after:
        wall, busy, mine = (a - b for a, b in zip(after, before))
        others = max(0.0, (busy - mine) / wall)
    return steps, seconds, others


def bench_grid(total_cells: int, precision: str):
    """Rows of the table for one grid size and precision."""
    grid = build_grid(bench_scenario(total_cells, precision, steps=1))
    nx, ny = grid.cells
    cases = [EngineCase(grid, t) for t in ENGINE_THREADS]
    strips = strip_rows(grid)
    cases += [NumpyCase(grid, None)] + ([NumpyCase(grid, strips)] if strips else [])
    large = total_cells > 512
    first_steps = 2 if large else 40
    targets = [TARGET_RUN_S_LARGE_ENGINE if large and case.label == "engine" else TARGET_RUN_S
               for case in cases]
    steps = [steps_for(case, first_steps, target) for case, target in zip(cases, targets)]
    runs = [[] for _ in cases]  # (steps, seconds, other cores)
    for _ in range(REPEATS):
        for n, case in enumerate(cases):
            run = timed_run(case, steps[n], targets[n])
            steps[n] = run[0]
            runs[n].append(run)
    rows = []
    for case, record in zip(cases, runs):
        rates = [nx * ny * n / t / 1e6 for n, t, _ in record]
        fixed_s = None
        if large and case.label == "engine":
            fixed_s = statistics.median(case.run(1) for _ in range(3))
        rows.append(dict(grid=f"{nx}x{ny}", cells=nx, precision=precision, label=case.label,
                         detail=case.detail, steps=max(n for n, _, _ in record),
                         median_s=statistics.median(t for _, t, _ in record),
                         shortest_s=min(t for _, t, _ in record), mcells=statistics.median(rates),
                         low=min(rates), high=max(rates), others=max(o for _, _, o in record),
                         fixed_s=fixed_s))
    return rows


def print_table(rows) -> None:
    header = (f"{'grid':>9}  {'dtype':7}  {'impl':6}  {'variant':16}  {'steps':>6}  {'median s':>8}  "
              f"{'Mcells/s':>9}  {'range (min..max)':>17}  {'x numpy':>7}  {'others':>6}")
    print(header)
    print("-" * len(header))
    for r in rows:
        numpy_best = max(o["mcells"] for o in rows if o["label"] == "numpy"
                         and (o["grid"], o["precision"]) == (r["grid"], r["precision"]))
        flag = "  (a run under %.1f s)" % MIN_RUN_S if r["shortest_s"] < MIN_RUN_S else ""
        print(f"{r['grid']:>9}  {r['precision']:7}  {r['label']:6}  {r['detail']:16}  {r['steps']:>6}  "
              f"{r['median_s']:>8.3f}  {r['mcells']:>9.1f}  {r['low']:>8.1f}..{r['high']:<8.1f}  "
              f"{r['mcells'] / numpy_best:>7.2f}  {r['others']:>6.2f}{flag}")
    print("others: the most CPU cores that other processes used during one of the case's runs")
    for r in rows:
        if r["fixed_s"] is not None:
            print(f"  engine {r['grid']} {r['precision']} {r['detail']}: a 1-step run takes "
                  f"{r['fixed_s'] * 1e3:.0f} ms, about {r['fixed_s'] / r['median_s']:.0%} of the runs above "
                  "(new fields first touched, energy check)")


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
    print("memory-traffic bound, 2048x2048 (every array streamed from memory once per sweep;")
    print("a figure above a bound moves fewer bytes than that form counts):")
    # the first is the two-sweep count above; the others drop the ca/cb
    # arrays (a homogeneous medium) and then read and write each field once
    forms = (("two sweeps, ca/cb arrays", TWO_SWEEP_ACCESSES),
             ("two sweeps, scalar ca/cb", TWO_SWEEP_ACCESSES - 2),
             ("one fused sweep, scalar ca/cb", 3 + 3))
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
                  f"engine {engine:6.1f} = {engine / bound:4.0%}  "
                  f"numpy {numpy_best:6.1f} = {numpy_best / bound:4.0%}")
        print()


def main() -> int:
    warnings.simplefilter("ignore", ResolutionWarning)
    t_start = time.perf_counter()
    print(f"python {platform.python_version()}, numpy {np.__version__}, numba {numba.__version__}, "
          f"{os.cpu_count()} CPUs, numba threads {numba.config.NUMBA_NUM_THREADS}, "
          f"load average {os.getloadavg()[0]:.2f}")
    print("NumPy reference against the engine, 1 and 2 threads, NumPy whole arrays and strips "
          "(float64 must agree to 1e-12):")
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
    print(f"total bench time {time.perf_counter() - t_start:.0f} s, "
          f"load average now {os.getloadavg()[0]:.2f} "
          "(one other busy process pulls the 2-thread figures below the 1-thread ones)")
    print(f"engine_mcells_per_s={engine:.1f} numpy_mcells_per_s={numpy_rate:.1f} "
          f"speedup={engine / numpy_rate:.2f}")
    return 0


if __name__ == "__main__":
    sys.exit(main())
