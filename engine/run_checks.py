"""Is the run long enough?  Two checks a practitioner needs beside the scores.

- record_length: how many periods of f_min each probe records after the pulse
  reaches it.  A record shorter than a few periods cannot resolve f_min: the
  low end of the band rests on a truncated signal.
- lengthened: the worst peak error of the same setting run longer.  A result
  that moves when the run is lengthened was cut off before the layer's echo
  (a slow, low-frequency tail, a late corner echo) had arrived.
"""

from __future__ import annotations

import math
from dataclasses import dataclass

from .budget import check_work
from .measure import measure
from .scenario import Scenario
from .units import C0

MIN_PERIODS = 3.0  # periods of f_min a probe should record (common practice, no source)
LENGTHEN_FACTOR = 2  # the lengthened run is this many times as long
LENGTHEN_TOLERANCE_DB = 1.0  # a worst peak error moving more than this is flagged (common practice, no source)
STEP_ROUNDING = 50  # suggested run lengths are rounded up to the run-length control's step


@dataclass(frozen=True)
class RecordLength:
    periods: float  # periods of f_min recorded at the probe that records the fewest
    probe: str
    window_s: float  # time from the pulse's peak reaching that probe to the end of the run
    steps_needed: int  # a run length giving MIN_PERIODS at every probe

    @property
    def short(self) -> bool:
        return self.periods < MIN_PERIODS


def record_length(s: Scenario) -> RecordLength | None:
    """Periods of f_min recorded after the pulse's peak reaches each probe (the fewest of them),
    travelling at the host's phase velocity; None without probes or with a band starting at 0."""
    if not s.probes or s.source.f_min <= 0:
        return None
    speed = C0 / math.sqrt(s.eps_r)
    run_end = s.steps * s.dt
    arrivals = {p.name: s.source.pulse.t0 + math.hypot((p.x - s.source.x) * s.dx, (p.y - s.source.y) * s.dy) / speed
                for p in s.probes}
    probe = max(arrivals, key=arrivals.get)
    window = run_end - arrivals[probe]
    wanted = arrivals[probe] + MIN_PERIODS / s.source.f_min
    steps = math.ceil(wanted / s.dt / STEP_ROUNDING) * STEP_ROUNDING
    return RecordLength(periods=max(window, 0.0) * s.source.f_min, probe=probe, window_s=window, steps_needed=steps)


@dataclass(frozen=True)
class Lengthened:
    steps: int
    worst_peak_db: float
    change_db: float  # lengthened minus original worst peak error

    @property
    def changed(self) -> bool:
        return not math.isfinite(self.change_db) or abs(self.change_db) > LENGTHEN_TOLERANCE_DB


def lengthened(s: Scenario, worst_peak_db: float, factor: int = LENGTHEN_FACTOR, *, progress=None,
               budget=None) -> Lengthened:
    """Measure the same setting `factor` times as long and compare the worst peak error.

    progress(step, total) may return False to cancel (RunCancelled); budget: a
    work budget (engine.budget) the longer run must fit, else ScenarioError."""
    longer = s.with_changes(steps=s.steps * factor)
    if budget is not None:
        check_work(longer, budget)
    m = measure(longer, parts={"probes"},
                progress=None if progress is None else (lambda stage, step, total: progress(step, total)))
    return Lengthened(steps=longer.steps, worst_peak_db=m.worst_peak_db, change_db=m.worst_peak_db - worst_peak_db)
