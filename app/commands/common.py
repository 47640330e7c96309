"""What the commands share: exit codes, the terminal (progress, notes,
warnings), Ctrl-C handling, the executors, reading a scenario file and
formatting scores."""

from __future__ import annotations

import math
import os
import signal
import sys
import threading
import time
import warnings
from contextlib import contextmanager
from pathlib import Path

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
            eta = f"  {clock(left)} left" if done < total and math.isfinite(left) else ""
            line = f"{label} [{'#' * filled}{'-' * (20 - filled)}] {done}/{total}{eta}  {text}"
        else:
            line = f"{label}: run {done}, {clock(time.monotonic() - started)}  {text}"
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


def clock(seconds: float) -> str:
    seconds = int(round(seconds))
    h, rest = divmod(seconds, 3600)
    return f"{h}:{rest // 60:02d}:{rest % 60:02d}" if h else f"{rest // 60}:{rest % 60:02d}"


@contextmanager
def warnings_on_console():
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
def children_ignore_sigint():
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

def db(value, width: int = 0) -> str:
    text = f"{value:.1f} dB" if isinstance(value, (int, float)) and math.isfinite(value) else "n/a"
    return text.rjust(width) if width else text


def number_text(value) -> str:
    if isinstance(value, float):
        return f"{value:.4g}"
    return str(value)


def point_text(point: dict) -> str:
    return ", ".join(f"{k}={number_text(v)}" for k, v in point.items())


SCORE_LABELS = {"worst_peak_db": "worst peak error", "global_db": "global error", "worst_band_db": "band worst"}


def row_text(row: dict, score: str = "worst_peak_db") -> str:
    if row["status"] != "ok":
        return f"{row['status']} ({shorten(row['reason'], 70)})"
    return f"{SCORE_LABELS[score]} {db(row.get(score))}"


def shorten(text: str, width: int) -> str:
    text = " ".join(str(text).split())
    return text if len(text) <= width else text[: width - 3] + "..."


def finite_or_none(value):
    """JSON has no NaN or infinity: those become null."""
    if isinstance(value, float):
        return value if math.isfinite(value) else None
    if isinstance(value, dict):
        return {str(k): finite_or_none(v) for k, v in value.items()}
    if isinstance(value, (list, tuple)):
        return [finite_or_none(v) for v in value]
    if hasattr(value, "item") and callable(value.item):  # numpy scalars
        return finite_or_none(value.item())
    return value


def score_lines(worst_db, worst_probe, global_db, band_db, band_probe, late, budget) -> list[str]:
    """The summary block of `check` and `check --3d`: worst peak, global, band worst,
    late-time check and budget, one line each."""
    return [f"  {'worst peak error':<20}{db(worst_db, 9)}  ({worst_probe})",
            f"  {'global error':<20}{db(global_db, 9)}  (interior, whole run)",
            f"  {'band worst':<20}{db(band_db, 9)}" + (f"  ({band_probe})" if band_probe else ""),
            (f"  {'late-time check':<20}{late.status:>9}  ({late.steps} steps: {late.message})" if late is not None
             else f"  {'late-time check':<20}{'skipped':>9}"),
            f"  {'budget':<20}{db(budget, 9)}  (worst peak error)"]


def late_time_json(late) -> dict | None:
    """A late-time check as plain data for --json (None when it was not run)."""
    return None if late is None else {
        "status": late.status, "steps": late.steps, "growth_db_per_1000": late.growth_db_per_1000,
        "final_db": late.final_db, "message": late.message}


def layer_lines(s) -> list[str]:
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


def problem_line(s) -> str:
    return (f"{s.nx} x {s.ny} interior cells, {s.steps} steps, dt = {s.dt * 1e12:.4g} ps, "
            f"{s.cells_per_wavelength:.1f} cells per wavelength at f_max, {s.polarization}, {s.precision}")


# --- shared steps ---------------------------------------------------------------

def load(path: str, late_steps: int = 0):
    """The scenario in a file, refused when its measurement (with a late-time
    check of `late_steps`) is beyond the command's work budget; a run far
    longer than usual is announced before it starts."""
    from quietlayer.engine.budget import COMMAND_BUDGET, estimate_work, work_note
    from quietlayer.engine.scenario_file import load_scenario
    s = load_scenario(path, budget=COMMAND_BUDGET, late_steps=late_steps)
    note = work_note(estimate_work(s, late_steps))
    if note:
        console.note(f"quietlayer: note: {note}")
    return s


def output_file(text: str, option: str, refuse=None) -> Path:
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


def executor_for(args):
    from quietlayer.engine.sweep import make_executor
    if args.dask:
        import logging
        # Dask's routine notices (a cancelled task after Ctrl-C...) are not the user's business;
        # the variable reaches the worker processes too
        os.environ.setdefault("DASK_LOGGING__DISTRIBUTED", "error")
        logging.getLogger("distributed").setLevel(logging.ERROR)
        console.status(f"quietlayer: starting Dask ({args.dask})...")
        with children_ignore_sigint():
            return make_executor(dask=args.dask)
    return make_executor(workers=args.workers)



def profile_sides(s) -> list[str]:
    from quietlayer.engine.scenario import SIDES
    return [n for n in SIDES if getattr(s.boundary, n).kind == "cpml" and getattr(s.boundary, n).profile is not None]

