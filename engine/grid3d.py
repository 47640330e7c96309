"""A small 3D box for confirming a 2D-tuned layer, and its arrays for the kernels.

The box is derived from a 2D Scenario (`box_from_scenario`): the same cell
size (dz = the smaller of dx and dy), Courant number (as a fraction of the 3D
limit), host medium, band and layer settings.  Its interior is a cube of side
2 D around the source, D being the source's distance to its nearest CPML face
in 2D, so the echo from the measured face travels as far as in 2D.  The x and
y faces carry the 2D left/right and bottom/top layers, both z faces the layer
of that nearest side.  A z-directed electric dipole (TMz) or magnetic dipole
(TEz) fires the scenario's pulse; probes sit FACE_GAP cells in front of the
centre of the measured face, of its edge with the z-high face, and of the
corner those two share with a third face.  2D sides of kind "wall" become
electric walls; periodic sides and material blocks have no 3D counterpart
here and are refused or reported.
"""

from __future__ import annotations

import hashlib
import json
import math
from dataclasses import dataclass, field

import numpy as np

from .errors import ScenarioError
from .kernels3d import full_window
from .layer import grade, recursive_convolution
from .scenario import Scenario, Side
from .units import C0, EPS0, ETA0
from .waveforms import Pulse, design_pulse

FACES = ("x_low", "x_high", "y_low", "y_high", "z_low", "z_high")
FACE_OF_SIDE = {"left": "x_low", "right": "x_high", "bottom": "y_low", "top": "y_high"}
FACE_GAP = 3  # cells between a probe and the layer faces it is near
MIN_HALF_WIDTH = FACE_GAP + 4
MAX_HALF_WIDTH = 40
# The 3D pulse is switched on this many envelope widths before its centre: where
# the envelope is below the precision's resolution (exp(-16) ~ 1e-7 for float32),
# shorter than the 2D engine's 5.5 widths, which saves steps the reference pays
# for in the fourth power.  Test and reference share the switch-on exactly.
SWITCH_ON_WIDTHS = {"float32": 4.0, "float64": 5.5}
# The windowed reference costs about (steps / 2)^4 / 8 cell updates (it runs one
# octant) and its grid spans about steps / 2 cells per axis: 700 steps (about 50
# cells per wavelength at f_max) is some 25 s and 1.5 GB of float32 fields here
# (scaled from the demo's 271 steps: 0.5 s).
MAX_STEPS_3D = 700


@dataclass(frozen=True)
class Box3D:
    """One 3D run: interior cells (nx, ny, nz) of size d = (dx, dy, dz) m, time
    step dt s, run length `steps`, the six faces (a CPML Side, or None for an
    electric wall), the source node and probe nodes in interior cell units.

    source_magnetic: a z-directed magnetic dipole on Hz (the TEz dual) instead
    of an electric one on Ez; probes then record Hz, else Ez.
    amplitude: current moment I l / dz in A (as the 2D line current).
    """

    cells: tuple
    d: tuple
    dt: float
    steps: int
    faces: tuple
    source: tuple
    pulse: Pulse
    probes: tuple = ()  # ((name, (x, y, z)), ...)
    eps_r: float = 1.0
    sigma: float = 0.0
    precision: str = "float32"
    amplitude: float = 1.0
    source_magnetic: bool = False
    measured_face: str = "x_high"
    band: tuple = (0.0, math.inf)  # f_min, f_max of the spectra, Hz
    notes: tuple = field(default=(), compare=False)

    @property
    def courant_limit_dt(self) -> float:
        """The 3D stability limit 1 / (c sqrt(1/dx^2 + 1/dy^2 + 1/dz^2)) in the host (Taflove & Hagness)."""
        return math.sqrt(self.eps_r) / (C0 * math.sqrt(sum(1.0 / v**2 for v in self.d)))

    def layer_cells(self, face: str) -> int:
        side = self.faces[FACES.index(face)]
        return 0 if side is None else side.cells

    @property
    def offset(self) -> tuple:
        """Grid cell of the interior node (0, 0, 0)."""
        return tuple(self.layer_cells(FACES[2 * a]) for a in range(3))

    @property
    def total_cells(self) -> tuple:
        return tuple(self.cells[a] + self.layer_cells(FACES[2 * a]) + self.layer_cells(FACES[2 * a + 1])
                     for a in range(3))

    @property
    def quantity(self) -> str:
        return "Hz (A/m)" if self.source_magnetic else "Ez (V/m)"

    def describe(self) -> str:
        nx, ny, nz = self.cells
        tx, ty, tz = self.total_cells
        return (f"{nx} x {ny} x {nz} interior cells, {tx} x {ty} x {tz} with the layers "
                f"({tx * ty * tz:,} cells), {self.steps} steps of {self.dt * 1e12:.3g} ps")

    def reference_key(self) -> str:
        """Stable hash of everything the reflection-free reference depends on (not the layers)."""
        data = dict(version=1, cells=self.cells, d=self.d, dt=self.dt, steps=self.steps, source=self.source,
                    pulse=[self.pulse.kind, self.pulse.tau, self.pulse.t0, self.pulse.f_c],
                    probes=[[n, list(p)] for n, p in self.probes], eps_r=self.eps_r, sigma=self.sigma,
                    precision=self.precision, amplitude=self.amplitude, magnetic=self.source_magnetic)
        text = json.dumps(data, sort_keys=True, separators=(",", ":"))
        return hashlib.sha256(text.encode()).hexdigest()


def _nearest_cpml_side(s: Scenario):
    """(side name, distance in cells) of the CPML face nearest the source."""
    src = s.source
    distances = {"left": src.x, "right": s.nx - src.x, "bottom": src.y, "top": s.ny - src.y}
    cpml = [n for n in ("right", "top", "left", "bottom") if getattr(s.boundary, n).kind == "cpml"]
    if not cpml:
        raise ScenarioError("layer", "no CPML side", "at least one side of kind 'cpml' to confirm in 3D")
    name = min(cpml, key=lambda n: distances[n])
    return name, distances[name]


def box_from_scenario(s: Scenario, half_width: int | None = None, lateral: int | None = None) -> Box3D:
    """The 3D confirmation box of a 2D scenario (see the module text).

    half_width: cells from the source to the measured face and the face
    opposite (default: the source's distance to its nearest CPML face in 2D,
    kept within MIN_HALF_WIDTH..MAX_HALF_WIDTH); lateral: cells from the
    source to the four other faces (default half_width).
    """
    for name in ("left", "right", "bottom", "top"):
        if getattr(s.boundary, name).kind == "periodic":
            raise ScenarioError(f"layer.{name}.kind", "periodic",
                                "'cpml' or 'wall' for a 3D confirmation (the 3D box has no periodic sides)")
    measured, distance = _nearest_cpml_side(s)
    if half_width is None:
        half_width = min(max(distance, MIN_HALF_WIDTH), MAX_HALF_WIDTH)
    lateral = half_width if lateral is None else lateral
    for name, value in (("half_width", half_width), ("lateral", lateral)):
        if not (isinstance(value, int) and MIN_HALF_WIDTH <= value <= 200):
            raise ScenarioError(name, value, f"a whole number of cells from {MIN_HALF_WIDTH} to 200")
    d = (s.dx, s.dy, min(s.dx, s.dy))
    layer = getattr(s.boundary, measured)
    faces = {FACE_OF_SIDE[name]: (getattr(s.boundary, name) if getattr(s.boundary, name).kind == "cpml" else None)
             for name in FACE_OF_SIDE}
    faces["z_low"] = faces["z_high"] = layer
    face = FACE_OF_SIDE[measured]
    axis, high = "xyz".index(face[0]), face.endswith("high")
    other = 1 - axis  # the in-plane axis of the 2D scenario
    half = [lateral] * 3
    half[axis] = half_width
    n = [2 * v for v in half]
    other_high = faces[FACES[2 * other + 1]] is not None or faces[FACES[2 * other]] is None
    near = lambda a, up: n[a] - FACE_GAP if up else FACE_GAP
    face_probe = list(half)
    face_probe[axis] = near(axis, high)
    edge_probe = list(face_probe)
    edge_probe[2] = near(2, True)
    corner_probe = list(edge_probe)
    corner_probe[other] = near(other, other_high)
    other_face = FACES[2 * other + (1 if other_high else 0)]
    probes = ((f"face ({face})", tuple(face_probe)), (f"edge ({face}, z_high)", tuple(edge_probe)),
              (f"corner ({face}, {other_face}, z_high)", tuple(corner_probe)))

    dt = s.courant / (C0 * math.sqrt(sum(1.0 / v**2 for v in d)))
    base = design_pulse(s.source.waveform, s.source.f_min, s.source.f_max)
    widths = SWITCH_ON_WIDTHS[s.precision]
    pulse = Pulse(kind=base.kind, tau=base.tau, t0=widths * base.tau, f_c=base.f_c)
    # long enough for the pulse to end and its echo off the farthest face (through the
    # deepest layer and back) to reach the farthest probe
    v = C0 / math.sqrt(s.eps_r)
    deepest = max((f.cells * d[FACES.index(k) // 2] for k, f in faces.items() if f is not None), default=0.0)
    farthest_echo = 0.0
    for _, p in probes:
        for a in range(3):
            for image in (-half[a], 3 * half[a]):  # the source mirrored in each face of the axis
                dist = [(p[b] - half[b]) * d[b] for b in range(3)]
                dist[a] = (p[a] - image) * d[a]
                farthest_echo = max(farthest_echo, math.sqrt(sum(x * x for x in dist)))
    duration = 2 * widths * pulse.tau + (farthest_echo + 2 * deepest) / v
    steps = int(math.ceil(duration / dt))
    if steps > MAX_STEPS_3D:
        raise ScenarioError("source.f_max", s.source.f_max,
                            f"a band the 3D box covers in at most {MAX_STEPS_3D} steps: this one needs {steps} "
                            f"at {s.cells_per_wavelength:.0f} cells per wavelength; the 3D check takes up to "
                            "about 50 (a coarser cell or a higher f_max)")
    notes = []
    if s.blocks:
        notes.append(f"the 3D box is filled with the host medium only ({len(s.blocks)} material block(s) "
                     "of the 2D scenario are not carried over)")
    if any(getattr(s.boundary, k).kind == "wall" for k in FACE_OF_SIDE):
        notes.append("2D wall sides are electric walls in 3D")
    return Box3D(cells=tuple(n), d=d, dt=dt, steps=steps, faces=tuple(faces[f] for f in FACES),
                 source=tuple(half), pulse=pulse, probes=probes, eps_r=s.eps_r, sigma=s.sigma,
                 precision=s.precision, amplitude=s.source.amplitude,
                 source_magnetic=s.polarization == "TEz", measured_face=face,
                 band=(s.source.f_min, s.source.f_max), notes=tuple(notes))


# --- arrays for the kernels ------------------------------------------------

@dataclass
class Axis:
    """One axis' grading: 1/(kappa d) at nodes and half nodes, psi maps and b, c/d."""

    g_node: np.ndarray
    g_half: np.ndarray
    map_node: np.ndarray
    map_half: np.ndarray
    b_node: np.ndarray
    c_node: np.ndarray
    b_half: np.ndarray
    c_half: np.ndarray
    z_node: tuple  # (lo, hi) of the slab k ranges, for the z axis
    z_half: tuple
    rows_node: int
    rows_half: int


def _axis(n_cells: int, d: float, dt: float, eps_r: float, low: Side | None, high: Side | None) -> Axis:
    """Grading along one axis with its low and high layers (None: no layer)."""
    g_node, g_half = np.ones(n_cells + 1), np.ones(n_cells)
    b_node, c_node = np.zeros(n_cells + 1), np.zeros(n_cells + 1)
    b_half, c_half = np.zeros(n_cells), np.zeros(n_cells)
    map_node = np.full(n_cells + 1, -1, np.int64)
    map_half = np.full(n_cells, -1, np.int64)
    n_lo = low.cells if low is not None else 0
    n_hi = high.cells if high is not None else 0
    for side, n, is_low in ((low, n_lo, True), (high, n_hi, False)):
        if side is None:
            continue
        # node depths 0..n (inner face to wall), half-node depths 1/2..n-1/2
        for nodes, depth_cells in ((True, np.arange(n + 1.0)), (False, np.arange(n) + 0.5)):
            sigma, kappa, alpha = grade(side, d, eps_r, depth_cells * d)
            b, c = recursive_convolution(sigma, kappa, alpha, dt)
            if nodes:
                # psi on nodes 1..n (low) or NX-n..NX-1 (high): the wall node stays zero
                idx = n - np.arange(n + 1) if is_low else n_cells - n + np.arange(n + 1)
                g_node[idx] = 1.0 / kappa
                psi_idx, take = (idx[:n], slice(0, n))
                b_node[psi_idx], c_node[psi_idx] = b[take], c[take] / d
            else:
                idx = n - 1 - np.arange(n) if is_low else n_cells - n + np.arange(n)
                g_half[idx] = 1.0 / kappa
                b_half[idx], c_half[idx] = b, c / d
    node_rows = [i for i in range(n_cells + 1) if (1 <= i <= n_lo) or (n_cells - n_hi <= i < n_cells and n_hi)]
    half_rows = [i for i in range(n_cells) if i < n_lo or i >= n_cells - n_hi]
    map_node[node_rows] = np.arange(len(node_rows))
    map_half[half_rows] = np.arange(len(half_rows))
    z_node = (n_lo + 1 if n_lo else 0, n_cells - n_hi)
    z_half = (n_lo, n_cells - n_hi)
    return Axis(g_node=g_node / d, g_half=g_half / d, map_node=map_node, map_half=map_half,
                b_node=b_node, c_node=c_node, b_half=b_half, c_half=c_half, z_node=z_node, z_half=z_half,
                rows_node=len(node_rows), rows_half=len(half_rows))


@dataclass
class Grid3D:
    """Arrays for one 3D run; see kernels3d for the layout."""

    box: Box3D
    dtype: np.dtype
    shape: tuple  # (NX+1, NY+1, NZ+1)
    offset: tuple
    fields: tuple  # Ex, Ey, Ez, Hx, Hy, Hz (H as eta0 H)
    ca: float
    cb: float
    cdt: float
    h_args: tuple  # everything h_rows takes after the fields and c0 dt, but the window
    e_args: tuple
    flat_fields: tuple  # the fields as (NX+1, (NY+1)(NZ+1)) views, for the whole-grid kernels
    axes: list  # Axis of x, y, z
    psi: tuple
    source_node: tuple  # grid indices of the driven component
    source_coef: float
    probe_nodes: np.ndarray  # (n_probes, 3) grid indices
    interior: tuple  # (i0, i1, j0, j1, k0, k1): grid cells of the interior nodes 0..n per axis
    used: bool = False
    _planes: tuple | None = None

    @property
    def plane_args(self) -> tuple:
        """(h, e): what h_planes and e_planes take after the fields and c0 dt (or ca, cb).
        Made on first use: their whole-plane y- and z-psi arrays would cost a reference
        grid, which runs in the window, several fields' worth of memory."""
        if self._planes is None:
            self._planes = _plane_args(self.shape, self.axes, self.dtype, self.psi)
        return self._planes[:2]

    def probe_field(self):
        Ex, Ey, Ez, Hx, Hy, Hz = self.fields
        return Hz if self.box.source_magnetic else Ez

    def interior_box(self) -> tuple:
        return self.interior

    def full_window(self) -> np.ndarray:
        return full_window(self.shape)

    def reset(self) -> None:
        """Zero fields and psi, unless the grid has not been run yet."""
        if self.used:
            for a in self.fields + self.psi + (self._planes[2] if self._planes else ()):
                a.fill(0)
        self.used = True


def build_grid3d(box: Box3D) -> Grid3D:
    """All arrays for running `box` (fields and psi start at zero)."""
    dtype = np.dtype(box.precision)
    cast = lambda a: np.ascontiguousarray(a, dtype=dtype)
    NX, NY, NZ = box.total_cells
    shape = (NX + 1, NY + 1, NZ + 1)
    f = box.faces
    ax = [_axis(box.total_cells[a], box.d[a], box.dt, box.eps_r, f[2 * a], f[2 * a + 1]) for a in range(3)]
    fields = tuple(np.zeros(shape, dtype) for _ in range(6))
    x, y, z = ax
    # psi arrays, only in the slabs: H (half rows), E (node rows)
    nz_h = z.z_half[0] + (NZ - z.z_half[1])
    nz_e = z.z_node[0] + (NZ - z.z_node[1])
    psi_h = (np.zeros((x.rows_half, NY + 1, NZ + 1), dtype), np.zeros((x.rows_half, NY + 1, NZ + 1), dtype),
             np.zeros((NX + 1, y.rows_half, NZ + 1), dtype), np.zeros((NX + 1, y.rows_half, NZ + 1), dtype),
             np.zeros((NX + 1, NY + 1, nz_h), dtype), np.zeros((NX + 1, NY + 1, nz_h), dtype))
    psi_e = (np.zeros((x.rows_node, NY + 1, NZ + 1), dtype), np.zeros((x.rows_node, NY + 1, NZ + 1), dtype),
             np.zeros((NX + 1, y.rows_node, NZ + 1), dtype), np.zeros((NX + 1, y.rows_node, NZ + 1), dtype),
             np.zeros((NX + 1, NY + 1, nz_e), dtype), np.zeros((NX + 1, NY + 1, nz_e), dtype))
    loss = box.sigma * box.dt / (2.0 * EPS0 * box.eps_r)
    ca = (1.0 - loss) / (1.0 + loss)
    cb = (C0 * box.dt / box.eps_r) / (1.0 + loss)
    cdt = C0 * box.dt
    scalar = dtype.type
    h_args = (cast(x.g_half), cast(y.g_half), cast(z.g_half), x.map_half, y.map_half,
              np.int64(z.z_half[0]), np.int64(z.z_half[1]), cast(x.b_half), cast(x.c_half),
              cast(y.b_half), cast(y.c_half), cast(z.b_half), cast(z.c_half)) + psi_h
    e_args = (cast(x.g_node), cast(y.g_node), cast(z.g_node), x.map_node, y.map_node,
              np.int64(z.z_node[0]), np.int64(z.z_node[1]), cast(x.b_node), cast(x.c_node),
              cast(y.b_node), cast(y.c_node), cast(z.b_node), cast(z.c_node)) + psi_e
    flat_fields = tuple(a.reshape(shape[0], -1) for a in fields)
    offset = box.offset
    src = tuple(offset[a] + box.source[a] for a in range(3))
    dx, dy, dz = box.d
    # a current moment I l along z over one cell: J = I / (dx dy); E -= (dt/eps) J.
    # The magnetic dual: M = eta0 I / (dx dy) on Hz; eta0 H -= c0 dt M.
    drive = -ETA0 * box.amplitude / (dx * dy)
    source_coef = (cdt if box.source_magnetic else cb) * drive
    probe_nodes = np.array([[offset[a] + p[a] for a in range(3)] for _, p in box.probes], dtype=np.int64)
    return Grid3D(box=box, dtype=dtype, shape=shape, offset=offset, fields=fields, ca=scalar(ca), cb=scalar(cb),
                  cdt=scalar(cdt), h_args=h_args, e_args=e_args, flat_fields=flat_fields, axes=ax,
                  psi=psi_h + psi_e, source_node=src,
                  source_coef=float(source_coef), probe_nodes=probe_nodes.reshape(-1, 3),
                  interior=tuple(v for a in range(3) for v in (offset[a], offset[a] + box.cells[a] + 1)))


def _y_runs(row_map: np.ndarray, s: int, first: int, last: int) -> np.ndarray:
    """(first m, end m, 1 in a y-slab else 0) of the runs of rows first..last-1 of a plane
    (m = j s + k), split where the rows enter or leave a y-slab."""
    runs = []
    for j in range(first, last):
        slab = int(row_map[j] >= 0)
        if runs and runs[-1][2] == slab:
            runs[-1][1] = (j + 1) * s
        else:
            runs.append([j * s, (j + 1) * s, slab])
    return np.array(runs, dtype=np.int64).reshape(-1, 3)


def _plane_args(shape, ax, dtype, psi):
    """Arguments of the whole-grid kernels (kernels3d.h_planes, e_planes) and their own
    psi arrays: grading per (j, k), zero where a component is not updated; b and c of
    the y- and z-slabs per (j, k), zero outside the slabs; x-psi as flat views of the
    slab planes, y- and z-psi over whole planes."""
    x, y, z = ax
    cast = lambda a: np.ascontiguousarray(a, dtype=dtype)
    nxp, nyp, nzp = shape
    ny, nz = nyp - 1, nzp - 1
    j = np.arange(nyp)[:, None]
    k = np.arange(nzp)[None, :]
    pad = lambda a, n: np.concatenate([a, np.zeros(n - a.size)])
    flat = lambda a: cast(np.broadcast_to(a, (nyp, nzp)).reshape(-1))
    gyh, gzh = pad(y.g_half, nyp)[:, None], pad(z.g_half, nzp)[None, :]
    gyn, gzn = y.g_node[:, None], z.g_node[None, :]
    h_mask = (j < ny) & (k < nz)  # H: normal components on the walls stay zero
    ex_mask = (j >= 1) & (j < ny) & (k >= 1) & (k < nz)
    ey_mask = (j < ny) & (k >= 1) & (k < nz)
    ez_mask = (j >= 1) & (j < ny) & (k < nz)
    h_planes = (flat(gyh * h_mask), flat(gzh * h_mask))
    e_planes = (flat(gyn * ex_mask), flat(gzn * ex_mask), flat(gzn * ey_mask), flat(gyn * ez_mask))
    yz_h = (flat(pad(y.b_half, nyp)[:, None]), flat(pad(y.c_half, nyp)[:, None]),
            flat(pad(z.b_half, nzp)[None, :]), flat(pad(z.c_half, nzp)[None, :]))
    yz_e = (flat(y.b_node[:, None]), flat(y.c_node[:, None]), flat(z.b_node[None, :]), flat(z.c_node[None, :]))
    flat_x = lambda a: a.reshape(a.shape[0], nyp * nzp)
    whole = tuple(np.zeros((nxp, nyp * nzp), dtype) for _ in range(8))
    s = np.int64(nzp)
    h_args = (s, cast(x.g_half), h_planes, x.map_half, cast(x.b_half), cast(x.c_half), yz_h,
              _y_runs(y.map_half, nzp, 0, ny), flat_x(psi[0]), flat_x(psi[1])) + whole[:4]
    e_args = (s, cast(x.g_node), e_planes, x.map_node, cast(x.b_node), cast(x.c_node), yz_e,
              _y_runs(y.map_node, nzp, 1, ny), flat_x(psi[6]), flat_x(psi[7])) + whole[4:]
    return h_args, e_args, whole
