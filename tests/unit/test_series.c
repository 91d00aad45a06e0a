/*
 * test_series.c - core/series on small hand-worked cases.
 *
 * The full comparison against numpy/scipy lives in
 * tests/reference/test_series_ref.py; these cases pin the definitions
 * (which ddof, which mean, which direction is "rise") with values worked
 * by hand from the formulas cited beside each.
 */
#include <setjmp.h>
#include <stdarg.h>
#include <stddef.h>
#include <stdint.h>
#include <cmocka.h>

#include <math.h>

#include "core/series.h"

#define assert_near(a, b, tol)                                               \
    do {                                                                     \
        double a_ = (a), b_ = (b);                                           \
        if (!(fabs(a_ - b_) <= (tol) * (1.0 + fabs(b_)))) {                  \
            print_error("%s = %.17g, expected %.17g\n", #a, a_, b_);         \
            fail();                                                          \
        }                                                                    \
    } while (0)

static const double T[] = {0.0, 1.0, 2.0, 4.0};
static const double V[] = {10.0, 12.0, 11.0, 15.0};
static const double E[] = {1.0, 1.0, 2.0, 2.0};

static void test_moments(void **state)
{
    (void)state;
    /* mean 12, deviations -2 0 -1 3: sum sq 14 */
    assert_near(series_std(V, 4), sqrt(14.0 / 3.0), 1e-15); /* ddof = 1 */
    /* m2 = 14/4, m3 = (-8 + 0 - 1 + 27)/4 = 4.5;
     * G1 = sqrt(4*3)/2 * m3 / m2^1.5 (scipy.stats.skew, bias=False) */
    assert_near(series_skew(V, 4), sqrt(12.0) / 2.0 * 4.5 / pow(3.5, 1.5), 1e-14);
    /* m4 = (16 + 0 + 1 + 81)/4 = 24.5, g2 = m4/m2^2 - 3;
     * G2 = (n-1)/((n-2)(n-3)) ((n+1) g2 + 6) (scipy.stats.kurtosis) */
    double g2 = 24.5 / (3.5 * 3.5) - 3.0;
    assert_near(series_kurtosis(V, 4), 3.0 / 2.0 * (5.0 * g2 + 6.0), 1e-14);
    assert_true(isnan(series_skew(V, 2)));
    assert_true(isnan(series_kurtosis(V, 3)));
}

static void test_weighted(void **state)
{
    (void)state;
    /* weights 1 1 .25 .25: (10 + 12 + 2.75 + 3.75) / 2.5 = 11.4 */
    assert_near(series_wmean(V, E, 4), 11.4, 1e-15);
    /* chi2 = (1.4^2 + 0.6^2 + (0.4/2)^2 + (3.6/2)^2) / 3 */
    assert_near(series_chi2_red(V, E, 4),
                (1.96 + 0.36 + 0.04 + 3.24) / 3.0, 1e-14);
    /* std = 2.160; |v - 11.4| = 1.4 0.6 0.4 3.6 -> one beyond */
    assert_near(series_beyond_1sigma(V, E, 4), 0.25, 0);
    double e0[] = {1.0, 0.0, 1.0, 1.0};
    assert_true(isnan(series_wmean(V, e0, 4)));
}

static void test_order_statistics(void **state)
{
    (void)state;
    double scratch[4];
    /* median 11.5; |dev| 1.5 .5 .5 3.5 -> median 1.0 */
    assert_near(series_mad(V, 4, scratch), 1.0, 0);
    assert_near(series_amplitude(V, 4), 5.0, 0);
    assert_near(series_span(T, 4), 4.0, 0);
    assert_near(series_latest_minus_mean(V, 4), 3.0, 0);
    double a[] = {5.0, 1.0, 4.0, 2.0, 3.0};
    assert_near(series_median_inplace(a, 5), 3.0, 0);
}

static void test_successive(void **state)
{
    (void)state;
    /* rates per day: +2, -1, +2 (4/2).  Fading (value up) max 2;
     * brightening max 1 (the 12 -> 11 step). */
    assert_near(series_fade_rate(T, V, 4), 2.0, 0);
    assert_near(series_rise_rate(T, V, 4), 1.0, 0);
    /* von Neumann 1941: delta^2 = (4 + 1 + 16)/3 = 7, s^2 = 14/4 */
    assert_near(series_von_neumann(V, 4), 7.0 / 3.5, 1e-15);
    /* least squares: tbar 1.75, vbar 12; Stt = 8.75,
     * Stv = (-1.75)(-2) + (-.75)(0) + (.25)(-1) + (2.25)(3) = 10 */
    assert_near(series_slope(T, V, 4), 10.0 / 8.75, 1e-15);
}

static void test_stetson(void **state)
{
    (void)state;
    /* Stetson 1996 eq. 2: delta = sqrt(4/3) (v - 11.4) / e */
    double f = sqrt(4.0 / 3.0);
    double d[4] = {f * -1.4, f * 0.6, f * -0.2, f * 1.8};
    double j = 0.0, sa = 0.0, s2 = 0.0;
    for (int i = 0; i < 3; i++) {
        double p = d[i] * d[i + 1];
        j += (p > 0 ? 1.0 : -1.0) * sqrt(fabs(p));
    }
    for (int i = 0; i < 4; i++) {
        sa += fabs(d[i]);
        s2 += d[i] * d[i];
    }
    assert_near(series_stetson_j(V, E, 4), j / 3.0, 1e-14);         /* eq. 1 */
    assert_near(series_stetson_k(V, E, 4), (sa / 4) / sqrt(s2 / 4), 1e-14); /* eq. 3 */
}

static void test_table(void **state)
{
    (void)state;
    assert_int_equal(series_stat_from_name("stetson_k"), SERIES_STETSON_K);
    assert_int_equal(series_stat_from_name("nope"), -1);
    assert_string_equal(series_stat_name(SERIES_MAD), "mad");
    for (int k = 0; k < SERIES_STAT_COUNT_; k++) {
        size_t m = series_min_points(k);
        double scratch[8];
        if (m > 0)
            assert_true(isnan(series_compute(k, T, V, E, m - 1, scratch)));
        assert_true(!isnan(series_compute(k, T, V, E, 4, scratch)));
    }
}

int main(void)
{
    const struct CMUnitTest tests[] = {
        cmocka_unit_test(test_moments),  cmocka_unit_test(test_weighted),
        cmocka_unit_test(test_order_statistics),
        cmocka_unit_test(test_successive), cmocka_unit_test(test_stetson),
        cmocka_unit_test(test_table),
    };
    return cmocka_run_group_tests(tests, NULL, NULL);
}
