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
corners carry both.  A slab is the tuple (start, b, c, psi, coef).  y-slabs
are padded towards the interior to whole blocks of LANES columns with
b = c = coef = 0, which leaves those columns exactly unchanged.

One step is one sweep over the rows (`sweep_rows`): row i of S1 and S2 with
their psi terms, then row i of P with its psi terms.  Row i of P needs S2 of
rows i-1 and i, which are both new by then, and S2 of row i reads P of row
i+1, which is still old: so the leapfrog order holds within one pass and the
fields are read from memory once per step instead of twice.  Threads take
contiguous chunks of rows; the first P row of each later chunk needs the
previous chunk's last S2 row, so it waits until all chunks are done.

Every kernel takes plain arrays and scalars of one dtype; no Python objects.
Update coefficients come as scalars (a homogeneous field) or arrays
(materials).
"""

from numba import njit, prange

_SERIAL = dict(cache=True, nogil=True)
_PARALLEL = dict(cache=True, nogil=True, parallel=True)
_ROW = dict(cache=True, nogil=True, inline="always")  # row helpers: no call cost per row
# The row sweep only reads and writes arrays its caller owns: without reference
# counting on the per-row views (and with numpy's error model) the compiler keeps
# the row loops vectorised, about twice as fast as the default.
_SWEEP = dict(cache=True, nogil=True, error_model="numpy", _nrt=False)
LANES = 16  # y-slab columns per vector block: one AVX-512 register of float32


# --- one row of the secondaries --------------------------------------------

@njit(**_ROW)
def secondary_row(P, S1, S2, i, homog, ca, cb, ca1, cb1, ca2, cb2, gyh, gxh):
    """S1[i] = ca S1 - cb dP/dy;  S2[i] = ca S2 + cb dP/dx (scalar or per-node ca, cb).

    Works on 1D row views: unit-stride loops that the compiler vectorises."""
    nxp, nyp = P.shape
    p0 = P[i]
    s1 = S1[i]
    if homog:
        for j in range(nyp - 1):
            s1[j] = ca * s1[j] - cb * ((p0[j + 1] - p0[j]) * gyh[j])
    else:
        a1 = ca1[i]
        b1 = cb1[i]
        for j in range(nyp - 1):
            s1[j] = a1[j] * s1[j] - b1[j] * ((p0[j + 1] - p0[j]) * gyh[j])
    if i < nxp - 1:
        p1 = P[i + 1]
        s2 = S2[i]
        g = gxh[i]
        if homog:
            for j in range(nyp):
                s2[j] = ca * s2[j] + cb * ((p1[j] - p0[j]) * g)
        else:
            a2 = ca2[i]
            b2 = cb2[i]
            for j in range(nyp):
                s2[j] = a2[j] * s2[j] + b2[j] * ((p1[j] - p0[j]) * g)


@njit(**_ROW)
def psi_y_columns(source, target, i, start, b, c, psi, coef, k_lo, k_hi, shift):
    """Columns k_lo..k_hi-1 of row i of a y-slab: psi <- b psi + c d(source)/dy with
    the difference source[j + shift] - source[j + shift - 1];  target -= coef psi."""
    for k in range(k_lo, k_hi):
        j = start + k
        psi[i, k] = b[k] * psi[i, k] + c[k] * (source[i, j + shift] - source[i, j + shift - 1])
        target[i, j] -= coef[i, k] * psi[i, k]


@njit(**_ROW)
def psi_y_row(source, target, i, start, b, c, psi, coef, shift):
    """Row i of a y-slab in blocks of LANES columns with a constant trip count,
    which the compiler turns into whole vector operations (grid.py pads the slabs)."""
    n = b.size
    whole = n - n % LANES
    for k0 in range(0, whole, LANES):
        psi_y_columns(source, target, i, start, b, c, psi, coef, k0, k0 + LANES, shift)
    psi_y_columns(source, target, i, start, b, c, psi, coef, whole, n, shift)


@njit(**_ROW)
def secondary_psi_y(P, S1, i, start, b, c, psi, coef):
    """Row i of a y-slab of S1 (half nodes): psi <- b psi + c dP/dy;  S1 -= coef psi."""
    psi_y_row(P, S1, i, start, b, c, psi, coef, 1)


@njit(**_ROW)
def secondary_psi_x(P, S2, i, start, b, c, psi, coef):
    """Row i of S2 if it lies in this x-slab: psi <- b psi + c dP/dx;  S2 += coef psi."""
    k = i - start
    if 0 <= k < b.size:
        bk = b[k]
        ck = c[k]
        p0 = P[i]
        p1 = P[i + 1]
        s2 = S2[i]
        q = psi[k]
        w = coef[k]
        for j in range(s2.size):
            q[j] = bk * q[j] + ck * (p1[j] - p0[j])
            s2[j] += w[j] * q[j]


# --- one row of the primary --------------------------------------------------

@njit(**_ROW)
def primary_row(P, S1, S2, i, homog, ca, cb, ca_arr, cb_arr, gxn, gyn):
    """P[i] = ca P + cb (dS2/dx - dS1/dy) on the inner nodes of row i (1D row views)."""
    nyp = P.shape[1]
    g = gxn[i]
    p = P[i]
    s1 = S1[i]
    s2 = S2[i]
    s2m = S2[i - 1]
    if homog:
        for j in range(1, nyp - 1):
            p[j] = ca * p[j] + cb * ((s2[j] - s2m[j]) * g - (s1[j] - s1[j - 1]) * gyn[j])
    else:
        a = ca_arr[i]
        b = cb_arr[i]
        for j in range(1, nyp - 1):
            p[j] = a[j] * p[j] + b[j] * ((s2[j] - s2m[j]) * g - (s1[j] - s1[j - 1]) * gyn[j])


@njit(**_ROW)
def primary_psi_x(S2, P, i, start, b, c, psi, coef, j_lo, j_hi):
    """Row i of P if it lies in this x-slab: psi <- b psi + c dS2/dx;  P += coef psi."""
    k = i - start
    if 0 <= k < b.size:
        bk = b[k]
        ck = c[k]
        s2 = S2[i]
        s2m = S2[i - 1]
        p = P[i]
        q = psi[k]
        w = coef[k]
        for j in range(j_lo, j_hi):
            q[j] = bk * q[j] + ck * (s2[j] - s2m[j])
            p[j] += w[j] * q[j]


@njit(**_ROW)
def primary_psi_y(S1, P, i, start, b, c, psi, coef):
    """Row i of a y-slab of P (never column 0): psi <- b psi + c dS1/dy;  P -= coef psi."""
    psi_y_row(S1, P, i, start, b, c, psi, coef, 0)


@njit(**_SERIAL)
def primary_psi(S1, S2, P, i, x_slabs, y_slabs, j_lo, j_hi):
    """All psi terms of row i of P: x-slabs over columns j_lo..j_hi-1, then y-slabs."""
    for start, b, c, psi, coef in (x_slabs[2], x_slabs[3]):
        primary_psi_x(S2, P, i, start, b, c, psi, coef, j_lo, j_hi)
    for start, b, c, psi, coef in (y_slabs[2], y_slabs[3]):
        primary_psi_y(S1, P, i, start, b, c, psi, coef)


# --- one whole step ---------------------------------------------------------

@njit(**_SWEEP)
def sweep_rows(P, S1, S2, sc, pc, x_slabs, y_slabs, first, last, defer_first):
    """Rows first..last-1 of one step: S1, S2 and their psi, then P and its psi.

    sc = (homog, ca, cb, ca1, cb1, ca2, cb2); pc = (homog, ca, cb, ca_arr, cb_arr);
    x_slabs = (S2 low, S2 high, P low, P high, gxn, gxh), y_slabs likewise with
    S1 and (gyn, gyh).  Row 0 and the last row of P are walls or periodic
    seams, done elsewhere.  defer_first: leave P of row `first` for
    finish_primary_row, because the S2 row before it belongs to another chunk.
    """
    nxp, nyp = P.shape
    s_homog, s_ca, s_cb, s_ca1, s_cb1, s_ca2, s_cb2 = sc
    p_homog, p_ca, p_cb, p_ca_arr, p_cb_arr = pc
    sx_lo, sx_hi, px_lo, px_hi, gxn, gxh = x_slabs
    sy_lo, sy_hi, py_lo, py_hi, gyn, gyh = y_slabs
    for i in range(first, last):
        secondary_row(P, S1, S2, i, s_homog, s_ca, s_cb, s_ca1, s_cb1, s_ca2, s_cb2, gyh, gxh)
        secondary_psi_y(P, S1, i, sy_lo[0], sy_lo[1], sy_lo[2], sy_lo[3], sy_lo[4])
        secondary_psi_y(P, S1, i, sy_hi[0], sy_hi[1], sy_hi[2], sy_hi[3], sy_hi[4])
        if i < nxp - 1:
            secondary_psi_x(P, S2, i, sx_lo[0], sx_lo[1], sx_lo[2], sx_lo[3], sx_lo[4])
            secondary_psi_x(P, S2, i, sx_hi[0], sx_hi[1], sx_hi[2], sx_hi[3], sx_hi[4])
        if 1 <= i < nxp - 1 and not (defer_first and i == first):
            primary_row(P, S1, S2, i, p_homog, p_ca, p_cb, p_ca_arr, p_cb_arr, gxn, gyn)
            primary_psi_x(S2, P, i, px_lo[0], px_lo[1], px_lo[2], px_lo[3], px_lo[4], 1, nyp - 1)
            primary_psi_x(S2, P, i, px_hi[0], px_hi[1], px_hi[2], px_hi[3], px_hi[4], 1, nyp - 1)
            primary_psi_y(S1, P, i, py_lo[0], py_lo[1], py_lo[2], py_lo[3], py_lo[4])
            primary_psi_y(S1, P, i, py_hi[0], py_hi[1], py_hi[2], py_hi[3], py_hi[4])


@njit(**_SWEEP)
def finish_primary_row(P, S1, S2, pc, x_slabs, y_slabs, i):
    """P of one inner row and its psi terms (the deferred first row of a chunk)."""
    nyp = P.shape[1]
    p_homog, p_ca, p_cb, p_ca_arr, p_cb_arr = pc
    primary_row(P, S1, S2, i, p_homog, p_ca, p_cb, p_ca_arr, p_cb_arr, x_slabs[4], y_slabs[4])
    primary_psi(S1, S2, P, i, x_slabs, y_slabs, 1, nyp - 1)


@njit(**_PARALLEL)
def sweep_chunks(P, S1, S2, sc, pc, x_slabs, y_slabs, chunk_starts):
    """One step in len(chunk_starts) - 1 row chunks, one per thread.

    A parallel loop takes arrays and scalars only, so the tuples are unpacked
    here and rebuilt inside the loop body.
    """
    s_homog, s_ca, s_cb, s_ca1, s_cb1, s_ca2, s_cb2 = sc
    p_homog, p_ca, p_cb, p_ca_arr, p_cb_arr = pc
    (a_start, a_b, a_c, a_psi, a_coef), (b_start, b_b, b_c, b_psi, b_coef) = x_slabs[0], x_slabs[1]
    (c_start, c_b, c_c, c_psi, c_coef), (d_start, d_b, d_c, d_psi, d_coef) = x_slabs[2], x_slabs[3]
    (e_start, e_b, e_c, e_psi, e_coef), (f_start, f_b, f_c, f_psi, f_coef) = y_slabs[0], y_slabs[1]
    (g_start, g_b, g_c, g_psi, g_coef), (h_start, h_b, h_c, h_psi, h_coef) = y_slabs[2], y_slabs[3]
    gxn, gxh = x_slabs[4], x_slabs[5]
    gyn, gyh = y_slabs[4], y_slabs[5]
    n_chunks = chunk_starts.size - 1
    for chunk in prange(n_chunks):
        xs = ((a_start, a_b, a_c, a_psi, a_coef), (b_start, b_b, b_c, b_psi, b_coef),
              (c_start, c_b, c_c, c_psi, c_coef), (d_start, d_b, d_c, d_psi, d_coef), gxn, gxh)
        ys = ((e_start, e_b, e_c, e_psi, e_coef), (f_start, f_b, f_c, f_psi, f_coef),
              (g_start, g_b, g_c, g_psi, g_coef), (h_start, h_b, h_c, h_psi, h_coef), gyn, gyh)
        sweep_rows(P, S1, S2, (s_homog, s_ca, s_cb, s_ca1, s_cb1, s_ca2, s_cb2),
                   (p_homog, p_ca, p_cb, p_ca_arr, p_cb_arr), xs, ys,
                   chunk_starts[chunk], chunk_starts[chunk + 1], chunk > 0)


@njit(**_SERIAL)
def step_rows(P, S1, S2, sc, pc, x_slabs, y_slabs, chunk_starts):
    """One step over every row: in one sweep, or in parallel chunks whose first
    P rows wait until every chunk's S2 is done."""
    nxp = P.shape[0]
    if chunk_starts.size <= 2:
        # run-time values, not literals: a literal 0 or False would compile a second copy of the sweep
        no_deferral = chunk_starts.size < 0
        sweep_rows(P, S1, S2, sc, pc, x_slabs, y_slabs, chunk_starts[0], nxp, no_deferral)
        return
    sweep_chunks(P, S1, S2, sc, pc, x_slabs, y_slabs, chunk_starts)
    for chunk in range(1, chunk_starts.size - 1):
        i = chunk_starts[chunk]
        if 1 <= i < nxp - 1:
            finish_primary_row(P, S1, S2, pc, x_slabs, y_slabs, i)


# --- periodic seams ---------------------------------------------------------

@njit(**_SERIAL)
def primary_seams(P, S1, S2, pc, x_slabs, y_slabs, periodic_x, periodic_y):
    """P on the seam nodes of periodic axes (row 0 and/or column 0), with
    wrapped neighbours, then their psi terms from the other axis' layers."""
    nxp, nyp = P.shape
    nx = nxp - 1
    ny = nyp - 1
    homog, ca, cb, ca_arr, cb_arr = pc
    gxn = x_slabs[4]
    gyn = y_slabs[4]
    if periodic_x:  # row 0; its neighbour row -1 is row nx - 1
        for j in range(0 if periodic_y else 1, ny):
            jm = j - 1 if j > 0 else ny - 1
            a = ca if homog else ca_arr[0, j]
            b = cb if homog else cb_arr[0, j]
            P[0, j] = a * P[0, j] + b * ((S2[0, j] - S2[nx - 1, j]) * gxn[0] - (S1[0, j] - S1[0, jm]) * gyn[j])
        for start, b, c, psi, coef in (y_slabs[2], y_slabs[3]):
            primary_psi_y(S1, P, 0, start, b, c, psi, coef)
    if periodic_y:  # column 0 of the inner rows; neighbour column -1 is ny - 1
        for i in range(1, nx if periodic_x else nxp - 1):
            a = ca if homog else ca_arr[i, 0]
            b = cb if homog else cb_arr[i, 0]
            P[i, 0] = a * P[i, 0] + b * ((S2[i, 0] - S2[i - 1, 0]) * gxn[i] - (S1[i, 0] - S1[i, ny - 1]) * gyn[0])
            for start, b, c, psi, coef in (x_slabs[2], x_slabs[3]):
                primary_psi_x(S2, P, i, start, b, c, psi, coef, 0, 1)


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


@njit(**_SERIAL)
def squared_error_sums(test, ref):
    """(sum (test - ref)^2, sum ref^2) over two flat arrays of equal size,
    without the temporaries NumPy would make."""
    err = 0.0
    total = 0.0
    for n in range(ref.size):
        r = float(ref[n])
        d = float(test[n]) - r
        err += d * d
        total += r * r
    return err, total


# --- the time loop ----------------------------------------------------------

@njit(**_SERIAL)
def advance(first_step, n_steps, P, S1, S2, secondary_coef, primary_coef, x_slabs, y_slabs,
            chunk_starts, periodic_x, periodic_y, src_i, src_j, src_coef, wave,
            probe_i, probe_j, probe_out, frames, frame_every, frame_i0, frame_j0):
    """Run n_steps leapfrog steps from first_step (see step_rows for the tuples).

    wave[n] is the source sample at (n + 1/2) dt; probe_out[n + 1, m]
    receives P at probe m after step n.  With frame_every > 0, frames[k]
    receives the window of P starting at (frame_i0, frame_j0) after step
    (k + 1) frame_every: frames are taken here so a run is a few calls, not
    one call per frame.
    """
    for n in range(first_step, first_step + n_steps):
        step_rows(P, S1, S2, secondary_coef, primary_coef, x_slabs, y_slabs, chunk_starts)
        if periodic_x or periodic_y:
            primary_seams(P, S1, S2, primary_coef, x_slabs, y_slabs, periodic_x, periodic_y)
        add_source(P, src_i, src_j, src_coef, wave[n])
        copy_ghosts(P, periodic_x, periodic_y)
        for m in range(probe_i.size):
            probe_out[n + 1, m] = P[probe_i[m], probe_j[m]]
        if frame_every > 0 and (n + 1) % frame_every == 0:
            k = (n + 1) // frame_every - 1
            if k < frames.shape[0]:
                frames[k] = P[frame_i0:frame_i0 + frames.shape[1], frame_j0:frame_j0 + frames.shape[2]]


# --- the reflection-free reference on its light-cone window -------------------
#
# The reference grid has walls far away and no layer, and only two kinds of
# cell matter at step k: those the source can have reached (the rest are
# still exactly zero) and those from which the interior can still be reached
# before the run ends (the rest never influence what is recorded).  Both are
# L1 balls around a box, since the leapfrog update moves information by one
# node per step along one axis.  Updating only their intersection, with the
# same arithmetic per cell, gives the interior bitwise the same values.

@njit(**_ROW)
def axis_gap(v, lo, hi):
    """Distance of index v from the range lo..hi (0 inside it)."""
    if v < lo:
        return lo - v
    if v > hi:
        return v - hi
    return 0


@njit(**_ROW)
def cone_span(i, reach_source, reach_target, source_box, target_box, n_cols):
    """Columns j0..j1-1 of row i inside both L1 balls: within reach_source of
    source_box and within reach_target of target_box (boxes: i_lo, i_hi, j_lo, j_hi)."""
    rs = reach_source - axis_gap(i, source_box[0], source_box[1])
    rt = reach_target - axis_gap(i, target_box[0], target_box[1])
    if rs < 0 or rt < 0:
        return 0, 0
    j0 = max(source_box[2] - rs, target_box[2] - rt, 0)
    j1 = min(source_box[3] + rs, target_box[3] + rt, n_cols - 1) + 1
    return j0, max(j0, j1)


@njit(**_ROW)
def secondary_span(P, S1, S2, i, j0, j1, homog, ca, cb, ca1, cb1, ca2, cb2, gyh, gxh):
    """secondary_row on columns j0..j1-1 only.  The loops run over views from
    index 0: a loop from a variable start would get negative-index checks
    and lose its vectorisation."""
    nxp, nyp = P.shape
    n1 = min(j1, nyp - 1) - j0
    p0 = P[i, j0:]
    s1 = S1[i, j0:]
    gy = gyh[j0:]
    if homog:
        for j in range(n1):
            s1[j] = ca * s1[j] - cb * ((p0[j + 1] - p0[j]) * gy[j])
    else:
        a1 = ca1[i, j0:]
        b1 = cb1[i, j0:]
        for j in range(n1):
            s1[j] = a1[j] * s1[j] - b1[j] * ((p0[j + 1] - p0[j]) * gy[j])
    if i < nxp - 1:
        p1 = P[i + 1, j0:]
        s2 = S2[i, j0:]
        g = gxh[i]
        if homog:
            for j in range(j1 - j0):
                s2[j] = ca * s2[j] + cb * ((p1[j] - p0[j]) * g)
        else:
            a2 = ca2[i, j0:]
            b2 = cb2[i, j0:]
            for j in range(j1 - j0):
                s2[j] = a2[j] * s2[j] + b2[j] * ((p1[j] - p0[j]) * g)


@njit(**_ROW)
def primary_span(P, S1, S2, i, j0, j1, homog, ca, cb, ca_arr, cb_arr, gxn, gyn):
    """primary_row on the inner columns among j0..j1-1 only (loops over views, as above)."""
    nyp = P.shape[1]
    lo = max(j0, 1)
    n = min(j1, nyp - 1) - lo
    g = gxn[i]
    p = P[i, lo:]
    s1 = S1[i, lo:]
    s1m = S1[i, lo - 1:]
    s2 = S2[i, lo:]
    s2m = S2[i - 1, lo:]
    gy = gyn[lo:]
    if homog:
        for j in range(n):
            p[j] = ca * p[j] + cb * ((s2[j] - s2m[j]) * g - (s1[j] - s1m[j]) * gy[j])
    else:
        a = ca_arr[i, lo:]
        b = cb_arr[i, lo:]
        for j in range(n):
            p[j] = a[j] * p[j] + b[j] * ((s2[j] - s2m[j]) * g - (s1[j] - s1m[j]) * gy[j])


@njit(**_SWEEP)
def cone_rows(P, S1, S2, sc, pc, gxn, gxh, gyn, gyh, reach_source, reach_target, source_box, target_box,
              first, last, defer_first):
    """Rows first..last-1 of one step of a layer-free grid, each on its cone span
    (see sweep_rows for the order and defer_first)."""
    nxp, nyp = P.shape
    s_homog, s_ca, s_cb, s_ca1, s_cb1, s_ca2, s_cb2 = sc
    p_homog, p_ca, p_cb, p_ca_arr, p_cb_arr = pc
    for i in range(first, last):
        j0, j1 = cone_span(i, reach_source, reach_target, source_box, target_box, nyp)
        if j0 < j1:
            secondary_span(P, S1, S2, i, j0, j1, s_homog, s_ca, s_cb, s_ca1, s_cb1, s_ca2, s_cb2, gyh, gxh)
            if 1 <= i < nxp - 1 and not (defer_first and i == first):
                primary_span(P, S1, S2, i, j0, j1, p_homog, p_ca, p_cb, p_ca_arr, p_cb_arr, gxn, gyn)


@njit(**_SERIAL)
def cone_finish(n, P, S1, S2, pc, x_slabs, y_slabs, gxn, gyn, reach_source, reach_target, source_box,
                target_box, deferred, periodic_x, periodic_y, src_i, src_j, src_coef, wave,
                probe_i, probe_j, probe_out, frames, frame_every, frame_i0, frame_j0):
    """The rest of step n after cone_rows: the deferred first rows of later chunks,
    periodic seams, source, ghosts, probes and frames (as in advance)."""
    nxp, nyp = P.shape
    p_homog, p_ca, p_cb, p_ca_arr, p_cb_arr = pc
    for k in range(deferred.size):
        i = deferred[k]
        if 1 <= i < nxp - 1:
            j0, j1 = cone_span(i, reach_source, reach_target, source_box, target_box, nyp)
            primary_span(P, S1, S2, i, j0, j1, p_homog, p_ca, p_cb, p_ca_arr, p_cb_arr, gxn, gyn)
    if periodic_x or periodic_y:
        primary_seams(P, S1, S2, pc, x_slabs, y_slabs, periodic_x, periodic_y)
    add_source(P, src_i, src_j, src_coef, wave[n])
    copy_ghosts(P, periodic_x, periodic_y)
    record_step(n, P, probe_i, probe_j, probe_out, frames, frame_every, frame_i0, frame_j0)


@njit(**_ROW)
def record_step(n, P, probe_i, probe_j, probe_out, frames, frame_every, frame_i0, frame_j0):
    """Probe values after step n into probe_out[n + 1]; a frame every frame_every steps."""
    for m in range(probe_i.size):
        probe_out[n + 1, m] = P[probe_i[m], probe_j[m]]
    if frame_every > 0 and (n + 1) % frame_every == 0:
        k = (n + 1) // frame_every - 1
        if k < frames.shape[0]:
            frames[k] = P[frame_i0:frame_i0 + frames.shape[1], frame_j0:frame_j0 + frames.shape[2]]

