/*
 * series.c - light-curve statistics (see series.h for the contract).
 *
 * Every statistic is a direct, two-pass evaluation of its published
 * formula: first the mean, then the central sums, so the results agree
 * with numpy/scipy to rounding (the reference test asks for 1e-9
 * relative).  Nothing here allocates; the median works in caller scratch
 * with an in-place quickselect.
 *
 * Notation: n points (t_i, v_i, e_i), i = 0..n-1, sorted by time.
 *   mean  = (1/n) sum v_i
 *   m_k   = (1/n) sum (v_i - mean)^k          (biased central moments)
 *   wmean = sum w_i v_i / sum w_i, w_i = 1/e_i^2
 */
#include "series.h"

#include <math.h>
#include <string.h>

static const struct {
    const char *name;
    size_t min_points;
} series_table[SERIES_STAT_COUNT_] = {
#define SERIES_STAT_ROW(sym, name, minp) {name, minp},
    SERIES_STAT_MAP(SERIES_STAT_ROW)
#undef SERIES_STAT_ROW
};

const char *series_stat_name(int kind)
{
    if (kind < 0 || kind >= SERIES_STAT_COUNT_)
        return "?";
    return series_table[kind].name;
}

int series_stat_from_name(const char *name)
{
    if (!name)
        return -1;
    for (int k = 0; k < SERIES_STAT_COUNT_; k++)
        if (strcmp(series_table[k].name, name) == 0)
            return k;
    return -1;
}

size_t series_min_points(int kind)
{
    if (kind < 0 || kind >= SERIES_STAT_COUNT_)
        return (size_t)-1;
    return series_table[kind].min_points;
}

int series_needs_err(int kind)
{
    switch (kind) {
    case SERIES_WMEAN:
    case SERIES_STETSON_J:
    case SERIES_STETSON_K:
    case SERIES_CHI2_RED:
    case SERIES_BEYOND_1SIGMA:
        return 1;
    default:
        return 0;
    }
}

static double mean_of(const double *v, size_t n)
{
    double s = 0.0;
    for (size_t i = 0; i < n; i++)
        s += v[i];
    return s / (double)n;
}

/* sum (v_i - mean)^2 */
static double ss_of(const double *v, size_t n, double mean)
{
    double s = 0.0;
    for (size_t i = 0; i < n; i++) {
        double d = v[i] - mean;
        s += d * d;
    }
    return s;
}

static int errors_ok(const double *e, size_t n)
{
    if (!e)
        return 0;
    for (size_t i = 0; i < n; i++)
        if (!(e[i] > 0.0) || !isfinite(e[i]))
            return 0;
    return 1;
}

double series_count(size_t n)
{
    return (double)n;
}

/* span = max t - min t (days). */
double series_span(const double *t, size_t n)
{
    if (n < 1)
        return NAN;
    double lo = t[0], hi = t[0];
    for (size_t i = 1; i < n; i++) {
        if (t[i] < lo)
            lo = t[i];
        if (t[i] > hi)
            hi = t[i];
    }
    return hi - lo;
}

/* amplitude = max v - min v. */
double series_amplitude(const double *v, size_t n)
{
    return series_span(v, n);
}

/* wmean = sum(v_i / e_i^2) / sum(1 / e_i^2): the inverse-variance
 * weighted mean (common practice). */
double series_wmean(const double *v, const double *e, size_t n)
{
    if (n < 1 || !errors_ok(e, n))
        return NAN;
    double sw = 0.0, swv = 0.0;
    for (size_t i = 0; i < n; i++) {
        double w = 1.0 / (e[i] * e[i]);
        sw += w;
        swv += w * v[i];
    }
    return swv / sw;
}

/* std = sqrt( sum (v_i - mean)^2 / (n - 1) ): the sample standard
 * deviation, numpy.std(v, ddof=1). */
double series_std(const double *v, size_t n)
{
    if (n < 2)
        return NAN;
    double m = mean_of(v, n);
    return sqrt(ss_of(v, n, m) / (double)(n - 1));
}

/* Adjusted Fisher-Pearson skewness (scipy.stats.skew, bias=False):
 *   g1 = m_3 / m_2^(3/2),  G1 = sqrt(n (n-1)) / (n-2) * g1.
 * NaN when m_2 == 0. */
double series_skew(const double *v, size_t n)
{
    if (n < 3)
        return NAN;
    double m = mean_of(v, n), m2 = 0.0, m3 = 0.0;
    for (size_t i = 0; i < n; i++) {
        double d = v[i] - m;
        m2 += d * d;
        m3 += d * d * d;
    }
    m2 /= (double)n;
    m3 /= (double)n;
    if (!(m2 > 0.0))
        return NAN;
    double dn = (double)n;
    double g1 = m3 / pow(m2, 1.5);
    return sqrt(dn * (dn - 1.0)) / (dn - 2.0) * g1;
}

/* Excess kurtosis with the bias correction (scipy.stats.kurtosis,
 * fisher=True, bias=False):
 *   g2 = m_4 / m_2^2 - 3,
 *   G2 = (n-1) / ((n-2)(n-3)) * ((n+1) g2 + 6).
 * NaN when m_2 == 0. */
double series_kurtosis(const double *v, size_t n)
{
    if (n < 4)
        return NAN;
    double m = mean_of(v, n), m2 = 0.0, m4 = 0.0;
    for (size_t i = 0; i < n; i++) {
        double d2 = (v[i] - m) * (v[i] - m);
        m2 += d2;
        m4 += d2 * d2;
    }
    m2 /= (double)n;
    m4 /= (double)n;
    if (!(m2 > 0.0))
        return NAN;
    double dn = (double)n;
    double g2 = m4 / (m2 * m2) - 3.0;
    return (dn - 1.0) / ((dn - 2.0) * (dn - 3.0)) * ((dn + 1.0) * g2 + 6.0);
}

/* von Neumann (1941) ratio eta = delta^2 / s^2 with the mean square
 * successive difference delta^2 = sum_{i<n-1} (v_{i+1} - v_i)^2 / (n-1)
 * and von Neumann's variance s^2 = sum (v_i - mean)^2 / n (ddof = 0).
 * For independent normal values E[eta] = 2n/(n-1).  NaN when s^2 == 0. */
double series_von_neumann(const double *v, size_t n)
{
    if (n < 2)
        return NAN;
    double m = mean_of(v, n);
    double s2 = ss_of(v, n, m) / (double)n;
    if (!(s2 > 0.0))
        return NAN;
    double d2 = 0.0;
    for (size_t i = 0; i + 1 < n; i++) {
        double d = v[i + 1] - v[i];
        d2 += d * d;
    }
    d2 /= (double)(n - 1);
    return d2 / s2;
}

/* Stetson (1996, PASP 108, 851) residuals, eq. 2 there:
 *   delta_i = sqrt(n / (n-1)) * (v_i - wmean) / e_i.
 * We use the inverse-variance weighted mean, not the paper's iteratively
 * reweighted robust mean. */
static int stetson_deltas_ok(const double *v, const double *e, size_t n,
                             double *wm)
{
    if (n < 2 || !errors_ok(e, n))
        return 0;
    *wm = series_wmean(v, e, n);
    return isfinite(*wm);
}

/* Stetson J, the single-band form with successive pairs (Stetson 1996
 * eq. 1 with every observation paired to the next, all weights 1):
 *   P_k = delta_k * delta_{k+1},  k = 0..n-2,
 *   J   = (1/(n-1)) sum_k sgn(P_k) sqrt(|P_k|). */
double series_stetson_j(const double *v, const double *e, size_t n)
{
    double wm;
    if (!stetson_deltas_ok(v, e, n, &wm))
        return NAN;
    double f = sqrt((double)n / (double)(n - 1));
    double s = 0.0;
    double dprev = f * (v[0] - wm) / e[0];
    for (size_t i = 1; i < n; i++) {
        double d = f * (v[i] - wm) / e[i];
        double p = dprev * d;
        s += (p > 0.0 ? 1.0 : (p < 0.0 ? -1.0 : 0.0)) * sqrt(fabs(p));
        dprev = d;
    }
    return s / (double)(n - 1);
}

/* Stetson K (Stetson 1996 eq. 3):
 *   K = (1/n) sum |delta_i| / sqrt( (1/n) sum delta_i^2 ).
 * NaN when every delta is 0. */
double series_stetson_k(const double *v, const double *e, size_t n)
{
    double wm;
    if (!stetson_deltas_ok(v, e, n, &wm))
        return NAN;
    double f = sqrt((double)n / (double)(n - 1));
    double sa = 0.0, s2 = 0.0;
    for (size_t i = 0; i < n; i++) {
        double d = f * (v[i] - wm) / e[i];
        sa += fabs(d);
        s2 += d * d;
    }
    if (!(s2 > 0.0))
        return NAN;
    double dn = (double)n;
    return (sa / dn) / sqrt(s2 / dn);
}

/* Ordinary least-squares slope of v against t (numpy.polyfit(t, v, 1)[0]):
 *   slope = sum (t_i - tbar)(v_i - vbar) / sum (t_i - tbar)^2.
 * NaN when every t is equal. */
double series_slope(const double *t, const double *v, size_t n)
{
    if (n < 2)
        return NAN;
    double tm = mean_of(t, n), vm = mean_of(v, n);
    double stt = 0.0, stv = 0.0;
    for (size_t i = 0; i < n; i++) {
        double dt = t[i] - tm;
        stt += dt * dt;
        stv += dt * (v[i] - vm);
    }
    if (!(stt > 0.0))
        return NAN;
    return stv / stt;
}

/* Pooled within-band slope (the common slope of an ANCOVA, equal to the
 * t coefficient of OLS v ~ t + band dummies):
 *   slope = sum_b sum_{i in b} (t_i - tbar_b)(v_i - vbar_b)
 *           / sum_b sum_{i in b} (t_i - tbar_b)^2,
 * over bands b with n_b >= 2.  A one-point band would add 0 to both sums
 * anyway; it is skipped explicitly so the rule reads as written.  Two
 * passes: the band means first, then the centred sums. */
double series_pooled_slope(const double *t, const double *v, const int *band,
                           size_t n)
{
    size_t cnt[SERIES_POOL_MAX_BANDS] = {0};
    double st[SERIES_POOL_MAX_BANDS] = {0}, sv[SERIES_POOL_MAX_BANDS] = {0};
    for (size_t i = 0; i < n; i++) {
        int b = band[i];
        if (b < 0 || b >= SERIES_POOL_MAX_BANDS)
            continue;
        cnt[b]++;
        st[b] += t[i];
        sv[b] += v[i];
    }
    for (int b = 0; b < SERIES_POOL_MAX_BANDS; b++) {
        if (cnt[b]) {
            st[b] /= (double)cnt[b];
            sv[b] /= (double)cnt[b];
        }
    }
    double stt = 0.0, stv = 0.0;
    for (size_t i = 0; i < n; i++) {
        int b = band[i];
        if (b < 0 || b >= SERIES_POOL_MAX_BANDS || cnt[b] < 2)
            continue;
        double dt = t[i] - st[b];
        stt += dt * dt;
        stv += dt * (v[i] - sv[b]);
    }
    if (!(stt > 0.0))
        return NAN;
    return stv / stt;
}

/* Steepest change between successive points, value units per day.
 * sign = -1: brightening (value falling), sign = +1: fading.  Pairs with
 * equal times are skipped; NaN when no pair has t_{i+1} > t_i. */
static double steepest(const double *t, const double *v, size_t n,
                       double sign)
{
    if (n < 2)
        return NAN;
    double best = NAN;
    for (size_t i = 0; i + 1 < n; i++) {
        double dt = t[i + 1] - t[i];
        if (!(dt > 0.0))
            continue;
        double r = sign * (v[i + 1] - v[i]) / dt;
        if (isnan(best) || r > best)
            best = r;
    }
    return best;
}

/* rise_rate = max_i -(v_{i+1} - v_i) / (t_{i+1} - t_i): the steepest
 * brightening between successive points, magnitudes per day (negative
 * when the source only faded). */
double series_rise_rate(const double *t, const double *v, size_t n)
{
    return steepest(t, v, n, -1.0);
}

/* fade_rate = max_i (v_{i+1} - v_i) / (t_{i+1} - t_i): the steepest
 * fading between successive points, magnitudes per day. */
double series_fade_rate(const double *t, const double *v, size_t n)
{
    return steepest(t, v, n, 1.0);
}

/* Reduced chi-square against the weighted constant:
 *   chi2_red = sum ((v_i - wmean) / e_i)^2 / (n - 1). */
double series_chi2_red(const double *v, const double *e, size_t n)
{
    if (n < 2)
        return NAN;
    double wm = series_wmean(v, e, n);
    if (!isfinite(wm))
        return NAN;
    double s = 0.0;
    for (size_t i = 0; i < n; i++) {
        double r = (v[i] - wm) / e[i];
        s += r * r;
    }
    return s / (double)(n - 1);
}

/* Fraction of points with |v_i - wmean| > std (ddof = 1): the share
 * beyond one standard deviation from the weighted mean (common
 * practice). */
double series_beyond_1sigma(const double *v, const double *e, size_t n)
{
    if (n < 2)
        return NAN;
    double wm = series_wmean(v, e, n);
    double sd = series_std(v, n);
    if (!isfinite(wm) || !isfinite(sd))
        return NAN;
    size_t c = 0;
    for (size_t i = 0; i < n; i++)
        if (fabs(v[i] - wm) > sd)
            c++;
    return (double)c / (double)n;
}

/* k-th smallest (0-based) of a[0..n-1], reordering a so that a[k] holds
 * it, everything before is <= it and everything after >= it (Wirth's
 * selection, "Algorithms + Data Structures = Programs", 1976). */
static double select_kth(double *a, size_t n, size_t k)
{
    long l = 0, m = (long)n - 1, kk = (long)k;
    while (l < m) {
        double x = a[kk];
        long i = l, j = m;
        do {
            while (a[i] < x)
                i++;
            while (x < a[j])
                j--;
            if (i <= j) {
                double tmp = a[i];
                a[i] = a[j];
                a[j] = tmp;
                i++;
                j--;
            }
        } while (i <= j);
        if (j < kk)
            l = i;
        if (kk < i)
            m = j;
    }
    return a[kk];
}

double series_median_inplace(double *a, size_t n)
{
    if (n == 0)
        return NAN;
    double hi = select_kth(a, n, n / 2);
    if (n % 2)
        return hi;
    /* After selection every a[i], i < n/2, is <= hi: the lower middle is
     * their maximum. */
    double lo = a[0];
    for (size_t i = 1; i < n / 2; i++)
        if (a[i] > lo)
            lo = a[i];
    return 0.5 * (lo + hi);
}

/* Median absolute deviation: median_i |v_i - median(v)| (unscaled). */
double series_mad(const double *v, size_t n, double *scratch)
{
    if (n < 1 || !scratch)
        return NAN;
    memcpy(scratch, v, n * sizeof *scratch);
    double med = series_median_inplace(scratch, n);
    for (size_t i = 0; i < n; i++)
        scratch[i] = fabs(v[i] - med);
    return series_median_inplace(scratch, n);
}

/* latest_minus_mean = v_{n-1} - mean(v): the newest value against the
 * arithmetic mean of all n. */
double series_latest_minus_mean(const double *v, size_t n)
{
    if (n < 1)
        return NAN;
    return v[n - 1] - mean_of(v, n);
}

double series_compute(int kind, const double *t, const double *v,
                      const double *e, size_t n, double *scratch)
{
    switch (kind) {
    case SERIES_COUNT: return series_count(n);
    case SERIES_SPAN: return series_span(t, n);
    case SERIES_AMPLITUDE: return series_amplitude(v, n);
    case SERIES_WMEAN: return series_wmean(v, e, n);
    case SERIES_STD: return series_std(v, n);
    case SERIES_SKEW: return series_skew(v, n);
    case SERIES_KURTOSIS: return series_kurtosis(v, n);
    case SERIES_VON_NEUMANN: return series_von_neumann(v, n);
    case SERIES_STETSON_J: return series_stetson_j(v, e, n);
    case SERIES_STETSON_K: return series_stetson_k(v, e, n);
    case SERIES_SLOPE: return series_slope(t, v, n);
    case SERIES_RISE_RATE: return series_rise_rate(t, v, n);
    case SERIES_FADE_RATE: return series_fade_rate(t, v, n);
    case SERIES_CHI2_RED: return series_chi2_red(v, e, n);
    case SERIES_BEYOND_1SIGMA: return series_beyond_1sigma(v, e, n);
    case SERIES_MAD: return series_mad(v, n, scratch);
    case SERIES_LATEST_MINUS_MEAN: return series_latest_minus_mean(v, n);
    default: return NAN;
    }
}
