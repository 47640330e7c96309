"""The `quietlayer` command: the dashboard, and checks, sweeps, tuning and
exports of a scenario file from the terminal.

    quietlayer serve
    quietlayer check my_cell.toml --budget -60
    quietlayer sweep my_cell.toml --vary order=2:5:4 --vary sigma_ratio=0.25:2:8 --out sweep.csv
    quietlayer tune my_cell.toml --thickness 8 --write tuned.toml
    quietlayer tune my_cell.toml --target -60
    quietlayer export my_cell.toml --out handover

Exit codes:
  0    done (check: the layer is within the budget)
  1    check: the worst peak error is above the budget, the run diverged or
       the late-time check found growing energy; tune --target: no thickness
       in the range meets the target; sweep: no point could be measured;
       export: the measurement diverged (the tables are still written)
  2    a bad scenario file or option: one line on stderr naming the key, its
       line in the file and the allowed values
  130  interrupted (Ctrl-C): sweep writes the points already measured, tune
       reports (and writes) the best setting found so far
  143  the same after SIGTERM (e.g. a batch queue's time limit)
"""

from __future__ import annotations

import argparse
import json
import math
import os
import signal
import sys
import threading
import time
import warnings
from contextlib import contextmanager
from importlib.metadata import PackageNotFoundError, version
from pathlib import Path

from quietlayer.app import CAUTION
from quietlayer.engine.errors import ScenarioError

DEFAULT_BUDGET_DB = -40.0  # worst peak error a check accepts unless told otherwise
DEFAULT_TUNE_RUNS = 40
DEFAULT_TARGET_RUNS = 30  # per thickness
CHECKPOINT_S = 10.0  # a long sweep rewrites its CSV this often, so a crash loses little
EXIT_OK, EXIT_FAILED, EXIT_BAD_INPUT, EXIT_INTERRUPTED, EXIT_TERMINATED = 0, 1, 2, 130, 143

EXIT_CODES = """exit codes:
  0    done (check: the layer is within the budget)
  1    check: worst peak error above the budget, a diverged run or growing late-time
       energy; tune --target: no thickness in range meets the target; sweep: no
       point could be measured; export: the measurement diverged
  2    a bad scenario file or option (one line on stderr names the key and its line)
  130  interrupted (Ctrl-C); sweep writes the points already measured, tune
       reports and writes the best setting found so far
  143  the same after SIGTERM (e.g. a batch queue's time limit)"""


class BadInput(Exception):
    """A bad option or file: one line on stderr, exit 2."""


def _version() -> str:
    try:
        return version("quietlayer")
    except PackageNotFoundError:  # a source tree that was never installed
        return "unknown"


# --- the terminal ---------------------------------------------------------------

class Console:
    """stderr for progress and notes: a redrawn bar on a terminal, plain lines
    otherwise (a log file or a pipe)."""

    def __init__(self, stream=None):
        self.stream = stream
        self.bar_shown = False

    @property
    def out(self):
        return self.stream or sys.stderr

    @property
    def tty(self) -> bool:
        try:
            return self.out.isatty()
        except (AttributeError, ValueError):
            return False

    def note(self, text: str) -> None:
        self.clear()
        print(text, file=self.out, flush=True)

    def bar(self, label: str, done: int, total: int | None, text: str, started: float) -> None:
        """A bar with the time left; without a total just the count (a terminal only)."""
        if not self.tty:
            print(f"{label} {done}/{total}: {text}", file=self.out, flush=True)
            return
        import shutil
        width = shutil.get_terminal_size((100, 20)).columns
        if total:
            filled = round(20 * done / total)
            elapsed = time.monotonic() - started
            left = elapsed / done * (total - done) if done else math.nan
            eta = f"  {_clock(left)} left" if done < total and math.isfinite(left) else ""
            line = f"{label} [{'#' * filled}{'-' * (20 - filled)}] {done}/{total}{eta}  {text}"
        else:
            line = f"{label}: run {done}, {_clock(time.monotonic() - started)}  {text}"
        self.out.write("\r" + line[: width - 1].ljust(width - 1))
        self.out.flush()
        self.bar_shown = True

    def status(self, text: str) -> None:
        """A passing remark on a terminal (cleared by the next output); nothing in a log."""
        if self.tty:
            self.clear()
            self.out.write(text)
            self.out.flush()
            self.bar_shown = True

    def clear(self) -> None:
        if self.bar_shown:
            import shutil
            self.out.write("\r" + " " * (shutil.get_terminal_size((100, 20)).columns - 1) + "\r")
            self.out.flush()
            self.bar_shown = False


console = Console()


def _clock(seconds: float) -> str:
    seconds = int(round(seconds))
    h, rest = divmod(seconds, 3600)
    return f"{h}:{rest // 60:02d}:{rest % 60:02d}" if h else f"{rest // 60}:{rest % 60:02d}"


@contextmanager
def _warnings_on_console():
    """Engine warnings as one 'quietlayer: warning: ...' line each, each text once
    (the same scenario is rebuilt in several places)."""
    shown = set()

    def show(message, category, filename, lineno, file=None, line=None):
        if str(message) not in shown:
            shown.add(str(message))
            console.note(f"quietlayer: warning: {message}")
    with warnings.catch_warnings():
        warnings.simplefilter("default")
        # scipy's note when a search restarts a hair outside its unit cube (it clips): not news to a user
        warnings.filterwarnings("ignore", message="Initial guess is not within the specified bounds")
        warnings.showwarning = show
        yield


class StopOnInterrupt:
    """Ctrl-C (SIGINT) or SIGTERM: finish the runs in progress, then stop with
    what is done.  A second signal runs `abandon` (say what is kept) and ends
    the process at once.

    The handler only sets a flag: an exception raised into the main thread
    while it waits on the pool could leave a future's lock held, and the
    pool's threads would then wait for it for ever.
    """

    def __init__(self, what: str = "runs", abandon=None):
        self.what = what
        self.abandon = abandon
        self.signum: int | None = None
        self._previous: dict = {}
        self._holding = 0
        self._stop_pending = False

    @property
    def requested(self) -> bool:
        return self.signum is not None

    @property
    def exit_code(self) -> int:
        return EXIT_TERMINATED if self.signum == signal.SIGTERM else EXIT_INTERRUPTED

    def __enter__(self):
        if threading.current_thread() is threading.main_thread():
            for signum in (signal.SIGINT, signal.SIGTERM):
                if signal.getsignal(signum) is not signal.SIG_IGN:  # nohup and friends keep theirs
                    self._previous[signum] = signal.signal(signum, self._handle)
        return self

    @contextmanager
    def holding(self):
        """A stop at once waits until this block (a file being written) is done."""
        self._holding += 1
        try:
            yield
        finally:
            self._holding -= 1
            if not self._holding and self._stop_pending:
                self._stop_at_once()

    def _stop_at_once(self):
        self._stop_pending = False
        console.clear()
        if self.abandon is not None:
            self.abandon()
        sys.stdout.flush()
        sys.stderr.flush()
        os._exit(self.exit_code)  # the pool's threads cannot be stopped; nothing of theirs is kept

    def _handle(self, signum, frame):
        if self.requested:
            if self._holding:
                self._stop_pending = True
            else:
                self._stop_at_once()
            return
        self.signum = signum
        again = "Ctrl-C again" if signum == signal.SIGINT else "signal again"
        console.note(f"quietlayer: stopping after the {self.what} in progress ({again} to stop at once)")

    def __exit__(self, *exc):
        for signum, previous in self._previous.items():
            signal.signal(signum, previous)
        return False


@contextmanager
def _children_ignore_sigint():
    """Ctrl-C ignored while Dask starts its worker processes: they keep the
    setting, so a Ctrl-C at the terminal (sent to every process of the group)
    stops this command the orderly way instead of killing them mid-task."""
    if threading.current_thread() is not threading.main_thread():
        yield
        return
    previous = signal.signal(signal.SIGINT, signal.SIG_IGN)
    try:
        yield
    finally:
        signal.signal(signal.SIGINT, previous)


class WatchedExecutor:
    """An executor that reports each finished point and stops handing out
    results once a stop is requested (the searches then end with the best
    setting so far)."""

    def __init__(self, inner, stop: StopOnInterrupt, on_result=None):
        self.inner = inner
        self.stop = stop
        self.on_result = on_result

    @property
    def description(self) -> str:
        return self.inner.description

    def results(self, base, points, cache=None):
        stream = self.inner.results(base, points, cache=cache)
        try:
            for index, row in stream:
                if self.on_result is not None:
                    self.on_result(base, row)
                yield index, row
                if self.stop.requested:
                    return
        finally:
            stream.close()

    def close(self) -> None:
        self.inner.close()


# --- formatting -----------------------------------------------------------------

def _db(value, width: int = 0) -> str:
    text = f"{value:.1f} dB" if isinstance(value, (int, float)) and math.isfinite(value) else "n/a"
    return text.rjust(width) if width else text


def _number(value) -> str:
    if isinstance(value, float):
        return f"{value:.4g}"
    return str(value)


def _point_text(point: dict) -> str:
    return ", ".join(f"{k}={_number(v)}" for k, v in point.items())


SCORE_LABELS = {"worst_peak_db": "worst peak error", "global_db": "global error", "worst_band_db": "band worst"}


def _row_text(row: dict, score: str = "worst_peak_db") -> str:
    if row["status"] != "ok":
        return f"{row['status']} ({_shorten(row['reason'], 70)})"
    return f"{SCORE_LABELS[score]} {_db(row.get(score))}"


def _shorten(text: str, width: int) -> str:
    text = " ".join(str(text).split())
    return text if len(text) <= width else text[: width - 3] + "..."


def _finite_or_none(value):
    """JSON has no NaN or infinity: those become null."""
    if isinstance(value, float):
        return value if math.isfinite(value) else None
    if isinstance(value, dict):
        return {str(k): _finite_or_none(v) for k, v in value.items()}
    if isinstance(value, (list, tuple)):
        return [_finite_or_none(v) for v in value]
    if hasattr(value, "item") and callable(value.item):  # numpy scalars
        return _finite_or_none(value.item())
    return value


def _layer_lines(s) -> list[str]:
    """One line per distinct side setting: 'left, right: CPML 10 cells, m = 3, ...'."""
    from quietlayer.engine.layer import resolved_sigma_max, side_cell
    from quietlayer.engine.scenario import SIDES

    groups: dict[str, list[str]] = {}
    for name in SIDES:
        side = getattr(s.boundary, name)
        if side.kind != "cpml":
            text = side.kind
        elif side.profile is not None:
            text = f"CPML {side.cells} cells, profile table ({len(side.profile.depth)} rows)"
        else:
            smax = resolved_sigma_max(side, side_cell(s, name), s.eps_r)
            ratio = f"{side.sigma_ratio:g} x sigma_opt = " if side.sigma_ratio is not None else ""
            text = (f"CPML {side.cells} cells, m = {side.order:g}, sigma_max = {ratio}{smax:.4g} S/m, "
                    f"kappa_max = {side.kappa_max:g}, alpha_max = {side.alpha_max:.4g} S/m "
                    f"(order {side.alpha_order:g})")
        groups.setdefault(text, []).append(name)
    return [f"{', '.join(names)}: {text}" for text, names in groups.items()]


def _problem_line(s) -> str:
    return (f"{s.nx} x {s.ny} interior cells, {s.steps} steps, dt = {s.dt * 1e12:.4g} ps, "
            f"{s.cells_per_wavelength:.1f} cells per wavelength at f_max, {s.polarization}, {s.precision}")


# --- parsing options ------------------------------------------------------------

class Parser(argparse.ArgumentParser):
    """argparse with one-line errors (and exit 2)."""

    def error(self, message):
        self.exit(EXIT_BAD_INPUT, f"{self.prog}: error: {message} (see {self.prog} --help)\n")


def _ranged(kind, lo, hi, what: str):
    def convert(text: str):
        try:
            value = kind(text)
        except ValueError:
            raise argparse.ArgumentTypeError(f"{text!r} is not allowed: {what}") from None
        if not (isinstance(value, int) or math.isfinite(value)) or not lo <= value <= hi:
            raise argparse.ArgumentTypeError(f"{text!r} is not allowed: {what}")
        return value
    return convert


_decibels = _ranged(float, -300.0, 0.0, "a number of dB from -300 to 0")
_workers = _ranged(int, 1, 256, "a whole number of workers from 1 to 256")


def _dask_address(text: str) -> str:
    if text.startswith("local:"):
        count = text[len("local:"):]
        if not (count.isdigit() and 1 <= int(count) <= 256):
            raise argparse.ArgumentTypeError(f"{text!r} is not allowed: 'local:N' with N worker processes "
                                             "from 1 to 256")
    elif ":" not in text:
        raise argparse.ArgumentTypeError(f"{text!r} is not allowed: 'local:N' or a scheduler address "
                                         "such as tcp://host:8786")
    return text


SCORE_CHOICES = ("worst_peak_db", "global_db", "worst_band_db")  # engine.sweep.SCORES, without importing the engine for --help


def _add_score_option(parser, purpose: str) -> None:
    parser.add_argument("--score", choices=SCORE_CHOICES, default="worst_peak_db",
                        help=f"{purpose} (default worst_peak_db)")


def _add_executor_options(parser) -> None:
    where = parser.add_mutually_exclusive_group()
    where.add_argument("--workers", type=_workers, metavar="N",
                       help="workers on this machine (default: one per core; threads for small sweeps, "
                            "processes from 64 points)")
    where.add_argument("--dask", metavar="ADDRESS", type=_dask_address,
                       help="run on Dask: 'local:N' starts N worker processes here, "
                            "'tcp://host:8786' uses a running scheduler")


def _paragraph(text: str) -> str:
    import textwrap
    return textwrap.fill(text, 88)


def build_parser() -> argparse.ArgumentParser:
    formatter = argparse.RawDescriptionHelpFormatter
    parser = Parser(
        prog="quietlayer",
        description="Choose and check the absorbing layer (CPML) at the edge of an FDTD grid.",
        epilog="examples:\n"
               "  quietlayer serve\n"
               "  quietlayer serve --port 8080 --no-show\n"
               "  quietlayer demo --scenario my_cell.toml\n"
               "  quietlayer check my_cell.toml --budget -60\n"
               "  quietlayer sweep my_cell.toml --vary order=2:5:4 --vary sigma_ratio=0.25:2:8 --out sweep.csv\n"
               "  quietlayer tune my_cell.toml --thickness 8 --write tuned.toml\n"
               "  quietlayer tune my_cell.toml --target -60\n"
               "  quietlayer export my_cell.toml --out handover\n\n"
               "Run 'quietlayer COMMAND --help' for each command's options.\n\n"
               f"{EXIT_CODES}\n\n{CAUTION}",
        formatter_class=formatter,
    )
    parser.add_argument("--version", action="version", version=f"quietlayer {_version()}")
    commands = parser.add_subparsers(dest="command", metavar="COMMAND")

    serve = commands.add_parser("serve", help="start the dashboard on the built-in demo scenario")
    serve.add_argument("--port", type=int, default=5006, help="port to listen on (default 5006; 0 picks a free one)")
    serve.add_argument("--address", default="127.0.0.1",
                       help="address to listen on (default 127.0.0.1: this machine only); give another on purpose "
                            "to let other machines in")
    serve.add_argument("--no-show", action="store_true", help="do not open a browser")
    serve.add_argument("--preset", default="demo", help="preset scenario to open (default demo)")

    demo = commands.add_parser("demo", help="measure the layer of the built-in demo scenario (or a file)")
    demo.add_argument("--scenario", metavar="FILE.toml", help="a scenario file instead of the demo")

    scenario_help = ("scenario file (TOML); a side may name a profile table of your own with "
                     "profile_file = \"name.csv\" (columns depth, sigma, kappa, alpha; relative to the file)")

    check = commands.add_parser(
        "check", formatter_class=formatter,
        help="measure a scenario's layer and fail if it reflects more than a budget",
        description=_paragraph(
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
    check.add_argument("scenario", metavar="SCENARIO.toml", help=scenario_help)
    check.add_argument("--budget", type=_decibels, default=DEFAULT_BUDGET_DB, metavar="DB",
                       help=f"largest worst peak error accepted, dB (default {DEFAULT_BUDGET_DB:g})")
    check.add_argument("--json", action="store_true", help="print the scores as one JSON object (null for no value)")
    check.add_argument("--no-late", action="store_true", help="skip the late-time stability check")
    check.add_argument("--late-steps", type=_ranged(int, 100, 2_000_000, "a whole number of steps from 100 to 2000000"),
                       default=20_000, metavar="N", help="length of the late-time check, steps (default 20000)")
    check.add_argument("--3d", dest="three_d", action="store_true",
                       help="confirm the layer on a small 3D box derived from the scenario (same cell, band, "
                            "host and layers; probes near a face centre, an edge and a corner); the late-time "
                            "check then runs 4000 steps unless --late-steps says otherwise")

    sweep = commands.add_parser(
        "sweep", formatter_class=formatter,
        help="measure every combination of some parameters and write a CSV table",
        description=_paragraph(
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
    sweep.add_argument("scenario", metavar="SCENARIO.toml", help=scenario_help)
    sweep.add_argument("--vary", action="append", required=True, metavar="NAME=START:STOP:COUNT",
                       help="a parameter and its values (repeat for more axes)")
    sweep.add_argument("--out", required=True, metavar="FILE.csv", help="where to write the table")
    _add_score_option(sweep, "score that picks the best point shown at the end")
    _add_executor_options(sweep)

    tune = commands.add_parser(
        "tune", formatter_class=formatter,
        help="search for the best layer of a thickness, or the thinnest that meets a target",
        description=_paragraph(
            "Search the grading order m, sigma_max (as a ratio to sigma_opt), kappa_max and alpha_max "
            "(one setting for every CPML side): a space-filling sample, then a bounded Nelder-Mead refinement from its best "
            "point. With --target, thicknesses grow from --min-cells until a tuned layer meets the target, "
            "then bisection finds the thinnest."),
        epilog="examples:\n"
               "  quietlayer tune my_cell.toml --thickness 8 --write tuned.toml\n"
               "  quietlayer tune my_cell.toml --target -60 --budget 20 --dask local:4\n\n"
               + _paragraph(f"--budget is the number of runs: {DEFAULT_TUNE_RUNS} by default with --thickness, "
                            f"{DEFAULT_TARGET_RUNS} per thickness with --target (at least 8). With --thickness "
                            "the scenario's own grading at that thickness is one of the runs, so the result is "
                            "never worse than it. Ctrl-C (or SIGTERM) lets the runs in progress finish and keeps "
                            "the best so far; a second Ctrl-C abandons.") + "\n\n"
               "exit codes: 0 done, 1 no thickness in range meets the target, 2 a bad file or option,\n"
               "130 interrupted, 143 terminated (the best so far is reported, and written with --write)")
    tune.add_argument("scenario", metavar="SCENARIO.toml", help=scenario_help)
    goal = tune.add_mutually_exclusive_group(required=True)
    goal.add_argument("--thickness", type=_ranged(int, 1, 500, "a whole number of cells from 1 to 500"),
                      metavar="CELLS", help="tune a layer of this many cells")
    goal.add_argument("--target", type=_ranged(float, -300.0, -1e-9, "a number of dB below 0, down to -300"),
                      metavar="DB", help="find the thinnest tuned layer whose worst peak error is at or below DB")
    tune.add_argument("--budget", type=_ranged(int, 8, 100_000, "a whole number of runs from 8 to 100000"),
                      metavar="RUNS", help="runs allowed (per thickness with --target)")
    tune.add_argument("--min-cells", type=_ranged(int, 1, 500, "a whole number of cells from 1 to 500"),
                      default=4, metavar="CELLS", help="thinnest layer tried with --target (default 4)")
    tune.add_argument("--max-cells", type=_ranged(int, 1, 500, "a whole number of cells from 1 to 500"),
                      default=40, metavar="CELLS", help="thickest layer tried with --target (default 40)")
    _add_score_option(tune, "score to minimise")
    tune.add_argument("--write", metavar="OUT.toml", help="write the scenario with the tuned layer to this file")
    _add_executor_options(tune)

    export = commands.add_parser(
        "export", formatter_class=formatter,
        help="write coefficient tables (CSV, JSON, NPZ) and an HTML report of a scenario",
        description=_paragraph(
            "Write the layer's coefficient tables (depth, sigma, kappa, alpha, b, c at the node and "
            "half-node depths of every CPML side) as CSV, JSON and NPZ, the scenario as measured "
            "(profiles inline) and a standalone HTML report of its measurement."),
        epilog="example:\n  quietlayer export my_cell.toml --out handover\n\n"
               "Files are named after the scenario: NAME.coefficients.csv, .json, .npz,\n"
               "NAME.scenario.toml and NAME.report.html; the folder is created if needed.\n\n"
               "exit codes: 0 done, 1 the measurement diverged (tables written, no report),\n"
               "2 a bad file or option, 130 interrupted")
    export.add_argument("scenario", metavar="SCENARIO.toml", help=scenario_help)
    export.add_argument("--out", required=True, metavar="DIR", help="folder to write into")
    export.add_argument("--no-late", action="store_true", help="leave the late-time check out of the report")
    return parser


# --- shared steps ---------------------------------------------------------------

def _load(path: str):
    from quietlayer.engine.scenario_file import load_scenario
    return load_scenario(path)


def _output_file(text: str, option: str, refuse=None) -> Path:
    """A file we may write: its folder exists and is writable, it is no folder."""
    path = Path(text).expanduser()
    if path.is_dir():
        raise BadInput(f"{option} {text}: is a folder; give a file name")
    folder = path.parent if str(path.parent) else Path(".")
    if not folder.is_dir():
        raise BadInput(f"{option} {text}: the folder {folder} does not exist")
    if not os.access(folder, os.W_OK):
        raise BadInput(f"{option} {text}: the folder {folder} is not writable")
    if refuse is not None and path.exists() and path.resolve() == Path(refuse).resolve():
        raise BadInput(f"{option} {text}: is the scenario itself; write to another file "
                       "(overwriting it would lose its comments)")
    return path


def _executor(args):
    from quietlayer.engine.sweep import make_executor
    if args.dask:
        import logging
        # Dask's routine notices (a cancelled task after Ctrl-C...) are not the user's business;
        # the variable reaches the worker processes too
        os.environ.setdefault("DASK_LOGGING__DISTRIBUTED", "error")
        logging.getLogger("distributed").setLevel(logging.ERROR)
        console.status(f"quietlayer: starting Dask ({args.dask})...")
        with _children_ignore_sigint():
            return make_executor(dask=args.dask)
    return make_executor(workers=args.workers)


# --- demo -----------------------------------------------------------------------

def _run_demo(path: str | None) -> int:
    from quietlayer.assets import preset_path
    from quietlayer.engine import Scenario
    from quietlayer.engine.measure import measure

    scenario = _load(path) if path else Scenario.from_toml(preset_path("demo").read_text("utf-8"))
    result = measure(scenario)
    s = result.scenario
    print(s.title or path)
    print(f"  {_problem_line(s)}")
    print(f"  {'probe':<16}{'peak error':>12}")
    for name, value in result.peak_db.items():
        print(f"  {name:<16}{_db(value, 12)}")
    print(f"  worst peak error {_db(result.worst_peak_db)} ({result.worst_probe}); "
          f"global error {_db(result.global_db)}")
    if result.late is not None:
        print(f"  late-time check ({result.late.steps} steps): {result.late.status}, {result.late.message}")
    source = "cached" if result.reference_cached else f"computed in {result.reference_s * 1e3:.0f} ms"
    print(f"  test run {result.test_s * 1e3:.0f} ms, reference {source}, all {result.elapsed_s:.2f} s")
    print(CAUTION)
    return EXIT_OK


# --- check ----------------------------------------------------------------------

def _run_check(args) -> int:
    from quietlayer.engine.errors import DivergenceError
    from quietlayer.engine.measure import measure

    if args.three_d:
        from .confirm3d import check_3d
        return check_3d(args.scenario, args)

    s = _load(args.scenario)
    if not s.probes:
        raise BadInput(f"{args.scenario}: probes: the scenario has none; check scores the layer at its probes "
                       "(add [[probes]] entries with name, x, y)")
    parts = {"probes", "global", "spectra"} | (set() if args.no_late else {"late_time"})
    t0 = time.perf_counter()
    try:
        m = measure(s, parts=parts, late_steps=args.late_steps)
    except DivergenceError as exc:
        return _report_diverged(args, s, str(exc))
    band = m.band_worst_db
    if not math.isfinite(m.worst_peak_db):
        raise BadInput(f"{args.scenario}: probes: none sees the pulse within the run (steps = {s.steps}); "
                       "move the probes or lengthen the run")
    reasons = []
    if m.worst_peak_db > args.budget:
        reasons.append(f"worst peak error {_db(m.worst_peak_db)} ({m.worst_probe}) is above the budget "
                       f"of {_db(args.budget)}")
    if m.late is not None and m.late.status != "stable":
        reasons.append(f"late-time check: {m.late.status}, {m.late.message}")
    passed = not reasons
    worst_band_probe = max(band, key=band.get) if band else ""
    if args.json:
        late = None if m.late is None else {
            "status": m.late.status, "steps": m.late.steps, "growth_db_per_1000": m.late.growth_db_per_1000,
            "final_db": m.late.final_db, "message": m.late.message}
        out = {
            "scenario": str(args.scenario), "title": s.title, "passed": passed, "budget_db": args.budget,
            "reasons": reasons, "worst_peak_db": m.worst_peak_db, "worst_probe": m.worst_probe,
            "global_db": m.global_db, "worst_band_db": band.get(worst_band_probe, math.nan),
            "worst_band_probe": worst_band_probe or None,
            "probes": {name: {"peak_db": value, "band_worst_db": band.get(name, math.nan),
                              "incidence_deg": m.probe_angles.get(name, math.nan)}
                       for name, value in m.peak_db.items()},
            "late_time": late, "diverged": None,
            "run": {"nx": s.nx, "ny": s.ny, "steps": s.steps, "dt_s": s.dt,
                    "cells_per_wavelength": s.cells_per_wavelength, "polarization": s.polarization,
                    "precision": s.precision},
            "elapsed_s": time.perf_counter() - t0, "caution": CAUTION,
        }
        print(json.dumps(_finite_or_none(out), indent=2, allow_nan=False))
        return EXIT_OK if passed else EXIT_FAILED
    print(f"{s.title or Path(args.scenario).stem} ({args.scenario})")
    print(f"  {_problem_line(s)}")
    for line in _layer_lines(s):
        print(f"  {line}")
    print()
    print(f"  {'probe':<18}{'peak error':>12}{'band worst':>13}{'incidence':>11}")
    for name, value in m.peak_db.items():
        angle = m.probe_angles.get(name)
        print(f"  {_shorten(name, 17):<18}{_db(value, 12)}{_db(band.get(name), 13)}"
              f"{'' if angle is None else f'{angle:.0f} deg':>11}")
    print()
    print(f"  {'worst peak error':<20}{_db(m.worst_peak_db, 9)}  ({m.worst_probe})")
    print(f"  {'global error':<20}{_db(m.global_db, 9)}  (interior, whole run)")
    print(f"  {'band worst':<20}{_db(band.get(worst_band_probe), 9)}"
          + (f"  ({worst_band_probe})" if worst_band_probe else ""))
    if m.late is not None:
        print(f"  {'late-time check':<20}{m.late.status:>9}  ({m.late.steps} steps: {m.late.message})")
    else:
        print(f"  {'late-time check':<20}{'skipped':>9}")
    print(f"  {'budget':<20}{_db(args.budget, 9)}  (worst peak error)")
    print()
    if passed:
        print(f"PASS: worst peak error {_db(m.worst_peak_db)} is within the budget of {_db(args.budget)}"
              + ("" if m.late is None else "; late-time energy stable"))
    else:
        print("FAIL: " + "; ".join(reasons))
    print(CAUTION)
    return EXIT_OK if passed else EXIT_FAILED


def _report_diverged(args, s, message: str) -> int:
    if args.json:
        print(json.dumps({"scenario": str(args.scenario), "title": s.title, "passed": False,
                          "budget_db": args.budget, "reasons": [message], "diverged": message,
                          "caution": CAUTION}, indent=2))
    else:
        print(f"{s.title or Path(args.scenario).stem} ({args.scenario})")
        print(f"FAIL: the test run {message}")
        print(CAUTION)
    return EXIT_FAILED


# --- sweep ----------------------------------------------------------------------

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


def _profile_sides(s) -> list[str]:
    from quietlayer.engine.scenario import SIDES
    return [n for n in SIDES if getattr(s.boundary, n).kind == "cpml" and getattr(s.boundary, n).profile is not None]


def _run_sweep(args) -> int:
    from quietlayer.engine.sweep import LAYER_PARAMETERS, SweepTable, apply_point, run_sweep

    s = _load(args.scenario)
    axes, points = _parse_axes(args.vary)
    out = _output_file(args.out, "--out", refuse=args.scenario)
    grading = set(LAYER_PARAMETERS) - {"cells"}
    varied = {a.name.split(".")[-1] for a in axes}
    if _profile_sides(s) and varied & grading:
        console.note(f"quietlayer: note: {', '.join(_profile_sides(s))} take their grading from a profile "
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
        executor = WatchedExecutor(_executor(args), stop)
        console.note(f"quietlayer: sweeping {len(points)} points of {args.scenario} on {executor.description}")

        best_db = [math.inf]  # kept as points come in: table.best() reads every row

        def on_point(done, total, index, row):
            value = row.get(args.score, math.nan) if row["status"] == "ok" else math.nan
            if math.isfinite(value) and value < best_db[0]:
                best_db[0] = value
            shown = f"{_point_text(row['point'])}: {_row_text(row, args.score)}"
            if console.tty and math.isfinite(best_db[0]):
                shown = f"best {_db(best_db[0])}  last {shown}"
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
        print(f"best {SCORE_LABELS[args.score]}: {_db(row[args.score])} at {_point_text(row['point'])} (row {index}; "
              f"worst peak {_db(row['worst_peak_db'])} at {row['worst_probe']}, global {_db(row['global_db'])}, "
              f"band worst {_db(row['worst_band_db'])})")
    if stop.requested:
        why = "terminated" if stop.signum == signal.SIGTERM else "interrupted"
        console.note(f"quietlayer: {why}: kept {table.done} of {len(points)} points in {out}")
        return stop.exit_code
    if best is None:
        console.note("quietlayer: no point could be measured (see the status and reason columns)")
        return EXIT_FAILED
    return EXIT_OK


# --- tune -----------------------------------------------------------------------

def _start_point(s) -> dict | None:
    """The scenario's own setting (its first CPML side), clipped into the search ranges."""
    from quietlayer.engine.layer import resolved_sigma_max, side_cell, sigma_opt
    from quietlayer.engine.scenario import SIDES
    from quietlayer.engine.search import default_bounds

    for name in SIDES:
        side = getattr(s.boundary, name)
        if side.kind == "cpml":
            cell = side_cell(s, name)
            values = {"order": side.order,
                      "sigma_ratio": resolved_sigma_max(side, cell, s.eps_r) / sigma_opt(side.order, cell, s.eps_r),
                      "kappa_max": side.kappa_max, "alpha_max": side.alpha_max}
            return {b.name: min(max(values[b.name], b.lo), b.hi) for b in default_bounds(s)}
    return None


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
             f"  {'worst peak error':<20}{_db(row.get('worst_peak_db'))} ({row.get('worst_probe', '')})",
             f"  {'global error':<20}{_db(row.get('global_db'))}",
             f"  {'band worst':<20}{_db(row.get('worst_band_db'))}"]
    peaks = row.get("peak_db", {})
    if peaks:
        lines.append("  peak error per probe: " + ", ".join(f"{k} {_db(v)}" for k, v in peaks.items()))
    return lines


def _write_tuned(path: Path, result, source: str, note: str) -> None:
    from quietlayer.engine.export import write_text_atomic
    from quietlayer.engine.search import current_cells

    s = result.scenario
    cells = current_cells(s)
    title = f"{s.title} (tuned, {cells} cells)" if s.title else f"Tuned {cells}-cell layer"
    s = s.with_changes(title=title)
    header = (f"# Scenario of {source} with its layer tuned by quietlayer tune: {cells} cells,\n"
              f"# {SCORE_LABELS[result.score]} {_db(result.value)} after {result.runs} runs{note}.\n")
    write_text_atomic(path, header + s.to_toml())


def _run_tune(args) -> int:
    from quietlayer.engine.search import current_cells, thinnest_layer, tune_layer

    s = _load(args.scenario)
    write = _output_file(args.write, "--write", refuse=args.scenario) if args.write else None
    profiles = _profile_sides(s)
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

        executor = WatchedExecutor(_executor(args), stop, on_result)
        try:
            if args.thickness is not None:
                budget = args.budget or DEFAULT_TUNE_RUNS
                console.note(f"quietlayer: tuning a {args.thickness}-cell layer of {args.scenario} with "
                             f"{budget} runs on {executor.description}")

                def on_run(runs, total, row):
                    console.bar("tune", runs, total, f"best {_db(state['best'])}  last "
                                f"{_point_text(row['point'])}: {_row_text(row, args.score)}", started)

                result = tune_layer(s, args.thickness, budget=budget, score=args.score, executor=executor,
                                    start=start, progress=on_run)
                console.clear()
                return _report_tune(args, s, result, write, stop, started)
            budget = args.budget or DEFAULT_TARGET_RUNS
            console.note(f"quietlayer: looking for the thinnest layer of {args.scenario} with "
                         f"{SCORE_LABELS[args.score]} <= "
                         f"{args.target:g} dB, {args.min_cells}..{args.max_cells} cells, {budget} runs per "
                         f"thickness, on {executor.description}")

            def on_thickness(cells, tuned):
                verdict = "meets" if tuned.value <= args.target else "misses"
                console.note(f"  {cells:>3} cells: {_db(tuned.value)} after {tuned.runs} runs ({verdict} the target)")
                return not stop.requested

            best_by_cells: dict[int, float] = {}

            def on_run_target(base, row):
                on_result(base, row)
                cells = current_cells(base)
                if row["status"] == "ok" and math.isfinite(row.get(args.score, math.nan)):
                    best_by_cells[cells] = min(best_by_cells.get(cells, math.inf), row[args.score])
                if console.tty:  # a log gets one line per thickness (on_thickness) instead
                    console.bar(f"tune, {cells} cells", state["runs"], None,
                                f"best {_db(best_by_cells.get(cells, math.nan))}  "
                                f"last {_row_text(row, args.score)}", started)

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
        print(f"  (the scenario's own grading at {result.cells} cells: {_row_text(own, args.score)})")
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
        print(f"  {cells:>5}  {_db(tuned.value, 10)}  {tuned.runs:>5}  {verdict}")
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


# --- export ---------------------------------------------------------------------

def _run_export(args) -> int:
    from quietlayer.engine.errors import DivergenceError
    from quietlayer.engine.export import coefficients_csv, coefficients_json, coefficients_npz, write_text_atomic
    from quietlayer.engine.measure import ALL_PARTS, measure

    s = _load(args.scenario)
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
        from .report import report_html
        text_file("report.html", report_html(m, m.late))
        console.note(f"quietlayer: worst peak error {_db(m.worst_peak_db)} ({m.worst_probe}), "
                     f"global error {_db(m.global_db)}")
    print(f"wrote {len(written)} files to {folder}:")
    for path in written:
        print(f"  {path.name:<40}{path.stat().st_size:>12,} bytes")
    print(CAUTION)
    return status


# --- entry ----------------------------------------------------------------------

def main(argv: list[str] | None = None) -> int:
    parser = build_parser()
    args = parser.parse_args(argv)
    handlers = {"demo": lambda a: _run_demo(a.scenario), "check": _run_check, "sweep": _run_sweep,
                "tune": _run_tune, "export": _run_export}
    if args.command == "serve":
        from .serve import serve
        return serve(port=args.port, address=args.address, show=not args.no_show, preset=args.preset)
    if args.command not in handlers:
        parser.print_help()
        return EXIT_OK
    try:
        with _warnings_on_console():
            return handlers[args.command](args)
    except (ScenarioError, BadInput) as exc:
        console.clear()
        print(f"quietlayer: {exc}", file=sys.stderr)
        return EXIT_BAD_INPUT
    except KeyboardInterrupt:
        console.clear()
        print("quietlayer: interrupted", file=sys.stderr)
        return EXIT_INTERRUPTED
    except BrokenPipeError:  # e.g. piped into `head`: nothing more to say
        sys.stderr.close()
        return EXIT_FAILED


if __name__ == "__main__":
    sys.exit(main())
