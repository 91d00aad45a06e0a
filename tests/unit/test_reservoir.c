/*
 * test_reservoir.c - A-Res sampling: fill order, inclusion probabilities
 * (Efraimidis & Spirakis 2006), determinism, save/load, failures.
 */
#define _GNU_SOURCE
#include <dlfcn.h>
#include <math.h>
#include <setjmp.h>
#include <stdarg.h>
#include <stddef.h>
#include <stdint.h>
#include <stdio.h>
#include <string.h>

#include <stdlib.h>
#include <cmocka.h>

#include "core/err.h"
#include "core/reservoir.h"

#include "failalloc.h"

static void test_fills_in_order(void **state)
{
    (void)state;
    reservoir *r = reservoir_new(5, 2, 1.0, 1, NULL);
    assert_non_null(r);
    for (int i = 0; i < 5; i++) {
        double x[2] = {i, -i};
        assert_int_equal(reservoir_add(r, x, i), i);
    }
    assert_int_equal(reservoir_count(r), 5);
    for (int i = 0; i < 5; i++) {
        assert_true(reservoir_rows(r)[2 * i] == i);
        assert_true(reservoir_time(r, i) == i);
    }
    for (int i = 5; i < 100; i++) {
        double x[2] = {i, -i};
        reservoir_add(r, x, i);
    }
    assert_int_equal(reservoir_count(r), 5);
    assert_int_equal(reservoir_seen(r), 100);
    reservoir_free(r);
}

/* With a sample of one, A-Res keeps item i with probability w_i / sum w
 * (Efraimidis & Spirakis 2006, the k = 1 case).  Items at t = 0, H, 2H
 * have weights 1, 2, 4: probabilities 1/7, 2/7, 4/7. */
static void test_inclusion_probabilities(void **state)
{
    (void)state;
    enum { TRIALS = 40000 };
    int kept[3] = {0};
    for (int s = 0; s < TRIALS; s++) {
        reservoir *r = reservoir_new(1, 1, 3.0, (uint64_t)s + 1000, NULL);
        for (int i = 0; i < 3; i++) {
            double x = i;
            reservoir_add(r, &x, 3.0 * i);
        }
        kept[(int)reservoir_rows(r)[0]]++;
        reservoir_free(r);
    }
    double want[3] = {1.0 / 7, 2.0 / 7, 4.0 / 7};
    for (int i = 0; i < 3; i++) {
        double p = (double)kept[i] / TRIALS;
        double sd = sqrt(want[i] * (1 - want[i]) / TRIALS);
        printf("item %d kept %.4f, A-Res %.4f (4 sd = %.4f)\n", i, p,
               want[i], 4 * sd);
        assert_true(fabs(p - want[i]) < 4 * sd);
    }
}

/* Without decay every item is equally likely to be in the sample:
 * cap / n each (uniform reservoir sampling). */
static void test_uniform_without_decay(void **state)
{
    (void)state;
    enum { N = 20, CAP = 5, TRIALS = 20000 };
    int kept[N] = {0};
    for (int s = 0; s < TRIALS; s++) {
        reservoir *r = reservoir_new(CAP, 1, 0.0, (uint64_t)s, NULL);
        for (int i = 0; i < N; i++) {
            double x = i;
            reservoir_add(r, &x, i);
        }
        for (uint32_t j = 0; j < CAP; j++)
            kept[(int)reservoir_rows(r)[j]]++;
        reservoir_free(r);
    }
    double want = (double)CAP / N, sd = sqrt(want * (1 - want) / TRIALS);
    for (int i = 0; i < N; i++)
        assert_true(fabs((double)kept[i] / TRIALS - want) < 4.5 * sd);
}

static void test_determinism_save_load(void **state)
{
    (void)state;
    reservoir *a = reservoir_new(16, 3, 0.5, 42, NULL);
    reservoir *b = reservoir_new(16, 3, 0.5, 42, NULL);
    reservoir *c = reservoir_new(16, 3, 0.5, 1, NULL);
    for (int i = 0; i < 500; i++) {
        double x[3] = {i, i * 0.5, -i};
        reservoir_add(a, x, i * 0.01);
        reservoir_add(b, x, i * 0.01);
    }
    assert_memory_equal(reservoir_rows(a), reservoir_rows(b), 16 * 3 * 8);
    static uint8_t buf[8192];
    snap_writer w;
    snap_writer_init(&w, buf, sizeof buf);
    reservoir_save(a, &w);
    assert_false(w.overflow);
    snap_reader rd;
    snap_reader_init(&rd, buf, w.len);
    assert_int_equal(reservoir_load(c, &rd), 0);
    for (int i = 500; i < 1500; i++) {
        double x[3] = {i, i * 0.5, -i};
        assert_int_equal(reservoir_add(a, x, i * 0.01),
                         reservoir_add(c, x, i * 0.01));
    }
    assert_memory_equal(reservoir_rows(a), reservoir_rows(c), 16 * 3 * 8);
    /* recent rows dominate with a short half-life: rows before t = 13
     * hold 2^-4 of the weight, before t = 5 only 2^-20 */
    int recent = 0;
    for (uint32_t j = 0; j < 16; j++) {
        recent += reservoir_time(a, j) > 13.0;
        assert_true(reservoir_time(a, j) > 5.0);
    }
    printf("rows from the last 4 half-lives: %d of 16\n", recent);
    assert_true(recent >= 12);
    reservoir *d = reservoir_new(8, 3, 0.5, 1, NULL);
    snap_reader_init(&rd, buf, w.len);
    assert_int_equal(reservoir_load(d, &rd), CORE_EMISMATCH);
    snap_reader_init(&rd, buf, w.len - 5);
    assert_true(reservoir_load(c, &rd) < 0);
    reservoir_free(a);
    reservoir_free(b);
    reservoir_free(c);
    reservoir_free(d);
}

static void test_errors_and_alloc_failure(void **state)
{
    /* valgrind replaces malloc, so the failing-allocator shim never
     * fires under it; the plain unit run covers this test. */
    if (getenv("ODDSKY_UNDER_VALGRIND"))
        skip();
    (void)state;
    int err = 0, failures = 0;
    assert_null(reservoir_new(0, 3, 1, 1, &err));
    assert_int_equal(err, CORE_EINVAL);
    assert_null(reservoir_new(3, 3, -1, 1, &err));
    assert_int_equal(err, CORE_EINVAL);
    for (long i = 0;; i++) {
        fa_countdown = i;
        reservoir *r = reservoir_new(64, 4, 1, 1, &err);
        fa_countdown = -1;
        if (r) {
            reservoir_free(r);
            break;
        }
        assert_int_equal(err, CORE_ENOMEM);
        failures++;
    }
    assert_true(failures >= 4);
}

int main(void)
{
    const struct CMUnitTest tests[] = {
        cmocka_unit_test(test_fills_in_order),
        cmocka_unit_test(test_inclusion_probabilities),
        cmocka_unit_test(test_uniform_without_decay),
        cmocka_unit_test(test_determinism_save_load),
        cmocka_unit_test(test_errors_and_alloc_failure),
    };
    return cmocka_run_group_tests(tests, NULL, NULL);
}
