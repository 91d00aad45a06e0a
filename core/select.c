/*
 * select.c - batch k-means, X-means BIC, silhouette and bin widths.
 *
 * Layout of the scratch (n_max rows, k_max clusters, dim features):
 * mind/tmp/best (n doubles each) serve k-means++ potentials; lab and
 * best_lab (n int32) hold the current and best restart's labels; cen and
 * best_cen (k x dim) the centres; cnt (k) the cluster sizes, also reused
 * by the silhouette as per-cluster distance sums.
 */
#include "select.h"

#include <math.h>
#include <stdlib.h>
#include <string.h>

#include "err.h"
#include "vec.h"

struct select_ws {
    size_t n_max;
    uint32_t dim, k_max;
    double *mind, *tmp, *best;
    int32_t *lab, *best_lab;
    double *cen, *best_cen;
    double *cnt, *sum2;
};

select_ws *select_ws_new(size_t n_max, uint32_t dim, uint32_t k_max, int *err)
{
    int e = CORE_EINVAL;
    select_ws *ws = NULL;
    if (n_max == 0 || dim == 0 || k_max == 0)
        goto fail;
    e = CORE_ENOMEM;
    ws = calloc(1, sizeof *ws);
    if (!ws)
        goto fail;
    ws->n_max = n_max;
    ws->dim = dim;
    ws->k_max = k_max;
    ws->mind = malloc(n_max * sizeof(double));
    ws->tmp = malloc(n_max * sizeof(double));
    ws->best = malloc(n_max * sizeof(double));
    ws->lab = malloc(n_max * sizeof(int32_t));
    ws->best_lab = malloc(n_max * sizeof(int32_t));
    ws->cen = malloc((size_t)k_max * dim * sizeof(double));
    ws->best_cen = malloc((size_t)k_max * dim * sizeof(double));
    ws->cnt = malloc((size_t)k_max * sizeof(double));
    ws->sum2 = malloc((size_t)k_max * sizeof(double));
    if (!ws->mind || !ws->tmp || !ws->best || !ws->lab || !ws->best_lab ||
        !ws->cen || !ws->best_cen || !ws->cnt || !ws->sum2)
        goto fail_arrays;
    if (err)
        *err = 0;
    return ws;
fail_arrays:
    select_ws_free(ws);
fail:
    if (err)
        *err = e;
    return NULL;
}

void select_ws_free(select_ws *ws)
{
    if (!ws)
        return;
    free(ws->mind);
    free(ws->tmp);
    free(ws->best);
    free(ws->lab);
    free(ws->best_lab);
    free(ws->cen);
    free(ws->best_cen);
    free(ws->cnt);
    free(ws->sum2);
    free(ws);
}

size_t select_ws_bytes(const select_ws *ws)
{
    return sizeof *ws + ws->n_max * (3 * sizeof(double) + 2 * sizeof(int32_t)) +
           (size_t)ws->k_max * ws->dim * 2 * sizeof(double) +
           (size_t)ws->k_max * 2 * sizeof(double);
}

/* Index i with cumulative weight just above u * total (u in [0,1)). */
static size_t sample_by_weight(const double *w, size_t n, double total,
                               double u)
{
    double target = u * total, acc = 0;
    size_t last = 0;
    for (size_t i = 0; i < n; i++) {
        if (w[i] > 0) {
            acc += w[i];
            last = i;
            if (acc > target)
                return i;
        }
    }
    return last; /* rounding left target at the very end */
}

/* k-means++ (greedy with `trials` candidates per step) into ws->cen. */
static void seed_pp(select_ws *ws, const double *X, size_t n, uint32_t k,
                    uint32_t trials, rng *r)
{
    uint32_t d = ws->dim;
    size_t first = (size_t)rng_below(r, n);
    memcpy(ws->cen, X + first * d, d * sizeof(double));
    double pot = 0;
    for (size_t i = 0; i < n; i++) {
        ws->mind[i] = vec_dist2(X + i * d, ws->cen, d);
        pot += ws->mind[i];
    }
    for (uint32_t c = 1; c < k; c++) {
        size_t best_i = 0;
        double best_pot = INFINITY;
        for (uint32_t tr = 0; tr < trials; tr++) {
            size_t cand;
            if (pot > 0)
                cand = sample_by_weight(ws->mind, n, pot, rng_uniform(r));
            else
                cand = (size_t)rng_below(r, n); /* all points coincide */
            const double *xc = X + cand * d;
            double p = 0;
            for (size_t i = 0; i < n; i++) {
                double dd = vec_dist2(X + i * d, xc, d);
                ws->tmp[i] = dd < ws->mind[i] ? dd : ws->mind[i];
                p += ws->tmp[i];
            }
            if (p < best_pot) {
                best_pot = p;
                best_i = cand;
                double *sw = ws->best;
                ws->best = ws->tmp;
                ws->tmp = sw;
            }
        }
        memcpy(ws->cen + (size_t)c * d, X + best_i * d, d * sizeof(double));
        double *sw = ws->mind;
        ws->mind = ws->best;
        ws->best = sw;
        pot = best_pot;
    }
}

/* Assign every row to its nearest centre; returns changed labels and
 * stores each row's squared distance in ws->mind. */
static size_t assign_all(select_ws *ws, const double *X, size_t n, uint32_t k,
                         double *inertia)
{
    uint32_t d = ws->dim;
    size_t changed = 0;
    double in = 0;
    for (size_t i = 0; i < n; i++) {
        const double *x = X + i * d;
        int32_t bl = 0;
        double bd = vec_dist2(x, ws->cen, d);
        for (uint32_t c = 1; c < k; c++) {
            double dd = vec_dist2(x, ws->cen + (size_t)c * d, d);
            if (dd < bd) {
                bd = dd;
                bl = (int32_t)c;
            }
        }
        if (ws->lab[i] != bl) {
            ws->lab[i] = bl;
            changed++;
        }
        ws->mind[i] = bd;
        in += bd;
    }
    *inertia = in;
    return changed;
}

/* Centres <- means of their members; an empty cluster takes the row
 * farthest from its centre (which then leaves its old cluster). */
static void update_centres(select_ws *ws, const double *X, size_t n,
                           uint32_t k)
{
    uint32_t d = ws->dim;
    memset(ws->cen, 0, (size_t)k * d * sizeof(double));
    memset(ws->cnt, 0, (size_t)k * sizeof(double));
    for (size_t i = 0; i < n; i++) {
        int32_t l = ws->lab[i];
        ws->cnt[l] += 1;
        vec_axpy(1.0, X + i * d, ws->cen + (size_t)l * d, d);
    }
    for (uint32_t c = 0; c < k; c++) {
        if (ws->cnt[c] > 0)
            continue;
        size_t far = 0;
        double fd = -1;
        for (size_t i = 0; i < n; i++)
            if (ws->mind[i] > fd && ws->cnt[ws->lab[i]] > 1) {
                fd = ws->mind[i];
                far = i;
            }
        if (fd < 0)
            continue; /* fewer distinct rows than clusters */
        int32_t old = ws->lab[far];
        vec_axpy(-1.0, X + far * d, ws->cen + (size_t)old * d, d);
        ws->cnt[old] -= 1;
        ws->lab[far] = (int32_t)c;
        ws->mind[far] = 0;
        ws->cnt[c] = 1;
        memcpy(ws->cen + (size_t)c * d, X + far * d, d * sizeof(double));
    }
    for (uint32_t c = 0; c < k; c++)
        if (ws->cnt[c] > 0) {
            double inv = 1.0 / ws->cnt[c];
            for (uint32_t j = 0; j < d; j++)
                ws->cen[(size_t)c * d + j] *= inv;
        }
}

int select_kmeans(select_ws *ws, const double *X, size_t n, uint32_t k,
                  const select_kmeans_opts *o, rng *r, double *centers,
                  int32_t *labels, double *inertia)
{
    if (!ws || !X || !o || !r || !centers || k == 0 || n < k ||
        n > ws->n_max || k > ws->k_max || o->restarts == 0 ||
        o->max_iter == 0)
        return CORE_EINVAL;
    uint32_t d = ws->dim;
    uint32_t trials = o->local_trials;
    if (trials == 0)
        trials = 2u + (uint32_t)log((double)k);
    double best_in = INFINITY;
    for (uint32_t rs = 0; rs < o->restarts; rs++) {
        seed_pp(ws, X, n, k, trials, r);
        for (size_t i = 0; i < n; i++)
            ws->lab[i] = -1;
        double in = 0;
        for (uint32_t it = 0;; it++) {
            size_t changed = assign_all(ws, X, n, k, &in);
            if (changed == 0 || it >= o->max_iter)
                break;
            update_centres(ws, X, n, k);
        }
        if (in < best_in) {
            best_in = in;
            memcpy(ws->best_cen, ws->cen, (size_t)k * d * sizeof(double));
            memcpy(ws->best_lab, ws->lab, n * sizeof(int32_t));
        }
    }
    memcpy(centers, ws->best_cen, (size_t)k * d * sizeof(double));
    if (labels)
        memcpy(labels, ws->best_lab, n * sizeof(int32_t));
    if (inertia)
        *inertia = best_in;
    return 0;
}

double select_bic(const double *X, size_t n, uint32_t dim,
                  const double *centers, const int32_t *labels, uint32_t k)
{
    if (n <= k || k == 0)
        return NAN;
    double ss = 0;
    for (size_t i = 0; i < n; i++)
        ss += vec_dist2(X + i * dim, centers + (size_t)labels[i] * dim, dim);
    double R = (double)n, K = (double)k, M = (double)dim;
    double sigma2 = ss / (R - K);
    if (!(sigma2 > 0))
        return NAN;
    /* Cluster sizes, counted without scratch: k passes would be O(nk), so
     * tally in one pass over a small stack array in chunks of clusters. */
    double l = 0;
    enum { CHUNK = 256 };
    double cnt[CHUNK];
    for (uint32_t c0 = 0; c0 < k; c0 += CHUNK) {
        uint32_t c1 = k - c0 < CHUNK ? k : c0 + CHUNK;
        memset(cnt, 0, sizeof cnt);
        for (size_t i = 0; i < n; i++) {
            int32_t lb = labels[i];
            if ((uint32_t)lb >= c0 && (uint32_t)lb < c1)
                cnt[lb - (int32_t)c0] += 1;
        }
        for (uint32_t c = c0; c < c1; c++) {
            double Rn = cnt[c - c0];
            if (Rn <= 0)
                continue;
            l += -Rn / 2 * log(2 * M_PI) - Rn * M / 2 * log(sigma2) -
                 (Rn - K) / 2 + Rn * log(Rn) - Rn * log(R);
        }
    }
    double p = (K - 1) + M * K + 1;
    return l - p / 2 * log(R);
}

int select_silhouette(select_ws *ws, const double *X, size_t n, uint32_t dim,
                      const int32_t *labels, uint32_t k, double *out)
{
    if (!ws || !X || !labels || !out || n > ws->n_max || k > ws->k_max ||
        dim != ws->dim)
        return CORE_EINVAL;
    double *size = ws->sum2, *acc = ws->cnt;
    memset(size, 0, (size_t)k * sizeof(double));
    for (size_t i = 0; i < n; i++) {
        if (labels[i] < 0 || (uint32_t)labels[i] >= k)
            return CORE_EINVAL;
        size[labels[i]] += 1;
    }
    uint32_t nonempty = 0;
    for (uint32_t c = 0; c < k; c++)
        nonempty += size[c] > 0;
    if (nonempty < 2 || nonempty > n - 1)
        return CORE_EINVAL;
    double total = 0;
    for (size_t i = 0; i < n; i++) {
        memset(acc, 0, (size_t)k * sizeof(double));
        const double *xi = X + i * dim;
        for (size_t j = 0; j < n; j++)
            acc[labels[j]] += sqrt(vec_dist2(xi, X + j * dim, dim));
        int32_t li = labels[i];
        if (size[li] <= 1)
            continue; /* s(i) = 0 */
        double a = acc[li] / (size[li] - 1);
        double b = INFINITY;
        for (uint32_t c = 0; c < k; c++)
            if ((int32_t)c != li && size[c] > 0) {
                double m = acc[c] / size[c];
                if (m < b)
                    b = m;
            }
        double den = a > b ? a : b;
        if (den > 0)
            total += (b - a) / den;
    }
    *out = total / (double)n;
    return 0;
}

static int cmp_double(const void *a, const void *b)
{
    double x = *(const double *)a, y = *(const double *)b;
    return (x > y) - (x < y);
}

/* In-place heapsort: glibc's qsort may malloc a merge buffer, and the
 * model calls this while observing, where nothing may allocate. */
static void sift_down(double *a, size_t root, size_t n)
{
    for (;;) {
        size_t child = 2 * root + 1;
        if (child >= n)
            return;
        if (child + 1 < n && cmp_double(&a[child], &a[child + 1]) < 0)
            child++;
        if (cmp_double(&a[root], &a[child]) >= 0)
            return;
        double t = a[root];
        a[root] = a[child];
        a[child] = t;
        root = child;
    }
}

static void sort_doubles(double *a, size_t n)
{
    for (size_t i = n / 2; i-- > 0;)
        sift_down(a, i, n);
    for (size_t end = n; end-- > 1;) {
        double t = a[0];
        a[0] = a[end];
        a[end] = t;
        sift_down(a, 0, end);
    }
}

/* numpy's default percentile: linear interpolation at q (n - 1). */
static double percentile_sorted(const double *s, size_t n, double q)
{
    double pos = q / 100.0 * (double)(n - 1);
    size_t lo = (size_t)floor(pos);
    size_t hi = lo + 1 < n ? lo + 1 : lo;
    double frac = pos - (double)lo;
    return s[lo] + (s[hi] - s[lo]) * frac;
}

double select_fd_width(const double *x, size_t n, double *scratch)
{
    if (n < 4)
        return NAN;
    memcpy(scratch, x, n * sizeof(double));
    sort_doubles(scratch, n);
    double q25 = percentile_sorted(scratch, n, 25);
    double q75 = percentile_sorted(scratch, n, 75);
    return 2.0 * (q75 - q25) / cbrt((double)n);
}

double select_scott_width(const double *x, size_t n)
{
    if (n < 1)
        return NAN;
    double mean = 0;
    for (size_t i = 0; i < n; i++)
        mean += x[i];
    mean /= (double)n;
    double ss = 0;
    for (size_t i = 0; i < n; i++)
        ss += (x[i] - mean) * (x[i] - mean);
    double sigma = sqrt(ss / (double)n);
    return 3.5 * sigma / cbrt((double)n);
}

int select_kmeans_run(const double *X, size_t n, uint32_t dim, uint32_t k,
                      uint32_t restarts, uint32_t max_iter,
                      uint32_t local_trials, uint64_t seed, double *centers,
                      int32_t *labels, double *inertia)
{
    int err;
    select_ws *ws = select_ws_new(n, dim, k, &err);
    if (!ws)
        return err;
    rng r;
    rng_seed(&r, seed);
    select_kmeans_opts o = {restarts, max_iter, local_trials};
    err = select_kmeans(ws, X, n, k, &o, &r, centers, labels, inertia);
    select_ws_free(ws);
    return err;
}

int select_silhouette_run(const double *X, size_t n, uint32_t dim,
                          const int32_t *labels, uint32_t k, double *out)
{
    int err;
    select_ws *ws = select_ws_new(n, dim, k, &err);
    if (!ws)
        return err;
    err = select_silhouette(ws, X, n, dim, labels, k, out);
    select_ws_free(ws);
    return err;
}
