/*
 * scaler.c - decaying per-feature mean and variance (see scaler.h).
 *
 * The decay factor is one exp2() per observation that moves the clock,
 * shared by every feature; the weighted Welford step per feature is
 *   W' = f W + 1;  delta = x - mean;  mean' = mean + delta / W';
 *   M2' = f M2 + delta (x - mean')
 * (West 1979, with weight 1 for the new value and f for the old ones).
 * The division by W' is a multiply by 1/W', and the features usually
 * share W' (same history of observed values), so one reciprocal serves
 * every feature while W' is bit-identical; 1/sd is computed from 1/W by
 * the same function on observe and on load, so a restored scaler
 * continues bit for bit.
 */
#include "scaler.h"

#include <math.h>
#include <stdlib.h>
#include <string.h>

#include "err.h"

struct scaler {
    scaler_params p;
    double t_now;
    int started;
    double *w;      /* decayed weight per feature */
    double *mean;
    double *m2;
    double *inv_sd; /* 1 / max(sd, floor), refreshed on observe */
    uint64_t *n;    /* observations per feature */
};

void scaler_params_default(scaler_params *p, uint32_t dim)
{
    p->dim = dim;
    p->half_life_days = 30;
    p->sd_floor = 1e-6;
    p->robust = 0;
    p->z_clip = 8;
    p->robust_min_n = 32;
}

static int params_ok(const scaler_params *p)
{
    return p && p->dim >= 1 && p->dim <= (1u << 20) &&
           isfinite(p->half_life_days) && p->half_life_days >= 0 &&
           isfinite(p->sd_floor) && p->sd_floor > 0 &&
           (!p->robust || (isfinite(p->z_clip) && p->z_clip > 0));
}

scaler *scaler_new(const scaler_params *p, int *err)
{
    int e = CORE_EINVAL;
    scaler *s = NULL;
    if (!params_ok(p))
        goto fail;
    e = CORE_ENOMEM;
    s = calloc(1, sizeof *s);
    if (!s)
        goto fail;
    s->p = *p;
    size_t d = p->dim;
    s->w = calloc(d, sizeof *s->w);
    s->mean = calloc(d, sizeof *s->mean);
    s->m2 = calloc(d, sizeof *s->m2);
    s->inv_sd = calloc(d, sizeof *s->inv_sd);
    s->n = calloc(d, sizeof *s->n);
    if (!s->w || !s->mean || !s->m2 || !s->inv_sd || !s->n)
        goto fail_arrays;
    for (size_t j = 0; j < d; j++)
        s->inv_sd[j] = 1.0 / p->sd_floor;
    if (err)
        *err = 0;
    return s;
fail_arrays:
    scaler_free(s);
    s = NULL;
fail:
    if (err)
        *err = e;
    return NULL;
}

void scaler_free(scaler *s)
{
    if (!s)
        return;
    free(s->w);
    free(s->mean);
    free(s->m2);
    free(s->inv_sd);
    free(s->n);
    free(s);
}

size_t scaler_bytes(const scaler *s)
{
    return sizeof *s + (size_t)s->p.dim * (4 * sizeof(double) + sizeof(uint64_t));
}

uint32_t scaler_dim(const scaler *s) { return s->p.dim; }

static inline int is_missing(const double *x, const uint8_t *missing,
                             uint32_t j)
{
    return (missing && missing[j]) || !isfinite(x[j]);
}

static inline double sd_of(const scaler *s, uint32_t j)
{
    double v = s->w[j] > 0 ? s->m2[j] / s->w[j] : 0;
    double sd = v > 0 ? sqrt(v) : 0;
    return sd > s->p.sd_floor ? sd : s->p.sd_floor;
}

/* 1 / max(sqrt(m2 / w), floor) with m2 / w taken as m2 * inv_w, inv_w =
 * 1 / w (or 0 for w <= 0). */
static inline double inv_sd_from(const scaler *s, double m2, double inv_w)
{
    double v = m2 * inv_w;
    double sd = v > 0 ? sqrt(v) : 0;
    return 1.0 / (sd > s->p.sd_floor ? sd : s->p.sd_floor);
}

void scaler_observe(scaler *s, const double *x, const uint8_t *missing,
                    double t)
{
    double last_w1 = NAN, inv_w1 = 0;
    double f = 1.0;
    if (isfinite(t)) {
        if (!s->started) {
            s->started = 1;
            s->t_now = t;
        } else if (t > s->t_now) {
            if (s->p.half_life_days > 0)
                f = exp2(-(t - s->t_now) / s->p.half_life_days);
            s->t_now = t;
        }
    }
    for (uint32_t j = 0; j < s->p.dim; j++) {
        s->w[j] *= f;
        s->m2[j] *= f;
        if (is_missing(x, missing, j)) {
            /* keep 1/sd the function of (w, m2) that a load recomputes */
            if (f != 1.0 && s->w[j] > 0)
                s->inv_sd[j] = inv_sd_from(s, s->m2[j], 1.0 / s->w[j]);
            continue;
        }
        double v = x[j];
        if (s->p.robust && s->n[j] >= s->p.robust_min_n) {
            double lim = s->p.z_clip / s->inv_sd[j];
            if (v > s->mean[j] + lim)
                v = s->mean[j] + lim;
            else if (v < s->mean[j] - lim)
                v = s->mean[j] - lim;
        }
        double w1 = s->w[j] + 1.0;
        if (!(w1 == last_w1)) {
            last_w1 = w1;
            inv_w1 = 1.0 / w1;
        }
        double delta = v - s->mean[j];
        s->mean[j] += delta * inv_w1;
        s->m2[j] += delta * (v - s->mean[j]);
        if (s->m2[j] < 0)
            s->m2[j] = 0;
        s->w[j] = w1;
        s->n[j]++;
        s->inv_sd[j] = inv_sd_from(s, s->m2[j], inv_w1);
    }
}

uint32_t scaler_transform(const scaler *s, const double *x,
                          const uint8_t *missing, const double *err,
                          double *z, double *ez, uint8_t *miss_out)
{
    uint32_t obs = 0;
    for (uint32_t j = 0; j < s->p.dim; j++) {
        int m = is_missing(x, missing, j);
        if (miss_out)
            miss_out[j] = (uint8_t)m;
        if (m) {
            z[j] = 0;
            if (ez)
                ez[j] = 0;
            continue;
        }
        obs++;
        z[j] = (x[j] - s->mean[j]) * s->inv_sd[j];
        if (ez) {
            double e = err ? err[j] : 0;
            ez[j] = isfinite(e) ? fabs(e) * s->inv_sd[j] : 0;
        }
    }
    return obs;
}

double scaler_mean(const scaler *s, uint32_t j) { return s->mean[j]; }

double scaler_var(const scaler *s, uint32_t j)
{
    return s->w[j] > 0 ? s->m2[j] / s->w[j] : 0;
}

double scaler_sd(const scaler *s, uint32_t j) { return sd_of(s, j); }
double scaler_weight(const scaler *s, uint32_t j) { return s->w[j]; }
uint64_t scaler_count(const scaler *s, uint32_t j) { return s->n[j]; }

double scaler_unscale(const scaler *s, uint32_t j, double z)
{
    return s->mean[j] + z * sd_of(s, j);
}

void scaler_save(const scaler *s, snap_writer *w)
{
    snap_put_tag(w, "SCLR");
    snap_put_u32(w, s->p.dim);
    snap_put_f64(w, s->p.half_life_days);
    snap_put_f64(w, s->p.sd_floor);
    snap_put_u32(w, (uint32_t)s->p.robust);
    snap_put_f64(w, s->p.z_clip);
    snap_put_u32(w, s->p.robust_min_n);
    snap_put_f64(w, s->t_now);
    snap_put_u32(w, (uint32_t)s->started);
    snap_put_f64s(w, s->w, s->p.dim);
    snap_put_f64s(w, s->mean, s->p.dim);
    snap_put_f64s(w, s->m2, s->p.dim);
    for (uint32_t j = 0; j < s->p.dim; j++)
        snap_put_u64(w, s->n[j]);
}

int scaler_load(scaler *s, snap_reader *r)
{
    snap_expect_tag(r, "SCLR");
    uint32_t dim = snap_get_u32(r);
    if (r->err)
        return r->err;
    if (dim != s->p.dim)
        return CORE_EMISMATCH;
    scaler_params p = s->p;
    p.half_life_days = snap_get_f64(r);
    p.sd_floor = snap_get_f64(r);
    p.robust = (int)snap_get_u32(r);
    p.z_clip = snap_get_f64(r);
    p.robust_min_n = snap_get_u32(r);
    double t_now = snap_get_f64(r);
    int started = (int)snap_get_u32(r);
    size_t pos = r->pos;
    /* Validate the whole section before touching s. */
    size_t need = (size_t)dim * 4 * 8;
    if (r->err)
        return r->err;
    if (r->len - pos < need) {
        r->err = CORE_EFORMAT;
        return r->err;
    }
    if (!params_ok(&p)) {
        r->err = CORE_EFORMAT;
        return r->err;
    }
    s->p = p;
    s->t_now = t_now;
    s->started = started;
    snap_get_f64s(r, s->w, dim);
    snap_get_f64s(r, s->mean, dim);
    snap_get_f64s(r, s->m2, dim);
    for (uint32_t j = 0; j < dim; j++)
        s->n[j] = snap_get_u64(r);
    for (uint32_t j = 0; j < dim; j++)
        s->inv_sd[j] = inv_sd_from(s, s->m2[j],
                                   s->w[j] > 0 ? 1.0 / s->w[j] : 0.0);
    return r->err;
}

int scaler_ref_run(const double *X, const uint8_t *missing, const double *t,
                   size_t n, uint32_t d, double half_life_days,
                   double *mean_out, double *var_out)
{
    scaler_params p;
    scaler_params_default(&p, d);
    p.half_life_days = half_life_days;
    int err;
    scaler *s = scaler_new(&p, &err);
    if (!s)
        return err;
    for (size_t i = 0; i < n; i++)
        scaler_observe(s, X + i * d, missing ? missing + i * d : NULL, t[i]);
    for (uint32_t j = 0; j < d; j++) {
        mean_out[j] = scaler_mean(s, j);
        var_out[j] = scaler_var(s, j);
    }
    scaler_free(s);
    return 0;
}
