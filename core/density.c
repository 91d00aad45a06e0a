/*
 * density.c - residual histograms and the mixture log density.
 *
 * Layout: histogram (k, j) owns nb = bins + 2 consecutive counts (double)
 * and table entries (float), bin 0 the left tail and bin nb-1 the right.
 * Counts are in the clock's scaled units (each insert adds g); the tables
 * hold, with c = count / g and T = total / g at build time,
 *   inner bin:  log(c_b + P phi_b) - log(width)
 *   tail bin:   log(c_b + P Q) - log Q - log sqrt(2 pi)
 * and lden[k, j] = log(T + P), so log h = tab[b] - lden (- r^2/2 in the
 * tails).  c/g is unchanged by the clock's renormalisation, so a renorm
 * scales counts and built_g alike and leaves the tables valid.
 *
 * Cost: lden_sum[k] = sum_j lden[k, j] is kept beside the tables, so a
 * vector with every feature observed reads one table entry per feature
 * and subtracts lden_sum[k] + sum_j log s_kj (kmeans' log_spread_sum)
 * once per cluster.  The histograms of one cluster get the same inserts
 * on every feature unless a feature was missing, so their totals are
 * usually equal and an update computes log(T + P) once and copies it
 * while the totals stay bit-identical.
 */
#include "density.h"

#include <math.h>
#include <stdlib.h>
#include <string.h>

#include "decay.h"
#include "err.h"
#include "select.h"
#include "vec.h"

struct density {
    density_params p;
    uint32_t nb;
    double width, inv_width, log_width, tail_q, log_norm_tail;
    double *phi;       /* nb: normal mass per bin */
    double *count;     /* k x dim x nb */
    double *total;     /* k x dim */
    float *tab;        /* k x dim x nb */
    double *lden;      /* k x dim */
    double *lden_sum;  /* k: sum over j of lden, in index order */
    double *built_g;   /* k: clock g when k's tables were built */
    uint8_t *skip;     /* dim scratch: feature not observed */
    float *arg;        /* max(dim, nb) scratch: arguments of vec_logf */
    uint32_t *tb;      /* dim scratch: touched bin per feature */
    decay_clock clk;
};

void density_params_default(density_params *p, uint32_t dim, uint32_t k)
{
    p->dim = dim;
    p->k = k;
    p->bins = 24;
    p->range = 6;
    p->pseudo = 20;
    p->half_life_days = 7;
    p->refresh_tol = 0.01;
}

static int params_ok(const density_params *p)
{
    return p && p->dim >= 1 && p->dim <= (1u << 16) && p->k >= 1 &&
           p->k <= (1u << 16) && p->bins >= 2 && p->bins <= 4096 &&
           isfinite(p->range) && p->range > 0 && isfinite(p->pseudo) &&
           p->pseudo >= 0 && isfinite(p->half_life_days) &&
           p->half_life_days >= 0 && isfinite(p->refresh_tol) &&
           p->refresh_tol > 0;
}

static double norm_cdf(double x) { return 0.5 * erfc(-x / M_SQRT2); }

/* lden_sum[k] from k's lden row (index order, so a load rebuilds it
 * bit for bit). */
static void sum_lden(density *ds, uint32_t k)
{
    const double *l = ds->lden + (size_t)k * ds->p.dim;
    double s = 0;
    for (uint32_t j = 0; j < ds->p.dim; j++)
        s += l[j];
    ds->lden_sum[k] = s;
}

/* Rebuild every table of cluster k at the clock's current g. */
static void build_cluster(density *ds, uint32_t k)
{
    uint32_t d = ds->p.dim, nb = ds->nb;
    double g = decay_unit(&ds->clk), P = ds->p.pseudo;
    double lw = ds->log_width;
    float *arg = ds->arg;
    const double inv_g = 1.0 / g;
    for (uint32_t j = 0; j < d; j++) {
        size_t h = (size_t)k * d + j;
        const double *c = ds->count + h * nb;
        float *tab = ds->tab + h * nb;
        double T = ds->total[h] / g;
        ds->lden[h] = log(T + P);
        for (uint32_t b = 0; b < nb; b++)
            arg[b] = (float)(c[b] * inv_g + P * ds->phi[b]);
        vec_logf(arg, arg, nb);
        for (uint32_t b = 0; b < nb; b++)
            tab[b] = (float)((double)arg[b] -
                             ((b == 0 || b == nb - 1) ? ds->log_norm_tail : lw));
    }
    sum_lden(ds, k);
    ds->built_g[k] = g;
}

density *density_new(const density_params *p, int *err)
{
    int e = CORE_EINVAL;
    density *ds = NULL;
    if (!params_ok(p))
        goto fail;
    e = CORE_ENOMEM;
    ds = calloc(1, sizeof *ds);
    if (!ds)
        goto fail;
    ds->p = *p;
    ds->nb = p->bins + 2;
    size_t hk = (size_t)p->k * p->dim;
    ds->phi = calloc(ds->nb, sizeof(double));
    ds->count = calloc(hk * ds->nb, sizeof(double));
    ds->total = calloc(hk, sizeof(double));
    ds->tab = calloc(hk * ds->nb, sizeof(float));
    ds->lden = calloc(hk, sizeof(double));
    ds->lden_sum = calloc(p->k, sizeof(double));
    ds->built_g = calloc(p->k, sizeof(double));
    ds->skip = calloc(p->dim, 1);
    ds->arg = calloc(p->dim > ds->nb ? p->dim : ds->nb, sizeof(float));
    ds->tb = calloc(p->dim, sizeof(uint32_t));
    if (!ds->phi || !ds->count || !ds->total || !ds->tab || !ds->lden ||
        !ds->lden_sum || !ds->built_g || !ds->skip || !ds->arg || !ds->tb)
        goto fail_arrays;
    ds->width = 2 * p->range / p->bins;
    ds->inv_width = 1.0 / ds->width;
    ds->log_width = log(ds->width);
    ds->tail_q = 0.5 * erfc(p->range / M_SQRT2);
    ds->log_norm_tail = log(ds->tail_q) + 0.5 * log(2 * M_PI);
    ds->phi[0] = ds->tail_q;
    ds->phi[ds->nb - 1] = ds->tail_q;
    for (uint32_t b = 0; b < p->bins; b++) {
        double lo = -p->range + b * ds->width;
        ds->phi[b + 1] = norm_cdf(lo + ds->width) - norm_cdf(lo);
    }
    decay_init(&ds->clk, p->half_life_days);
    for (uint32_t k = 0; k < p->k; k++)
        build_cluster(ds, k);
    if (err)
        *err = 0;
    return ds;
fail_arrays:
    density_free(ds);
fail:
    if (err)
        *err = e;
    return NULL;
}

void density_free(density *ds)
{
    if (!ds)
        return;
    free(ds->phi);
    free(ds->count);
    free(ds->total);
    free(ds->tab);
    free(ds->lden);
    free(ds->lden_sum);
    free(ds->built_g);
    free(ds->skip);
    free(ds->arg);
    free(ds->tb);
    free(ds);
}

size_t density_bytes(const density *ds)
{
    size_t hk = (size_t)ds->p.k * ds->p.dim;
    return sizeof *ds + ds->nb * sizeof(double) +
           hk * ds->nb * (sizeof(double) + sizeof(float)) +
           hk * 2 * sizeof(double) + ds->p.k * 2 * sizeof(double) +
           ds->p.dim * (1 + sizeof(uint32_t)) +
           (ds->p.dim > ds->nb ? ds->p.dim : ds->nb) * sizeof(float);
}

const density_params *density_get_params(const density *ds) { return &ds->p; }

static inline void maybe_rebuild(density *ds, uint32_t k)
{
    if (decay_unit(&ds->clk) > ds->built_g[k] * (1.0 + ds->p.refresh_tol))
        build_cluster(ds, k);
}

static inline uint32_t bin_of(const density *ds, double r)
{
    if (!(r >= -ds->p.range))
        return 0; /* NaN residuals cannot reach here: z is checked */
    if (r >= ds->p.range)
        return ds->nb - 1;
    uint32_t b = (uint32_t)((r + ds->p.range) * ds->inv_width);
    return 1 + (b < ds->p.bins ? b : ds->p.bins - 1);
}

/* (d / obs) sum_j (log h_kj(r_kj) - log s_kj) over the observed features:
 * skip NULL means all d are observed (obs == d), else skip[j] marks the
 * ones left out. */
static double cluster_term(density *ds, const kmeans *km, uint32_t k,
                           const double *z, const uint8_t *skip, uint32_t obs)
{
    const uint32_t d = ds->p.dim, nb = ds->nb;
    maybe_rebuild(ds, k);
    kmeans_cluster_view v;
    kmeans_cluster(km, k, &v);
    const float *tab = ds->tab + (size_t)k * d * nb;
    const double *c = v.centroid, *is = v.inv_spread;
    if (!skip) {
        double sum = 0, tails = 0;
        for (uint32_t j = 0; j < d; j++, tab += nb) {
            double r = (z[j] - c[j]) * is[j];
            uint32_t b = bin_of(ds, r);
            sum += (double)tab[b];
            if (b == 0 || b == nb - 1)
                tails += 0.5 * r * r;
        }
        return (sum - tails) - (ds->lden_sum[k] + v.log_spread_sum);
    }
    const double *lden = ds->lden + (size_t)k * d;
    double sum = 0;
    for (uint32_t j = 0; j < d; j++, tab += nb) {
        if (skip[j])
            continue;
        double r = (z[j] - c[j]) * is[j];
        uint32_t b = bin_of(ds, r);
        double term = (double)tab[b] - lden[j];
        if (b == 0 || b == nb - 1)
            term -= 0.5 * r * r;
        sum += term;
    }
    sum -= vec_sum_log(v.spread, skip, d);
    return sum * ((double)d / (double)obs);
}

/* Observed features of z into ds->skip; returns their count. */
static uint32_t observed(density *ds, const double *z, const uint8_t *miss)
{
    uint32_t obs = 0;
    for (uint32_t j = 0; j < ds->p.dim; j++) {
        uint8_t sk = (miss && miss[j]) || !isfinite(z[j]);
        ds->skip[j] = sk;
        obs += !sk;
    }
    return obs;
}

double density_log_cluster(density *ds, const kmeans *km, uint32_t k,
                           const double *z, const uint8_t *miss)
{
    uint32_t obs = observed(ds, z, miss);
    if (obs == 0)
        return 0;
    return cluster_term(ds, km, k, z, obs == ds->p.dim ? NULL : ds->skip, obs);
}

double density_log(density *ds, const kmeans *km, const double *z,
                   const uint8_t *miss, const uint32_t *idx, uint32_t m,
                   double t)
{
    if (m == 0)
        return NAN;
    uint32_t obs = observed(ds, z, miss);
    if (obs == 0)
        return 0;
    const uint8_t *skip = obs == ds->p.dim ? NULL : ds->skip;
    double tot = kmeans_total_weight(km, t);
    double log_tot = tot > 0 ? log(tot) : 0;
    enum { MAXM = 64 };
    double a[MAXM];
    if (m > MAXM)
        m = MAXM;
    double mx = -INFINITY;
    for (uint32_t i = 0; i < m; i++) {
        a[i] = kmeans_log_weight(km, idx[i], t) - log_tot +
               cluster_term(ds, km, idx[i], z, skip, obs);
        if (a[i] > mx)
            mx = a[i];
    }
    if (mx == -INFINITY)
        return -INFINITY;
    double s = 0;
    for (uint32_t i = 0; i < m; i++)
        s += exp(a[i] - mx);
    return mx + log(s);
}

void density_update(density *ds, const kmeans *km, uint32_t k,
                    const double *z, const uint8_t *miss, double t)
{
    uint32_t d = ds->p.dim, nb = ds->nb;
    double f = decay_advance(&ds->clk, t);
    if (f != 1.0) {
        size_t hk = (size_t)ds->p.k * d;
        for (size_t i = 0; i < hk * nb; i++)
            ds->count[i] *= f;
        for (size_t i = 0; i < hk; i++)
            ds->total[i] *= f;
        for (uint32_t c = 0; c < ds->p.k; c++)
            ds->built_g[c] *= f;
    }
    double g = decay_unit(&ds->clk), P = ds->p.pseudo;
    int rebuild = g > ds->built_g[k] * (1.0 + ds->p.refresh_tol);
    kmeans_cluster_view v;
    kmeans_cluster(km, k, &v);
    double lw = ds->log_width, inv_g = 1.0 / g;
    /* the last total whose log was taken, and that log */
    double last_total = NAN, last_lden = 0;
    uint32_t nt = 0;
    for (uint32_t j = 0; j < d; j++) {
        if ((miss && miss[j]) || !isfinite(z[j])) {
            ds->tb[j] = UINT32_MAX;
            continue;
        }
        size_t h = (size_t)k * d + j;
        double r = (z[j] - v.centroid[j]) * v.inv_spread[j];
        uint32_t b = bin_of(ds, r);
        double *c = ds->count + h * nb;
        c[b] += g;
        ds->total[h] += g;
        if (rebuild)
            continue;
        ds->tb[j] = b;
        ds->arg[j] = (float)(c[b] * inv_g + P * ds->phi[b]); /* float: 1/g is exact enough */
        nt++;
        /* log(total / g + P) is a function of total: equal totals (the
         * usual case, see above) share one log */
        if (!(ds->total[h] == last_total)) {
            last_total = ds->total[h];
            last_lden = log(last_total / g + P);
        }
        ds->lden[h] = last_lden;
    }
    if (rebuild) {
        build_cluster(ds, k);
        return;
    }
    if (nt == 0)
        return;
    /* the touched bins' logs, four at a time (missing features' lanes
     * hold stale arguments and are not stored) */
    vec_logf(ds->arg, ds->arg, d);
    for (uint32_t j = 0; j < d; j++) {
        uint32_t b = ds->tb[j];
        if (b == UINT32_MAX)
            continue;
        size_t h = (size_t)k * d + j;
        ds->tab[h * nb + b] =
            (float)((double)ds->arg[j] -
                    ((b == 0 || b == nb - 1) ? ds->log_norm_tail : lw));
    }
    sum_lden(ds, k);
}

void density_reset(density *ds, uint32_t k)
{
    size_t d = ds->p.dim, nb = ds->nb;
    memset(ds->count + (size_t)k * d * nb, 0, d * nb * sizeof(double));
    memset(ds->total + (size_t)k * d, 0, d * sizeof(double));
    build_cluster(ds, k);
}

double density_mass(const density *ds, uint32_t k, uint32_t j)
{
    return decay_read(&ds->clk, ds->total[(size_t)k * ds->p.dim + j]);
}

double density_bin_prob(const density *ds, uint32_t k, uint32_t j,
                        uint32_t b)
{
    size_t h = (size_t)k * ds->p.dim + j;
    double g = decay_unit(&ds->clk), P = ds->p.pseudo;
    double T = ds->total[h] / g;
    if (!(T + P > 0))
        return ds->phi[b];
    return (ds->count[h * ds->nb + b] / g + P * ds->phi[b]) / (T + P);
}

size_t density_residuals(const kmeans *km, const double *Z, size_t n,
                         const int32_t *labels, double *out, size_t cap)
{
    const kmeans_params *p = kmeans_get_params(km);
    size_t w = 0;
    for (size_t i = 0; i < n && w < cap; i++) {
        if (labels[i] < 0 || (uint32_t)labels[i] >= p->k)
            continue;
        kmeans_cluster_view v;
        kmeans_cluster(km, (uint32_t)labels[i], &v);
        for (uint32_t j = 0; j < p->dim && w < cap; j++) {
            double z = Z[i * p->dim + j];
            if (isfinite(z))
                out[w++] = (z - v.centroid[j]) * v.inv_spread[j];
        }
    }
    return w;
}

int density_grid_check(const density *ds, const double *resid, size_t n,
                       double *scratch, density_grid_report *rep)
{
    if (n < 4 || !resid || !scratch || !rep)
        return CORE_EINVAL;
    rep->grid_width = ds->width;
    rep->fd_width = select_fd_width(resid, n, scratch);
    rep->scott_width = select_scott_width(resid, n);
    rep->n = n;
    return 0;
}

void density_save(const density *ds, snap_writer *w)
{
    size_t hk = (size_t)ds->p.k * ds->p.dim;
    snap_put_tag(w, "DENS");
    snap_put_u32(w, ds->p.dim);
    snap_put_u32(w, ds->p.k);
    snap_put_u32(w, ds->p.bins);
    snap_put_f64(w, ds->p.range);
    snap_put_f64(w, ds->p.pseudo);
    snap_put_f64(w, ds->p.half_life_days);
    snap_put_f64(w, ds->p.refresh_tol);
    decay_save(&ds->clk, w);
    snap_put_f64s(w, ds->count, hk * ds->nb);
    snap_put_f64s(w, ds->total, hk);
    snap_put_f32s(w, ds->tab, hk * ds->nb);
    snap_put_f64s(w, ds->lden, hk);
    snap_put_f64s(w, ds->built_g, ds->p.k);
}

int density_load(density *ds, snap_reader *r)
{
    snap_expect_tag(r, "DENS");
    uint32_t dim = snap_get_u32(r), k = snap_get_u32(r), bins = snap_get_u32(r);
    if (r->err)
        return r->err;
    if (dim != ds->p.dim || k != ds->p.k || bins != ds->p.bins)
        return CORE_EMISMATCH;
    density_params p = ds->p;
    p.range = snap_get_f64(r);
    p.pseudo = snap_get_f64(r);
    p.half_life_days = snap_get_f64(r);
    p.refresh_tol = snap_get_f64(r);
    decay_clock clk;
    decay_load(&clk, r);
    size_t hk = (size_t)k * dim, nb = bins + 2;
    size_t need = hk * nb * 12 + hk * 16 + (size_t)k * 8;
    if (r->err)
        return r->err;
    if (!params_ok(&p) || p.range != ds->p.range ||
        r->len - r->pos < need) {
        r->err = p.range != ds->p.range ? CORE_EMISMATCH : CORE_EFORMAT;
        return r->err;
    }
    ds->p = p;
    ds->clk = clk;
    snap_get_f64s(r, ds->count, hk * nb);
    snap_get_f64s(r, ds->total, hk);
    snap_get_f32s(r, ds->tab, hk * nb);
    snap_get_f64s(r, ds->lden, hk);
    snap_get_f64s(r, ds->built_g, k);
    for (uint32_t c = 0; c < k; c++)
        sum_lden(ds, c);
    return r->err;
}
