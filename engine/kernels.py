"""numba update loops of the 2D Yee scheme with a CFS-CPML.

One layout serves both polarizations.  The primary field P sits on the
integer nodes (i, j); S1 at (i, j+1/2) and S2 at (i+1/2, j).  TMz: P = Ez,
S1 = Hx, S2 = Hy.  TEz (the dual): P = Hz, S1 = -Ex, S2 = -Ey.  Fields are
normalised so that both use the same factor c0 dt in vacuum (H is stored as
eta0 H), which makes TMz and TEz runs of the same problem bitwise duals.

Shapes: P (NX+1, NY+1), S1 (NX+1, NY), S2 (NX, NY+1).  g* are 1D arrays
1 / (kappa d) at node (n) or half-node (h) positions.  Psi lives only in the
layer slabs, one per side and field: an x-slab is the rows start..start+n-1
across every j, a y-slab the columns start..start+n-1 across every i, so the
corners carry both.  A slab is the tuple (start, b, c, psi, coef).  Every
kernel takes plain arrays and scalars of one dtype; no Python objects.
Update coefficients come either as scalars (a homogeneous field) or as
arrays (materials).
"""

from numba import njit, prange

_SERIAL = dict(cache=True, nogil=True)
_PARALLEL = dict(cache=True, nogil=True, parallel=True)


# --- bulk updates -----------------------------------------------------------

@njit(**_PARALLEL)
def secondary_scalar(P, S1, S2, ca, cb, gyh, gxh):
    """S1 = ca S1 - cb dP/dy, S2 = ca S2 + cb dP/dx with one ca, cb everywhere."""
    nxp, nyp = P.shape
    for i in prange(nxp):
        for j in range(nyp - 1):
            S1[i, j] = ca * S1[i, j] - cb * ((P[i, j + 1] - P[i, j]) * gyh[j])
        if i < nxp - 1:
            g = gxh[i]
            for j in range(nyp):
                S2[i, j] = ca * S2[i, j] + cb * ((P[i + 1, j] - P[i, j]) * g)


@njit(**_PARALLEL)
def secondary_array(P, S1, S2, ca1, cb1, ca2, cb2, gyh, gxh):
    """The same with per-position coefficients (E in TEz with materials)."""
    nxp, nyp = P.shape
    for i in prange(nxp):
        for j in range(nyp - 1):
            S1[i, j] = ca1[i, j] * S1[i, j] - cb1[i, j] * ((P[i, j + 1] - P[i, j]) * gyh[j])
        if i < nxp - 1:
            g = gxh[i]
            for j in range(nyp):
                S2[i, j] = ca2[i, j] * S2[i, j] + cb2[i, j] * ((P[i + 1, j] - P[i, j]) * g)


@njit(**_PARALLEL)
def primary_scalar(P, S1, S2, ca, cb, gxn, gyn):
    """P = ca P + cb (dS2/dx - dS1/dy) on the inner nodes, one ca, cb everywhere."""
    nxp, nyp = P.shape
    for i in prange(1, nxp - 1):
        g = gxn[i]
        for j in range(1, nyp - 1):
            P[i, j] = ca * P[i, j] + cb * (
                (S2[i, j] - S2[i - 1, j]) * g - (S1[i, j] - S1[i, j - 1]) * gyn[j])


@njit(**_PARALLEL)
def primary_array(P, S1, S2, ca, cb, gxn, gyn):
    """The same with per-node coefficients (Ez in TMz with materials)."""
    nxp, nyp = P.shape
    for i in prange(1, nxp - 1):
        g = gxn[i]
        for j in range(1, nyp - 1):
            P[i, j] = ca[i, j] * P[i, j] + cb[i, j] * (
                (S2[i, j] - S2[i - 1, j]) * g - (S1[i, j] - S1[i, j - 1]) * gyn[j])


# --- periodic edges ---------------------------------------------------------

@njit(**_SERIAL)
def primary_edges(P, S1, S2, ca, cb, gxn, gyn, edge_i, edge_j):
    """Primary update on the nodes of a periodic seam (wrapped neighbours).

    ca, cb are full arrays, or 1x1 arrays for a homogeneous field.
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
def psi_secondary_x(P, S2, slab):
    """x-slab rows of S2: psi <- b psi + c dP/dx;  S2 += coef psi."""
    start, b, c, psi, coef = slab
    for k in range(b.size):
        i = start + k
        bk = b[k]
        ck = c[k]
        for j in range(S2.shape[1]):
            psi[k, j] = bk * psi[k, j] + ck * (P[i + 1, j] - P[i, j])
            S2[i, j] += coef[k, j] * psi[k, j]


@njit(**_SERIAL)
def psi_secondary_y(P, S1, slab):
    """y-slab columns of S1: psi <- b psi + c dP/dy;  S1 -= coef psi."""
    start, b, c, psi, coef = slab
    for i in range(S1.shape[0]):
        for k in range(b.size):
            j = start + k
            psi[i, k] = b[k] * psi[i, k] + c[k] * (P[i, j + 1] - P[i, j])
            S1[i, j] -= coef[i, k] * psi[i, k]


@njit(**_SERIAL)
def psi_primary_x(S2, P, slab, j_lo, j_hi):
    """x-slab rows of P (never row 0): psi <- b psi + c dS2/dx;  P += coef psi."""
    start, b, c, psi, coef = slab
    for k in range(b.size):
        i = start + k
        bk = b[k]
        ck = c[k]
        for j in range(j_lo, j_hi):
            psi[k, j] = bk * psi[k, j] + ck * (S2[i, j] - S2[i - 1, j])
            P[i, j] += coef[k, j] * psi[k, j]


@njit(**_SERIAL)
def psi_primary_y(S1, P, slab, i_lo, i_hi):
    """y-slab columns of P (never column 0): psi <- b psi + c dS1/dy;  P -= coef psi."""
    start, b, c, psi, coef = slab
    for i in range(i_lo, i_hi):
        for k in range(b.size):
            j = start + k
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
def advance(first_step, n_steps, P, S1, S2, primary_coef, secondary_coef, edge_coef,
            gxn, gxh, gyn, gyh, x_slabs, y_slabs,
            periodic_x, periodic_y, edge_i, edge_j,
            src_i, src_j, src_coef, wave, probe_i, probe_j, probe_out):
    """Run n_steps leapfrog steps from first_step.

    primary_coef / secondary_coef: (homogeneous, ca, cb, ca_arrays..., cb_arrays...)
    as built by grid.py; edge_coef: (ca, cb) arrays for the periodic seam.
    x_slabs / y_slabs: (secondary low, secondary high, primary low, primary high).
    wave[n] is the source sample at (n + 1/2) dt; probe_out[n + 1, m]
    receives P at probe m after step n.
    """
    nxp, nyp = P.shape
    i_lo = 0 if periodic_x else 1
    j_lo = 0 if periodic_y else 1
    p_homog, p_ca, p_cb, p_ca_arr, p_cb_arr = primary_coef
    s_homog, s_ca, s_cb, s_ca1, s_cb1, s_ca2, s_cb2 = secondary_coef
    e_ca, e_cb = edge_coef
    sx_lo, sx_hi, px_lo, px_hi = x_slabs
    sy_lo, sy_hi, py_lo, py_hi = y_slabs
    for n in range(first_step, first_step + n_steps):
        if s_homog:
            secondary_scalar(P, S1, S2, s_ca, s_cb, gyh, gxh)
        else:
            secondary_array(P, S1, S2, s_ca1, s_cb1, s_ca2, s_cb2, gyh, gxh)
        psi_secondary_x(P, S2, sx_lo)
        psi_secondary_x(P, S2, sx_hi)
        psi_secondary_y(P, S1, sy_lo)
        psi_secondary_y(P, S1, sy_hi)
        if p_homog:
            primary_scalar(P, S1, S2, p_ca, p_cb, gxn, gyn)
        else:
            primary_array(P, S1, S2, p_ca_arr, p_cb_arr, gxn, gyn)
        primary_edges(P, S1, S2, e_ca, e_cb, gxn, gyn, edge_i, edge_j)
        psi_primary_x(S2, P, px_lo, j_lo, nyp - 1)
        psi_primary_x(S2, P, px_hi, j_lo, nyp - 1)
        psi_primary_y(S1, P, py_lo, i_lo, nxp - 1)
        psi_primary_y(S1, P, py_hi, i_lo, nxp - 1)
        add_source(P, src_i, src_j, src_coef, wave[n])
        copy_ghosts(P, periodic_x, periodic_y)
        for m in range(probe_i.size):
            probe_out[n + 1, m] = P[probe_i[m], probe_j[m]]
