/*
 * kmeans.h - online k-means with event-time forgetting.
 *
 * Sequential k-means (MacQueen 1967) with a decaying count, as in Spark's
 * streaming k-means half-life: each cluster k keeps a centroid c_k, a
 * decayed count n_k, a last-touch time and a per-feature spread s_kj (the
 * decaying sd of z around the centroid, floored at spread_floor).  Decay
 * is lazy: n_k(t) = n_k 2^(-(t - last_k)/H), so only the touched cluster
 * is written per vector.  Learning z at t:
 *   n <- n 2^(-dt/H) + 1;  delta = z - c;  c <- c + delta / n;
 *   v <- v + (delta (z - c) - v) / n          (weighted Welford, West 1979)
 *   s = sqrt(max(v, spread_floor^2))
 * for the observed features (missing ones keep c and v).
 *
 * Distance: the diagonal Mahalanobis d^2 = sum_j (z_j - c_j)^2 /
 * (s_j^2 + e_j^2) over the observed features, times d / d_observed.
 * Without errors the assign loop reads float mirrors of c and 1/s^2 laid
 * out feature-major (every cluster's value of one feature side by side,
 * four clusters per vector), so it has no division; with errors it
 * divides once per (cluster, feature).
 *
 * Seeding: kmeans_seed() runs select_kmeans (k-means++ with restarts and
 * a few Lloyd passes) on a warm buffer; each cluster starts with its member
 * count as n and its members' per-feature variance as v.
 *
 * Birth and retirement: the owner offers candidate points (recent points
 * that were far from every centroid and of low density) with a score; the
 * last `candidates` offers are kept in a fixed ring.  kmeans_retire()
 * retires every cluster whose decayed weight fell below retire_weight and
 * reseeds its slot from the highest-scoring candidate (which leaves the
 * ring), with n = 1 and v = spread_init^2.
 *
 * Mixture weights: the module keeps the decayed total of all cluster
 * counts, so log w_k = log n_k(t) - log N(t) costs no exp().
 *
 * Memory: all allocated by kmeans_new(); nothing else allocates.  The
 * assign functions write internal scratch, so a kmeans is not shared
 * between threads.  Determinism: same params, seed and inputs give the
 * same results bit for bit, before and after a save/load.
 */
#ifndef ODDSKY_CORE_KMEANS_H
#define ODDSKY_CORE_KMEANS_H

#include <stddef.h>
#include <stdint.h>

#include "rng.h"
#include "select.h"
#include "snapshot.h"

typedef struct kmeans_params {
    uint32_t dim;          /* features, >= 1 */
    uint32_t k;            /* clusters, >= 1 */
    double half_life_days; /* 0 = never forget */
    double spread_floor;   /* > 0, z units; default 0.05 */
    double spread_init;    /* > 0, spread of a reborn or tiny cluster, 1 */
    double retire_weight;  /* >= 0, retire below this decayed weight, 0.5 */
    uint32_t candidates;   /* ring capacity (0 = no rebirth), 64 */
    uint64_t seed;         /* seeds the k-means++ draws */
} kmeans_params;

typedef struct kmeans kmeans;

/* Read-only view of one cluster; pointers stay valid until the next call
 * that learns, seeds, retires or loads. */
typedef struct kmeans_cluster_view {
    double n;                 /* stored count (decayed to last) */
    double last;              /* last-touch event time */
    const double *centroid;   /* dim, z units */
    const double *spread;     /* dim, floored sd s */
    const double *inv_spread; /* dim, 1 / s */
    double log_spread_sum;    /* sum_j log s_j */
} kmeans_cluster_view;

void kmeans_params_default(kmeans_params *p, uint32_t dim, uint32_t k);

/* NULL with *err = CORE_EINVAL (bad params) or CORE_ENOMEM; err may be
 * NULL.  The caller owns the result. */
kmeans *kmeans_new(const kmeans_params *p, int *err);
void kmeans_free(kmeans *km);
size_t kmeans_bytes(const kmeans *km);
const kmeans_params *kmeans_get_params(const kmeans *km);
int kmeans_seeded(const kmeans *km);
uint64_t kmeans_retired(const kmeans *km); /* clusters reborn so far */

/* Seed from Z (n x dim rows in z units, missing as 0) at time t with
 * select_kmeans (restarts, lloyd_passes as max_iter).  ws must hold n rows
 * of dim features and k clusters.  Needs n >= k.  May be called again to
 * re-seed everything.  labels (n, may be NULL) receives each row's
 * cluster.  Returns 0, CORE_EINVAL. */
int kmeans_seed(kmeans *km, select_ws *ws, const double *Z, size_t n,
                double t, uint32_t restarts, uint32_t lloyd_passes,
                int32_t *labels);

/* Install centres directly (k x dim), each with count n0 and spread
 * spread_init, at time t (for tests and for merging peers). */
int kmeans_set_centres(kmeans *km, const double *centres, double n0, double t);

/* The m nearest clusters to z (dim values; ez = scaled errors or NULL;
 * miss = mask or NULL), nearest first, ties to the lower index.  Writes
 * min(m, k) indices and rescaled d^2 values; returns that count, or
 * CORE_EAGAIN before seeding, CORE_EINVAL for m = 0.  With no observed
 * feature every d^2 is 0. */
int kmeans_nearest(kmeans *km, const double *z, const double *ez,
                   const uint8_t *miss, uint32_t m, uint32_t *idx,
                   double *d2);

/* Nearest cluster (>= 0) with *d2 set (d2 may be NULL), or CORE_EAGAIN. */
int kmeans_assign(kmeans *km, const double *z, const double *ez,
                  const uint8_t *miss, double *d2);

/* Learn z into cluster k at time t (see the update above).  A late t
 * (before last_k) decays nothing; a non-finite t counts as last_k. */
void kmeans_update(kmeans *km, uint32_t k, const double *z,
                   const uint8_t *miss, double t);

/* kmeans_assign then kmeans_update; returns the cluster or CORE_EAGAIN. */
int kmeans_observe(kmeans *km, const double *z, const double *ez,
                   const uint8_t *miss, double t, double *d2);

/* Decayed weight n_k(t), its log (-INFINITY for 0), the decayed total
 * N(t) over all clusters, and log(n_k(t) / N(t)). */
double kmeans_weight(const kmeans *km, uint32_t k, double t);
double kmeans_log_weight(const kmeans *km, uint32_t k, double t);
double kmeans_total_weight(const kmeans *km, double t);
double kmeans_log_mix_weight(const kmeans *km, uint32_t k, double t);

void kmeans_cluster(const kmeans *km, uint32_t k, kmeans_cluster_view *v);

/* Offer a candidate for rebirth (z units, missing as 0) with a score
 * (higher = better candidate), at time t.  O(dim). */
void kmeans_offer(kmeans *km, const double *z, const uint8_t *miss,
                  double score, double t);
uint32_t kmeans_candidates(const kmeans *km); /* offers held now */

/* Retire clusters whose weight at t is below retire_weight, reseeding
 * each from the best candidate, lowest slot first, until the candidates
 * or max_slots run out.  Writes the reborn slots (the owner resets their
 * density sketches) and returns how many.  O(1) when nothing can be due. */
uint32_t kmeans_retire(kmeans *km, double t, uint32_t *slots,
                       uint32_t max_slots);

void kmeans_save(const kmeans *km, snap_writer *w);
/* Load into km created with the same dim, k and candidates; returns 0,
 * CORE_EMISMATCH or the reader's error (km unchanged on error). */
int kmeans_load(kmeans *km, snap_reader *r);

/* ctypes entry for the reference tests: seed (3 restarts, 3 Lloyd
 * passes) on the first warm_n rows of X (n x d), stream the rest one by
 * one with event times t (NULL = all 0), write the final centres (k x d)
 * and every row's assignment to the final centres (labels, may be NULL).
 * Returns 0 or CORE_E*. */
int kmeans_stream_fit(const double *X, const double *t, size_t n, uint32_t d,
                      uint32_t k, double half_life_days, uint32_t warm_n,
                      uint64_t seed, double *centers_out, int32_t *labels_out);

#endif
