"""Sweeps: measure many settings of one scenario and tabulate the scores.

    axes = [parse_vary("order=2:5:4"), parse_vary("sigma_ratio=0.25:2:8")]
    table = run_sweep(base, grid_points(axes))            # every core
    table.best("worst_peak_db")

A point is a dict {parameter name: value}; `apply_point` puts it on the base
scenario.  Layer parameters (order, sigma_ratio, ...) apply to every CPML
side, or to one side as 'right.order'.  Each point is measured with the
shared reference cache, so a sweep over layer settings runs one reference
in all.  A point that is invalid or diverges is recorded with its reason and
the sweep goes on.
"""

from __future__ import annotations

import csv
import io
import itertools
import math
import multiprocessing
import os
import signal
import threading
import time
from concurrent.futures import FIRST_COMPLETED, ProcessPoolExecutor, ThreadPoolExecutor, wait
from concurrent.futures.process import BrokenProcessPool
from dataclasses import dataclass, field, replace
from pathlib import Path
from typing import Callable, Iterable, Iterator

import numpy as np

from .budget import COMMAND_BUDGET, WorkBudget, check_work
from .errors import DivergenceError, ScenarioError
from .export import write_text_atomic
from .measure import measure
from .reference import ReferenceCache
from .scenario import SIDES, Scenario
from .units import parse_frequency, parse_length

LAYER_PARAMETERS = {
    "cells": "layer thickness, cells",
    "order": "grading order m of sigma and kappa",
    "sigma_ratio": "sigma_max as a multiple of sigma_opt",
    "sigma_max": "sigma_max, S/m",
    "kappa_max": "largest coordinate stretch, >= 1",
    "alpha_max": "CFS frequency shift at the inner face, S/m",
    "alpha_order": "grading order of alpha",
}
PROBLEM_PARAMETERS = {
    "cell": "cell size dx = dy, m (text such as '0.5 mm' allowed)",
    "dx": "cell size along x, m",
    "dy": "cell size along y, m",
    "courant": "time step as a fraction of the 2D limit",
    "eps_r": "relative permittivity of the host medium",
    "sigma": "conductivity of the host medium, S/m",
    "f_min": "lowest frequency of the band, Hz (text such as '1 GHz' allowed)",
    "f_max": "highest frequency of the band, Hz",
    "steps": "run length, steps",
}
INTEGER_PARAMETERS = {"cells", "steps"}
_PARSERS = {"cell": parse_length, "dx": parse_length, "dy": parse_length,
            "f_min": parse_frequency, "f_max": parse_frequency}
SWEEP_PARTS = frozenset({"probes", "global", "band"})
SCORES = ("worst_peak_db", "global_db", "worst_band_db")


def _split_name(name: str) -> tuple[str | None, str]:
    if "." in name:
        side, key = name.split(".", 1)
        if side in SIDES and key in LAYER_PARAMETERS:
            return side, key
    elif name in LAYER_PARAMETERS or name in PROBLEM_PARAMETERS:
        return None, name
    raise ScenarioError("vary", name, "a parameter name: " + ", ".join(list(LAYER_PARAMETERS) + list(PROBLEM_PARAMETERS))
                        + ", or SIDE.NAME for one side (e.g. right.order)")


def _value(name: str, raw):
    """One value of parameter `name` from a number or a text."""
    key = _split_name(name)[1]
    if isinstance(raw, str):
        parser = _PARSERS.get(key)
        if parser is not None:
            raw = parser(name, raw)
        else:
            try:
                raw = float(raw)
            except ValueError:
                raise ScenarioError(name, raw, "a number") from None
    if isinstance(raw, bool) or not isinstance(raw, (int, float, np.integer, np.floating)):
        raise ScenarioError(name, raw, "a number")
    if key in INTEGER_PARAMETERS:
        if not float(raw).is_integer():
            raise ScenarioError(name, raw, "a whole number")
        return int(raw)
    return float(raw)


@dataclass(frozen=True)
class Axis:
    """One varied parameter and its values."""

    name: str
    values: tuple

    def __post_init__(self):
        _split_name(self.name)
        if not self.values:
            raise ScenarioError(f"vary {self.name}", self.values, "at least one value")


def parse_vary(text: str) -> Axis:
    """'NAME=START:STOP:COUNT' (evenly spaced, ends included; add ':log' for
    geometric spacing) or 'NAME=V1,V2,...'.  Whole-number parameters (cells,
    steps) need whole values: a range is rounded and repeats dropped."""
    form = "NAME=START:STOP:COUNT[:log] or NAME=V1,V2,..."
    if "=" not in text:
        raise ScenarioError("vary", text, form)
    name, spec = (part.strip() for part in text.split("=", 1))
    _split_name(name)
    if ":" in spec:
        parts = [p.strip() for p in spec.split(":")]
        log = len(parts) == 4 and parts[3] == "log"
        if len(parts) not in (3, 4) or (len(parts) == 4 and not log):
            raise ScenarioError(f"vary {name}", spec, form)
        lo, hi = (float(_value(name, p)) for p in parts[:2])
        try:
            count = int(parts[2])
        except ValueError:
            count = 0
        if not 1 <= count <= 10_000:
            raise ScenarioError(f"vary {name} COUNT", parts[2], "a whole number from 1 to 10000")
        if log and (lo <= 0 or hi <= 0):
            raise ScenarioError(f"vary {name}", spec, "START and STOP > 0 for ':log' spacing")
        values = np.geomspace(lo, hi, count) if log else np.linspace(lo, hi, count)
        if _split_name(name)[1] in INTEGER_PARAMETERS:
            values = list(dict.fromkeys(int(round(v)) for v in values))
        return Axis(name, tuple(float(v) if isinstance(v, np.floating) else v for v in values))
    values = tuple(_value(name, p.strip()) for p in spec.split(",") if p.strip())
    return Axis(name, values)


def grid_points(axes: Iterable[Axis]) -> list[dict]:
    """Every combination of the axes' values (the first axis varies slowest)."""
    axes = list(axes)
    names = [a.name for a in axes]
    if len(set(names)) != len(names):
        raise ScenarioError("vary", ", ".join(names), "each parameter varied once")
    return [dict(zip(names, combo)) for combo in itertools.product(*(a.values for a in axes))]


def apply_point(base: Scenario, point: dict) -> Scenario:
    """`base` with the point's values; raises ScenarioError for an invalid one."""
    s = base
    for name, raw in point.items():
        side_name, key = _split_name(name)
        value = _value(name, raw)
        if key in LAYER_PARAMETERS:
            names = [side_name] if side_name else list(SIDES)
            sides = {}
            for n in names:
                side = getattr(s.boundary, n)
                if side.kind != "cpml":
                    if side_name:
                        raise ScenarioError(f"layer.{n}.kind", side.kind, "'cpml' to vary " + name)
                    continue
                changes = {key: value}
                if key == "sigma_max":
                    changes["sigma_ratio"] = None
                elif key == "sigma_ratio":
                    changes["sigma_max"] = None
                sides[n] = replace(side, **changes)
            if not sides:
                raise ScenarioError(name, value, "a scenario with at least one CPML side")
            s = s.with_changes(boundary=replace(s.boundary, **sides))
        elif key == "cell":
            s = s.with_changes(dx=value, dy=value)
        elif key in ("f_min", "f_max"):
            s = s.with_changes(source=replace(s.source, **{key: value}))
        else:
            s = s.with_changes(**{key: value})
    return s


# --- one point ----------------------------------------------------------------

def evaluate_point(base: Scenario, point: dict, *, threads: int | None = None,
                   cache: ReferenceCache | None = None, budget: WorkBudget = COMMAND_BUDGET) -> dict:
    """Measure one point; never raises for a bad point: the row says why (a
    point whose run is beyond `budget` is 'invalid' and never started)."""
    t0 = time.perf_counter()
    row = {"point": dict(point), "status": "ok", "reason": ""}
    try:
        s = apply_point(base, point)
        check_work(s, budget)
        m = measure(s, parts=SWEEP_PARTS, cache=cache, threads=threads)
    except ScenarioError as exc:
        row.update(status="invalid", reason=str(exc))
    except DivergenceError as exc:
        row.update(status="diverged", reason=str(exc))
    except Exception as exc:  # noqa: BLE001 - one bad point must not end a sweep
        row.update(status="failed", reason=f"{type(exc).__name__}: {exc}")
    else:
        band = m.band_worst_db.values()
        row.update(worst_peak_db=m.worst_peak_db, worst_probe=m.worst_probe, global_db=m.global_db,
                   worst_band_db=max(band) if band else math.nan,
                   peak_db=dict(m.peak_db))
    row["run_s"] = time.perf_counter() - t0
    return row


# --- executors ------------------------------------------------------------------

PROCESS_MIN_POINTS = 64  # below this the worker processes' start-up (~1.5 s) costs more than the GIL does
_PROCESS_POOLS: dict[int, ProcessPoolExecutor] = {}
_PROCESS_POOLS_LOCK = threading.Lock()


PARENT_CHECK_S = 0.5


def _worker_start(parent_pid: int) -> None:
    """Worker processes leave Ctrl-C to the program that started them, and end
    when it does: a program killed outright never tells its pool to stop."""
    signal.signal(signal.SIGINT, signal.SIG_IGN)
    threading.Thread(target=_exit_with, args=(parent_pid,), daemon=True, name="quietlayer-parent-watch").start()


def _exit_with(parent_pid: int) -> None:
    while process_running(parent_pid):
        time.sleep(PARENT_CHECK_S)
    os._exit(0)


def process_running(pid: int) -> bool:
    """Whether process `pid` runs (a zombie, ended but not yet reaped, does not)."""
    try:
        with open(f"/proc/{pid}/stat", encoding="ascii", errors="replace") as fh:
            return fh.read().rsplit(") ", 1)[1][:1] != "Z"
    except FileNotFoundError:
        return False
    except OSError:  # no /proc here: ask the kernel
        try:
            os.kill(pid, 0)
        except ProcessLookupError:
            return False
        except PermissionError:
            return False  # the number now belongs to someone else's process
        return True


def _shared_processes(workers: int) -> ProcessPoolExecutor:
    """One pool of worker processes per size, started on first use and kept for
    the program's life, so later sweeps find the kernels already loaded."""
    with _PROCESS_POOLS_LOCK:
        pool = _PROCESS_POOLS.get(workers)
        if pool is None:
            # forkserver: workers start from a clean process, safe in a program that runs threads
            context = multiprocessing.get_context("forkserver")
            context.set_forkserver_preload(["quietlayer.engine.sweep"])
            pool = ProcessPoolExecutor(max_workers=workers, mp_context=context, initializer=_worker_start,
                                       initargs=(os.getpid(),))
            _PROCESS_POOLS[workers] = pool
        return pool


def _drop_processes(workers: int) -> None:
    with _PROCESS_POOLS_LOCK:
        pool = _PROCESS_POOLS.pop(workers, None)
    if pool is not None:
        pool.shutdown(wait=False, cancel_futures=True)


class LocalPool:
    """Every core of this machine, one point per worker at a time.

    mode 'threads': the kernels release the GIL, start at once and share the
    reference cache, but the Python around each run (a few ms per point)
    takes turns; 'processes': no such turns, after a start-up of about 1.5 s
    (paid once per program: the worker processes are kept); 'auto' picks
    processes for sweeps of PROCESS_MIN_POINTS points or more.  Rows are the
    same bits either way.  If a worker process dies, the points not yet done
    are run in threads.
    """

    MODES = ("auto", "threads", "processes")

    def __init__(self, workers: int | None = None, mode: str = "auto"):
        self.workers = max(1, workers or os.cpu_count() or 1)
        if mode not in self.MODES:
            raise ScenarioError("mode", mode, "one of " + ", ".join(self.MODES))
        self.mode = mode
        self.last_mode = ""

    def mode_for(self, n_points: int) -> str:
        if self.workers == 1 or self.mode == "threads":
            return "threads"
        if self.mode == "processes" or n_points >= PROCESS_MIN_POINTS:
            return "processes"
        return "threads"

    @property
    def description(self) -> str:
        """'local pool, 2 workers', and once it has run, of which kind."""
        kind = {"threads": " thread", "processes": " process"}.get(self.last_mode, "")
        plural = "" if self.workers == 1 else ("es" if kind == " process" else "s")
        return f"local pool, {self.workers} worker{kind}{plural}"

    def results(self, base: Scenario, points: list[dict], cache=None) -> Iterator[tuple[int, dict]]:
        """(index, row) as points finish; closing the iterator cancels the rest."""
        self.last_mode = self.mode_for(len(points))
        todo = dict(enumerate(points))
        if self.last_mode == "processes":
            try:
                for index, row in self._in_processes(base, todo):
                    todo.pop(index)
                    yield index, row
                return
            except BrokenProcessPool:
                _drop_processes(self.workers)
                self.last_mode = "threads"
        yield from self._in_threads(base, todo, cache)

    def _in_processes(self, base, todo: dict) -> Iterator[tuple[int, dict]]:
        pool = _shared_processes(self.workers)
        futures = {pool.submit(evaluate_point, base, p, threads=1): i for i, p in todo.items()}
        try:
            yield from _as_they_finish(futures)
        finally:
            for fut in futures:
                fut.cancel()  # the ones already running finish in their workers, unread

    def _in_threads(self, base, todo: dict, cache) -> Iterator[tuple[int, dict]]:
        threads = 1 if self.workers > 1 else None
        pool = ThreadPoolExecutor(max_workers=self.workers, thread_name_prefix="quietlayer-sweep")
        try:
            futures = {pool.submit(evaluate_point, base, p, threads=threads, cache=cache): i
                       for i, p in todo.items()}
            yield from _as_they_finish(futures)
        finally:
            pool.shutdown(wait=True, cancel_futures=True)

    def close(self) -> None:
        pass  # worker processes are shared and kept; threads end with each sweep


def _as_they_finish(futures: dict) -> Iterator[tuple[int, dict]]:
    pending = set(futures)
    while pending:
        done, pending = wait(pending, return_when=FIRST_COMPLETED)
        for fut in done:
            yield futures[fut], fut.result()


class DaskPool:
    """Dask distributed: an existing scheduler ('tcp://host:8786') or
    'local:N', a LocalCluster of N single-threaded worker processes on
    127.0.0.1.  A worker lost mid-sweep costs no point: the scheduler runs
    its tasks again elsewhere, and each point is kept once."""

    def __init__(self, address: str, timeout: float = 30.0):
        try:
            from distributed import Client, LocalCluster
        except ImportError:  # pragma: no cover - it is a dependency
            raise ScenarioError("dask", address, "an installed 'distributed' package") from None
        self.address = address
        self.cluster = None
        if address.startswith("local:"):
            try:
                n = int(address.split(":", 1)[1])
            except ValueError:
                n = 0
            if not 1 <= n <= 256:
                raise ScenarioError("dask", address, "'local:N' with N workers from 1 to 256, or a scheduler address")
            self.cluster = LocalCluster(n_workers=n, threads_per_worker=1, processes=True,
                                        host="127.0.0.1", dashboard_address="127.0.0.1:0")
            self.client = Client(self.cluster)
        else:
            try:
                self.client = Client(address, timeout=timeout)
            except (OSError, TimeoutError, ValueError) as exc:
                raise ScenarioError("dask", address, f"a reachable Dask scheduler ({exc})") from None

    @property
    def description(self) -> str:
        workers = len(self.client.scheduler_info().get("workers", {}))
        where = "local cluster" if self.cluster else f"scheduler {self.address}"
        return f"Dask {where}, {workers} workers"

    def results(self, base: Scenario, points: list[dict], cache=None) -> Iterator[tuple[int, dict]]:
        from distributed import as_completed
        run_id = os.urandom(6).hex()
        futures = [self.client.submit(evaluate_point, base, p, key=f"quietlayer-point-{run_id}-{i}", pure=False)
                   for i, p in enumerate(points)]
        index = {f.key: i for i, f in enumerate(futures)}
        try:
            for fut in as_completed(futures):
                yield index[fut.key], fut.result()
        finally:
            self.client.cancel(futures)

    def close(self) -> None:
        self.client.close()
        if self.cluster is not None:
            self.cluster.close()


def make_executor(dask: str | None = None, workers: int | None = None):
    """The local pool, or Dask when an address (or 'local:N') is given."""
    return DaskPool(dask) if dask else LocalPool(workers)


# --- the table ------------------------------------------------------------------

@dataclass
class SweepTable:
    """One row per point, in the order of the points."""

    parameters: list
    points: list
    rows: dict = field(default_factory=dict)  # index -> row
    complete: bool = False
    elapsed_s: float = 0.0
    executor: str = ""

    @property
    def done(self) -> int:
        return len(self.rows)

    def ordered(self) -> list[dict]:
        return [self.rows[i] for i in sorted(self.rows)]

    def best(self, score: str = "worst_peak_db") -> tuple[int, dict] | None:
        """(index, row) of the lowest score among the points measured 'ok'."""
        if score not in SCORES:
            raise ScenarioError("score", score, "one of " + ", ".join(SCORES))
        ok = [(i, r) for i, r in self.rows.items() if r["status"] == "ok" and math.isfinite(r[score])]
        return min(ok, key=lambda item: item[1][score]) if ok else None

    def probe_names(self) -> list[str]:
        names = {}
        for r in self.ordered():
            names.update(dict.fromkeys(r.get("peak_db", {})))
        return list(names)

    def columns(self) -> list[str]:
        return (["index"] + self.parameters + ["status"] + list(SCORES) + ["worst_probe"]
                + [f"peak_db[{n}]" for n in self.probe_names()] + ["run_s", "reason"])

    def records(self) -> list[dict]:
        """Flat rows with every column (blank where a point has no score)."""
        out = []
        probes = self.probe_names()
        for i in sorted(self.rows):
            r = self.rows[i]
            rec = {"index": i, **{p: r["point"].get(p, "") for p in self.parameters}, "status": r["status"]}
            for key in SCORES + ("worst_probe",):
                rec[key] = r.get(key, "")
            for n in probes:
                rec[f"peak_db[{n}]"] = r.get("peak_db", {}).get(n, "")
            rec["run_s"] = r["run_s"]
            rec["reason"] = r["reason"]
            out.append(rec)
        return out

    def to_csv(self) -> str:
        buf = io.StringIO()
        writer = csv.DictWriter(buf, fieldnames=self.columns(), lineterminator="\n")
        writer.writeheader()
        for rec in self.records():
            writer.writerow({k: (repr(v) if isinstance(v, float) else v) for k, v in rec.items()})
        return buf.getvalue()

    def write_csv(self, path) -> Path:
        """Written to a temporary name, then renamed: never half a file."""
        return write_text_atomic(path, self.to_csv())


def run_sweep(base: Scenario, points: list[dict], executor=None, *,
              progress: Callable[[int, int, int, dict], bool | None] | None = None,
              cache: ReferenceCache | None = None, table: SweepTable | None = None) -> SweepTable:
    """Measure every point; the table holds each point once, in point order.

    progress(done, total, index, row) after each point; return False to stop
    (the points already measured stay in the table, complete stays False).
    Pass your own `table` to keep the finished rows if the caller is
    interrupted (Ctrl-C) mid-sweep.
    """
    points = [dict(p) for p in points]
    names = list(dict.fromkeys(name for p in points for name in p))
    table = table if table is not None else SweepTable(parameters=names, points=points)
    table.parameters, table.points = names, points
    own = executor is None
    executor = executor or LocalPool()
    t0 = time.perf_counter()
    stream = executor.results(base, points, cache=cache)
    try:
        for index, row in stream:
            if index in table.rows:
                continue  # a retried task that finished twice
            table.rows[index] = row
            if progress is not None and progress(len(table.rows), len(points), index, row) is False:
                break
        table.complete = len(table.rows) == len(points)
    finally:
        stream.close()
        table.elapsed_s = time.perf_counter() - t0
        table.executor = executor.description
        if own:
            executor.close()
    return table
