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
b = c = 0: the psi of those columns stays zero, so they get exactly the
plain update (grid.py keeps the two slabs of a field apart).

One step is one sweep over the rows (`sweep_rows`): row i of S1 and S2 with
their psi terms, then row i of P with its psi terms.  The psi updates are
fused into the field updates: a row is split into plain column runs and the
y-slab columns, whose loop updates psi and the field together; a row of an
x-slab updates S2 and its psi in one loop (P's x-psi is a second pass over
that row).  So the layer cells cost about one more read and write of psi
and coef each, not a separate pass over the field.  Row i of P needs S2 of
rows i-1 and i, which are both new by then, and S2 of row i reads P of row
i+1, which is still old: so the leapfrog order holds within one pass and the
fields are read from memory once per step instead of twice.  Threads take
contiguous chunks of rows; the first P row of each later chunk needs the
previous chunk's last S2 row, so it waits until all chunks are done.

Every kernel takes plain arrays and scalars of one dtype; no Python objects.
Update coefficients come as scalars (a homogeneous field) or arrays
(materials).
"""

from llvmlite import ir
from numba import njit, prange
from numba.core.extending import intrinsic

_SERIAL = dict(cache=True, nogil=True)
_PARALLEL = dict(cache=True, nogil=True, parallel=True)
_ROW = dict(cache=True, nogil=True, inline="always")  # row helpers: no call cost per row
# The row sweep only reads and writes arrays its caller owns: without reference
# counting on the per-row views (and with numpy's error model) the compiler keeps
# the row loops vectorised, about twice as fast as the default.  No fastmath
# "contract": which a * b + c become one multiply-add depends on how each copy
# of the sweep is optimised (serial, threaded, cached or fresh), and runs in
# different processes would then differ in the last bits.
_SWEEP = dict(cache=True, nogil=True, error_model="numpy", _nrt=False)
# Inlined into advance: one jitted level less, so the sweep's machine code is
# optimised one time fewer when advance is compiled.
_STEP = dict(cache=True, nogil=True, inline="always")
LANES = 16  # y-slabs are padded to whole multiples: whole vectors, no scalar tail


# --- column runs of one row -------------------------------------------------
# Each helper updates one field on a run of columns of one row, given as 1D
# row views.  numba wraps negative indices, and a select per load keeps a loop
# scalar unless the compiler can prove the index non-negative, which it cannot
# for a run-time start column: `index` states it, so the loops vectorise.  A
# "psi" run is the update fused with the psi of a y-slab (or of a whole
# x-slab row): the field and its difference are read once for both.

@intrinsic
def index(typingctx, j):
    """j, which the caller guarantees is >= 0 (an llvm.assume; no code)."""
    def codegen(context, builder, signature, args):
        [value] = args
        assume = builder.module.declare_intrinsic(
            "llvm.assume", fnty=ir.FunctionType(ir.VoidType(), [ir.IntType(1)]))
        builder.call(assume, [builder.icmp_signed(">=", value, value.type(0))])
        return value
    return j(j), codegen


@njit(**_ROW)
def s1_columns(p0, s1, gyh, j_lo, j_hi, homog, ca, cb, a1, b1):
    """S1 = ca S1 - cb dP/dy on columns j_lo..j_hi-1 (a1, b1: per-node ca, cb)."""
    if homog:
        for jj in range(j_lo, j_hi):
            j, j1 = index(jj), index(jj + 1)
            s1[j] = ca * s1[j] - cb * ((p0[j1] - p0[j]) * gyh[j])
    else:
        for jj in range(j_lo, j_hi):
            j, j1 = index(jj), index(jj + 1)
            s1[j] = a1[j] * s1[j] - b1[j] * ((p0[j1] - p0[j]) * gyh[j])


@njit(**_ROW)
def s1_psi_slab(p0, s1, gyh, homog, ca, cb, a1, b1, slab, i):
    """Row i of S1 on the columns of one y-slab, with their psi:
    psi <- b psi + c dP/dy;  S1 = (ca S1 - cb dP/dy gyh) - coef psi."""
    start, bs, cs, psi, coef = slab
    q, w = psi[i], coef[i]
    if homog:
        for k in range(bs.size):
            j, j1 = index(start + k), index(start + k + 1)
            d = p0[j1] - p0[j]
            q[k] = bs[k] * q[k] + cs[k] * d
            s1[j] = (ca * s1[j] - cb * (d * gyh[j])) - w[k] * q[k]
    else:
        for k in range(bs.size):
            j, j1 = index(start + k), index(start + k + 1)
            d = p0[j1] - p0[j]
            q[k] = bs[k] * q[k] + cs[k] * d
            s1[j] = (a1[j] * s1[j] - b1[j] * (d * gyh[j])) - w[k] * q[k]


@njit(**_ROW)
def s2_row(p0, p1, s2, g, homog, ca, cb, a2, b2):
    """S2 = ca S2 + cb dP/dx on one row."""
    if homog:
        for j in range(s2.size):
            s2[j] = ca * s2[j] + cb * ((p1[j] - p0[j]) * g)
    else:
        for j in range(s2.size):
            s2[j] = a2[j] * s2[j] + b2[j] * ((p1[j] - p0[j]) * g)


@njit(**_ROW)
def s2_psi_row(p0, p1, s2, g, homog, ca, cb, a2, b2, bk, ck, q, w):
    """S2 on one row of an x-slab with its psi: psi <- bk psi + ck dP/dx;
    S2 = (ca S2 + cb dP/dx g) + coef psi."""
    if homog:
        for j in range(s2.size):
            d = p1[j] - p0[j]
            q[j] = bk * q[j] + ck * d
            s2[j] = (ca * s2[j] + cb * (d * g)) + w[j] * q[j]
    else:
        for j in range(s2.size):
            d = p1[j] - p0[j]
            q[j] = bk * q[j] + ck * d
            s2[j] = (a2[j] * s2[j] + b2[j] * (d * g)) + w[j] * q[j]


@njit(**_ROW)
def p_columns(p, s1, s2, s2m, g, gyn, j_lo, j_hi, homog, ca, cb, a, b):
    """P = ca P + cb (dS2/dx - dS1/dy) on columns j_lo..j_hi-1 (j_lo >= 1)."""
    if homog:
        for jj in range(j_lo, j_hi):
            j, jm = index(jj), index(jj - 1)
            p[j] = ca * p[j] + cb * ((s2[j] - s2m[j]) * g - (s1[j] - s1[jm]) * gyn[j])
    else:
        for jj in range(j_lo, j_hi):
            j, jm = index(jj), index(jj - 1)
            p[j] = a[j] * p[j] + b[j] * ((s2[j] - s2m[j]) * g - (s1[j] - s1[jm]) * gyn[j])


@njit(**_ROW)
def p_psi_slab(p, s1, s2, s2m, g, gyn, homog, ca, cb, a, b, slab, i):
    """Row i of P on the columns of one y-slab (never column 0), with their psi:
    psi <- b psi + c dS1/dy;  P = (ca P + cb curl) - coef psi."""
    start, bs, cs, psi, coef = slab
    q, w = psi[i], coef[i]
    if homog:
        for k in range(bs.size):
            j, jm = index(start + k), index(start + k - 1)
            d = s1[j] - s1[jm]
            q[k] = bs[k] * q[k] + cs[k] * d
            p[j] = (ca * p[j] + cb * ((s2[j] - s2m[j]) * g - d * gyn[j])) - w[k] * q[k]
    else:
        for k in range(bs.size):
            j, jm = index(start + k), index(start + k - 1)
            d = s1[j] - s1[jm]
            q[k] = bs[k] * q[k] + cs[k] * d
            p[j] = (a[j] * p[j] + b[j] * ((s2[j] - s2m[j]) * g - d * gyn[j])) - w[k] * q[k]


@njit(**_ROW)
def x_slab_of_row(lo, hi, i):
    """The one of two x-slabs that holds row i (hi when neither does)."""
    return lo if 0 <= i - lo[0] < lo[1].size else hi


@njit(**_ROW)
def column_runs(first, last, lo, hi):
    """(first, a, b, c, d, last): the plain columns of a row are first..a-1,
    b..c-1 and d..last-1, around the columns of the y-slabs lo and hi."""
    lo_start, lo_n = lo[0], lo[1].size
    hi_start, hi_n = hi[0], hi[1].size
    a = lo_start if lo_n > 0 else first
    b = lo_start + lo_n if lo_n > 0 else first
    c = hi_start if hi_n > 0 else last
    d = hi_start + hi_n if hi_n > 0 else last
    return first, a, b, c, d, last


# --- one row of each field --------------------------------------------------

@njit(**_ROW)
def secondary_row(P, S1, S2, i, homog, ca, cb, ca1, cb1, ca2, cb2, gyh, gxh):
    """S1[i] = ca S1 - cb dP/dy;  S2[i] = ca S2 + cb dP/dx (scalar or per-node ca, cb),
    without psi."""
    nxp, nyp = P.shape
    r = 0 if homog else i
    s1_columns(P[i], S1[i], gyh, 0, nyp - 1, homog, ca, cb, ca1[r], cb1[r])
    if i < nxp - 1:
        s2_row(P[i], P[i + 1], S2[i], gxh[i], homog, ca, cb, ca2[r], cb2[r])


@njit(**_ROW)
def secondary_row_psi(P, S1, S2, i, sc, x_slabs, y_slabs):
    """Row i of S1 and S2 with every psi term of the row (sc: see sweep_rows)."""
    nxp, nyp = P.shape
    homog, ca, cb, ca1, cb1, ca2, cb2 = sc
    gxh, gyh = x_slabs[5], y_slabs[5]
    r = 0 if homog else i
    a1, b1 = ca1[r], cb1[r]
    p0 = P[i]
    s1 = S1[i]
    ny = nyp - 1
    lo, hi = y_slabs[0], y_slabs[1]
    runs = column_runs(0, ny, lo, hi)
    for run in range(3):  # one loop, not three inlined copies of it: less to compile
        s1_columns(p0, s1, gyh, runs[2 * run], runs[2 * run + 1], homog, ca, cb, a1, b1)
    for slab in (lo, hi):
        s1_psi_slab(p0, s1, gyh, homog, ca, cb, a1, b1, slab, i)
    if i < nxp - 1:
        p1 = P[i + 1]
        s2 = S2[i]
        a2, b2 = ca2[r], cb2[r]
        slab = x_slab_of_row(x_slabs[0], x_slabs[1], i)
        k = i - slab[0]
        if 0 <= k < slab[1].size:
            s2_psi_row(p0, p1, s2, gxh[i], homog, ca, cb, a2, b2, slab[1][k], slab[2][k], slab[3][k], slab[4][k])
        else:
            s2_row(p0, p1, s2, gxh[i], homog, ca, cb, a2, b2)


@njit(**_ROW)
def primary_row(P, S1, S2, i, homog, ca, cb, ca_arr, cb_arr, gxn, gyn):
    """P[i] = ca P + cb (dS2/dx - dS1/dy) on the inner nodes of row i, without psi."""
    nyp = P.shape[1]
    r = 0 if homog else i
    p_columns(P[i], S1[i], S2[i], S2[i - 1], gxn[i], gyn, 1, nyp - 1, homog, ca, cb, ca_arr[r], cb_arr[r])


@njit(**_ROW)
def primary_psi_x(S2, P, i, slab, j_lo, j_hi):
    """Columns j_lo..j_hi-1 of row i of P, if the row lies in this x-slab:
    psi <- b psi + c dS2/dx;  P += coef psi."""
    start, b, c, psi, coef = slab
    k = i - start
    if 0 <= k < b.size:
        bk = b[k]
        ck = c[k]
        s2, s2m, p, q, w = S2[i], S2[i - 1], P[i], psi[k], coef[k]
        for jj in range(j_lo, j_hi):
            j = index(jj)
            q[j] = bk * q[j] + ck * (s2[j] - s2m[j])
            p[j] += w[j] * q[j]


@njit(**_ROW)
def primary_psi_y(S1, P, i, start, b, c, psi, coef):
    """Row i of a y-slab of P, as a pass of its own (the periodic seam row):
    psi <- b psi + c dS1/dy;  P -= coef psi."""
    q, w, s1, p = psi[i], coef[i], S1[i], P[i]
    for k in range(b.size):
        j = start + k
        q[k] = b[k] * q[k] + c[k] * (s1[j] - s1[j - 1])
        p[j] -= w[k] * q[k]


@njit(**_ROW)
def primary_row_psi(P, S1, S2, i, pc, x_slabs, y_slabs):
    """Inner row i of P with every psi term: the y-slab columns fused into the
    row, then the x-slab psi (if the row is in one) as a second pass."""
    nyp = P.shape[1]
    homog, ca, cb, ca_arr, cb_arr = pc
    r = 0 if homog else i
    a_row, b_row = ca_arr[r], cb_arr[r]
    gxn, gyn = x_slabs[4], y_slabs[4]
    g = gxn[i]
    p, s1, s2, s2m = P[i], S1[i], S2[i], S2[i - 1]
    lo, hi = y_slabs[2], y_slabs[3]
    runs = column_runs(1, nyp - 1, lo, hi)
    for run in range(3):
        p_columns(p, s1, s2, s2m, g, gyn, runs[2 * run], runs[2 * run + 1], homog, ca, cb, a_row, b_row)
    for slab in (lo, hi):
        p_psi_slab(p, s1, s2, s2m, g, gyn, homog, ca, cb, a_row, b_row, slab, i)
    primary_psi_x(S2, P, i, x_slab_of_row(x_slabs[2], x_slabs[3], i), 1, nyp - 1)


# --- one whole step ---------------------------------------------------------

@njit(**_SWEEP)
def sweep_rows(P, S1, S2, sc, pc, x_slabs, y_slabs, first, last, p_first, secondaries):
    """Rows first..last-1 of one step: S1, S2 and their psi (if `secondaries`),
    then P and its psi from row p_first on.

    sc = (homog, ca, cb, ca1, cb1, ca2, cb2); pc = (homog, ca, cb, ca_arr, cb_arr);
    x_slabs = (S2 low, S2 high, P low, P high, gxn, gxh), y_slabs likewise with
    S1 and (gyn, gyh).  Row 0 and the last row of P are walls or periodic
    seams, done elsewhere.  A chunk of rows after the first sets p_first =
    first + 1: P of its first row needs the S2 row before it, which belongs
    to another chunk, so step_rows does that row afterwards with
    secondaries False.  (One function for both, so it is compiled once.)
    """
    nxp = P.shape[0]
    for i in range(first, last):
        if secondaries:
            secondary_row_psi(P, S1, S2, i, sc, x_slabs, y_slabs)
        if i >= p_first and 1 <= i < nxp - 1:
            primary_row_psi(P, S1, S2, i, pc, x_slabs, y_slabs)


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
        first = chunk_starts[chunk]
        sweep_rows(P, S1, S2, (s_homog, s_ca, s_cb, s_ca1, s_cb1, s_ca2, s_cb2),
                   (p_homog, p_ca, p_cb, p_ca_arr, p_cb_arr), xs, ys,
                   first, chunk_starts[chunk + 1], first + 1 if chunk > 0 else first, chunk >= 0)


@njit(**_STEP)
def step_rows(P, S1, S2, sc, pc, x_slabs, y_slabs, chunk_starts):
    """One step over every row: in one sweep, or in parallel chunks whose first
    P rows wait until every chunk's S2 is done."""
    nxp = P.shape[0]
    if chunk_starts.size <= 2:
        # run-time values, not literals: a literal would compile a second copy of the sweep
        first = chunk_starts[0]
        sweep_rows(P, S1, S2, sc, pc, x_slabs, y_slabs, first, nxp, first, chunk_starts.size > 0)
        return
    sweep_chunks(P, S1, S2, sc, pc, x_slabs, y_slabs, chunk_starts)
    for chunk in range(1, chunk_starts.size - 1):
        i = chunk_starts[chunk]
        sweep_rows(P, S1, S2, sc, pc, x_slabs, y_slabs, i, i + 1, i, chunk_starts.size < 0)


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
            primary_psi_x(S2, P, i, x_slabs[2], 0, 1)
            primary_psi_x(S2, P, i, x_slabs[3], 0, 1)


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


# The energy guard sums the whole grid every check_every steps: "reassoc" lets
# the compiler keep several partial sums in a vector, about 15 times faster
# than one chain (1.0 ms -> 0.06 ms per check at 256 x 256).  Called only from
# Python, so there is one compiled copy and one summation order.
_SUM = dict(cache=True, nogil=True, fastmath={"reassoc"})


@njit(**_SUM)
def sum_squares(A, i0, i1, j0, j1):
    """sum A^2 over rows i0..i1-1, columns j0..j1-1 (whole arrays, so each row
    is contiguous and its loop vectorises)."""
    total = 0.0
    for i in range(i0, i1):
        row = A[i]
        for jj in range(j0, j1):
            j = index(jj)
            total += float(row[j]) * float(row[j])
    return total


@njit(**_SUM)
def sum_weighted_squares(A, W, i0, i1, j0, j1):
    """sum W A^2 over rows i0..i1-1, columns j0..j1-1 (A and W of one shape)."""
    total = 0.0
    for i in range(i0, i1):
        row, w = A[i], W[i]
        for jj in range(j0, j1):
            j = index(jj)
            total += float(w[j]) * float(row[j]) * float(row[j])
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
        finish_step(n, P, S1, S2, primary_coef, x_slabs, y_slabs, periodic_x, periodic_y, src_i, src_j,
                    src_coef, wave, probe_i, probe_j, probe_out, frames, frame_every, frame_i0, frame_j0)


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
    """secondary_row on columns j0..j1-1 only."""
    nxp, nyp = P.shape
    r = 0 if homog else i
    s1_columns(P[i], S1[i], gyh, j0, min(j1, nyp - 1), homog, ca, cb, ca1[r], cb1[r])
    if i < nxp - 1:
        a2, b2 = ca2[r], cb2[r]
        if not homog:
            a2, b2 = a2[j0:j1], b2[j0:j1]
        s2_row(P[i, j0:j1], P[i + 1, j0:j1], S2[i, j0:j1], gxh[i], homog, ca, cb, a2, b2)


@njit(**_ROW)
def primary_span(P, S1, S2, i, j0, j1, homog, ca, cb, ca_arr, cb_arr, gxn, gyn):
    """primary_row on the inner columns among j0..j1-1 only."""
    nyp = P.shape[1]
    r = 0 if homog else i
    p_columns(P[i], S1[i], S2[i], S2[i - 1], gxn[i], gyn, max(j0, 1), min(j1, nyp - 1), homog, ca, cb,
              ca_arr[r], cb_arr[r])


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
    finish_step(n, P, S1, S2, pc, x_slabs, y_slabs, periodic_x, periodic_y, src_i, src_j, src_coef, wave,
                probe_i, probe_j, probe_out, frames, frame_every, frame_i0, frame_j0)


@njit(**_ROW)
def finish_step(n, P, S1, S2, pc, x_slabs, y_slabs, periodic_x, periodic_y, src_i, src_j, src_coef, wave,
                probe_i, probe_j, probe_out, frames, frame_every, frame_i0, frame_j0):
    """The end of step n once the rows are swept: periodic seams, source, ghost
    copies; probe values into probe_out[n + 1]; a frame every frame_every steps."""
    if periodic_x or periodic_y:
        primary_seams(P, S1, S2, pc, x_slabs, y_slabs, periodic_x, periodic_y)
    add_source(P, src_i, src_j, src_coef, wave[n])
    copy_ghosts(P, periodic_x, periodic_y)
    for m in range(probe_i.size):
        probe_out[n + 1, m] = P[probe_i[m], probe_j[m]]
    if frame_every > 0 and (n + 1) % frame_every == 0:
        k = (n + 1) // frame_every - 1
        if k < frames.shape[0]:
            frames[k] = P[frame_i0:frame_i0 + frames.shape[1], frame_j0:frame_j0 + frames.shape[2]]

