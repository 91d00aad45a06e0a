/*
 * density.h - cluster mixture density with decaying residual histograms.
 *
 * For every cluster k and feature j a histogram h_kj of the standardised
 * residual r = (z_j - c_kj) / s_kj on a fixed grid: `bins` equal bins over
 * [-range, range) plus a left and a right tail bin.  Counts decay in event
 * time through one core/decay.h clock shared by all histograms.  Each
 * bin's probability is smoothed toward the standard normal's mass phi_b
 * in that bin with a pseudo-count P:
 *   prob_b = (count_b + P phi_b) / (total + P)
 * so a young cluster is Gaussian and an old one takes its own shape.  The
 * density inside bin b is prob_b / width; in a tail bin it is the normal's
 * tail shape scaled to the bin's mass, prob_tail phi(r) / Q(range), finite
 * and decreasing.  The log density under the mixture of the given nearest
 * clusters is
 *   log p(z) = logsumexp_k [ log w_k + (d / d_obs) sum_{j observed}
 *                            ( log h_kj(r_kj) - log s_kj ) ]
 * with w_k the cluster's share of the decayed k-means weight.  Clusters
 * not in the list are left out (the mixture is evaluated over the
 * nearest ones, as DESIGN allows).
 *
 * Cost: log h per bin is tabulated (float) together with log(total + P)
 * per histogram and its sum over the cluster's features, so a read of a
 * fully observed vector is an index and an add per feature plus one
 * subtraction per cluster; an update recomputes the touched bin (one
 * log() per feature) and log(total + P), once per cluster while the
 * feature totals are equal.  Because decay shrinks counts against the fixed pseudo-count,
 * a cluster's tables are rebuilt when the clock has grown by more than
 * `refresh_tol` (relative) since they were built; between rebuilds the
 * pseudo-count's weight is off by at most that fraction.
 *
 * All memory is allocated by density_new(); nothing else allocates.
 */
#ifndef ODDSKY_CORE_DENSITY_H
#define ODDSKY_CORE_DENSITY_H

#include <stddef.h>
#include <stdint.h>

#include "kmeans.h"
#include "snapshot.h"

typedef struct density_params {
    uint32_t dim, k;       /* must match the kmeans the density reads */
    uint32_t bins;         /* inner bins, >= 2; default 24 */
    double range;          /* > 0, inner grid is [-range, range); 6 */
    double pseudo;         /* >= 0, pseudo-count toward the normal; 20 */
    double half_life_days; /* 0 = never forget; 7 */
    double refresh_tol;    /* > 0, table rebuild tolerance; 0.01 */
} density_params;

typedef struct density density;

void density_params_default(density_params *p, uint32_t dim, uint32_t k);

/* NULL with *err = CORE_EINVAL or CORE_ENOMEM (err may be NULL). */
density *density_new(const density_params *p, int *err);
void density_free(density *ds);
size_t density_bytes(const density *ds);
const density_params *density_get_params(const density *ds);

/* log p(z) over the m clusters in idx (from kmeans_nearest), at time t,
 * for z (dim, z units) with mask miss (or NULL; non-finite z is missing).
 * km must have the params' dim and k and be seeded.  Returns NAN for
 * m = 0 and 0 (log of an uninformative density) when no feature is
 * observed.  May rebuild stale tables (hence not const); never
 * allocates. */
double density_log(density *ds, const kmeans *km, const double *z,
                   const uint8_t *miss, const uint32_t *idx, uint32_t m,
                   double t);

/* Per-cluster term of the sum above for one cluster, without the weight:
 * (d / d_obs) sum_j (log h_kj(r_kj) - log s_kj).  Same contract. */
double density_log_cluster(density *ds, const kmeans *km, uint32_t k,
                           const double *z, const uint8_t *miss);

/* Add z's residuals against cluster k (its centroid and spread as km has
 * them now) to k's histograms at time t.  Call it before kmeans_update
 * for the same vector, so the residual is against the centroid the vector
 * was scored with.  Moves the clock to t (never backwards). */
void density_update(density *ds, const kmeans *km, uint32_t k,
                    const double *z, const uint8_t *miss, double t);

/* Forget cluster k's histograms (after kmeans_retire reseeded it). */
void density_reset(density *ds, uint32_t k);

/* Decayed total mass in histogram (k, j) at the clock's time. */
double density_mass(const density *ds, uint32_t k, uint32_t j);

/* Probability of bin b (0 = left tail, 1..bins inner, bins+1 = right
 * tail) of histogram (k, j), with the smoothing, at the clock's time. */
double density_bin_prob(const density *ds, uint32_t k, uint32_t j,
                        uint32_t b);

/* Residuals r = (z_j - c_kj) / s_kj of the rows of Z (n x dim) against
 * their clusters labels[i], observed features only (non-finite z skipped),
 * into out (up to cap values).  Returns how many were written. */
size_t density_residuals(const kmeans *km, const double *Z, size_t n,
                         const int32_t *labels, double *out, size_t cap);

typedef struct density_grid_report {
    double grid_width;  /* 2 range / bins */
    double fd_width;    /* Freedman-Diaconis width of the residuals */
    double scott_width; /* Scott width of the residuals */
    size_t n;           /* residuals used */
} density_grid_report;

/* Check the grid against the Freedman-Diaconis and Scott rules on
 * residuals (from density_residuals on the warm-up); scratch holds n
 * doubles.  Returns 0, or CORE_EINVAL for n < 4. */
int density_grid_check(const density *ds, const double *resid, size_t n,
                       double *scratch, density_grid_report *rep);

void density_save(const density *ds, snap_writer *w);
/* Load into ds created with the same dim, k and bins; 0, CORE_EMISMATCH
 * or the reader's error (ds unchanged on error). */
int density_load(density *ds, snap_reader *r);

#endif
