"""The reflection-free reference run, and its caches.

The reference grid has the same interior, materials, source and probes as
the scenario, with every non-periodic side moved so far out that nothing can
come back within the run.  On the Yee grid a change spreads by at most one
node per step, and the source sits in the interior, so an outer wall more
than steps/2 cells beyond the interior cannot touch it: the interior field is
exactly that of an unbounded grid.  It does not depend on the layer, so it is
cached in memory (LRU) and on disk, keyed on Scenario.reference_key().
"""

from __future__ import annotations

import math
import os
import threading
from collections import OrderedDict
from dataclasses import dataclass, replace
from pathlib import Path

import numpy as np

from .export import savez_atomic
from .scenario import Block, Boundary, Scenario, Side
from .simulate import simulate

FORMAT_VERSION = 1  # bump when the stored arrays or their meaning change
MEMORY_ENTRIES = 8


@dataclass(frozen=True)
class Reference:
    """Reference series on the scenario's own interior.

    probes[name]: the primary field at times n dt, n = 0..steps (SI units);
    frames: interior primary field after frame_steps[k] steps.
    """

    key: str
    probes: dict
    frame_steps: np.ndarray
    frames: np.ndarray
    elapsed_s: float
    margin: tuple[int, int]


def frame_every(s: Scenario) -> int:
    """Cadence of interior frames: about 100 per run, at most ~200 MB of them."""
    nodes = (s.nx + 1) * (s.ny + 1)
    frames = max(4, min(100, int(2e8 / (8 * nodes))))
    return max(1, math.ceil(s.steps / frames))


def margin_cells(s: Scenario) -> int:
    """Cells between the interior and the reference's wall: more than steps / 2."""
    return s.steps // 2 + 2


def reference_scenario(s: Scenario) -> tuple[Scenario, tuple[int, int]]:
    """The unbounded stand-in for `s` and the shift of its interior (cells).

    Blocks are kept as they are inside the test grid; one that reaches the
    test grid's outer wall goes on to infinity, as a substrate leaving the
    grid does; parts beyond the test grid do not exist in the problem.
    """
    b = s.boundary
    m = margin_cells(s)
    mx = 0 if b.periodic_x else m
    my = 0 if b.periodic_y else m
    lo_x, hi_x = -b.left.layer_cells, s.nx + b.right.layer_cells
    lo_y, hi_y = -b.bottom.layer_cells, s.ny + b.top.layer_cells
    blocks = []
    for blk in s.blocks:
        xs = (blk.x0, blk.x1) if b.periodic_x else _extend(blk.x0, blk.x1, lo_x, hi_x, mx)
        ys = (blk.y0, blk.y1) if b.periodic_y else _extend(blk.y0, blk.y1, lo_y, hi_y, my)
        if xs is not None and ys is not None:
            blocks.append(Block(xs[0], xs[1], ys[0], ys[1], blk.eps_r, blk.sigma, blk.name))
    wall = Side(kind="wall")
    periodic = Side(kind="periodic")
    boundary = Boundary(left=periodic if b.periodic_x else wall, right=periodic if b.periodic_x else wall,
                        bottom=periodic if b.periodic_y else wall, top=periodic if b.periodic_y else wall)
    src = s.source
    ref = replace(s, nx=s.nx + 2 * mx, ny=s.ny + 2 * my, blocks=tuple(blocks), boundary=boundary,
                  source=replace(src, x=src.x + mx, y=src.y + my),
                  probes=tuple(replace(p, x=p.x + mx, y=p.y + my) for p in s.probes))
    return ref, (mx, my)


def _extend(lo: float, hi: float, grid_lo: float, grid_hi: float, shift: int):
    """A block's extent along one axis in the reference: clipped to the test
    grid, shifted by the margin, and open-ended where it met the outer wall."""
    lo, hi = max(lo, grid_lo), min(hi, grid_hi)
    if lo >= hi:
        return None
    return (-math.inf if lo <= grid_lo else lo + shift, math.inf if hi >= grid_hi else hi + shift)


def compute_reference(s: Scenario, light_cone: bool = True, progress=None) -> Reference:
    """Run the reference of `s` (no caching); progress as in simulate.

    light_cone: step only the cells the source has reached that can still
    reach the interior before the run ends (bitwise the same interior
    values as stepping the whole reference grid, in a fraction of the time)."""
    ref, (mx, my) = reference_scenario(s)
    ox, oy = ref.offset
    window = (slice(ox + mx, ox + mx + s.nx + (0 if s.boundary.periodic_x else 1)),
              slice(oy + my, oy + my + s.ny + (0 if s.boundary.periodic_y else 1)))
    # the interior (and so every probe) is all that is recorded
    target = (window[0].start, window[0].stop - 1, window[1].start, window[1].stop - 1)
    r = simulate(ref, snapshot_every=frame_every(s), snapshot_window=window,
                 light_cone=target if light_cone else None, progress=progress)
    return Reference(key=s.reference_key(), probes=r.probes, frame_steps=r.snapshot_steps,
                     frames=r.snapshots.astype(s.precision), elapsed_s=r.elapsed_s, margin=(mx, my))


# --- caches ---------------------------------------------------------------

def cache_dir() -> Path:
    """Where references are kept on disk: QUIETLAYER_CACHE_DIR or the user's cache
    directory; safe to delete at any time."""
    root = os.environ.get("QUIETLAYER_CACHE_DIR")
    if not root:
        import platformdirs
        root = platformdirs.user_cache_dir("quietlayer")
    return Path(root) / f"reference-v{FORMAT_VERSION}"


def _save(path: Path, ref: Reference) -> None:
    """Atomic write (temporary name, then rename): a crash never leaves half a file."""
    path.parent.mkdir(parents=True, exist_ok=True)
    names = list(ref.probes)
    savez_atomic(path, dict(key=np.array(ref.key), names=np.array(names, dtype=str),
                            probes=np.stack([ref.probes[n] for n in names]) if names else np.zeros((0, 0)),
                            frame_steps=ref.frame_steps, frames=ref.frames,
                            elapsed_s=np.array(ref.elapsed_s), margin=np.array(ref.margin)))


def _load(path: Path, key: str) -> Reference | None:
    """The stored reference of `key`, or None when the file is missing, cut
    short, garbage, of another format, or inconsistent: it is then computed
    again (a wrong reference would mismeasure every layer silently)."""
    try:
        with np.load(path, allow_pickle=False) as z:
            if str(z["key"]) != key:
                return None
            names = [str(n) for n in z["names"]]
            series, frames, frame_steps = z["probes"], z["frames"], z["frame_steps"]
            margin = tuple(int(v) for v in z["margin"])
            elapsed_s = float(z["elapsed_s"])
    except Exception:  # noqa: BLE001 - zip, npy and key errors of any damaged file: compute it again
        return None
    arrays_ok = (series.ndim == 2 and series.shape[0] == len(names) and frames.ndim == 3
                 and frame_steps.ndim == 1 and frame_steps.shape[0] == frames.shape[0] and len(margin) == 2
                 and all(a.dtype.kind == "f" and np.isfinite(a).all() for a in (series, frames)))
    if not arrays_ok:
        return None
    return Reference(key=key, probes={n: series[i] for i, n in enumerate(names)}, frame_steps=frame_steps,
                     frames=frames, elapsed_s=elapsed_s, margin=margin)


class ReferenceCache:
    """Memory LRU in front of the disk store; thread-safe."""

    def __init__(self, entries: int = MEMORY_ENTRIES, use_disk: bool = True):
        self.entries = entries
        self.use_disk = use_disk
        self._memory: OrderedDict[str, Reference] = OrderedDict()
        self._lock = threading.Lock()
        self._computing: dict[str, threading.Lock] = {}  # key -> held while it is being fetched
        self.hits = {"memory": 0, "disk": 0, "computed": 0}

    def get(self, s: Scenario) -> Reference:
        return self.get_with_source(s)[0]

    def get_with_source(self, s: Scenario, progress=None) -> tuple[Reference, str]:
        """The reference and where it came from: 'memory', 'disk' or 'computed'.
        progress as in simulate, while it is computed (RunCancelled stores nothing)."""
        key = s.reference_key()
        with self._lock:
            pending = self._computing.setdefault(key, threading.Lock())
        with pending:  # threads asking for the same reference wait for one run of it
            return self._fetch(s, key, progress)

    def _fetch(self, s: Scenario, key: str, progress=None) -> tuple[Reference, str]:
        with self._lock:
            if key in self._memory:
                self._memory.move_to_end(key)
                self.hits["memory"] += 1
                self._computing.pop(key, None)
                return self._memory[key], "memory"
        path = cache_dir() / f"{key}.npz"
        ref = _load(path, key) if self.use_disk else None
        source = "disk" if ref is not None else "computed"
        if ref is None:
            ref = compute_reference(s, progress=progress)
            if self.use_disk:
                try:
                    _save(path, ref)
                except OSError:
                    pass  # a read-only cache only costs time
        with self._lock:
            self.hits[source] += 1
            self._memory[key] = ref
            self._memory.move_to_end(key)
            while len(self._memory) > self.entries:
                self._memory.popitem(last=False)
            self._computing.pop(key, None)
        return ref, source

    def clear_memory(self) -> None:
        with self._lock:
            self._memory.clear()


def _default_cache() -> ReferenceCache:
    """The process's cache; QUIETLAYER_REFERENCE_CACHE=off keeps no reference at all
    (every run computes its own: for timing the reference itself)."""
    if os.environ.get("QUIETLAYER_REFERENCE_CACHE", "").strip().lower() in ("off", "0", "no"):
        return ReferenceCache(entries=0, use_disk=False)
    return ReferenceCache()


DEFAULT_CACHE = _default_cache()


def reference(s: Scenario, cache: ReferenceCache | None = None) -> Reference:
    """The reference of `s`, from the cache when it is there."""
    return (cache or DEFAULT_CACHE).get(s)
