"""Throughput of the numba engine against a plain C loop of the same update,
run by hand:

    python tests/bench/bench_engine.py

Grids of 256x256 and 2048x2048 cells in total (a 10-cell CPML on four sides
included), float32 and float64; the engine and the C loop (c_loop.c, built
here with `cc -O3 -march=native -fopenmp`; skipped with a message when there
is no compiler) each with 1 and 2 threads, the C loop's probe values checked
against the engine's before it is timed.  Mcells/s = total cells x steps /
seconds of stepping, timed inside the run (RunResult.elapsed_s for the
engine, around the C call for the loop).  Each case is the median of several
runs of at least MIN_RUN_S, the cases interleaved so that a burst of load on
a shared machine hits them alike.  For 2048x2048 it also prints a
memory-traffic bound from a stream bandwidth measured in the same run.  The
last line compares the best of 1 and 2 threads of each at 256x256 float32.
The NumPy reference (numpy_reference.py) is checked against the engine first,
as an independent implementation of the update.
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

from c_baseline import FLAGS, CStepper, build_c_loop  # noqa: E402
from numpy_reference import check_against_engine, grid_slabs, relative_difference  # noqa: E402

GRID_SIZES = (256, 2048)  # total cells per axis, layers included
PRECISIONS = ("float32", "float64")
THREADS = (1, 2)  # of the engine and of the C loop
C_CHECK_STEPS = {256: 300, 2048: 60}  # enough for the pulse to pass the probe
C_CHECK_RTOL = {"float32": 1e-4, "float64": 1e-10}  # cc fuses multiply-adds, numba does not
LAYER_CELLS = 10
REPEATS = 7
MIN_RUN_S = 0.3
TARGET_RUN_S = 0.45  # aim above MIN_RUN_S so a quiet spell still clears it
# An engine run carries a fixed cost (first touch of its new fields, the final
# energy check), tens of ms on the large grid: longer runs there keep the
# figure close to the steady rate (the C loop gets the same length).
TARGET_RUN_S_LARGE = 1.0
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
        self.label = "engine"

    def run(self, steps: int) -> float:
        clear_psi(self.grid)
        scenario = self.grid.scenario.with_changes(steps=steps)
        return simulate(scenario, grid=self.grid, threads=self.threads).elapsed_s


class CCase:
    def __init__(self, stepper: CStepper, threads: int):
        self.stepper, self.threads = stepper, threads
        self.label = "C loop"

    def run(self, steps: int) -> float:
        return self.stepper.run(steps, self.threads)[1]


def check_c_loop(grid, stepper: CStepper, total_cells: int) -> str:
    """The C loop's probe series against the engine's (1 and 2 threads each);
    raises AssertionError beyond C_CHECK_RTOL of the probe's peak."""
    steps = C_CHECK_STEPS[total_cells]
    precision = grid.dtype.name
    clear_psi(grid)
    run = simulate(grid.scenario.with_changes(steps=steps), grid=grid, threads=1)
    engine = np.stack([run.probes[p.name] for p in grid.scenario.probes], axis=1)
    if not np.abs(engine).max() > 0:
        raise AssertionError("the probe saw no field; the check would be empty")
    worst = max(relative_difference(stepper.run(steps, t)[0], engine) for t in THREADS)
    if worst > C_CHECK_RTOL[precision]:
        raise AssertionError(f"C loop and engine probes differ by {worst:.2e} relative "
                             f"({grid.cells[0]}x{grid.cells[1]} {precision}, limit {C_CHECK_RTOL[precision]:g})")
    return f"{worst:.1e}"


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


def bench_grid(total_cells: int, precision: str, c_libs):
    """Rows of the table for one grid size and precision."""
    grid = build_grid(bench_scenario(total_cells, precision, steps=1))
    nx, ny = grid.cells
    cases = [EngineCase(grid, t) for t in THREADS]
    checked = None
    if c_libs is not None:
        stepper = CStepper(grid, c_libs[precision])
        checked = check_c_loop(grid, stepper, total_cells)
        cases += [CCase(stepper, t) for t in THREADS]
    large = total_cells > 512
    first_steps = 2 if large else 40
    target = TARGET_RUN_S_LARGE if large else TARGET_RUN_S
    steps = [steps_for(case, first_steps, target) for case in cases]
    runs = [[] for _ in cases]  # (steps, seconds, other cores)
    for _ in range(REPEATS):
        for n, case in enumerate(cases):
            run = timed_run(case, steps[n], target)
            steps[n] = run[0]
            runs[n].append(run)
    rows = []
    for case, record in zip(cases, runs):
        rates = [nx * ny * n / t / 1e6 for n, t, _ in record]
        fixed_s = None
        if large and case.label == "engine":
            fixed_s = statistics.median(case.run(1) for _ in range(3))
        rows.append(dict(grid=f"{nx}x{ny}", cells=nx, precision=precision, label=case.label,
                         threads=case.threads, steps=max(n for n, _, _ in record),
                         median_s=statistics.median(t for _, t, _ in record),
                         shortest_s=min(t for _, t, _ in record), mcells=statistics.median(rates),
                         low=min(rates), high=max(rates), others=max(o for _, _, o in record),
                         fixed_s=fixed_s, checked=checked))
    return rows


def best(rows, label: str, cells: int, precision: str) -> float:
    """Best of 1 and 2 threads (median Mcells/s) of one implementation, or nan."""
    rates = [r["mcells"] for r in rows
             if (r["label"], r["cells"], r["precision"]) == (label, cells, precision)]
    return max(rates) if rates else math.nan


def print_table(rows) -> None:
    header = (f"{'grid':>9}  {'dtype':7}  {'impl':6}  {'threads':>7}  {'steps':>6}  {'median s':>8}  "
              f"{'Mcells/s':>9}  {'range (min..max)':>17}  {'spread':>6}  {'others':>6}")
    print(header)
    print("-" * len(header))
    for r in rows:
        flag = "  (a run under %.1f s)" % MIN_RUN_S if r["shortest_s"] < MIN_RUN_S else ""
        spread = (r["high"] - r["low"]) / r["mcells"]
        print(f"{r['grid']:>9}  {r['precision']:7}  {r['label']:6}  {r['threads']:>7}  {r['steps']:>6}  "
              f"{r['median_s']:>8.3f}  {r['mcells']:>9.1f}  {r['low']:>8.1f}..{r['high']:<8.1f}  "
              f"{spread:>6.0%}  {r['others']:>6.2f}{flag}")
    print("spread: (max - min) / median of the repeats; others: the most CPU cores that other "
          "processes used during one of the case's runs")
    for r in rows:
        if r["fixed_s"] is not None:
            print(f"  engine {r['grid']} {r['precision']} {r['threads']} thread(s): a 1-step run takes "
                  f"{r['fixed_s'] * 1e3:.0f} ms, about {r['fixed_s'] / r['median_s']:.0%} of the runs above "
                  "(new fields first touched, energy check)")
    print()
    print("best of 1 and 2 threads (medians), engine / C loop:")
    print(f"  {'grid':>9}  {'dtype':7}  {'engine':>9}  {'C loop':>9}  {'ratio':>6}  C agrees with the engine to")
    for cells in GRID_SIZES:
        for precision in PRECISIONS:
            here = [r for r in rows if (r["cells"], r["precision"]) == (cells, precision)]
            if not here:
                continue
            engine, c = best(rows, "engine", cells, precision), best(rows, "C loop", cells, precision)
            print(f"  {here[0]['grid']:>9}  {precision:7}  {engine:>9.1f}  {c:>9.1f}  {engine / c:>6.2f}  "
                  f"{here[0]['checked'] or '-'}")


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
        engine = best(rows, "engine", max(GRID_SIZES), precision)
        c = best(rows, "C loop", max(GRID_SIZES), precision)
        itemsize = np.dtype(precision).itemsize
        for name, accesses in forms:
            per_cell = accesses * itemsize
            bound = peak / per_cell / 1e6
            print(f"  {precision}  {name:30} {per_cell:3d} B/cell/step  bound {bound:7.1f} Mcells/s  "
                  f"engine {engine:6.1f} = {engine / bound:4.0%}  "
                  f"C loop {c:6.1f} = {c / bound:4.0%}")
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
    c_libs = build_c_loop()
    if isinstance(c_libs, str):
        print(f"C loop skipped: {c_libs}")
        c_libs = None
    else:
        print("C loop: c_loop.c built with " + " ".join(FLAGS) + "; its probes are checked against "
              "the engine's before each grid is timed")
    print()

    rows = []
    for total in GRID_SIZES:
        for precision in PRECISIONS:
            try:
                rows += bench_grid(total, precision, c_libs)
            except AssertionError as err:
                print(f"ABORT: {err}")
                return 1
            print(f"  measured {total}x{total} {precision} ({time.perf_counter() - t_start:.0f} s so far)",
                  flush=True)
    print()
    print_table(rows)
    print_bound(rows, stream_bandwidth())

    small = min(GRID_SIZES)
    engine, c = best(rows, "engine", small, "float32"), best(rows, "C loop", small, "float32")
    print(f"total bench time {time.perf_counter() - t_start:.0f} s, "
          f"load average now {os.getloadavg()[0]:.2f} "
          "(one other busy process pulls the 2-thread figures below the 1-thread ones)")
    print(f"engine_mcells_per_s={engine:.1f} c_mcells_per_s={c:.1f} ratio_to_c={engine / c:.2f}")
    return 0


if __name__ == "__main__":
    sys.exit(main())
