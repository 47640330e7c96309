"""Time of one measurement on the default scenario, run by hand:

    python tests/bench/bench_measure.py

- warm: measure() with the reference already in the memory cache, every part
  the page shows except the 20,000-step late-time check (which the page runs
  on request), median of 20;
- cold: the reference computed from nothing (no memory, no disk cache), median
  of 5; and the late-time check once, for the record;
- the reference at 2400 steps (cost grows with the cube of the run length):
  stepped on its light-cone window and on the whole reference grid, three
  interleaved repeats, medians.
Last lines: measure_warm_s=<median> reference_cold_s=<median>, then
reference_2400_s=<light cone> reference_2400_full_s=<whole grid> speedup=<ratio>
"""

from __future__ import annotations

import statistics
import time

from quietlayer.engine.defaults import default_scenario
from quietlayer.engine.measure import late_time_check, measure
from quietlayer.engine.reference import ReferenceCache, compute_reference

PAGE_PARTS = {"probes", "spectra", "angles", "global", "snapshots"}


def main() -> None:
    s = default_scenario()
    cache = ReferenceCache(use_disk=False)
    measure(s, parts=PAGE_PARTS, cache=cache)  # compile, and fill the memory cache
    warm, test_runs = [], []
    for _ in range(20):
        t = time.perf_counter()
        r = measure(s, parts=PAGE_PARTS, cache=cache)
        warm.append(time.perf_counter() - t)
        test_runs.append(r.test_s)
    cold = []
    for _ in range(5):
        t = time.perf_counter()
        compute_reference(s)
        cold.append(time.perf_counter() - t)
    t = time.perf_counter()
    late = late_time_check(s)
    late_s = time.perf_counter() - t
    print(f"default scenario: {s.nx} x {s.ny} interior, {s.steps} steps, {s.precision}")
    print(f"  warm measure    median {statistics.median(warm):.4f} s  (min {min(warm):.4f}, max {max(warm):.4f}); "
          f"of which the test run {statistics.median(test_runs):.4f} s")
    print(f"  cold reference  median {statistics.median(cold):.4f} s  (min {min(cold):.4f}, max {max(cold):.4f})")
    print(f"  late-time check {late.steps} steps: {late_s:.3f} s, {late.status}")
    print(f"measure_warm_s={statistics.median(warm):.4f} reference_cold_s={statistics.median(cold):.4f}")
    long = default_scenario(steps=2400)
    cone, full = [], []
    for _ in range(3):
        for light_cone, times in ((True, cone), (False, full)):
            t = time.perf_counter()
            compute_reference(long, light_cone=light_cone)
            times.append(time.perf_counter() - t)
            print(f"  reference 2400 steps, {'light cone' if light_cone else 'whole grid'}: {times[-1]:.2f} s")
    c, f = statistics.median(cone), statistics.median(full)
    print(f"reference_2400_s={c:.2f} reference_2400_full_s={f:.2f} speedup={f / c:.2f}")


if __name__ == "__main__":
    main()
