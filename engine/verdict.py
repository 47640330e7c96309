"""The verdict: is this layer good enough for the run?  One rule for the page and `quietlayer check`.

A layer passes when its worst peak error over the probes is at or below the
budget (dB) and the late-time check finds no growing or diverging energy.
Until the late-time check has run, a layer within the budget is only
"within budget so far".
"""

from __future__ import annotations

import math
from dataclasses import dataclass, field

DEFAULT_BUDGET_DB = -40.0  # worst peak error accepted unless told otherwise (common practice, no source)


def _db(value: float) -> str:
    return f"{value:.1f} dB" if math.isfinite(value) else "n/a"


@dataclass(frozen=True)
class Verdict:
    passed: bool | None  # None: within the budget, the late-time check still to come
    budget_db: float
    margin_db: float  # budget minus worst peak error: > 0 within the budget by that much
    reasons: list = field(default_factory=list)  # why it fails, one sentence each


def judge(worst_peak_db: float, worst_probe: str, budget_db: float, late=None, late_expected: bool = True) -> Verdict:
    """The verdict on a measurement's worst peak error and (optionally) its late-time check.

    late: an engine.measure.LateTime or None (not run yet, or not wanted when
    late_expected is False)."""
    margin = budget_db - worst_peak_db if math.isfinite(worst_peak_db) else math.nan
    reasons = []
    if not math.isfinite(worst_peak_db):
        reasons.append("no probe sees the pulse within the run")
    elif worst_peak_db > budget_db:
        reasons.append(f"worst peak error {_db(worst_peak_db)} ({worst_probe}) is above the budget "
                       f"of {_db(budget_db)}")
    if late is not None and late.status != "stable":
        reasons.append(f"late-time check: {late.status}, {late.message}")
    if reasons:
        return Verdict(False, budget_db, margin, reasons)
    return Verdict(True if (late is not None or not late_expected) else None, budget_db, margin, [])
