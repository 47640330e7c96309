"""numba update loops of the 3D Yee scheme with a CFS-CPML on six faces.

Field layout (cell (i, j, k) of the grid): Ex at (i+1/2, j, k), Ey at
(i, j+1/2, k), Ez at (i, j, k+1/2), Hx at (i, j+1/2, k+1/2), Hy at
(i+1/2, j, k+1/2), Hz at (i+1/2, j+1/2, k).  All six arrays have the shape
(NX+1, NY+1, NZ+1), so one index serves all; the entries beyond a
component's own range stay zero.  H is stored as eta0 H, so vacuum uses the
factor c0 dt for both halves of a step, as in the 2D engine.  The outer faces
are electric walls: tangential E on them is never updated (stays zero), and
the normal H on them then stays zero as well, so it is not updated either.

g* are 1 / (kappa d) along each axis at nodes (n) and half nodes (h).  The
CPML's psi arrays exist only in the layer slabs: an x-slab is rows of i
mapped by xmap (-1 outside the slabs) across all j and k, a y-slab likewise
by ymap, a z-slab the k ranges [0, z_lo) and [z_hi, NZ) (stored as k and
k - z_hi + z_lo).  Edges and corners lie in two or three slabs and carry
both or all three psi terms.  b, c are full-length arrays along the axis
(c already divided by the cell size), zero outside the slabs.  The
whole-grid kernels keep their y- and z-psi over whole planes instead (see
their section); the x-slab planes are shared.

The window (an int64 array, see `full_window` and confirm3d) limits each
(i, j) column to one k range: the cells within L1 distance r_src of the
source node and within L1 distance r_box of a target box.  A full window
covers every cell.  The reference run uses it to update only the cells the
source can have reached and from which the probes can still be reached.
"""

import numpy as np
from numba import njit, prange

_PARALLEL = dict(cache=True, nogil=True, parallel=True, error_model="numpy")
# The row sweeps only slice arrays their caller owns: without reference counting
# on the many short column slices they run several times faster (short columns
# near the light cone's surface are mostly overhead otherwise).
_ROWS = dict(cache=True, nogil=True, error_model="numpy", _nrt=False)
_SERIAL = dict(cache=True, nogil=True, error_model="numpy")
_INLINE = dict(cache=True, nogil=True, error_model="numpy", inline="always")

WINDOW_SIZE = 15
UNBOUNDED = 1 << 40


def full_window(shape) -> np.ndarray:
    """A window that covers every cell of a grid of this (NX+1, NY+1, NZ+1) shape."""
    nxp, nyp, nzp = shape
    return np.array([0, nxp, 0, nyp, 0, 0, 0, UNBOUNDED, 0, nxp, 0, nyp, 0, nzp, UNBOUNDED], dtype=np.int64)


@njit(**_INLINE)
def _gap(v, lo, hi):
    """Distance of v from the range [lo, hi)."""
    if v < lo:
        return lo - v
    if v >= hi:
        return v - hi + 1
    return 0


@njit(**_INLINE)
def column_range(win, i, j):
    """k range [k0, k1) of column (i, j) inside the window (empty when k0 >= k1).

    win = (i_lo, i_hi, j_lo, j_hi, si, sj, sk, r_src, bi0, bi1, bj0, bj1, bk0, bk1, r_box)."""
    rs = win[7] - abs(i - win[4]) - abs(j - win[5])
    rb = win[14] - _gap(i, win[8], win[9]) - _gap(j, win[10], win[11])
    if rs < 0 or rb < 0:
        return 0, 0
    k0 = max(win[6] - rs, win[12] - rb)
    k1 = min(win[6] + rs, win[13] - 1 + rb) + 1
    return k0, k1


# --- loops over one column's k range ----------------------------------------
# Each helper runs over whole 1D slices from index 0: a loop that starts at a
# run-time offset, or that stores to more than one array, is not vectorised.

@njit(**_INLINE)
def curl_h(f, coef, a1, a0, ga, b1, b0, gb):
    """f -= coef ((a1 - a0) ga - (b1 - b0) gb[k]): an H component with its z term graded per k."""
    for k in range(f.size):
        f[k] -= coef * ((a1[k] - a0[k]) * ga - (b1[k] - b0[k]) * gb[k])


@njit(**_INLINE)
def curl_h_xy(f, coef, a1, a0, ga, b1, b0, gb):
    """f -= coef ((a1 - a0) ga - (b1 - b0) gb): Hz, both terms graded per column."""
    for k in range(f.size):
        f[k] -= coef * ((a1[k] - a0[k]) * ga - (b1[k] - b0[k]) * gb)


@njit(**_INLINE)
def curl_e(f, ca, cb, a1, a0, ga, b1, b0, gb):
    """f = ca f + cb ((a1 - a0) ga - (b1 - b0) gb[k])."""
    for k in range(f.size):
        f[k] = ca * f[k] + cb * ((a1[k] - a0[k]) * ga - (b1[k] - b0[k]) * gb[k])


@njit(**_INLINE)
def curl_e_xy(f, ca, cb, a1, a0, ga, b1, b0, gb):
    """f = ca f + cb ((a1 - a0) ga - (b1 - b0) gb): Ez."""
    for k in range(f.size):
        f[k] = ca * f[k] + cb * ((a1[k] - a0[k]) * ga - (b1[k] - b0[k]) * gb)


@njit(**_INLINE)
def psi_column(p, f, b, c, a1, a0, coef):
    """x- or y-slab: p = b p + c (a1 - a0);  f += coef p (b, c constant along k)."""
    for k in range(f.size):
        p[k] = b * p[k] + c * (a1[k] - a0[k])
        f[k] += coef * p[k]


@njit(**_INLINE)
def psi_z(p, f, b, c, a1, a0, coef):
    """z-slab: as psi_column with b, c graded per k."""
    for k in range(f.size):
        p[k] = b[k] * p[k] + c[k] * (a1[k] - a0[k])
        f[k] += coef * p[k]


@njit(**_INLINE)
def psi_z_ranges(k0, k1, z_lo, z_hi, first):
    """The parts of [k0, k1) in the low z-slab [first, z_lo) and the high one [z_hi, ...),
    and the offset of the high part in the psi storage."""
    return max(k0, first), min(k1, z_lo), max(k0, z_hi), k1, z_hi - z_lo


@njit(**_ROWS)
def h_rows(i_first, i_last, Ex, Ey, Ez, Hx, Hy, Hz, cdt, gxh, gyh, gzh,
           xmap, ymap, z_lo, z_hi, bx, cx, by, cy, bz, cz,
           hy_x, hz_x, hx_y, hz_y, hx_z, hy_z, win):
    """Rows i_first..i_last-1 of the H update inside the window:
    H -= c0 dt curl E, with psi in the slabs."""
    nxp, nyp, nzp = Ex.shape
    nz = nzp - 1
    for i in range(max(win[0], 0, i_first), min(win[1], nxp - 1, i_last)):
        xi = xmap[i]
        gx = gxh[i]
        for j in range(max(win[2], 0), min(win[3], nyp - 1)):
            k0, k1 = column_range(win, i, j)
            k0 = max(k0, 0)
            k1 = min(k1, nz)
            if k0 >= k1:
                continue
            gy = gyh[j]
            ex, ey, ez = Ex[i, j, k0:k1], Ey[i, j, k0:k1], Ez[i, j, k0:k1]
            hx, hy, hz = Hx[i, j, k0:k1], Hy[i, j, k0:k1], Hz[i, j, k0:k1]
            ex_k, ey_k = Ex[i, j, k0 + 1:k1 + 1], Ey[i, j, k0 + 1:k1 + 1]
            ex_j, ez_j = Ex[i, j + 1, k0:k1], Ez[i, j + 1, k0:k1]
            ey_i, ez_i = Ey[i + 1, j, k0:k1], Ez[i + 1, j, k0:k1]
            gz = gzh[k0:k1]
            curl_h(hx, cdt, ez_j, ez, gy, ey_k, ey, gz)
            curl_h(hy, -cdt, ez_i, ez, gx, ex_k, ex, gz)
            curl_h_xy(hz, cdt, ey_i, ey, gx, ex_j, ex, gy)
            if xi >= 0:
                psi_column(hy_x[xi, j, k0:k1], hy, bx[i], cx[i], ez_i, ez, cdt)
                psi_column(hz_x[xi, j, k0:k1], hz, bx[i], cx[i], ey_i, ey, -cdt)
            yj = ymap[j]
            if yj >= 0:
                psi_column(hx_y[i, yj, k0:k1], hx, by[j], cy[j], ez_j, ez, -cdt)
                psi_column(hz_y[i, yj, k0:k1], hz, by[j], cy[j], ex_j, ex, cdt)
            if z_lo > 0 or z_hi < nz:
                la, lb, ha, hb, shift = psi_z_ranges(k0, k1, z_lo, z_hi, 0)
                for a, b, q in ((la, lb, 0), (ha, hb, shift)):
                    if a < b:
                        psi_z(hx_z[i, j, a - q:b - q], Hx[i, j, a:b], bz[a:b], cz[a:b],
                              Ey[i, j, a + 1:b + 1], Ey[i, j, a:b], cdt)
                        psi_z(hy_z[i, j, a - q:b - q], Hy[i, j, a:b], bz[a:b], cz[a:b],
                              Ex[i, j, a + 1:b + 1], Ex[i, j, a:b], -cdt)


@njit(**_ROWS)
def e_rows(i_first, i_last, Ex, Ey, Ez, Hx, Hy, Hz, ca, cb, gxn, gyn, gzn,
           xmap, ymap, z_lo, z_hi, bx, cx, by, cy, bz, cz,
           ey_x, ez_x, ex_y, ez_y, ex_z, ey_z, win):
    """Rows i_first..i_last-1 of the E update inside the window:
    E = ca E + cb curl H, with psi in the slabs.

    Tangential E on the outer faces is never touched: electric walls."""
    nxp, nyp, nzp = Ex.shape
    nz = nzp - 1
    for i in range(max(win[0], 0, i_first), min(win[1], nxp - 1, i_last)):
        xi = xmap[i]
        gx = gxn[i]
        im = max(i - 1, 0)
        for j in range(max(win[2], 0), min(win[3], nyp - 1)):
            k0, k1 = column_range(win, i, j)
            k1 = min(k1, nz)
            ka = max(k0, 1)  # Ex, Ey: inner k only
            kb = max(k0, 0)  # Ez: every k
            if kb >= k1:
                continue
            gy = gyn[j]
            jm = max(j - 1, 0)
            yj = ymap[j]
            if ka < k1:
                gz = gzn[ka:k1]
                hx, hy, hz = Hx[i, j, ka:k1], Hy[i, j, ka:k1], Hz[i, j, ka:k1]
                if j >= 1:
                    ex = Ex[i, j, ka:k1]
                    hz_j = Hz[i, jm, ka:k1]
                    curl_e(ex, ca, cb, hz, hz_j, gy, hy, Hy[i, j, ka - 1:k1 - 1], gz)
                    if yj >= 0:
                        psi_column(ex_y[i, yj, ka:k1], ex, by[j], cy[j], hz, hz_j, cb)
                if i >= 1:
                    ey = Ey[i, j, ka:k1]
                    hz_i = Hz[im, j, ka:k1]
                    curl_e(ey, ca, -cb, hz, hz_i, gx, hx, Hx[i, j, ka - 1:k1 - 1], gz)
                    if xi >= 0:
                        psi_column(ey_x[xi, j, ka:k1], ey, bx[i], cx[i], hz, hz_i, -cb)
            if i >= 1 and j >= 1:
                ez = Ez[i, j, kb:k1]
                hx, hy = Hx[i, j, kb:k1], Hy[i, j, kb:k1]
                hy_i, hx_j = Hy[im, j, kb:k1], Hx[i, jm, kb:k1]
                curl_e_xy(ez, ca, cb, hy, hy_i, gx, hx, hx_j, gy)
                if xi >= 0:
                    psi_column(ez_x[xi, j, kb:k1], ez, bx[i], cx[i], hy, hy_i, cb)
                if yj >= 0:
                    psi_column(ez_y[i, yj, kb:k1], ez, by[j], cy[j], hx, hx_j, -cb)
            if z_lo > 0 or z_hi < nz:
                la, lb, ha, hb, shift = psi_z_ranges(kb, k1, z_lo, z_hi, 1)
                for a, b, q in ((la, lb, 0), (ha, hb, shift)):
                    if a < b:
                        if j >= 1:
                            psi_z(ex_z[i, j, a - q:b - q], Ex[i, j, a:b], bz[a:b], cz[a:b],
                                  Hy[i, j, a:b], Hy[i, j, a - 1:b - 1], -cb)
                        if i >= 1:
                            psi_z(ey_z[i, j, a - q:b - q], Ey[i, j, a:b], bz[a:b], cz[a:b],
                                  Hx[i, j, a:b], Hx[i, j, a - 1:b - 1], cb)


# --- the whole grid at once: each i-plane as one long loop ------------------------
# Without a window every (j, k) of a plane is updated, so a plane is one loop over
# m = j (NZ+1) + k instead of NY short column loops.  The neighbours in j and k are
# at m + (NZ+1) and m + 1.  Grading planes carry 1/(kappa d) per m and are zero
# where a component is not updated (walls, normal H, padding), which leaves those
# entries exactly zero (with the x-term, see fused_x).  The psi terms are fused into the field loops, so a field
# and its differences are read once per step.  The z-psi of these kernels covers
# whole planes (b = c = 0 outside the z-slabs: exact no-ops, psi stays zero): a
# z-slab is two short k ranges of every column, and the short loops that updated
# it did not vectorise (they took half the step).  The y-psi is fused on the runs
# of rows inside a y-slab (y_runs), the x-psi on the planes of an x-slab.  An H
# update is written 1 H + (-c0 dt) curl, bitwise H - c0 dt curl, so one loop
# serves E and H.  The arithmetic is term for term that of the column loops
# (curl, then the x-, y- and z-psi terms in that order), so both give bitwise
# the same fields.  `step_planes` does H and E of a plane in one pass.

@njit(**_INLINE)
def fused_yz(f, ca, cb, a1, a0, ga, b1, b0, gb, with_y, qy, by, cy, wy, qz, bz, cz, wz):
    """Hx or Ex: f = ca f + cb (da ga[m] - db gb[m]) + wy qy + wz qz, each psi updated
    first: qy = by[m] qy + cy[m] da (only when with_y), qz = bz[m] qz + cz[m] db
    (da = a1 - a0 along y, db = b1 - b0 along z)."""
    if with_y:
        for m in range(f.size):
            da = a1[m] - a0[m]
            db = b1[m] - b0[m]
            v = ca * f[m] + cb * (da * ga[m] - db * gb[m])
            p = by[m] * qy[m] + cy[m] * da
            qy[m] = p
            v = v + wy * p
            p = bz[m] * qz[m] + cz[m] * db
            qz[m] = p
            f[m] = v + wz * p
    else:
        for m in range(f.size):
            da = a1[m] - a0[m]
            db = b1[m] - b0[m]
            v = ca * f[m] + cb * (da * ga[m] - db * gb[m])
            p = bz[m] * qz[m] + cz[m] * db
            qz[m] = p
            f[m] = v + wz * p


@njit(**_INLINE)
def fused_x(f, ca, cb, a1, a0, gx, b1, b0, gb, with_x, qx, bx, cx, wx, with_b, qb, bb, pb, wb):
    """Hy, Hz, Ey or Ez: f = ca f + cb (da gx - db gb[m]) + wx qx + wb qb, da along x
    (gx constant on the plane): the x-psi qx = bx qx + cx da when with_x, the psi of
    the other axis qb = bb[m] qb + pb[m] db when with_b.  The x-term needs no mask
    where the component is not updated: there da is a difference of entries that are
    always zero (padding beyond a component's range, or H normal to a wall, whose
    tangential E never changes), and gb[m] is zero."""
    if with_x and with_b:
        for m in range(f.size):
            da = a1[m] - a0[m]
            db = b1[m] - b0[m]
            v = ca * f[m] + cb * (da * gx - db * gb[m])
            p = bx * qx[m] + cx * da
            qx[m] = p
            v = v + wx * p
            p = bb[m] * qb[m] + pb[m] * db
            qb[m] = p
            f[m] = v + wb * p
    elif with_b:
        for m in range(f.size):
            da = a1[m] - a0[m]
            db = b1[m] - b0[m]
            v = ca * f[m] + cb * (da * gx - db * gb[m])
            p = bb[m] * qb[m] + pb[m] * db
            qb[m] = p
            f[m] = v + wb * p
    elif with_x:
        for m in range(f.size):
            da = a1[m] - a0[m]
            v = ca * f[m] + cb * (da * gx - (b1[m] - b0[m]) * gb[m])
            p = bx * qx[m] + cx * da
            qx[m] = p
            f[m] = v + wx * p
    else:
        for m in range(f.size):
            f[m] = ca * f[m] + cb * ((a1[m] - a0[m]) * gx - (b1[m] - b0[m]) * gb[m])


@njit(**_ROWS)
def h_planes(i_first, i_last, Ex, Ey, Ez, Hx, Hy, Hz, cdt, s, gxh, planes, xmap, bx, cx, yz, y_runs,
             hy_x, hz_x, hx_y, hz_y, hx_z, hy_z):
    """Planes i_first..i_last-1 of the whole-grid H update.  Fields and psi are
    (rows, (NY+1)(NZ+1)) views (x-psi: the x-slab planes; y- and z-psi: every plane);
    s = NZ + 1; planes = (gy, gz) and yz = (by, cy, bz, cz) per m; y_runs rows
    (first m, end m, 1 if in a y-slab) cover m < NY s."""
    nxp = Ex.shape[0]
    gy, gz = planes
    by, cy, bz, cz = yz
    one = cdt / cdt  # 1 in the fields' precision: 1 H - c0 dt curl is bitwise H - c0 dt curl
    for i in range(i_first, min(i_last, nxp - 1)):
        gx = gxh[i]
        xi = xmap[i]
        x_slab = xi >= 0
        xr = max(xi, 0)  # any row: not read unless x_slab
        bxi, cxi = bx[i], cx[i]
        for r in range(y_runs.shape[0]):
            y_slab = y_runs[r, 2] > 0
            a, b = y_runs[r, 0], y_runs[r, 1]
            if a < b:
                fused_x(Hy[i, a:b], one, cdt, Ez[i + 1, a:b], Ez[i, a:b], gx, Ex[i, a + 1:b + 1],
                        Ex[i, a:b], gz[a:b], x_slab, hy_x[xr, a:b], bxi, cxi, cdt, True, hy_z[i, a:b],
                        bz[a:b], cz[a:b], -cdt)
                fused_yz(Hx[i, a:b], one, -cdt, Ez[i, a + s:b + s], Ez[i, a:b], gy[a:b], Ey[i, a + 1:b + 1],
                         Ey[i, a:b], gz[a:b], y_slab, hx_y[i, a:b], by[a:b], cy[a:b], -cdt, hx_z[i, a:b],
                         bz[a:b], cz[a:b], cdt)
                fused_x(Hz[i, a:b], one, -cdt, Ey[i + 1, a:b], Ey[i, a:b], gx, Ex[i, a + s:b + s],
                        Ex[i, a:b], gy[a:b], x_slab, hz_x[xr, a:b], bxi, cxi, -cdt, y_slab, hz_y[i, a:b],
                        by[a:b], cy[a:b], cdt)


@njit(**_ROWS)
def e_planes(i_first, i_last, Ex, Ey, Ez, Hx, Hy, Hz, ca, cb, s, gxn, planes, xmap, bx, cx, yz, y_runs,
             ey_x, ez_x, ex_y, ez_y, ex_z, ey_z):
    """Planes i_first..i_last-1 of the whole-grid E update (see h_planes);
    planes = (gy_ex, gz_ex, gz_ey, gy_ez), yz = (by, cy, bz, cz) per m;
    y_runs cover s <= m < NY s (Ex and Ez: j >= 1).  Ey starts at m = 1 (k >= 1);
    Ey and Ez skip the wall i = 0."""
    nxp = Ex.shape[0]
    gy_ex, gz_ex, gz_ey, gy_ez = planes
    by, cy, bz, cz = yz
    for i in range(i_first, min(i_last, nxp - 1)):
        gx = gxn[i]
        xi = xmap[i]
        x_slab = xi >= 0
        xr = max(xi, 0)
        bxi, cxi = bx[i], cx[i]
        inner = i >= 1
        if inner:  # Ey of the row j = 0; the other rows go with Ex and Ez
            ey_row(Ey, Hz, Hx, i, 1, s, ca, cb, gx, gz_ey, x_slab, ey_x[xr], bxi, cxi, ey_z[i], bz, cz)
        for r in range(y_runs.shape[0]):
            y_slab = y_runs[r, 2] > 0
            a, b = y_runs[r, 0], y_runs[r, 1]
            if a < b:
                fused_yz(Ex[i, a:b], ca, cb, Hz[i, a:b], Hz[i, a - s:b - s], gy_ex[a:b], Hy[i, a:b],
                         Hy[i, a - 1:b - 1], gz_ex[a:b], y_slab, ex_y[i, a:b], by[a:b], cy[a:b], cb, ex_z[i, a:b],
                         bz[a:b], cz[a:b], -cb)
                if inner:
                    ey_row(Ey, Hz, Hx, i, a, b, ca, cb, gx, gz_ey, x_slab, ey_x[xr], bxi, cxi, ey_z[i],
                           bz, cz)
                    fused_x(Ez[i, a:b], ca, cb, Hy[i, a:b], Hy[i - 1, a:b], gx, Hx[i, a:b],
                            Hx[i, a - s:b - s], gy_ez[a:b], x_slab, ez_x[xr, a:b], bxi, cxi, cb, y_slab,
                            ez_y[i, a:b], by[a:b], cy[a:b], -cb)


@njit(**_INLINE)
def ey_row(Ey, Hz, Hx, i, a, b, ca, cb, gx, gz, x_slab, qx, bx, cx, qz, bz, cz):
    """Ey of plane i on m = a..b-1 (inner planes only), with its x- and z-psi."""
    fused_x(Ey[i, a:b], ca, -cb, Hz[i, a:b], Hz[i - 1, a:b], gx, Hx[i, a:b], Hx[i, a - 1:b - 1],
            gz[a:b], x_slab, qx[a:b], bx, cx, -cb, True, qz[a:b], bz[a:b], cz[a:b], cb)


@njit(**_ROWS)
def step_planes(Ex, Ey, Ez, Hx, Hy, Hz, cdt, ca, cb, h, e, src_plane, src_m, src_value):
    """One whole-grid step in one pass over the planes: H of plane i, then E of plane i,
    which needs H of planes i and i - 1 (both new by then); H of plane i reads E of
    planes i and i + 1 before either is updated.  So every plane is read from memory
    once per step instead of twice, with the arithmetic of h_planes and e_planes.
    A magnetic source adds src_value to Hz[src_plane, src_m] between the two halves
    (src_plane < 0: none)."""
    for i in range(Ex.shape[0] - 1):
        h_planes(i, i + 1, Ex, Ey, Ez, Hx, Hy, Hz, cdt, *h)
        if i == src_plane:
            Hz[i, src_m] += src_value
        e_planes(i, i + 1, Ex, Ey, Ez, Hx, Hy, Hz, ca, cb, *e)


@njit(**_PARALLEL)
def h_chunks(chunks, Ex, Ey, Ez, Hx, Hy, Hz, cdt, gxh, gyh, gzh,
             xmap, ymap, z_lo, z_hi, bx, cx, by, cy, bz, cz,
             hy_x, hz_x, hx_y, hz_y, hx_z, hy_z, win):
    """h_rows over len(chunks) - 1 row chunks, one per thread (rows are independent)."""
    for c in prange(chunks.size - 1):
        h_rows(chunks[c], chunks[c + 1], Ex, Ey, Ez, Hx, Hy, Hz, cdt, gxh, gyh, gzh,
               xmap, ymap, z_lo, z_hi, bx, cx, by, cy, bz, cz, hy_x, hz_x, hx_y, hz_y, hx_z, hy_z, win)


@njit(**_PARALLEL)
def e_chunks(chunks, Ex, Ey, Ez, Hx, Hy, Hz, ca, cb, gxn, gyn, gzn,
             xmap, ymap, z_lo, z_hi, bx, cx, by, cy, bz, cz,
             ey_x, ez_x, ex_y, ez_y, ex_z, ey_z, win):
    """e_rows over len(chunks) - 1 row chunks, one per thread."""
    for c in prange(chunks.size - 1):
        e_rows(chunks[c], chunks[c + 1], Ex, Ey, Ez, Hx, Hy, Hz, ca, cb, gxn, gyn, gzn,
               xmap, ymap, z_lo, z_hi, bx, cx, by, cy, bz, cz, ey_x, ez_x, ex_y, ez_y, ex_z, ey_z, win)


@njit(**_PARALLEL)
def h_plane_chunks(chunks, Ex, Ey, Ez, Hx, Hy, Hz, cdt, s, gxh, planes, xmap, bx, cx, yz, y_runs,
                   hy_x, hz_x, hx_y, hz_y, hx_z, hy_z):
    """h_planes over row chunks, one per thread (tuples are rebuilt inside the parallel loop)."""
    g0, g1 = planes
    y0, y1, y2, y3 = yz
    for c in prange(chunks.size - 1):
        h_planes(chunks[c], chunks[c + 1], Ex, Ey, Ez, Hx, Hy, Hz, cdt, s, gxh, (g0, g1), xmap, bx, cx,
                 (y0, y1, y2, y3), y_runs, hy_x, hz_x, hx_y, hz_y, hx_z, hy_z)


@njit(**_PARALLEL)
def e_plane_chunks(chunks, Ex, Ey, Ez, Hx, Hy, Hz, ca, cb, s, gxn, planes, xmap, bx, cx, yz, y_runs,
                   ey_x, ez_x, ex_y, ez_y, ex_z, ey_z):
    """e_planes over row chunks, one per thread."""
    g0, g1, g2, g3 = planes
    y0, y1, y2, y3 = yz
    for c in prange(chunks.size - 1):
        e_planes(chunks[c], chunks[c + 1], Ex, Ey, Ez, Hx, Hy, Hz, ca, cb, s, gxn, (g0, g1, g2, g3), xmap,
                 bx, cx, (y0, y1, y2, y3), y_runs, ey_x, ez_x, ex_y, ez_y, ex_z, ey_z)


def row_chunks(win, n_rows: int, threads: int) -> np.ndarray:
    """Bounds of `threads` equal chunks of the window's rows."""
    lo, hi = max(int(win[0]), 0), min(int(win[1]), n_rows)
    return np.linspace(lo, max(lo, hi), threads + 1).round().astype(np.int64)


@njit(**_SERIAL)
def window_cells(win, nxp, nyp, nzp):
    """Cells a window updates (for throughput figures)."""
    total = 0
    for i in range(max(win[0], 0), min(win[1], nxp - 1)):
        for j in range(max(win[2], 0), min(win[3], nyp - 1)):
            k0, k1 = column_range(win, i, j)
            total += max(0, min(k1, nzp - 1) - max(k0, 0))
    return total


# Energy sums only feed the divergence guard and the late-time trend: "reassoc" lets
# the compiler keep partial sums in vectors, as the 2D engine's sums do (with the
# columns from index 0: 0.47 -> 0.20 ms per check of the demo box, whole grid and
# interior).  One caller (Python), so one summation order.
_SUM = dict(cache=True, nogil=True, fastmath={"reassoc"})


@njit(**_SUM)
def sum_squares_box(A, i0, i1, j0, j1, k0, k1):
    """Sum of squares over A[i0:i1, j0:j1, k0:k1], accumulated in float64."""
    total = 0.0
    for i in range(i0, i1):
        for j in range(j0, j1):
            column = A[i, j, k0:k1]  # from index 0: a run-time start would keep the loop scalar
            for k in range(column.size):
                v = float(column[k])
                total += v * v
    return total


@njit(**_SERIAL)
def error_sums_box(A, R, i0, j0, k0):
    """(sum (A - R)^2, sum R^2) of A's box at (i0, j0, k0) against R (same shape as the box)."""
    err = 0.0
    total = 0.0
    ni, nj, nk = R.shape
    for i in range(ni):
        for j in range(nj):
            for k in range(nk):
                r = float(R[i, j, k])
                d = float(A[i0 + i, j0 + j, k0 + k]) - r
                err += d * d
                total += r * r
    return err, total
