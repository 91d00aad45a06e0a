// fuzz-sources: daemon/state.c core/model.c core/calib.c core/decay.c core/density.c core/err.c core/kmeans.c core/reservoir.c core/rng.c core/scaler.c core/select.c core/series.c core/sketch.c core/snapshot.c core/vec.c
// fuzz-libs: -lm
/*
 * fuzz_checkpoint.c - libFuzzer target for everything that reads a
 * checkpoint back: state_read() on a file holding the input, then
 * model_snapshot_params() / model_restore() on the model it carries and
 * on the input bytes themselves.
 *
 * Input: one control byte, then the file bytes.  Control bit 0 repairs
 * the checksums after mutation (so the fuzzer gets past the CRCs and into
 * the field parsing): the first "ODSKYSN1" frame gets its payload length
 * and CRC-32C recomputed (its end is the file's CRC when the bytes start
 * with the checkpoint magic, else the end of the input), the checkpoint's
 * model length field before it is set to match, and the file CRC is
 * recomputed last.  Bit 0 clear leaves the bytes as they are, so the
 * checksum and framing checks themselves are fuzzed too.
 *
 * A restored model is exercised as the daemon would use it: summary,
 * cluster views, a few observations, then a snapshot.  Invariants checked
 * besides the sanitizers: state_read fails cleanly or gives a model length
 * that matches its bytes; the snapshot of a restored model restores and
 * snapshots to itself (loading may normalise a field once, so the input
 * itself need not come back); the snapshot of the observed model
 * restores.
 *
 * Harness limit: snapshots whose parameters ask for a big model (rough
 * estimate above FUZZ_MODEL_MAX_BYTES, e.g. warm_n = 4M) are not
 * restored: the parameter bounds allow models of many GiB, which is the
 * operator's choice in the config, and would only trip libFuzzer's memory
 * limit.  model_snapshot_params() still parses them.
 */
#include <math.h>
#include <stdint.h>
#include <stdio.h>
#include <stdlib.h>
#include <string.h>
#include <unistd.h>

#include "core/model.h"
#include "core/snapshot.h"
#include "daemon/state.h"

#define FUZZ_MODEL_MAX_BYTES ((double)(48u << 20))

static char ckpt_path[4096];
static uint8_t *work;
static size_t work_cap;

static void check(int cond, const char *what)
{
    if (!cond) {
        fprintf(stderr, "invariant violated: %s\n", what);
        abort();
    }
}

static void put_le(uint8_t *p, uint64_t v, int n)
{
    for (int i = 0; i < n; i++)
        p[i] = (uint8_t)(v >> (8 * i));
}

static const uint8_t *find(const uint8_t *p, size_t n, const char *needle,
                           size_t k)
{
    for (size_t i = 0; i + k <= n; i++)
        if (p[i] == (uint8_t)needle[0] && !memcmp(p + i, needle, k))
            return p + i;
    return NULL;
}

/* Recompute lengths and CRCs in place (control bit 0). */
static void repair(uint8_t *p, size_t n)
{
    int is_ckpt = n >= 12 && !memcmp(p, "ODSKYCK1", 8);
    size_t end = is_ckpt ? n - 4 : n;
    const uint8_t *f = find(p, end, SNAP_MAGIC, 8);
    if (f) {
        size_t off = (size_t)(f - p);
        size_t span = end - off;
        if (span >= SNAP_HEADER_BYTES + SNAP_TRAILER_BYTES) {
            uint8_t *s = p + off;
            put_le(s + 16, span - SNAP_HEADER_BYTES - SNAP_TRAILER_BYTES, 8);
            put_le(s + span - 4, snap_crc32c(0, s, span - 4), 4);
            if (is_ckpt && off >= 8)
                put_le(p + off - 8, span, 8);
        }
    }
    if (is_ckpt)
        put_le(p + n - 4, snap_crc32c(0, p, n - 4), 4);
}

/* Rough upper bound of a model's memory from its parameters. */
static double model_estimate(const model_params *p)
{
    double d = p->dim, k = p->k;
    double est = (double)p->warm_n * (d * 34.0 + 16.0);
    est += (double)p->reservoir_n * (d * 9.0 + 24.0);
    est += (double)p->space_chains * p->space_depth * p->space_width *
           p->space_rows * 8.0;
    est += (double)p->space_chains * (p->space_dims + 1.0) * d * 16.0;
    est += k * d * (p->hist_bins + 16.0) * 8.0;
    est += (double)p->calib_bins * 3.0 * 48.0;
    est += (double)p->select_k_max * d * 16.0 + k * k * 8.0;
    return est;
}

static void exercise(model *m)
{
    model_summary s;
    model_summarize(m, &s);
    const model_params *p = model_get_params(m);
    check(s.dim == p->dim, "summary dim = params dim");
    for (uint32_t i = 0; i < p->k && i < 4; i++) {
        model_cluster_view v;
        (void)model_cluster(m, i, &v);
    }
    /* count + 1 edges (calib_histogram's contract in core/calib.h). */
    double edges[9], mass[8];
    check(model_score_histogram(m, edges, mass, 8) <= 8, "histogram count <= n");

    uint32_t d = p->dim;
    double x[MODEL_MAX_DIM], e[MODEL_MAX_DIM];
    uint8_t miss[MODEL_MAX_DIM];
    for (int t = 0; t < 3; t++) {
        for (uint32_t j = 0; j < d; j++) {
            x[j] = (double)((int)(j * 7 + t * 3) % 11) - 5.0;
            e[j] = 0.1;
            miss[j] = (j + t) % 5 == 4;
        }
        model_input in = {.x = x, .err = e, .missing = miss,
                          .time_days = s.time_days + 0.001 * t, .learn = 1};
        model_result r;
        check(model_observe(m, &in, &r) == 0, "observe succeeds");
    }
}

/* The model's snapshot, into the shared work buffer. */
static size_t snapshot(const model *m)
{
    size_t need = model_snapshot_size(m), len = 0;
    if (need > work_cap) {
        free(work);
        work = malloc(need);
        work_cap = work ? need : 0;
        check(work != NULL, "snapshot buffer");
    }
    check(model_snapshot(m, work, work_cap, &len) == 0 && len == need,
          "snapshot writes model_snapshot_size bytes");
    return len;
}

static void restore(const uint8_t *buf, size_t len)
{
    model_params p;
    if (model_snapshot_params(buf, len, &p) != 0)
        return;
    if (model_params_check(&p, NULL, NULL, 0) == 0 &&
        model_estimate(&p) > FUZZ_MODEL_MAX_BYTES)
        return;
    int err = 0;
    model *m = model_restore(buf, len, &err);
    if (!m) {
        check(err < 0, "a failed restore gives an error code");
        return;
    }
    /* Loading may normalise a field (a flag byte to 0/1, a ring index
     * modulo its size), so the first snapshot need not equal the input;
     * but it must restore, and snapshot to itself from then on. */
    size_t n = snapshot(m);
    uint8_t *first = malloc(n);
    check(first != NULL, "copy of the first snapshot");
    memcpy(first, work, n);
    model *again = model_restore(first, n, &err);
    check(again != NULL, "the restored model's snapshot restores");
    size_t n2 = snapshot(again);
    if (n2 != n || memcmp(work, first, n)) {
        size_t i = 0;
        while (i < n && i < n2 && work[i] == first[i])
            i++;
        fprintf(stderr, "snapshot after a second restore: %zu bytes, first "
                        "%zu; first difference at byte %zu of the frame\n",
                n2, n, i);
        const char *dump = getenv("FUZZ_DUMP"); /* folder for both frames */
        if (dump) {
            char p[4096];
            snprintf(p, sizeof p, "%s/first.snap", dump);
            FILE *f = fopen(p, "wb");
            if (f && fwrite(first, 1, n, f) == n)
                fclose(f);
            snprintf(p, sizeof p, "%s/again.snap", dump);
            f = fopen(p, "wb");
            if (f && fwrite(work, 1, n2, f) == n2)
                fclose(f);
        }
        check(0, "snapshot -> restore -> snapshot is the identity");
    }
    free(first);
    model_free(again);
    exercise(m);
    n = snapshot(m);
    model *m2 = model_restore(work, n, &err);
    if (!m2)
        fprintf(stderr, "restore after observing: %s\n", core_strerror(err));
    check(m2 != NULL, "snapshot of an observed model restores");
    model_free(m2);
    model_free(m);
}

int LLVMFuzzerInitialize(int *argc, char ***argv)
{
    (void)argc;
    (void)argv;
    const char *tmp = getenv("TMPDIR");
    char tmpl[4096];
    snprintf(tmpl, sizeof tmpl, "%s/oddsky-fuzz-ckpt-XXXXXX",
             tmp && tmp[0] ? tmp : "/tmp");
    if (!mkdtemp(tmpl)) {
        perror("mkdtemp");
        abort();
    }
    snprintf(ckpt_path, sizeof ckpt_path, "%s/%s", tmpl, STATE_FILE_NAME);
    return 0;
}

int LLVMFuzzerTestOneInput(const uint8_t *data, size_t size)
{
    if (size < 1)
        return 0;
    uint8_t ctl = data[0];
    size_t n = size - 1;
    uint8_t *buf = malloc(n ? n : 1);
    check(buf != NULL, "input copy");
    memcpy(buf, data + 1, n);
    if (ctl & 1)
        repair(buf, n);

    FILE *f = fopen(ckpt_path, "wb");
    check(f != NULL, "open the checkpoint file");
    check(fwrite(buf, 1, n, f) == n && fclose(f) == 0, "write the file");
    state_checkpoint c;
    char err[512] = "";
    int rc = state_read(ckpt_path, &c, err, sizeof err);
    if (rc == 0) {
        check(c.file_bytes == n, "file_bytes = file size");
        check(c.model_len <= n, "model inside the file");
        for (uint32_t i = 0; i < c.n_features; i++)
            check(c.features[i] != NULL, "feature names present");
        for (uint32_t i = 0; i < c.ledger.n; i++)
            (void)state_ledger_get(&c.ledger, c.ledger.e[i].topic,
                                   c.ledger.e[i].partition);
        restore(c.model, c.model_len);
        state_checkpoint_free(&c);
    } else {
        check(rc < 0 && memchr(err, '\0', sizeof err) != NULL,
              "a failed read gives an error and a message");
    }
    unlink(ckpt_path);

    restore(buf, n);
    free(buf);
    return 0;
}
