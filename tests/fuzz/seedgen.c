/*
 * seedgen.c - writes the binary seed inputs of the fuzz corpora that
 * `oddsky simulate` cannot produce as files: demo packets in bare-Avro
 * and schema-id framing (simulate sends those only to Kafka), small real
 * model snapshots and a real checkpoint file.
 *
 * Usage: seedgen DECODE_DIR CHECKPOINT_DIR
 *
 * Everything here comes from the real encoders (sim_encode_*,
 * model_snapshot, state_write), so the seeds are what the daemon would
 * really see.  Models use tiny parameters so the snapshots stay a few KiB
 * and the fuzzer mutates them quickly.  Checkpoint seeds carry one leading
 * control byte, as fuzz_checkpoint.c expects (bit 0: repair the CRCs
 * after mutation).  Output is deterministic.
 */
#include <errno.h>
#include <stdio.h>
#include <stdlib.h>
#include <string.h>

#include "core/model.h"
#include "daemon/sim.h"
#include "daemon/state.h"

static int write_file(const char *dir, const char *name, const uint8_t *ctl,
                      const void *buf, size_t len)
{
    char path[4096];
    snprintf(path, sizeof path, "%s/%s", dir, name);
    FILE *f = fopen(path, "wb");
    if (!f) {
        fprintf(stderr, "seedgen: %s: %s\n", path, strerror(errno));
        return -1;
    }
    if (ctl)
        fwrite(ctl, 1, 1, f);
    fwrite(buf, 1, len, f);
    if (fclose(f) != 0) {
        fprintf(stderr, "seedgen: %s: write failed\n", path);
        return -1;
    }
    return 0;
}

/* Packets in the two framings simulate cannot write to a file. */
static int packets(const char *dir)
{
    sim_params sp;
    sim_params_default(&sp);
    sp.seed = 7;
    sp.n_fields = 4;
    sp.burst = 2;
    sp.history_max = 6;
    char err[200];
    sim *s = sim_new(&sp, err, sizeof err);
    if (!s) {
        fprintf(stderr, "seedgen: sim_new: %s\n", err);
        return -1;
    }
    uint8_t buf[SIM_AVRO_MAX + 8];
    sim_packet *p = malloc(sizeof *p);
    int rc = 0;
    /* Skip ahead so that the packets carry some history. */
    for (int i = 0; i < 60; i++)
        sim_next(s, p);
    for (int i = 0; i < 4 && rc == 0; i++) {
        sim_next(s, p);
        char name[64];
        int n = sim_encode_avro(p, buf, sizeof buf);
        snprintf(name, sizeof name, "sim-bare-%d.avro", i);
        rc = n < 0 ? -1 : write_file(dir, name, NULL, buf, (size_t)n);
        if (rc == 0) {
            n = sim_encode_schema_id(p, i == 3 ? 2u : 1u, buf, sizeof buf);
            snprintf(name, sizeof name, "sim-schema-id-%d.bin", i);
            rc = n < 0 ? -1 : write_file(dir, name, NULL, buf, (size_t)n);
        }
    }
    free(p);
    sim_free(s);
    return rc;
}

static void small_params(model_params *mp, uint32_t dim)
{
    model_params_default(mp, dim);
    mp->k = 2;
    mp->warm_n = 8;
    mp->lloyd_passes = 1;
    mp->seed_restarts = 1;
    mp->mix_nearest = 2;
    mp->hist_bins = 4;
    mp->space_dims = 2;
    mp->space_chains = 2;
    mp->space_depth = 3;
    mp->space_width = 16;
    mp->reservoir_n = 8;
    mp->calib_bins = 16;
    mp->select_k_min = 1;
    mp->select_k_max = 3;
}

/* Snapshot of a model after n observations (n < warm_n: not yet warm). */
static uint8_t *snapshot_after(const model_params *mp, unsigned n,
                               size_t *len)
{
    int err = 0;
    model *m = model_new(mp, &err);
    if (!m) {
        fprintf(stderr, "seedgen: model_new: %d\n", err);
        return NULL;
    }
    double x[3], e[3] = {0.1, 0.2, 0.05};
    uint8_t miss[3] = {0, 0, 0};
    for (unsigned i = 0; i < n; i++) {
        x[0] = (double)(i % 5) - 2.0;
        x[1] = (i % 2) ? 10.0 + 0.1 * i : -10.0 - 0.1 * i;
        x[2] = 0.5 * (double)i;
        miss[2] = (i % 7) == 3;
        model_input in = {.x = x, .err = e, .missing = miss,
                          .time_days = 60000.0 + 0.01 * i, .learn = 1};
        model_result r;
        model_observe(m, &in, &r);
    }
    size_t need = model_snapshot_size(m);
    uint8_t *buf = malloc(need);
    if (!buf || model_snapshot(m, buf, need, len) != 0) {
        free(buf);
        buf = NULL;
    }
    model_free(m);
    return buf;
}

static int models(const char *dir)
{
    model_params mp;
    small_params(&mp, 3);
    mp.space_chains = 2;
    mp.score = MODEL_SCORE_COMBINED;
    size_t cold_len = 0, warm_len = 0;
    uint8_t *cold = snapshot_after(&mp, 5, &cold_len);
    uint8_t *warm = snapshot_after(&mp, 40, &warm_len);
    mp.space_chains = 0;
    mp.score = MODEL_SCORE_DENSITY;
    size_t flat_len = 0;
    uint8_t *flat = snapshot_after(&mp, 20, &flat_len);
    int rc = -1;
    if (!cold || !warm || !flat)
        goto done;
    const uint8_t fix = 1, raw = 0;
    if (write_file(dir, "model-cold.snap", &fix, cold, cold_len) ||
        write_file(dir, "model-warm.snap", &fix, warm, warm_len) ||
        write_file(dir, "model-warm-nofix.snap", &raw, warm, warm_len) ||
        write_file(dir, "model-nosketch.snap", &fix, flat, flat_len))
        goto done;

    /* A real checkpoint around the warm model, via state_write. */
    char tmpl[] = "/tmp/oddsky-seedgen-XXXXXX";
    if (!mkdtemp(tmpl))
        goto done;
    char *const feats[] = {"mag", "log_mag_err", "quality"};
    state_ledger led;
    state_ledger_init(&led, 2);
    state_ledger_set(&led, "demo-in", 0, 1234);
    state_ledger_set(&led, "demo-in", 3, -1);
    char err[256];
    int wrc = state_write(tmpl, state_io_default(), 1700000000000ull, feats,
                          3, &led, warm, warm_len, err, sizeof err);
    state_ledger_free(&led);
    char path[4096];
    snprintf(path, sizeof path, "%s/%s", tmpl, STATE_FILE_NAME);
    if (wrc != 0) {
        fprintf(stderr, "seedgen: state_write: %s\n", err);
    } else {
        FILE *f = fopen(path, "rb");
        uint8_t *ck = malloc(1 << 20);
        size_t n = f && ck ? fread(ck, 1, 1 << 20, f) : 0;
        if (f)
            fclose(f);
        if (n > 0 && write_file(dir, "checkpoint-warm.ckpt", &fix, ck, n) == 0 &&
            write_file(dir, "checkpoint-warm-nofix.ckpt", &raw, ck, n) == 0)
            rc = 0;
        free(ck);
    }
    remove(path);
    remove(tmpl);
done:
    free(cold);
    free(warm);
    free(flat);
    return rc;
}

int main(int argc, char **argv)
{
    if (argc != 3) {
        fprintf(stderr, "usage: seedgen DECODE_DIR CHECKPOINT_DIR\n");
        return 64;
    }
    if (packets(argv[1]) != 0 || models(argv[2]) != 0)
        return 1;
    return 0;
}
