"""The Yee grid of a scenario: material coefficients, kappa grading, psi slabs,
source and probe indices, all as plain arrays ready for the kernels."""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from .kernels import LANES
from .layer import LayerTable, layer_tables
from .scenario import Scenario
from .units import C0, EPS0, ETA0

Slab = tuple  # (start, b[n], c[n], psi 2D, coef 2D): see kernels.py


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
    primary_coef: tuple  # (homogeneous, ca, cb, ca array, cb array)
    secondary_coef: tuple  # (homogeneous, ca, cb, ca1, cb1, ca2, cb2)
    cb_primary: np.ndarray  # cb at every primary node (float64), for the source
    gxn: np.ndarray
    gxh: np.ndarray
    gyn: np.ndarray
    gyh: np.ndarray
    x_slabs: tuple  # (S2 low, S2 high, P low, P high, gxn, gxh): see kernels.step_rows
    y_slabs: tuple  # (S1 low, S1 high, P low, P high, gyn, gyh)
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
        """Slices of the primary array covering interior nodes 0..nx, 0..ny
        (0..n-1 along a periodic axis, whose node n repeats node 0)."""
        ox, oy = self.offset
        s = self.scenario
        return (slice(ox, ox + s.nx + (0 if self.periodic_x else 1)),
                slice(oy, oy + s.ny + (0 if self.periodic_y else 1)))


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
    """1/(kappa d) at nodes and half nodes, and the slab rows of each side as
    (start, b, c/d) for the half-node (secondary) and node (primary) psi."""
    g_node = np.ones(n_cells + 1)
    g_half = np.ones(n_cells)
    empty = (0, np.zeros(0), np.zeros(0))
    half_low = half_high = node_low = node_high = empty
    if low is not None:
        n = low.node_depth.size - 1
        g_node[: n + 1] = 1.0 / low.node_kappa[::-1]
        g_half[:n] = 1.0 / low.half_kappa[::-1]
        half_low = (0, low.half_b[::-1], low.half_c[::-1] / d)
        # nodes 1..n hold depths n-1..0; the wall node 0 stays zero
        node_low = (1, low.node_b[:n][::-1], low.node_c[:n][::-1] / d)
    if high is not None:
        n = high.node_depth.size - 1
        start = n_cells - n
        g_node[start:] = 1.0 / high.node_kappa
        g_half[start:] = 1.0 / high.half_kappa
        half_high = (start, high.half_b, high.half_c / d)
        node_high = (start, high.node_b[:n], high.node_c[:n] / d)
    return g_node / d, g_half / d, (half_low, half_high, node_low, node_high)


def _homogeneous(*arrays) -> bool:
    return all(np.all(a == a.flat[0]) for a in arrays)


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
    cast_scalar = dtype.type
    if electric_primary:
        ca_p, cb_p = _electric_coefficients(eps_p, sig_p, dt)
        homog = _homogeneous(ca_p, cb_p)
        primary_coef = (homog, cast_scalar(ca_p.flat[0]), cast_scalar(cb_p.flat[0]),
                        one if homog else cast(ca_p), one if homog else cast(cb_p))
        secondary_coef = (True, cast_scalar(1.0), cast_scalar(k64), one, one, one, one)
        cb_primary = cb_p
        cb_s1 = cb_s2 = None
    else:
        ca1, cb1 = _electric_coefficients(eps_1, sig_1, dt)
        ca2, cb2 = _electric_coefficients(eps_2, sig_2, dt)
        homog = _homogeneous(ca1, cb1, ca2, cb2)
        secondary_coef = (homog, cast_scalar(ca1.flat[0]), cast_scalar(cb1.flat[0])) + (
            (one,) * 4 if homog else (cast(ca1), cast(cb1), cast(ca2), cast(cb2)))
        primary_coef = (True, cast_scalar(1.0), cast_scalar(k64), one, one)
        cb_primary = np.full(eps_p.shape, k64)
        cb_s1, cb_s2 = cb1, cb2
    gxn, gxh, x_rows = _grading_1d(NX, s.dx, tables.get("left"), tables.get("right"))
    gyn, gyh, y_rows = _grading_1d(NY, s.dy, tables.get("bottom"), tables.get("top"))

    def slab(rows, along_x: bool, coef_full):
        """(start, b, c, psi, coef) of one side; coef_full None: the vacuum factor c0 dt."""
        start, b, c = rows
        n = b.size
        shape = (n, NY + 1) if along_x else (NX + 1, n)
        if coef_full is None:
            coef = np.full(shape, k64)
        else:
            coef = coef_full[start:start + n, :] if along_x else coef_full[:, start:start + n]
        return np.int64(start), cast(b), cast(c), np.zeros(shape, dtype), cast(coef)

    def pad_columns(rows, low: bool, first_col: int, last_col: int):
        """Pad a y-slab to whole LANES-column blocks on its interior side, if the
        padded columns stay within first_col..last_col."""
        start, b, c = rows
        n = b.size
        extra = (-n) % LANES
        if n == 0 or extra == 0:
            return rows
        if low and start + n + extra - 1 <= last_col:
            return start, np.concatenate([b, np.zeros(extra)]), np.concatenate([c, np.zeros(extra)])
        if not low and start - extra >= first_col:
            return start - extra, np.concatenate([np.zeros(extra), b]), np.concatenate([np.zeros(extra), c])
        return rows

    def pad_pair(low_rows, high_rows, first_col: int, last_col: int):
        """Both y-slabs of one field, padded without reaching into each other:
        the kernels update a slab's columns in the same pass as the field."""
        high_start = high_rows[0] if high_rows[1].size else last_col + 1
        low_rows = pad_columns(low_rows, True, first_col, high_start - 1)
        low_end = low_rows[0] + low_rows[1].size if low_rows[1].size else first_col
        return low_rows, pad_columns(high_rows, False, low_end, last_col)

    # S1 columns 0..NY-1 exist; P's y-psi must stay on inner columns 1..NY-1
    y_rows = pad_pair(y_rows[0], y_rows[1], 0, NY - 1) + pad_pair(y_rows[2], y_rows[3], 1, NY - 1)
    gxn, gxh, gyn, gyh = cast(gxn), cast(gxh), cast(gyn), cast(gyh)
    x_slabs = (slab(x_rows[0], True, cb_s2), slab(x_rows[1], True, cb_s2),
               slab(x_rows[2], True, cb_primary), slab(x_rows[3], True, cb_primary), gxn, gxh)
    y_slabs = (slab(y_rows[0], False, cb_s1), slab(y_rows[1], False, cb_s1),
               slab(y_rows[2], False, cb_primary), slab(y_rows[3], False, cb_primary), gyn, gyh)

    px, py = bnd.periodic_x, bnd.periodic_y
    src = s.source
    si, sj = ox + src.x, oy + src.y
    if src.line == "y":  # the axis is periodic (validated): every distinct node
        nodes = [(si, j) for j in range(NY)]
    elif src.line == "x":
        nodes = [(i, sj) for i in range(NX)]
    else:
        nodes = [(si, sj)]
    src_i = np.array([n[0] for n in nodes], dtype=np.int64)
    src_j = np.array([n[1] for n in nodes], dtype=np.int64)
    drive = -ETA0 * src.amplitude / (s.dx * s.dy)
    src_coef = cast(cb_primary[src_i, src_j] * drive)

    probe_i = np.array([ox + p.x for p in s.probes], dtype=np.int64)
    probe_j = np.array([oy + p.y for p in s.probes], dtype=np.int64)
    return YeeGrid(
        scenario=s, dtype=dtype, cells=(NX, NY), offset=(ox, oy), periodic_x=px, periodic_y=py,
        electric_primary=electric_primary, eps_p=eps_p, eps_1=eps_1, eps_2=eps_2,
        primary_coef=primary_coef, secondary_coef=secondary_coef,
        cb_primary=cb_primary, gxn=gxn, gxh=gxh, gyn=gyn, gyh=gyh,
        x_slabs=x_slabs, y_slabs=y_slabs,
        src_i=src_i, src_j=src_j, src_coef=src_coef,
        probe_i=probe_i, probe_j=probe_j, tables=tables)
