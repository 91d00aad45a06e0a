/*
 * test_vec.c - the vector kernels against plain double loops (the
 * definitions of the sums; source: common practice), over lengths that
 * hit the lane bulk, the tail and both.
 */
#include <math.h>
#include <setjmp.h>
#include <stdarg.h>
#include <stddef.h>
#include <stdint.h>
#include <stdio.h>

#include <cmocka.h>

#include "core/rng.h"
#include "core/vec.h"

#define NMAX 67

static void fill(rng *r, double *a, float *af, size_t n)
{
    for (size_t i = 0; i < n; i++) {
        a[i] = rng_normal(r) * 3.0;
        af[i] = (float)a[i];
        a[i] = (double)af[i]; /* both views hold the same numbers */
    }
}

static void test_kernels_match_definition(void **state)
{
    (void)state;
    rng r;
    rng_seed(&r, 17);
    double a[NMAX], b[NMAX], w[NMAX], m[NMAX];
    float af[NMAX], bf[NMAX], wf[NMAX], mf[NMAX];
    for (size_t n = 0; n <= NMAX; n++) {
        fill(&r, a, af, n);
        fill(&r, b, bf, n);
        fill(&r, w, wf, n);
        for (size_t i = 0; i < n; i++) {
            w[i] = fabs(w[i]);
            wf[i] = (float)w[i];
            m[i] = (rng_uniform(&r) < 0.3) ? 0.0 : 1.0;
            mf[i] = (float)m[i];
        }
        double d2 = 0, wd2 = 0, mwd2 = 0, dot = 0, sa = 0, sw = 0;
        for (size_t i = 0; i < n; i++) {
            double t = a[i] - b[i];
            d2 += t * t;
            wd2 += t * t * w[i];
            mwd2 += t * t * w[i] * m[i];
            dot += a[i] * b[i];
            sa += fabs(a[i] * b[i]);
            sw += t * t * w[i];
        }
        assert_true(fabs(vec_dist2(a, b, n) - d2) <= 1e-12 * (d2 + 1));
        assert_true(fabs(vec_wdist2(a, b, w, n) - wd2) <= 1e-12 * (wd2 + 1));
        assert_true(fabs(vec_dot(a, b, n) - dot) <= 1e-12 * (sa + 1));
        /* float kernels: relative to the magnitude of the summands */
        assert_true(fabs(vec_dist2_f(af, bf, n) - d2) <= 1e-5 * (d2 + 1));
        assert_true(fabs(vec_wdist2_f(af, bf, wf, n) - wd2) <=
                    1e-5 * (sw + 1));
        assert_true(fabs(vec_mwdist2_f(af, bf, wf, mf, n) - mwd2) <=
                    1e-5 * (sw + 1));
        assert_true(fabs(vec_dot_f(af, bf, n) - dot) <= 1e-5 * (sa + 1));
    }
}

static void test_axpy_and_convert(void **state)
{
    (void)state;
    double x[NMAX], y[NMAX], y0[NMAX];
    float xf[NMAX], yf[NMAX];
    for (size_t i = 0; i < NMAX; i++) {
        x[i] = (double)i * 0.5 - 7;
        y[i] = y0[i] = 1.0 / (double)(i + 1);
        xf[i] = (float)x[i];
        yf[i] = (float)y[i];
    }
    vec_axpy(2.5, x, y, NMAX);
    vec_axpy_f(2.5f, xf, yf, NMAX);
    for (size_t i = 0; i < NMAX; i++) {
        assert_true(y[i] == y0[i] + 2.5 * x[i]);
        assert_true(fabs(yf[i] - y[i]) <= 1e-5 * (fabs(y[i]) + 1));
    }
    float out[NMAX];
    vec_to_float(x, out, NMAX);
    for (size_t i = 0; i < NMAX; i++)
        assert_true(out[i] == (float)x[i]);
}

static void test_padding_and_zero_weights(void **state)
{
    (void)state;
    assert_int_equal(vec_padded(0), 0);
    assert_int_equal(vec_padded(1), 8);
    assert_int_equal(vec_padded(8), 8);
    assert_int_equal(vec_padded(17), 24);
    /* zero padding beyond n leaves every sum unchanged */
    float a[16] = {1, 2, 3, 4, 5}, b[16] = {0, 1, 0, 1, 0};
    float w[16] = {1, 1, 1, 1, 1};
    assert_true(vec_wdist2_f(a, b, w, 5) == vec_wdist2_f(a, b, w, 16));
    assert_true(vec_dist2_f(a, b, 5) == vec_dist2_f(a, b, 16));
    /* repeated calls are bit-identical */
    double x[13], y[13];
    for (int i = 0; i < 13; i++) {
        x[i] = sin(i);
        y[i] = cos(i);
    }
    double v1 = vec_dist2(x, y, 13), v2 = vec_dist2(x, y, 13);
    assert_memory_equal(&v1, &v2, sizeof v1);
}

int main(void)
{
    const struct CMUnitTest tests[] = {
        cmocka_unit_test(test_kernels_match_definition),
        cmocka_unit_test(test_axpy_and_convert),
        cmocka_unit_test(test_padding_and_zero_weights),
    };
    return cmocka_run_group_tests(tests, NULL, NULL);
}
