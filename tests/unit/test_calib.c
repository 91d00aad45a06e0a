/*
 * test_calib.c - the score calibrator: parameter bounds, allocation
 * failure, the empty state, tail fractions at cell edges and inside a
 * cell, threshold as the inverse of the tail, outer cells, decay weights
 * and exact renormalisation, the rate estimate, flag policies, histogram
 * export, save/load continuation.
 *
 * Expected values come from the definitions in core/calib.h (tail =
 * decayed mass >= s over total, uniform in asinh(s) inside a cell), the
 * decay closed form 2^(-(t - t_i)/H), and the steady-rate integral
 * r H (1 - 2^(-T/H)) / ln 2, computed by hand in each test.
 */
#define _GNU_SOURCE
#include <dlfcn.h>
#include <math.h>
#include <setjmp.h>
#include <stdarg.h>
#include <stddef.h>
#include <stdint.h>
#include <stdio.h>
#include <stdlib.h>
#include <string.h>

#include <cmocka.h>

#include "core/calib.h"
#include "core/err.h"
#include "core/rng.h"

#include "failalloc.h"

#define assert_near(a, b, eps)                                              \
    do {                                                                    \
        double a_ = (a), b_ = (b);                                          \
        if (!(fabs(a_ - b_) <= (eps)))                                      \
            fail_msg("%s = %.17g, expected %.17g", #a, a_, b_);             \
    } while (0)

#define assert_same(a, b)                                                   \
    do {                                                                    \
        double a_ = (a), b_ = (b);                                          \
        if (memcmp(&a_, &b_, sizeof a_) != 0)                               \
            fail_msg("%s = %.17g, expected bit-identical %.17g", #a, a_,   \
                     b_);                                                   \
    } while (0)

static calib *make(uint32_t bins, double H, int policy)
{
    calib_params p;
    calib_params_default(&p);
    p.bins = bins;
    p.half_life_days = H;
    p.policy = policy;
    int err = -100;
    calib *c = calib_new(&p, &err);
    assert_non_null(c);
    assert_int_equal(err, 0);
    return c;
}

/* Centre (in asinh) of grid cell k, in score units. */
static double centre(const calib *c, uint32_t k)
{
    return sinh(0.5 * (asinh(calib_edge(c, k)) + asinh(calib_edge(c, k + 1))));
}

static void test_params_and_alloc_failure(void **state)
{
    /* valgrind replaces malloc, so the failing-allocator shim never
     * fires under it; the plain unit run covers this test. */
    if (getenv("ODDSKY_UNDER_VALGRIND"))
        skip();
    (void)state;
    calib_params p;
    const char *field = NULL;
    int err = 0;
    calib_params_default(&p);
    assert_int_equal(calib_params_check(&p, &field), 0);
    /* defaults of core/model.h: 2048 bins, half-life 3 d, budget policy,
     * alpha 1e-3, 10 flags per hour, prior rate 1e5 per hour */
    assert_int_equal(p.bins, 2048);
    assert_same(p.half_life_days, 3.0);
    assert_int_equal(p.policy, CALIB_POLICY_BUDGET);
    assert_same(p.alpha, 1e-3);
    assert_same(p.budget_per_hour, 10.0);
    assert_same(p.prior_rate_per_hour, 1e5);
    static const char *const bad[] = {
        "bins", "limit", "half_life_days", "policy", "alpha",
        "budget_per_hour", "prior_rate_per_hour", "min_span_days"};
    for (int i = 0; i < 8; i++) {
        calib_params_default(&p);
        switch (i) {
        case 0: p.bins = CALIB_MIN_BINS - 1; break;
        case 1: p.limit = 0; break;
        case 2: p.half_life_days = INFINITY; break;
        case 3: p.policy = 7; break;
        case 4: p.alpha = 1.5; break;
        case 5: p.budget_per_hour = 0; break;
        case 6: p.prior_rate_per_hour = NAN; break;
        case 7: p.min_span_days = -1; break;
        }
        field = NULL;
        assert_int_equal(calib_params_check(&p, &field), CORE_ERANGE);
        assert_string_equal(field, bad[i]);
        assert_null(calib_new(&p, &err));
        assert_int_equal(err, CORE_EINVAL);
    }
    calib_params_default(&p);
    int failures = 0;
    for (long i = 0;; i++) {
        fa_countdown = i;
        calib *c = calib_new(&p, &err);
        fa_countdown = -1;
        if (c) {
            calib_free(c);
            break;
        }
        assert_int_equal(err, CORE_ENOMEM);
        failures++;
    }
    printf("calib_new: %d allocation points fail cleanly\n", failures);
    assert_int_equal(failures, 2);
    calib_free(NULL);
}

static void test_empty_state(void **state)
{
    (void)state;
    calib *c = make(256, 3, CALIB_POLICY_BUDGET);
    assert_same(calib_tail_prob(c, 0.0), 1.0);
    assert_same(calib_tail_prob(c, 1e9), 1.0);
    assert_same(calib_threshold(c), INFINITY);
    assert_false(calib_should_flag(c, 1e9));
    assert_same(calib_rate_per_hour(c), 1e5);
    assert_same(calib_expected_per_night(c), 0.0);
    assert_same(calib_mass(c), 0.0);
    assert_true(isnan(calib_time(c)));
    double e[5], m[4];
    assert_int_equal(calib_histogram(c, e, m, 4), 0);
    assert_int_equal(calib_observe(c, NAN, 1.0), CORE_EINVAL);
    assert_same(calib_mass(c), 0.0);
    /* grid edges: symmetric, +-limit at the ends */
    assert_near(calib_edge(c, 0), -1e6, 1e-3);
    assert_near(calib_edge(c, 256), 1e6, 1e-3);
    assert_near(calib_edge(c, 128), 0.0, 1e-9);
    calib_free(c);
}

/* One score per cell centre for cells 100..199 (weights equal, H = 0):
 * at an edge the tail is an exact count; a quarter into a lone cell it is
 * 3/4 of that cell (uniform in asinh). */
static void test_tail_edges_and_interpolation(void **state)
{
    (void)state;
    calib *c = make(256, 0, CALIB_POLICY_ALPHA);
    for (uint32_t k = 100; k < 200; k++)
        assert_int_equal(calib_observe(c, centre(c, k), 10.0), 0);
    for (uint32_t k = 100; k <= 200; k += 5)
        assert_near(calib_tail_prob(c, calib_edge(c, k)),
                    (200.0 - k) / 100.0, 1e-12);
    assert_same(calib_tail_prob(c, calib_edge(c, 50)), 1.0);
    assert_same(calib_tail_prob(c, calib_edge(c, 220)), 0.0);
    double a0 = asinh(calib_edge(c, 150)), a1 = asinh(calib_edge(c, 151));
    double quarter = sinh(a0 + 0.25 * (a1 - a0));
    assert_near(calib_tail_prob(c, quarter), (49.0 + 0.75) / 100.0, 1e-12);
    /* monotone non-increasing on a fine sweep */
    double prev = 1.0;
    for (double s = -5e5; s < 5e5; s = s < 0 ? s / 1.01 + 1e-3 : s * 1.01 + 1e-3) {
        double t = calib_tail_prob(c, s);
        assert_true(t <= prev + 1e-15);
        prev = t;
    }
    calib_free(c);
}

/* threshold() inverts tail_prob() for in-grid quantiles. */
static void test_threshold_inverts_tail(void **state)
{
    (void)state;
    calib_params p;
    calib_params_default(&p);
    p.policy = CALIB_POLICY_ALPHA;
    p.half_life_days = 1.0;
    rng r;
    rng_seed(&r, 4);
    const double alphas[] = {0.5, 0.1, 1e-2, 1e-3, 1e-4};
    for (int ai = 0; ai < 5; ai++) {
        p.alpha = alphas[ai];
        calib *c = calib_new(&p, NULL);
        assert_non_null(c);
        double t = 60000.0;
        for (int i = 0; i < 50000; i++)
            calib_observe(c, 3.0 + 2.0 * rng_normal(&r) +
                                 (i % 97 == 0 ? 1e3 * rng_uniform(&r) : 0),
                          t += 1e-4);
        double thr = calib_threshold(c);
        assert_true(isfinite(thr));
        assert_near(calib_tail_prob(c, thr) / p.alpha, 1.0, 1e-9);
        assert_true(calib_should_flag(c, thr + fabs(thr) * 1e-6 + 1e-9));
        assert_false(calib_should_flag(c, thr - fabs(thr) * 1e-2 - 1e-6));
        calib_free(c);
    }
}

static void test_outer_cells(void **state)
{
    (void)state;
    calib *c = make(256, 0, CALIB_POLICY_ALPHA);
    calib_observe(c, -1e7, 1.0);
    calib_observe(c, -INFINITY, 1.0);
    calib_observe(c, 0.0, 1.0);
    calib_observe(c, 1e8, 1.0);
    calib_observe(c, INFINITY, 1.0);
    double under, over;
    calib_outside(c, &under, &over);
    assert_same(under, 2.0);
    assert_same(over, 2.0);
    assert_same(calib_mass(c), 5.0);
    /* overflow counts as +infinity, underflow as -limit */
    assert_same(calib_tail_prob(c, 5e9), 2.0 / 5.0);
    assert_same(calib_tail_prob(c, -5e9), 1.0);
    assert_near(calib_tail_prob(c, -9.9e5), 3.0 / 5.0, 1e-12);
    /* alpha = 1e-3 < over / total: every score beyond the grid */
    assert_same(calib_threshold(c), 1e6);
    calib_free(c);

    /* a target that needs the underflow cell: -infinity */
    calib_params p;
    calib_params_default(&p);
    p.policy = CALIB_POLICY_ALPHA;
    p.alpha = 0.9;
    p.half_life_days = 0;
    c = calib_new(&p, NULL);
    calib_observe(c, -1e7, 1.0);
    calib_observe(c, 1.0, 1.0);
    assert_same(calib_threshold(c), -INFINITY);
    assert_true(calib_should_flag(c, -1e12) == (calib_tail_prob(c, -1e12) <= 0.9));
    calib_free(c);
}

/* Weights 2^(-(t - t_i)/H); renormalisation by 2^-60 exact. */
static void test_decay_and_renormalisation(void **state)
{
    (void)state;
    calib *c = make(256, 1.0, CALIB_POLICY_ALPHA);
    calib_observe(c, 10.0, 0.0);
    calib_observe(c, -10.0, 1.0);
    /* at t = 1: weights 1/2 (score 10) and 1 (score -10) */
    assert_same(calib_mass(c), 1.5);
    assert_near(calib_tail_prob(c, 0.0), 0.5 / 1.5, 1e-15);
    calib_advance(c, 61.0);
    assert_same(calib_mass(c), ldexp(1.0, -61) + ldexp(1.0, -60));
    assert_near(calib_tail_prob(c, 0.0), 0.5 / 1.5, 1e-15);
    calib_observe(c, 10.0, 61.0);
    assert_same(calib_mass(c), 1.0 + ldexp(1.0, -61) + ldexp(1.0, -60));
    calib_advance(c, 30.0); /* backwards: ignored */
    assert_same(calib_time(c), 61.0);
    calib_free(c);
}

static void test_rate_estimate(void **state)
{
    (void)state;
    calib_params p;
    calib_params_default(&p);
    p.half_life_days = 2.0;
    p.min_span_days = 0.1;
    p.prior_rate_per_hour = 777;
    calib *c = calib_new(&p, NULL);
    /* 100 per hour for 0.05 d: still the prior */
    double t = 60000.0;
    const double dt = 1.0 / 2400.0;
    for (int i = 0; i < 120; i++)
        calib_observe(c, 1.0, t += dt);
    assert_same(calib_rate_per_hour(c), 777.0);
    /* 30 days at 100 per hour (15 half-lives): the steady-rate inversion
     * gives back 100 per hour within the discreteness of the stream */
    for (int i = 0; i < 72000; i++)
        calib_observe(c, 1.0, t += dt);
    assert_near(calib_rate_per_hour(c) / 100.0, 1.0, 2e-3);
    /* budget 10 per hour: q = 0.1, 100 flags per night */
    assert_near(calib_target_fraction(c), 0.1, 2e-4);
    calib_free(c);

    /* no decay: rate = count / elapsed */
    p.half_life_days = 0;
    p.min_span_days = 0;
    c = calib_new(&p, NULL);
    calib_observe(c, 1.0, 10.0);
    assert_same(calib_rate_per_hour(c), 777.0); /* T = 0 */
    for (int i = 1; i <= 480; i++)
        calib_observe(c, (double)i, 10.0 + i / 480.0); /* 481 in 1 day */
    assert_near(calib_rate_per_hour(c), 481.0 / 24.0, 1e-9);
    /* q = 10 / 20.04: the top half by score; expected per night 100 */
    assert_near(calib_expected_per_night(c), 10.0 * 10.0, 1e-6);
    calib_free(c);
}

static void test_histogram_and_save_load(void **state)
{
    (void)state;
    calib *a = make(2048, 0.5, CALIB_POLICY_BUDGET);
    rng r;
    rng_seed(&r, 8);
    double t = 60000.0;
    for (int i = 0; i < 30000; i++)
        calib_observe(a, 20.0 * rng_normal(&r), t += 0.005); /* 300 H */
    double e[33], m[32];
    uint32_t k = calib_histogram(a, e, m, 32);
    assert_true(k > 0 && k <= 32);
    double sum = 0;
    for (uint32_t i = 0; i < k; i++) {
        assert_true(e[i + 1] > e[i]);
        assert_true(m[i] >= 0);
        sum += m[i];
    }
    assert_near(sum / calib_mass(a), 1.0, 1e-12);

    size_t n = calib_save_buf(a, NULL, 0);
    uint8_t *buf = malloc(n);
    assert_int_equal(calib_save_buf(a, buf, n), n);
    calib *b = make(2048, 0.5, CALIB_POLICY_BUDGET);
    assert_int_equal(calib_load_buf(b, buf, n), 0);
    for (int i = 0; i < 5000; i++) {
        double s = 20.0 * rng_normal(&r);
        t += i == 100 ? 600.0 : 0.005; /* and a 1200 half-life gap */
        assert_same(calib_tail_prob(b, s), calib_tail_prob(a, s));
        assert_same(calib_threshold(b), calib_threshold(a));
        calib_observe(a, s, t);
        calib_observe(b, s, t);
    }
    assert_same(calib_rate_per_hour(a), calib_rate_per_hour(b));
    size_t n2 = calib_save_buf(a, NULL, 0);
    assert_int_equal(n2, n);
    uint8_t *b1 = malloc(n), *b2 = malloc(n);
    calib_save_buf(a, b1, n);
    calib_save_buf(b, b2, n);
    assert_memory_equal(b1, b2, n);
    calib *c = make(1024, 0.5, CALIB_POLICY_BUDGET);
    assert_int_equal(calib_load_buf(c, buf, n), CORE_EMISMATCH);
    calib *d = make(2048, 0.5, CALIB_POLICY_BUDGET);
    assert_int_equal(calib_load_buf(d, buf, n - 3), CORE_EFORMAT);
    assert_int_equal(calib_load_buf(NULL, buf, n), CORE_EINVAL);
    free(buf);
    free(b1);
    free(b2);
    calib_free(a);
    calib_free(b);
    calib_free(c);
    calib_free(d);
}

/* calib_assess == tail_prob + threshold + should_flag, then observe;
 * for both policies, learning or not, bit for bit. */
static void test_assess_matches_separate_calls(void **state)
{
    (void)state;
    for (int policy = 0; policy < 2; policy++) {
        calib *a = make(2048, 0.7, policy), *b = make(2048, 0.7, policy);
        rng r;
        rng_seed(&r, 12 + policy);
        double t = 60000.0;
        int flags = 0;
        for (int i = 0; i < 20000; i++) {
            double s = 10.0 * rng_normal(&r) + (i % 101 == 0 ? 300.0 : 0.0);
            int learn = i % 5 != 0;
            t += 1e-4;
            calib_verdict v;
            assert_int_equal(calib_assess(a, s, t, learn, &v), 0);
            calib_advance(b, t);
            assert_same(v.tail_prob, calib_tail_prob(b, s));
            assert_same(v.threshold, calib_threshold(b));
            assert_int_equal(v.flag, calib_should_flag(b, s));
            if (learn)
                calib_observe(b, s, t);
            flags += v.flag;
        }
        assert_true(flags > 0);
        calib_verdict v;
        assert_int_equal(calib_assess(a, NAN, t, 1, &v), CORE_EINVAL);
        assert_same(v.tail_prob, 1.0);
        assert_int_equal(v.flag, 0);
        assert_int_equal(calib_assess(a, 1.0, t, 1, NULL), CORE_EINVAL);
        assert_same(calib_mass(a), calib_mass(b));
        calib_free(a);
        calib_free(b);
    }
}

int main(void)
{
    const struct CMUnitTest tests[] = {
        cmocka_unit_test(test_params_and_alloc_failure),
        cmocka_unit_test(test_empty_state),
        cmocka_unit_test(test_tail_edges_and_interpolation),
        cmocka_unit_test(test_threshold_inverts_tail),
        cmocka_unit_test(test_outer_cells),
        cmocka_unit_test(test_decay_and_renormalisation),
        cmocka_unit_test(test_rate_estimate),
        cmocka_unit_test(test_histogram_and_save_load),
        cmocka_unit_test(test_assess_matches_separate_calls),
    };
    return cmocka_run_group_tests(tests, NULL, NULL);
}
