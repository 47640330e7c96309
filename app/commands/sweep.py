"""`quietlayer sweep`: measure every combination of some parameters and write a CSV table."""

from __future__ import annotations

import math
import signal
import time
import warnings

from quietlayer.engine.errors import ScenarioError

from .common import (EXIT_FAILED, EXIT_OK, SCORE_LABELS, BadInput, StopOnInterrupt, WatchedExecutor, console, db,
                     executor_for, load, output_file, point_text, profile_sides, row_text)
from .options import FORMATTER, SCENARIO_HELP, add_executor_options, add_score_option, paragraph

CHECKPOINT_S = 10.0  # a long sweep rewrites its CSV this often, so a crash loses little


def add_parser(commands):
    sweep = commands.add_parser(
        "sweep", formatter_class=FORMATTER,
        help="measure every combination of some parameters and write a CSV table",
        description=paragraph(
            "Measure the scenario at every combination of the varied parameters and write one CSV row per "
            "point (its values, status, worst peak error, global error, band worst, peak error per probe, "
            "run time, and why a point failed)."),
        epilog="examples:\n"
               "  quietlayer sweep my_cell.toml --vary order=2:5:4 --vary sigma_ratio=0.25:2:8 --out sweep.csv\n"
               "  quietlayer sweep my_cell.toml --vary cells=4,6,8,12 --vary alpha_max=0.001:0.1:5:log "
               "--out alpha.csv --dask local:4\n\n"
               "--vary NAME=START:STOP:COUNT (ends included; add :log for geometric spacing) or\n"
               "NAME=V1,V2,...; repeat it for more axes (the first varies slowest). Names:\n"
               "  layer (every CPML side, or one as right.order): cells, order, sigma_ratio,\n"
               "    sigma_max, kappa_max, alpha_max, alpha_order\n"
               "  problem: cell, dx, dy, courant, eps_r, sigma, f_min, f_max, steps\n\n"
               "A terminal shows a progress bar on stderr, a log gets a line per point. The CSV is\n"
               f"written under a temporary name and renamed (an existing file is replaced), and rewritten\n"
               f"every {CHECKPOINT_S:g} s during a long sweep. Ctrl-C (or SIGTERM) lets the points in progress\n"
               "finish and writes every point measured; a second Ctrl-C writes them at once.\n\n"
               "exit codes: 0 done (invalid or diverged points are rows with their reason), 1 no\n"
               "point could be measured, 2 a bad file or option, 130 interrupted by Ctrl-C and 143\n"
               "by SIGTERM (both write the points already measured)")
    sweep.add_argument("scenario", metavar="SCENARIO.toml", help=SCENARIO_HELP)
    sweep.add_argument("--vary", action="append", required=True, metavar="NAME=START:STOP:COUNT",
                       help="a parameter and its values (repeat for more axes)")
    sweep.add_argument("--out", required=True, metavar="FILE.csv", help="where to write the table")
    add_score_option(sweep, "score that picks the best point shown at the end")
    add_executor_options(sweep)
    return sweep


def _parse_axes(texts: list[str]):
    from quietlayer.engine.sweep import grid_points, parse_vary
    axes = []
    for text in texts:
        try:
            axes.append(parse_vary(text))
        except ScenarioError as exc:
            raise BadInput(f"--vary {text}: {exc}") from None
    try:
        return axes, grid_points(axes)
    except ScenarioError as exc:
        raise BadInput(f"--vary: {exc}") from None



def run(args) -> int:
    from quietlayer.engine.sweep import LAYER_PARAMETERS, SweepTable, apply_point, run_sweep

    s = load(args.scenario)
    axes, points = _parse_axes(args.vary)
    out = output_file(args.out, "--out", refuse=args.scenario)
    grading = set(LAYER_PARAMETERS) - {"cells"}
    varied = {a.name.split(".")[-1] for a in axes}
    if profile_sides(s) and varied & grading:
        console.note(f"quietlayer: note: {', '.join(profile_sides(s))} take their grading from a profile "
                     f"table, which {', '.join(sorted(varied & grading))} do not change")
    invalid = []
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        for p in points:
            try:
                apply_point(s, p)
            except ScenarioError as exc:
                invalid.append(exc)
    if len(invalid) == len(points):
        raise BadInput(f"--vary: every point is invalid (first: {invalid[0]})")
    if invalid:
        console.note(f"quietlayer: note: {len(invalid)} of {len(points)} points are invalid and will be "
                     f"recorded as such (first: {invalid[0]})")
    table = SweepTable(parameters=[a.name for a in axes], points=points)
    started = time.monotonic()
    last_write = [started]

    def write_table() -> None:
        with stop.holding():
            table.write_csv(out)

    def abandon() -> None:
        write_table()
        console.note(f"quietlayer: stopped at once: kept {table.done} of {len(points)} points in {out}")

    stop = StopOnInterrupt("points", abandon)
    with stop:
        executor = WatchedExecutor(executor_for(args), stop)
        console.note(f"quietlayer: sweeping {len(points)} points of {args.scenario} on {executor.description}")

        best_db = [math.inf]  # kept as points come in: table.best() reads every row

        def on_point(done, total, index, row):
            value = row.get(args.score, math.nan) if row["status"] == "ok" else math.nan
            if math.isfinite(value) and value < best_db[0]:
                best_db[0] = value
            shown = f"{point_text(row['point'])}: {row_text(row, args.score)}"
            if console.tty and math.isfinite(best_db[0]):
                shown = f"best {db(best_db[0])}  last {shown}"
            console.bar("sweep", done, total, shown, started)
            if time.monotonic() - last_write[0] > CHECKPOINT_S and done < total:
                write_table()
                last_write[0] = time.monotonic()

        try:
            run_sweep(s, points, executor, progress=on_point, table=table)
        finally:
            console.clear()
            executor.close()
        write_table()
    counts = {}
    for row in table.rows.values():
        counts[row["status"]] = counts.get(row["status"], 0) + 1
    summary = ", ".join(f"{n} {status}" for status, n in counts.items())
    elapsed = time.monotonic() - started
    print(f"wrote {out}: {table.done} of {len(points)} points ({summary or 'none measured'}) in {elapsed:.1f} s")
    best = table.best(args.score)
    if best is not None:
        index, row = best
        print(f"best {SCORE_LABELS[args.score]}: {db(row[args.score])} at {point_text(row['point'])} (row {index}; "
              f"worst peak {db(row['worst_peak_db'])} at {row['worst_probe']}, global {db(row['global_db'])}, "
              f"band worst {db(row['worst_band_db'])})")
    if stop.requested:
        why = "terminated" if stop.signum == signal.SIGTERM else "interrupted"
        console.note(f"quietlayer: {why}: kept {table.done} of {len(points)} points in {out}")
        return stop.exit_code
    if best is None:
        console.note("quietlayer: no point could be measured (see the status and reason columns)")
        return EXIT_FAILED
    return EXIT_OK

