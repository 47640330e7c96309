"""Which implementation of the update loops a run uses.

Normally the compiled kernels (kernels.py): numba compiles them on first use
and keeps them in its on-disk cache.  On a machine where that cache is still
empty the compilation takes tens of seconds, which a page must not make its
first visitor wait for.  A server therefore calls `compile_in_background()`:
a separate process compiles the kernels into the shared cache (reporting its
stages), runs meanwhile use the NumPy twin of the kernels (kernels_numpy.py:
bitwise the same results, several times slower), and once the compiled code
is loaded into this process every later run uses it.
"""

from __future__ import annotations

import subprocess
import sys
import threading
import time
from dataclasses import dataclass

from . import kernels, kernels_numpy


@dataclass(frozen=True)
class CompileStatus:
    """Where the background compilation stands (for a progress message)."""

    stage: int  # stages done
    stages: int
    what: str  # what is being compiled now
    elapsed_s: float
    expected_s: float  # typical total on a two-core machine
    failed: str = ""  # why the compilation failed (runs then compile in this process)


_ready = threading.Event()
_ready.set()  # until a server asks otherwise, runs compile what they need on first use
_status: CompileStatus | None = None
_started = 0.0
_lock = threading.Lock()
_loader = threading.local()  # set in the thread that loads the compiled kernels


def loops():
    """The module whose functions step the fields: compiled kernels or their NumPy twin."""
    return kernels if _ready.is_set() or getattr(_loader, "active", False) else kernels_numpy


def compiled() -> bool:
    return _ready.is_set()


def compile_status() -> CompileStatus | None:
    """None once the compiled kernels are in use."""
    with _lock:
        if _ready.is_set() or _status is None:
            return None
        return CompileStatus(**{**_status.__dict__, "elapsed_s": time.monotonic() - _started})


def _set_status(**changes) -> None:
    global _status
    with _lock:
        if _status is not None:
            _status = CompileStatus(**{**_status.__dict__, **changes})


def cache_is_warm() -> bool:
    """Whether numba's cache holds current compiled code for the main kernels (then
    loading them takes about a second and no NumPy phase is needed)."""
    try:
        return all(len(f._cache._cache_file._load_index()) > 0  # numba's own stamp check of the index
                   for f in (kernels.advance, kernels.cone_rows, kernels.cone_finish))
    except Exception:  # another numba's cache layout: take the safe way
        return False


def compile_in_background(load) -> threading.Thread:
    """With a warm cache, just load the compiled kernels in a thread.  Otherwise
    use the NumPy loops until the kernels are compiled in a child process and
    `load()` (which runs the compiled kernels once in this process, loading them
    from the cache) has returned; then the compiled kernels.  If the child fails,
    `load()` compiles them here instead.  Returns the watching thread."""
    if cache_is_warm():  # load here at once: a page arriving meanwhile waits a moment for the same code
        thread = threading.Thread(target=load, name="ql-load", daemon=True)
        thread.start()
        return thread
    from .warm import EXPECTED_S, STAGES
    global _status, _started
    with _lock:
        _status = CompileStatus(stage=0, stages=len(STAGES), what=STAGES[0], elapsed_s=0.0, expected_s=EXPECTED_S)
        _started = time.monotonic()
        _ready.clear()

    def load_here() -> None:
        _loader.active = True
        try:
            load()  # from the cache the child filled, or compiled here if it failed
        finally:
            _loader.active = False
            _ready.set()

    def watch():
        failure = ""
        try:
            child = subprocess.Popen([sys.executable, "-m", "quietlayer.engine.warm"], stdout=subprocess.PIPE,
                                     stderr=subprocess.STDOUT, stdin=subprocess.DEVNULL, text=True)
            tail = []
            for line in child.stdout:
                tail = (tail + [line.rstrip()])[-20:]
                if line.startswith("stage "):
                    done = int(line.split()[1])
                    _set_status(stage=done, what=STAGES[min(done, len(STAGES) - 1)])
                elif line.startswith("ready float32") and not _ready.is_set():
                    load_here()  # the child goes on with float64 meanwhile
            if child.wait() != 0:
                failure = "the compiling process failed: " + " | ".join(tail[-3:])
        except OSError as exc:
            failure = f"the compiling process could not start: {exc}"
        if failure:
            _set_status(failed=failure)
        if not _ready.is_set():
            load_here()

    thread = threading.Thread(target=watch, name="ql-compile", daemon=True)
    thread.start()
    return thread
