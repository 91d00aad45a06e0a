/*
 * kmeans.c - online k-means with lazy event-time decay (see kmeans.h).
 *
 * Storage per cluster k: double c, v (variance), s, 1/s (dim each) for
 * learning and for the density, the sum of log s (one log per refresh,
 * vec_sum_log) and log n_k.  The assign loop reads float mirrors cf
 * (centroid), rf (1/s^2) and s2f (s^2) stored feature-major, cf[j * kp +
 * k], with the cluster count padded to kp = vec_padded(k) (padding
 * clusters are zero and never reported), so one feature's values for
 * every cluster are contiguous and the loop runs four clusters per SSE2
 * vector: for each cluster the sum over features is plain sequential
 * float arithmetic, the same in every run.  expire[k] is the time at which
 * n_k(t) crosses retire_weight, so retirement is a comparison, and
 * next_expire (a lower bound of all expire[k]) makes the no-op case O(1).
 * A two-entry memo of the last decay factors (keyed by the exact time
 * difference) lets kmeans_weight / kmeans_update and kmeans_total_weight /
 * the total's update share one exp2; it is a pure cache, never saved.
 */
#include "kmeans.h"

#include <math.h>
#include <stdlib.h>
#include <string.h>

#include "err.h"
#include "vec.h"

struct kmeans {
    kmeans_params p;
    uint32_t kp;
    int seeded;
    uint64_t retired;
    rng r;
    double *c, *v, *s, *inv_s;             /* k x dim */
    double *log_s_sum, *n, *log_n, *last, *expire; /* k */
    float *cf, *rf, *s2f;                  /* dim x kp, feature-major */
    double tot, tot_t;                     /* decayed total at tot_t */
    double next_expire;
    /* candidate ring */
    double *cand_z, *cand_score, *cand_t;
    uint8_t *cand_used;
    uint32_t cand_head, cand_count;
    /* scratch */
    float *zc, *ec, *d2f; /* observed z, squared errors; distances */
    size_t *obs_off;      /* observed feature j -> j kp */
    double *s2;
    /* decay memo: dt -> 2^(-dt/H), two entries, round robin */
    double memo_dt[2], memo_f[2];
    unsigned memo_next;
};

void kmeans_params_default(kmeans_params *p, uint32_t dim, uint32_t k)
{
    p->dim = dim;
    p->k = k;
    p->half_life_days = 7;
    p->spread_floor = 0.05;
    p->spread_init = 1.0;
    p->retire_weight = 0.5;
    p->candidates = 64;
    p->seed = 1;
}

static int params_ok(const kmeans_params *p)
{
    return p && p->dim >= 1 && p->dim <= (1u << 16) && p->k >= 1 &&
           p->k <= (1u << 16) && isfinite(p->half_life_days) &&
           p->half_life_days >= 0 && isfinite(p->spread_floor) &&
           p->spread_floor > 0 && isfinite(p->spread_init) &&
           p->spread_init > 0 && isfinite(p->retire_weight) &&
           p->retire_weight >= 0 && p->candidates <= (1u << 20);
}

kmeans *kmeans_new(const kmeans_params *p, int *err)
{
    int e = CORE_EINVAL;
    kmeans *km = NULL;
    if (!params_ok(p))
        goto fail;
    e = CORE_ENOMEM;
    km = calloc(1, sizeof *km);
    if (!km)
        goto fail;
    km->p = *p;
    km->kp = vec_padded(p->k);
    size_t kd = (size_t)p->k * p->dim, kp = (size_t)km->kp * p->dim;
    size_t cn = p->candidates ? p->candidates : 1;
    km->c = calloc(kd, sizeof(double));
    km->v = calloc(kd, sizeof(double));
    km->s = calloc(kd, sizeof(double));
    km->inv_s = calloc(kd, sizeof(double));
    km->log_s_sum = calloc(p->k, sizeof(double));
    km->n = calloc(p->k, sizeof(double));
    km->log_n = calloc(p->k, sizeof(double));
    km->last = calloc(p->k, sizeof(double));
    km->expire = calloc(p->k, sizeof(double));
    km->cf = calloc(kp, sizeof(float));
    km->rf = calloc(kp, sizeof(float));
    km->s2f = calloc(kp, sizeof(float));
    km->cand_z = calloc(cn * p->dim, sizeof(double));
    km->cand_score = calloc(cn, sizeof(double));
    km->cand_t = calloc(cn, sizeof(double));
    km->cand_used = calloc(cn, 1);
    km->zc = calloc(p->dim, sizeof(float));
    km->ec = calloc(p->dim, sizeof(float));
    km->d2f = calloc(km->kp, sizeof(float));
    km->obs_off = calloc(p->dim, sizeof(size_t));
    km->s2 = calloc(p->dim, sizeof(double));
    if (!km->c || !km->v || !km->s || !km->inv_s || !km->log_s_sum ||
        !km->n || !km->log_n || !km->last || !km->expire || !km->cf ||
        !km->rf || !km->s2f || !km->cand_z || !km->cand_score ||
        !km->cand_t || !km->cand_used || !km->zc || !km->ec || !km->d2f ||
        !km->obs_off || !km->s2)
        goto fail_arrays;
    for (uint32_t cc = 0; cc < p->k; cc++)
        km->log_n[cc] = -INFINITY;
    rng_seed(&km->r, p->seed);
    km->next_expire = INFINITY;
    if (err)
        *err = 0;
    return km;
fail_arrays:
    kmeans_free(km);
fail:
    if (err)
        *err = e;
    return NULL;
}

void kmeans_free(kmeans *km)
{
    if (!km)
        return;
    free(km->c);
    free(km->v);
    free(km->s);
    free(km->inv_s);
    free(km->log_s_sum);
    free(km->n);
    free(km->log_n);
    free(km->last);
    free(km->expire);
    free(km->cf);
    free(km->rf);
    free(km->s2f);
    free(km->cand_z);
    free(km->cand_score);
    free(km->cand_t);
    free(km->cand_used);
    free(km->zc);
    free(km->ec);
    free(km->d2f);
    free(km->obs_off);
    free(km->s2);
    free(km);
}

size_t kmeans_bytes(const kmeans *km)
{
    size_t kd = (size_t)km->p.k * km->p.dim, kp = (size_t)km->kp * km->p.dim;
    size_t cn = km->p.candidates ? km->p.candidates : 1;
    return sizeof *km + kd * 4 * sizeof(double) +
           (size_t)km->p.k * 6 * sizeof(double) + kp * 3 * sizeof(float) +
           cn * (km->p.dim + 2) * sizeof(double) + cn +
           (size_t)km->p.dim * (2 * sizeof(float) + sizeof(size_t) +
                                sizeof(double)) +
           (size_t)km->kp * sizeof(float);
}

const kmeans_params *kmeans_get_params(const kmeans *km) { return &km->p; }
int kmeans_seeded(const kmeans *km) { return km->seeded; }
uint64_t kmeans_retired(const kmeans *km) { return km->retired; }

/* Decay factor from time a to time b (1 when b <= a or no decay).  The
 * memo is scratch (a kmeans is not shared between threads), hence the
 * cast: the result is exactly exp2(-(b - a) / H) either way. */
static inline double decay_factor(const kmeans *kmc, double a, double b)
{
    if (kmc->p.half_life_days <= 0 || !(b > a))
        return 1.0;
    kmeans *km = (kmeans *)kmc;
    double dt = b - a;
    if (dt == km->memo_dt[0])
        return km->memo_f[0];
    if (dt == km->memo_dt[1])
        return km->memo_f[1];
    double f = exp2(-dt / km->p.half_life_days);
    unsigned i = km->memo_next;
    km->memo_dt[i] = dt;
    km->memo_f[i] = f;
    km->memo_next = i ^ 1u;
    return f;
}

/* log n_k, kept beside n_k (-INFINITY when n_k is not positive). */
static inline void set_log_n(kmeans *km, uint32_t k)
{
    km->log_n[k] = km->n[k] > 0 ? log(km->n[k]) : -INFINITY;
}

static void refresh_expire(kmeans *km, uint32_t k)
{
    double n = km->n[k], fl = km->p.retire_weight;
    if (km->p.half_life_days <= 0)
        km->expire[k] = n < fl ? -INFINITY : INFINITY;
    else if (n < fl)
        km->expire[k] = -INFINITY;
    else if (fl <= 0)
        km->expire[k] = INFINITY;
    else
        km->expire[k] = km->last[k] + km->p.half_life_days * log2(n / fl);
    if (km->expire[k] < km->next_expire)
        km->next_expire = km->expire[k];
}

/* Recompute every derived array of cluster k from c and v. */
static void refresh_cluster(kmeans *km, uint32_t k)
{
    uint32_t d = km->p.dim, kp = km->kp;
    double fl2 = km->p.spread_floor * km->p.spread_floor;
    double *c = km->c + (size_t)k * d, *v = km->v + (size_t)k * d;
    double *s = km->s + (size_t)k * d, *is = km->inv_s + (size_t)k * d;
    double *s2 = km->s2;
    for (uint32_t j = 0; j < d; j++) {
        s2[j] = v[j] > fl2 ? v[j] : fl2;
        s[j] = sqrt(s2[j]);
        is[j] = 1.0 / s[j];
        km->cf[(size_t)j * kp + k] = (float)c[j];
        km->rf[(size_t)j * kp + k] = (float)(is[j] * is[j]); /* 1/s^2 */
        km->s2f[(size_t)j * kp + k] = (float)s2[j];
    }
    /* sum_j log s_j = (1/2) sum_j log s_j^2 */
    km->log_s_sum[k] = 0.5 * vec_sum_log(s2, NULL, d);
}

/* Bring the total to time t. */
static void total_to(kmeans *km, double t)
{
    if (!isfinite(t))
        return;
    if (t > km->tot_t) {
        km->tot *= decay_factor(km, km->tot_t, t);
        km->tot_t = t;
    }
}

int kmeans_seed(kmeans *km, select_ws *ws, const double *Z, size_t n,
                double t, uint32_t restarts, uint32_t lloyd_passes,
                int32_t *labels)
{
    uint32_t k = km->p.k, d = km->p.dim;
    if (!ws || !Z || n < k || restarts == 0 || lloyd_passes == 0)
        return CORE_EINVAL;
    select_kmeans_opts o = {restarts, lloyd_passes, 0};
    int rc = select_kmeans(ws, Z, n, k, &o, &km->r, km->c, NULL, NULL);
    if (rc < 0)
        return rc;
    memset(km->v, 0, (size_t)k * d * sizeof(double));
    memset(km->n, 0, (size_t)k * sizeof(double));
    /* select_kmeans stops right after an assignment step, so the nearest
     * centre recomputed here is the label it ended with. */
    for (size_t i = 0; i < n; i++) {
        const double *x = Z + i * d;
        uint32_t bl = 0;
        double bd = vec_dist2(x, km->c, d);
        for (uint32_t cc = 1; cc < k; cc++) {
            double dd = vec_dist2(x, km->c + (size_t)cc * d, d);
            if (dd < bd) {
                bd = dd;
                bl = cc;
            }
        }
        if (labels)
            labels[i] = (int32_t)bl;
        km->n[bl] += 1;
        double *v = km->v + (size_t)bl * d, *c = km->c + (size_t)bl * d;
        for (uint32_t j = 0; j < d; j++)
            v[j] += (x[j] - c[j]) * (x[j] - c[j]);
    }
    double init2 = km->p.spread_init * km->p.spread_init;
    km->tot = 0;
    km->tot_t = isfinite(t) ? t : 0;
    km->next_expire = INFINITY;
    for (uint32_t cc = 0; cc < k; cc++) {
        double *v = km->v + (size_t)cc * d;
        for (uint32_t j = 0; j < d; j++)
            v[j] = km->n[cc] >= 2 ? v[j] / km->n[cc] : init2;
        km->last[cc] = km->tot_t;
        km->tot += km->n[cc];
        set_log_n(km, cc);
        refresh_cluster(km, cc);
        refresh_expire(km, cc);
    }
    km->seeded = 1;
    return 0;
}

int kmeans_set_centres(kmeans *km, const double *centres, double n0, double t)
{
    if (!centres || !(n0 >= 0))
        return CORE_EINVAL;
    uint32_t k = km->p.k, d = km->p.dim;
    memcpy(km->c, centres, (size_t)k * d * sizeof(double));
    double init2 = km->p.spread_init * km->p.spread_init;
    km->tot = 0;
    km->tot_t = isfinite(t) ? t : 0;
    km->next_expire = INFINITY;
    for (uint32_t cc = 0; cc < k; cc++) {
        for (uint32_t j = 0; j < d; j++)
            km->v[(size_t)cc * d + j] = init2;
        km->n[cc] = n0;
        km->last[cc] = km->tot_t;
        km->tot += n0;
        set_log_n(km, cc);
        refresh_cluster(km, cc);
        refresh_expire(km, cc);
    }
    km->seeded = 1;
    return 0;
}

typedef float km_v4f __attribute__((vector_size(16)));

static inline km_v4f km_load4(const float *p)
{
    km_v4f v;
    memcpy(&v, p, sizeof v);
    return v;
}

/* d2f[k] = sum over the observed features i < n_obs (offset obs_off[i]
 * = j kp into the mirrors, value zc[i], squared scaled error ec[i]) of
 * (z_j - c_kj)^2 w_kj, sixteen clusters (four vectors) at a time; with
 * errors w_kj = 1 / (s_kj^2 + e_j^2), else w_kj = rf_kj.  Each cluster's
 * sum runs over the features in order, in float. */
#define KM_STEP(A, V)                                                       \
    do {                                                                    \
        km_v4f t_ = zv - km_load4(cf + o + 4 * (V));                        \
        if (with_err)                                                       \
            (A) += t_ * t_ / (km_load4(s2f + o + 4 * (V)) + ev);            \
        else                                                                \
            (A) += t_ * t_ * km_load4(rf + o + 4 * (V));                    \
    } while (0)

static inline void assign_dists(kmeans *km, uint32_t n_obs, const int with_err)
{
    const uint32_t kp = km->kp;
    const size_t *restrict off = km->obs_off;
    const float *restrict zc = km->zc, *restrict ec = km->ec;
    const float *restrict cf = km->cf, *restrict rf = km->rf;
    const float *restrict s2f = km->s2f;
    float *restrict out = km->d2f;
    uint32_t b = 0;
    for (; b + 16 <= kp; b += 16) {
        km_v4f a0 = {0, 0, 0, 0}, a1 = a0, a2 = a0, a3 = a0;
        for (uint32_t i = 0; i < n_obs; i++) {
            size_t o = off[i] + b;
            km_v4f zv = {zc[i], zc[i], zc[i], zc[i]};
            km_v4f ev = {ec[i], ec[i], ec[i], ec[i]};
            (void)ev;
            KM_STEP(a0, 0);
            KM_STEP(a1, 1);
            KM_STEP(a2, 2);
            KM_STEP(a3, 3);
        }
        memcpy(out + b, &a0, sizeof a0);
        memcpy(out + b + 4, &a1, sizeof a1);
        memcpy(out + b + 8, &a2, sizeof a2);
        memcpy(out + b + 12, &a3, sizeof a3);
    }
    for (; b < kp; b += 8) {
        km_v4f a0 = {0, 0, 0, 0}, a1 = a0;
        for (uint32_t i = 0; i < n_obs; i++) {
            size_t o = off[i] + b;
            km_v4f zv = {zc[i], zc[i], zc[i], zc[i]};
            km_v4f ev = {ec[i], ec[i], ec[i], ec[i]};
            (void)ev;
            KM_STEP(a0, 0);
            KM_STEP(a1, 1);
        }
        memcpy(out + b, &a0, sizeof a0);
        memcpy(out + b + 4, &a1, sizeof a1);
    }
}
#undef KM_STEP

int kmeans_nearest(kmeans *km, const double *z, const double *ez,
                   const uint8_t *miss, uint32_t m, uint32_t *idx,
                   double *d2)
{
    if (!km->seeded)
        return CORE_EAGAIN;
    if (m == 0 || !z || !idx || !d2)
        return CORE_EINVAL;
    const uint32_t d = km->p.dim, k = km->p.k, kp = km->kp;
    uint32_t obs = 0;
    int any_err = 0;
    for (uint32_t j = 0; j < d; j++) {
        if ((miss && miss[j]) || !isfinite(z[j]))
            continue;
        double e = (ez && isfinite(ez[j])) ? ez[j] : 0.0;
        km->zc[obs] = (float)z[j];
        km->ec[obs] = (float)(e * e);
        km->obs_off[obs] = (size_t)j * kp;
        any_err |= e != 0;
        obs++;
    }
    if (m > k)
        m = k;
    if (obs == 0) {
        for (uint32_t i = 0; i < m; i++) {
            idx[i] = i;
            d2[i] = 0;
        }
        return (int)m;
    }
    if (any_err)
        assign_dists(km, obs, 1);
    else
        assign_dists(km, obs, 0);
    /* Partial insertion sort: the m smallest, ties to the lower index. */
    const float *df = km->d2f;
    for (uint32_t cc = 0; cc < m; cc++) {
        double v = df[cc];
        uint32_t pos = cc;
        while (pos > 0 && v < d2[pos - 1]) {
            d2[pos] = d2[pos - 1];
            idx[pos] = idx[pos - 1];
            pos--;
        }
        d2[pos] = v;
        idx[pos] = cc;
    }
    double worst = d2[m - 1];
    for (uint32_t cc = m; cc < k; cc++) {
        double v = df[cc];
        if (!(v < worst))
            continue;
        uint32_t pos = m - 1;
        while (pos > 0 && v < d2[pos - 1]) {
            d2[pos] = d2[pos - 1];
            idx[pos] = idx[pos - 1];
            pos--;
        }
        d2[pos] = v;
        idx[pos] = cc;
        worst = d2[m - 1];
    }
    double scale = (double)d / (double)obs;
    for (uint32_t i = 0; i < m; i++)
        d2[i] *= scale;
    return (int)m;
}

int kmeans_assign(kmeans *km, const double *z, const double *ez,
                  const uint8_t *miss, double *d2)
{
    uint32_t idx;
    double dd;
    int rc = kmeans_nearest(km, z, ez, miss, 1, &idx, &dd);
    if (rc < 0)
        return rc;
    if (d2)
        *d2 = dd;
    return (int)idx;
}

void kmeans_update(kmeans *km, uint32_t k, const double *z,
                   const uint8_t *miss, double t)
{
    uint32_t d = km->p.dim;
    double tt = isfinite(t) ? t : km->last[k];
    double f = decay_factor(km, km->last[k], tt);
    double n = km->n[k] * f + 1.0;
    double inv = 1.0 / n;
    double *c = km->c + (size_t)k * d, *v = km->v + (size_t)k * d;
    for (uint32_t j = 0; j < d; j++) {
        if ((miss && miss[j]) || !isfinite(z[j]))
            continue;
        double delta = z[j] - c[j];
        c[j] += delta * inv;
        v[j] += (delta * (z[j] - c[j]) - v[j]) * inv;
        if (v[j] < 0)
            v[j] = 0;
    }
    km->n[k] = n;
    set_log_n(km, k);
    if (tt > km->last[k])
        km->last[k] = tt;
    total_to(km, tt);
    km->tot += 1.0;
    refresh_cluster(km, k);
    refresh_expire(km, k);
}

int kmeans_observe(kmeans *km, const double *z, const double *ez,
                   const uint8_t *miss, double t, double *d2)
{
    int k = kmeans_assign(km, z, ez, miss, d2);
    if (k >= 0)
        kmeans_update(km, (uint32_t)k, z, miss, t);
    return k;
}

double kmeans_weight(const kmeans *km, uint32_t k, double t)
{
    return km->n[k] * decay_factor(km, km->last[k], t);
}

double kmeans_log_weight(const kmeans *km, uint32_t k, double t)
{
    if (!(km->n[k] > 0))
        return -INFINITY;
    double l = km->log_n[k];
    if (km->p.half_life_days > 0 && t > km->last[k])
        l -= M_LN2 * (t - km->last[k]) / km->p.half_life_days;
    return l;
}

double kmeans_total_weight(const kmeans *km, double t)
{
    return km->tot * decay_factor(km, km->tot_t, t);
}

double kmeans_log_mix_weight(const kmeans *km, uint32_t k, double t)
{
    double tot = kmeans_total_weight(km, t);
    if (!(tot > 0))
        return -INFINITY;
    return kmeans_log_weight(km, k, t) - log(tot);
}

void kmeans_cluster(const kmeans *km, uint32_t k, kmeans_cluster_view *v)
{
    size_t o = (size_t)k * km->p.dim;
    v->n = km->n[k];
    v->last = km->last[k];
    v->centroid = km->c + o;
    v->spread = km->s + o;
    v->inv_spread = km->inv_s + o;
    v->log_spread_sum = km->log_s_sum[k];
}

void kmeans_offer(kmeans *km, const double *z, const uint8_t *miss,
                  double score, double t)
{
    uint32_t cn = km->p.candidates;
    if (cn == 0 || !isfinite(score))
        return;
    uint32_t slot = km->cand_head;
    double *dst = km->cand_z + (size_t)slot * km->p.dim;
    for (uint32_t j = 0; j < km->p.dim; j++)
        dst[j] = ((miss && miss[j]) || !isfinite(z[j])) ? 0.0 : z[j];
    km->cand_score[slot] = score;
    km->cand_t[slot] = t;
    if (!km->cand_used[slot]) {
        km->cand_used[slot] = 1;
        km->cand_count++;
    }
    km->cand_head = (slot + 1) % cn;
}

uint32_t kmeans_candidates(const kmeans *km) { return km->cand_count; }

/* The best candidate slot: highest score, then the latest time, then the
 * lowest slot; -1 when the ring is empty. */
static int best_candidate(const kmeans *km)
{
    int best = -1;
    for (uint32_t i = 0; i < km->p.candidates; i++) {
        if (!km->cand_used[i])
            continue;
        if (best < 0 || km->cand_score[i] > km->cand_score[best] ||
            (km->cand_score[i] == km->cand_score[best] &&
             km->cand_t[i] > km->cand_t[best]))
            best = (int)i;
    }
    return best;
}

uint32_t kmeans_retire(kmeans *km, double t, uint32_t *slots,
                       uint32_t max_slots)
{
    if (!km->seeded || !isfinite(t) || !(t >= km->next_expire))
        return 0;
    uint32_t d = km->p.dim, out = 0;
    double init2 = km->p.spread_init * km->p.spread_init;
    km->next_expire = INFINITY;
    for (uint32_t k = 0; k < km->p.k; k++) {
        if (km->expire[k] <= t && out < max_slots) {
            int b = best_candidate(km);
            if (b >= 0) {
                double w_old = kmeans_weight(km, k, t);
                memcpy(km->c + (size_t)k * d,
                       km->cand_z + (size_t)b * d, d * sizeof(double));
                for (uint32_t j = 0; j < d; j++)
                    km->v[(size_t)k * d + j] = init2;
                km->cand_used[b] = 0;
                km->cand_count--;
                total_to(km, t);
                km->tot += 1.0 - w_old;
                if (km->tot < 0)
                    km->tot = 0;
                km->n[k] = 1.0;
                set_log_n(km, k);
                if (t > km->last[k])
                    km->last[k] = t;
                refresh_cluster(km, k);
                km->retired++;
                slots[out++] = k;
            }
        }
        refresh_expire(km, k);
    }
    return out;
}

void kmeans_save(const kmeans *km, snap_writer *w)
{
    const kmeans_params *p = &km->p;
    size_t kd = (size_t)p->k * p->dim;
    uint32_t cn = p->candidates ? p->candidates : 1;
    snap_put_tag(w, "KMNS");
    snap_put_u32(w, p->dim);
    snap_put_u32(w, p->k);
    snap_put_u32(w, p->candidates);
    snap_put_f64(w, p->half_life_days);
    snap_put_f64(w, p->spread_floor);
    snap_put_f64(w, p->spread_init);
    snap_put_f64(w, p->retire_weight);
    snap_put_u64(w, p->seed);
    snap_put_u32(w, (uint32_t)km->seeded);
    snap_put_u64(w, km->retired);
    for (int i = 0; i < 4; i++)
        snap_put_u64(w, km->r.s[i]);
    snap_put_f64(w, km->tot);
    snap_put_f64(w, km->tot_t);
    snap_put_f64s(w, km->c, kd);
    snap_put_f64s(w, km->v, kd);
    snap_put_f64s(w, km->n, p->k);
    snap_put_f64s(w, km->last, p->k);
    snap_put_u32(w, km->cand_head);
    snap_put_f64s(w, km->cand_z, (size_t)cn * p->dim);
    snap_put_f64s(w, km->cand_score, cn);
    snap_put_f64s(w, km->cand_t, cn);
    snap_put_bytes(w, km->cand_used, cn);
}

int kmeans_load(kmeans *km, snap_reader *r)
{
    kmeans_params p = km->p;
    snap_expect_tag(r, "KMNS");
    uint32_t dim = snap_get_u32(r), k = snap_get_u32(r);
    uint32_t cands = snap_get_u32(r);
    if (r->err)
        return r->err;
    if (dim != p.dim || k != p.k || cands != p.candidates)
        return CORE_EMISMATCH;
    p.half_life_days = snap_get_f64(r);
    p.spread_floor = snap_get_f64(r);
    p.spread_init = snap_get_f64(r);
    p.retire_weight = snap_get_f64(r);
    p.seed = snap_get_u64(r);
    int seeded = (int)snap_get_u32(r);
    uint64_t retired = snap_get_u64(r);
    rng rs;
    for (int i = 0; i < 4; i++)
        rs.s[i] = snap_get_u64(r);
    double tot = snap_get_f64(r), tot_t = snap_get_f64(r);
    if (r->err)
        return r->err;
    uint32_t cn = cands ? cands : 1;
    size_t kd = (size_t)k * dim;
    size_t need = (kd * 2 + (size_t)k * 2 + (size_t)cn * dim + 2u * cn) * 8 +
                  4 + cn;
    if (r->len - r->pos < need || !params_ok(&p)) {
        r->err = CORE_EFORMAT;
        return r->err;
    }
    km->p = p;
    km->seeded = seeded;
    km->retired = retired;
    km->r = rs;
    km->tot = tot;
    km->tot_t = tot_t;
    snap_get_f64s(r, km->c, kd);
    snap_get_f64s(r, km->v, kd);
    snap_get_f64s(r, km->n, k);
    snap_get_f64s(r, km->last, k);
    km->cand_head = snap_get_u32(r) % cn;
    snap_get_f64s(r, km->cand_z, (size_t)cn * dim);
    snap_get_f64s(r, km->cand_score, cn);
    snap_get_f64s(r, km->cand_t, cn);
    snap_get_bytes(r, km->cand_used, cn);
    km->cand_count = 0;
    for (uint32_t i = 0; i < cn; i++) {
        km->cand_used[i] = km->cand_used[i] != 0 && cands != 0;
        km->cand_count += km->cand_used[i];
    }
    km->next_expire = INFINITY;
    for (uint32_t cc = 0; cc < k; cc++) {
        set_log_n(km, cc);
        refresh_cluster(km, cc);
        refresh_expire(km, cc);
    }
    return r->err;
}

int kmeans_stream_fit(const double *X, const double *t, size_t n, uint32_t d,
                      uint32_t k, double half_life_days, uint32_t warm_n,
                      uint64_t seed, double *centers_out, int32_t *labels_out)
{
    if (!X || !centers_out || warm_n < k || warm_n > n)
        return CORE_EINVAL;
    kmeans_params p;
    kmeans_params_default(&p, d, k);
    p.half_life_days = half_life_days;
    p.seed = seed;
    int err;
    kmeans *km = kmeans_new(&p, &err);
    if (!km)
        return err;
    select_ws *ws = select_ws_new(warm_n, d, k, &err);
    if (!ws)
        goto out_km;
    double tw = t ? t[warm_n - 1] : 0;
    err = kmeans_seed(km, ws, X, warm_n, tw, 3, 3, NULL);
    if (err < 0)
        goto out_ws;
    for (size_t i = warm_n; i < n; i++)
        kmeans_observe(km, X + i * d, NULL, NULL, t ? t[i] : 0, NULL);
    memcpy(centers_out, km->c, (size_t)k * d * sizeof(double));
    if (labels_out)
        for (size_t i = 0; i < n; i++)
            labels_out[i] = kmeans_assign(km, X + i * d, NULL, NULL, NULL);
    err = 0;
out_ws:
    select_ws_free(ws);
out_km:
    kmeans_free(km);
    return err;
}
