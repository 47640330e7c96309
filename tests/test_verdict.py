"""The verdict rule (one for the page and `quietlayer check`) and the run-length checks."""

from __future__ import annotations

import math
from dataclasses import replace

import pytest

from quietlayer.engine.defaults import default_scenario
from quietlayer.engine.measure import LateTime, measure
from quietlayer.engine.run_checks import MIN_PERIODS, STEP_ROUNDING, lengthened, record_length
from quietlayer.engine.units import C0
from quietlayer.engine.verdict import judge


def late(status: str) -> LateTime:
    return LateTime(status=status, steps=20_000, growth_db_per_1000=3.0 if status != "stable" else -1.0,
                    final_db=-30.0, energy_steps=None, interior_energy=None, layer_energy=None,
                    message="energy grows" if status != "stable" else "")


def test_within_the_budget_passes_once_the_late_time_check_is_stable():
    pending = judge(-45.0, "corner", -40.0, None)
    assert pending.passed is None and pending.margin_db == pytest.approx(5.0) and not pending.reasons
    done = judge(-45.0, "corner", -40.0, late("stable"))
    assert done.passed is True and done.margin_db == pytest.approx(5.0)
    assert judge(-45.0, "corner", -40.0, None, late_expected=False).passed is True
    assert judge(-40.0, "corner", -40.0, late("stable")).passed is True  # "at or below the budget"


def test_above_the_budget_or_growing_energy_fails_with_reasons():
    over = judge(-37.5, "corner", -40.0, late("stable"))
    assert over.passed is False and over.margin_db == pytest.approx(-2.5)
    assert over.reasons == ["worst peak error -37.5 dB (corner) is above the budget of -40.0 dB"]
    growing = judge(-60.0, "corner", -40.0, late("growing"))
    assert growing.passed is False and growing.reasons == ["late-time check: growing, energy grows"]
    both = judge(-30.0, "x", -40.0, late("diverged"))
    assert len(both.reasons) == 2
    blind = judge(math.nan, "", -40.0, late("stable"))
    assert blind.passed is False and "no probe" in blind.reasons[0]


def test_record_length_counts_periods_after_the_pulse_reaches_the_farthest_probe():
    s = default_scenario(steps=600)
    r = record_length(s)
    # the pulse's peak travels at the phase velocity c0 / sqrt(eps_r) (any electromagnetics text)
    far = max(s.probes, key=lambda p: math.hypot((p.x - s.source.x) * s.dx, (p.y - s.source.y) * s.dy))
    arrival = s.source.pulse.t0 + math.hypot((far.x - s.source.x) * s.dx, (far.y - s.source.y) * s.dy) / C0
    assert r.probe == far.name
    assert r.periods == pytest.approx((s.steps * s.dt - arrival) * s.source.f_min, rel=1e-12)
    assert r.steps_needed % STEP_ROUNDING == 0
    longer = record_length(s.with_changes(steps=r.steps_needed))
    assert not longer.short and longer.periods >= MIN_PERIODS
    shorter = record_length(s.with_changes(steps=r.steps_needed - STEP_ROUNDING))
    assert shorter.periods < MIN_PERIODS + STEP_ROUNDING * s.dt * s.source.f_min
    slower = record_length(s.with_changes(eps_r=4.0))  # half the speed: the pulse arrives later
    assert slower.periods < r.periods
    assert record_length(s.with_changes(source=replace(s.source, f_min=0.0))) is None


def test_lengthened_run_reports_the_change_of_the_worst_peak_error():
    s = default_scenario(steps=300)
    m = measure(s, parts={"probes"})
    same = lengthened(s, m.worst_peak_db)
    direct = measure(s.with_changes(steps=600), parts={"probes"})
    assert same.steps == 600 and same.worst_peak_db == direct.worst_peak_db
    assert same.change_db == pytest.approx(direct.worst_peak_db - m.worst_peak_db)
    assert same.changed == (abs(same.change_db) > 1.0)
