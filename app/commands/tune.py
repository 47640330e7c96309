"""`quietlayer tune`: search for the best layer of a thickness, or the thinnest that meets a target."""

from __future__ import annotations

import argparse
import math
import time
from pathlib import Path

from quietlayer.app import CAUTION

from .common import (EXIT_FAILED, EXIT_OK, SCORE_LABELS, BadInput, StopOnInterrupt, WatchedExecutor, console, db,
                     executor_for, load, output_file, point_text, profile_sides, row_text)
from .options import (FORMATTER, SCENARIO_HELP, RenamedOption, add_executor_options, add_score_option, paragraph,
                      ranged)

DEFAULT_TUNE_RUNS = 40
DEFAULT_TARGET_RUNS = 30  # per thickness


def add_parser(commands):
    tune = commands.add_parser(
        "tune", formatter_class=FORMATTER,
        help="search for the best layer of a thickness, or the thinnest that meets a target",
        description=paragraph(
            "Search the grading order m, sigma_max (as a ratio to sigma_opt), kappa_max and alpha_max "
            "(one setting for every CPML side): a space-filling sample, then a bounded Nelder-Mead refinement from its best "
            "point. With --target, thicknesses grow from --min-cells until a tuned layer meets the target, "
            "then bisection finds the thinnest."),
        epilog="examples:\n"
               "  quietlayer tune my_cell.toml --thickness 8 --write tuned.toml\n"
               "  quietlayer tune my_cell.toml --target -60 --runs 20 --dask local:4\n\n"
               + paragraph(f"--runs is the number of measurements allowed: {DEFAULT_TUNE_RUNS} by default with --thickness, "
                            f"{DEFAULT_TARGET_RUNS} per thickness with --target (at least 8). With --thickness "
                            "the scenario's own grading at that thickness is one of the runs, so the result is "
                            "never worse than it. Ctrl-C (or SIGTERM) lets the runs in progress finish and keeps "
                            "the best so far; a second Ctrl-C abandons.") + "\n\n"
               "exit codes: 0 done, 1 no thickness in range meets the target, 2 a bad file or option,\n"
               "130 interrupted, 143 terminated (the best so far is reported, and written with --write)")
    tune.add_argument("scenario", metavar="SCENARIO.toml", help=SCENARIO_HELP)
    goal = tune.add_mutually_exclusive_group(required=True)
    goal.add_argument("--thickness", type=ranged(int, 1, 500, "a whole number of cells from 1 to 500"),
                      metavar="CELLS", help="tune a layer of this many cells")
    goal.add_argument("--target", type=ranged(float, -300.0, -1e-9, "a number of dB below 0, down to -300"),
                      metavar="DB", help="find the thinnest tuned layer whose worst peak error is at or below DB")
    tune.add_argument("--runs", type=ranged(int, 8, 100_000, "a whole number of runs from 8 to 100000"),
                      metavar="N", help=f"runs allowed (default {DEFAULT_TUNE_RUNS}; {DEFAULT_TARGET_RUNS} per "
                                        "thickness with --target)")
    # --budget is check's limit in dB; given to tune it is refused, pointing at --runs, rather than read as runs
    tune.add_argument("--budget", nargs="?", action=RenamedOption, new_name="--runs", help=argparse.SUPPRESS)
    tune.add_argument("--min-cells", type=ranged(int, 1, 500, "a whole number of cells from 1 to 500"),
                      default=4, metavar="CELLS", help="thinnest layer tried with --target (default 4)")
    tune.add_argument("--max-cells", type=ranged(int, 1, 500, "a whole number of cells from 1 to 500"),
                      default=40, metavar="CELLS", help="thickest layer tried with --target (default 40)")
    add_score_option(tune, "score to minimise")
    tune.add_argument("--write", metavar="OUT.toml", help="write the scenario with the tuned layer to this file")
    add_executor_options(tune)
    return tune


def _start_point(s) -> dict | None:
    """The scenario's own setting (its first CPML side), clipped into the search ranges."""
    from quietlayer.engine.search import start_point

    return start_point(s)


def _tuned_lines(result) -> list[str]:
    from quietlayer.engine.layer import resolved_sigma_max, side_cell
    from quietlayer.engine.scenario import SIDES
    from quietlayer.engine.search import current_cells

    t = result.scenario
    name = next(n for n in SIDES if getattr(t.boundary, n).kind == "cpml")
    side = getattr(t.boundary, name)
    smax = resolved_sigma_max(side, side_cell(t, name), t.eps_r)
    row = result.row
    lines = [f"  {'thickness':<20}{current_cells(t)} cells",
             f"  {'grading order m':<20}{side.order:.4g}",
             f"  {'sigma_max':<20}{side.sigma_ratio:.4g} x sigma_opt = {smax:.4g} S/m",
             f"  {'kappa_max':<20}{side.kappa_max:.4g}",
             f"  {'alpha_max':<20}{side.alpha_max:.4g} S/m (order {side.alpha_order:g})",
             f"  {'worst peak error':<20}{db(row.get('worst_peak_db'))} ({row.get('worst_probe', '')})",
             f"  {'global error':<20}{db(row.get('global_db'))}",
             f"  {'band worst':<20}{db(row.get('worst_band_db'))}"]
    peaks = row.get("peak_db", {})
    if peaks:
        lines.append("  peak error per probe: " + ", ".join(f"{k} {db(v)}" for k, v in peaks.items()))
    return lines


def _write_tuned(path: Path, result, source: str, note: str) -> None:
    from quietlayer.engine.export import write_text_atomic
    from quietlayer.engine.search import current_cells

    s = result.scenario
    cells = current_cells(s)
    title = f"{s.title} (tuned, {cells} cells)" if s.title else f"Tuned {cells}-cell layer"
    s = s.with_changes(title=title)
    header = (f"# Scenario of {source} with its layer tuned by quietlayer tune: {cells} cells,\n"
              f"# {SCORE_LABELS[result.score]} {db(result.value)} after {result.runs} runs{note}.\n")
    write_text_atomic(path, header + s.to_toml())


def run(args) -> int:
    from quietlayer.engine.search import current_cells, thinnest_layer, tune_layer

    s = load(args.scenario)
    write = output_file(args.write, "--write", refuse=args.scenario) if args.write else None
    profiles = profile_sides(s)
    if profiles:
        raise BadInput(f"{args.scenario}: layer.{profiles[0]}: takes its grading from a profile table; tune "
                       "searches the polynomial grading (remove profile or profile_file to tune)")
    current_cells(s)  # at least one CPML side, or a clear error
    if args.target is not None and args.min_cells > args.max_cells:
        raise BadInput(f"--min-cells {args.min_cells} is not allowed: at most --max-cells {args.max_cells}")
    start = _start_point(s)
    started = time.monotonic()
    stop = StopOnInterrupt("runs", lambda: console.note(
        "quietlayer: stopped at once; the search was abandoned, nothing written"))
    with stop:
        state = {"runs": 0, "best": math.inf}

        def on_result(base, row):  # every measured point, from either search
            state["runs"] += 1
            if row["status"] == "ok" and math.isfinite(row.get(args.score, math.nan)):
                state["best"] = min(state["best"], row[args.score])

        executor = WatchedExecutor(executor_for(args), stop, on_result)
        try:
            if args.thickness is not None:
                budget = args.runs or DEFAULT_TUNE_RUNS
                console.note(f"quietlayer: tuning a {args.thickness}-cell layer of {args.scenario} with "
                             f"{budget} runs on {executor.description}")

                def on_run(runs, total, row):
                    console.bar("tune", runs, total, f"best {db(state['best'])}  last "
                                f"{point_text(row['point'])}: {row_text(row, args.score)}", started)

                result = tune_layer(s, args.thickness, budget=budget, score=args.score, executor=executor,
                                    start=start, progress=on_run)
                console.clear()
                return _report_tune(args, s, result, write, stop, started)
            budget = args.runs or DEFAULT_TARGET_RUNS
            console.note(f"quietlayer: looking for the thinnest layer of {args.scenario} with "
                         f"{SCORE_LABELS[args.score]} <= "
                         f"{args.target:g} dB, {args.min_cells}..{args.max_cells} cells, {budget} runs per "
                         f"thickness, on {executor.description}")

            def on_thickness(cells, tuned):
                verdict = "meets" if tuned.value <= args.target else "misses"
                console.note(f"  {cells:>3} cells: {db(tuned.value)} after {tuned.runs} runs ({verdict} the target)")
                return not stop.requested

            best_by_cells: dict[int, float] = {}

            def on_run_target(base, row):
                on_result(base, row)
                cells = current_cells(base)
                if row["status"] == "ok" and math.isfinite(row.get(args.score, math.nan)):
                    best_by_cells[cells] = min(best_by_cells.get(cells, math.inf), row[args.score])
                if console.tty:  # a log gets one line per thickness (on_thickness) instead
                    console.bar(f"tune, {cells} cells", state["runs"], None,
                                f"best {db(best_by_cells.get(cells, math.nan))}  "
                                f"last {row_text(row, args.score)}", started)

            executor.on_result = on_run_target
            result = thinnest_layer(s, args.target, cells_range=(args.min_cells, args.max_cells), budget=budget,
                                    score=args.score, executor=executor, progress=on_thickness)
            console.clear()
            return _report_target(args, result, write, stop, started)
        finally:
            executor.close()


def _report_tune(args, s, result, write, stop: StopOnInterrupt, started: float) -> int:
    interrupted = stop.requested
    own = next((r for r in result.path if r.get("stage") == "sample" and r["point"] == _start_point(s)), None)
    head = "best setting found before the interruption" if interrupted else "best setting"
    print(f"{head} for {result.cells} cells ({result.runs} runs in {time.monotonic() - started:.1f} s):")
    for line in _tuned_lines(result):
        print(line)
    if own is not None:
        print(f"  (the scenario's own grading at {result.cells} cells: {row_text(own, args.score)})")
    if write is not None:
        with stop.holding():
            _write_tuned(write, result, args.scenario, " (interrupted)" if interrupted else "")
        print(f"wrote {write}")
    print(CAUTION)
    return stop.exit_code if interrupted else EXIT_OK


def _report_target(args, result, write, stop: StopOnInterrupt, started: float) -> int:
    interrupted = stop.requested
    print(f"thicknesses tried for {SCORE_LABELS[args.score]} <= {args.target:g} dB "
          f"({result.runs} runs in {time.monotonic() - started:.1f} s):")
    print(f"  {'cells':>5}  {'best':>10}  {'runs':>5}")
    for cells, tuned in result.tried.items():
        verdict = "meets" if tuned.value <= args.target else "misses"
        print(f"  {cells:>5}  {db(tuned.value, 10)}  {tuned.runs:>5}  {verdict}")
    if result.met:
        lead = "thinnest layer meeting the target so far (interrupted)" if interrupted else \
            "thinnest layer meeting the target"
        print(f"{lead}: {result.cells} cells")
        for line in _tuned_lines(result.tune):
            print(line)
        if write is not None:
            with stop.holding():
                _write_tuned(write, result.tune, args.scenario,
                             f", the thinnest meeting {args.target:g} dB" + (" (interrupted)" if interrupted else ""))
            print(f"wrote {write}")
    else:
        print(f"no layer of {args.min_cells}..{args.max_cells} cells met {args.target:g} dB"
              + (" before the interruption" if interrupted else "")
              + ("; nothing written" if write is not None else ""))
    print(CAUTION)
    if interrupted:
        return stop.exit_code
    return EXIT_OK if result.met else EXIT_FAILED

