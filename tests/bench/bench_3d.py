"""The 3D confirmation's speed, run by hand:

    python tests/bench/bench_3d.py [--repeats N]

For the demo scenario's 3D box it times, interleaved so a burst of load on a
shared machine hits every case alike (medians of N repeats):
- the whole confirmation with a cold reference (reference, test run and the
  4000-step late-time check), as `check --3d` and the page run it;
- the windowed reference alone, in 1 and 2 threads;
- the 3D kernel on the test box (Mcells/s = box cells x steps / seconds), in
  1 and 2 threads, against the 2D kernel on the demo's 2D grid in the same
  run (one thread each), and both kernels with walls instead of layers.
Kernel cases also give Mcells/s over the calling thread's CPU time
(`cpu_mcells_per_s`): on a machine shared with other work the wall clock
counts the time the run waited for a core.  The last line is
`box_cells=... test_s=... reference_s=... mcells_per_s=... mcells_per_s_2d=...
ratio_to_2d=... cpu_ratio_to_2d=... confirm_s=...` (one thread; the ratio is
the 3D test box's against the 2D demo grid's, both with their layers).
"""

from __future__ import annotations

import argparse
import statistics
import time
from dataclasses import replace

from quietlayer.engine import Boundary, Side, simulate
from quietlayer.engine.confirm3d import Reference3DCache, compute_reference, confirm_3d, run_box
from quietlayer.engine.defaults import default_scenario
from quietlayer.engine.grid3d import box_from_scenario, build_grid3d

# The 2D demo run takes some 15 ms, where set-up and the clock's noise show; five in a
# row are about as long as one 3D test run.  (One longer run would not do: once the
# pulse has left, the fields decay into subnormal numbers, which the CPU computes far
# more slowly.)
RUNS_2D = 5


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--repeats", type=int, default=5)
    args = parser.parse_args()

    s2 = default_scenario()
    box = box_from_scenario(s2)
    walls2 = s2.with_changes(boundary=Boundary.all_sides(Side(kind="wall")))
    walls3 = replace(box, cells=box.total_cells, faces=(None,) * 6, probes=())
    grid3, grid3_walls = build_grid3d(box), build_grid3d(walls3)
    cells3 = box.total_cells[0] * box.total_cells[1] * box.total_cells[2]
    cells2 = s2.total_cells_x * s2.total_cells_y
    print(f"3D box: {box.describe()}")
    print(f"2D grid: {s2.total_cells_x} x {s2.total_cells_y} cells with the layers, {s2.steps} steps "
          f"(timed {RUNS_2D} runs at a time)")

    # warm every kernel (compilation or the numba cache) outside the timing
    simulate(s2.with_changes(steps=20), threads=1)
    simulate(walls2.with_changes(steps=20), threads=1)
    for threads in (1, 2):
        run_box(grid3, 5, threads=threads)
    compute_reference(replace(box, steps=8))

    cases = {
        "confirm (cold reference, 1 thread)": lambda: _confirm(s2),
        "reference, 1 thread": lambda: _reference(box, 1),
        "reference, 2 threads": lambda: _reference(box, 2),
        "3D test run, 1 thread": lambda: _mcells(lambda: run_box(grid3, threads=1), cells3 * box.steps),
        "3D test run, 2 threads": lambda: _mcells(lambda: run_box(grid3, threads=2), 0),
        "2D test run, 1 thread": lambda: _mcells(lambda: simulate(s2, threads=1), cells2 * s2.steps, RUNS_2D),
        "3D walls only, 1 thread": lambda: _mcells(lambda: run_box(grid3_walls, threads=1), cells3 * box.steps),
        "2D walls only, 1 thread": lambda: _mcells(lambda: simulate(walls2, threads=1), cells2 * s2.steps, RUNS_2D),
    }
    results = {name: [] for name in cases}
    for _ in range(args.repeats):
        for name, case in cases.items():
            results[name].append(case())
    med = {name: {k: statistics.median(r[k] for r in runs) for k in runs[0]} for name, runs in results.items()}
    for name, figures in med.items():
        print(f"  {name:<38}" + "  ".join(f"{k} {v:.3g}" for k, v in figures.items()))
    ratio = {}
    for key in ("mcells_per_s", "cpu_mcells_per_s"):
        ratio[key] = med["3D test run, 1 thread"][key] / med["2D test run, 1 thread"][key]
        walls = med["3D walls only, 1 thread"][key] / med["2D walls only, 1 thread"][key]
        print(f"3D / 2D kernel {key}: {ratio[key]:.2f} with the layers, {walls:.2f} with walls only")
    c = med["confirm (cold reference, 1 thread)"]
    print(f"box_cells={cells3} test_s={c['test_s']:.3f} reference_s={c['reference_s']:.2f} "
          f"mcells_per_s={med['3D test run, 1 thread']['mcells_per_s']:.1f} "
          f"mcells_per_s_2d={med['2D test run, 1 thread']['mcells_per_s']:.1f} "
          f"ratio_to_2d={ratio['mcells_per_s']:.2f} cpu_ratio_to_2d={ratio['cpu_mcells_per_s']:.2f} "
          f"confirm_s={c['total_s']:.2f}")


def _confirm(s) -> dict:
    t0 = time.perf_counter()
    c = confirm_3d(s, cache=Reference3DCache(use_disk=False))
    return {"total_s": time.perf_counter() - t0, "reference_s": c.reference_s, "test_s": c.test_s,
            "late_s": c.late_s}


def _reference(box, threads: int) -> dict:
    r = compute_reference(box, threads=threads)
    return {"s": r.elapsed_s, "mcells_per_s": r.cell_updates / r.elapsed_s / 1e6}


def _mcells(start, cell_updates: float, runs: int = 1) -> dict:
    """Wall-clock figures of `runs` runs of `start()` in a row and Mcells/s over this
    thread's CPU time around them (which includes the runs' small set-up)."""
    cpu = time.thread_time()
    done = [start() for _ in range(runs)]
    cpu = time.thread_time() - cpu
    wall = sum(run.elapsed_s for run in done)
    figures = {"s": wall, "mcells_per_s": runs * cell_updates / wall / 1e6 if cell_updates else
               statistics.mean(run.mcells_per_s for run in done)}
    if cell_updates:  # one thread only: the CPU time of numba's worker threads is not counted
        figures["cpu_mcells_per_s"] = runs * cell_updates / cpu / 1e6
    return figures


if __name__ == "__main__":
    main()
