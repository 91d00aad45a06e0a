/*
 * calib.c - decaying score histogram on an asinh grid, its tail and
 * quantile, and the flag policies.
 *
 * Cells are numbered 0 (underflow), 1..bins (the grid, ascending), bins+1
 * (overflow).  A Fenwick tree (Fenwick 1994) holds the same masses in
 * descending order, position 1 being the overflow cell, so "mass above
 * cell k" is one prefix sum taken from the top: small tails are summed
 * directly instead of as total minus a near-equal prefix.  Both arrays,
 * and the total, are in units of the clock's g (core/decay.h) and are
 * renormalised together by an exact power of two.
 *
 * Invariants: cell[i] >= 0; fen holds the descending prefix structure of
 * cell; total = sum of all inserts (equal to the sum of cells up to
 * rounding); lo_cell is the lowest non-empty cell (n when empty); seen = 0
 * until the first score, first_time its time.
 */
#include "calib.h"

#include <math.h>
#include <stdlib.h>
#include <string.h>

#include "decay.h"

#define CALIB_LN2 0.69314718055994530942

struct calib {
    calib_params p;
    decay_clock clk;
    double amax;       /* asinh(limit) */
    double w;          /* cell width in asinh units */
    double inv_w;
    double total;      /* g units */
    double first_time; /* event time of the first score */
    int seen;
    uint32_t n;        /* bins + 2 */
    uint32_t lo_cell;  /* lowest non-empty natural cell, n when none */
    double *cell;      /* n */
    uint32_t fn;       /* Fenwick size: the power of two >= n */
    double *fen;       /* fn + 1, 1-based; positions past n stay 0 */
};

void calib_params_default(calib_params *p)
{
    memset(p, 0, sizeof *p);
    p->bins = 2048;
    p->limit = 1e6;
    p->half_life_days = 3;
    p->policy = CALIB_POLICY_BUDGET;
    p->alpha = 1e-3;
    p->budget_per_hour = 10;
    p->prior_rate_per_hour = 1e5;
    p->min_span_days = 1.0 / 96;
}

int calib_params_check(const calib_params *p, const char **field)
{
    const char *bad = NULL;
    if (p->bins < CALIB_MIN_BINS || p->bins > CALIB_MAX_BINS)
        bad = "bins";
    else if (!(p->limit > 0) || !isfinite(p->limit))
        bad = "limit";
    else if (!(p->half_life_days >= 0) || !isfinite(p->half_life_days))
        bad = "half_life_days";
    else if (p->policy != CALIB_POLICY_ALPHA &&
             p->policy != CALIB_POLICY_BUDGET)
        bad = "policy";
    else if (!(p->alpha > 0 && p->alpha <= 1))
        bad = "alpha";
    else if (!(p->budget_per_hour > 0) || !isfinite(p->budget_per_hour))
        bad = "budget_per_hour";
    else if (!(p->prior_rate_per_hour > 0) ||
             !isfinite(p->prior_rate_per_hour))
        bad = "prior_rate_per_hour";
    else if (!(p->min_span_days >= 0) || !isfinite(p->min_span_days))
        bad = "min_span_days";
    if (bad && field)
        *field = bad;
    return bad ? CORE_ERANGE : 0;
}

calib *calib_new(const calib_params *p, int *err)
{
    int e = CORE_EINVAL;
    calib *c = NULL;
    if (!p || calib_params_check(p, NULL))
        goto fail_params;
    e = CORE_ENOMEM;
    c = calloc(1, sizeof *c);
    if (!c)
        goto fail_struct;
    c->p = *p;
    c->n = p->bins + 2;
    c->fn = 1;
    while (c->fn < c->n)
        c->fn *= 2;
    c->cell = calloc((size_t)c->n + c->fn + 1, sizeof(double));
    if (!c->cell)
        goto fail_cells;
    c->fen = c->cell + c->n;
    c->lo_cell = c->n;
    c->amax = asinh(p->limit);
    c->w = 2 * c->amax / p->bins;
    c->inv_w = p->bins / (2 * c->amax);
    decay_init(&c->clk, p->half_life_days);
    if (err)
        *err = 0;
    return c;

fail_cells:
    free(c);
fail_struct:
fail_params:
    if (err)
        *err = e;
    return NULL;
}

void calib_free(calib *c)
{
    if (!c)
        return;
    free(c->cell);
    free(c);
}

calib *calib_new_flat(uint32_t bins, double limit, double half_life_days,
                      int32_t policy, double alpha, double budget_per_hour,
                      double prior_rate_per_hour, double min_span_days)
{
    calib_params p = {bins,  limit,           half_life_days,
                      policy, alpha,          budget_per_hour,
                      prior_rate_per_hour, min_span_days};
    return calib_new(&p, NULL);
}

const calib_params *calib_get_params(const calib *c) { return &c->p; }

size_t calib_bytes(const calib *c)
{
    return sizeof *c + ((size_t)c->n + c->fn + 1) * sizeof(double);
}

/* Descending Fenwick position (1-based) of natural cell i. */
static inline uint32_t fen_pos(const calib *c, uint32_t i)
{
    return c->n - i;
}

static void fen_add(calib *c, uint32_t pos, double v)
{
    for (; pos <= c->fn; pos += pos & (0u - pos))
        c->fen[pos] += v;
}

/* Sum of descending positions 1..pos. */
static double fen_prefix(const calib *c, uint32_t pos)
{
    double s = 0;
    for (; pos > 0; pos -= pos & (0u - pos))
        s += c->fen[pos];
    return s;
}

/* Smallest pos with prefix(pos) >= target (past n when none), and
 * prefix(pos - 1) in *below.  The tree size is a power of two, so once
 * the root covers the target the descent needs no bounds check, and the
 * step is written without a data-dependent branch.  A root below the
 * target (rounding against c->total, or a snapshot whose total and tree
 * disagree) would step past the tree: answer "none" before that. */
static uint32_t fen_search(const calib *c, double target, double *below)
{
    if (c->fen[c->fn] < target) {
        *below = c->fen[c->fn];
        return c->fn + 1;
    }
    uint32_t pos = 0;
    double acc = 0;
    for (uint32_t step = c->fn; step; step >>= 1) {
        uint32_t nxt = pos + step;
        double sum = acc + c->fen[nxt];
        int take = sum < target;
        pos = take ? nxt : pos;
        acc = take ? sum : acc;
    }
    *below = acc;
    return pos + 1;
}

/* sinh through one exp where nothing cancels (|a| >= 1/4: relative error
 * a few ulps); glibc's sinh goes through the slower expm1. */
static double fast_sinh(double a)
{
    if (fabs(a) < 0.25)
        return sinh(a);
    double e = exp(a);
    return 0.5 * (e - 1.0 / e);
}

/* Natural cell of a score. */
static uint32_t cell_of(const calib *c, double a)
{
    if (a < -c->amax)
        return 0;
    if (a > c->amax)
        return c->p.bins + 1;
    double x = (a + c->amax) * c->inv_w;
    uint32_t k = x >= (double)c->p.bins ? c->p.bins - 1 : (uint32_t)x;
    return k + 1;
}

static void find_lo_cell(calib *c)
{
    c->lo_cell = c->n;
    for (uint32_t i = 0; i < c->n; i++)
        if (c->cell[i] > 0) {
            c->lo_cell = i;
            break;
        }
}

void calib_advance(calib *c, double t_days)
{
    double f = decay_advance(&c->clk, t_days);
    if (f != 1.0) {
        for (uint32_t i = 0; i < c->n; i++)
            c->cell[i] *= f;
        for (uint32_t i = 1; i <= c->fn; i++)
            c->fen[i] *= f;
        c->total *= f;
        find_lo_cell(c); /* a gap of ~1000 half-lives can empty cells */
    }
}

/* Add one score, already placed in natural cell i, at the clock's time. */
static void insert_cell(calib *c, uint32_t i)
{
    if (!c->seen) {
        c->seen = 1;
        c->first_time = c->clk.t_now;
    }
    double g = decay_unit(&c->clk);
    c->cell[i] += g;
    if (i < c->lo_cell)
        c->lo_cell = i;
    fen_add(c, fen_pos(c, i), g);
    c->total += g;
}

int calib_observe(calib *c, double s, double t_days)
{
    calib_advance(c, t_days);
    if (isnan(s))
        return CORE_EINVAL;
    insert_cell(c, cell_of(c, asinh(s)));
    return 0;
}

size_t calib_observe_many(calib *c, const double *s, const double *t,
                          size_t n)
{
    size_t taken = 0;
    for (size_t i = 0; i < n; i++)
        taken += calib_observe(c, s[i], t[i]) == 0;
    return taken;
}

/* tail_prob for a = asinh(s), s not NaN. */
static double tail_of(const calib *c, double a)
{
    const double W = c->total;
    if (!(W > 0))
        return 1.0;
    if (a < -c->amax)
        return 1.0;
    if (a > c->amax)
        return c->cell[c->p.bins + 1] / W;
    double x = (a + c->amax) * c->inv_w;
    uint32_t k = x >= (double)c->p.bins ? c->p.bins - 1 : (uint32_t)x;
    double frac = (double)(k + 1) - x; /* share of cell k at or above a */
    frac = frac < 0 ? 0 : frac > 1 ? 1 : frac;
    /* cells strictly above natural cell k + 1: descending 1..bins - k */
    double above = fen_prefix(c, c->p.bins - k);
    double t = (above + c->cell[k + 1] * frac) / W;
    return t > 1.0 ? 1.0 : t;
}

double calib_tail_prob(const calib *c, double s)
{
    if (isnan(s))
        return 1.0;
    return tail_of(c, asinh(s));
}

double calib_mass(const calib *c) { return decay_read(&c->clk, c->total); }

void calib_outside(const calib *c, double *under, double *over)
{
    if (under)
        *under = decay_read(&c->clk, c->cell[0]);
    if (over)
        *over = decay_read(&c->clk, c->cell[c->p.bins + 1]);
}

double calib_time(const calib *c)
{
    return c->clk.started ? c->clk.t_now : NAN;
}

double calib_rate_per_hour(const calib *c)
{
    double W = calib_mass(c);
    if (!c->seen || !(W > 0))
        return c->p.prior_rate_per_hour;
    double T = c->clk.t_now - c->first_time;
    if (!(T >= c->p.min_span_days) || !(T > 0))
        return c->p.prior_rate_per_hour;
    const double H = c->p.half_life_days;
    double window; /* days of stream the decayed mass stands for */
    double x = T / H;
    if (H == 0)
        window = T;
    else if (x < 0.125) /* 1 - 2^-x without cancellation */
        window = -expm1(-x * CALIB_LN2) * H / CALIB_LN2;
    else /* exp2 is several times cheaper than expm1 */
        window = (1.0 - exp2(-x)) * H / CALIB_LN2;
    return W / window / 24.0;
}

double calib_target_fraction(const calib *c)
{
    if (c->p.policy == CALIB_POLICY_ALPHA)
        return c->p.alpha;
    double q = c->p.budget_per_hour / calib_rate_per_hour(c);
    return q < 1.0 ? q : 1.0;
}

double calib_threshold(const calib *c)
{
    const double W = c->total;
    if (!(W > 0))
        return INFINITY;
    const double target = calib_target_fraction(c) * W;
    const uint32_t B = c->p.bins;
    if (c->cell[B + 1] >= target)
        return c->p.limit;
    if (c->lo_cell == 0 && target > c->total - c->cell[0])
        return -INFINITY; /* only the underflow cell reaches the target */
    double above;
    uint32_t pos = fen_search(c, target, &above);
    uint32_t i = pos > B + 1 ? 0 : c->n - pos; /* natural cell */
    if (i < c->lo_cell) {
        /* q = 1, or rounding between the tree and the total: every score
         * in the grid is in the tail */
        if (c->lo_cell == 0)
            return -INFINITY;
        return calib_edge(c, c->lo_cell - 1);
    }
    double m = c->cell[i];
    double frac = m > 0 ? (target - above) / m : 1.0;
    frac = frac < 0 ? 0 : frac > 1 ? 1 : frac;
    /* tail(a) = above + m (a_top - a) / w = target */
    double a_top = -c->amax + (double)i * c->w;
    return fast_sinh(a_top - frac * c->w);
}

int calib_should_flag(const calib *c, double s)
{
    if (isnan(s))
        return 0;
    if (c->p.policy == CALIB_POLICY_ALPHA)
        return calib_tail_prob(c, s) <= c->p.alpha;
    return s >= calib_threshold(c);
}

int calib_assess(calib *c, double s, double t_days, int learn,
                 calib_verdict *out)
{
    if (!c || !out)
        return CORE_EINVAL;
    calib_advance(c, t_days);
    out->threshold = calib_threshold(c);
    if (isnan(s)) {
        out->tail_prob = 1.0;
        out->flag = 0;
        return CORE_EINVAL;
    }
    double a = asinh(s);
    out->tail_prob = tail_of(c, a);
    out->flag = c->p.policy == CALIB_POLICY_ALPHA
                    ? out->tail_prob <= c->p.alpha
                    : s >= out->threshold;
    if (learn)
        insert_cell(c, cell_of(c, a));
    return 0;
}

double calib_expected_per_night(const calib *c)
{
    double thr = calib_threshold(c);
    if (thr == INFINITY)
        return 0.0;
    return calib_rate_per_hour(c) * CALIB_NIGHT_HOURS * calib_tail_prob(c, thr);
}

double calib_edge(const calib *c, uint32_t i)
{
    if (i > c->p.bins)
        i = c->p.bins;
    return sinh(-c->amax + (double)i * c->w);
}

uint32_t calib_histogram(const calib *c, double *edges, double *mass,
                         uint32_t n)
{
    const uint32_t B = c->p.bins;
    uint32_t lo = 0, hi = 0;
    for (uint32_t i = 1; i <= B; i++)
        if (c->cell[i] > 0) {
            lo = i;
            break;
        }
    for (uint32_t i = B; i >= 1; i--)
        if (c->cell[i] > 0) {
            hi = i;
            break;
        }
    if (n == 0 || lo == 0)
        return 0;
    uint32_t cells = hi - lo + 1;
    uint32_t per = (cells + n - 1) / n;
    uint32_t count = (cells + per - 1) / per;
    for (uint32_t gi = 0; gi < count; gi++) {
        uint32_t from = lo + gi * per, to = from + per - 1;
        if (to > hi)
            to = hi;
        double m = 0;
        for (uint32_t i = from; i <= to; i++)
            m += c->cell[i];
        edges[gi] = calib_edge(c, from - 1);
        mass[gi] = decay_read(&c->clk, m);
    }
    edges[count] = calib_edge(c, hi);
    return count;
}

void calib_save(const calib *c, snap_writer *w)
{
    snap_put_tag(w, "CALB");
    snap_put_u32(w, c->p.bins);
    snap_put_f64(w, c->p.limit);
    snap_put_f64(w, c->p.half_life_days);
    decay_save(&c->clk, w);
    snap_put_u32(w, (uint32_t)c->seen);
    snap_put_f64(w, c->first_time);
    snap_put_f64(w, c->total);
    snap_put_f64s(w, c->cell, c->n);
    snap_put_f64s(w, c->fen + 1, c->fn);
}

int calib_load(calib *c, snap_reader *r)
{
    snap_expect_tag(r, "CALB");
    uint32_t bins = snap_get_u32(r);
    double limit = snap_get_f64(r);
    double hl = snap_get_f64(r);
    if (r->err)
        return r->err;
    if (bins != c->p.bins || memcmp(&limit, &c->p.limit, sizeof limit) ||
        memcmp(&hl, &c->p.half_life_days, sizeof hl))
        return CORE_EMISMATCH;
    decay_load(&c->clk, r);
    c->seen = snap_get_u32(r) != 0;
    c->first_time = snap_get_f64(r);
    c->total = snap_get_f64(r);
    snap_get_f64s(r, c->cell, c->n);
    snap_get_f64s(r, c->fen + 1, c->fn);
    if (r->err)
        return r->err;
    /* No real stream reaches these: each insert adds at most 2^60 (see
     * decay.h) and a stream has fewer than 2^64 scores, so anything above
     * 2^128 is a corrupt snapshot that would overflow on the next insert. */
    const double cap = 0x1p128;
    if (!(c->total >= 0 && c->total <= cap))
        return CORE_EFORMAT;
    find_lo_cell(c);
    for (uint32_t i = 0; i < c->n; i++)
        if (!(c->cell[i] >= 0 && c->cell[i] <= cap))
            return CORE_EFORMAT;
    for (uint32_t i = 1; i <= c->fn; i++)
        if (!(c->fen[i] >= 0 && c->fen[i] <= cap))
            return CORE_EFORMAT;
    return 0;
}

size_t calib_save_buf(const calib *c, uint8_t *buf, size_t cap)
{
    if (!c)
        return 0;
    snap_writer w;
    snap_writer_init(&w, buf, cap);
    calib_save(c, &w);
    return w.len;
}

int calib_load_buf(calib *c, const uint8_t *buf, size_t len)
{
    if (!c || !buf)
        return CORE_EINVAL;
    snap_reader r;
    snap_reader_init(&r, buf, len);
    return calib_load(c, &r);
}
