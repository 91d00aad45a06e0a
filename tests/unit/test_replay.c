/*
 * test_replay.c - `oddsky inspect` on checkpoints built here with
 * model_snapshot + state_write: every figure it prints is compared with
 * what the test put in (times, names, ledger, parameters, counts), and
 * missing, corrupt, foreign and incompatible files get their exit codes.
 */
#include <errno.h>
#include <fcntl.h>
#include <math.h>
#include <setjmp.h>
#include <stdarg.h>
#include <stddef.h>
#include <stdint.h>
#include <stdio.h>
#include <stdlib.h>
#include <string.h>
#include <sys/stat.h>
#include <sysexits.h>
#include <unistd.h>
#include <cmocka.h>

#include <jansson.h>

#include "core/model.h"
#include "daemon/commands.h"
#include "daemon/state.h"

#define WRITTEN_MS 1700000000123ull

static char dir[256];
static char outpath[512];

typedef struct fed {
    uint64_t learned, scored, flagged;
    double last_time;
} fed;

static int setup(void **state)
{
    (void)state;
    snprintf(dir, sizeof dir, "/tmp/oddsky-test-inspect-XXXXXX");
    if (!mkdtemp(dir))
        return -1;
    snprintf(outpath, sizeof outpath, "%s/stdout.txt", dir);
    return 0;
}

static int teardown(void **state)
{
    (void)state;
    char p[600];
    state_path(dir, p, sizeof p);
    unlink(p);
    unlink(outpath);
    snprintf(p, sizeof p, "%s/junk", dir);
    unlink(p);
    rmdir(dir);
    return 0;
}

/* A small deterministic generator (xorshift64*), two blobs in 3-d. */
static double unif(uint64_t *s)
{
    *s ^= *s >> 12;
    *s ^= *s << 25;
    *s ^= *s >> 27;
    return (double)((*s * 2685821657736338717ull) >> 11) / 9007199254740992.0;
}

/* Feed a model, snapshot it and write a checkpoint with n_names names. */
static void make_checkpoint(uint32_t n_names, fed *f)
{
    model_params p;
    model_params_default(&p, 3);
    p.k = 4;
    p.warm_n = 50;
    p.reservoir_n = 64;
    p.select_k_max = 8;
    p.mix_nearest = 2;
    p.seed = 9;
    int e = 0;
    model *m = model_new(&p, &e);
    assert_non_null(m);
    uint64_t s = 12345;
    memset(f, 0, sizeof *f);
    for (int i = 0; i < 220; i++) {
        double c = (i % 2) ? 5.0 : -5.0;
        double x[3] = {c + unif(&s), c - unif(&s), unif(&s)};
        model_input in = {.x = x, .time_days = 61000.0 + i * 0.01,
                          .learn = i < 200};
        model_result r;
        assert_int_equal(model_observe(m, &in, &r), 0);
        f->scored++;
        f->learned += in.learn ? 1 : 0;
        f->flagged += r.flag ? 1 : 0;
        f->last_time = in.time_days;
    }
    size_t need = model_snapshot_size(m), len = 0;
    uint8_t *buf = malloc(need);
    assert_non_null(buf);
    assert_int_equal(model_snapshot(m, buf, need, &len), 0);
    char *names[] = {"mag", "colour_gr", "slope"};
    state_ledger l;
    state_ledger_init(&l, 0);
    state_ledger_set(&l, "packets", 0, 199);
    state_ledger_set(&l, "packets", 2, -1);
    char err[256];
    assert_int_equal(state_write(dir, NULL, WRITTEN_MS, names, n_names, &l, buf,
                                 len, err, sizeof err),
                     0);
    state_ledger_free(&l);
    free(buf);
    model_free(m);
}

/* Run cmd_inspect with stdout captured into outpath. */
static int run_inspect(int argc, char **argv)
{
    fflush(stdout);
    int saved = dup(1);
    int fd = open(outpath, O_WRONLY | O_CREAT | O_TRUNC, 0600);
    assert_true(saved >= 0 && fd >= 0);
    dup2(fd, 1);
    close(fd);
    int rc = cmd_inspect(argc, argv);
    fflush(stdout);
    dup2(saved, 1);
    close(saved);
    return rc;
}

static char *slurp(const char *path)
{
    FILE *f = fopen(path, "rb");
    assert_non_null(f);
    static char buf[65536];
    size_t n = fread(buf, 1, sizeof buf - 1, f);
    fclose(f);
    buf[n] = '\0';
    return buf;
}

static void inspect_json_matches_what_was_written(void **state)
{
    (void)state;
    fed f;
    make_checkpoint(3, &f);
    char *argv[] = {"inspect", "--json", "--top", "2", dir};
    assert_int_equal(run_inspect(5, argv), 0);
    json_error_t je;
    json_t *o = json_loads(slurp(outpath), 0, &je);
    assert_non_null(o);

    char ck[600];
    state_path(dir, ck, sizeof ck);
    struct stat st;
    assert_int_equal(stat(ck, &st), 0);
    assert_int_equal(json_integer_value(json_object_get(o, "file_bytes")),
                     st.st_size);
    assert_int_equal(json_integer_value(json_object_get(o, "written_unix_ms")),
                     (json_int_t)WRITTEN_MS);
    /* source: Python datetime.fromtimestamp(1700000000.123, timezone.utc) */
    assert_string_equal(json_string_value(json_object_get(o, "written")),
                        "2023-11-14T22:13:20.123Z");
    json_t *names = json_object_get(o, "features");
    assert_int_equal(json_array_size(names), 3);
    assert_string_equal(json_string_value(json_array_get(names, 1)), "colour_gr");

    json_t *l = json_object_get(o, "ledger");
    assert_int_equal(json_array_size(l), 2);
    json_t *e0 = json_array_get(l, 0), *e1 = json_array_get(l, 1);
    assert_string_equal(json_string_value(json_object_get(e0, "topic")), "packets");
    assert_int_equal(json_integer_value(json_object_get(e0, "partition")), 0);
    assert_int_equal(json_integer_value(json_object_get(e0, "learned")), 199);
    assert_int_equal(json_integer_value(json_object_get(e1, "partition")), 2);
    assert_int_equal(json_integer_value(json_object_get(e1, "learned")), -1);

    json_t *p = json_object_get(o, "params");
    assert_int_equal(json_integer_value(json_object_get(p, "k")), 4);
    assert_int_equal(json_integer_value(json_object_get(p, "warmup_vectors")), 50);
    assert_int_equal(json_integer_value(json_object_get(p, "dim")), 3);
    assert_int_equal(json_integer_value(json_object_get(p, "seed")), 9);
    assert_string_equal(json_string_value(json_object_get(p, "score")), "density");
    assert_string_equal(json_string_value(json_object_get(p, "flag_policy")), "budget");

    json_t *m = json_object_get(o, "model");
    assert_int_equal(json_integer_value(json_object_get(m, "learned")), f.learned);
    assert_int_equal(json_integer_value(json_object_get(m, "scored")), f.scored);
    assert_int_equal(json_integer_value(json_object_get(m, "flagged")), f.flagged);
    assert_true(json_is_true(json_object_get(m, "warm")));
    assert_true(fabs(json_real_value(json_object_get(m, "time_days")) -
                     f.last_time) < 1e-9);
    json_t *c = json_object_get(m, "clusters");
    assert_int_equal(json_array_size(c), 2);
    double w0 = json_real_value(json_object_get(json_array_get(c, 0), "weight"));
    double w1 = json_real_value(json_object_get(json_array_get(c, 1), "weight"));
    assert_true(w0 >= w1 && w1 > 0);
    assert_true(json_integer_value(json_object_get(m, "memory_bytes")) > 0);
    json_decref(o);
}

static void inspect_text_names_the_counts(void **state)
{
    (void)state;
    fed f;
    make_checkpoint(3, &f);
    char ck[600];
    state_path(dir, ck, sizeof ck);
    char *argv[] = {"inspect", ck};
    assert_int_equal(run_inspect(2, argv), 0);
    char *t = slurp(outpath);
    char want[128];
    snprintf(want, sizeof want, "learned %llu, scored %llu, flagged %llu",
             (unsigned long long)f.learned, (unsigned long long)f.scored,
             (unsigned long long)f.flagged);
    assert_non_null(strstr(t, want));
    assert_non_null(strstr(t, "packets [0]  learned up to offset 199"));
    assert_non_null(strstr(t, "2023-11-14T22:13:20.123Z"));
    assert_non_null(strstr(t, "features    3: mag colour_gr slope"));
}

static void inspect_refuses_bad_files(void **state)
{
    (void)state;
    char missing[600];
    snprintf(missing, sizeof missing, "%s/none.ckpt", dir);
    char *a1[] = {"inspect", missing};
    assert_int_equal(run_inspect(2, a1), EX_NOINPUT);

    char junk[600];
    snprintf(junk, sizeof junk, "%s/junk", dir);
    FILE *fj = fopen(junk, "wb");
    assert_non_null(fj);
    for (int i = 0; i < 400; i++)
        fputc('x', fj);
    fclose(fj);
    char *a2[] = {"inspect", junk};
    assert_int_equal(run_inspect(2, a2), EX_DATAERR);

    /* One flipped byte in the middle: the file CRC catches it. */
    fed f;
    make_checkpoint(3, &f);
    char ck[600];
    state_path(dir, ck, sizeof ck);
    struct stat st;
    assert_int_equal(stat(ck, &st), 0);
    int fd = open(ck, O_RDWR);
    assert_true(fd >= 0);
    unsigned char b;
    off_t mid = st.st_size / 2;
    assert_int_equal(pread(fd, &b, 1, mid), 1);
    b ^= 0x40;
    assert_int_equal(pwrite(fd, &b, 1, mid), 1);
    close(fd);
    char *a3[] = {"inspect", ck};
    assert_int_equal(run_inspect(2, a3), EX_DATAERR);

    /* Two names for a three-feature model: incompatible. */
    make_checkpoint(2, &f);
    assert_int_equal(run_inspect(2, a3), EX_DATAERR);

    char *a4[] = {"inspect"};
    assert_int_equal(run_inspect(1, a4), EX_USAGE);
    char *a5[] = {"inspect", "--top", "x", ck};
    assert_int_equal(run_inspect(4, a5), EX_USAGE);
    char *a6[] = {"inspect", "--help"};
    assert_int_equal(run_inspect(2, a6), 0);
}

int main(void)
{
    const struct CMUnitTest tests[] = {
        cmocka_unit_test_setup_teardown(inspect_json_matches_what_was_written,
                                        setup, teardown),
        cmocka_unit_test_setup_teardown(inspect_text_names_the_counts, setup,
                                        teardown),
        cmocka_unit_test_setup_teardown(inspect_refuses_bad_files, setup,
                                        teardown),
    };
    return cmocka_run_group_tests(tests, NULL, NULL);
}
