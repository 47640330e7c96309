"""The time-stepping driver: probes, snapshots, divergence guard, cancel."""

from __future__ import annotations

import math
import time
from concurrent.futures import ThreadPoolExecutor
from dataclasses import dataclass, field
from typing import Callable

import numba
import numpy as np

from . import backend
from .errors import DivergenceError, RunCancelled
from .grid import YeeGrid, build_grid
from .scenario import Scenario
from .units import EPS0, ETA0

PARALLEL_MIN_NODES = 30_000  # measured: 2 threads win from about 170 x 170 nodes (1.5x at 256 x 256)
ENERGY_GROWTH_LIMIT = 1e4  # after the source is off, energy may not grow past this factor
ENERGY_ABSOLUTE_LIMIT = 1e30  # J/m; far beyond any physical run, still short of float32 overflow


@dataclass
class RunResult:
    """What one run produced, in SI units.

    probes[name]: the primary field (Ez in V/m for TMz, Hz in A/m for TEz) at
    times[n] = n dt, n = 0..steps.  snapshots[k]: the primary field on the
    whole grid (layers included) after snapshot_steps[k] steps.  energy: field
    energy per unit length (J/m) at energy_steps, and interior_energy the
    part of it on the interior nodes (the rest is in the layers).
    """

    scenario: Scenario
    grid: YeeGrid
    times: np.ndarray
    probes: dict[str, np.ndarray]
    quantity: str
    snapshot_steps: np.ndarray
    snapshots: np.ndarray
    energy_steps: np.ndarray
    energy: np.ndarray
    interior_energy: np.ndarray
    elapsed_s: float
    threads: int
    fields: dict[str, np.ndarray] = field(default_factory=dict)
    state: tuple = ()  # (P, S1, S2) as the kernels hold them, when keep_fields
    engine: str = "compiled"  # or "numpy": the NumPy twin stepped it (see backend.py)

    @property
    def mcells_per_s(self) -> float:
        nx, ny = self.grid.cells
        return nx * ny * self.scenario.steps / self.elapsed_s / 1e6 if self.elapsed_s > 0 else math.inf


def default_threads(grid: YeeGrid) -> int:
    """One thread for small grids, every core for large ones."""
    nodes = grid.shape[0] * grid.shape[1]
    return numba.config.NUMBA_NUM_THREADS if nodes >= PARALLEL_MIN_NODES else 1


def row_chunks(rows: int, threads: int) -> np.ndarray:
    """Start rows of `threads` nearly equal chunks, with the end as last entry."""
    return np.linspace(0, rows, max(1, threads) + 1).round().astype(np.int64)


def field_energy(grid: YeeGrid, P, S1, S2, window: tuple[slice, slice] | None = None, loops=None) -> float:
    """Electromagnetic energy per unit length, J/m: (1/2) sum(eps E^2 + mu0 H^2) dx dy,
    over the whole grid or over the nodes of `window` (and the S1/S2 between them)."""
    kernels = loops or backend.loops()
    nx, ny = grid.cells
    if window is None:
        ux = nx if grid.periodic_x else nx + 1  # skip ghost copies on periodic axes
        uy = ny if grid.periodic_y else ny + 1
        wx, wy = slice(0, ux), slice(0, uy)
    else:
        wx, wy = window
    px, py = wx.indices(nx + 1)[:2], wy.indices(ny + 1)[:2]  # (first, stop) on the nodes
    hx = (px[0], min(px[1], nx))  # half nodes between the window's nodes
    hy = (py[0], min(py[1], ny))
    if grid.electric_primary:
        total = (kernels.sum_weighted_squares(P, grid.eps_p, *px, *py)
                 + kernels.sum_squares(S1, *px, *hy) + kernels.sum_squares(S2, *hx, *py))
    else:
        total = (kernels.sum_squares(P, *px, *py) + kernels.sum_weighted_squares(S1, grid.eps_1, *px, *hy)
                 + kernels.sum_weighted_squares(S2, grid.eps_2, *hx, *py))
    s = grid.scenario
    return 0.5 * EPS0 * s.dx * s.dy * total


CONE_PAD = 2  # nodes of slack around each light cone: covers the half-node offsets


def node_box(i, j) -> np.ndarray:
    """(i_lo, i_hi, j_lo, j_hi) of a set of grid nodes."""
    return np.array([np.min(i), np.max(i), np.min(j), np.max(j)], dtype=np.int64)


class ConeStepper:
    """Steps a layer-free grid only where the source has arrived and from where
    `target_box` can still be reached before step `total` (kernels.cone_rows);
    row chunks on a small thread pool, one barrier per step."""

    def __init__(self, g: YeeGrid, kernel_args: tuple, target_box: np.ndarray, total: int, threads: int,
                 loops=None):
        self.loops = loops or backend.loops()
        if self.loops is not backend.kernels:
            threads = 1  # the NumPy loops step the cone in one piece
        if any(slab[1].size for slab in g.x_slabs[:4] + g.y_slabs[:4]):
            raise ValueError("the light-cone window is for grids without a layer")
        (self.P, self.S1, self.S2, self.sc, self.pc, self.x_slabs, self.y_slabs, _, self.px, self.py,
         *self.record_args) = kernel_args
        nxp, nyp = g.shape
        # a periodic axis has no distance: the boxes span it whole
        src_box = node_box(g.src_i, g.src_j)
        target = np.array(target_box, dtype=np.int64)
        for axis, periodic, n in ((0, self.px, nxp), (1, self.py, nyp)):
            if periodic:
                src_box[2 * axis:2 * axis + 2] = target[2 * axis:2 * axis + 2] = (0, n - 1)
        self.source_box, self.target_box, self.total = src_box, target, total
        self.rows = nxp
        self.grads = (g.gxn, g.gxh, g.gyn, g.gyh)
        self.threads = max(1, threads)
        self.pool = ThreadPoolExecutor(self.threads, thread_name_prefix="ql-cone") if self.threads > 1 else None

    def active_rows(self, reach_source: int, reach_target: int) -> tuple[int, int]:
        sb, tb = self.source_box, self.target_box
        lo = max(sb[0] - reach_source, tb[0] - reach_target, 0)
        hi = min(sb[1] + reach_source, tb[1] + reach_target, self.rows - 1) + 1
        return lo, max(lo, hi)

    def __call__(self, first_step: int, n_steps: int) -> None:
        gxn, gxh, gyn, gyh = self.grads
        no_rows = np.zeros(0, dtype=np.int64)
        for n in range(first_step, first_step + n_steps):
            reach_source = n + 1 + CONE_PAD
            reach_target = self.total - (n + 1) + CONE_PAD
            lo, hi = self.active_rows(reach_source, reach_target)
            cone = (reach_source, reach_target, self.source_box, self.target_box)
            starts = row_chunks(hi - lo, self.threads) + lo if self.pool and hi - lo >= 8 * self.threads \
                else np.array([lo, hi], dtype=np.int64)
            args = (self.P, self.S1, self.S2, self.sc, self.pc, gxn, gxh, gyn, gyh) + cone
            if starts.size > 2:
                jobs = [self.pool.submit(self.loops.cone_rows, *args, starts[c], starts[c + 1], c > 0)
                        for c in range(starts.size - 1)]
                for job in jobs:
                    job.result()
                deferred = starts[1:-1]
            else:
                self.loops.cone_rows(*args, starts[0], starts[1], False)
                deferred = no_rows
            self.loops.cone_finish(n, self.P, self.S1, self.S2, self.pc, self.x_slabs, self.y_slabs, gxn, gyn,
                                *cone, deferred, self.px, self.py, *self.record_args)

    def close(self) -> None:
        if self.pool is not None:
            self.pool.shutdown(wait=False)


def simulate(scenario: Scenario, *, snapshot_every: int = 0,
             progress: Callable[[int, int], bool | None] | None = None,
             check_every: int = 100, threads: int | None = None,
             keep_fields: bool = False, grid: YeeGrid | None = None,
             initial: np.ndarray | None = None,
             snapshot_window: tuple[slice, slice] | None = None,
             light_cone: tuple[int, int, int, int] | None = None) -> RunResult:
    """Run `scenario` for scenario.steps steps.

    snapshot_every: store the primary field every k steps (0: none), on the
    whole grid or on the grid nodes of snapshot_window.
    progress(step, total): called every `check_every` steps; return False to
    cancel (raises RunCancelled).  The divergence guard checks the field
    energy at the same cadence and raises DivergenceError naming the step.
    threads: kernel threads (default: chosen by grid size).
    keep_fields: also return the final fields (SI) and the raw kernel state.
    initial: primary field at t = 0 on every grid node (Ez in V/m or Hz in
    A/m), e.g. to follow one eigenmode; the other fields start at zero.
    light_cone: (i_lo, i_hi, j_lo, j_hi), grid nodes whose probe and frame
    values are all that is wanted, for a grid without a layer: each step
    then updates only the cells that the source has reached and that can
    still reach this box by the last step (ConeStepper).  Inside the box the
    values are bitwise those of a full run; elsewhere the final fields are
    not meaningful.  Needs a zero initial field.
    """
    g = grid if grid is not None else build_grid(scenario)
    s = scenario
    kernels = backend.loops()  # compiled, or their NumPy twin while they are being compiled
    n_threads = threads if threads is not None else default_threads(g)
    P, S1, S2 = g.new_fields()
    for a in (P, S1, S2):
        a.fill(0)  # touch the pages now, not inside the timed loop
    for slab in g.x_slabs[:4] + g.y_slabs[:4]:
        slab[3].fill(0)  # psi starts at zero, also when a grid is reused
    if initial is not None:
        initial = np.asarray(initial, dtype=float)
        if initial.shape != g.shape:
            raise ValueError(f"initial field has shape {initial.shape}, the grid {g.shape}")
        P[...] = initial * (1.0 if g.electric_primary else ETA0)
        kernels.copy_ghosts(P, g.periodic_x, g.periodic_y)
    pulse = s.source.pulse
    dt = s.dt
    wave = np.asarray(pulse((np.arange(s.steps) + 0.5) * dt), dtype=g.dtype)
    probe_out = np.zeros((s.steps + 1, g.probe_i.size), dtype=g.dtype)
    probe_out[0] = P[g.probe_i, g.probe_j]
    source_off_step = int(math.ceil(pulse.end_time / dt))
    e_steps, e_values, e_inside = [], [], []
    window = snapshot_window if snapshot_window is not None else (slice(None), slice(None))
    (i0, i1, _), (j0, j1, _) = (w.indices(n) for w, n in zip(window, P.shape))
    n_frames = s.steps // snapshot_every if snapshot_every else 0
    frames = np.zeros((n_frames, i1 - i0, j1 - j0), dtype=g.dtype)
    interior = g.interior_slice()
    peak_energy = 0.0
    step = 0
    kernel_args = (P, S1, S2, g.secondary_coef, g.primary_coef, g.x_slabs, g.y_slabs,
                   row_chunks(g.shape[0], n_threads), g.periodic_x, g.periodic_y,
                   g.src_i, g.src_j, g.src_coef, wave, g.probe_i, g.probe_j, probe_out,
                   frames, snapshot_every, i0, j0)
    if light_cone is not None:
        if initial is not None:
            raise ValueError("a light-cone run starts from rest")
        advance = ConeStepper(g, kernel_args, np.asarray(light_cone), s.steps, n_threads, kernels)
        # outside the box the fields are stale by design: the guard watches the box
        i_lo, i_hi, j_lo, j_hi = light_cone
        energy_window = (slice(i_lo, i_hi + 1), slice(j_lo, j_hi + 1))
    else:
        energy_window = None

        def advance(first, count):
            kernels.advance(first, count, *kernel_args)
    advance(0, 0)  # the whole-grid kernel is compiled or loaded here, outside the timing
    field_energy(g, P, S1, S2, loops=kernels)
    numba.set_num_threads(n_threads)  # per calling thread; the kernels' prange obeys it
    t0 = time.perf_counter()
    try:
        while step < s.steps:
            stop = min(s.steps, step + check_every)
            advance(step, stop - step)
            step = stop
            if step % check_every == 0 or step == s.steps:
                energy = field_energy(g, P, S1, S2, energy_window, kernels)
                e_steps.append(step)
                e_values.append(energy)
                e_inside.append(field_energy(g, P, S1, S2, interior, kernels))
                if not math.isfinite(energy):
                    raise DivergenceError(step, "the fields are no longer finite")
                if energy > ENERGY_ABSOLUTE_LIMIT:
                    raise DivergenceError(step, f"field energy {energy:.3g} J/m is beyond any physical value")
                if step <= source_off_step:
                    peak_energy = max(peak_energy, energy)
                elif peak_energy > 0 and energy > ENERGY_GROWTH_LIMIT * peak_energy:
                    raise DivergenceError(step, f"field energy grew {energy / peak_energy:.3g} times "
                                          "past its value while the source was on")
                if progress is not None and progress(step, s.steps) is False:
                    raise RunCancelled(step)
    finally:
        if isinstance(advance, ConeStepper):
            advance.close()
    elapsed = time.perf_counter() - t0

    to_si = 1.0 if g.electric_primary else 1.0 / ETA0
    quantity = "Ez (V/m)" if g.electric_primary else "Hz (A/m)"
    probes = {p.name: probe_out[:, m].astype(float) * to_si for m, p in enumerate(s.probes)}
    snapshots = frames.astype(float)
    if to_si != 1.0:
        snapshots *= to_si
    snap_steps = snapshot_every * np.arange(1, n_frames + 1)
    fields = {}
    if keep_fields:
        if g.electric_primary:
            fields = {"Ez": P.astype(float), "Hx": S1.astype(float) / ETA0, "Hy": S2.astype(float) / ETA0}
        else:
            fields = {"Hz": P.astype(float) / ETA0, "Ex": -S1.astype(float), "Ey": -S2.astype(float)}
    return RunResult(scenario=s, grid=g, times=np.arange(s.steps + 1) * dt, probes=probes,
                     quantity=quantity, snapshot_steps=np.asarray(snap_steps, dtype=int),
                     snapshots=snapshots, energy_steps=np.asarray(e_steps, dtype=int),
                     energy=np.asarray(e_values), interior_energy=np.asarray(e_inside), elapsed_s=elapsed, threads=n_threads, fields=fields,
                     state=(P, S1, S2) if keep_fields else (),
                     engine="compiled" if kernels is backend.kernels else "numpy")
