"""`quietlayer check FILE --3d`: the scenario's layer confirmed on a small 3D box.

One entry, `check_3d(path, options)`, with the 2D check's exit codes and JSON
shape (per-probe peak error, global error, band worst, late-time status),
plus the box it ran.  Options used: budget, json, no_late, late_steps.
"""

from __future__ import annotations

import json
import math
import time
from pathlib import Path

from quietlayer.app import CAUTION


def late_steps_3d(options) -> int:
    """Late-time steps of the 3D run: none with --no-late; --late-steps when given
    (whatever its value), else the 3D default (the 3D box costs ~4x a 2D step)."""
    from quietlayer.engine.confirm3d import LATE_STEPS_3D
    if getattr(options, "no_late", False):
        return 0
    given = getattr(options, "late_steps", None)
    return LATE_STEPS_3D if given is None else given


def box_summary(box) -> dict:
    """The 3D box as plain data (for JSON and the page)."""
    from quietlayer.engine.grid3d import FACES
    faces = {}
    for name, side in zip(FACES, box.faces):
        faces[name] = "wall" if side is None else f"CPML {side.cells} cells"
    return {"interior_cells": list(box.cells), "total_cells": list(box.total_cells),
            "cell_m": list(box.d), "dt_s": box.dt, "steps": box.steps, "courant_limit_dt_s": box.courant_limit_dt,
            "measured_face": box.measured_face, "faces": faces, "quantity": box.quantity,
            "probes": {name: list(p) for name, p in box.probes}, "notes": list(box.notes),
            "description": box.describe()}


def check_3d(path, options) -> int:
    """Run the 3D confirmation of the scenario file at `path`; print text or JSON; exit code."""
    from quietlayer.app.commands.common import EXIT_FAILED, EXIT_OK, console, late_time_json, score_lines
    from quietlayer.app.commands.common import db as _db, finite_or_none as _finite_or_none
    from quietlayer.app.commands.common import layer_lines as _layer_lines, load as _load
    from quietlayer.engine.confirm3d import confirm_3d
    from quietlayer.engine.errors import DivergenceError
    from quietlayer.engine.grid3d import box_from_scenario

    s = _load(path)
    box = box_from_scenario(s)  # a ScenarioError here is a bad input (exit 2)
    started = time.monotonic()
    labels = {"reference": "3D reference", "test": "3D test run", "late": "3D late-time check"}

    def progress(stage, done, total):
        if console.tty or done == total:  # a log gets one line per stage
            console.bar(labels[stage], done, total, box.describe() if stage == "reference" else "", started)

    t0 = time.perf_counter()
    try:
        c = confirm_3d(s, box=box, late_steps=late_steps_3d(options), progress=progress)
    except DivergenceError as exc:
        console.clear()
        return _report_diverged(path, s, box, options, str(exc))
    console.clear()
    band = c.band_worst_db
    reasons = []
    if not math.isfinite(c.worst_peak_db):
        reasons.append("no probe of the 3D box sees the pulse")
    elif c.worst_peak_db > options.budget:
        reasons.append(f"worst 3D peak error {_db(c.worst_peak_db)} ({c.worst_probe}) is above the budget "
                       f"of {_db(options.budget)}")
    if c.late is not None and c.late.status != "stable":
        reasons.append(f"3D late-time check: {c.late.status}, {c.late.message}")
    passed = not reasons
    worst_band_probe = max(band, key=band.get) if band else ""
    if options.json:
        late = late_time_json(c.late)
        out = {
            "scenario": str(path), "title": s.title, "mode": "3d", "passed": passed, "budget_db": options.budget,
            "reasons": reasons, "worst_peak_db": c.worst_peak_db, "worst_probe": c.worst_probe,
            "global_db": c.global_db, "worst_band_db": band.get(worst_band_probe, math.nan),
            "worst_band_probe": worst_band_probe or None,
            "probes": {name: {"peak_db": c.peak_db.get(name, math.nan), "band_worst_db": band.get(name, math.nan),
                              "position": list(p)} for name, p in box.probes},
            "late_time": late, "diverged": None, "box": box_summary(box),
            "timing_s": {"reference": c.reference_s, "reference_from": c.reference_source, "test": c.test_s,
                         "late_time": c.late_s},
            "elapsed_s": time.perf_counter() - t0, "caution": CAUTION,
        }
        print(json.dumps(_finite_or_none(out), indent=2, allow_nan=False))
        return EXIT_OK if passed else EXIT_FAILED
    print(f"{s.title or Path(path).stem} ({path}): confirmation in 3D")
    print(f"  box: {box.describe()}")
    print(f"  x faces from left/right, y faces from bottom/top, both z faces from {_side_of(box.measured_face)}")
    for line in _layer_lines(s):
        print(f"  {line}")
    for note in box.notes:
        print(f"  note: {note}")
    print()
    print(f"  {'probe':<40}{'peak error':>12}{'band worst':>13}")
    for name, _ in box.probes:
        print(f"  {name:<40}{_db(c.peak_db.get(name), 12)}{_db(band.get(name), 13)}")
    print()
    print("\n".join(score_lines(c.worst_peak_db, c.worst_probe, c.global_db, band.get(worst_band_probe),
                                worst_band_probe, c.late, options.budget)))
    where = "cached" if c.reference_source != "computed" else f"{c.reference_s:.1f} s"
    print(f"  run time: reference {where}, test {c.test_s:.1f} s, late-time {c.late_s:.1f} s")
    print()
    if passed:
        print(f"PASS: worst 3D peak error {_db(c.worst_peak_db)} is within the budget of {_db(options.budget)}"
              + ("" if c.late is None else "; late-time energy stable"))
    else:
        print("FAIL: " + "; ".join(reasons))
    print(CAUTION)
    return EXIT_OK if passed else EXIT_FAILED


def _side_of(face: str) -> str:
    from quietlayer.engine.grid3d import FACE_OF_SIDE
    return {v: k for k, v in FACE_OF_SIDE.items()}[face]


def _report_diverged(path, s, box, options, message: str) -> int:
    from quietlayer.app.commands.common import EXIT_FAILED
    if options.json:
        print(json.dumps({"scenario": str(path), "title": s.title, "mode": "3d", "passed": False,
                          "budget_db": options.budget, "reasons": [message], "diverged": message,
                          "box": box_summary(box), "caution": CAUTION}, indent=2))
    else:
        print(f"{s.title or Path(path).stem} ({path}): confirmation in 3D")
        print(f"FAIL: the 3D test run {message}")
        print(CAUTION)
    return EXIT_FAILED
