/* Subtraction-free state reduction (Grassmann-Taksar-Heyman, continuous time)
 * driven by a compact tape built by treeflux/runtime/numeric.py.
 * Tape format 2 (GTH_TAPE_VERSION): checked by the caller through gth_version().
 *
 * Parameter sets are processed in blocks of 8*G side by side: value slot s of
 * a block is G vectors of 8 doubles (V[s*G + g], lane l of vector g is set
 * 8g + l), so every tape instruction is G SIMD operations, one index load
 * shared by all of them. G (1, 2 or 4) is chosen by the caller; each set's
 * arithmetic is the same sequence of operations whatever G, its lane or the
 * thread that runs it, so its bits are too.
 *
 * Slots are physical: the tape builder recycles the slot of an edge that died
 * (an edge to or from an eliminated state) for a fill edge created later, so
 * the live values of a block stay few and cache-resident. A slot is zeroed
 * when its edge dies, so a recycled slot starts from zero.
 *
 * Forward, for pivot p (state k, out-edges k->j, in-edges i->k):
 *     d = sum of the out-edge values; keep d;
 *     W_j = q(k->j) / d into a small buffer; in-edge values q(i->k) are
 *     copied to the back-substitution stream Q; both kinds of slot are zeroed;
 *     for every in-edge (row) i and out-edge j != i:
 *         V[edge i->j] += q(i->k) * W_j
 *     (row i's update targets are consecutive in the tape; the column of
 *     j == i, if any, is skipped).
 * Before that, each set's rates are scaled by a power of two (the steady
 * state does not change) so the largest is near 2^1019 / m.
 *
 * Back-substitution in reverse: x_root = 1, x_k = (sum_i x_i q(i->k)) / d_k.
 * Fast path in plain doubles. A set with a nonzero sum or an x below 2^-960
 * (an underflowed term could matter), a non-finite value, or a total above
 * 2^1000 (its reciprocal would leave the normal range) is redone with a
 * binary exponent carried per value (mantissa in [1, 2)), so no x underflows
 * or overflows before the final normalisation p = x / sum x. The choice is
 * made per set from that set's values only. Nothing is subtracted anywhere.
 *
 * A set whose scaled rates, censored rates or in-rates fall below 2^-960 (or
 * whose scaled out-rates leave the normal range) may have lost digits to
 * underflow; its output row is set to NaN and the caller recomputes it in
 * extended range.
 *
 * Status: 0 ok; 1 bad rate; 4 out of memory; 5 bad group count.
 * err = {status, row, edge or state}.
 */
#include <float.h>
#include <math.h>
#include <stdint.h>
#include <stdlib.h>
#include <string.h>

#define GTH_TAPE_VERSION 2
#define LANES 8
#define TINY 0x1p-960
#define FAST_LO 0x1p-960
#define SUM_HI 0x1p1000

typedef double v8 __attribute__((vector_size(LANES * sizeof(double))));
typedef int64_t i8 __attribute__((vector_size(LANES * sizeof(int64_t))));

/* Exponent and mantissa of normal positive doubles, lane by lane, by their
 * bits; POW2(c) builds 2^c for integer c in [-1022, 1023]. */
#define EXPO(x) ((((i8)(x)) >> 52) - 1023)
#define MANT(x) ((v8)((((i8)(x)) & 0x000FFFFFFFFFFFFFLL) | 0x3FF0000000000000LL))
#define POW2(c) ((v8)(((c) + 1023) << 52))
#define SELI(mask, a, b) (((mask) & (a)) | (~(mask) & (b)))
#define SELV(mask, a, b) ((v8)SELI((mask), (i8)(a), (i8)(b)))
#define MAXI(a, b) SELI((a) > (b), (a), (b))
#define MAXV(a, b) SELV((a) >= (b), (a), (b))
#define MINV(a, b) SELV((a) <= (b), (a), (b))
#define SPLAT(x) ((v8){x, x, x, x, x, x, x, x})
#define SPLATI(x) ((i8){x, x, x, x, x, x, x, x})

#if defined(__clang__)
#define MIX(a, b, ...) __builtin_shufflevector(a, b, __VA_ARGS__)
#else
#define MIX(a, b, ...) __builtin_shuffle(a, b, (i8){__VA_ARGS__})
#endif

#define ALWAYS_INLINE inline __attribute__((always_inline))

int64_t gth_version(void) { return GTH_TAPE_VERSION; }

static inline int64_t LOG2M(int64_t m)
{
    int64_t r = 0;
    while (((int64_t)1 << r) < m)
        r++;
    return r;
}

/* In-register 8x8 transpose: r[l][e] -> r[e][l]. */
static ALWAYS_INLINE void transpose8(v8 *r)
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
    int64_t version, n, m, n_phys, n_piv, root, n_in, max_out;
    const int32_t *piv_state;
    const int64_t *out_ptr;
    const int32_t *out_slot;
    const int64_t *in_ptr;
    const int32_t *in_slot;
    const int32_t *in_src;
    const int32_t *in_skip;   /* column of the row's own state among the outs, or n_out */
    const int32_t *dst;       /* update targets, row after row, pivot after pivot */
} gth_tape;

typedef struct {              /* one thread's work space, sized for G */
    v8 *V, *Q, *D, *W, *X, *P;
} gth_work;

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

/* Rates of sets b .. b+nl-1 into lanes (absent lanes repeat the last set),
 * and the largest rate of each lane into hi[g]; returns 0 or the status of
 * the first bad rate in row order. */
static ALWAYS_INLINE int64_t load(const gth_tape *t, const double *rates, int64_t b, int nl,
                                  v8 *V, v8 *hi, int64_t *err, const int G)
{
    const int64_t m = t->m;
    double *Vs = (double *)V;
    i8 okv = SPLATI(-1);
    int bad = 0;
    for (int g = 0; g < G; g++) {
        v8 top = {0};
        const double *row[LANES];
        for (int l = 0; l < LANES; l++) {
            int s = LANES * g + l;
            row[l] = rates + (b + (s < nl ? s : nl - 1)) * m;
        }
        int64_t e0 = 0;
        for (; e0 + LANES <= m; e0 += LANES) {      /* eight edges of eight sets at a time */
            v8 r[LANES];
            for (int l = 0; l < LANES; l++)
                memcpy(&r[l], row[l] + e0, sizeof(v8));
            transpose8(r);
            for (int k = 0; k < LANES; k++) {
                V[(e0 + k) * G + g] = r[k];
                okv &= (r[k] > 0.0) & (r[k] <= DBL_MAX);
                top = MAXV(top, r[k]);
            }
        }
        for (int64_t e = e0; e < m; e++)
            for (int l = 0; l < LANES; l++) {
                double v = row[l][e];
                bad |= !(v > 0.0 && v <= DBL_MAX);
                Vs[(e * G + g) * LANES + l] = v;
            }
        for (int64_t e = e0; e < m; e++)
            top = MAXV(top, V[e * G + g]);
        hi[g] = top;
    }
    for (int l = 0; l < LANES; l++)
        bad |= !okv[l];
    if (bad) {
        for (int l = 0; l < nl; l++)
            for (int64_t e = 0; e < m; e++) {
                double v = rates[(b + l) * m + e];
                if (!(v > 0.0 && v <= DBL_MAX))
                    return fail(err, 1, b + l, e);
            }
    }
    return 0;
}

/* Back-substitution with a binary exponent per value, for vector g of the
 * block (stride G): x_k = XM[k] * 2^XE[k], XM in [1, 2). Writes the
 * normalised p into P (one vector a state). */
static void exponent_path(const gth_tape *t, const v8 *Q, const v8 *D, v8 *XM, i8 *XE,
                          v8 *P, int64_t G, int64_t g)
{
    const int64_t n = t->n, np_ = t->n_piv;
    const v8 one = SPLAT(1.0);
    const i8 floor_ = SPLATI(-1022);
    XM[t->root] = one;
    XE[t->root] = SPLATI(0);
    for (int64_t p = np_ - 1; p >= 0; p--) {
        const int64_t k = t->piv_state[p];
        const int64_t a0 = t->in_ptr[p];
        const int32_t *src = t->in_src + a0;
        const int64_t ni = t->in_ptr[p + 1] - a0;
        if (ni == 0) {                          /* nothing flows in: x_k = 0 */
            XM[k] = SPLAT(0.0);
            XE[k] = floor_ * ((int64_t)1 << 30);
            continue;
        }
        i8 top = XE[src[0]] + EXPO(XM[src[0]] * Q[a0 * G + g]);
        for (int64_t a = 0; a < ni; a++) {
            i8 e = XE[src[a]] + EXPO(XM[src[a]] * Q[(a0 + a) * G + g]);
            top = MAXI(e, top);
        }
        v8 acc = {0};
        for (int64_t a = 0; a < ni; a++) {
            v8 term = XM[src[a]] * Q[(a0 + a) * G + g];
            i8 c = XE[src[a]] + EXPO(term) - top;
            c = MAXI(c, floor_);
            acc += MANT(term) * POW2(c);
        }
        v8 x = acc / D[p * G + g];
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
        P[s] = XM[s] * inv * POW2(c1) * POW2(c2);
    }
}

/* Prefetch of the next block's rates (into L2) and output rows, spread over
 * the pivots so the memory traffic overlaps the elimination. */
typedef struct {
    const char *in, *in_end, *out, *out_end;
    int64_t in_step, out_step;
} ahead;

static ALWAYS_INLINE ahead plan_ahead(const gth_tape *t, const double *rates, double *out,
                                      int64_t next, int64_t stop)
{
    ahead a;
    int64_t np_ = t->n_piv > 0 ? t->n_piv : 1;
    if (next >= stop)
        next = stop;
    a.in = (const char *)(rates + next * t->m);
    a.in_end = (const char *)(rates + stop * t->m);
    a.out = (const char *)(out + next * t->n);
    a.out_end = (const char *)(out + stop * t->n);
    a.in_step = 64 * ((a.in_end - a.in) / 64 / np_ + 1);
    a.out_step = 64 * ((a.out_end - a.out) / 64 / np_ + 1);
    return a;
}

static ALWAYS_INLINE void step_ahead(ahead *a)
{
    for (const char *e = a->in + a->in_step; a->in < a->in_end && a->in < e; a->in += 64)
        __builtin_prefetch(a->in, 0, 2);
    for (const char *e = a->out + a->out_step; a->out < a->out_end && a->out < e; a->out += 64)
        __builtin_prefetch(a->out, 1, 2);
}

static ALWAYS_INLINE int64_t block(const gth_tape *t, const double *rates, double *out, int64_t b,
                                   int nl, int64_t stop, const gth_work *w, int64_t *err, const int G)
{
    const int64_t n = t->n, m = t->m, np_ = t->n_piv;
    v8 *restrict V = w->V, *restrict Q = w->Q, *restrict D = w->D, *restrict Wb = w->W;
    v8 *restrict X = w->X, *restrict P = w->P;
    v8 hi[G];
    int64_t status = load(t, rates, b, nl, V, hi, err, G);
    if (status)
        return status;
    memset(V + m * G, 0, (size_t)(t->n_phys - m) * G * sizeof(v8));

    /* Scale each set's rates by a power of two so that its largest rate is
     * near 2^(1019 - log2 m): the steady state is unchanged, every pivot and
     * censored rate stays below 2^1021 (no overflow, normal reciprocals), and
     * the small ones get the most headroom above the normal range. */
    v8 f[G];
    for (int g = 0; g < G; g++) {
        i8 sh = 1019 - LOG2M(m) - EXPO(hi[g]);
        f[g] = POW2(sh);
    }
    for (int64_t e = 0; e < m; e++)
        for (int g = 0; g < G; g++)
            V[e * G + g] *= f[g];

    /* A lane whose censored rates, scaled rates or in-rates fall below
     * TINY (2^-960) may have lost digits to underflow: it is flagged (its
     * output row is NaN) and recomputed by the caller in extended range. */
    const v8 tiny = SPLAT(TINY), dmin = SPLAT(DBL_MIN), dmax = SPLAT(DBL_MAX);
    i8 ok[G];
    for (int g = 0; g < G; g++)
        ok[g] = SPLATI(-1);
    const int32_t *u = t->dst;
    const int64_t next = b + LANES * G;
    ahead pf = plan_ahead(t, rates, out, next, next + LANES * G < stop ? next + LANES * G : stop);
    for (int64_t p = 0; p < np_; p++) {
        step_ahead(&pf);
        const int64_t o0 = t->out_ptr[p], no = t->out_ptr[p + 1] - o0;
        const int64_t a0 = t->in_ptr[p], ni = t->in_ptr[p + 1] - a0;
        const int32_t *os = t->out_slot + o0;
        const int32_t *is = t->in_slot + a0;
        const int32_t *skip = t->in_skip + a0;
        v8 d[G], r[G];
        for (int g = 0; g < G; g++)
            d[g] = (v8){0};
        for (int64_t q = 0; q < no; q++)
            for (int g = 0; g < G; g++) {
                v8 v = V[os[q] * G + g];
                d[g] += v;
                ok[g] &= v >= tiny;
            }
        for (int g = 0; g < G; g++) {
            ok[g] &= d[g] <= dmax;
            D[p * G + g] = d[g];
            r[g] = 1.0 / d[g];
        }
        for (int64_t q = 0; q < no; q++)
            for (int g = 0; g < G; g++) {
                v8 x = V[os[q] * G + g] * r[g];
                Wb[q * G + g] = x;
                ok[g] &= x >= dmin;
                V[os[q] * G + g] = (v8){0};
            }
        v8 *Qp = Q + a0 * G;
        for (int64_t a = 0; a < ni; a++)
            for (int g = 0; g < G; g++) {
                v8 x = V[is[a] * G + g];
                Qp[a * G + g] = x;
                ok[g] &= x >= tiny;
                V[is[a] * G + g] = (v8){0};
            }
        for (int64_t a = 0; a < ni; a++) {
            v8 qv[G];
            for (int g = 0; g < G; g++)
                qv[g] = Qp[a * G + g];
            const int64_t sk = skip[a];
            int64_t c = 0;
            for (; c < sk; c++) {
                v8 *restrict y = V + (int64_t)u[c] * G;
                for (int g = 0; g < G; g++)
                    y[g] += qv[g] * Wb[c * G + g];
            }
            for (c = sk + 1; c < no; c++) {    /* targets after the skipped column */
                v8 *restrict y = V + (int64_t)u[c - 1] * G;
                for (int g = 0; g < G; g++)
                    y[g] += qv[g] * Wb[c * G + g];
            }
            u += no - (sk < no);
        }
    }

    /* Back-substitution in plain doubles (x_root = 1); the range of every sum
     * and x is tracked per set to decide whether its result stands. */
    const v8 zero = {0};
    v8 lo[G], top[G];
    for (int g = 0; g < G; g++) {
        lo[g] = SPLAT(INFINITY);
        top[g] = zero;
        X[t->root * G + g] = SPLAT(1.0);
    }
    for (int64_t p = np_ - 1; p >= 0; p--) {
        const int64_t k = t->piv_state[p];
        const int64_t a0 = t->in_ptr[p], ni = t->in_ptr[p + 1] - a0;
        const int32_t *src = t->in_src + a0;
        const v8 *Qp = Q + a0 * G;
        v8 acc[G];
        for (int g = 0; g < G; g++)
            acc[g] = zero;
        for (int64_t a = 0; a < ni; a++) {
            const v8 *x = X + (int64_t)src[a] * G;
            for (int g = 0; g < G; g++)
                acc[g] += x[g] * Qp[a * G + g];
        }
        for (int g = 0; g < G; g++) {
            v8 x = acc[g] / D[p * G + g];
            X[k * G + g] = x;
            /* a zero sum (nothing reaches k) is exact; it takes no part in the range */
            v8 small = SELV(acc[g] > zero, MINV(acc[g], x), lo[g]);
            lo[g] = MINV(lo[g], small);
            top[g] = MAXV(top[g], MAXV(acc[g], x));
        }
    }
    v8 sum[G], inv[G];
    for (int g = 0; g < G; g++)
        sum[g] = zero;
    for (int64_t s = 0; s < n; s++)
        for (int g = 0; g < G; g++)
            sum[g] += X[s * G + g];
    for (int g = 0; g < G; g++)
        inv[g] = 1.0 / sum[g];
    for (int64_t s = 0; s < n; s++)
        for (int g = 0; g < G; g++)
            P[s * G + g] = X[s * G + g] * inv[g];

    for (int g = 0; g < G; g++) {
        i8 fast = (lo[g] >= SPLAT(FAST_LO)) & (top[g] <= dmax) & (sum[g] <= SPLAT(SUM_HI));
        int all = 1;
        for (int l = 0; l < LANES; l++)
            all &= fast[l] != 0;
        if (!all) {                            /* redo with exponents; keep the fast sets */
            v8 *XM = X + n * G, *P2 = XM + 2 * n;
            i8 *XE = (i8 *)(XM + n);
            exponent_path(t, Q, D, XM, XE, P2, G, g);
            for (int64_t s = 0; s < n; s++)
                P[s * G + g] = SELV(fast, P[s * G + g], P2[s]);
        }
        for (int l = 0; l < LANES; l++)
            if (!ok[g][l])
                for (int64_t s = 0; s < n; s++)
                    ((double *)P)[(s * G + g) * LANES + l] = NAN;
    }

    for (int g = 0; g < G && LANES * g < nl; g++) {
        const int64_t r0 = b + LANES * g;
        const int rows = nl - LANES * g < LANES ? nl - LANES * g : LANES;
        int64_t s0 = 0;
        for (; s0 + LANES <= n; s0 += LANES) {  /* eight states of eight sets at a time */
            v8 r[LANES];
            for (int k = 0; k < LANES; k++)
                r[k] = P[(s0 + k) * G + g];
            transpose8(r);
            for (int l = 0; l < rows; l++)
                memcpy(out + (r0 + l) * n + s0, &r[l], sizeof(v8));
        }
        const double *Ps = (const double *)P;
        for (int l = 0; l < rows; l++) {
            double *o = out + (r0 + l) * n;
            for (int64_t s = s0; s < n; s++)
                o[s] = Ps[(s * G + g) * LANES + l];
        }
    }
    return 0;
}

static int64_t run(const gth_tape *t, const double *rates, double *out, int64_t row0,
                   int64_t row1, int64_t *err, const int G)
{
    const int64_t W = LANES * G;
    gth_work w;
    w.V = grab(t->n_phys * G);
    w.Q = grab(t->n_in * G);
    w.D = grab(t->n_piv * G);
    w.W = grab(t->max_out * G);
    w.X = grab(t->n * G + 3 * t->n);
    w.P = grab(t->n * G);
    int64_t status = 0;
    if (!w.V || !w.Q || !w.D || !w.W || !w.X || !w.P) {
        status = fail(err, 4, row0, 0);
    } else {
        for (int64_t b = row0; b < row1 && !status; b += W) {
            int nl = (int)(row1 - b < W ? row1 - b : W);
            if (G == 1)
                status = block(t, rates, out, b, nl, row1, &w, err, 1);
            else if (G == 2)
                status = block(t, rates, out, b, nl, row1, &w, err, 2);
            else
                status = block(t, rates, out, b, nl, row1, &w, err, 4);
        }
    }
    free(w.V);
    free(w.Q);
    free(w.D);
    free(w.W);
    free(w.X);
    free(w.P);
    return status;
}

static __attribute__((noinline)) int64_t run1(const gth_tape *t, const double *rates, double *out,
                                              int64_t row0, int64_t row1, int64_t *err)
{
    return run(t, rates, out, row0, row1, err, 1);
}

static __attribute__((noinline)) int64_t run2(const gth_tape *t, const double *rates, double *out,
                                              int64_t row0, int64_t row1, int64_t *err)
{
    return run(t, rates, out, row0, row1, err, 2);
}

static __attribute__((noinline)) int64_t run4(const gth_tape *t, const double *rates, double *out,
                                              int64_t row0, int64_t row1, int64_t *err)
{
    return run(t, rates, out, row0, row1, err, 4);
}

/* Rows row0 .. row1-1 in blocks of 8*groups sets (groups 1, 2 or 4). */
int64_t gth_solve(const gth_tape *t, const double *rates, double *out, int64_t row0,
                  int64_t row1, int64_t groups, int64_t *err)
{
    if (t->version != GTH_TAPE_VERSION)
        return fail(err, 5, row0, t->version);
    switch (groups) {
    case 1: return run1(t, rates, out, row0, row1, err);
    case 2: return run2(t, rates, out, row0, row1, err);
    case 4: return run4(t, rates, out, row0, row1, err);
    default: return fail(err, 5, row0, groups);
    }
}
