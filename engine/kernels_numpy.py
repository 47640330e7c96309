"""The update loops of kernels.py written with whole-array NumPy operations.

Same functions, same arguments, same arithmetic element by element (the
same operations in the same order and precision), so a run gives bitwise the
same fields as the compiled kernels (a test checks this).  It is several
times slower and needs no compilation: the page uses it for its first
results while the compiled kernels are built for the machine (backend.py).

The fused row sweep of the kernels updates S1/S2 from the old P and then P
from the new S1/S2, row by row; element by element that is the same as
updating all of S1 and S2 first and then all of P, which is what is done
here.  The light-cone functions update the bounding rectangle of the cone's
rows and columns: the extra cells are still zero or never reach the
interior, so the recorded values are the same.
"""

from __future__ import annotations

import numpy as np


# --- one step ------------------------------------------------------------------

def _secondaries(P, S1, S2, sc, gyh, gxh, rows, cols):
    """S1 and S2 from P on rows r0..r1-1, columns c0..c1-1 (clipped to each array)."""
    homog, ca, cb, ca1, cb1, ca2, cb2 = sc
    nxp, nyp = P.shape
    r0, r1 = rows
    c0, c1 = cols
    h1 = slice(c0, min(c1, nyp - 1))
    dy = (P[r0:r1, h1.start + 1:h1.stop + 1] - P[r0:r1, h1]) * gyh[h1]
    if homog:
        S1[r0:r1, h1] = ca * S1[r0:r1, h1] - cb * dy
    else:
        S1[r0:r1, h1] = ca1[r0:r1, h1] * S1[r0:r1, h1] - cb1[r0:r1, h1] * dy
    h2 = slice(r0, min(r1, nxp - 1))
    dx = (P[h2.start + 1:h2.stop + 1, c0:c1] - P[h2, c0:c1]) * gxh[h2, None]
    if homog:
        S2[h2, c0:c1] = ca * S2[h2, c0:c1] + cb * dx
    else:
        S2[h2, c0:c1] = ca2[h2, c0:c1] * S2[h2, c0:c1] + cb2[h2, c0:c1] * dx


def _primary(P, S1, S2, pc, gxn, gyn, rows, cols):
    """P from S1 and S2 on the inner nodes among rows r0..r1-1, columns c0..c1-1."""
    homog, ca, cb, ca_arr, cb_arr = pc
    nxp, nyp = P.shape
    i = slice(max(rows[0], 1), min(rows[1], nxp - 1))
    j = slice(max(cols[0], 1), min(cols[1], nyp - 1))
    if i.start >= i.stop or j.start >= j.stop:
        return
    curl = ((S2[i, j] - S2[i.start - 1:i.stop - 1, j]) * gxn[i, None]
            - (S1[i, j] - S1[i, j.start - 1:j.stop - 1]) * gyn[j])
    if homog:
        P[i, j] = ca * P[i, j] + cb * curl
    else:
        P[i, j] = ca_arr[i, j] * P[i, j] + cb_arr[i, j] * curl


def _psi_secondary(P, S1, S2, x_slabs, y_slabs):
    nxp = P.shape[0]
    for start, b, c, psi, coef in (y_slabs[0], y_slabs[1]):  # S1 in its y-slabs, every row
        n = b.size
        if n:
            psi[:] = b * psi + c * (P[:, start + 1:start + n + 1] - P[:, start:start + n])
            S1[:, start:start + n] -= coef * psi
    for start, b, c, psi, coef in (x_slabs[0], x_slabs[1]):  # S2 in its x-slabs
        n = min(b.size, nxp - 1 - start)
        if n > 0:
            psi[:n] = b[:n, None] * psi[:n] + c[:n, None] * (P[start + 1:start + n + 1] - P[start:start + n])
            S2[start:start + n] += coef[:n] * psi[:n]


def _psi_primary_x(S2, P, start, b, c, psi, coef, rows, cols):
    """P's x-psi on the slab rows among `rows` (inner rows), columns `cols`."""
    r0, r1 = max(rows[0], start), min(rows[1], start + b.size)
    if r0 >= r1:
        return
    k = slice(r0 - start, r1 - start)
    psi[k, cols] = b[k, None] * psi[k, cols] + c[k, None] * (S2[r0:r1, cols] - S2[r0 - 1:r1 - 1, cols])
    P[r0:r1, cols] += coef[k, cols] * psi[k, cols]


def _psi_primary_y(S1, P, start, b, c, psi, coef, rows):
    """P's y-psi on `rows` (never column 0)."""
    n = b.size
    if n == 0 or rows[0] >= rows[1]:
        return
    r = slice(*rows)
    psi[r] = b * psi[r] + c * (S1[r, start:start + n] - S1[r, start - 1:start + n - 1])
    P[r, start:start + n] -= coef[r] * psi[r]


def _psi_primary(P, S1, S2, x_slabs, y_slabs):
    nxp, nyp = P.shape
    inner = (1, nxp - 1)
    # the kernels fuse the y-psi into the row and add the x-psi after it: the same order here
    for start, b, c, psi, coef in (y_slabs[2], y_slabs[3]):
        _psi_primary_y(S1, P, start, b, c, psi, coef, inner)
    for start, b, c, psi, coef in (x_slabs[2], x_slabs[3]):
        _psi_primary_x(S2, P, start, b, c, psi, coef, inner, slice(1, nyp - 1))


def primary_seams(P, S1, S2, pc, x_slabs, y_slabs, periodic_x, periodic_y):
    """kernels.primary_seams."""
    homog, ca, cb, ca_arr, cb_arr = pc
    nxp, nyp = P.shape
    nx, ny = nxp - 1, nyp - 1
    gxn, gyn = x_slabs[4], y_slabs[4]
    if periodic_x:  # row 0; its neighbour row -1 is row nx - 1
        j = np.arange(0 if periodic_y else 1, ny)
        jm = np.where(j > 0, j - 1, ny - 1)
        a = ca if homog else ca_arr[0, j]
        b = cb if homog else cb_arr[0, j]
        P[0, j] = a * P[0, j] + b * ((S2[0, j] - S2[nx - 1, j]) * gxn[0] - (S1[0, j] - S1[0, jm]) * gyn[j])
        for start, bb, c, psi, coef in (y_slabs[2], y_slabs[3]):
            _psi_primary_y(S1, P, start, bb, c, psi, coef, (0, 1))
    if periodic_y:  # column 0 of the inner rows; neighbour column -1 is ny - 1
        i = slice(1, nx if periodic_x else nxp - 1)
        a = ca if homog else ca_arr[i, 0]
        b = cb if homog else cb_arr[i, 0]
        P[i, 0] = a * P[i, 0] + b * ((S2[i, 0] - S2[i.start - 1:i.stop - 1, 0]) * gxn[i]
                                     - (S1[i, 0] - S1[i, ny - 1]) * gyn[0])
        for start, bb, c, psi, coef in (x_slabs[2], x_slabs[3]):
            _psi_primary_x(S2, P, start, bb, c, psi, coef, (i.start, i.stop), slice(0, 1))


def copy_ghosts(P, periodic_x, periodic_y):
    if periodic_x:
        P[-1, :] = P[0, :]
    if periodic_y:
        P[:, -1] = P[:, 0]


def _record(n, P, src_i, src_j, src_coef, wave, probe_i, probe_j, probe_out, frames, frame_every,
            frame_i0, frame_j0, periodic_x, periodic_y):
    P[src_i, src_j] += src_coef * wave[n]
    copy_ghosts(P, periodic_x, periodic_y)
    probe_out[n + 1] = P[probe_i, probe_j]
    if frame_every > 0 and (n + 1) % frame_every == 0:
        k = (n + 1) // frame_every - 1
        if k < frames.shape[0]:
            frames[k] = P[frame_i0:frame_i0 + frames.shape[1], frame_j0:frame_j0 + frames.shape[2]]


def advance(first_step, n_steps, P, S1, S2, secondary_coef, primary_coef, x_slabs, y_slabs,
            chunk_starts, periodic_x, periodic_y, src_i, src_j, src_coef, wave,
            probe_i, probe_j, probe_out, frames, frame_every, frame_i0, frame_j0):
    """kernels.advance."""
    gxn, gxh, gyn, gyh = x_slabs[4], x_slabs[5], y_slabs[4], y_slabs[5]
    nxp, nyp = P.shape
    whole = ((0, nxp), (0, nyp))
    for n in range(first_step, first_step + n_steps):
        _secondaries(P, S1, S2, secondary_coef, gyh, gxh, *whole)
        _psi_secondary(P, S1, S2, x_slabs, y_slabs)
        _primary(P, S1, S2, primary_coef, gxn, gyn, *whole)
        _psi_primary(P, S1, S2, x_slabs, y_slabs)
        if periodic_x or periodic_y:
            primary_seams(P, S1, S2, primary_coef, x_slabs, y_slabs, periodic_x, periodic_y)
        _record(n, P, src_i, src_j, src_coef, wave, probe_i, probe_j, probe_out, frames, frame_every,
                frame_i0, frame_j0, periodic_x, periodic_y)


# --- the light-cone window of a layer-free grid ------------------------------------------

def _cone_columns(reach_source, reach_target, source_box, target_box, n_cols):
    """Columns bounding the cone's spans on every row (see kernels.cone_span)."""
    j0 = max(source_box[2] - reach_source, target_box[2] - reach_target, 0)
    j1 = min(source_box[3] + reach_source, target_box[3] + reach_target, n_cols - 1) + 1
    return j0, max(j0, j1)


def cone_rows(P, S1, S2, sc, pc, gxn, gxh, gyn, gyh, reach_source, reach_target, source_box, target_box,
              first, last, defer_first):
    """kernels.cone_rows on the rectangle around the cone (one chunk: no deferral)."""
    if defer_first:
        raise ValueError("the NumPy loops step the cone in one chunk")
    rows = (int(first), int(last))
    cols = _cone_columns(reach_source, reach_target, source_box, target_box, P.shape[1])
    if rows[0] < rows[1] and cols[0] < cols[1]:
        _secondaries(P, S1, S2, sc, gyh, gxh, rows, cols)
        _primary(P, S1, S2, pc, gxn, gyn, rows, cols)


def cone_finish(n, P, S1, S2, pc, x_slabs, y_slabs, gxn, gyn, reach_source, reach_target, source_box,
                target_box, deferred, periodic_x, periodic_y, src_i, src_j, src_coef, wave,
                probe_i, probe_j, probe_out, frames, frame_every, frame_i0, frame_j0):
    """kernels.cone_finish (there are never deferred rows here)."""
    if periodic_x or periodic_y:
        primary_seams(P, S1, S2, pc, x_slabs, y_slabs, periodic_x, periodic_y)
    _record(n, P, src_i, src_j, src_coef, wave, probe_i, probe_j, probe_out, frames, frame_every,
            frame_i0, frame_j0, periodic_x, periodic_y)


# --- sums -----------------------------------------------------------------------------------

def sum_squares(A, i0, i1, j0, j1):
    a = A[i0:i1, j0:j1].astype(np.float64)
    return float(np.einsum("ij,ij->", a, a))


def sum_weighted_squares(A, W, i0, i1, j0, j1):
    a = A[i0:i1, j0:j1].astype(np.float64)
    return float(np.einsum("ij,ij,ij->", W[i0:i1, j0:j1], a, a))


def squared_error_sums(test, ref):
    r = ref.astype(np.float64)
    d = test.astype(np.float64) - r
    return float(d @ d), float(r @ r)
