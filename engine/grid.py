"""The Yee grid of a scenario: material coefficients, kappa grading, psi slabs,
source and probe indices, all as plain arrays ready for the kernels."""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from .layer import LayerTable, layer_tables
from .scenario import Scenario
from .units import C0, EPS0, ETA0

Slab = tuple  # (idx int64[n], b[n], c[n], psi 2D, coef 2D)


@dataclass
class YeeGrid:
    """Arrays for one run.  Index (i, j) is a grid node; the interior node
    (0, 0) is grid node `offset`.  See kernels.py for the field layout."""

    scenario: Scenario
    dtype: np.dtype
    cells: tuple[int, int]
    offset: tuple[int, int]
    periodic_x: bool
    periodic_y: bool
    electric_primary: bool
    eps_p: np.ndarray  # eps_r at primary nodes (float64)
    eps_1: np.ndarray  # eps_r at S1 positions
    eps_2: np.ndarray  # eps_r at S2 positions
    ca_p: np.ndarray
    cb_p: np.ndarray
    ca1: np.ndarray
    cb1: np.ndarray
    ca2: np.ndarray
    cb2: np.ndarray
    k: np.floating
    edge_ca: np.ndarray
    edge_cb: np.ndarray
    gxn: np.ndarray
    gxh: np.ndarray
    gyn: np.ndarray
    gyh: np.ndarray
    slab_sx: Slab
    slab_sy: Slab
    slab_px: Slab
    slab_py: Slab
    edge_i: np.ndarray
    edge_j: np.ndarray
    src_i: np.ndarray
    src_j: np.ndarray
    src_coef: np.ndarray
    probe_i: np.ndarray
    probe_j: np.ndarray
    tables: dict[str, LayerTable]

    @property
    def shape(self) -> tuple[int, int]:
        return self.cells[0] + 1, self.cells[1] + 1

    def new_fields(self):
        nx, ny = self.cells
        z = np.zeros
        return z((nx + 1, ny + 1), self.dtype), z((nx + 1, ny), self.dtype), z((nx, ny + 1), self.dtype)

    def interior_slice(self):
        """Slices of the primary array covering interior nodes 0..nx, 0..ny."""
        ox, oy = self.offset
        s = self.scenario
        return slice(ox, ox + s.nx + 1), slice(oy, oy + s.ny + 1)


def _overlap(centres: np.ndarray, lo: float, hi: float) -> np.ndarray:
    """Fraction of each unit cell centred at `centres` that lies in [lo, hi]."""
    return np.clip(np.minimum(centres + 0.5, hi) - np.maximum(centres - 0.5, lo), 0.0, 1.0)


def _paint(s: Scenario, xs: np.ndarray, ys: np.ndarray):
    """eps_r and sigma at points (xs x ys, interior cell units), blocks painted
    in order with area-weighted averaging over each point's dual cell."""
    eps = np.full((xs.size, ys.size), s.eps_r)
    sig = np.full((xs.size, ys.size), s.sigma)
    for b in s.blocks:
        f = np.outer(_overlap(xs, b.x0, b.x1), _overlap(ys, b.y0, b.y1))
        eps += (b.eps_r - eps) * f
        sig += (b.sigma - sig) * f
    return eps, sig


def _electric_coefficients(eps: np.ndarray, sig: np.ndarray, dt: float):
    """ca, cb of a lossy dielectric in normalised units (cb multiplies eta0 curl H)."""
    loss = sig * dt / (2.0 * EPS0 * eps)
    return (1.0 - loss) / (1.0 + loss), (C0 * dt / eps) / (1.0 + loss)


def _grading_1d(n_cells: int, d: float, low: LayerTable | None, high: LayerTable | None):
    """1/(kappa d) at nodes and half nodes, and the slab rows with b and c/d."""
    g_node = np.ones(n_cells + 1)
    g_half = np.ones(n_cells)
    rows_half, b_half, c_half, rows_node, b_node, c_node = [], [], [], [], [], []
    if low is not None:
        n = low.node_depth.size - 1
        k = np.arange(n + 1)
        g_node[n - k] = 1.0 / low.node_kappa
        kh = np.arange(n)
        g_half[n - 1 - kh] = 1.0 / low.half_kappa
        rows_half += list(n - 1 - kh)
        b_half += list(low.half_b)
        c_half += list(low.half_c)
        rows_node += list(n - kh)  # depths 0..n-1: nodes n..1 (the wall node stays zero)
        b_node += list(low.node_b[:n])
        c_node += list(low.node_c[:n])
    if high is not None:
        n = high.node_depth.size - 1
        start = n_cells - n
        g_node[start:] = 1.0 / high.node_kappa
        g_half[start:] = 1.0 / high.half_kappa
        rows_half += list(start + np.arange(n))
        b_half += list(high.half_b)
        c_half += list(high.half_c)
        rows_node += list(start + np.arange(n))
        b_node += list(high.node_b[:n])
        c_node += list(high.node_c[:n])
    as_int = lambda v: np.asarray(v, dtype=np.int64)
    return (g_node / d, g_half / d, (as_int(rows_half), np.asarray(b_half), np.asarray(c_half) / d),
            (as_int(rows_node), np.asarray(b_node), np.asarray(c_node) / d))


def build_grid(s: Scenario) -> YeeGrid:
    """All arrays for running scenario `s`."""
    dtype = np.dtype(s.precision)
    cast = lambda a: np.ascontiguousarray(a, dtype=dtype)
    bnd = s.boundary
    NX, NY = s.total_cells_x, s.total_cells_y
    ox, oy = s.offset
    dt = s.dt
    electric_primary = s.polarization == "TMz"
    tables = layer_tables(s)

    x_node = np.arange(NX + 1) - float(ox)
    y_node = np.arange(NY + 1) - float(oy)
    x_half = np.arange(NX) + 0.5 - ox
    y_half = np.arange(NY) + 0.5 - oy
    eps_p, sig_p = _paint(s, x_node, y_node)
    eps_1, sig_1 = _paint(s, x_node, y_half)
    eps_2, sig_2 = _paint(s, x_half, y_node)
    k64 = C0 * dt
    one = np.ones((1, 1), dtype)
    if electric_primary:
        ca_p, cb_p = (cast(a) for a in _electric_coefficients(eps_p, sig_p, dt))
        ca1 = cb1 = ca2 = cb2 = one
        edge_ca, edge_cb = ca_p, cb_p
        src_scale = cb_p
    else:
        ca1, cb1 = (cast(a) for a in _electric_coefficients(eps_1, sig_1, dt))
        ca2, cb2 = (cast(a) for a in _electric_coefficients(eps_2, sig_2, dt))
        ca_p = cb_p = one
        edge_ca, edge_cb = one, cast(np.full((1, 1), k64))
        src_scale = None

    gxn, gxh, x_half_rows, x_node_rows = _grading_1d(NX, s.dx, tables.get("left"), tables.get("right"))
    gyn, gyh, y_half_rows, y_node_rows = _grading_1d(NY, s.dy, tables.get("bottom"), tables.get("top"))

    def slab(rows, along_x: bool, coef_full):
        idx, b, c = rows
        shape = (idx.size, NY + 1) if along_x else (NX + 1, idx.size)
        if coef_full is None:
            coef = np.full(shape, k64)
        else:
            coef = coef_full[idx, :] if along_x else coef_full[:, idx]
        return idx, cast(b), cast(c), np.zeros(shape, dtype), cast(coef)

    slab_sx = slab(x_half_rows, True, None if electric_primary else cb2)
    slab_sy = slab(y_half_rows, False, None if electric_primary else cb1)
    slab_px = slab(x_node_rows, True, cb_p if electric_primary else None)
    slab_py = slab(y_node_rows, False, cb_p if electric_primary else None)

    # nodes on a periodic seam need wrapped neighbours
    px, py = bnd.periodic_x, bnd.periodic_y
    edges = set()
    if px:
        edges |= {(0, j) for j in range(0 if py else 1, NY)}
    if py:
        edges |= {(i, 0) for i in range(0 if px else 1, NX)}
    edge_list = sorted(edges)
    edge_i = np.array([e[0] for e in edge_list], dtype=np.int64)
    edge_j = np.array([e[1] for e in edge_list], dtype=np.int64)

    src = s.source
    si, sj = ox + src.x, oy + src.y
    if src.line == "y":
        js = np.arange(0, NY) if py else np.arange(oy, oy + s.ny + 1)
        nodes = [(si, j) for j in js]
    elif src.line == "x":
        is_ = np.arange(0, NX) if px else np.arange(ox, ox + s.nx + 1)
        nodes = [(i, sj) for i in is_]
    else:
        nodes = [(si, sj)]
    src_i = np.array([n[0] for n in nodes], dtype=np.int64)
    src_j = np.array([n[1] for n in nodes], dtype=np.int64)
    drive = -ETA0 * src.amplitude / (s.dx * s.dy)
    scale = np.full(src_i.size, k64) if src_scale is None else np.asarray(src_scale[src_i, src_j], dtype=float)
    src_coef = cast(scale * drive)

    probe_i = np.array([ox + p.x for p in s.probes], dtype=np.int64)
    probe_j = np.array([oy + p.y for p in s.probes], dtype=np.int64)
    return YeeGrid(
        scenario=s, dtype=dtype, cells=(NX, NY), offset=(ox, oy), periodic_x=px, periodic_y=py,
        electric_primary=electric_primary, eps_p=eps_p, eps_1=eps_1, eps_2=eps_2,
        ca_p=ca_p, cb_p=cb_p, ca1=ca1, cb1=cb1, ca2=ca2, cb2=cb2, k=dtype.type(k64),
        edge_ca=edge_ca, edge_cb=edge_cb,
        gxn=cast(gxn), gxh=cast(gxh), gyn=cast(gyn), gyh=cast(gyh),
        slab_sx=slab_sx, slab_sy=slab_sy, slab_px=slab_px, slab_py=slab_py,
        edge_i=edge_i, edge_j=edge_j, src_i=src_i, src_j=src_j, src_coef=src_coef,
        probe_i=probe_i, probe_j=probe_j, tables=tables)
