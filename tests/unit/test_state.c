/*
 * test_state.c - checkpoint write/read, atomicity under injected faults,
 * and rejection of truncated or bit-flipped files.
 */
#include <errno.h>
#include <fcntl.h>
#include <setjmp.h>
#include <stdarg.h>
#include <stddef.h>
#include <stdint.h>
#include <stdio.h>
#include <stdlib.h>
#include <string.h>
#include <sys/stat.h>
#include <unistd.h>
#include <cmocka.h>

#include "daemon/state.h"

static char dir[256];

static int setup(void **state)
{
    (void)state;
    snprintf(dir, sizeof dir, "/tmp/oddsky-test-state-XXXXXX");
    return mkdtemp(dir) ? 0 : -1;
}

static int teardown(void **state)
{
    (void)state;
    char p[512];
    state_path(dir, p, sizeof p);
    unlink(p);
    rmdir(dir);
    return 0;
}

static int write_sample(const state_io *io, uint8_t fill, char *err, size_t n)
{
    char *features[] = {"mag", "colour_gr"};
    state_ledger l;
    state_ledger_init(&l, 0);
    state_ledger_set(&l, "packets", 0, 41);
    state_ledger_set(&l, "packets", 3, 7);
    state_ledger_set(&l, "packets", 0, 40); /* never moves backwards */
    uint8_t model[300];
    memset(model, fill, sizeof model);
    int rc = state_write(dir, io, 1234567, features, 2, &l, model, sizeof model,
                         err, n);
    state_ledger_free(&l);
    return rc;
}

static void round_trip(void **state)
{
    (void)state;
    char err[256] = "", path[512];
    assert_int_equal(write_sample(NULL, 0xAB, err, sizeof err), 0);
    state_path(dir, path, sizeof path);
    state_checkpoint c;
    assert_int_equal(state_read(path, &c, err, sizeof err), 0);
    assert_int_equal(c.written_unix_ms, 1234567);
    assert_int_equal(c.n_features, 2);
    assert_string_equal(c.features[1], "colour_gr");
    assert_int_equal(state_ledger_get(&c.ledger, "packets", 0), 41);
    assert_int_equal(state_ledger_get(&c.ledger, "packets", 3), 7);
    assert_int_equal(state_ledger_get(&c.ledger, "packets", 1), -1);
    assert_int_equal(c.model_len, 300);
    assert_int_equal(c.model[299], 0xAB);
    state_checkpoint_free(&c);
}

static void corrupt_files_are_refused(void **state)
{
    (void)state;
    char err[256], path[512];
    assert_int_equal(write_sample(NULL, 0x11, err, sizeof err), 0);
    state_path(dir, path, sizeof path);
    struct stat st;
    assert_int_equal(stat(path, &st), 0);
    FILE *f = fopen(path, "rb");
    uint8_t *buf = malloc((size_t)st.st_size);
    assert_int_equal(fread(buf, 1, (size_t)st.st_size, f), (size_t)st.st_size);
    fclose(f);

    /* One flipped bit anywhere is caught. */
    for (off_t at = 0; at < st.st_size; at += 37) {
        buf[at] ^= 0x04;
        f = fopen(path, "wb");
        fwrite(buf, 1, (size_t)st.st_size, f);
        fclose(f);
        state_checkpoint c;
        int rc = state_read(path, &c, err, sizeof err);
        assert_int_equal(rc, -EBADMSG);
        buf[at] ^= 0x04;
    }
    /* Truncation is caught. */
    f = fopen(path, "wb");
    fwrite(buf, 1, (size_t)st.st_size / 2, f);
    fclose(f);
    state_checkpoint c;
    assert_int_equal(state_read(path, &c, err, sizeof err), -EBADMSG);
    assert_non_null(strstr(err, "checksum"));
    free(buf);
    assert_int_equal(state_read("/nonexistent/oddsky.ckpt", &c, err, sizeof err),
                     -ENOENT);
}

static int fail_after;
static ssize_t failing_write(int fd, const void *buf, size_t len)
{
    if (fail_after-- <= 0) {
        errno = ENOSPC;
        return -1;
    }
    return write(fd, buf, len < 64 ? len : 64);
}

static int failing_rename(const char *a, const char *b)
{
    (void)a;
    (void)b;
    errno = EROFS;
    return -1;
}

static void failed_write_keeps_old_checkpoint(void **state)
{
    (void)state;
    char err[256], path[512];
    assert_int_equal(write_sample(NULL, 0x22, err, sizeof err), 0);
    state_path(dir, path, sizeof path);

    state_io io = *state_io_default();
    io.write_fn = failing_write;
    fail_after = 2;
    assert_int_equal(write_sample(&io, 0x33, err, sizeof err), -ENOSPC);
    assert_non_null(strstr(err, "write"));

    io = *state_io_default();
    io.rename_fn = failing_rename;
    assert_int_equal(write_sample(&io, 0x44, err, sizeof err), -EROFS);
    assert_non_null(strstr(err, "rename"));

    state_checkpoint c;
    assert_int_equal(state_read(path, &c, err, sizeof err), 0);
    assert_int_equal(c.model[0], 0x22);
    state_checkpoint_free(&c);
    char tmp[600];
    snprintf(tmp, sizeof tmp, "%s.tmp", path);
    assert_int_equal(access(tmp, F_OK), -1); /* no temp file left behind */
}

int main(void)
{
    const struct CMUnitTest tests[] = {
        cmocka_unit_test(round_trip),
        cmocka_unit_test(corrupt_files_are_refused),
        cmocka_unit_test(failed_write_keeps_old_checkpoint),
    };
    return cmocka_run_group_tests(tests, setup, teardown);
}
