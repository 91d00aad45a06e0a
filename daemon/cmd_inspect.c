/*
 * cmd_inspect.c - `oddsky inspect`: what a checkpoint file holds, as text
 * or JSON.
 *
 * The file is read and verified with state_read() (magic, version, CRC);
 * the model parameters come from model_snapshot_params() and everything
 * else from a model rebuilt with model_restore() and model_summarize(), so
 * inspect accepts exactly the checkpoints the daemon would restore.
 * Nothing is written.
 *
 * Exit status: 0 printed, 64 bad usage, 65 corrupt or incompatible file,
 * 66 missing or unreadable file.
 */
#include <errno.h>
#include <inttypes.h>
#include <math.h>
#include <stdio.h>
#include <stdlib.h>
#include <string.h>
#include <sys/stat.h>
#include <sysexits.h>
#include <time.h>

#include <jansson.h>

#include "../core/model.h"
#include "commands.h"
#include "config.h"
#include "state.h"

#define INSPECT_TOP_DEFAULT 5u

static void usage(FILE *out)
{
    fprintf(out,
        "usage: oddsky inspect [--json] [--top N] FILE\n"
        "\n"
        "Prints what a checkpoint holds: when it was written, its size, the\n"
        "feature names, the learned-offset ledger (per input partition, the\n"
        "highest offset the model has learned), the model parameters that matter\n"
        "(k, warm-up size, half-lives, score, flag policy), the learned, scored\n"
        "and flagged counts, whether the model is warm, its event time, the\n"
        "novelty threshold, the expected flags per night, its memory, and the\n"
        "heaviest clusters.  FILE may be the checkpoint folder (state.dir), in\n"
        "which case its " STATE_FILE_NAME " is read.\n"
        "\n"
        "  --json       one JSON object instead of text\n"
        "  --top N      clusters listed, heaviest first (default %u; 0 = all)\n"
        "  -h, --help   this text\n"
        "\n"
        "exit status: 0 done, 64 bad usage, 65 corrupt or incompatible\n"
        "checkpoint, 66 missing or unreadable file\n",
        INSPECT_TOP_DEFAULT);
}

static const char *enum_name(const char *option, int v)
{
    const config_option *o = config_option_find(option);
    if (!o || !o->enum_names || v < 0)
        return "?";
    for (int i = 0; o->enum_names[i]; i++)
        if (i == v)
            return o->enum_names[i];
    return "?";
}

static void iso_utc_ms(uint64_t ms, char *buf, size_t len)
{
    time_t s = (time_t)(ms / 1000);
    struct tm tm;
    if (!gmtime_r(&s, &tm)) {
        snprintf(buf, len, "?");
        return;
    }
    size_t n = strftime(buf, len, "%Y-%m-%dT%H:%M:%S", &tm);
    snprintf(buf + n, len - n, ".%03uZ", (unsigned)(ms % 1000));
}

/* MJD days -> ISO UTC (MJD 40587 is 1970-01-01). */
static void iso_from_mjd(double mjd, char *buf, size_t len)
{
    if (!isfinite(mjd) || mjd < 40587.0 || mjd > 40587.0 + 1e6) {
        snprintf(buf, len, "-");
        return;
    }
    iso_utc_ms((uint64_t)llround((mjd - 40587.0) * 86400000.0), buf, len);
}

typedef struct cl_row {
    uint32_t index;
    double weight, last;
} cl_row;

static int by_weight(const void *a, const void *b)
{
    const cl_row *x = a, *y = b;
    if (x->weight != y->weight)
        return x->weight < y->weight ? 1 : -1;
    return x->index < y->index ? -1 : x->index > y->index;
}

static json_t *jnum(double v)
{
    return isfinite(v) ? json_real(v) : json_null();
}

static int print_json(const char *path, const state_checkpoint *ck,
                      const model_params *mp, const model_summary *s,
                      const cl_row *rows, uint32_t n_rows)
{
    char when[48], mt[48];
    iso_utc_ms(ck->written_unix_ms, when, sizeof when);
    iso_from_mjd(s->time_days, mt, sizeof mt);
    json_t *o = json_object();
    json_object_set_new(o, "path", json_string(path));
    json_object_set_new(o, "file_bytes", json_integer((json_int_t)ck->file_bytes));
    json_object_set_new(o, "written_unix_ms",
                        json_integer((json_int_t)ck->written_unix_ms));
    json_object_set_new(o, "written", json_string(when));
    json_t *f = json_array();
    for (uint32_t j = 0; j < ck->n_features; j++)
        json_array_append_new(f, json_string(ck->features[j]));
    json_object_set_new(o, "features", f);
    json_t *l = json_array();
    for (uint32_t i = 0; i < ck->ledger.n; i++) {
        const state_ledger_entry *e = &ck->ledger.e[i];
        json_array_append_new(l, json_pack("{s:s,s:i,s:I}", "topic", e->topic,
                                           "partition", (int)e->partition,
                                           "learned", (json_int_t)e->learned));
    }
    json_object_set_new(o, "ledger", l);
    json_t *p = json_object();
    json_object_set_new(p, "dim", json_integer(mp->dim));
    json_object_set_new(p, "k", json_integer(mp->k));
    json_object_set_new(p, "warmup_vectors", json_integer(mp->warm_n));
    json_object_set_new(p, "scale_half_life_days", jnum(mp->scale_half_life_days));
    json_object_set_new(p, "kmeans_half_life_days", jnum(mp->kmeans_half_life_days));
    json_object_set_new(p, "sketch_half_life_days", jnum(mp->sketch_half_life_days));
    json_object_set_new(p, "calib_half_life_days", jnum(mp->calib_half_life_days));
    json_object_set_new(p, "score", json_string(enum_name("model.score", mp->score)));
    json_object_set_new(p, "flag_policy",
                        json_string(enum_name("model.flag_policy", mp->policy)));
    json_object_set_new(p, "alpha", jnum(mp->alpha));
    json_object_set_new(p, "budget_flags_per_hour", jnum(mp->budget_per_hour));
    json_object_set_new(p, "seed", json_integer((json_int_t)mp->seed));
    json_object_set_new(o, "params", p);
    json_t *m = json_object();
    json_object_set_new(m, "learned", json_integer((json_int_t)s->learned));
    json_object_set_new(m, "scored", json_integer((json_int_t)s->scored));
    json_object_set_new(m, "flagged", json_integer((json_int_t)s->flagged));
    json_object_set_new(m, "retired", json_integer((json_int_t)s->retired));
    json_object_set_new(m, "warm", json_boolean(s->warm));
    json_object_set_new(m, "time_days", jnum(s->time_days));
    json_object_set_new(m, "time", json_string(mt));
    json_object_set_new(m, "threshold", jnum(s->threshold));
    json_object_set_new(m, "expected_flags_per_night",
                        jnum(s->expected_flags_per_night));
    json_object_set_new(m, "space_fill", jnum(s->space_fill));
    json_object_set_new(m, "memory_bytes", json_integer((json_int_t)s->bytes));
    json_object_set_new(m, "suggested_k", json_integer(s->suggested_k));
    json_t *c = json_array();
    for (uint32_t i = 0; i < n_rows; i++)
        json_array_append_new(c, json_pack("{s:i,s:o,s:o}", "index",
                                           (int)rows[i].index, "weight",
                                           jnum(rows[i].weight), "last_time_days",
                                           jnum(rows[i].last)));
    json_object_set_new(m, "clusters", c);
    json_object_set_new(o, "model", m);
    int rc = json_dumpf(o, stdout, JSON_INDENT(2) | JSON_PRESERVE_ORDER);
    fputc('\n', stdout);
    json_decref(o);
    return rc == 0 ? 0 : EX_IOERR;
}

static void print_text(const char *path, const state_checkpoint *ck,
                       const model_params *mp, const model_summary *s,
                       const cl_row *rows, uint32_t n_rows)
{
    char when[48], mt[48];
    iso_utc_ms(ck->written_unix_ms, when, sizeof when);
    iso_from_mjd(s->time_days, mt, sizeof mt);
    printf("checkpoint  %s\n", path);
    printf("written     %s\n", when);
    printf("file        %zu bytes\n", ck->file_bytes);
    printf("features    %u:", ck->n_features);
    for (uint32_t j = 0; j < ck->n_features; j++)
        printf(" %s", ck->features[j]);
    printf("\nledger      %u partition%s\n", ck->ledger.n,
           ck->ledger.n == 1 ? "" : "s");
    for (uint32_t i = 0; i < ck->ledger.n; i++) {
        const state_ledger_entry *e = &ck->ledger.e[i];
        if (e->learned < 0)
            printf("  %s [%" PRId32 "]  nothing learned\n", e->topic, e->partition);
        else
            printf("  %s [%" PRId32 "]  learned up to offset %" PRId64 "\n",
                   e->topic, e->partition, e->learned);
    }
    printf("model       k %u, warm-up %u vectors, %u features\n", mp->k,
           mp->warm_n, mp->dim);
    printf("half-lives  scale %g, k-means %g, sketch %g, calibration %g days\n",
           mp->scale_half_life_days, mp->kmeans_half_life_days,
           mp->sketch_half_life_days, mp->calib_half_life_days);
    printf("score       %s\n", enum_name("model.score", mp->score));
    if (mp->policy == MODEL_FLAG_ALPHA)
        printf("policy      alpha (flag when tail_prob <= %g)\n", mp->alpha);
    else
        printf("policy      %s (%g flags per event-time hour)\n",
               enum_name("model.flag_policy", mp->policy), mp->budget_per_hour);
    printf("counts      learned %" PRIu64 ", scored %" PRIu64 ", flagged %" PRIu64
           ", clusters retired %" PRIu64 "\n",
           s->learned, s->scored, s->flagged, s->retired);
    printf("warm        %s\n", s->warm ? "yes" : "no");
    printf("event time  MJD %.6f (%s)\n", s->time_days, mt);
    printf("threshold   %.6g novelty\n", s->threshold);
    printf("expected    %.4g flags per night at this threshold\n",
           s->expected_flags_per_night);
    printf("memory      %zu bytes (space sketch %.1f%% filled)\n", s->bytes,
           100.0 * s->space_fill);
    if (s->suggested_k)
        printf("suggested k %u\n", s->suggested_k);
    if (!s->warm) {
        printf("clusters    none yet (not warm)\n");
        return;
    }
    printf("clusters    %u heaviest of %u:\n", n_rows, mp->k);
    for (uint32_t i = 0; i < n_rows; i++)
        printf("  #%-4u weight %-12.6g last touched MJD %.6f\n", rows[i].index,
               rows[i].weight, rows[i].last);
}

int cmd_inspect(int argc, char **argv)
{
    const char *file = NULL;
    int json = 0;
    unsigned long top = INSPECT_TOP_DEFAULT;
    for (int i = 1; i < argc; i++) {
        const char *a = argv[i];
        if (!strcmp(a, "-h") || !strcmp(a, "--help")) {
            usage(stdout);
            return 0;
        } else if (!strcmp(a, "--json")) {
            json = 1;
        } else if (!strcmp(a, "--top")) {
            char *end;
            if (i + 1 >= argc) {
                fprintf(stderr, "oddsky inspect: --top needs a number (see --help)\n");
                return EX_USAGE;
            }
            errno = 0;
            top = strtoul(argv[++i], &end, 10);
            if (errno || *end || argv[i][0] == '-' || !argv[i][0] ||
                top > MODEL_MAX_K) {
                fprintf(stderr, "oddsky inspect: --top '%s': not a number in "
                        "0..%u (see --help)\n", argv[i], MODEL_MAX_K);
                return EX_USAGE;
            }
        } else if (a[0] == '-' && a[1]) {
            fprintf(stderr, "oddsky inspect: unknown option '%s' (see --help)\n", a);
            return EX_USAGE;
        } else if (!file) {
            file = a;
        } else {
            fprintf(stderr, "oddsky inspect: one FILE only (see --help)\n");
            return EX_USAGE;
        }
    }
    if (!file) {
        fprintf(stderr, "oddsky inspect: FILE expected (see --help)\n");
        return EX_USAGE;
    }
    char path[4096];
    struct stat st;
    if (stat(file, &st) == 0 && S_ISDIR(st.st_mode)) {
        if (state_path(file, path, sizeof path) != 0) {
            fprintf(stderr, "oddsky inspect: %s: path too long\n", file);
            return EX_USAGE;
        }
    } else {
        snprintf(path, sizeof path, "%s", file);
    }

    state_checkpoint ck;
    char err[512];
    int rc = state_read(path, &ck, err, sizeof err);
    if (rc < 0) {
        int data = rc == -EBADMSG || rc == -EPROTO;
        fprintf(stderr, "oddsky inspect: %s\n", err[0] ? err : strerror(-rc));
        return data ? EX_DATAERR : (rc == -ENOMEM ? EX_OSERR : EX_NOINPUT);
    }
    int ret = 0;
    model *m = NULL;
    cl_row *rows = NULL;
    model_params mp;
    int e = model_snapshot_params(ck.model, ck.model_len, &mp);
    if (e != 0) {
        fprintf(stderr, "oddsky inspect: %s: model snapshot: %s\n", path,
                core_strerror(e));
        ret = EX_DATAERR;
        goto done;
    }
    if (!(m = model_restore(ck.model, ck.model_len, &e))) {
        fprintf(stderr, "oddsky inspect: %s: model snapshot: %s\n", path,
                core_strerror(e));
        ret = e == CORE_ENOMEM ? EX_OSERR : EX_DATAERR;
        goto done;
    }
    if (mp.dim != ck.n_features) {
        fprintf(stderr, "oddsky inspect: %s: incompatible: %u feature names but "
                "the model has %u features\n", path, ck.n_features, mp.dim);
        ret = EX_DATAERR;
        goto done;
    }
    model_summary s;
    model_summarize(m, &s);
    uint32_t n_rows = 0;
    if (s.warm) {
        rows = calloc(mp.k, sizeof *rows);
        if (!rows) {
            ret = EX_OSERR;
            goto done;
        }
        for (uint32_t i = 0; i < mp.k; i++) {
            model_cluster_view v;
            if (model_cluster(m, i, &v) == 0)
                rows[n_rows++] = (cl_row){i, v.weight, v.last_time_days};
        }
        qsort(rows, n_rows, sizeof *rows, by_weight);
        if (top && n_rows > top)
            n_rows = (uint32_t)top;
    }
    if (json)
        ret = print_json(path, &ck, &mp, &s, rows, n_rows);
    else
        print_text(path, &ck, &mp, &s, rows, n_rows);
    if (fflush(stdout) != 0)
        ret = EX_IOERR;
done:
    free(rows);
    model_free(m);
    state_checkpoint_free(&ck);
    return ret;
}
