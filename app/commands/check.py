"""`quietlayer check`: measure a scenario's layer and fail if it reflects more than a budget."""

from __future__ import annotations

import json
import math
import time
from pathlib import Path

from quietlayer.app import CAUTION
from quietlayer.engine.measure import LATE_STEPS
from quietlayer.engine.run_checks import MIN_PERIODS, record_length
from quietlayer.engine.verdict import DEFAULT_BUDGET_DB, judge

from ..units import format_frequency
from .common import (EXIT_FAILED, EXIT_OK, BadInput, db, finite_or_none, late_time_json, layer_lines, load,
                     problem_line, score_lines, shorten)
from .options import FORMATTER, SCENARIO_HELP, decibels, paragraph, ranged

DEFAULT_LATE_STEPS = LATE_STEPS  # 2D late-time check unless --late-steps is given (--3d has its own)


def add_parser(commands):
    check = commands.add_parser(
        "check", formatter_class=FORMATTER,
        help="measure a scenario's layer and fail if it reflects more than a budget",
        description=paragraph(
            "Measure the scenario's layer against a reflection-free reference and print its scores: peak "
            "error per probe, the worst of them, the global error over the interior, the worst reflection "
            "over the source band (band worst), and a late-time stability check."),
        epilog="examples:\n  quietlayer check my_cell.toml\n  quietlayer check my_cell.toml --budget -60 --json\n\n"
               "The check passes when the worst peak error over the probes is at or below the budget\n"
               f"(default {DEFAULT_BUDGET_DB:g} dB) and the late-time check finds no growing energy.\n"
               "A profile table is interpolated linearly between its rows: tabulate it at least every\n"
               "half cell, or the grading seen by the E and H nodes no longer matches and reflects.\n\n"
               "exit codes: 0 within the budget, 1 above it (or a diverged run, or growing late-time\n"
               "energy), 2 a bad file or option, 130 interrupted\n\n" + CAUTION)
    check.add_argument("scenario", metavar="SCENARIO.toml", help=SCENARIO_HELP)
    check.add_argument("--budget", type=decibels, default=DEFAULT_BUDGET_DB, metavar="DB",
                       help=f"largest worst peak error accepted, dB (default {DEFAULT_BUDGET_DB:g})")
    check.add_argument("--json", action="store_true", help="print the scores as one JSON object (null for no value)")
    check.add_argument("--no-late", action="store_true", help="skip the late-time stability check")
    check.add_argument("--late-steps", type=ranged(int, 100, 2_000_000, "a whole number of steps from 100 to 2000000"),
                       default=None, metavar="N",
                       help=f"length of the late-time check, steps (default {DEFAULT_LATE_STEPS}; 4000 with --3d)")
    check.add_argument("--3d", dest="three_d", action="store_true",
                       help="confirm the layer on a small 3D box derived from the scenario (same cell, band, "
                            "host and layers; probes near a face centre, an edge and a corner); the late-time "
                            "check then runs 4000 steps unless --late-steps says otherwise")
    return check


def run(args) -> int:
    from quietlayer.engine.errors import DivergenceError
    from quietlayer.engine.measure import measure

    if args.three_d:
        from ..confirm3d import check_3d
        return check_3d(args.scenario, args)

    late_steps = DEFAULT_LATE_STEPS if args.late_steps is None else args.late_steps
    s = load(args.scenario, late_steps=0 if args.no_late else late_steps)
    if not s.probes:
        raise BadInput(f"{args.scenario}: probes: the scenario has none; check scores the layer at its probes "
                       "(add [[probes]] entries with name, x, y)")
    parts = {"probes", "global", "spectra"} | (set() if args.no_late else {"late_time"})
    t0 = time.perf_counter()
    try:
        m = measure(s, parts=parts, late_steps=late_steps)
    except DivergenceError as exc:
        return _report_diverged(args, s, exc)
    band = m.band_worst_db
    if not math.isfinite(m.worst_peak_db):
        raise BadInput(f"{args.scenario}: probes: none sees the pulse within the run (steps = {s.steps}); "
                       "move the probes or lengthen the run")
    verdict = judge(m.worst_peak_db, m.worst_probe, args.budget, m.late, late_expected=not args.no_late)
    reasons = verdict.reasons
    passed = not reasons
    warnings = run_warnings(s)
    worst_band_probe = max(band, key=band.get) if band else ""
    if args.json:
        late = late_time_json(m.late)
        out = {
            "scenario": str(args.scenario), "title": s.title, "passed": passed, "budget_db": args.budget,
            "reasons": reasons, "worst_peak_db": m.worst_peak_db, "worst_probe": m.worst_probe,
            "global_db": m.global_db, "worst_band_db": band.get(worst_band_probe, math.nan),
            "worst_band_probe": worst_band_probe or None,
            "probes": {name: {"peak_db": value, "band_worst_db": band.get(name, math.nan),
                              "incidence_deg": m.probe_angles.get(name, math.nan)}
                       for name, value in m.peak_db.items()},
            "late_time": late, "diverged": None, "warnings": warnings,
            "run": {"nx": s.nx, "ny": s.ny, "steps": s.steps, "dt_s": s.dt,
                    "cells_per_wavelength": s.cells_per_wavelength, "polarization": s.polarization,
                    "precision": s.precision},
            "elapsed_s": time.perf_counter() - t0, "caution": CAUTION,
        }
        print(json.dumps(finite_or_none(out), indent=2, allow_nan=False))
        return EXIT_OK if passed else EXIT_FAILED
    print(f"{s.title or Path(args.scenario).stem} ({args.scenario})")
    print(f"  {problem_line(s)}")
    for line in layer_lines(s):
        print(f"  {line}")
    print()
    print(f"  {'probe':<18}{'peak error':>12}{'band worst':>13}{'incidence':>11}")
    for name, value in m.peak_db.items():
        angle = m.probe_angles.get(name)
        print(f"  {shorten(name, 17):<18}{db(value, 12)}{db(band.get(name), 13)}"
              f"{'' if angle is None else f'{angle:.0f} deg':>11}")
    print()
    print("\n".join(score_lines(m.worst_peak_db, m.worst_probe, m.global_db, band.get(worst_band_probe),
                                worst_band_probe, m.late, args.budget)))
    print()
    for line in warnings:
        print(f"warning: {line}")
    if passed:
        print(f"PASS: worst peak error {db(m.worst_peak_db)} is within the budget of {db(args.budget)}"
              + ("" if m.late is None else "; late-time energy stable"))
    else:
        print("FAIL: " + "; ".join(reasons))
    print(CAUTION)
    return EXIT_OK if passed else EXIT_FAILED


def run_warnings(s) -> list[str]:
    """What the practitioner should know beside the scores (the page says the same)."""
    record = record_length(s)
    if record is None or not record.short:
        return []
    return [f"short run for f_min: probe '{record.probe}' records {record.periods:.1f} periods of f_min = "
            f"{format_frequency(s.source.f_min)} after the pulse reaches it ({MIN_PERIODS:g} wanted, common practice); "
            f"the low end of its spectrum is not resolved (about {record.steps_needed} steps would do)"]


def _report_diverged(args, s, exc) -> int:
    message = str(exc)
    if args.json:
        print(json.dumps({"scenario": str(args.scenario), "title": s.title, "passed": False,
                          "budget_db": args.budget, "reasons": [message], "diverged": message,
                          "diverged_step": exc.step, "caution": CAUTION}, indent=2, allow_nan=False))
    else:
        print(f"{s.title or Path(args.scenario).stem} ({args.scenario})")
        print(f"FAIL: the test run {message}")
        print(CAUTION)
    return EXIT_FAILED
