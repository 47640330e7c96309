/* A plain C loop of the engine's 2D TMz CPML step: the yardstick for
 * tests/bench/bench_engine.py.
 *
 * Same layout as engine/kernels.py: P (nxp x nyp) on the nodes, S1
 * (nxp x nyp-1) and S2 (nxp-1 x nyp) on the half nodes, psi only in the
 * layer slabs.  Each step is a secondary sweep (S1, S2 and their psi), then a
 * primary sweep (P on the inner nodes and its psi), then the source and the
 * probes.  Rows are shared between threads with OpenMP; the inner loops run
 * along a row with restrict pointers so the compiler vectorises them.
 *
 * Homogeneous media only (scalar update coefficients), walls behind the
 * layers.  Built by the benchmark twice, with REAL float and REAL double:
 *     cc -O3 -march=native -fopenmp -shared -fPIC -DREAL=float ...
 */

#include <omp.h>

#ifndef REAL
#define REAL float
#endif

/* One psi slab: rows (x-slab) or columns (y-slab) start..start+n-1.
 * x-slab psi and coef are n x (row length); y-slab ones rows x n. */
typedef struct {
    long start, n;
    const REAL *b, *c;
    REAL *psi;
    const REAL *coef;
} slab_t;

/* Slabs in this order: S2 x low/high, P x low/high, S1 y low/high, P y low/high. */
enum { SX_LO, SX_HI, PX_LO, PX_HI, SY_LO, SY_HI, PY_LO, PY_HI, N_SLABS };

static void secondary_sweep(long nxp, long nyp, const REAL *restrict P, REAL *restrict S1,
                            REAL *restrict S2, REAL sa, REAL sb, const REAL *restrict gxh,
                            const REAL *restrict gyh, const slab_t *slabs)
{
    const long ny = nyp - 1;
    #pragma omp for schedule(static)
    for (long i = 0; i < nxp; i++) {
        const REAL *restrict p0 = P + i * nyp;
        REAL *restrict s1 = S1 + i * ny;
        for (long j = 0; j < ny; j++)
            s1[j] = sa * s1[j] - sb * ((p0[j + 1] - p0[j]) * gyh[j]);
        for (int side = SY_LO; side <= SY_HI; side++) {  /* y-slab columns of this row */
            const slab_t *s = &slabs[side];
            REAL *restrict q = s->psi + i * s->n;
            const REAL *restrict w = s->coef + i * s->n;
            for (long k = 0; k < s->n; k++) {
                long j = s->start + k;
                q[k] = s->b[k] * q[k] + s->c[k] * (p0[j + 1] - p0[j]);
                s1[j] -= w[k] * q[k];
            }
        }
        if (i < nxp - 1) {
            const REAL *restrict p1 = P + (i + 1) * nyp;
            REAL *restrict s2 = S2 + i * nyp;
            const REAL g = gxh[i];
            for (long j = 0; j < nyp; j++)
                s2[j] = sa * s2[j] + sb * ((p1[j] - p0[j]) * g);
        }
    }
    for (int side = SX_LO; side <= SX_HI; side++) {  /* x-slab rows */
        const slab_t *s = &slabs[side];
        #pragma omp for schedule(static)
        for (long k = 0; k < s->n; k++) {
            long i = s->start + k;
            const REAL *restrict p0 = P + i * nyp;
            const REAL *restrict p1 = p0 + nyp;
            REAL *restrict s2 = S2 + i * nyp;
            REAL *restrict q = s->psi + k * nyp;
            const REAL *restrict w = s->coef + k * nyp;
            const REAL bk = s->b[k], ck = s->c[k];
            for (long j = 0; j < nyp; j++) {
                q[j] = bk * q[j] + ck * (p1[j] - p0[j]);
                s2[j] += w[j] * q[j];
            }
        }
    }
}

static void primary_sweep(long nxp, long nyp, REAL *restrict P, const REAL *restrict S1,
                          const REAL *restrict S2, REAL ca, REAL cb, const REAL *restrict gxn,
                          const REAL *restrict gyn, const slab_t *slabs)
{
    const long ny = nyp - 1;
    #pragma omp for schedule(static)
    for (long i = 1; i < nxp - 1; i++) {
        REAL *restrict p = P + i * nyp;
        const REAL *restrict s1 = S1 + i * ny;
        const REAL *restrict s2 = S2 + i * nyp;
        const REAL *restrict s2m = s2 - nyp;
        const REAL g = gxn[i];
        for (long j = 1; j < nyp - 1; j++)
            p[j] = ca * p[j] + cb * ((s2[j] - s2m[j]) * g - (s1[j] - s1[j - 1]) * gyn[j]);
    }
    for (int side = PX_LO; side <= PX_HI; side++) {  /* x-slab rows, inner columns */
        const slab_t *s = &slabs[side];
        #pragma omp for schedule(static)
        for (long k = 0; k < s->n; k++) {
            long i = s->start + k;
            if (i < 1 || i >= nxp - 1)
                continue;
            REAL *restrict p = P + i * nyp;
            const REAL *restrict s2 = S2 + i * nyp;
            const REAL *restrict s2m = s2 - nyp;
            REAL *restrict q = s->psi + k * nyp;
            const REAL *restrict w = s->coef + k * nyp;
            const REAL bk = s->b[k], ck = s->c[k];
            for (long j = 1; j < nyp - 1; j++) {
                q[j] = bk * q[j] + ck * (s2[j] - s2m[j]);
                p[j] += w[j] * q[j];
            }
        }
    }
    #pragma omp for schedule(static)
    for (long i = 1; i < nxp - 1; i++) {  /* y-slab columns of the inner rows */
        REAL *restrict p = P + i * nyp;
        const REAL *restrict s1 = S1 + i * ny;
        for (int side = PY_LO; side <= PY_HI; side++) {
            const slab_t *s = &slabs[side];
            REAL *restrict q = s->psi + i * s->n;
            const REAL *restrict w = s->coef + i * s->n;
            for (long k = 0; k < s->n; k++) {
                long j = s->start + k;
                q[k] = s->b[k] * q[k] + s->c[k] * (s1[j] - s1[j - 1]);
                p[j] -= w[k] * q[k];
            }
        }
    }
}

/* Run `steps` steps in `threads` threads; probe_out[(n + 1) * n_probes + m]
 * receives P at probe m after step n.  Returns 0, or -1 for a bad slab. */
int run_steps(long steps, int threads, long nxp, long nyp, REAL *P, REAL *S1, REAL *S2,
              REAL sa, REAL sb, REAL ca, REAL cb, const REAL *gxn, const REAL *gxh,
              const REAL *gyn, const REAL *gyh, const slab_t *slabs,
              long n_src, const long *src_i, const long *src_j, const REAL *src_coef,
              const REAL *wave, long n_probes, const long *probe_i, const long *probe_j,
              REAL *probe_out)
{
    for (int s = 0; s < N_SLABS; s++) {
        const slab_t *sl = &slabs[s];
        long limit = (s < SY_LO) ? nxp - 1 : nyp - 1;
        if (sl->n < 0 || sl->start < (s >= PY_LO ? 1 : 0) || sl->start + sl->n > limit)
            return -1;
    }
    #pragma omp parallel num_threads(threads)
    for (long n = 0; n < steps; n++) {
        secondary_sweep(nxp, nyp, P, S1, S2, sa, sb, gxh, gyh, slabs);
        primary_sweep(nxp, nyp, P, S1, S2, ca, cb, gxn, gyn, slabs);
        #pragma omp single
        {
            for (long m = 0; m < n_src; m++)
                P[src_i[m] * nyp + src_j[m]] += src_coef[m] * wave[n];
            for (long m = 0; m < n_probes; m++)
                probe_out[(n + 1) * n_probes + m] = P[probe_i[m] * nyp + probe_j[m]];
        }
    }
    return 0;
}
