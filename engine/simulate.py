"""The time-stepping driver: probes, snapshots, divergence guard, cancel."""

from __future__ import annotations

import math
import time
from dataclasses import dataclass, field
from typing import Callable

import numba
import numpy as np

from . import kernels
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


def field_energy(grid: YeeGrid, P, S1, S2, window: tuple[slice, slice] | None = None) -> float:
    """Electromagnetic energy per unit length, J/m: (1/2) sum(eps E^2 + mu0 H^2) dx dy,
    over the whole grid or over the nodes of `window` (and the S1/S2 between them)."""
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


def simulate(scenario: Scenario, *, snapshot_every: int = 0,
             progress: Callable[[int, int], bool | None] | None = None,
             check_every: int = 100, threads: int | None = None,
             keep_fields: bool = False, grid: YeeGrid | None = None,
             initial: np.ndarray | None = None,
             snapshot_window: tuple[slice, slice] | None = None) -> RunResult:
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
    """
    g = grid if grid is not None else build_grid(scenario)
    s = scenario
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
    kernels.advance(0, 0, *kernel_args)  # compile or load from cache outside the timing
    field_energy(g, P, S1, S2)
    numba.set_num_threads(n_threads)  # per calling thread; the kernels' prange obeys it
    t0 = time.perf_counter()
    while step < s.steps:
        stop = min(s.steps, step + check_every)
        kernels.advance(step, stop - step, *kernel_args)
        step = stop
        if step % check_every == 0 or step == s.steps:
            energy = field_energy(g, P, S1, S2)
            e_steps.append(step)
            e_values.append(energy)
            e_inside.append(field_energy(g, P, S1, S2, interior))
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
                     state=(P, S1, S2) if keep_fields else ())
