/*
 * model.c - composes the scaler, online k-means, the mixture density, the
 * space sketch, the calibrator and the reservoir into one observe().
 *
 * Life of a model:
 * 1. Warm-up: the first warm_n learned vectors only feed the scaler and a
 *    warm buffer (raw values); their results say warm = 0.
 * 2. Seeding, on the warm_n-th vector: the buffer is standardised with the
 *    scaler as it then stands, k-means++ with restarts and Lloyd passes
 *    seeds the clusters, the space sketch fits its bin widths, the grid of
 *    the residual histograms is checked against the Freedman-Diaconis and
 *    Scott rules, and the buffer is replayed once (score, then learn the
 *    histograms, the space sketch and the calibrator) so the calibration
 *    has a distribution from the first warm result on.
 * 3. Every later vector: standardise with the scaler as it was before the
 *    vector; find the nearest clusters; score the mixture density and the
 *    space sketch; turn the configured score into a tail probability and a
 *    flag; name the drivers; then (when learning) update the histograms
 *    (against the centroid the vector was scored with), the centroid, the
 *    scaler, the calibrator, the reservoir, and offer the vector as a
 *    rebirth candidate when it was far and rare.
 *
 * Memory: every array is allocated in model_new(); observe() writes only
 * preallocated scratch.  Determinism: all randomness comes from seeds in
 * the parameters, and the snapshot holds every bit of state (clocks and
 * rng states included), so a restored model continues bit for bit.
 */
#include "model.h"

#include <math.h>
#include <stddef.h>
#include <stdio.h>
#include <stdlib.h>
#include <string.h>

#include "calib.h"
#include "density.h"
#include "kmeans.h"
#include "reservoir.h"
#include "rng.h"
#include "scaler.h"
#include "select.h"
#include "sketch.h"
#include "snapshot.h"

#define MODEL_SNAP_TAG "MODL"
#define MODEL_SNAP_FORMAT 1u
#define MODEL_SILHOUETTE_SAMPLE 1000u
#define MODEL_CANDIDATE_TAIL 0.01 /* offer vectors at least this rare */

struct model {
    model_params p;
    scaler *sc;
    kmeans *km;
    density *ds;
    sketch *sk;
    calib *cal;      /* calibrates the configured novelty */
    calib *cal_d;    /* combined score only: density tail */
    calib *cal_s;    /* combined score only: space tail */
    reservoir *res;
    select_ws *ws;   /* seeding and model selection */
    rng r;

    /* warm-up */
    int warm;
    uint32_t warm_count;
    double *warm_x;      /* warm_n x dim, raw */
    uint8_t *warm_miss;  /* warm_n x dim */
    double *warm_t;      /* warm_n */
    double *warm_z;      /* warm_n x dim (seeding scratch) */
    int32_t *labels;     /* max(warm_n, reservoir_n) */
    double *resid;       /* warm_n x dim */
    double *resid_scratch;
    density_grid_report grid;

    /* per-observe scratch */
    double *z, *ez;
    uint8_t *miss;
    uint32_t *near_idx;
    double *near_d2;
    uint32_t *reborn;

    /* selection scratch */
    double *sel_centers; /* select_k_max x dim */
    uint32_t suggested_k;
    int sel_active;          /* a selection round is under way */
    uint32_t sel_next_k, sel_best_k;
    double sel_best_bic;
    double suggested_bic, suggested_silhouette;

    /* counters */
    uint64_t learned, scored, flagged;
    double time_days;
    int have_time;
    size_t bytes;
};

/* ---- parameters -------------------------------------------------------- */

typedef enum { PF_U32, PF_U64, PF_DBL, PF_INT, PF_ENUM } pf_type;

typedef struct param_field {
    const char *name;
    size_t offset;
    pf_type type;
    double min, max;
    const char *rule;
} param_field;

#define PF(n, t, lo, hi, rule) {#n, offsetof(model_params, n), t, lo, hi, rule}

/* The bounds of every parameter, in one table: model_params_check() and
 * model_params_set() read it, and the snapshot writes fields in its order. */
static const param_field param_fields[] = {
    PF(dim, PF_U32, 1, MODEL_MAX_DIM, "between 1 and 256"),
    PF(k, PF_U32, 1, MODEL_MAX_K, "between 1 and 1024"),
    PF(warm_n, PF_U32, 2, 1 << 22, "between 2 and 4194304, and >= k"),
    PF(lloyd_passes, PF_U32, 1, 1000, "between 1 and 1000"),
    PF(seed_restarts, PF_U32, 1, 100, "between 1 and 100"),
    PF(scale_half_life_days, PF_DBL, 0, 1e6, ">= 0 days (0 = never forget)"),
    PF(kmeans_half_life_days, PF_DBL, 0, 1e6, ">= 0 days (0 = never forget)"),
    PF(sketch_half_life_days, PF_DBL, 0, 1e6, ">= 0 days (0 = never forget)"),
    PF(calib_half_life_days, PF_DBL, 0, 1e6, ">= 0 days (0 = never forget)"),
    PF(sd_floor, PF_DBL, 1e-300, 1e300, "> 0"),
    PF(robust, PF_INT, 0, 1, "0 or 1"),
    PF(z_clip, PF_DBL, 1e-3, 1e6, "> 0"),
    PF(retire_weight, PF_DBL, 0, 1e12, ">= 0"),
    PF(mix_nearest, PF_U32, 1, MODEL_MAX_K, "between 1 and k"),
    PF(hist_bins, PF_U32, 2, 4096, "between 2 and 4096"),
    PF(hist_range, PF_DBL, 0.5, 100, "between 0.5 and 100"),
    PF(hist_pseudo, PF_DBL, 0, 1e9, ">= 0"),
    PF(space_dims, PF_U32, 1, 64, "between 1 and 64"),
    PF(space_chains, PF_U32, 0, 256, "between 0 and 256 (0 = no space sketch)"),
    PF(space_depth, PF_U32, 1, 32, "between 1 and 32"),
    PF(space_width, PF_U32, 16, 1 << 20, "between 16 and 1048576"),
    PF(space_rows, PF_U32, 1, 8, "between 1 and 8"),
    PF(reservoir_n, PF_U32, 2, 1 << 20, "between 2 and 1048576"),
    PF(calib_bins, PF_U32, 16, 1 << 20, "between 16 and 1048576"),
    PF(score, PF_ENUM, 0, 2, "density, space or combined"),
    PF(policy, PF_ENUM, 0, 1, "alpha or budget"),
    PF(alpha, PF_DBL, 1e-12, 1, "in (0, 1]"),
    PF(budget_per_hour, PF_DBL, 1e-9, 1e12, "> 0"),
    PF(stream_rate_per_hour, PF_DBL, 1e-9, 1e15, "> 0"),
    PF(select_k_min, PF_U32, 1, MODEL_MAX_K, "between 1 and select_k_max"),
    PF(select_k_max, PF_U32, 1, MODEL_MAX_K, "between select_k_min and 1024"),
    PF(seed, PF_U64, 0, 1.8446744073709552e19, "any 64-bit value"),
};
#define N_PARAM_FIELDS (sizeof param_fields / sizeof param_fields[0])

static double pf_get(const model_params *p, const param_field *f)
{
    const char *base = (const char *)p + f->offset;
    switch (f->type) {
    case PF_U32: return (double)*(const uint32_t *)base;
    case PF_U64: return (double)*(const uint64_t *)base;
    case PF_DBL: return *(const double *)base;
    case PF_INT: return (double)*(const int *)base;
    case PF_ENUM: return (double)*(const int *)base;
    }
    return NAN;
}

void model_params_default(model_params *p, uint32_t dim)
{
    memset(p, 0, sizeof *p);
    p->dim = dim;
    p->k = 32;
    p->warm_n = 2048;
    p->lloyd_passes = 3;
    p->seed_restarts = 3;
    p->scale_half_life_days = 30;
    p->kmeans_half_life_days = 7;
    p->sketch_half_life_days = 7;
    p->calib_half_life_days = 3;
    p->sd_floor = 1e-6;
    p->robust = 0;
    p->z_clip = 8;
    p->retire_weight = 0.5;
    p->mix_nearest = 4;
    p->hist_bins = 24;
    p->hist_range = 6;
    p->hist_pseudo = 20;
    p->space_dims = 16;
    p->space_chains = 16;
    p->space_depth = 12;
    p->space_width = 1024;
    p->space_rows = 1;
    p->reservoir_n = 4096;
    p->calib_bins = 2048;
    p->score = MODEL_SCORE_DENSITY;
    p->policy = MODEL_FLAG_BUDGET;
    p->alpha = 1e-3;
    p->budget_per_hour = 10;
    p->stream_rate_per_hour = 1e5;
    p->select_k_min = 2;
    p->select_k_max = 64;
    p->seed = 1;
}

size_t model_params_size(void)
{
    return sizeof(model_params);
}

int model_params_set(model_params *p, const char *name, double v)
{
    for (size_t i = 0; i < N_PARAM_FIELDS; i++) {
        const param_field *f = &param_fields[i];
        if (strcmp(f->name, name) != 0)
            continue;
        char *base = (char *)p + f->offset;
        if (!isfinite(v) || v < 0)
            return CORE_ERANGE;
        switch (f->type) {
        case PF_U32: *(uint32_t *)base = (uint32_t)v; break;
        case PF_U64: *(uint64_t *)base = (uint64_t)v; break;
        case PF_DBL: *(double *)base = v; break;
        case PF_INT:
        case PF_ENUM: *(int *)base = (int)v; break;
        }
        return 0;
    }
    return CORE_EINVAL;
}

int model_params_check(const model_params *p, const char **field, char *why,
                       size_t why_len)
{
    const char *bad = NULL, *rule = NULL;
    for (size_t i = 0; i < N_PARAM_FIELDS && !bad; i++) {
        const param_field *f = &param_fields[i];
        double v = pf_get(p, f);
        if (!(v >= f->min && v <= f->max)) {
            bad = f->name;
            rule = f->rule;
        }
    }
    const double hl[4] = {p->scale_half_life_days, p->kmeans_half_life_days,
                          p->sketch_half_life_days, p->calib_half_life_days};
    static const char *const hl_name[4] = {
        "scale_half_life_days", "kmeans_half_life_days",
        "sketch_half_life_days", "calib_half_life_days"};
    for (int i = 0; i < 4 && !bad; i++)
        if (hl[i] > 0 && hl[i] < 1e-6) {
            bad = hl_name[i];
            rule = "must be 0 (never forget) or at least 1e-6 days";
        }
    if (!bad && p->warm_n < p->k) {
        bad = "warm_n";
        rule = "must be >= k (seeding needs a point per cluster)";
    }
    if (!bad && p->mix_nearest > p->k) {
        bad = "mix_nearest";
        rule = "must be <= k";
    }
    if (!bad && p->select_k_min > p->select_k_max) {
        bad = "select_k_min";
        rule = "must be <= select_k_max";
    }
    if (!bad && p->select_k_max >= p->reservoir_n) {
        bad = "select_k_max";
        rule = "must be < reservoir_n";
    }
    if (!bad)
        return 0;
    if (field)
        *field = bad;
    if (why && why_len)
        snprintf(why, why_len, "%s", rule);
    return CORE_ERANGE;
}

const model_params *model_get_params(const model *m)
{
    return &m->p;
}

/* ---- construction ------------------------------------------------------- */

static void *zalloc(size_t n, size_t size, size_t *total)
{
    void *p = calloc(n ? n : 1, size);
    if (p)
        *total += (n ? n : 1) * size;
    return p;
}

void model_free(model *m)
{
    if (!m)
        return;
    scaler_free(m->sc);
    kmeans_free(m->km);
    density_free(m->ds);
    sketch_free(m->sk);
    calib_free(m->cal);
    calib_free(m->cal_d);
    calib_free(m->cal_s);
    reservoir_free(m->res);
    select_ws_free(m->ws);
    free(m->warm_x);
    free(m->warm_miss);
    free(m->warm_t);
    free(m->warm_z);
    free(m->labels);
    free(m->resid);
    free(m->resid_scratch);
    free(m->z);
    free(m->ez);
    free(m->miss);
    free(m->near_idx);
    free(m->near_d2);
    free(m->reborn);
    free(m->sel_centers);
    free(m);
}

static calib *make_calib(const model_params *p, int *err)
{
    calib_params cp;
    calib_params_default(&cp);
    cp.bins = p->calib_bins;
    cp.half_life_days = p->calib_half_life_days;
    cp.policy = p->policy == MODEL_FLAG_ALPHA ? CALIB_POLICY_ALPHA : CALIB_POLICY_BUDGET;
    cp.alpha = p->alpha;
    cp.budget_per_hour = p->budget_per_hour;
    cp.prior_rate_per_hour = p->stream_rate_per_hour;
    return calib_new(&cp, err);
}

model *model_new(const model_params *p, int *err)
{
    int e = 0;
    if (!p || model_params_check(p, NULL, NULL, 0) != 0) {
        if (err)
            *err = CORE_EINVAL;
        return NULL;
    }
    model *m = calloc(1, sizeof *m);
    if (!m) {
        if (err)
            *err = CORE_ENOMEM;
        return NULL;
    }
    m->p = *p;
    const uint32_t d = p->dim;
    size_t total = sizeof *m;

    /* Independent, reproducible seeds for each random piece. */
    uint64_t st = p->seed;
    uint64_t seed_km = rng_splitmix64(&st), seed_sk = rng_splitmix64(&st);
    uint64_t seed_res = rng_splitmix64(&st), seed_sel = rng_splitmix64(&st);
    rng_seed(&m->r, seed_sel);

    scaler_params sp;
    scaler_params_default(&sp, d);
    sp.half_life_days = p->scale_half_life_days;
    sp.sd_floor = p->sd_floor;
    sp.robust = p->robust;
    sp.z_clip = p->z_clip;
    if (!(m->sc = scaler_new(&sp, &e)))
        goto fail;

    kmeans_params kp;
    kmeans_params_default(&kp, d, p->k);
    kp.half_life_days = p->kmeans_half_life_days;
    kp.retire_weight = p->retire_weight;
    kp.seed = seed_km;
    if (!(m->km = kmeans_new(&kp, &e)))
        goto fail;

    density_params dp;
    density_params_default(&dp, d, p->k);
    dp.bins = p->hist_bins;
    dp.range = p->hist_range;
    dp.pseudo = p->hist_pseudo;
    dp.half_life_days = p->sketch_half_life_days;
    if (!(m->ds = density_new(&dp, &e)))
        goto fail;

    if (p->space_chains > 0) {
        sketch_params skp;
        sketch_params_default(&skp, d);
        skp.proj_dims = p->space_dims;
        skp.chains = p->space_chains;
        skp.depth = p->space_depth;
        skp.width = p->space_width;
        skp.rows = p->space_rows;
        skp.half_life_days = p->sketch_half_life_days;
        skp.seed = seed_sk;
        if (!(m->sk = sketch_new(&skp, &e)))
            goto fail;
    } else if (p->score != MODEL_SCORE_DENSITY) {
        e = CORE_EINVAL;
        goto fail;
    }

    if (!(m->cal = make_calib(p, &e)))
        goto fail;
    if (p->score == MODEL_SCORE_COMBINED &&
        (!(m->cal_d = make_calib(p, &e)) || !(m->cal_s = make_calib(p, &e))))
        goto fail;

    if (!(m->res = reservoir_new(p->reservoir_n, d, p->kmeans_half_life_days,
                                 seed_res, &e)))
        goto fail;
    uint32_t kmax = p->k > p->select_k_max ? p->k : p->select_k_max;
    size_t nmax = p->warm_n > p->reservoir_n ? p->warm_n : p->reservoir_n;
    if (!(m->ws = select_ws_new(nmax, d, kmax, &e)))
        goto fail;

    e = CORE_ENOMEM;
    size_t wd = (size_t)p->warm_n * d;
    if (!(m->warm_x = zalloc(wd, sizeof(double), &total)) ||
        !(m->warm_miss = zalloc(wd, 1, &total)) ||
        !(m->warm_t = zalloc(p->warm_n, sizeof(double), &total)) ||
        !(m->warm_z = zalloc(wd, sizeof(double), &total)) ||
        !(m->labels = zalloc(nmax, sizeof(int32_t), &total)) ||
        !(m->resid = zalloc(wd, sizeof(double), &total)) ||
        !(m->resid_scratch = zalloc(wd, sizeof(double), &total)) ||
        !(m->z = zalloc(d, sizeof(double), &total)) ||
        !(m->ez = zalloc(d, sizeof(double), &total)) ||
        !(m->miss = zalloc(d, 1, &total)) ||
        !(m->near_idx = zalloc(p->k, sizeof(uint32_t), &total)) ||
        !(m->near_d2 = zalloc(p->k, sizeof(double), &total)) ||
        !(m->reborn = zalloc(p->k, sizeof(uint32_t), &total)) ||
        !(m->sel_centers = zalloc((size_t)kmax * d, sizeof(double), &total)))
        goto fail;

    total += scaler_bytes(m->sc) + kmeans_bytes(m->km) + density_bytes(m->ds) +
             (m->sk ? sketch_bytes(m->sk) : 0) + calib_bytes(m->cal) +
             (m->cal_d ? calib_bytes(m->cal_d) + calib_bytes(m->cal_s) : 0) +
             reservoir_bytes(m->res) + select_ws_bytes(m->ws);
    m->bytes = total;
    m->time_days = NAN;
    return m;

fail:
    model_free(m);
    if (err)
        *err = e ? e : CORE_ENOMEM;
    return NULL;
}

size_t model_bytes(const model *m)
{
    return m->bytes;
}

/* ---- observe ------------------------------------------------------------ */

/* Missing mask: the caller's mask, plus any non-finite value. */
static uint32_t build_mask(const model *m, const model_input *in, uint8_t *miss)
{
    uint32_t n_missing = 0;
    for (uint32_t j = 0; j < m->p.dim; j++) {
        uint8_t mj = (in->missing && in->missing[j]) || !isfinite(in->x[j]);
        miss[j] = mj;
        n_missing += mj;
    }
    return n_missing;
}

/* Novelty, tail probability, threshold and flag from the two scores,
 * through calib_assess (one asinh, one threshold search per calibrator):
 * each calibrator is moved to t, judges the score against the
 * distribution before it, then learns it when learn is set. */
static void flag_decision(model *m, double dn, double sn, double t, int learn,
                          model_result *out)
{
    double novelty;
    calib_verdict v;
    switch (m->p.score) {
    case MODEL_SCORE_SPACE:
        novelty = sn;
        break;
    case MODEL_SCORE_COMBINED: {
        /* Fisher's method without the chi-square step: the sum of
         * -log tail probabilities, itself calibrated below. */
        calib_assess(m->cal_d, dn, t, learn, &v);
        double td = v.tail_prob;
        calib_assess(m->cal_s, sn, t, learn, &v);
        double ts = v.tail_prob;
        novelty = -log(td > 1e-300 ? td : 1e-300) - log(ts > 1e-300 ? ts : 1e-300);
        break;
    }
    default:
        novelty = dn;
    }
    out->novelty = novelty;
    calib_assess(m->cal, novelty, t, learn, &v);
    out->tail_prob = v.tail_prob;
    out->threshold = v.threshold;
    out->flag = isfinite(novelty) && v.flag;
}

/* Score z (already standardised into m->z, m->ez, m->miss) at time t. */
static void score_vector(model *m, double t, int learn, model_result *out)
{
    const uint32_t d = m->p.dim;
    int nn = kmeans_nearest(m->km, m->z, m->ez, m->miss, m->p.mix_nearest,
                            m->near_idx, m->near_d2);
    if (nn <= 0) {
        out->cluster = -1;
        return;
    }
    uint32_t best = m->near_idx[0];
    out->cluster = (int32_t)best;
    out->distance = sqrt(m->near_d2[0]);
    out->cluster_weight = kmeans_weight(m->km, best, t);
    double logp = density_log(m->ds, m->km, m->z, m->miss, m->near_idx,
                              (uint32_t)nn, t);
    out->density_novelty = -logp;
    if (m->sk) {
        sketch_advance(m->sk, t);
        out->space_novelty = sketch_observe(m->sk, m->z, m->miss, learn);
    } else {
        out->space_novelty = NAN;
    }
    flag_decision(m, out->density_novelty, out->space_novelty, t, learn, out);

    /* Drivers: the largest |z - c| / s in the assigned cluster. */
    kmeans_cluster_view v;
    kmeans_cluster(m->km, best, &v);
    out->n_drivers = 0;
    for (uint32_t j = 0; j < d; j++) {
        if (m->miss[j])
            continue;
        double r = (m->z[j] - v.centroid[j]) * v.inv_spread[j];
        double a = fabs(r);
        uint32_t pos = out->n_drivers;
        while (pos > 0 && fabs(out->drivers[pos - 1].z) < a) {
            if (pos < MODEL_DRIVERS)
                out->drivers[pos] = out->drivers[pos - 1];
            pos--;
        }
        if (pos < MODEL_DRIVERS) {
            out->drivers[pos].feature = (int32_t)j;
            out->drivers[pos].z = r;
            if (out->n_drivers < MODEL_DRIVERS)
                out->n_drivers++;
        }
    }

    if (!learn)
        return;
    density_update(m->ds, m->km, best, m->z, m->miss, t);
    kmeans_update(m->km, best, m->z, m->miss, t);
    if (out->tail_prob <= MODEL_CANDIDATE_TAIL)
        kmeans_offer(m->km, m->z, m->miss, out->density_novelty, t);
    uint32_t nr = kmeans_retire(m->km, t, m->reborn, m->p.k);
    for (uint32_t i = 0; i < nr; i++)
        density_reset(m->ds, m->reborn[i]);
}

/* The warm buffer is full: seed everything and replay it once. */
static void seed_from_warm(model *m)
{
    const uint32_t d = m->p.dim;
    const size_t n = m->warm_count;
    double t_seed = m->warm_t[n - 1];
    for (size_t i = 0; i < n; i++)
        scaler_transform(m->sc, m->warm_x + i * d, m->warm_miss + i * d, NULL,
                         m->warm_z + i * d, NULL, NULL);
    kmeans_seed(m->km, m->ws, m->warm_z, n, t_seed, m->p.seed_restarts,
                m->p.lloyd_passes, m->labels);
    if (m->sk)
        sketch_fit(m->sk, m->warm_z, m->warm_miss, n);
    size_t nr = density_residuals(m->km, m->warm_z, n, m->labels, m->resid,
                                  n * d);
    if (density_grid_check(m->ds, m->resid, nr, m->resid_scratch, &m->grid) != 0)
        memset(&m->grid, 0, sizeof m->grid);
    m->warm = 1;

    /* Replay: score, then learn everything but the centroids (they were
     * just fitted on these vectors) so the histograms, the space sketch
     * and the calibration start from the warm-up. */
    model_result tmp;
    for (size_t i = 0; i < n; i++) {
        const double *zi = m->warm_z + i * d;
        memcpy(m->z, zi, d * sizeof(double));
        memcpy(m->miss, m->warm_miss + i * d, d);
        double t = m->warm_t[i] < t_seed ? t_seed : m->warm_t[i];
        uint32_t k = (uint32_t)m->labels[i];
        memset(&tmp, 0, sizeof tmp);
        int nn = kmeans_nearest(m->km, m->z, NULL, m->miss, m->p.mix_nearest,
                                m->near_idx, m->near_d2);
        if (nn <= 0)
            continue;
        tmp.density_novelty = -density_log(m->ds, m->km, m->z, m->miss,
                                           m->near_idx, (uint32_t)nn, t);
        if (m->sk) {
            sketch_advance(m->sk, t);
            tmp.space_novelty = sketch_observe(m->sk, m->z, m->miss, 1);
        }
        flag_decision(m, tmp.density_novelty, tmp.space_novelty, t, 1, &tmp);
        density_update(m->ds, m->km, k, m->z, m->miss, t);
        reservoir_add(m->res, zi, t);
    }
}

int model_observe(model *m, const model_input *in, model_result *out)
{
    if (!m || !in || !in->x || !out)
        return CORE_EINVAL;
    const uint32_t d = m->p.dim;
    memset(out, 0, sizeof *out);
    out->cluster = -1;
    out->tail_prob = 1.0;
    out->novelty = out->density_novelty = out->space_novelty = NAN;
    out->threshold = INFINITY;
    out->distance = out->cluster_weight = NAN;

    double t = in->time_days;
    if (!isfinite(t))
        t = m->have_time ? m->time_days : 0.0;
    if (!m->have_time || t > m->time_days) {
        m->time_days = t;
        m->have_time = 1;
    }
    /* A late vector is handled at the model's time: decays never run
     * backwards. */
    double tm = m->time_days;
    out->n_missing = build_mask(m, in, m->miss);
    m->scored++;

    if (!m->warm) {
        if (in->learn) {
            scaler_observe(m->sc, in->x, m->miss, tm);
            size_t i = m->warm_count++;
            for (uint32_t j = 0; j < d; j++)
                m->warm_x[i * d + j] = m->miss[j] ? 0.0 : in->x[j];
            memcpy(m->warm_miss + i * d, m->miss, d);
            m->warm_t[i] = tm;
            m->learned++;
            if (m->warm_count == m->p.warm_n)
                seed_from_warm(m);
        }
        out->seq = m->learned;
        return 0;
    }

    out->warm = 1;
    scaler_transform(m->sc, in->x, m->miss, in->err, m->z, in->err ? m->ez : NULL,
                     NULL);
    score_vector(m, tm, in->learn, out);
    if (in->learn) {
        scaler_observe(m->sc, in->x, m->miss, tm);
        reservoir_add(m->res, m->z, tm);
        m->learned++;
    }
    if (out->flag)
        m->flagged++;
    out->seq = m->learned;
    return 0;
}

/* ctypes entry: one vector, NaN = missing; out gets 11 values in the order
 * warm, cluster, distance, cluster_weight, novelty, density_novelty,
 * space_novelty, tail_prob, threshold, flag, seq. */
int model_observe_flat(model *m, const double *x, const double *err,
                       const uint8_t *missing, double t, int learn, double *out)
{
    model_input in = {.x = x, .err = err, .missing = missing, .time_days = t,
                      .learn = learn};
    model_result r;
    int rc = model_observe(m, &in, &r);
    if (rc)
        return rc;
    out[0] = r.warm;
    out[1] = r.cluster;
    out[2] = r.distance;
    out[3] = r.cluster_weight;
    out[4] = r.novelty;
    out[5] = r.density_novelty;
    out[6] = r.space_novelty;
    out[7] = r.tail_prob;
    out[8] = r.threshold;
    out[9] = r.flag;
    out[10] = (double)r.seq;
    return 0;
}

int model_observe_many(model *m, const double *X, const double *t, size_t n,
                       int learn, double *out)
{
    for (size_t i = 0; i < n; i++) {
        int rc = model_observe_flat(m, X + i * m->p.dim, NULL, NULL, t[i], learn,
                                    out + i * 11);
        if (rc)
            return rc;
    }
    return 0;
}

/* ---- snapshot ------------------------------------------------------------ */

static void put_params(snap_writer *w, const model_params *p)
{
    snap_put_tag(w, "PARM");
    snap_put_u32(w, (uint32_t)N_PARAM_FIELDS);
    for (size_t i = 0; i < N_PARAM_FIELDS; i++) {
        const param_field *f = &param_fields[i];
        const char *base = (const char *)p + f->offset;
        switch (f->type) {
        case PF_U32: snap_put_u32(w, *(const uint32_t *)base); break;
        case PF_U64: snap_put_u64(w, *(const uint64_t *)base); break;
        case PF_DBL: snap_put_f64(w, *(const double *)base); break;
        case PF_INT:
        case PF_ENUM: snap_put_u32(w, (uint32_t)*(const int *)base); break;
        }
    }
}

static int get_params(snap_reader *r, model_params *p)
{
    memset(p, 0, sizeof *p);
    snap_expect_tag(r, "PARM");
    if (snap_get_u32(r) != N_PARAM_FIELDS || r->err)
        return r->err ? r->err : CORE_EMISMATCH;
    for (size_t i = 0; i < N_PARAM_FIELDS; i++) {
        const param_field *f = &param_fields[i];
        char *base = (char *)p + f->offset;
        switch (f->type) {
        case PF_U32: *(uint32_t *)base = snap_get_u32(r); break;
        case PF_U64: *(uint64_t *)base = snap_get_u64(r); break;
        case PF_DBL: *(double *)base = snap_get_f64(r); break;
        case PF_INT:
        case PF_ENUM: *(int *)base = (int)snap_get_u32(r); break;
        }
    }
    return r->err;
}

static void put_state(const model *m, snap_writer *w)
{
    const uint32_t d = m->p.dim;
    snap_put_tag(w, MODEL_SNAP_TAG);
    snap_put_u32(w, MODEL_SNAP_FORMAT);
    put_params(w, &m->p);
    snap_put_u64(w, m->learned);
    snap_put_u64(w, m->scored);
    snap_put_u64(w, m->flagged);
    snap_put_f64(w, m->time_days);
    snap_put_u32(w, (uint32_t)m->have_time);
    snap_put_u32(w, (uint32_t)m->warm);
    snap_put_u32(w, m->warm_count);
    snap_put_u32(w, m->suggested_k);
    snap_put_f64(w, m->suggested_bic);
    snap_put_f64(w, m->suggested_silhouette);
    snap_put_u32(w, (uint32_t)m->sel_active);
    snap_put_u32(w, m->sel_next_k);
    snap_put_u32(w, m->sel_best_k);
    snap_put_f64(w, m->sel_best_bic);
    snap_put_f64(w, m->grid.grid_width);
    snap_put_f64(w, m->grid.fd_width);
    snap_put_f64(w, m->grid.scott_width);
    snap_put_u64(w, m->grid.n);
    for (int i = 0; i < 4; i++)
        snap_put_u64(w, m->r.s[i]);
    if (!m->warm) {
        snap_put_f64s(w, m->warm_x, (size_t)m->warm_count * d);
        snap_put_bytes(w, m->warm_miss, (size_t)m->warm_count * d);
        snap_put_f64s(w, m->warm_t, m->warm_count);
    }
    scaler_save(m->sc, w);
    kmeans_save(m->km, w);
    density_save(m->ds, w);
    snap_put_u32(w, m->sk ? 1 : 0);
    if (m->sk)
        sketch_save(m->sk, w);
    calib_save(m->cal, w);
    snap_put_u32(w, m->cal_d ? 1 : 0);
    if (m->cal_d) {
        calib_save(m->cal_d, w);
        calib_save(m->cal_s, w);
    }
    reservoir_save(m->res, w);
}

size_t model_snapshot_size(const model *m)
{
    snap_writer w;
    snap_writer_init(&w, NULL, 0);
    put_state(m, &w);
    return SNAP_HEADER_BYTES + w.len + SNAP_TRAILER_BYTES;
}

int model_snapshot(const model *m, uint8_t *buf, size_t cap, size_t *len)
{
    size_t need = model_snapshot_size(m);
    if (len)
        *len = need;
    if (!buf || cap < need)
        return CORE_ESHORT;
    snap_writer w;
    snap_writer_init(&w, buf + SNAP_HEADER_BYTES, cap - SNAP_HEADER_BYTES);
    put_state(m, &w);
    return snap_frame(buf + SNAP_HEADER_BYTES, w.len, buf, cap, len);
}

static int open_payload(const uint8_t *buf, size_t len, snap_reader *r,
                        model_params *p)
{
    const uint8_t *payload;
    size_t plen;
    int rc = snap_unframe(buf, len, &payload, &plen);
    if (rc)
        return rc;
    snap_reader_init(r, payload, plen);
    snap_expect_tag(r, MODEL_SNAP_TAG);
    if (snap_get_u32(r) != MODEL_SNAP_FORMAT)
        return r->err ? r->err : CORE_EVERSION;
    return get_params(r, p);
}

int model_snapshot_params(const uint8_t *buf, size_t len, model_params *p)
{
    snap_reader r;
    return open_payload(buf, len, &r, p);
}

model *model_restore(const uint8_t *buf, size_t len, int *err)
{
    snap_reader r;
    model_params p;
    int rc = open_payload(buf, len, &r, &p);
    if (rc == 0 && model_params_check(&p, NULL, NULL, 0) != 0)
        rc = CORE_EFORMAT;
    if (rc) {
        if (err)
            *err = rc;
        return NULL;
    }
    model *m = model_new(&p, &rc);
    if (!m) {
        if (err)
            *err = rc;
        return NULL;
    }
    const uint32_t d = p.dim;
    m->learned = snap_get_u64(&r);
    m->scored = snap_get_u64(&r);
    m->flagged = snap_get_u64(&r);
    m->time_days = snap_get_f64(&r);
    m->have_time = (int)snap_get_u32(&r);
    m->warm = (int)snap_get_u32(&r);
    m->warm_count = snap_get_u32(&r);
    m->suggested_k = snap_get_u32(&r);
    m->suggested_bic = snap_get_f64(&r);
    m->suggested_silhouette = snap_get_f64(&r);
    m->sel_active = snap_get_u32(&r) != 0;
    m->sel_next_k = snap_get_u32(&r);
    m->sel_best_k = snap_get_u32(&r);
    m->sel_best_bic = snap_get_f64(&r);
    m->grid.grid_width = snap_get_f64(&r);
    m->grid.fd_width = snap_get_f64(&r);
    m->grid.scott_width = snap_get_f64(&r);
    m->grid.n = (size_t)snap_get_u64(&r);
    for (int i = 0; i < 4; i++)
        m->r.s[i] = snap_get_u64(&r);
    rc = r.err;
    if (!rc && (m->warm_count > p.warm_n || (m->warm && m->warm_count != p.warm_n)))
        rc = CORE_EFORMAT;
    if (!rc && !m->warm) {
        snap_get_f64s(&r, m->warm_x, (size_t)m->warm_count * d);
        snap_get_bytes(&r, m->warm_miss, (size_t)m->warm_count * d);
        snap_get_f64s(&r, m->warm_t, m->warm_count);
        rc = r.err;
    }
    if (!rc)
        rc = scaler_load(m->sc, &r);
    if (!rc)
        rc = kmeans_load(m->km, &r);
    if (!rc)
        rc = density_load(m->ds, &r);
    if (!rc) {
        uint32_t has = snap_get_u32(&r);
        if (has != (m->sk ? 1u : 0u))
            rc = CORE_EFORMAT;
        else if (m->sk)
            rc = sketch_load(m->sk, &r);
    }
    if (!rc)
        rc = calib_load(m->cal, &r);
    if (!rc) {
        uint32_t has = snap_get_u32(&r);
        if (has != (m->cal_d ? 1u : 0u))
            rc = CORE_EFORMAT;
        else if (m->cal_d) {
            rc = calib_load(m->cal_d, &r);
            if (!rc)
                rc = calib_load(m->cal_s, &r);
        }
    }
    if (!rc)
        rc = reservoir_load(m->res, &r);
    if (!rc && (r.err || r.pos != r.len))
        rc = CORE_EFORMAT;
    if (rc) {
        model_free(m);
        if (err)
            *err = rc;
        return NULL;
    }
    return m;
}

/* ---- views ---------------------------------------------------------------- */

void model_summarize(const model *m, model_summary *s)
{
    memset(s, 0, sizeof *s);
    s->dim = m->p.dim;
    s->k = m->p.k;
    s->warm = m->warm;
    s->learned = m->learned;
    s->scored = m->scored;
    s->flagged = m->flagged;
    s->retired = kmeans_retired(m->km);
    s->time_days = m->time_days;
    s->threshold = calib_threshold(m->cal);
    s->expected_flags_per_night = calib_expected_per_night(m->cal);
    s->space_fill = m->sk ? sketch_fill(m->sk) : 0.0;
    s->bytes = m->bytes;
    s->suggested_k = m->suggested_k;
}

int model_cluster(const model *m, uint32_t i, model_cluster_view *v)
{
    if (i >= m->p.k)
        return CORE_ERANGE;
    if (!m->warm)
        return CORE_EAGAIN;
    kmeans_cluster_view kv;
    kmeans_cluster(m->km, i, &kv);
    v->weight = kmeans_weight(m->km, i, m->time_days);
    v->last_time_days = kv.last;
    v->centroid_z = kv.centroid;
    v->spread_z = kv.spread;
    return 0;
}

double model_unscale(const model *m, uint32_t j, double z)
{
    return j < m->p.dim ? scaler_unscale(m->sc, j, z) : NAN;
}

uint32_t model_score_histogram(const model *m, double *edges, double *mass,
                               uint32_t n)
{
    return calib_histogram(m->cal, edges, mass, n);
}

/* Selection works on at most this many reservoir rows, one k per call, so
 * one step costs tens of milliseconds at k = 64, d = 16. */
#define MODEL_SELECT_ROWS 2048u

static int select_range(const model *m, size_t *n, uint32_t *kmin,
                        uint32_t *kmax)
{
    *n = reservoir_count(m->res);
    if (*n > MODEL_SELECT_ROWS)
        *n = MODEL_SELECT_ROWS;
    *kmin = m->p.select_k_min < 1 ? 1 : m->p.select_k_min;
    *kmax = m->p.select_k_max;
    if (*n < 2 * (size_t)*kmax)
        *kmax = (uint32_t)(*n / 2);
    if (!m->warm || *kmax < *kmin || *kmax < 2)
        return CORE_EAGAIN;
    return 0;
}

int model_select_begin(model *m)
{
    size_t n;
    uint32_t kmin, kmax;
    int rc = select_range(m, &n, &kmin, &kmax);
    if (rc)
        return rc;
    m->sel_active = 1;
    m->sel_next_k = kmin;
    m->sel_best_k = 0;
    m->sel_best_bic = -INFINITY;
    return 0;
}

int model_select_tick(model *m)
{
    if (!m->sel_active)
        return CORE_EAGAIN;
    const uint32_t d = m->p.dim;
    size_t n;
    uint32_t kmin, kmax;
    if (select_range(m, &n, &kmin, &kmax) != 0) {
        m->sel_active = 0;
        return CORE_EAGAIN;
    }
    const double *X = reservoir_rows(m->res);
    select_kmeans_opts o = {.restarts = 1, .max_iter = 20, .local_trials = 0};
    uint32_t k = m->sel_next_k++;
    double inertia;
    if (k <= kmax && select_kmeans(m->ws, X, n, k, &o, &m->r, m->sel_centers,
                                   m->labels, &inertia) == 0) {
        double bic = select_bic(X, n, d, m->sel_centers, m->labels, k);
        if (isfinite(bic) && bic > m->sel_best_bic) {
            m->sel_best_bic = bic;
            m->sel_best_k = k;
        }
    }
    if (m->sel_next_k <= kmax)
        return 0;
    /* Last k of the round: the silhouette of the best one, then publish. */
    m->sel_active = 0;
    if (m->sel_best_k == 0)
        return CORE_EAGAIN;
    double sil = NAN;
    select_kmeans(m->ws, X, n, m->sel_best_k, &o, &m->r, m->sel_centers,
                  m->labels, &inertia);
    size_t ns = n < MODEL_SILHOUETTE_SAMPLE ? n : MODEL_SILHOUETTE_SAMPLE;
    if (m->sel_best_k >= 2 &&
        select_silhouette(m->ws, X, ns, d, m->labels, m->sel_best_k, &sil) != 0)
        sil = NAN;
    m->suggested_k = m->sel_best_k;
    m->suggested_bic = m->sel_best_bic;
    m->suggested_silhouette = sil;
    return 1;
}

int model_select(model *m, uint32_t *suggested_k, double *bic_best,
                 double *silhouette_best)
{
    int rc = model_select_begin(m);
    if (rc)
        return rc;
    while ((rc = model_select_tick(m)) == 0)
        ;
    if (rc < 0)
        return rc;
    if (suggested_k)
        *suggested_k = m->suggested_k;
    if (bic_best)
        *bic_best = m->suggested_bic;
    if (silhouette_best)
        *silhouette_best = m->suggested_silhouette;
    return 0;
}
