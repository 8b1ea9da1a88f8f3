/* Subtraction-free state reduction (Grassmann-Taksar-Heyman, continuous time)
 * driven by a flat tape built by treeflux/runtime/numeric.py.
 *
 * Eight parameter sets are processed side by side: value slot s of a block
 * lives in one 8-double vector, so every tape instruction is one SIMD
 * operation across the eight sets. Slots 0..m-1 are the scheme's edge rates,
 * then the fill edges, then one sink slot that absorbs the i == j products.
 *
 * Forward, for pivot p (state k):
 *     d = sum of out slots; keep d; scale out slots by 1/d;
 *     for every triple (dst, a, b) of the pivot: V[dst] += V[a] * V[b],
 *     a = in-edge i->k, b = scaled out-edge k->j, dst = edge i->j (i != j).
 * Before that, each set's rates are scaled by a power of two (the steady
 * state does not change) so the largest is near 2^1019 / m.
 * Back-substitution in reverse: x_root = 1,
 *     x_k = (sum over in-edges of x_i * q(i->k)) / d_k,
 * with a binary exponent carried per value (mantissa in [1, 2)), so no x
 * underflows or overflows before the final normalisation p = x / sum x.
 * Nothing is subtracted anywhere.
 *
 * A set whose scaled rates, censored rates or scaled out-rates fall below
 * 2^-960 (out-rates: below the normal range) may have lost digits to
 * underflow; its output row is set to NaN and the caller recomputes it in
 * extended range.
 *
 * Status: 0 ok; 1 bad rate; 4 out of memory. err = {status, row, edge or state}.
 */
#include <float.h>
#include <math.h>
#include <stdint.h>
#include <stdlib.h>
#include <string.h>

#define LANES 8
#define TINY 0x1p-960

/* Exponent and mantissa of normal positive doubles, lane by lane, by their
 * bits; POW2(c) builds 2^c for integer c in [-1022, 1023]. */
#define EXPO(x) ((((i8)(x)) >> 52) - 1023)
#define MANT(x) ((v8)((((i8)(x)) & 0x000FFFFFFFFFFFFFLL) | 0x3FF0000000000000LL))
#define POW2(c) ((v8)(((c) + 1023) << 52))
#define SELI(mask, a, b) (((mask) & (a)) | (~(mask) & (b)))
#define MAXI(a, b) SELI((a) > (b), (a), (b))
#define MAXV(a, b) ((v8)SELI((a) >= (b), (i8)(a), (i8)(b)))

static inline int64_t LOG2M(int64_t m)
{
    int64_t r = 0;
    while (((int64_t)1 << r) < m)
        r++;
    return r;
}

typedef double v8 __attribute__((vector_size(LANES * sizeof(double))));
typedef int64_t i8 __attribute__((vector_size(LANES * sizeof(int64_t))));

#if defined(__clang__)
#define MIX(a, b, ...) __builtin_shufflevector(a, b, __VA_ARGS__)
#else
#define MIX(a, b, ...) __builtin_shuffle(a, b, (i8){__VA_ARGS__})
#endif

/* In-register 8x8 transpose: r[l][e] -> r[e][l]. */
static inline void transpose8(v8 *r)
{
    v8 t[8], u[8];
    for (int k = 0; k < 8; k += 2) {
        t[k] = MIX(r[k], r[k + 1], 0, 8, 2, 10, 4, 12, 6, 14);
        t[k + 1] = MIX(r[k], r[k + 1], 1, 9, 3, 11, 5, 13, 7, 15);
    }
    for (int k = 0; k < 8; k += 4) {
        u[k] = MIX(t[k], t[k + 2], 0, 1, 8, 9, 4, 5, 12, 13);
        u[k + 2] = MIX(t[k], t[k + 2], 2, 3, 10, 11, 6, 7, 14, 15);
        u[k + 1] = MIX(t[k + 1], t[k + 3], 0, 1, 8, 9, 4, 5, 12, 13);
        u[k + 3] = MIX(t[k + 1], t[k + 3], 2, 3, 10, 11, 6, 7, 14, 15);
    }
    for (int k = 0; k < 4; k++) {
        r[k] = MIX(u[k], u[k + 4], 0, 1, 2, 3, 8, 9, 10, 11);
        r[k + 4] = MIX(u[k], u[k + 4], 4, 5, 6, 7, 12, 13, 14, 15);
    }
}

typedef struct {
    int64_t n, m, n_slots, n_piv, root;
    const int32_t *piv_state;
    const int64_t *out_ptr;
    const int32_t *out_slot;
    const int64_t *in_ptr;
    const int32_t *in_slot;
    const int32_t *in_src;
    const int64_t *upd_ptr;
    const int32_t *upd;
} gth_tape;

static int64_t fail(int64_t *err, int64_t kind, int64_t row, int64_t what)
{
    err[0] = kind;
    err[1] = row;
    err[2] = what;
    return kind;
}

static void *grab(int64_t count)
{
    size_t bytes = (size_t)(count > 0 ? count : 1) * sizeof(v8);
    return aligned_alloc(64, bytes);
}

static int64_t block(const gth_tape *t, const double *rates, double *out, int64_t b, int nl,
                     v8 *V, v8 *D, v8 *X, int64_t *err)
{
    const int64_t n = t->n, m = t->m, ns = t->n_slots, np_ = t->n_piv;
    double *Vs = (double *)V;
    int bad = 0;
    const double *row[LANES];
    for (int l = 0; l < LANES; l++)
        row[l] = rates + (b + (l < nl ? l : nl - 1)) * m;
    int64_t e0 = 0;
    i8 okv = {-1, -1, -1, -1, -1, -1, -1, -1};
    for (; e0 + LANES <= m; e0 += LANES) {      /* eight edges of eight sets at a time */
        v8 r[LANES];
        for (int l = 0; l < LANES; l++)
            memcpy(&r[l], row[l] + e0, sizeof(v8));
        transpose8(r);
        for (int k = 0; k < LANES; k++) {
            V[e0 + k] = r[k];
            okv &= (r[k] > 0.0) & (r[k] <= DBL_MAX);
        }
    }
    for (int l = 0; l < LANES; l++)
        bad |= !okv[l];
    for (int64_t e = e0; e < m; e++)
        for (int l = 0; l < LANES; l++) {
            double v = row[l][e];
            bad |= !(v > 0.0 && v <= DBL_MAX);
            Vs[e * LANES + l] = v;
        }
    if (bad) {
        for (int l = 0; l < nl; l++)
            for (int64_t e = 0; e < m; e++) {
                double v = rates[(b + l) * m + e];
                if (!(v > 0.0 && v <= DBL_MAX))
                    return fail(err, 1, b + l, e);
            }
    }
    memset(V + m, 0, (size_t)(ns - m) * sizeof(v8));

    /* Scale each set's rates by a power of two so that its largest rate is
     * near 2^(1019 - log2 m): the steady state is unchanged, every pivot and
     * censored rate stays below 2^1021 (no overflow, normal reciprocals), and
     * the small ones get the most headroom above the normal range. */
    v8 hi = V[0];
    for (int64_t e = 1; e < m; e++)
        hi = MAXV(hi, V[e]);
    i8 sh = 1019 - LOG2M(m) - EXPO(hi);
    v8 f = POW2(sh);
    for (int64_t e = 0; e < m; e++)
        V[e] *= f;

    /* A lane whose censored rates, scaled rates or in-rates fall below
     * TINY (2^-960) may have lost digits to underflow: it is flagged (its
     * output row is NaN) and recomputed by the caller in extended range. */
    const v8 tiny = {TINY, TINY, TINY, TINY, TINY, TINY, TINY, TINY};
    const v8 dmin = {DBL_MIN, DBL_MIN, DBL_MIN, DBL_MIN, DBL_MIN, DBL_MIN, DBL_MIN, DBL_MIN};
    i8 ok = {-1, -1, -1, -1, -1, -1, -1, -1};
    for (int64_t p = 0; p < np_; p++) {
        const int32_t *os = t->out_slot + t->out_ptr[p];
        const int64_t no = t->out_ptr[p + 1] - t->out_ptr[p];
        v8 d = {0};
        for (int64_t q = 0; q < no; q++) {
            d += V[os[q]];
            ok &= V[os[q]] >= tiny;
        }
        ok &= d <= DBL_MAX;
        D[p] = d;
        v8 r = 1.0 / d;
        for (int64_t q = 0; q < no; q++) {
            V[os[q]] *= r;
            ok &= V[os[q]] >= dmin;
        }
        const int32_t *u = t->upd + 3 * t->upd_ptr[p];
        const int64_t nu = t->upd_ptr[p + 1] - t->upd_ptr[p];
        for (int64_t q = 0; q < nu; q++, u += 3)
            V[u[0]] += V[u[1]] * V[u[2]];
    }

    /* Back-substitution with a binary exponent per value: x_k = XM[k] *
     * 2^XE[k], XM in [1, 2). x_k = (sum_i x_i q(i->k)) / d_k is summed at the
     * largest term's exponent, so no x underflows or overflows here; only the
     * final normalisation rounds the tiny probabilities. */
    v8 *XM = X;
    i8 *XE = (i8 *)(X + n);
    const v8 one = {1, 1, 1, 1, 1, 1, 1, 1};
    const i8 zero_i = {0};
    const i8 floor_ = {-1022, -1022, -1022, -1022, -1022, -1022, -1022, -1022};
    XM[t->root] = one;
    XE[t->root] = zero_i;
    for (int64_t p = np_ - 1; p >= 0; p--) {
        const int64_t k = t->piv_state[p];
        const int32_t *is = t->in_slot + t->in_ptr[p];
        const int32_t *src = t->in_src + t->in_ptr[p];
        const int64_t ni = t->in_ptr[p + 1] - t->in_ptr[p];
        if (ni == 0) {                          /* nothing flows in: x_k = 0 */
            XM[k] = (v8){0};
            XE[k] = floor_ * ((int64_t)1 << 30);
            continue;
        }
        i8 top = XE[src[0]] + EXPO(XM[src[0]] * V[is[0]]);
        for (int64_t a = 0; a < ni; a++) {
            v8 q = V[is[a]];
            ok &= q >= tiny;
            i8 g = XE[src[a]] + EXPO(XM[src[a]] * q);
            top = MAXI(g, top);
        }
        v8 acc = {0};
        for (int64_t a = 0; a < ni; a++) {
            v8 term = XM[src[a]] * V[is[a]];
            i8 c = XE[src[a]] + EXPO(term) - top;
            c = MAXI(c, floor_);
            acc += MANT(term) * POW2(c);
        }
        v8 x = acc / D[p];
        XM[k] = MANT(x);
        XE[k] = top + EXPO(x);
    }

    i8 top = XE[0];
    for (int64_t s = 1; s < n; s++)
        top = MAXI(XE[s], top);
    v8 sum = {0};
    for (int64_t s = 0; s < n; s++) {
        i8 c = XE[s] - top;
        c = MAXI(c, floor_);
        sum += XM[s] * POW2(c);
    }
    v8 inv = 1.0 / sum;
    for (int64_t s = 0; s < n; s++) {      /* p = XM * inv * 2^c, c split in two normal factors */
        i8 c = XE[s] - top;
        i8 c1 = MAXI(c, floor_);
        i8 c2 = c - c1;
        c2 = MAXI(c2, floor_);
        XM[s] = XM[s] * inv * POW2(c1) * POW2(c2);
    }
    for (int l = 0; l < LANES; l++)
        if (!ok[l])
            for (int64_t s = 0; s < n; s++)
                ((double *)XM)[s * LANES + l] = NAN;
    int64_t s0 = 0;
    for (; s0 + LANES <= n; s0 += LANES) {      /* eight states of eight sets at a time */
        v8 r[LANES];
        for (int k = 0; k < LANES; k++)
            r[k] = XM[s0 + k];
        transpose8(r);
        for (int l = 0; l < nl; l++)
            memcpy(out + (b + l) * n + s0, &r[l], sizeof(v8));
    }
    const double *Xs = (const double *)XM;
    for (int l = 0; l < nl; l++) {
        double *o = out + (b + l) * n;
        for (int64_t s = s0; s < n; s++)
            o[s] = Xs[s * LANES + l];
    }
    return 0;
}

int64_t gth_solve(const gth_tape *t, const double *rates, double *out,
                  int64_t row0, int64_t row1, int64_t *err)
{
    v8 *V = grab(t->n_slots);
    v8 *D = grab(t->n_piv);
    v8 *X = grab(2 * t->n);
    int64_t status = 0;
    if (!V || !D || !X) {
        status = fail(err, 4, row0, 0);
    } else {
        for (int64_t b = row0; b < row1 && !status; b += LANES) {
            int nl = (int)(row1 - b < LANES ? row1 - b : LANES);
            status = block(t, rates, out, b, nl, V, D, X, err);
        }
    }
    free(V);
    free(D);
    free(X);
    return status;
}
