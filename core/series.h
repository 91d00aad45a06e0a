/*
 * series.h - light-curve statistics over one detection history.
 *
 * Input is three parallel arrays (time in days, value, 1-sigma error) of n
 * points, already filtered to one band (or all bands) and sorted by time,
 * oldest first (order matters for the von Neumann ratio, Stetson J, rise
 * and fade rates and "latest").  Values are magnitudes where a direction
 * matters: brighter = smaller value.
 *
 * Contract shared by every statistic:
 * - It returns NaN ("missing") when n is below series_min_points(kind), or
 *   when the formula is undefined for the data (zero variance, zero time
 *   range, a non-positive or non-finite error where errors are needed).
 * - Inputs are assumed finite; the caller drops non-finite points first.
 * - Nothing is allocated.  Only series_mad() and series_compute() (for
 *   SERIES_MAD) need scratch: n doubles from the caller.
 * - Every entry point takes plain pointers and sizes so the reference
 *   tests can call it through ctypes.
 */
#ifndef ODDSKY_CORE_SERIES_H
#define ODDSKY_CORE_SERIES_H

#include <stddef.h>

/* X(enum suffix, config name, minimum number of points) */
#define SERIES_STAT_MAP(X)                                                    \
    X(COUNT, "count", 0)                                                      \
    X(SPAN, "span", 1)                                                        \
    X(AMPLITUDE, "amplitude", 1)                                              \
    X(WMEAN, "wmean", 1)                                                      \
    X(STD, "std", 2)                                                          \
    X(SKEW, "skew", 3)                                                        \
    X(KURTOSIS, "kurtosis", 4)                                                \
    X(VON_NEUMANN, "von_neumann", 2)                                          \
    X(STETSON_J, "stetson_j", 2)                                              \
    X(STETSON_K, "stetson_k", 2)                                              \
    X(SLOPE, "slope", 2)                                                      \
    X(RISE_RATE, "rise_rate", 2)                                              \
    X(FADE_RATE, "fade_rate", 2)                                              \
    X(CHI2_RED, "chi2_red", 2)                                                \
    X(BEYOND_1SIGMA, "beyond_1sigma", 2)                                      \
    X(MAD, "mad", 1)                                                          \
    X(LATEST_MINUS_MEAN, "latest_minus_mean", 1)

typedef enum series_stat {
#define SERIES_STAT_ENUM(sym, name, minp) SERIES_##sym,
    SERIES_STAT_MAP(SERIES_STAT_ENUM)
#undef SERIES_STAT_ENUM
    SERIES_STAT_COUNT_
} series_stat;

/* Config name of a statistic ("?" for an out-of-range kind). */
const char *series_stat_name(int kind);

/* Kind for a config name, or -1 when unknown. */
int series_stat_from_name(const char *name);

/* Smallest n for which the statistic is defined (see the map above). */
size_t series_min_points(int kind);

/* Whether the statistic uses the errors (then every error must be > 0). */
int series_needs_err(int kind);

/* Statistic `kind` over the n points.  scratch: n doubles, used only for
 * SERIES_MAD (may be NULL otherwise).  Returns NaN for an unknown kind. */
double series_compute(int kind, const double *t, const double *v,
                      const double *e, size_t n, double *scratch);

/* The statistics one by one.  Formulas are written beside each in
 * series.c; all are NaN below their minimum point count. */
double series_count(size_t n);
double series_span(const double *t, size_t n);           /* t_last - t_first */
double series_amplitude(const double *v, size_t n);      /* max - min */
double series_wmean(const double *v, const double *e, size_t n);
double series_std(const double *v, size_t n);            /* ddof = 1 */
double series_skew(const double *v, size_t n);           /* G1, unbiased */
double series_kurtosis(const double *v, size_t n);       /* G2, Fisher */
double series_von_neumann(const double *v, size_t n);
double series_stetson_j(const double *v, const double *e, size_t n);
double series_stetson_k(const double *v, const double *e, size_t n);
double series_slope(const double *t, const double *v, size_t n);
double series_rise_rate(const double *t, const double *v, size_t n);
double series_fade_rate(const double *t, const double *v, size_t n);
double series_chi2_red(const double *v, const double *e, size_t n);
double series_beyond_1sigma(const double *v, const double *e, size_t n);
double series_mad(const double *v, size_t n, double *scratch);
double series_latest_minus_mean(const double *v, size_t n);

/* Bands series_pooled_slope() can tell apart: band ids 0..this-1. */
#define SERIES_POOL_MAX_BANDS 64

/* Pooled within-band (common) slope of v against t, the slope of the
 * OLS fit v ~ t + one dummy per band (ANCOVA with a common slope):
 * each band is centred on its own means, so constant offsets between
 * bands do not enter.  band[i] is point i's band id; points whose id is
 * outside 0..SERIES_POOL_MAX_BANDS-1 are ignored, and bands with fewer
 * than 2 points contribute nothing.  Order does not matter.  NaN when no
 * band has 2 points at distinct times (zero denominator).  Nothing is
 * allocated. */
double series_pooled_slope(const double *t, const double *v, const int *band,
                           size_t n);

/* Median of n values (numpy.median convention: mean of the two middle
 * values for even n).  Reorders a[]; NaN for n == 0. */
double series_median_inplace(double *a, size_t n);

#endif
