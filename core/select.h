/*
 * select.h - batch clustering and the statistics that judge it.
 *
 * - select_kmeans: batch k-means with k-means++ seeding (Arthur &
 *   Vassilvitskii 2007), optionally greedy (several candidates per step,
 *   the one that lowers the potential most is kept), several restarts,
 *   Lloyd iterations until no label changes or max_iter; the restart with
 *   the lowest inertia wins.  An empty cluster is re-opened on the point
 *   farthest from its centre.
 * - select_bic: the X-means BIC of Pelleg & Moore (2000).
 * - select_silhouette: mean silhouette (Rousseeuw 1987), O(n^2 d).
 * - select_fd_width / select_scott_width: histogram bin widths with the
 *   conventions of astropy.stats freedman_bin_width / scott_bin_width.
 *
 * All scratch lives in a select_ws allocated once by select_ws_new() for
 * the largest n, dim and k it will see, so the model can run selection
 * from a timer without allocating.  Determinism: the only randomness is
 * the caller's rng; the same rng state and data give the same result.
 */
#ifndef ODDSKY_CORE_SELECT_H
#define ODDSKY_CORE_SELECT_H

#include <stddef.h>
#include <stdint.h>

#include "rng.h"

typedef struct select_ws select_ws;

/* Scratch for up to n_max rows of dim features and k_max clusters.
 * Returns NULL with *err = CORE_EINVAL (a zero size) or CORE_ENOMEM. */
select_ws *select_ws_new(size_t n_max, uint32_t dim, uint32_t k_max, int *err);
void select_ws_free(select_ws *ws);
size_t select_ws_bytes(const select_ws *ws);

typedef struct select_kmeans_opts {
    uint32_t restarts;     /* >= 1 */
    uint32_t max_iter;     /* Lloyd iterations per restart, >= 1 */
    uint32_t local_trials; /* candidates per k-means++ step; 0 = 2 + ln k */
} select_kmeans_opts;

/* Batch k-means of X (n x dim, row major, finite values) into k clusters.
 * Needs 1 <= k <= n, n <= n_max, k <= k_max, dim == the ws dim.  Writes
 * centers (k x dim), labels (n; may be NULL) and the inertia (sum of
 * squared distances to the assigned centre; may be NULL).  Returns 0 or
 * CORE_EINVAL.  Consumes randomness from r. */
int select_kmeans(select_ws *ws, const double *X, size_t n, uint32_t k,
                  const select_kmeans_opts *o, rng *r, double *centers,
                  int32_t *labels, double *inertia);

/*
 * X-means BIC (Pelleg & Moore 2000, section 3.2), identical spherical
 * Gaussians, with R points, M dimensions, K clusters, R_n points in
 * cluster n:
 *   sigma2     = 1/(R - K) * sum_i ||x_i - mu_(i)||^2
 *   l(D_n)     = -R_n/2 log(2 pi) - R_n M/2 log(sigma2) - (R_n - K)/2
 *                + R_n log R_n - R_n log R
 *   p          = (K - 1) + M K + 1
 *   BIC        = sum_n l(D_n) - p/2 log R
 * (as printed; sigma2 sums over all M coordinates).  Higher is better.
 * Empty clusters contribute 0.  Needs n > k; returns NAN otherwise or
 * when sigma2 is 0.
 */
double select_bic(const double *X, size_t n, uint32_t dim,
                  const double *centers, const int32_t *labels, uint32_t k);

/* Mean silhouette over the n rows (Euclidean distance); a point alone in
 * its cluster scores 0 (as sklearn.metrics.silhouette_score).  Labels in
 * [0, k).  Returns 0 with *out set, or CORE_EINVAL (fewer than 2 or more
 * than n - 1 non-empty clusters, n > n_max, k > k_max). */
int select_silhouette(select_ws *ws, const double *X, size_t n, uint32_t dim,
                      const int32_t *labels, uint32_t k, double *out);

/* Freedman-Diaconis width 2 (q75 - q25) n^(-1/3), percentiles with linear
 * interpolation (numpy's default, as astropy uses).  scratch holds n
 * doubles (x is not modified).  NAN for n < 4 (astropy refuses those). */
double select_fd_width(const double *x, size_t n, double *scratch);

/* Scott width 3.5 sigma n^(-1/3), sigma the population sd (ddof = 0).
 * NAN for n < 1. */
double select_scott_width(const double *x, size_t n);

/* ctypes entries.  select_kmeans_run allocates its own scratch and rng
 * (seeded by seed); select_silhouette_run likewise.  Return 0 or CORE_E*. */
int select_kmeans_run(const double *X, size_t n, uint32_t dim, uint32_t k,
                      uint32_t restarts, uint32_t max_iter,
                      uint32_t local_trials, uint64_t seed, double *centers,
                      int32_t *labels, double *inertia);
int select_silhouette_run(const double *X, size_t n, uint32_t dim,
                          const int32_t *labels, uint32_t k, double *out);

#endif
