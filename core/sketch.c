/*
 * sketch.c - xStream-style space sketch: sparse projection, half-space
 * chains, decaying count-min counters.
 *
 * Design choices, in the order a vector meets them:
 * - Projection: the sparse matrix is kept as one index list per projected
 *   axis (saved state) and expanded into a dense feature-major copy with
 *   the entries already divided by that axis' fitted bin width: one pass
 *   of d*P/2 two-lane multiply-adds (the zeros add nothing, so the sums
 *   equal the sparse ones bit for bit) yields u_p, the vector's
 *   coordinate in level-1 bin widths.
 * - Bins: in xStream the k-th split of axis f has bin width delta_f/2^(k-1)
 *   and shift s_f/2^(k-1), so its bin is floor(u_f * 2^(k-1) + s_f/delta_f).
 *   u_f is converted once to 32.32 fixed point; each (chain, level) keeps
 *   its 2^(k-1) and shift fraction, so a level costs an integer multiply,
 *   an add and a shift, and updates the one axis it splits (the running
 *   bin vector of the paper).
 * - Hash: a chain's bin vector b is hashed with vector multiply-shift
 *   (Thorup 2015, "High speed hashing for integers and strings", strongly
 *   universal for 32-bit b_f with 64-bit random keys): key = a_0 +
 *   sum_f a_f b_f mod 2^64, counter column = top bits of key (fast range
 *   reduction for widths that are not powers of two).  Axes not split yet
 *   have b_f = 0, and a level changes one b_f, so the key is updated with
 *   one multiply per count-min row.
 * - Memory: the counter offsets of chain c + 1 are computed and prefetched
 *   in the same pass that reads (score) and writes (insert) chain c's, so
 *   the cache misses of one chain overlap the work of the previous one.
 * - Score: min over levels of log2(c_l + 1) + l is log2 of min over levels
 *   of (c_l + 1) 2^l, and the mean of logs is the log of the product;
 *   each chain minimum is split into its binary exponent (an integer sum)
 *   and mantissa (a product that cannot overflow), so one libm log2 per
 *   vector gives the exact score.
 *
 * Invariants: counters hold counts in units of the clock's g (decay.h);
 * every array lives in one block allocated by sketch_new, never resized;
 * the per-level table and the dense projection are derived from the
 * saved state (axis, shift, widths, sparse lists) by chains_derive and
 * proj_derive.
 */
#include "sketch.h"

#include <math.h>
#include <stdlib.h>
#include <string.h>

#include "decay.h"
#include "rng.h"

#define SKETCH_MAX_COUNTERS (1ull << 27)
#define SKETCH_FIX_ONE 4294967296.0 /* 2^32: 32.32 fixed point */
#define SKETCH_Z_CLAMP 1152921504606846976.0 /* 2^60 */
#define SKETCH_SQRT3 1.7320508075688772

/* One (chain, level), chain-major (entry c * L + l). */
typedef struct sketch_level {
    uint64_t shift; /* the axis' shift fraction, 32.32 fixed point */
    uint64_t scale; /* 2^up */
    uint64_t hkey;  /* the chain's row-0 hash key of this axis */
    uint32_t base;  /* offset of this (chain, level)'s row 0 in counters */
    uint8_t axis;   /* projected axis split at this level */
    uint8_t up;     /* earlier splits of this axis in the chain: the bin
                       width is the level-1 width / 2^up */
    uint16_t prev; /* the chain's previous level splitting the same axis,
                      or L (a slot that always holds bin 0) */
} sketch_level;

struct sketch {
    sketch_params p;
    decay_clock clk;
    double total;       /* decayed mass inserted, in g units */
    size_t n_counters;  /* chains * depth * rows * width */
    size_t bytes;

    /* projection, CSR by projected axis */
    uint32_t *proj_start; /* P + 1 */
    uint16_t *proj_idx;   /* feature index per entry */
    int8_t *proj_sign;    /* +1 / -1 per entry */
    uint32_t pp;          /* P rounded up to even */
    double *dense;        /* d * pp, feature-major: entry (j, p) is
                             sign sqrt(3) / width[p], or 0 where the
                             sparse matrix has none (and for p >= P), so
                             the projection runs two axes per SSE2 vector
                             with no index loads; adding the zeros leaves
                             every sum bit-identical to the sparse one */
    double *width;        /* P: fitted level-1 bin width, z units */

    /* chains */
    double *shift;       /* M * P: shift / width, in [0, 1) */
    uint8_t *axis;       /* M * L (chain-major): split axis per level */
    sketch_level *lev;   /* M * L, derived from axis and shift */
    uint64_t *hkey;      /* M * rows * P: multiply-shift keys */
    uint64_t *hbase;     /* M * rows: a_0 */
    double *level_w;     /* L: 2^(l + 1) */
    double *counters;    /* M * L * rows * width, 64-byte aligned */

    /* scratch for one vector */
    uint32_t *idx;       /* M * L * rows counter offsets */
    double *best;        /* M running chain minima */
    double *zd;          /* d sanitised z */
    uint64_t *u;         /* P projected coordinates in level-1 bin widths,
                            32.32 fixed point, two's complement */
    double u_clamp;      /* |u| bound that keeps every biased bin in range */

    void *block;
};

void sketch_params_default(sketch_params *p, uint32_t dim)
{
    memset(p, 0, sizeof *p);
    p->dim = dim;
    p->proj_dims = 16;
    p->chains = 16;
    p->depth = 12;
    p->width = 1024;
    p->rows = 1;
    p->half_life_days = 7;
    p->seed = 1;
}

int sketch_params_check(const sketch_params *p, const char **field)
{
    const char *bad = NULL;
    if (p->dim < 1 || p->dim > SKETCH_MAX_DIM)
        bad = "dim";
    else if (p->proj_dims < 1 || p->proj_dims > SKETCH_MAX_PROJ)
        bad = "proj_dims";
    else if (p->chains < 1 || p->chains > SKETCH_MAX_CHAINS)
        bad = "chains";
    else if (p->depth < 1 || p->depth > SKETCH_MAX_DEPTH)
        bad = "depth";
    else if (p->width < SKETCH_MIN_WIDTH || p->width > SKETCH_MAX_WIDTH)
        bad = "width";
    else if (p->rows < 1 || p->rows > SKETCH_MAX_ROWS)
        bad = "rows";
    else if (!(p->half_life_days >= 0) || !isfinite(p->half_life_days))
        bad = "half_life_days";
    else if ((uint64_t)p->chains * p->depth * p->rows * p->width >
             SKETCH_MAX_COUNTERS)
        bad = "width"; /* chains * depth * rows * width <= 2^27 */
    if (bad && field)
        *field = bad;
    return bad ? CORE_ERANGE : 0;
}

const sketch_params *sketch_get_params(const sketch *sk) { return &sk->p; }

size_t sketch_bytes(const sketch *sk) { return sk->bytes; }

/* Carve n bytes, aligned to al, out of a block being laid out. */
static size_t carve(size_t *off, size_t n, size_t al)
{
    size_t at = (*off + al - 1) & ~(al - 1);
    *off = at + n;
    return at;
}

/* Derive the per-level table from axis and shift. */
static void chains_derive(sketch *sk)
{
    const uint32_t M = sk->p.chains, L = sk->p.depth, P = sk->p.proj_dims,
                   R = sk->p.rows, W = sk->p.width;
    int maxup = 0;
    for (uint32_t c = 0; c < M; c++) {
        uint32_t last[SKETCH_MAX_PROJ];
        int ups[SKETCH_MAX_PROJ];
        for (uint32_t f = 0; f < P; f++) {
            last[f] = L;
            ups[f] = -1;
        }
        for (uint32_t l = 0; l < L; l++) {
            uint32_t f = sk->axis[c * L + l];
            sketch_level *lv = &sk->lev[c * L + l];
            lv->axis = (uint8_t)f;
            lv->prev = (uint16_t)last[f];
            lv->up = (uint8_t)++ups[f];
            lv->scale = (uint64_t)1 << lv->up;
            lv->shift = (uint64_t)(sk->shift[c * P + f] * SKETCH_FIX_ONE);
            lv->base = (c * L + l) * R * W;
            lv->hkey = sk->hkey[(size_t)c * R * P + f];
            last[f] = l;
            maxup = lv->up > maxup ? lv->up : maxup;
        }
    }
    /* |u| <= u_clamp keeps |u| 2^32 2^up + 2^32 below 2^63 */
    sk->u_clamp = ldexp(1.0, 30 - maxup);
}

/* Projection entries scaled by the fitted widths. */
static void proj_derive(sketch *sk)
{
    const uint32_t P = sk->p.proj_dims, pp = sk->pp, d = sk->p.dim;
    memset(sk->dense, 0, (size_t)d * pp * sizeof(double));
    for (uint32_t p = 0; p < P; p++)
        for (uint32_t k = sk->proj_start[p]; k < sk->proj_start[p + 1]; k++)
            sk->dense[(size_t)sk->proj_idx[k] * pp + p] =
                (double)sk->proj_sign[k] * SKETCH_SQRT3 / sk->width[p];
}

sketch *sketch_new(const sketch_params *p, int *err)
{
    int e = CORE_EINVAL;
    sketch *sk = NULL;
    if (!p || sketch_params_check(p, NULL))
        goto fail_params;
    e = CORE_ENOMEM;
    sk = calloc(1, sizeof *sk);
    if (!sk)
        goto fail_struct;
    sk->p = *p;
    const size_t d = p->dim, P = p->proj_dims, M = p->chains, L = p->depth,
                 R = p->rows, W = p->width;
    sk->n_counters = M * L * R * W;

    size_t off = 0;
    size_t o_counters = carve(&off, sk->n_counters * sizeof(double), 64);
    size_t o_lev = carve(&off, M * L * sizeof(sketch_level), 64);
    size_t o_hkey = carve(&off, M * R * P * sizeof(uint64_t), 8);
    size_t o_hbase = carve(&off, M * R * sizeof(uint64_t), 8);
    size_t o_width = carve(&off, P * sizeof(double), 8);
    size_t o_levw = carve(&off, L * sizeof(double), 8);
    size_t o_dense = carve(&off, ((P + 1) & ~(size_t)1) * d * sizeof(double), 16);
    size_t o_shift = carve(&off, M * P * sizeof(double), 8);
    size_t o_best = carve(&off, M * sizeof(double), 8);
    size_t o_zd = carve(&off, d * sizeof(double), 8);
    size_t o_u = carve(&off, P * sizeof(uint64_t), 8);
    size_t o_pstart = carve(&off, (P + 1) * sizeof(uint32_t), 4);
    size_t o_idx = carve(&off, M * L * R * sizeof(uint32_t), 4);
    size_t o_pidx = carve(&off, P * d * sizeof(uint16_t), 2);
    size_t o_psign = carve(&off, P * d, 1);
    size_t o_axis = carve(&off, M * L, 1);

    sk->block = malloc(off + 64);
    if (!sk->block)
        goto fail_block;
    memset(sk->block, 0, off + 64);
    uint8_t *base = (uint8_t *)(((uintptr_t)sk->block + 63) & ~(uintptr_t)63);
    sk->counters = (double *)(base + o_counters);
    sk->lev = (sketch_level *)(base + o_lev);
    sk->hkey = (uint64_t *)(base + o_hkey);
    sk->hbase = (uint64_t *)(base + o_hbase);
    sk->width = (double *)(base + o_width);
    sk->level_w = (double *)(base + o_levw);
    sk->dense = (double *)(base + o_dense);
    sk->pp = (uint32_t)((P + 1) & ~(size_t)1);
    sk->shift = (double *)(base + o_shift);
    sk->best = (double *)(base + o_best);
    sk->zd = (double *)(base + o_zd);
    sk->u = (uint64_t *)(base + o_u);
    sk->proj_start = (uint32_t *)(base + o_pstart);
    sk->idx = (uint32_t *)(base + o_idx);
    sk->proj_idx = (uint16_t *)(base + o_pidx);
    sk->proj_sign = (int8_t *)(base + o_psign);
    sk->axis = base + o_axis;
    sk->bytes = sizeof *sk + off + 64;

    /* Random structure, in a fixed order from the seed. */
    rng r;
    rng_seed(&r, p->seed);
    uint32_t nnz = 0;
    for (size_t pp = 0; pp < P; pp++) {
        sk->proj_start[pp] = nnz;
        for (size_t j = 0; j < d; j++) {
            uint64_t v = rng_below(&r, 6); /* Achlioptas 2003: 1/6, 1/6, 2/3 */
            if (v < 2) {
                sk->proj_idx[nnz] = (uint16_t)j;
                sk->proj_sign[nnz] = v == 0 ? 1 : -1;
                nnz++;
            }
        }
    }
    sk->proj_start[P] = nnz;
    for (size_t i = 0; i < M * P; i++)
        sk->shift[i] = rng_uniform(&r);
    for (size_t i = 0; i < M * L; i++)
        sk->axis[i] = (uint8_t)rng_below(&r, P);
    for (size_t i = 0; i < M * R * P; i++)
        sk->hkey[i] = rng_next(&r);
    for (size_t i = 0; i < M * R; i++)
        sk->hbase[i] = rng_next(&r);
    for (size_t pp = 0; pp < P; pp++)
        sk->width[pp] = 1.0;
    for (size_t l = 0; l < L; l++)
        sk->level_w[l] = ldexp(1.0, (int)l + 1);
    chains_derive(sk);
    proj_derive(sk);
    decay_init(&sk->clk, p->half_life_days);
    if (err)
        *err = 0;
    return sk;

fail_block:
    free(sk);
fail_struct:
fail_params:
    if (err)
        *err = e;
    return NULL;
}

void sketch_free(sketch *sk)
{
    if (!sk)
        return;
    free(sk->block);
    free(sk);
}

sketch *sketch_new_flat(uint32_t dim, uint32_t proj_dims, uint32_t chains,
                        uint32_t depth, uint32_t width, uint32_t rows,
                        double half_life_days, uint64_t seed)
{
    sketch_params p = {dim, proj_dims, chains, depth, width, rows,
                       half_life_days, seed};
    return sketch_new(&p, NULL);
}

/* Sanitise z: missing / non-finite as 0, clamped so that every later
 * product stays finite. */
static void load_z(sketch *sk, const double *z, const uint8_t *mask)
{
    const uint32_t d = sk->p.dim;
    for (uint32_t j = 0; j < d; j++) {
        double v = z[j];
        if ((mask && mask[j]) || !(v - v == 0))
            v = 0;
        v = v > SKETCH_Z_CLAMP ? SKETCH_Z_CLAMP : v;
        v = v < -SKETCH_Z_CLAMP ? -SKETCH_Z_CLAMP : v;
        sk->zd[j] = v;
    }
}

/* Projected coordinates of the loaded z in level-1 bin widths, clamped to
 * +-u_clamp, into y. */
typedef double sk_v2d __attribute__((vector_size(16)));

static void project(const sketch *sk, double *y)
{
    const uint32_t P = sk->p.proj_dims, d = sk->p.dim, nv = sk->pp / 2;
    const double *zd = sk->zd;
    const double *row = sk->dense;
    sk_v2d acc[SKETCH_MAX_PROJ / 2];
    for (uint32_t q = 0; q < nv; q++)
        acc[q] = (sk_v2d){0.0, 0.0};
    if (nv == 8) {
        /* the default P = 16, accumulators in registers */
        sk_v2d a0 = acc[0], a1 = a0, a2 = a0, a3 = a0, a4 = a0, a5 = a0,
               a6 = a0, a7 = a0;
        for (uint32_t j = 0; j < d; j++, row += 16) {
            sk_v2d zv = {zd[j], zd[j]}, r[8];
            memcpy(r, row, sizeof r);
            a0 += r[0] * zv;
            a1 += r[1] * zv;
            a2 += r[2] * zv;
            a3 += r[3] * zv;
            a4 += r[4] * zv;
            a5 += r[5] * zv;
            a6 += r[6] * zv;
            a7 += r[7] * zv;
        }
        acc[0] = a0, acc[1] = a1, acc[2] = a2, acc[3] = a3;
        acc[4] = a4, acc[5] = a5, acc[6] = a6, acc[7] = a7;
    } else {
        for (uint32_t j = 0; j < d; j++, row += 2 * nv) {
            sk_v2d zv = {zd[j], zd[j]};
            for (uint32_t q = 0; q < nv; q++) {
                sk_v2d r;
                memcpy(&r, row + 2 * q, sizeof r);
                acc[q] += r * zv;
            }
        }
    }
    for (uint32_t p = 0; p < P; p++) {
        double v = acc[p / 2][p & 1];
        v = v > sk->u_clamp ? sk->u_clamp : v;
        v = v < -sk->u_clamp ? -sk->u_clamp : v;
        y[p] = v;
    }
}

/* floor(u 2^up + shift) mod 2^32 in 32.32 fixed point: the top 32 bits of
 * the two's complement sum are the floor's low 32 bits (the u clamp keeps
 * the true value inside +-2^63, so nothing wraps). */
static inline uint32_t fixed_bin(uint64_t u, const sketch_level *lv)
{
    return (uint32_t)((u * lv->scale + lv->shift) >> 32);
}

static inline uint32_t reduce(uint64_t key, uint32_t w)
{
    return (uint32_t)(((key >> 32) * (uint64_t)w) >> 32);
}

/* Counter offsets of chain c for the projected vector u into sk->idx
 * (L * rows entries from c * L * rows, level-major within the chain),
 * prefetching each. */
static inline void chain_indices(sketch *sk, uint32_t c)
{
    const uint32_t L = sk->p.depth, R = sk->p.rows, P = sk->p.proj_dims,
                   W = sk->p.width;
    const uint64_t *u = sk->u;
    const sketch_level *lv = sk->lev + (size_t)c * L;
    const double *cnt = sk->counters;
    uint32_t *ix = sk->idx + (size_t)c * L * R;
    uint32_t bins[SKETCH_MAX_DEPTH + 1];
    bins[L] = 0; /* the bin of an axis not split yet */
    if (R == 1) {
        uint64_t key = sk->hbase[c];
        for (uint32_t l = 0; l < L; l++) {
            uint32_t b = fixed_bin(u[lv[l].axis], &lv[l]);
            key += lv[l].hkey * ((uint64_t)b - (uint64_t)bins[lv[l].prev]);
            bins[l] = b;
            uint32_t o = lv[l].base + reduce(key, W);
            __builtin_prefetch(cnt + o, 1, 3);
            ix[l] = o;
        }
        return;
    }
    uint64_t key[SKETCH_MAX_ROWS];
    const uint64_t *hk = sk->hkey + (size_t)c * R * P;
    for (uint32_t r = 0; r < R; r++)
        key[r] = sk->hbase[c * R + r];
    for (uint32_t l = 0; l < L; l++) {
        uint32_t f = lv[l].axis;
        uint32_t b = fixed_bin(u[f], &lv[l]);
        uint64_t delta = (uint64_t)b - (uint64_t)bins[lv[l].prev];
        bins[l] = b;
        for (uint32_t r = 0; r < R; r++) {
            key[r] += hk[r * P + f] * delta;
            uint32_t o = lv[l].base + r * W + reduce(key[r], W);
            __builtin_prefetch(cnt + o, 1, 3);
            ix[l * R + r] = o;
        }
    }
}

/* Read chain c's counters at sk->idx: returns min over levels of
 * (count + 1) 2^l in g units, and inserts when insert is set (after the
 * read, so the score sees the state before the vector). */
static inline double chain_visit(sketch *sk, uint32_t c, int insert)
{
    const uint32_t L = sk->p.depth, R = sk->p.rows;
    double *cnt = sk->counters;
    const uint32_t *ix = sk->idx + (size_t)c * L * R;
    const double g = sk->clk.g;
    double best = INFINITY;
    for (uint32_t l = 0; l < L; l++, ix += R) {
        double v = cnt[ix[0]];
        for (uint32_t r = 1; r < R; r++)
            v = cnt[ix[r]] < v ? cnt[ix[r]] : v;
        if (insert)
            for (uint32_t r = 0; r < R; r++)
                cnt[ix[r]] += g;
        v = (v + g) * sk->level_w[l];
        best = v < best ? v : best;
    }
    return best;
}

/* The one-row case, which the defaults use, with everything in
 * registers: chain c + 1's counter offsets are computed and prefetched
 * while chain c's counters are read (and written when insert).  pow2
 * selects the shift form of the range reduction (width a power of two). */
static inline __attribute__((always_inline)) void
run_chains_r1(sketch *sk, const int insert, const int pow2)
{
    const uint32_t M = sk->p.chains, L = sk->p.depth, W = sk->p.width;
    const unsigned wsh = 64u - (unsigned)__builtin_ctz(W);
    const uint64_t *u = sk->u;
    double *cnt = sk->counters;
    const double g = sk->clk.g;
    const double *lw = sk->level_w;
    uint32_t ixa[SKETCH_MAX_DEPTH], ixb[SKETCH_MAX_DEPTH];
    uint32_t *cur = ixa, *nxt = ixb;
    uint32_t bins[SKETCH_MAX_DEPTH + 1];
    bins[L] = 0; /* the bin of an axis not split yet */
    /* One pass over the levels locates level l of chain c + 1 (from the
     * "locate" half) and reads level l of chain c (the "visit" half). */
#define SKETCH_LOCATE(lv, l, key)                                           \
    do {                                                                    \
        uint32_t b_ = fixed_bin(u[(lv)[l].axis], &(lv)[l]);                 \
        key += (lv)[l].hkey * ((uint64_t)b_ - (uint64_t)bins[(lv)[l].prev]);\
        bins[l] = b_;                                                       \
        uint32_t o_ = (lv)[l].base +                                        \
                      (pow2 ? (uint32_t)(key >> wsh) : reduce(key, W));     \
        __builtin_prefetch(cnt + o_, 1, 3);                                 \
        nxt[l] = o_;                                                        \
    } while (0)
#define SKETCH_VISIT(l, best)                                               \
    do {                                                                    \
        double v_ = cnt[cur[l]];                                            \
        if (insert)                                                         \
            cnt[cur[l]] = v_ + g;                                           \
        v_ = (v_ + g) * lw[l];                                              \
        best = best < v_ ? best : v_;                                       \
    } while (0)
    {
        const sketch_level *lv = sk->lev;
        uint64_t key = sk->hbase[0];
        for (uint32_t l = 0; l < L; l++)
            SKETCH_LOCATE(lv, l, key);
        uint32_t *t = cur;
        cur = nxt;
        nxt = t;
    }
    for (uint32_t c = 0; c + 1 < M; c++) {
        const sketch_level *lv = sk->lev + (size_t)(c + 1) * L;
        uint64_t key = sk->hbase[c + 1];
        double best = INFINITY;
        for (uint32_t l = 0; l < L; l++) {
            SKETCH_LOCATE(lv, l, key);
            SKETCH_VISIT(l, best);
        }
        sk->best[c] = best;
        uint32_t *t = cur;
        cur = nxt;
        nxt = t;
    }
    double best = INFINITY;
    for (uint32_t l = 0; l < L; l++)
        SKETCH_VISIT(l, best);
    sk->best[M - 1] = best;
#undef SKETCH_LOCATE
#undef SKETCH_VISIT
}

/* Every chain, software-pipelined: chain c + 1's counters are located and
 * prefetched before chain c's are read. */
static void run_chains(sketch *sk, int insert)
{
    const uint32_t M = sk->p.chains;
    if (sk->p.rows == 1) {
        int pow2 = (sk->p.width & (sk->p.width - 1)) == 0;
        if (insert && pow2)
            run_chains_r1(sk, 1, 1);
        else if (insert)
            run_chains_r1(sk, 1, 0);
        else if (pow2)
            run_chains_r1(sk, 0, 1);
        else
            run_chains_r1(sk, 0, 0);
    } else {
        chain_indices(sk, 0);
        for (uint32_t c = 0; c < M; c++) {
            if (c + 1 < M)
                chain_indices(sk, c + 1);
            sk->best[c] = chain_visit(sk, c, insert);
        }
    }
    if (insert)
        sk->total += sk->clk.g;
}

/* -(mean over chains of log2 of the chain minima in sk->best), the minima
 * being (count + 1) 2^l in g units.  Each minimum is split into its binary
 * exponent and a mantissa in [1, 2); mantissas multiply (at most 2^M,
 * M <= 256: no overflow) and exponents add, so one log2 serves them all. */
static double novelty_from_best(const sketch *sk)
{
    const uint32_t M = sk->p.chains;
    const double inv_g = 1.0 / sk->clk.g;
    double prod[4] = {1.0, 1.0, 1.0, 1.0};
    int64_t exps = 0;
    for (uint32_t c = 0; c < M; c++) {
        /* best * inv_g = (count + 1) 2^l >= 2: a normal double */
        double v = sk->best[c] * inv_g;
        uint64_t bits;
        memcpy(&bits, &v, sizeof bits);
        exps += (int64_t)((bits >> 52) & 0x7ff) - 1023;
        bits = (bits & ~(0x7ffull << 52)) | (1023ull << 52);
        memcpy(&v, &bits, sizeof bits);
        prod[c & 3] *= v;
    }
    double all = (prod[0] * prod[1]) * (prod[2] * prod[3]);
    return -((log2(all) + (double)exps) / (double)M);
}

static void prepare(sketch *sk, const double *z, const uint8_t *mask)
{
    double y[SKETCH_MAX_PROJ];
    load_z(sk, z, mask);
    project(sk, y);
    for (uint32_t p = 0; p < sk->p.proj_dims; p++)
        sk->u[p] = (uint64_t)(int64_t)(y[p] * SKETCH_FIX_ONE);
}

double sketch_score(sketch *sk, const double *z, const uint8_t *mask)
{
    prepare(sk, z, mask);
    run_chains(sk, 0);
    return novelty_from_best(sk);
}

void sketch_update(sketch *sk, const double *z, const uint8_t *mask)
{
    prepare(sk, z, mask);
    run_chains(sk, 1);
}

double sketch_observe(sketch *sk, const double *z, const uint8_t *mask,
                      int learn)
{
    prepare(sk, z, mask);
    run_chains(sk, learn != 0);
    return novelty_from_best(sk);
}

void sketch_advance(sketch *sk, double t_days)
{
    double f = decay_advance(&sk->clk, t_days);
    if (f != 1.0) {
        for (size_t i = 0; i < sk->n_counters; i++)
            sk->counters[i] *= f;
        sk->total *= f;
    }
}

double sketch_fill(const sketch *sk)
{
    size_t nz = 0;
    for (size_t i = 0; i < sk->n_counters; i++)
        nz += sk->counters[i] != 0.0;
    return (double)nz / (double)sk->n_counters;
}

double sketch_mass(const sketch *sk) { return decay_read(&sk->clk, sk->total); }

double sketch_time(const sketch *sk)
{
    return sk->clk.started ? sk->clk.t_now : NAN;
}

int sketch_fit(sketch *sk, const double *Z, const uint8_t *mask, size_t n)
{
    if (!sk || !Z || n == 0)
        return CORE_EINVAL;
    const uint32_t P = sk->p.proj_dims, d = sk->p.dim;
    double lo[SKETCH_MAX_PROJ], hi[SKETCH_MAX_PROJ];
    /* project with the unscaled entries (+-sqrt(3)) */
    for (uint32_t p = 0; p < P; p++) {
        sk->width[p] = 1.0;
        lo[p] = INFINITY;
        hi[p] = -INFINITY;
    }
    proj_derive(sk);
    for (size_t i = 0; i < n; i++) {
        double y[SKETCH_MAX_PROJ];
        load_z(sk, Z + i * d, mask ? mask + i * d : NULL);
        project(sk, y);
        for (uint32_t p = 0; p < P; p++) {
            double v = y[p];
            lo[p] = v < lo[p] ? v : lo[p];
            hi[p] = v > hi[p] ? v : hi[p];
        }
    }
    for (uint32_t p = 0; p < P; p++) {
        double half = (hi[p] - lo[p]) / 2; /* xStream: half the range */
        sk->width[p] = (half > 1e-9 && isfinite(half)) ? half : 1.0;
    }
    proj_derive(sk);
    memset(sk->counters, 0, sk->n_counters * sizeof(double));
    sk->total = 0;
    return 0;
}

double sketch_bin_count(sketch *sk, const double *z, const uint8_t *mask,
                        uint32_t chain, uint32_t level)
{
    if (!sk || !z || chain >= sk->p.chains || level >= sk->p.depth)
        return -1.0;
    prepare(sk, z, mask);
    chain_indices(sk, chain);
    const uint32_t R = sk->p.rows;
    const uint32_t *idx = sk->idx + ((size_t)chain * sk->p.depth + level) * R;
    double v = sk->counters[idx[0]];
    for (uint32_t r = 1; r < R; r++)
        v = sk->counters[idx[r]] < v ? sk->counters[idx[r]] : v;
    return decay_read(&sk->clk, v);
}

double sketch_counter(const sketch *sk, uint32_t chain, uint32_t level,
                      uint32_t row, uint32_t col)
{
    if (!sk || chain >= sk->p.chains || level >= sk->p.depth ||
        row >= sk->p.rows || col >= sk->p.width)
        return -1.0;
    size_t o = (((size_t)chain * sk->p.depth + level) * sk->p.rows + row) *
                   sk->p.width + col;
    return decay_read(&sk->clk, sk->counters[o]);
}

static void params_save(const sketch_params *p, snap_writer *w)
{
    snap_put_u32(w, p->dim);
    snap_put_u32(w, p->proj_dims);
    snap_put_u32(w, p->chains);
    snap_put_u32(w, p->depth);
    snap_put_u32(w, p->width);
    snap_put_u32(w, p->rows);
    snap_put_f64(w, p->half_life_days);
    snap_put_u64(w, p->seed);
}

void sketch_save(const sketch *sk, snap_writer *w)
{
    const sketch_params *p = &sk->p;
    const size_t P = p->proj_dims, M = p->chains, L = p->depth, R = p->rows;
    snap_put_tag(w, "SKCH");
    params_save(p, w);
    snap_put_f64s(w, sk->width, P);
    for (size_t i = 0; i <= P; i++)
        snap_put_u32(w, sk->proj_start[i]);
    for (size_t i = 0; i < sk->proj_start[P]; i++) {
        snap_put_u32(w, sk->proj_idx[i]);
        snap_put_u8(w, (uint8_t)sk->proj_sign[i]);
    }
    snap_put_f64s(w, sk->shift, M * P);
    snap_put_bytes(w, sk->axis, M * L);
    for (size_t i = 0; i < M * R * P; i++)
        snap_put_u64(w, sk->hkey[i]);
    for (size_t i = 0; i < M * R; i++)
        snap_put_u64(w, sk->hbase[i]);
    decay_save(&sk->clk, w);
    snap_put_f64(w, sk->total);
    snap_put_f64s(w, sk->counters, sk->n_counters);
}

int sketch_load(sketch *sk, snap_reader *r)
{
    const sketch_params *p = &sk->p;
    const size_t P = p->proj_dims, M = p->chains, L = p->depth, R = p->rows;
    snap_expect_tag(r, "SKCH");
    sketch_params q;
    q.dim = snap_get_u32(r);
    q.proj_dims = snap_get_u32(r);
    q.chains = snap_get_u32(r);
    q.depth = snap_get_u32(r);
    q.width = snap_get_u32(r);
    q.rows = snap_get_u32(r);
    q.half_life_days = snap_get_f64(r);
    q.seed = snap_get_u64(r);
    if (r->err)
        return r->err;
    if (q.dim != p->dim || q.proj_dims != p->proj_dims ||
        q.chains != p->chains || q.depth != p->depth || q.width != p->width ||
        q.rows != p->rows || q.seed != p->seed ||
        memcmp(&q.half_life_days, &p->half_life_days, sizeof(double)) != 0)
        return CORE_EMISMATCH;
    snap_get_f64s(r, sk->width, P);
    uint32_t prev = 0;
    for (size_t i = 0; i <= P; i++) {
        sk->proj_start[i] = snap_get_u32(r);
        if (sk->proj_start[i] < prev || sk->proj_start[i] > P * p->dim ||
            (i == 0 && sk->proj_start[0] != 0))
            r->err = r->err ? r->err : CORE_EFORMAT;
        prev = sk->proj_start[i];
    }
    if (r->err)
        return r->err;
    for (size_t i = 0; i < sk->proj_start[P]; i++) {
        uint32_t j = snap_get_u32(r);
        int8_t s = (int8_t)snap_get_u8(r);
        if (j >= p->dim || (s != 1 && s != -1))
            r->err = r->err ? r->err : CORE_EFORMAT;
        sk->proj_idx[i] = (uint16_t)j;
        sk->proj_sign[i] = s;
    }
    snap_get_f64s(r, sk->shift, M * P);
    snap_get_bytes(r, sk->axis, M * L);
    for (size_t i = 0; i < M * L; i++)
        if (sk->axis[i] >= P)
            r->err = r->err ? r->err : CORE_EFORMAT;
    for (size_t i = 0; i < M * P; i++)
        if (!(sk->shift[i] >= 0.0 && sk->shift[i] < 1.0))
            r->err = r->err ? r->err : CORE_EFORMAT;
    for (size_t i = 0; i < P; i++)
        if (!(sk->width[i] > 0) || !isfinite(sk->width[i]))
            r->err = r->err ? r->err : CORE_EFORMAT;
    for (size_t i = 0; i < M * R * P; i++)
        sk->hkey[i] = snap_get_u64(r);
    for (size_t i = 0; i < M * R; i++)
        sk->hbase[i] = snap_get_u64(r);
    decay_load(&sk->clk, r);
    sk->total = snap_get_f64(r);
    snap_get_f64s(r, sk->counters, sk->n_counters);
    if (r->err)
        return r->err;
    chains_derive(sk);
    proj_derive(sk);
    return 0;
}

size_t sketch_save_buf(const sketch *sk, uint8_t *buf, size_t cap)
{
    if (!sk)
        return 0;
    snap_writer w;
    snap_writer_init(&w, buf, cap);
    sketch_save(sk, &w);
    return w.len;
}

int sketch_load_buf(sketch *sk, const uint8_t *buf, size_t len)
{
    if (!sk || !buf)
        return CORE_EINVAL;
    snap_reader r;
    snap_reader_init(&r, buf, len);
    return sketch_load(sk, &r);
}
