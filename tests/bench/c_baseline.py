"""The C loop of c_loop.c, built with the system C compiler and run on an
engine grid through ctypes: the yardstick of bench_engine.py.

    build_c_loop() -> {"float32": lib, "float64": lib} or a reason string
    CStepper(grid, lib).run(steps, threads) -> (probe series, seconds)
"""

from __future__ import annotations

import ctypes
import os
import shutil
import subprocess
import tempfile
import time
from pathlib import Path

import numpy as np

from numpy_reference import _own_slab, grid_slabs, source_wave

SOURCE = Path(__file__).with_name("c_loop.c")
FLAGS = ("-O3", "-march=native", "-fopenmp", "-shared", "-fPIC")
C_TYPES = {"float32": ("float", ctypes.c_float), "float64": ("double", ctypes.c_double)}


def build_c_loop() -> dict | str:
    """Compile c_loop.c once per precision into a temporary folder; the loaded
    libraries, or why there are none (no compiler, or it failed)."""
    cc = os.environ.get("CC") or shutil.which("cc") or shutil.which("gcc")
    if cc is None:
        return "no C compiler (cc) on PATH"
    folder = Path(tempfile.mkdtemp(prefix="c_loop_"))
    libs = {}
    for precision, (real, _) in C_TYPES.items():
        target = folder / f"c_loop_{precision}.so"
        command = [cc, *FLAGS, f"-DREAL={real}", str(SOURCE), "-o", str(target)]
        done = subprocess.run(command, capture_output=True, text=True)
        if done.returncode != 0:
            return f"{' '.join(command)} failed: {done.stderr.strip()[:300]}"
        libs[precision] = ctypes.CDLL(str(target))
    return libs


def _slab_struct(real):
    ptr = ctypes.POINTER(real)

    class Slab(ctypes.Structure):
        _fields_ = [("start", ctypes.c_long), ("n", ctypes.c_long), ("b", ptr), ("c", ptr),
                    ("psi", ptr), ("coef", ptr)]
    return Slab


class CStepper:
    """Fields and psi of one grid, and the C time loop that advances them.
    Homogeneous TMz with walls or CPML sides, as in the benchmark."""

    def __init__(self, grid, lib):
        if not grid.electric_primary or grid.periodic_x or grid.periodic_y:
            raise NotImplementedError("the C loop implements TMz with wall and CPML sides only")
        s_homog, sa, sb = grid.secondary_coef[:3]
        p_homog, ca, cb = grid.primary_coef[:3]
        if not (s_homog and p_homog):
            raise NotImplementedError("the C loop takes homogeneous media only")
        precision = grid.dtype.name
        real = C_TYPES[precision][1]
        self.grid, self.dtype, self.real = grid, grid.dtype, real
        self.P, self.S1, self.S2 = grid.new_fields()
        # the engine's slabs without their zero padding, with psi of their own
        slabs = {kind: [_own_slab(kind, *slab) for slab in pair] for kind, pair in grid_slabs(grid).items()}
        Slab = _slab_struct(real)
        self._slabs = []  # keeps the arrays alive
        records = []
        for kind in ("sx", "px", "sy", "py"):
            for idx, b, c, psi, coef in slabs[kind]:
                if idx.size and np.any(np.diff(idx) != 1):
                    raise NotImplementedError("slab rows must be contiguous and ascending")
                arrays = [np.ascontiguousarray(a, dtype=self.dtype) for a in (b, c, psi, coef)]
                self._slabs.append(arrays)
                records.append(Slab(int(idx[0]) if idx.size else 1, idx.size,
                                    *(self._ptr(a) for a in arrays)))
        self._slab_array = (Slab * len(records))(*records)
        self._g = [np.ascontiguousarray(a, dtype=self.dtype) for a in (grid.gxn, grid.gxh, grid.gyn, grid.gyh)]
        self._coefs = [real(float(x)) for x in (sa, sb, ca, cb)]
        self._src = (np.ascontiguousarray(grid.src_i, np.int64), np.ascontiguousarray(grid.src_j, np.int64),
                     np.ascontiguousarray(grid.src_coef, self.dtype))
        self._probes = (np.ascontiguousarray(grid.probe_i, np.int64), np.ascontiguousarray(grid.probe_j, np.int64))
        self._run = lib.run_steps
        self._run.restype = ctypes.c_int

    def _ptr(self, a: np.ndarray):
        return a.ctypes.data_as(ctypes.POINTER(self.real))

    @staticmethod
    def _long_ptr(a: np.ndarray):
        return a.ctypes.data_as(ctypes.POINTER(ctypes.c_long))

    def reset(self) -> None:
        for a in (self.P, self.S1, self.S2):
            a.fill(0)
        for arrays in self._slabs:
            arrays[2].fill(0)

    def run(self, steps: int, threads: int):
        """From rest, `steps` steps in `threads` threads: (probe series
        (steps + 1, probes), seconds of stepping)."""
        self.reset()
        scenario = self.grid.scenario.with_changes(steps=steps)
        wave = np.ascontiguousarray(source_wave(scenario, self.dtype))
        probe_i, probe_j = self._probes
        probe_out = np.zeros((steps + 1, probe_i.size), self.dtype)
        nxp, nyp = self.P.shape
        src_i, src_j, src_coef = self._src
        args = (ctypes.c_long(steps), ctypes.c_int(threads), ctypes.c_long(nxp), ctypes.c_long(nyp),
                self._ptr(self.P), self._ptr(self.S1), self._ptr(self.S2), *self._coefs,
                *(self._ptr(g) for g in self._g), self._slab_array,
                ctypes.c_long(src_i.size), self._long_ptr(src_i), self._long_ptr(src_j), self._ptr(src_coef),
                self._ptr(wave), ctypes.c_long(probe_i.size), self._long_ptr(probe_i),
                self._long_ptr(probe_j), self._ptr(probe_out))
        t0 = time.perf_counter()
        status = self._run(*args)
        elapsed = time.perf_counter() - t0
        if status != 0:
            raise ValueError("the C loop refused a slab outside the grid")
        return probe_out, elapsed
