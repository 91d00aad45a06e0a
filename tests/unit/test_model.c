/*
 * test_model.c - determinism, snapshot/restore continuity, fixed memory
 * and the warm-up contract of core/model.c.
 *
 * Allocation is counted by interposing malloc/calloc/realloc (glibc looks
 * the symbols up in the executable first); the count must not move while
 * observing.
 */
#define _GNU_SOURCE
#include <dlfcn.h>
#include <math.h>
#include <setjmp.h>
#include <stdarg.h>
#include <stddef.h>
#include <stdint.h>
#include <stdlib.h>
#include <string.h>
#include <cmocka.h>

#include "core/model.h"
#include "core/rng.h"

static unsigned long n_allocs;

void *malloc(size_t n)
{
    static void *(*real)(size_t);
    if (!real)
        real = (void *(*)(size_t))dlsym(RTLD_NEXT, "malloc");
    n_allocs++;
    return real(n);
}

void *calloc(size_t a, size_t b)
{
    static void *(*real)(size_t, size_t);
    if (!real) {
        /* dlsym itself may calloc before real is known. */
        static char early[4096];
        static size_t used;
        real = (void *(*)(size_t, size_t))dlsym(RTLD_NEXT, "calloc");
        if (!real) {
            void *p = early + used;
            used += (a * b + 15) & ~(size_t)15;
            return p;
        }
    }
    n_allocs++;
    return real(a, b);
}

void *realloc(void *p, size_t n)
{
    static void *(*real)(void *, size_t);
    if (!real)
        real = (void *(*)(void *, size_t))dlsym(RTLD_NEXT, "realloc");
    n_allocs++;
    return real(p, n);
}

#define DIM 6

static void gen(rng *r, double *x, double *t, size_t i)
{
    int blob = (int)rng_below(r, 3);
    for (int j = 0; j < DIM; j++)
        x[j] = 4.0 * blob + rng_normal(r) + (j == 0 && rng_below(r, 200) == 0 ? 25 : 0);
    if (rng_below(r, 10) == 0)
        x[rng_below(r, DIM)] = NAN; /* missing */
    *t = 60000.0 + (double)i / 2000.0;
}

static model *small_model(uint64_t seed, model_score_kind score)
{
    model_params p;
    model_params_default(&p, DIM);
    p.k = 6;
    p.warm_n = 200;
    p.reservoir_n = 512;
    p.select_k_max = 8;
    p.space_chains = 8;
    p.space_width = 256;
    p.kmeans_half_life_days = 0.5;
    p.score = score;
    p.seed = seed;
    int err = 0;
    model *m = model_new(&p, &err);
    assert_non_null(m);
    return m;
}

static void run(model *m, rng *r, size_t from, size_t n, model_result *out)
{
    double x[DIM], t;
    for (size_t i = from; i < from + n; i++) {
        gen(r, x, &t, i);
        model_input in = {.x = x, .time_days = t, .learn = 1};
        assert_int_equal(model_observe(m, &in, &out[i - from]), 0);
    }
}

static uint8_t *snap(const model *m, size_t *len)
{
    size_t need = model_snapshot_size(m);
    uint8_t *buf = malloc(need);
    assert_int_equal(model_snapshot(m, buf, need, len), 0);
    assert_int_equal(*len, need);
    return buf;
}

static void same_inputs_same_bits(void **state)
{
    (void)state;
    for (int score = 0; score <= 2; score++) {
        model *a = small_model(42, (model_score_kind)score);
        model *b = small_model(42, (model_score_kind)score);
        rng ra, rb;
        rng_seed(&ra, 9);
        rng_seed(&rb, 9);
        static model_result oa[3000], ob[3000];
        run(a, &ra, 0, 3000, oa);
        run(b, &rb, 0, 3000, ob);
        assert_memory_equal(oa, ob, sizeof oa);
        size_t la, lb;
        uint8_t *sa = snap(a, &la), *sb = snap(b, &lb);
        assert_int_equal(la, lb);
        assert_memory_equal(sa, sb, la);
        /* The stream produced warm results with real scores. */
        assert_int_equal(oa[2999].warm, 1);
        assert_true(isfinite(oa[2999].novelty));
        assert_true(oa[2999].tail_prob >= 0 && oa[2999].tail_prob <= 1);
        free(sa);
        free(sb);
        model_free(a);
        model_free(b);
    }
}

static void restore_continues_exactly(void **state)
{
    (void)state;
    /* Snapshot once during warm-up and once after, restore, continue. */
    size_t cut[] = {120, 1500};
    for (int c = 0; c < 2; c++) {
        model *a = small_model(7, MODEL_SCORE_COMBINED);
        rng r;
        rng_seed(&r, 3);
        static model_result o1[2000], o2[2000];
        run(a, &r, 0, cut[c], o1);
        size_t len;
        uint8_t *s = snap(a, &len);
        int err = 0;
        model *b = model_restore(s, len, &err);
        assert_non_null(b);
        size_t len2;
        uint8_t *s2 = snap(b, &len2);
        assert_int_equal(len, len2);
        assert_memory_equal(s, s2, len);
        rng r2 = r;
        run(a, &r, cut[c], 2000, o1);
        run(b, &r2, cut[c], 2000, o2);
        assert_memory_equal(o1, o2, sizeof o1);
        free(s);
        free(s2);
        model_free(a);
        model_free(b);
    }
}

static void corrupt_snapshots_are_refused(void **state)
{
    (void)state;
    model *a = small_model(7, MODEL_SCORE_DENSITY);
    rng r;
    rng_seed(&r, 3);
    static model_result o[600];
    run(a, &r, 0, 600, o);
    size_t len;
    uint8_t *s = snap(a, &len);
    int err = 0;
    s[len / 2] ^= 1;
    assert_null(model_restore(s, len, &err));
    assert_int_equal(err, CORE_ECHECKSUM);
    s[len / 2] ^= 1;
    assert_null(model_restore(s, len - 9, &err));
    assert_int_equal(err, CORE_EFORMAT);
    s[8] = 99; /* version */
    assert_null(model_restore(s, len, &err));
    assert_int_equal(err, CORE_EVERSION);
    free(s);
    model_free(a);
}

static void observing_allocates_nothing(void **state)
{
    (void)state;
    model *a = small_model(5, MODEL_SCORE_COMBINED);
    size_t bytes = model_bytes(a);
    assert_true(bytes > 0);
    rng r;
    rng_seed(&r, 1);
    static model_result o[5000];
    unsigned long before = n_allocs;
    run(a, &r, 0, 5000, o); /* crosses warm-up, seeding and retirement */
    assert_int_equal(n_allocs, before);
    assert_int_equal(model_bytes(a), bytes);
    model_free(a);
}

static void warm_up_contract(void **state)
{
    (void)state;
    model *a = small_model(5, MODEL_SCORE_DENSITY);
    rng r;
    rng_seed(&r, 1);
    static model_result o[400];
    run(a, &r, 0, 400, o);
    assert_int_equal(o[198].warm, 0);
    assert_int_equal(o[198].cluster, -1);
    assert_int_equal(o[198].flag, 0);
    assert_true(isnan(o[198].novelty));
    assert_int_equal(o[199].warm, 0); /* the seeding vector itself */
    assert_int_equal(o[200].warm, 1);
    assert_true(o[200].cluster >= 0 && o[200].cluster < 6);
    assert_int_equal(o[399].seq, 400);
    /* Score-only vectors are not learned. */
    double x[DIM] = {0};
    model_input in = {.x = x, .time_days = 60001, .learn = 0};
    model_result res;
    model_observe(a, &in, &res);
    assert_int_equal(res.seq, 400);
    model_summary s;
    model_summarize(a, &s);
    assert_int_equal(s.learned, 400);
    assert_int_equal(s.scored, 401);
    model_cluster_view v;
    assert_int_equal(model_cluster(a, 0, &v), 0);
    assert_true(v.weight >= 0);
    assert_int_equal(model_cluster(a, 6, &v), CORE_ERANGE);
    model_free(a);
}

static void selection_finds_the_blobs(void **state)
{
    (void)state;
    /* Three well-separated spherical blobs, nothing missing: X-means BIC
     * (Pelleg & Moore 2000) over the reservoir should prefer k = 3 among
     * 2..8.  Stepping and the one-call form agree (same rng draws). */
    model *a = small_model(11, MODEL_SCORE_DENSITY);
    model *b = small_model(11, MODEL_SCORE_DENSITY);
    rng r;
    rng_seed(&r, 4);
    model_result res;
    for (int i = 0; i < 3000; i++) {
        double x[DIM];
        int blob = (int)rng_below(&r, 3);
        for (int j = 0; j < DIM; j++)
            x[j] = 6.0 * blob * (j % 2 ? 1 : -1) + rng_normal(&r);
        model_input in = {.x = x, .time_days = 60000.0 + i / 2000.0, .learn = 1};
        model_observe(a, &in, &res);
        model_observe(b, &in, &res);
    }
    uint32_t k = 0;
    double bic = 0, sil = 0;
    assert_int_equal(model_select(a, &k, &bic, &sil), 0);
    print_message("suggested k=%u bic=%g silhouette=%g\n", k, bic, sil);
    assert_int_equal(k, 3);
    assert_true(sil > 0.5);
    assert_int_equal(model_select_begin(b), 0);
    int rc, steps = 0;
    while ((rc = model_select_tick(b)) == 0)
        steps++;
    assert_int_equal(rc, 1);
    assert_int_equal(steps, 6); /* k = 2..8: seven ticks */
    model_summary s;
    model_summarize(b, &s);
    assert_int_equal(s.suggested_k, 3);
    assert_int_equal(model_select_tick(b), CORE_EAGAIN);
    model_free(a);
    model_free(b);
}

static void bad_params_are_named(void **state)
{
    (void)state;
    model_params p;
    model_params_default(&p, 4);
    p.k = 0;
    const char *field = NULL;
    char why[128];
    assert_int_equal(model_params_check(&p, &field, why, sizeof why), CORE_ERANGE);
    assert_string_equal(field, "k");
    model_params_default(&p, 4);
    p.mix_nearest = 40;
    assert_int_equal(model_params_check(&p, &field, why, sizeof why), CORE_ERANGE);
    assert_string_equal(field, "mix_nearest");
    int err = 0;
    assert_null(model_new(&p, &err));
    assert_int_equal(err, CORE_EINVAL);
}

int main(void)
{
    const struct CMUnitTest tests[] = {
        cmocka_unit_test(same_inputs_same_bits),
        cmocka_unit_test(restore_continues_exactly),
        cmocka_unit_test(corrupt_snapshots_are_refused),
        cmocka_unit_test(observing_allocates_nothing),
        cmocka_unit_test(warm_up_contract),
        cmocka_unit_test(selection_finds_the_blobs),
        cmocka_unit_test(bad_params_are_named),
    };
    return cmocka_run_group_tests(tests, NULL, NULL);
}
