"""Confirm a 2D-tuned layer on a small 3D box: runs, reference, scores.

    c = confirm_3d(scenario)        # c.peak_db per probe, c.global_db, c.late, c.spectra

The box comes from grid3d.box_from_scenario.  The layer's echo is isolated
as in 2D: test run minus a reflection-free reference whose walls lie beyond
reach.  The reference is stepped only inside a light-cone window: on the Yee
grid a change moves at most one cell of L1 distance per step (half a cell in
the H update, half in the E update), so at step n only cells within L1
distance n (+ slack) of the source can be non-zero, and only cells within L1
distance steps - n (+ slack) of the interior can still reach a probe or an
interior node before the end.  Every cell the window reads is either inside
the previous step's window (and exact by induction) or still exactly zero,
so the interior values are bitwise those of a full reference with far walls
(a test checks this).  The source sits on the three mirror planes of that
reference, so only one eighth of it is stepped, with ghost planes filled from
their images (`Mirror`).  For the demo box that is 5.3e7 cell updates (3.9e8
for the window on the whole grid, 7.6e9 for the whole grid: 304^3 cells x 271
steps).  The reference is cached in memory and on disk.
"""

from __future__ import annotations

import math
import threading
import time
from collections import OrderedDict
from dataclasses import dataclass, field, replace

import numba
import numpy as np

from . import kernels3d
from .errors import DivergenceError, RunCancelled
from .export import savez_atomic
from .grid3d import Box3D, Grid3D, box_from_scenario, build_grid3d
from .measure import FLOOR_DB, SPECTRUM_MASK_DB, LateTime, energy_trend, to_db
from .reference import cache_dir as _cache_dir_2d
from .scenario import Scenario
from .simulate import ENERGY_ABSOLUTE_LIMIT, ENERGY_GROWTH_LIMIT
from .units import EPS0, ETA0

WINDOW_SLACK = 3  # cells: L1 distances between components of two cells differ from the cells' by < 2
COMPONENTS = ("Ex", "Ey", "Ez", "Hx", "Hy", "Hz")
FRAMES = 40  # interior frames for the global error
LATE_STEPS_3D = 4000
FORMAT_VERSION = 1
MEMORY_ENTRIES = 4
# One kernel thread unless asked: on this 2-core machine shared with other work, two
# threads ran the demo's reference 4x slower than one whenever the other core was busy
# (see tests/bench/bench_3d.py, which times both).
DEFAULT_THREADS = 1


@dataclass
class BoxRun:
    """What one 3D run produced: probe series (SI) at n dt, n = 0..steps, the
    energy record (J) and the interior error sums against reference frames."""

    probes: dict
    energy_steps: np.ndarray
    energy: np.ndarray
    interior_energy: np.ndarray
    frame_steps: np.ndarray
    frames: np.ndarray | None  # (F, 6, ...) interior frames when asked for
    error_sums: tuple  # (sum (test - ref)^2, sum ref^2) over the interior frames
    elapsed_s: float
    cell_updates: float

    @property
    def mcells_per_s(self) -> float:
        return self.cell_updates / self.elapsed_s / 1e6 if self.elapsed_s > 0 else math.inf


def frame_every(box: Box3D) -> int:
    return max(1, math.ceil(box.steps / FRAMES))


def light_cone_window(grid: Grid3D, step: int, steps: int, slack: int = WINDOW_SLACK) -> np.ndarray:
    """The window of `step` (see the module text): cells within L1 distance step + slack
    of the source and steps - step + slack of the interior box."""
    si, sj, sk = grid.source_node
    r_src = step + slack
    i0, i1, j0, j1, k0, k1 = grid.interior_box()
    r_box = steps - step + slack
    return np.array([max(si - r_src, i0 - r_box), min(si + r_src, i1 - 1 + r_box) + 1,
                     max(sj - r_src, j0 - r_box), min(sj + r_src, j1 - 1 + r_box) + 1,
                     si, sj, sk, r_src, i0, i1, j0, j1, k0, k1, r_box], dtype=np.int64)


def _half_step_h(grid: Grid3D, win, threads: int, chunks) -> None:
    """H from n - 1/2 to n + 1/2: column loops inside a window, else whole planes."""
    if win is None:
        args = (*grid.flat_fields, grid.cdt, *grid.plane_args[0])
        kernels3d.h_planes(0, grid.shape[0], *args) if threads == 1 else kernels3d.h_plane_chunks(chunks, *args)
    else:
        args = (*grid.fields, grid.cdt, *grid.h_args, win)
        kernels3d.h_rows(0, grid.shape[0], *args) if threads == 1 else kernels3d.h_chunks(chunks, *args)


def _half_step_e(grid: Grid3D, win, threads: int, chunks) -> None:
    """E from n to n + 1: column loops inside a window, else whole planes."""
    if win is None:
        args = (*grid.flat_fields, grid.ca, grid.cb, *grid.plane_args[1])
        kernels3d.e_planes(0, grid.shape[0], *args) if threads == 1 else kernels3d.e_plane_chunks(chunks, *args)
    else:
        args = (*grid.fields, grid.ca, grid.cb, *grid.e_args, win)
        kernels3d.e_rows(0, grid.shape[0], *args) if threads == 1 else kernels3d.e_chunks(chunks, *args)


def _energy(grid: Grid3D, region=None) -> float:
    """Field energy (J) in the whole grid or in region (i0, i1, j0, j1, k0, k1)."""
    i0, i1, j0, j1, k0, k1 = region if region is not None else (0, grid.shape[0], 0, grid.shape[1], 0,
                                                                 grid.shape[2])
    sums = [kernels3d.sum_squares_box(a, i0, i1, j0, j1, k0, k1) for a in grid.fields]
    dv = grid.box.d[0] * grid.box.d[1] * grid.box.d[2]
    return 0.5 * EPS0 * dv * (grid.box.eps_r * sum(sums[:3]) + sum(sums[3:]))


def run_box(grid: Grid3D, steps: int | None = None, *, window: bool = False, reference_frames=None,
            keep_frames: bool = False, check_every: int = 0, progress=None, record_probes: bool = True,
            threads: int | None = None, initial: dict | None = None, probe_component: str | None = None,
            mirror: "Mirror | None" = None) -> BoxRun:
    """Run grid.box for `steps` steps (default box.steps) from zero fields.

    window: step only inside the light-cone window (the reference; no energy checks).
    reference_frames: (F, 6, ...) interior frames to score the run against
    (global error); keep_frames: return this run's interior frames instead.
    check_every: energy record and divergence guard every so many steps (0: none).
    progress(step, total) every ~1 % of the run; return False to cancel (RunCancelled).
    initial: starting values {"Ex": array, ...} in SI (E in V/m, H in A/m) on the grid's
    (NX+1, NY+1, NZ+1) arrays, e.g. one cavity mode; the rest start at zero.
    probe_component: record this component ("Ex" ... "Hz") instead of the source's.
    mirror: the grid is one eighth of a symmetric problem (see Mirror); its ghost
    planes are filled after each half step.
    """
    box = grid.box
    steps = box.steps if steps is None else steps
    grid.reset()  # a grid is zero when new; touching a large reference's pages would cost time
    Ex, Ey, Ez, Hx, Hy, Hz = grid.fields
    for name, values in (initial or {}).items():
        grid.fields[COMPONENTS.index(name)][...] = values * (ETA0 if name[0] == "H" else 1.0)
    probe_field = grid.probe_field() if probe_component is None else grid.fields[COMPONENTS.index(probe_component)]
    pn = grid.probe_nodes
    probe_out = np.zeros((steps + 1, len(pn)), dtype=grid.dtype)
    probe_out[0] = probe_field[pn[:, 0], pn[:, 1], pn[:, 2]]
    si, sj, sk = grid.source_node
    magnetic = box.source_magnetic
    times = (np.arange(steps) + (0.0 if magnetic else 0.5)) * box.dt
    wave = (box.pulse(times) * grid.source_coef).astype(grid.dtype)
    every = frame_every(box)
    i0, i1, j0, j1, k0, k1 = grid.interior_box()
    n_frames = steps // every if (reference_frames is not None or keep_frames) else 0
    frames = np.zeros((n_frames, 6, i1 - i0, j1 - j0, k1 - k0), grid.dtype) if keep_frames else None
    err_sum = ref_sum = 0.0
    full = grid.full_window()
    e_steps, e_total, e_inside = [], [], []
    peak_energy = 0.0
    source_off = int(math.ceil(2 * box.pulse.t0 / box.dt))
    report_every = max(1, steps // 100)
    nxp, nyp, nzp = grid.shape
    threads = DEFAULT_THREADS if threads is None else min(threads, numba.config.NUMBA_NUM_THREADS)
    numba.set_num_threads(threads)  # per calling thread
    cells = 0.0
    chunks = kernels3d.row_chunks(full, nxp - 1, threads)
    t0 = time.perf_counter()
    for n in range(steps):
        if window:
            win = light_cone_window(grid, n, steps)
            cells += kernels3d.window_cells(win, nxp, nyp, nzp)
            chunks = kernels3d.row_chunks(win, nxp - 1, threads)
        if not window and threads == 1:
            kernels3d.step_planes(*grid.flat_fields, grid.cdt, grid.ca, grid.cb, *grid.plane_args,
                                  si if magnetic else -1, sj * nzp + sk, wave[n])
        else:
            _half_step_h(grid, win if window else None, threads, chunks)
            if magnetic:
                Hz[si, sj, sk] += wave[n]
            if mirror is not None:
                mirror.fill_ghosts(grid.fields[3:], "H")
            _half_step_e(grid, win if window else None, threads, chunks)
        if not magnetic:
            Ez[si, sj, sk] += wave[n]
        if mirror is not None:
            mirror.fill_ghosts(grid.fields[:3], "E")
        if record_probes:
            probe_out[n + 1] = probe_field[pn[:, 0], pn[:, 1], pn[:, 2]]
        if n_frames and (n + 1) % every == 0 and (n + 1) // every <= n_frames:
            f = (n + 1) // every - 1
            if keep_frames:
                for c, a in enumerate(grid.fields):
                    frames[f, c] = a[i0:i1, j0:j1, k0:k1]
            else:
                for c, a in enumerate(grid.fields):
                    e, r = kernels3d.error_sums_box(a, reference_frames[f, c], i0, j0, k0)
                    err_sum += e
                    ref_sum += r
        if check_every and ((n + 1) % check_every == 0 or n + 1 == steps):
            energy = _energy(grid)
            e_steps.append(n + 1)
            e_total.append(energy)
            e_inside.append(_energy(grid, grid.interior_box()))
            if not math.isfinite(energy):
                raise DivergenceError(n + 1, "the fields are no longer finite")
            if energy > ENERGY_ABSOLUTE_LIMIT:
                raise DivergenceError(n + 1, f"field energy {energy:.3g} J is beyond any physical value")
            if n + 1 <= source_off:
                peak_energy = max(peak_energy, energy)
            elif peak_energy > 0 and energy > ENERGY_GROWTH_LIMIT * peak_energy:
                raise DivergenceError(n + 1, f"field energy grew {energy / peak_energy:.3g} times "
                                      "past its value while the source was on")
        if progress is not None and ((n + 1) % report_every == 0 or n + 1 == steps):
            if progress(n + 1, steps) is False:
                raise RunCancelled(n + 1)
    elapsed = time.perf_counter() - t0
    if not window:
        cells = float(nxp - 1) * (nyp - 1) * (nzp - 1) * steps
    if record_probes and not np.all(np.isfinite(probe_out)):
        raise DivergenceError(steps, "the fields are no longer finite")
    recorded = probe_component or ("Hz" if magnetic else "Ez")
    scale = 1.0 / ETA0 if recorded[0] == "H" else 1.0
    probes = {name: probe_out[:, m].astype(float) * scale for m, (name, _) in enumerate(box.probes)}
    return BoxRun(probes=probes, energy_steps=np.asarray(e_steps, int), energy=np.asarray(e_total),
                  interior_energy=np.asarray(e_inside), frame_steps=every * np.arange(1, n_frames + 1),
                  frames=frames, error_sums=(err_sum, ref_sum), elapsed_s=elapsed, cell_updates=cells)


# --- the reference and its caches -------------------------------------------

@dataclass(frozen=True)
class Reference3D:
    """Reference probe series (SI, n = 0..steps) and interior frames (F, 6, ...)."""

    key: str
    probes: dict
    frames: np.ndarray
    elapsed_s: float
    cell_updates: float


def reference_box(box: Box3D) -> tuple[Box3D, int]:
    """The unbounded stand-in for `box` (electric walls beyond reach, no layers) and the
    shift of its interior in cells: the window never reaches the walls."""
    margin = (box.steps + 2 * WINDOW_SLACK) // 2 + 2
    shift = lambda p: tuple(v + margin for v in p)
    ref = replace(box, cells=tuple(c + 2 * margin for c in box.cells), faces=(None,) * 6,
                  source=shift(box.source), probes=tuple((n, shift(p)) for n, p in box.probes))
    return ref, margin


@dataclass(frozen=True)
class Mirror:
    """The reference as one eighth of itself.  Without layers and with its walls beyond
    reach, the reference is the field of a z-directed dipole in open space, which is
    mirror-symmetric about the three planes through the source: each component is even
    or odd in each of them (a polar E, an axial H; the source's own sign decides the
    rest).  The Yee update is the same arithmetic on mirrored cells with the signs of
    the differences flipped, and a - b = -(b - a) exactly, so the full grid's fields are
    exactly symmetric and an eighth of the grid, with one ghost plane per mirror filled
    from its image after each half step, gives bitwise the same values (a test checks
    this) at about 1/8 of the work and memory.

    Along axis a the plane passes through the source node: an integer plane when the
    driven component sits on integer nodes along a (octant index 1 = the plane, ghost
    0 mirrors 2 or 1), a half plane otherwise (octant index 0 is the plane for the
    half-node components, ghost 0 of the integer-node ones mirrors 1).
    """

    origin: tuple  # full grid index of octant index 0, per axis
    plane_offset: tuple  # 1 for an integer plane, 0 for a half plane, per axis
    parity: tuple  # parity[c][a]: +1 or -1 for component c (Ex..Hz) under the mirror of axis a

    @staticmethod
    def of(source: tuple, magnetic: bool) -> "Mirror":
        parity = []
        for c in range(6):
            axis_c = c % 3
            row = []
            for a in range(3):
                # the source's sign under the mirror: a polar J along z flips only for a = z,
                # an axial M along z flips for a = x, y
                sigma = (1 if a != 2 else -1) if not magnetic else (-1 if a != 2 else 1)
                if c < 3:  # E, polar: its component along a flips
                    row.append(sigma * (-1 if axis_c == a else 1))
                else:  # H, axial: the other two flip
                    row.append(sigma * (1 if axis_c == a else -1))
            parity.append(tuple(row))
        driven = 5 if magnetic else 2
        offset = tuple(1 if not _half_along(driven, a) else 0 for a in range(3))
        return Mirror(origin=tuple(source[a] - offset[a] for a in range(3)), plane_offset=offset,
                      parity=tuple(parity))

    def index(self, c: int, a: int, i: int) -> tuple[int, int]:
        """(octant index, sign) of full grid index i of component c along axis a."""
        plane2 = 2 * (self.origin[a] + self.plane_offset[a]) + (1 if self.plane_offset[a] == 0 else 0)
        half = _half_along(c, a)
        position2 = 2 * i + (1 if half else 0)  # twice the node's position
        if position2 >= plane2:
            return i - self.origin[a], 1
        mirrored2 = 2 * plane2 - position2
        return (mirrored2 - (1 if half else 0)) // 2 - self.origin[a], self.parity[c][a]

    def fill_ghosts(self, fields, half: str) -> None:
        """Ghost planes (octant index 0) of E or H from their images, axis by axis over
        whole planes (so edges and corners come out right)."""
        first = 0 if half == "E" else 3
        for a in range(3):
            for k, f in enumerate(fields):
                c = first + k
                if self.plane_offset[a] == 0 and _half_along(c, a):
                    continue  # on the plane itself: updated like any node
                image = 2 if (self.plane_offset[a] == 1 and not _half_along(c, a)) else 1
                ghost = tuple(0 if b == a else slice(None) for b in range(3))
                source = tuple(image if b == a else slice(None) for b in range(3))
                if self.parity[c][a] > 0:
                    f[ghost] = f[source]
                else:
                    np.negative(f[source], out=f[ghost])

    def unfold(self, frames: np.ndarray, full_box: tuple) -> np.ndarray:
        """Interior frames (F, 6, ...) of the full grid's box (i0, i1, j0, j1, k0, k1) from
        the octant's frames, which start at octant index 0."""
        ranges = [range(full_box[2 * a], full_box[2 * a + 1]) for a in range(3)]
        out = np.empty(frames.shape[:2] + tuple(len(r) for r in ranges), frames.dtype)
        for c in range(6):
            maps = [[self.index(c, a, i) for i in ranges[a]] for a in range(3)]
            idx = [np.array([m[0] for m in maps[a]]) for a in range(3)]
            sign = [np.array([m[1] for m in maps[a]], dtype=frames.dtype) for a in range(3)]
            picked = frames[:, c][(slice(None),) + np.ix_(*idx)]
            out[:, c] = picked * (sign[0][:, None, None] * sign[1][None, :, None] * sign[2][None, None, :])
        return out


def _half_along(c: int, a: int) -> bool:
    """Does component c (Ex, Ey, Ez, Hx, Hy, Hz) sit on half nodes along axis a?"""
    return (c % 3 == a) == (c < 3)


def compute_reference(box: Box3D, *, window: bool = True, progress=None, threads=None) -> Reference3D:
    """The reference of `box` (no caching): one eighth of the far-walled grid, stepped in
    its light-cone window (see Mirror); window=False steps every cell of the whole grid
    (for tests)."""
    ref_box, margin = reference_box(box)
    full_interior = tuple(v for a in range(3) for v in (margin, margin + box.cells[a] + 1))
    if not window:
        grid = build_grid3d(ref_box)
        # the frames are the test box's interior nodes
        grid.interior = full_interior
        run = run_box(grid, window=False, keep_frames=True, progress=progress, threads=threads)
        return Reference3D(key=box.reference_key(), probes=run.probes, frames=run.frames,
                           elapsed_s=run.elapsed_s, cell_updates=run.cell_updates)
    mirror = Mirror.of(ref_box.source, ref_box.source_magnetic)
    driven = 5 if ref_box.source_magnetic else 2
    # the octant holds the images of the whole interior, and walls beyond reach of them
    reach = [max(mirror.index(c, a, i)[0] for c in range(6)
                 for i in (full_interior[2 * a], full_interior[2 * a + 1] - 1)) + 1 for a in range(3)]
    octant = replace(ref_box, cells=tuple(reach[a] + margin for a in range(3)),
                     source=tuple(mirror.plane_offset),
                     probes=tuple((n, tuple(mirror.index(driven, a, p[a])[0] for a in range(3)))
                                  for n, p in ref_box.probes))
    grid = build_grid3d(octant)
    grid.interior = (0, reach[0], 0, reach[1], 0, reach[2])  # the window's target, and the frames
    run = run_box(grid, window=True, keep_frames=True, progress=progress, threads=threads, mirror=mirror)
    signs = {n: math.prod(mirror.index(driven, a, p[a])[1] for a in range(3)) for n, p in ref_box.probes}
    probes = {n: v * signs[n] for n, v in run.probes.items()}
    return Reference3D(key=box.reference_key(), probes=probes, frames=mirror.unfold(run.frames, full_interior),
                       elapsed_s=run.elapsed_s, cell_updates=run.cell_updates)


def reference_cache_dir():
    """Next to the 2D references (QUIETLAYER_CACHE_DIR or the user's cache directory)."""
    return _cache_dir_2d().parent / f"reference3d-v{FORMAT_VERSION}"


class Reference3DCache:
    """Memory LRU in front of the disk store; thread-safe; one computation per key at a time."""

    def __init__(self, entries: int = MEMORY_ENTRIES, use_disk: bool = True):
        self.entries, self.use_disk = entries, use_disk
        self._memory: OrderedDict[str, Reference3D] = OrderedDict()
        self._lock = threading.Lock()
        self._computing: dict[str, threading.Lock] = {}

    def get_with_source(self, box: Box3D, progress=None) -> tuple[Reference3D, str]:
        """The reference and where it came from: 'memory', 'disk' or 'computed'."""
        key = box.reference_key()
        with self._lock:
            pending = self._computing.setdefault(key, threading.Lock())
        with pending:
            with self._lock:
                if key in self._memory:
                    self._memory.move_to_end(key)
                    return self._memory[key], "memory"
            path = reference_cache_dir() / f"{key}.npz"
            ref = self._load(path, key) if self.use_disk else None
            source = "disk"
            if ref is None:
                ref, source = compute_reference(box, progress=progress), "computed"
                if self.use_disk:
                    self._save(path, ref, box)
            with self._lock:
                self._memory[key] = ref
                while len(self._memory) > self.entries:
                    self._memory.popitem(last=False)
            return ref, source

    @staticmethod
    def _save(path, ref: Reference3D, box: Box3D) -> None:
        names = [n for n, _ in box.probes]
        try:
            path.parent.mkdir(parents=True, exist_ok=True)
            savez_atomic(path, dict(key=np.array(ref.key), names=np.array(names, dtype=str),
                                    probes=np.stack([ref.probes[n] for n in names]), frames=ref.frames,
                                    elapsed_s=np.array(ref.elapsed_s), cell_updates=np.array(ref.cell_updates)))
        except OSError:
            pass  # a read-only cache only costs time

    @staticmethod
    def _load(path, key: str) -> Reference3D | None:
        try:
            with np.load(path, allow_pickle=False) as z:
                if str(z["key"]) != key:
                    return None
                probes = {str(n): z["probes"][i] for i, n in enumerate(z["names"])}
                return Reference3D(key=key, probes=probes, frames=z["frames"], elapsed_s=float(z["elapsed_s"]),
                                   cell_updates=float(z["cell_updates"]))
        except (OSError, ValueError, KeyError, EOFError):
            return None

    def clear_memory(self) -> None:
        with self._lock:
            self._memory.clear()


DEFAULT_CACHE = Reference3DCache()


# --- the confirmation --------------------------------------------------------

@dataclass
class Confirmation3D:
    """Scores of one 3D confirmation (dB, relative to the reference, as in 2D)."""

    box: Box3D
    times: np.ndarray
    peak_db: dict = field(default_factory=dict)
    error_db: dict = field(default_factory=dict)
    worst_peak_db: float = math.nan
    worst_probe: str = ""
    global_db: float = math.nan
    freqs: np.ndarray | None = None
    spectra: dict = field(default_factory=dict)
    band_worst_db: dict = field(default_factory=dict)
    late: LateTime | None = None
    test_s: float = 0.0
    reference_s: float = 0.0
    reference_source: str = ""
    late_s: float = 0.0
    elapsed_s: float = 0.0
    test_mcells_per_s: float = 0.0


def confirm_3d(scenario: Scenario, *, late_steps: int = LATE_STEPS_3D, progress=None,
               cache: Reference3DCache | None = None, half_width: int | None = None,
               box: Box3D | None = None, threads: int | None = None) -> Confirmation3D:
    """Measure the scenario's layer on its 3D box (late_steps = 0: no late-time check).

    progress(stage, done, total), stage 'reference', 'test' or 'late', may return
    False to cancel (raises RunCancelled).  A test run that diverges raises
    DivergenceError; a late-time run that diverges is reported in .late.
    """
    t_start = time.perf_counter()
    box = box if box is not None else box_from_scenario(scenario, half_width)
    stage = lambda name: (None if progress is None else (lambda done, total: progress(name, done, total)))
    ref, source = (cache or DEFAULT_CACHE).get_with_source(box, progress=stage("reference"))
    grid = build_grid3d(box)
    run = run_box(grid, reference_frames=ref.frames, check_every=max(10, box.steps // 20),
                  progress=stage("test"), threads=threads)
    c = Confirmation3D(box=box, times=np.arange(box.steps + 1) * box.dt, test_s=run.elapsed_s,
                       reference_s=ref.elapsed_s if source == "computed" else 0.0, reference_source=source,
                       test_mcells_per_s=run.mcells_per_s)
    errors = {}
    for name, _ in box.probes:
        err = run.probes[name] - ref.probes[name]
        errors[name] = err
        scale = np.abs(ref.probes[name]).max()
        c.peak_db[name] = float(to_db(np.abs(err).max() / scale)) if scale > 0 else math.nan
        c.error_db[name] = to_db(err / scale) if scale > 0 else np.full(err.shape, FLOOR_DB)
    finite = {k: v for k, v in c.peak_db.items() if math.isfinite(v)}
    if finite:
        c.worst_probe = max(finite, key=finite.get)
        c.worst_peak_db = finite[c.worst_probe]
    err_sum, ref_sum = run.error_sums
    if ref_sum > 0:
        c.global_db = float(10 * np.log10(max(err_sum / ref_sum, 10 ** (FLOOR_DB / 10))))
    c.freqs, c.spectra, c.band_worst_db = reflection_spectra(box, ref.probes, errors)
    if late_steps:
        t_late = time.perf_counter()
        c.late = late_time_3d(grid, late_steps, progress=stage("late"), threads=threads)
        c.late_s = time.perf_counter() - t_late
    c.elapsed_s = time.perf_counter() - t_start
    return c


def reflection_spectra(box: Box3D, ref_probes: dict, errors: dict):
    """(freqs in the band, |FFT(err)| / |FFT(ref)| per probe masked where the reference is
    more than SPECTRUM_MASK_DB below its peak, the largest in-band value per probe in dB)."""
    n = 1 << int(math.ceil(math.log2(4 * (box.steps + 1))))
    freqs = np.fft.rfftfreq(n, box.dt)
    f_lo, f_hi = box.band
    band = (freqs >= max(freqs[1], f_lo)) & (freqs <= f_hi)
    spectra, worst = {}, {}
    for name, err in errors.items():
        full_ref = np.abs(np.fft.rfft(ref_probes[name], n))
        rs = full_ref[band]
        ratio = np.abs(np.fft.rfft(err, n))[band] / np.where(rs > 0, rs, np.inf)
        masked = rs < full_ref.max() * 10 ** (SPECTRUM_MASK_DB / 20)
        spectra[name] = np.where(masked, np.nan, ratio)
        if not masked.all():
            worst[name] = float(to_db(np.nanmax(spectra[name])))
    return freqs[band], spectra, worst


def late_time_3d(grid: Grid3D, steps: int, progress=None, threads=None) -> LateTime:
    """The test box run for `steps` steps with its energy recorded (status as in 2D)."""
    check = max(20, steps // 200)
    try:
        run = run_box(grid, steps, check_every=check, progress=progress, record_probes=False, threads=threads)
    except DivergenceError as exc:
        return LateTime(status="diverged", steps=steps, growth_db_per_1000=math.inf, final_db=math.inf,
                        energy_steps=np.zeros(0, int), interior_energy=np.zeros(0), layer_energy=np.zeros(0),
                        message=str(exc))
    return energy_trend(steps, run.energy_steps, run.energy, run.interior_energy)
