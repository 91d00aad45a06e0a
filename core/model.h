/*
 * model.h - the one door from the daemon into the models.
 *
 * A model turns a stream of feature vectors into, for every vector, a
 * cluster assignment, a distance, a novelty score calibrated into a tail
 * probability against the recent stream, a flag decision and the features
 * that drove the score.  It composes the scaler, online k-means, the
 * cluster mixture density, the space sketch, the calibrator and the
 * reservoir (see DESIGN.md, "Models").
 *
 * Invariants:
 * - Score first, then learn: model_observe() scores a vector against the
 *   model as it stood before the vector, then (when in->learn is set)
 *   learns it.
 * - All memory is allocated by model_new() / model_restore().
 *   model_observe() allocates nothing and does no I/O.
 * - Determinism: the same parameters (seed included) and the same inputs
 *   give bit-identical results and snapshots; a restored model continues
 *   exactly as the original would have.
 * - Every decay runs in event time (in->time_days), never wall-clock time.
 *   Time going backwards is allowed (late packets): such a vector decays
 *   nothing and is learned at the current model time.
 * - A model is not thread-safe; one owner calls it.
 */
#ifndef ODDSKY_CORE_MODEL_H
#define ODDSKY_CORE_MODEL_H

#include <stddef.h>
#include <stdint.h>

#include "err.h"

#define MODEL_MAX_DIM 256u
#define MODEL_MAX_K 1024u
#define MODEL_DRIVERS 3u

typedef enum model_score_kind {
    MODEL_SCORE_DENSITY = 0,  /* novelty = -log p(z) under the mixture */
    MODEL_SCORE_SPACE = 1,    /* novelty = space sketch score */
    MODEL_SCORE_COMBINED = 2  /* -log of the product of both tail probs */
} model_score_kind;

typedef enum model_flag_policy {
    MODEL_FLAG_ALPHA = 0,  /* flag when tail_prob <= alpha */
    MODEL_FLAG_BUDGET = 1  /* aim at budget_per_hour flags per event hour */
} model_flag_policy;

/* Every tunable of the models.  model_params_default() fills sane values;
 * model_params_check() states the bounds.  The daemon's option table maps
 * its config keys onto these fields one to one. */
typedef struct model_params {
    uint32_t dim;                 /* features per vector, 1..MODEL_MAX_DIM */
    uint32_t k;                   /* clusters, 1..MODEL_MAX_K, default 32 */
    uint32_t warm_n;              /* warm-up vectors before seeding, 2048 */
    uint32_t lloyd_passes;        /* Lloyd passes after k-means++, 3 */
    uint32_t seed_restarts;       /* k-means++ restarts at seeding, 3 */
    double scale_half_life_days;  /* scaler memory, 30 */
    double kmeans_half_life_days; /* centroid memory, 7 */
    double sketch_half_life_days; /* residual histograms + space sketch, 7 */
    double calib_half_life_days;  /* score distribution, 3 */
    double sd_floor;              /* lower bound on a feature's sd, 1e-6 */
    int robust;                   /* 1: clip z at +-z_clip before learning */
    double z_clip;                /* 8 */
    double retire_weight;         /* retire a cluster below this weight, 0.5 */
    uint32_t mix_nearest;         /* clusters evaluated exactly, 4 */
    uint32_t hist_bins;           /* residual bins inside +-hist_range, 24 */
    double hist_range;            /* 6 (standardised units) */
    double hist_pseudo;           /* pseudo-count toward the normal, 20 */
    uint32_t space_dims;          /* projected dimensions P, 16 */
    uint32_t space_chains;        /* half-space chains M, 16 */
    uint32_t space_depth;         /* levels per chain L, 12 */
    uint32_t space_width;         /* counters per (chain, level) row, 1024 */
    uint32_t space_rows;          /* count-min rows per (chain, level), 1 */
    uint32_t reservoir_n;         /* decaying sample size, 4096 */
    uint32_t calib_bins;          /* score histogram bins, 2048 */
    model_score_kind score;       /* default MODEL_SCORE_DENSITY */
    model_flag_policy policy;     /* default MODEL_FLAG_BUDGET */
    double alpha;                 /* tail probability for MODEL_FLAG_ALPHA, 1e-3 */
    double budget_per_hour;       /* flags per event-time hour, 10 */
    double stream_rate_per_hour;  /* prior rate before it is measured, 1e5 */
    uint32_t select_k_min;        /* model selection range, 2 */
    uint32_t select_k_max;        /* 64 */
    uint64_t seed;                /* PRNG seed, 1 */
} model_params;

/* One vector to observe.  Arrays have dim entries; err and missing may be
 * NULL.  A NaN or infinite x is treated as missing. */
typedef struct model_input {
    const double *x;        /* feature values, feature units */
    const double *err;      /* measurement errors (1 sigma) or NULL */
    const uint8_t *missing; /* nonzero = missing, or NULL */
    double time_days;       /* event time (MJD days) */
    int learn;              /* nonzero: learn after scoring */
} model_input;

typedef struct model_driver {
    int32_t feature; /* index into the vector */
    double z;        /* signed (z - c) / spread in the assigned cluster */
} model_driver;

typedef struct model_result {
    int warm;              /* 0 until warm-up has seeded the clusters */
    int32_t cluster;       /* nearest cluster, -1 while not warm */
    double distance;       /* diagonal Mahalanobis distance to it */
    double cluster_weight; /* its decayed weight at this time */
    double novelty;        /* the configured score (higher = rarer) */
    double density_novelty;/* -log p(z) under the mixture */
    double space_novelty;  /* space sketch score */
    double tail_prob;      /* decayed fraction of recent scores >= novelty */
    double threshold;      /* novelty threshold in force for the flag */
    int flag;              /* 1 = flagged for a person to look at */
    uint32_t n_drivers;
    model_driver drivers[MODEL_DRIVERS];
    uint32_t n_missing;    /* features missing in this vector */
    uint64_t seq;          /* vectors learned so far, this one included */
} model_result;

/* Summary for the status page and `oddsky inspect`. */
typedef struct model_summary {
    uint32_t dim, k;
    int warm;
    uint64_t learned;          /* vectors learned */
    uint64_t scored;           /* vectors observed (scored) */
    uint64_t flagged;          /* flags raised */
    uint64_t retired;          /* clusters retired and re-seeded */
    double time_days;          /* model event time */
    double threshold;          /* current novelty threshold */
    double expected_flags_per_night; /* at the current threshold, 10 h */
    double space_fill;         /* fraction of sketch counters non-zero */
    size_t bytes;              /* model memory */
    uint32_t suggested_k;      /* from the last model_select(), 0 = none */
} model_summary;

/* One cluster, in feature units (the scaler undone). */
typedef struct model_cluster_view {
    double weight;
    double last_time_days;
    const double *centroid_z;  /* dim entries, standardised units */
    const double *spread_z;    /* dim entries, standardised units */
} model_cluster_view;

typedef struct model model;

/* Fill p with the defaults for dim features. */
void model_params_default(model_params *p, uint32_t dim);

/* Check every field against its bounds.  Returns 0, or CORE_ERANGE with
 * the first offending field's name in *field and the rule in why (why may
 * be NULL). */
int model_params_check(const model_params *p, const char **field,
                       char *why, size_t why_len);

/* Build a model.  Returns NULL with *err set (CORE_EINVAL for parameters
 * failing model_params_check, CORE_ENOMEM).  The caller owns the model. */
model *model_new(const model_params *p, int *err);

void model_free(model *m);

/* Bytes of memory the model holds (fixed from model_new on). */
size_t model_bytes(const model *m);

const model_params *model_get_params(const model *m);

/* Score in, learn it when in->learn, fill *out.  Returns 0 or CORE_EINVAL
 * (NULL pointers).  Never allocates. */
int model_observe(model *m, const model_input *in, model_result *out);

/* Exact size in bytes of model_snapshot()'s output right now. */
size_t model_snapshot_size(const model *m);

/* Write a framed, checksummed snapshot into buf.  Returns 0 with *len set,
 * or CORE_ESHORT with *len set to the size needed. */
int model_snapshot(const model *m, uint8_t *buf, size_t cap, size_t *len);

/* Build a model from a snapshot.  Returns NULL with *err set to one of
 * CORE_EFORMAT, CORE_EVERSION, CORE_ECHECKSUM, CORE_EINVAL, CORE_ENOMEM. */
model *model_restore(const uint8_t *buf, size_t len, int *err);

/* Read the parameters stored in a snapshot without building the model. */
int model_snapshot_params(const uint8_t *buf, size_t len, model_params *p);

void model_summarize(const model *m, model_summary *s);

/* View cluster i (0 <= i < k) at the model's time.  Returns 0, or
 * CORE_ERANGE for a bad index, CORE_EAGAIN before warm-up. */
int model_cluster(const model *m, uint32_t i, model_cluster_view *v);

/* Undo the scaler for feature j: z -> feature units. */
double model_unscale(const model *m, uint32_t j, double z);

/* The calibrator's score histogram, for the live page: fills up to n
 * (edge, mass) pairs over the populated range, returns the count. */
uint32_t model_score_histogram(const model *m, double *edges, double *mass,
                               uint32_t n);

/* Run batch model selection over the reservoir (k-means++ with restarts
 * for k in [select_k_min, select_k_max], X-means BIC and mean silhouette)
 * and store the suggestion.  Uses scratch allocated at model_new; may take
 * tens of milliseconds; call from a timer, not per packet.  Returns 0 or
 * CORE_EAGAIN when the reservoir is too small. */
int model_select(model *m, uint32_t *suggested_k, double *bic_best,
                 double *silhouette_best);

/* The same in steps, for a timer: model_select_begin() starts a round
 * (CORE_EAGAIN before warm-up or with too small a reservoir); each
 * model_select_tick() evaluates one k (at most 2048 reservoir rows, one
 * k-means++ run of 20 Lloyd iterations) and returns 0 while the round goes
 * on, 1 when it ended and the suggestion (model_summary.suggested_k) was
 * updated, or CORE_EAGAIN when no round is under way.  The round's state
 * is part of the snapshot. */
int model_select_begin(model *m);
int model_select_tick(model *m);

#endif
