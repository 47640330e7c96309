"""`quietlayer export`: coefficient tables (CSV, JSON, NPZ), the scenario and an HTML report."""

from __future__ import annotations

from pathlib import Path

from quietlayer.app import CAUTION

from .common import EXIT_FAILED, EXIT_OK, BadInput, console, db, load
from .options import FORMATTER, SCENARIO_HELP, paragraph


def add_parser(commands):
    export = commands.add_parser(
        "export", formatter_class=FORMATTER,
        help="write coefficient tables (CSV, JSON, NPZ) and an HTML report of a scenario",
        description=paragraph(
            "Write the layer's coefficient tables (depth, sigma, kappa, alpha, b, c at the node and "
            "half-node depths of every CPML side) as CSV, JSON and NPZ, the scenario as measured "
            "(profiles inline) and a standalone HTML report of its measurement."),
        epilog="example:\n  quietlayer export my_cell.toml --out handover\n\n"
               "Files are named after the scenario: NAME.coefficients.csv, .json, .npz,\n"
               "NAME.scenario.toml and NAME.report.html; the folder is created if needed.\n\n"
               "exit codes: 0 done, 1 the measurement diverged (tables written, no report),\n"
               "2 a bad file or option, 130 interrupted")
    export.add_argument("scenario", metavar="SCENARIO.toml", help=SCENARIO_HELP)
    export.add_argument("--out", required=True, metavar="DIR", help="folder to write into")
    export.add_argument("--no-late", action="store_true", help="leave the late-time check out of the report")
    return export


def run(args) -> int:
    from quietlayer.engine.errors import DivergenceError
    from quietlayer.engine.export import coefficients_csv, coefficients_json, coefficients_npz, write_text_atomic
    from quietlayer.engine.measure import ALL_PARTS, LATE_STEPS, measure

    s = load(args.scenario, late_steps=0 if args.no_late else LATE_STEPS)
    folder = Path(args.out).expanduser()
    if folder.exists() and not folder.is_dir():
        raise BadInput(f"--out {args.out}: is a file; give a folder")
    try:
        folder.mkdir(parents=True, exist_ok=True)
    except OSError as exc:
        raise BadInput(f"--out {args.out}: cannot create the folder ({exc.strerror or exc})") from None
    stem = Path(args.scenario).stem
    written = []

    def text_file(suffix: str, text: str) -> None:
        path = folder / f"{stem}.{suffix}"
        write_text_atomic(path, text)  # a Ctrl-C meanwhile removes the temporary file
        written.append(path)

    try:
        text_file("coefficients.csv", coefficients_csv(s))
        text_file("coefficients.json", coefficients_json(s))
        written.append(coefficients_npz(s, folder / f"{stem}.coefficients.npz"))
        text_file("scenario.toml", f"# The scenario of {args.scenario} as exported (profiles inline).\n" + s.to_toml())
    except OSError as exc:
        raise BadInput(f"--out {args.out}: cannot write ({exc.strerror or exc})") from None
    console.note("quietlayer: measuring for the report...")
    status = EXIT_OK
    try:
        m = measure(s, parts=ALL_PARTS - ({"late_time"} if args.no_late else set()))
    except DivergenceError as exc:
        console.note(f"quietlayer: no report: the test run {exc}")
        status = EXIT_FAILED
    else:
        from quietlayer.app.report import report_html
        text_file("report.html", report_html(m, m.late))
        console.note(f"quietlayer: worst peak error {db(m.worst_peak_db)} ({m.worst_probe}), "
                     f"global error {db(m.global_db)}")
    print(f"wrote {len(written)} files to {folder}:")
    for path in written:
        print(f"  {path.name:<40}{path.stat().st_size:>12,} bytes")
    print(CAUTION)
    return status

