"""numba update loops of the 2D Yee scheme with a CFS-CPML.

One layout serves both polarizations.  The primary field P sits on the
integer nodes (i, j); S1 at (i, j+1/2) and S2 at (i+1/2, j).  TMz: P = Ez,
S1 = Hx, S2 = Hy.  TEz (the dual): P = Hz, S1 = -Ex, S2 = -Ey.  Fields are
normalised so that both use the same factor c0 dt in vacuum (H is stored as
eta0 H), which makes TMz and TEz runs of the same problem bitwise duals.

Shapes: P (NX+1, NY+1), S1 (NX+1, NY), S2 (NX, NY+1).  g* are 1D arrays
1 / (kappa d) at node (n) or half-node (h) positions.  Psi lives only in the
layer slabs: x-slabs are rows idx[k] spanning every j, y-slabs are columns
idx[k] spanning every i, so corners carry both.  Every kernel takes plain
arrays and scalars of one dtype; no Python objects.
"""

from numba import njit, prange

_SERIAL = dict(cache=True, nogil=True)
_PARALLEL = dict(cache=True, nogil=True, parallel=True)


# --- bulk updates -----------------------------------------------------------

@njit(**_PARALLEL)
def secondary_uniform(P, S1, S2, k, gyh, gxh):
    """S1 -= k dP/dy, S2 += k dP/dx, for a field with no material (H in TMz)."""
    nxp, nyp = P.shape
    for i in prange(nxp):
        for j in range(nyp - 1):
            S1[i, j] = S1[i, j] - k * ((P[i, j + 1] - P[i, j]) * gyh[j])
        if i < nxp - 1:
            g = gxh[i]
            for j in range(nyp):
                S2[i, j] = S2[i, j] + k * ((P[i + 1, j] - P[i, j]) * g)


@njit(**_PARALLEL)
def secondary_material(P, S1, S2, ca1, cb1, ca2, cb2, gyh, gxh):
    """The same with per-node loss and permittivity (E in TEz)."""
    nxp, nyp = P.shape
    for i in prange(nxp):
        for j in range(nyp - 1):
            S1[i, j] = ca1[i, j] * S1[i, j] - cb1[i, j] * ((P[i, j + 1] - P[i, j]) * gyh[j])
        if i < nxp - 1:
            g = gxh[i]
            for j in range(nyp):
                S2[i, j] = ca2[i, j] * S2[i, j] + cb2[i, j] * ((P[i + 1, j] - P[i, j]) * g)


@njit(**_PARALLEL)
def primary_material(P, S1, S2, ca, cb, gxn, gyn):
    """P = ca P + cb (dS2/dx - dS1/dy) on the inner nodes (Ez in TMz)."""
    nxp, nyp = P.shape
    for i in prange(1, nxp - 1):
        g = gxn[i]
        for j in range(1, nyp - 1):
            P[i, j] = ca[i, j] * P[i, j] + cb[i, j] * (
                (S2[i, j] - S2[i - 1, j]) * g - (S1[i, j] - S1[i, j - 1]) * gyn[j])


@njit(**_PARALLEL)
def primary_uniform(P, S1, S2, k, gxn, gyn):
    """P += k (dS2/dx - dS1/dy) on the inner nodes (Hz in TEz)."""
    nxp, nyp = P.shape
    for i in prange(1, nxp - 1):
        g = gxn[i]
        for j in range(1, nyp - 1):
            P[i, j] = P[i, j] + k * (
                (S2[i, j] - S2[i - 1, j]) * g - (S1[i, j] - S1[i, j - 1]) * gyn[j])


# --- periodic edges ---------------------------------------------------------

@njit(**_SERIAL)
def primary_edges(P, S1, S2, ca, cb, gxn, gyn, edge_i, edge_j):
    """Primary update on the nodes of a periodic seam (wrapped neighbours).

    ca, cb are full arrays, or 1x1 arrays holding (1, k) for a uniform field.
    """
    nx = S2.shape[0]
    ny = S1.shape[1]
    full = ca.shape[0] > 1
    for n in range(edge_i.size):
        i = edge_i[n]
        j = edge_j[n]
        im = i - 1 if i > 0 else nx - 1
        jm = j - 1 if j > 0 else ny - 1
        a = ca[i, j] if full else ca[0, 0]
        b = cb[i, j] if full else cb[0, 0]
        P[i, j] = a * P[i, j] + b * ((S2[i, j] - S2[im, j]) * gxn[i] - (S1[i, j] - S1[i, jm]) * gyn[j])


@njit(**_SERIAL)
def copy_ghosts(P, periodic_x, periodic_y):
    """The last row/column of a periodic axis repeats the first."""
    nxp, nyp = P.shape
    if periodic_x:
        for j in range(nyp):
            P[nxp - 1, j] = P[0, j]
    if periodic_y:
        for i in range(nxp):
            P[i, nyp - 1] = P[i, 0]


# --- CPML psi terms (layer slabs only) --------------------------------------

@njit(**_SERIAL)
def psi_secondary_x(P, S2, idx, b, c, psi, coef):
    """x-slab rows of S2: psi <- b psi + c dP/dx;  S2 += coef psi."""
    for k in range(idx.size):
        i = idx[k]
        bk = b[k]
        ck = c[k]
        for j in range(S2.shape[1]):
            psi[k, j] = bk * psi[k, j] + ck * (P[i + 1, j] - P[i, j])
            S2[i, j] += coef[k, j] * psi[k, j]


@njit(**_SERIAL)
def psi_secondary_y(P, S1, idx, b, c, psi, coef):
    """y-slab columns of S1: psi <- b psi + c dP/dy;  S1 -= coef psi."""
    for i in range(S1.shape[0]):
        for k in range(idx.size):
            j = idx[k]
            psi[i, k] = b[k] * psi[i, k] + c[k] * (P[i, j + 1] - P[i, j])
            S1[i, j] -= coef[i, k] * psi[i, k]


@njit(**_SERIAL)
def psi_primary_x(S2, P, idx, b, c, psi, coef, j_lo, j_hi):
    """x-slab rows of P (never row 0): psi <- b psi + c dS2/dx;  P += coef psi."""
    for k in range(idx.size):
        i = idx[k]
        bk = b[k]
        ck = c[k]
        for j in range(j_lo, j_hi):
            psi[k, j] = bk * psi[k, j] + ck * (S2[i, j] - S2[i - 1, j])
            P[i, j] += coef[k, j] * psi[k, j]


@njit(**_SERIAL)
def psi_primary_y(S1, P, idx, b, c, psi, coef, i_lo, i_hi):
    """y-slab columns of P (never column 0): psi <- b psi + c dS1/dy;  P -= coef psi."""
    for i in range(i_lo, i_hi):
        for k in range(idx.size):
            j = idx[k]
            psi[i, k] = b[k] * psi[i, k] + c[k] * (S1[i, j] - S1[i, j - 1])
            P[i, j] -= coef[i, k] * psi[i, k]


# --- sources, probes, energy ------------------------------------------------

@njit(**_SERIAL)
def add_source(P, src_i, src_j, src_coef, value):
    for n in range(src_i.size):
        P[src_i[n], src_j[n]] += src_coef[n] * value


@njit(**_SERIAL)
def sum_squares(A):
    total = 0.0
    for i in range(A.shape[0]):
        for j in range(A.shape[1]):
            total += float(A[i, j]) * float(A[i, j])
    return total


@njit(**_SERIAL)
def sum_weighted_squares(A, W):
    total = 0.0
    for i in range(A.shape[0]):
        for j in range(A.shape[1]):
            total += float(W[i, j]) * float(A[i, j]) * float(A[i, j])
    return total


# --- the time loop ----------------------------------------------------------

@njit(**_SERIAL)
def advance(first_step, n_steps, P, S1, S2, electric_primary,
            ca_p, cb_p, ca1, cb1, ca2, cb2, k, edge_ca, edge_cb,
            gxn, gxh, gyn, gyh, slab_sx, slab_sy, slab_px, slab_py,
            periodic_x, periodic_y, edge_i, edge_j,
            src_i, src_j, src_coef, wave, probe_i, probe_j, probe_out):
    """Run n_steps leapfrog steps from first_step.

    slab_* = (idx, b, c, psi, coef) for S2 in x-slabs, S1 in y-slabs, P in
    x-slabs, P in y-slabs.  wave[n] is the source sample at (n + 1/2) dt;
    probe_out[n + 1, m] receives P at probe m after step n.
    """
    nxp, nyp = P.shape
    i_lo = 0 if periodic_x else 1
    j_lo = 0 if periodic_y else 1
    sx_idx, sx_b, sx_c, sx_psi, sx_coef = slab_sx
    sy_idx, sy_b, sy_c, sy_psi, sy_coef = slab_sy
    px_idx, px_b, px_c, px_psi, px_coef = slab_px
    py_idx, py_b, py_c, py_psi, py_coef = slab_py
    for n in range(first_step, first_step + n_steps):
        if electric_primary:
            secondary_uniform(P, S1, S2, k, gyh, gxh)
        else:
            secondary_material(P, S1, S2, ca1, cb1, ca2, cb2, gyh, gxh)
        psi_secondary_x(P, S2, sx_idx, sx_b, sx_c, sx_psi, sx_coef)
        psi_secondary_y(P, S1, sy_idx, sy_b, sy_c, sy_psi, sy_coef)
        if electric_primary:
            primary_material(P, S1, S2, ca_p, cb_p, gxn, gyn)
        else:
            primary_uniform(P, S1, S2, k, gxn, gyn)
        primary_edges(P, S1, S2, edge_ca, edge_cb, gxn, gyn, edge_i, edge_j)
        psi_primary_x(S2, P, px_idx, px_b, px_c, px_psi, px_coef, j_lo, nyp - 1)
        psi_primary_y(S1, P, py_idx, py_b, py_c, py_psi, py_coef, i_lo, nxp - 1)
        add_source(P, src_i, src_j, src_coef, wave[n])
        copy_ghosts(P, periodic_x, periodic_y)
        for m in range(probe_i.size):
            probe_out[n + 1, m] = P[probe_i[m], probe_j[m]]
