"""Compile the kernels into numba's on-disk cache, in stages, reporting each:

    python -m quietlayer.engine.warm

Prints "stage K done" after each stage and "ready float32" once everything a
float32 run needs is compiled (backend.compile_in_background reads these).
Each stage runs a small measurement, so every specialization a run of that
precision uses is compiled (the step, the light-cone reference, the sums).
"""

from __future__ import annotations

import sys
import time

STAGES = ("the time-stepping kernels (float32)", "the reference kernels (float32)",
          "the time-stepping kernels (float64)", "the reference kernels (float64)")
EXPECTED_S = 30.0  # all four stages, two-core machine, nothing else running (measured: 25-35 s)


def main() -> int:
    from .defaults import default_scenario
    from .measure import measure
    from .reference import ReferenceCache, compute_reference
    from .simulate import simulate

    started = time.perf_counter()
    stage = 0
    for precision in ("float32", "float64"):
        s = default_scenario(steps=60, precision=precision)
        simulate(s, snapshot_every=10, snapshot_window=(slice(10, 20), slice(10, 20)))
        stage += 1
        print(f"stage {stage} done ({time.perf_counter() - started:.1f} s)", flush=True)
        compute_reference(s)
        measure(s, cache=ReferenceCache(use_disk=False), parts={"probes", "global", "snapshots"})
        stage += 1
        print(f"stage {stage} done ({time.perf_counter() - started:.1f} s)", flush=True)
        if precision == "float32":
            print("ready float32", flush=True)
    return 0


if __name__ == "__main__":
    sys.exit(main())
