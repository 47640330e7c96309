"""The time step of engine.kernels.advance written with NumPy array operations.

It serves as the baseline the numba engine is measured against, and as an
independent check of the kernels.  TMz only, walls and CPML sides only.

Every update is a short list of in-place ufunc calls on views prepared once,
so a step is a Python loop over about sixty whole-array operations and never
over cells.  The layer slabs are contiguous index ranges, so they are handled
as slices; a slab whose rows are listed towards the wall (descending on the
low side) is matched by reversing the psi view, not the field.
"""

from __future__ import annotations

import time

import numpy as np

from quietlayer.engine import Block, Boundary, Probe, Scenario, Side, Source, build_grid, simulate


def _contiguous_runs(idx: np.ndarray):
    """(k0, k1, lo, hi, descending): idx[k0:k1] covers lo..hi-1 one step at a time."""
    runs = []
    k0 = 0
    while k0 < idx.size:
        k1 = k0 + 1
        step = int(idx[k1] - idx[k0]) if k1 < idx.size else 0
        if abs(step) == 1:
            while k1 < idx.size and idx[k1] - idx[k1 - 1] == step:
                k1 += 1
        else:
            step = 1
        ends = idx[k0], idx[k1 - 1]
        runs.append((k0, k1, int(min(ends)), int(max(ends)) + 1, step == -1))
        k0 = k1
    return runs


def source_wave(scenario: Scenario, dtype) -> np.ndarray:
    """Source samples at (n + 1/2) dt, as the engine's driver computes them."""
    pulse = scenario.source.pulse
    return np.asarray(pulse((np.arange(scenario.steps) + 0.5) * scenario.dt), dtype=dtype)


def grid_slabs(grid) -> dict:
    """The psi slabs of a grid as {kind: [(idx, b, c, psi, coef), ...]} in the
    engine's update order; kinds sx, sy (secondary) and px, py (primary)."""
    def rows(slab):
        start, b, c, psi, coef = slab
        return (int(start) + np.arange(b.size), b, c, psi, coef)
    sx_low, sx_high, px_low, px_high = grid.x_slabs[:4]
    sy_low, sy_high, py_low, py_high = grid.y_slabs[:4]
    return {"sx": [rows(sx_low), rows(sx_high)], "sy": [rows(sy_low), rows(sy_high)],
            "px": [rows(px_low), rows(px_high)], "py": [rows(py_low), rows(py_high)]}


def grid_coefficients(grid):
    """(k, (ca, cb)): the secondary factor c0 dt and the primary coefficients,
    scalars where the grid holds them as scalars, else full node arrays."""
    homogeneous, ca, cb, ca_nodes, cb_nodes = grid.primary_coef
    s_homogeneous, s_ca, s_cb = grid.secondary_coef[:3]
    if not s_homogeneous or s_ca != 1:
        raise NotImplementedError("TMz with a lossy or material secondary field")
    return s_cb, (ca, cb) if homogeneous else (ca_nodes, cb_nodes)


def _own_slab(kind: str, idx, b, c, psi, coef):
    """A slab with its own zero psi (the engine's belongs to the grid and its
    runs mutate it), less any entries with b = c = 0: padding that leaves
    the field unchanged, there only to fill the engine's vector blocks."""
    keep = np.flatnonzero((b != 0) | (c != 0))
    along_x = kind in ("sx", "px")
    psi = np.zeros((keep.size, psi.shape[1]) if along_x else (psi.shape[0], keep.size), psi.dtype)
    coef = coef[keep] if along_x else coef[:, keep]
    return idx[keep], b[keep], c[keep], psi, np.ascontiguousarray(coef)


class NumpyStepper:
    """Fields, psi and work arrays of one grid, and the step that advances them.

    block_rows: None updates each bulk field in whole-array operations; a row
    count updates it in strips of that many rows, so the scratch strip stays
    in cache on large grids (the arithmetic is the same either way).
    """

    def __init__(self, grid, block_rows: int | None = None):
        if not grid.electric_primary:
            raise NotImplementedError("the NumPy reference implements TMz only")
        if grid.periodic_x or grid.periodic_y:
            raise NotImplementedError("the NumPy reference handles wall and CPML sides only")
        self.grid = grid
        self.block_rows = block_rows
        dtype = grid.dtype
        nx, ny = grid.cells
        self.P, self.S1, self.S2 = grid.new_fields()
        P, S1, S2 = self.P, self.S1, self.S2
        self.slabs = {kind: [_own_slab(kind, *slab) for slab in slabs]
                      for kind, slabs in grid_slabs(grid).items()}

        strip = nx + 1 if block_rows is None else max(1, min(int(block_rows), nx + 1))
        work_a = np.empty(strip * (ny + 1), dtype)
        work_b = np.empty(strip * (ny + 1), dtype)
        shaped = lambda buf, rows, cols: buf[:rows * cols].reshape(rows, cols)

        k, (ca, cb) = grid_coefficients(grid)
        # k folded into the half-node grading: one pass fewer per secondary field.
        k_gyh = (k * grid.gyh).astype(dtype)[None, :]
        k_gxh = (k * grid.gxh).astype(dtype)[:, None]
        gxn = grid.gxn[:, None]
        gyn_inner = grid.gyn[None, 1:-1]
        node_coefs = np.ndim(ca) == 2

        secondary = []  # S1 -= k dP/dy, S2 += k dP/dx everywhere
        for r0 in range(0, nx + 1, strip):
            r1 = min(r0 + strip, nx + 1)
            w = shaped(work_a, r1 - r0, ny)
            secondary += [(np.subtract, P[r0:r1, 1:], P[r0:r1, :-1], w),
                          (np.multiply, w, k_gyh, w),
                          (np.subtract, S1[r0:r1], w, S1[r0:r1])]
            r1 = min(r1, nx)
            if r1 > r0:
                w = shaped(work_b, r1 - r0, ny + 1)
                secondary += [(np.subtract, P[r0 + 1:r1 + 1], P[r0:r1], w),
                              (np.multiply, w, k_gxh[r0:r1], w),
                              (np.add, S2[r0:r1], w, S2[r0:r1])]

        primary = []  # P = ca P + cb (dS2/dx - dS1/dy) on the inner nodes
        for r0 in range(1, nx, strip):
            r1 = min(r0 + strip, nx)
            wa = shaped(work_a, r1 - r0, ny - 1)
            wb = shaped(work_b, r1 - r0, ny - 1)
            P_strip = P[r0:r1, 1:-1]
            ca_strip = ca[r0:r1, 1:-1] if node_coefs else ca
            cb_strip = cb[r0:r1, 1:-1] if node_coefs else cb
            primary += [(np.subtract, S2[r0:r1, 1:-1], S2[r0 - 1:r1 - 1, 1:-1], wa),
                        (np.multiply, wa, gxn[r0:r1], wa),
                        (np.subtract, S1[r0:r1, 1:], S1[r0:r1, :-1], wb),
                        (np.multiply, wb, gyn_inner, wb),
                        (np.subtract, wa, wb, wa),
                        (np.multiply, wa, cb_strip, wa),
                        (np.multiply, P_strip, ca_strip, P_strip),
                        (np.add, P_strip, wa, P_strip)]

        slab_ops = self._slab_ops()
        self._ops = secondary + slab_ops["sx"] + slab_ops["sy"] + primary + slab_ops["px"] + slab_ops["py"]
        self._source_nodes = (grid.src_i, grid.src_j)
        self._source_coef = grid.src_coef
        self._probe_nodes = (grid.probe_i, grid.probe_j)

    def _slab_ops(self):
        """ufunc calls of the psi updates, by kind; they share one scratch buffer."""
        g = self.grid
        nx, ny = g.cells
        P, S1, S2 = self.P, self.S1, self.S2
        # kind: (along x, differenced field, target, sign, span, shift); span is
        # the cross-slab range updated: all of it for the secondary fields, the
        # inner nodes for P, whose wall nodes stay zero
        plans = {"sx": (True, P, S2, +1, slice(0, ny + 1), +1),
                 "sy": (False, P, S1, -1, slice(0, nx + 1), +1),
                 "px": (True, S2, P, +1, slice(1, ny), -1),
                 "py": (False, S1, P, -1, slice(1, nx), -1)}

        largest = 1
        for kind, slabs in self.slabs.items():
            cross = ny + 1 if plans[kind][0] else nx + 1
            largest = max([largest] + [slab[0].size * cross for slab in slabs])
        scratch = np.empty(largest, g.dtype)

        ops = {}
        for kind, (along_x, source, target, sign, span, shift) in plans.items():
            ops[kind] = []
            for idx, b, c, psi, coef in self.slabs[kind]:
                ops[kind] += self._slab_run_ops(idx, b, c, psi, coef, along_x, source, target,
                                                sign, span, shift, scratch)
        return ops

    @staticmethod
    def _slab_run_ops(idx, b, c, psi, coef, along_x, source, target, sign, span, shift, scratch):
        ops = []
        for k0, k1, lo, hi, descending in _contiguous_runs(idx):
            order = slice(None, None, -1) if descending else slice(None)
            # shift +1: the difference f[i+1] - f[i] lands on i (secondary);
            # shift -1: f[i] - f[i-1] lands on i (primary)
            up = slice(lo + 1, hi + 1) if shift > 0 else slice(lo, hi)
            down = slice(lo, hi) if shift > 0 else slice(lo - 1, hi - 1)
            here = slice(lo, hi)
            if along_x:
                psi_v = psi[k0:k1][order][:, span]
                coef_v = coef[k0:k1][order][:, span]
                b_v = b[k0:k1][order][:, None]
                c_v = c[k0:k1][order][:, None]
                f_up, f_down, t_v = source[up, span], source[down, span], target[here, span]
            else:
                psi_v = psi[:, k0:k1][:, order][span]
                coef_v = coef[:, k0:k1][:, order][span]
                b_v = b[k0:k1][order][None, :]
                c_v = c[k0:k1][order][None, :]
                f_up, f_down, t_v = source[span, up], source[span, down], target[span, here]
            w = scratch[:psi_v.size].reshape(psi_v.shape)
            ops += [(np.subtract, f_up, f_down, w),
                    (np.multiply, w, c_v, w),
                    (np.multiply, psi_v, b_v, psi_v),
                    (np.add, psi_v, w, psi_v),
                    (np.multiply, coef_v, psi_v, w),
                    (np.add if sign > 0 else np.subtract, t_v, w, t_v)]
        return ops

    def reset(self) -> None:
        """Back to t = 0: every field and psi zero."""
        for a in (self.P, self.S1, self.S2):
            a.fill(0)
        for slabs in self.slabs.values():
            for slab in slabs:
                slab[3].fill(0)

    def step(self, wave_value) -> None:
        for ufunc, a, b, out in self._ops:
            ufunc(a, b, out=out)
        self.P[self._source_nodes] += self._source_coef * wave_value

    def run(self, wave: np.ndarray, probe_out: np.ndarray | None = None) -> float:
        """Advance len(wave) steps from the current state; seconds taken.

        probe_out[n + 1] receives P at the probes after step n, as in the engine.
        """
        P = self.P
        probes = self._probe_nodes
        t0 = time.perf_counter()
        if probe_out is None:
            for value in wave:
                self.step(value)
        else:
            for n, value in enumerate(wave):
                self.step(value)
                probe_out[n + 1] = P[probes]
        return time.perf_counter() - t0


def run_numpy(scenario: Scenario, grid=None, stepper: NumpyStepper | None = None):
    """Run `scenario` from rest: (probe series (steps + 1, probes), seconds).
    A given stepper is reset and left holding the final fields."""
    if stepper is None:
        stepper = NumpyStepper(grid if grid is not None else build_grid(scenario))
    else:
        stepper.reset()
    g = stepper.grid
    wave = source_wave(scenario, g.dtype)
    probe_out = np.zeros((scenario.steps + 1, g.probe_i.size), g.dtype)
    elapsed = stepper.run(wave, probe_out)
    return probe_out, elapsed


# --- agreement with the numba engine ----------------------------------------

def agreement_scenarios(precision: str = "float64", steps: int = 200):
    """Small runs that exercise every slab, the corners and a material block."""
    cpml = Side(kind="cpml", cells=10, order=3.0, sigma_ratio=1.0)
    graded = Side(kind="cpml", cells=8, order=3.0, sigma_ratio=1.2, kappa_max=5.0, alpha_max=0.05)
    thick = Side(kind="cpml", cells=12, order=2.0, sigma_ratio=0.8, kappa_max=3.0, alpha_max=0.02)
    probes = (Probe("centre", 30, 30), Probe("near_left", 1, 20), Probe("near_top", 45, 59),
              Probe("corner", 59, 1))
    base = dict(dx=1e-3, dy=1e-3, nx=60, ny=60, steps=steps, courant=0.99, precision=precision,
                source=Source(x=22, y=35, f_max=12e9), probes=probes)
    return [
        Scenario(**base, boundary=Boundary.all_sides(cpml), title="cpml on four sides"),
        Scenario(**base, boundary=Boundary(left=graded, right=thick, bottom=Side(kind="wall"), top=cpml),
                 blocks=(Block(x0=35, x1=70, y0=-5, y1=18.5, eps_r=4.0, sigma=0.05),),
                 title="mixed sides, graded kappa and alpha, lossy block into the layer"),
    ]


def relative_difference(a: np.ndarray, b: np.ndarray) -> float:
    """max |a - b| over max |b|."""
    a, b = np.asarray(a, dtype=float), np.asarray(b, dtype=float)
    return float(np.abs(a - b).max() / max(np.abs(b).max(), np.finfo(float).tiny))


def check_against_engine(precision: str = "float64", rtol: float = 1e-12, steps: int = 200,
                         verbose: bool = True) -> float:
    """Run the engine (1 and 2 threads) and this reference (whole arrays and
    row strips) on small scenarios; the worst relative probe difference, each
    probe against its own peak.  Raises AssertionError if any exceeds rtol."""
    worst = 0.0
    for s in agreement_scenarios(precision, steps):
        names = [p.name for p in s.probes]
        engine = {}
        for threads in (1, 2):  # two threads split the sweep into row chunks
            r = simulate(s, threads=threads, keep_fields=True)
            engine[threads] = (np.stack([r.probes[n] for n in names], axis=1), r.state[0])
        if not np.all(np.abs(engine[1][0]).max(axis=0) > 0):
            raise AssertionError(f"{s.title}: a probe saw no field, the check would be empty")
        probe_worst = field_worst = 0.0
        for block_rows in (None, 7):  # 7 does not divide the 81 rows: a short last strip
            stepper = NumpyStepper(build_grid(s), block_rows=block_rows)
            series, _ = run_numpy(s, stepper=stepper)
            form = "whole arrays" if block_rows is None else f"{block_rows}-row strips"
            for threads, (e_series, e_P) in engine.items():
                probe_diff = max(relative_difference(series[:, m], e_series[:, m])
                                 for m in range(len(names)))
                if probe_diff > rtol:
                    raise AssertionError(f"{s.title}: NumPy ({form}) and engine ({threads} thread(s)) "
                                         f"probes differ by {probe_diff:.3e} relative (limit {rtol:g})")
                probe_worst = max(probe_worst, probe_diff)
                field_worst = max(field_worst, relative_difference(stepper.P, e_P))
        if verbose:
            print(f"  {s.title} ({precision}, {s.total_cells_x}x{s.total_cells_y}, {steps} steps): "
                  f"probes within {probe_worst:.1e}, final P within {field_worst:.1e} relative")
        worst = max(worst, probe_worst)
    return worst

if __name__ == "__main__":
    check_against_engine()
