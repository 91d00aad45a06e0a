/*
 * decode_bench.c - throughput of decode + feature extraction alone.
 *
 * Generates demo packets with the simulator (daemon/sim.h) in memory, keeps
 * those that carry `--min-hist` earlier detections (default 30, with the
 * history horizon widened to --history-days so that long histories exist),
 * encodes each kept packet three ways (a one-packet Avro object container,
 * schema-id framing, JSON) and times decoder_extract() with the demo
 * feature map over every buffer of one framing at a time.  Nothing is read
 * from disk during the timed loops.
 *
 * It also reports what `oddsky simulate --history N` gives with the
 * simulator's default 30-day history horizon: the mean number of history
 * points per packet over the first --stat-n packets (default 1000000, as
 * many as the end-to-end run preloads; sim_mean_history), and
 * over those that have any history at all.
 *
 *   decode_bench [--n N] [--stat-n N] [--min-hist H] [--history-days D]
 *                [--reps R] [--featmap FILE] [--schema-dir DIR]
 *
 * --schema-dir must hold 1.avsc (the demo packet schema) for the schema-id
 * run.  Prints key=value pairs on stdout.  Not a test: figures only.
 * Everything but main() is static (this file links the daemon objects).
 */
#include <stdint.h>
#include <stdio.h>
#include <stdlib.h>
#include <string.h>
#include <time.h>

#include <jansson.h>

#include "daemon/decode.h"
#include "daemon/featmap.h"
#include "daemon/sim.h"

typedef struct buf_set {
    uint8_t *data;   /* all encoded packets back to back */
    size_t *off;     /* n + 1 offsets into data */
    size_t n, cap;
} buf_set;

static double now_s(void)
{
    struct timespec ts;
    clock_gettime(CLOCK_MONOTONIC, &ts);
    return (double)ts.tv_sec + (double)ts.tv_nsec * 1e-9;
}

static int set_init(buf_set *b, size_t n, size_t bytes)
{
    b->data = malloc(bytes);
    b->off = malloc((n + 1) * sizeof *b->off);
    b->n = 0;
    b->cap = bytes;
    if (!b->data || !b->off)
        return -1;
    b->off[0] = 0;
    return 0;
}

/* Room for one more packet of at most max bytes at the end of b. */
static uint8_t *set_tail(buf_set *b, size_t max)
{
    size_t at = b->off[b->n];
    if (at + max > b->cap) {
        size_t cap = b->cap * 2 + max;
        uint8_t *d = realloc(b->data, cap);
        if (!d)
            return NULL;
        b->data = d;
        b->cap = cap;
    }
    return b->data + at;
}

static void set_push(buf_set *b, size_t len)
{
    b->off[b->n + 1] = b->off[b->n] + len;
    b->n++;
}

/* Best of reps passes over every buffer; returns packets per second or -1
 * on the first decode error.  *hist_mean gets the mean history points. */
static double time_set(decoder *d, const buf_set *b, int reps, double *hist_mean,
                       const char **framing)
{
    static packet_features pf;
    double best = 0;
    for (int r = 0; r < reps; r++) {
        uint64_t hist = 0;
        double t0 = now_s();
        for (size_t i = 0; i < b->n; i++) {
            int rc = decoder_extract(d, b->data + b->off[i], b->off[i + 1] - b->off[i], &pf);
            if (rc != 0) {
                fprintf(stderr, "decode_bench: packet %zu: %s\n", i, packet_reason_name(rc));
                return -1;
            }
            hist += pf.history_points;
        }
        double el = now_s() - t0;
        double rate = (double)b->n / el;
        if (rate > best)
            best = rate;
        *hist_mean = (double)hist / (double)b->n;
        *framing = pf.framing;
    }
    return best;
}

int main(int argc, char **argv)
{
    size_t n = 200000, stat_n = 1000000;
    unsigned min_hist = 30;
    double history_days = 365.0;
    int reps = 3;
    const char *fm_path = "config/demo-featmap.json";
    const char *schema_dir = NULL;
    for (int i = 1; i < argc; i++) {
        if (!strcmp(argv[i], "--n") && i + 1 < argc)
            n = strtoull(argv[++i], NULL, 10);
        else if (!strcmp(argv[i], "--stat-n") && i + 1 < argc)
            stat_n = strtoull(argv[++i], NULL, 10);
        else if (!strcmp(argv[i], "--min-hist") && i + 1 < argc)
            min_hist = (unsigned)atoi(argv[++i]);
        else if (!strcmp(argv[i], "--history-days") && i + 1 < argc)
            history_days = strtod(argv[++i], NULL);
        else if (!strcmp(argv[i], "--reps") && i + 1 < argc)
            reps = atoi(argv[++i]);
        else if (!strcmp(argv[i], "--featmap") && i + 1 < argc)
            fm_path = argv[++i];
        else if (!strcmp(argv[i], "--schema-dir") && i + 1 < argc)
            schema_dir = argv[++i];
        else {
            fprintf(stderr, "usage: decode_bench [--n N] [--stat-n N] [--min-hist H] [--history-days D] "
                            "[--reps R] [--featmap FILE] [--schema-dir DIR]\n");
            return 64;
        }
    }
    if (n == 0 || stat_n == 0 || min_hist < 1 || min_hist > SIM_HISTORY_CAP || reps < 1) {
        fprintf(stderr, "decode_bench: bad arguments\n");
        return 64;
    }
    char err[512];
    static sim_packet pk;

    /* What the simulator gives with its default 30-day horizon. */
    sim_params dp;
    sim_params_default(&dp);
    dp.history_max = min_hist;
    sim *s = sim_new(&dp, err, sizeof err);
    if (!s) {
        fprintf(stderr, "decode_bench: sim_new: %s\n", err);
        return 70;
    }
    uint64_t h_all = 0, h_with = 0, n_with = 0, n_full = 0;
    for (size_t i = 0; i < stat_n; i++) {
        sim_next(s, &pk);
        h_all += pk.n_hist;
        if (pk.n_hist) {
            h_with += pk.n_hist;
            n_with++;
        }
        n_full += pk.n_hist >= min_hist;
    }
    sim_free(s);
    printf("sim_default_history_max=%u sim_default_history_days=%.0f\n", min_hist,
           dp.history_days);
    printf("sim_packets=%zu sim_mean_history=%.2f sim_mean_history_nonzero=%.2f "
           "sim_frac_full_history=%.4f\n",
           stat_n, (double)h_all / (double)stat_n,
           n_with ? (double)h_with / (double)n_with : 0.0, (double)n_full / (double)stat_n);

    /* The benchmark packets: exactly min_hist earlier detections each. */
    sim_params p;
    sim_params_default(&p);
    p.history_max = min_hist;
    p.history_days = history_days;
    s = sim_new(&p, err, sizeof err);
    if (!s) {
        fprintf(stderr, "decode_bench: sim_new: %s\n", err);
        return 70;
    }
    buf_set sc, si, sj;
    if (set_init(&sc, n, n * 1200) || set_init(&si, n, n * 700) ||
        set_init(&sj, n, n * 2400)) {
        fprintf(stderr, "decode_bench: out of memory\n");
        return 71;
    }
    uint8_t sync[16];
    sim_sync_marker(7, sync);
    size_t scanned = 0;
    while (sc.n < n) {
        sim_next(s, &pk);
        scanned++;
        if (pk.n_hist < min_hist)
            continue;
        uint8_t *c = set_tail(&sc, SIM_CONTAINER_MAX);
        uint8_t *d = set_tail(&si, SIM_AVRO_MAX + 5);
        uint8_t *j = set_tail(&sj, SIM_JSON_MAX);
        if (!c || !d || !j) {
            fprintf(stderr, "decode_bench: out of memory\n");
            return 71;
        }
        int lc = sim_encode_container(&pk, sync, c, SIM_CONTAINER_MAX);
        int li = sim_encode_schema_id(&pk, 1, d, SIM_AVRO_MAX + 5);
        int lj = sim_encode_json(&pk, (char *)j, SIM_JSON_MAX);
        if (lc < 0 || li < 0 || lj < 0) {
            fprintf(stderr, "decode_bench: encode failed\n");
            return 70;
        }
        set_push(&sc, (size_t)lc);
        set_push(&si, (size_t)li);
        set_push(&sj, (size_t)lj);
    }
    sim_free(s);
    printf("bench_packets=%zu bench_scanned=%zu bench_history=%u bench_history_days=%.0f\n",
           n, scanned, min_hist, history_days);
    printf("bytes_container=%.1f bytes_schema_id=%.1f bytes_json=%.1f\n",
           (double)sc.off[n] / (double)n, (double)si.off[n] / (double)n,
           (double)sj.off[n] / (double)n);

    json_error_t je;
    json_t *spec = json_load_file(fm_path, JSON_DISABLE_EOF_CHECK, &je);
    if (!spec) {
        fprintf(stderr, "decode_bench: %s:%d: %s\n", fm_path, je.line, je.text);
        return 66;
    }
    featmap *fm = featmap_new(spec, err, sizeof err);
    json_decref(spec);
    if (!fm) {
        fprintf(stderr, "decode_bench: featmap: %s\n", err);
        return 78;
    }
    decoder_opts o = {.schema_dir = schema_dir, .fm = fm};
    decoder *dec = decoder_new(&o, err, sizeof err);
    if (!dec) {
        fprintf(stderr, "decode_bench: decoder_new: %s\n", err);
        return 70;
    }
    struct {
        const char *key;
        const buf_set *b;
    } runs[] = {{"decode_features_per_s", &sc},
                {"decode_features_per_s_schema_id", &si},
                {"decode_features_per_s_json", &sj}};
    int status = 0;
    for (size_t r = 0; r < sizeof runs / sizeof runs[0]; r++) {
        if (runs[r].b == &si && !schema_dir) {
            fprintf(stderr, "decode_bench: no --schema-dir, schema-id run skipped\n");
            continue;
        }
        double hist = 0;
        const char *framing = "?";
        double rate = time_set(dec, runs[r].b, reps, &hist, &framing);
        if (rate < 0) {
            status = 1;
            continue;
        }
        printf("%s=%.0f framing=%s mean_history_points=%.2f dim=%u\n", runs[r].key, rate,
               framing ? framing : "?", hist, featmap_dim(fm));
    }
    decoder_free(dec);
    featmap_free(fm);
    free(sc.data), free(sc.off), free(si.data), free(si.off), free(sj.data), free(sj.off);
    return status;
}
