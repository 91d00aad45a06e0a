/*
 * config.c - the option table and everything it drives (see config.h).
 *
 * Design: each option is one row of options[] below.  A value reaches a
 * field by one road only: text (a default or a --set value) is first turned
 * into JSON typed by the row, then set_from_json() checks the JSON type and
 * the bounds and stores it.  So the file, --set and the defaults obey the
 * same rules, and a default that broke its own bounds would fail
 * config_init_defaults() (the unit tests check that it does not).
 *
 * Invariants: every string field is a heap string, never NULL after
 * config_init_defaults(); a failed set leaves the field as it was; errors
 * are collected, never printed here.
 */
#include "config.h"

#include <arpa/inet.h>
#include <errno.h>
#include <limits.h>
#include <math.h>
#include <stdarg.h>
#include <stdlib.h>
#include <string.h>
#include <sys/stat.h>
#include <unistd.h>

#include "featmap.h"
#include "log.h"

/* core/model.c may not be linked into every binary that links config.o
 * (unit tests of other modules): a weak reference keeps those links
 * working, and the check runs whenever the model is present. */
extern int model_params_check(const model_params *p, const char **field,
                              char *why, size_t why_len)
    __attribute__((weak));

#ifndef ODDSKY_DATADIR
#define ODDSKY_DATADIR "/usr/local/share/oddsky"
#endif
#define SHIPPED_RESULT_SCHEMA "config/schemas/oddsky-result.avsc"
#define INSTALLED_RESULT_SCHEMA ODDSKY_DATADIR "/schemas/oddsky-result.avsc"

#define CONFIG_FILE_MAX_BYTES (16u << 20)

/* log.level and log.format hold log_level / log_format values directly. */
_Static_assert(LOG_LEVEL_ERROR == 0 && LOG_LEVEL_WARN == 1 && LOG_LEVEL_INFO == 2 &&
                   LOG_LEVEL_DEBUG == 3 && LOG_FORMAT_TEXT == 0 && LOG_FORMAT_JSON == 1,
               "level_names[] and logfmt_names[] follow log.h's enums");
_Static_assert(MODEL_SCORE_DENSITY == 0 && MODEL_SCORE_SPACE == 1 && MODEL_SCORE_COMBINED == 2 &&
                   MODEL_FLAG_ALPHA == 0 && MODEL_FLAG_BUDGET == 1,
               "score_names[] and policy_names[] follow model.h's enums");
_Static_assert(sizeof(model_score_kind) == sizeof(int), "enum stored as int");
_Static_assert(sizeof(model_flag_policy) == sizeof(int), "enum stored as int");

/* ---- the table ---------------------------------------------------------- */

static const char *const score_names[] = {"density", "space", "combined", NULL};
static const char *const policy_names[] = {"alpha", "budget", NULL};
static const char *const output_names[] = {"json", "avro", NULL};
static const char *const level_names[] = {"error", "warn", "info", "debug", NULL};
static const char *const logfmt_names[] = {"text", "json", NULL};

#define O(nm, ty, fld, df, lo, hi, en, fl, un, hp)                            \
    {.name = (nm), .type = (ty),                                              \
     .offset = offsetof(struct oddsky_config, fld),                          \
     .size = sizeof(((struct oddsky_config *)0)->fld), .field = #fld,         \
     .def = (df), .min = (lo), .max = (hi), .enum_names = (en),               \
     .flags = (fl), .unit = (un), .help = (hp)}
#define B CONFIG_F_BOUNDS
#define L CONFIG_F_LIVE
#define NUM(nm, ty, fld, df, lo, hi, fl, un, hp) O(nm, ty, fld, df, lo, hi, NULL, B | (fl), un, hp)
#define STR(nm, fld, df, fl, hp) O(nm, CONFIG_STRING, fld, df, 0, 0, NULL, fl, NULL, hp)
#define BOOL(nm, fld, df, fl, hp) O(nm, CONFIG_BOOL, fld, df, 0, 0, NULL, fl, NULL, hp)
#define ENUM(nm, fld, df, en, fl, hp) O(nm, CONFIG_ENUM, fld, df, 0, 0, en, fl, NULL, hp)

static const config_option options[] = {
    /* model.*: one row per model_params field (dim comes from featmap). */
    NUM("model.k", CONFIG_UINT, model.k, "32", 1, MODEL_MAX_K, 0, NULL,
        "clusters kept by the online k-means"),
    NUM("model.warmup_vectors", CONFIG_UINT, model.warm_n, "2048", 1, 10000000, 0, NULL,
        "vectors collected before k-means++ seeding (at least model.k)"),
    NUM("model.lloyd_passes", CONFIG_UINT, model.lloyd_passes, "3", 0, 100, 0, NULL,
        "Lloyd passes over the warm-up vectors after seeding"),
    NUM("model.seed_restarts", CONFIG_UINT, model.seed_restarts, "3", 1, 100, 0, NULL,
        "k-means++ restarts at seeding; the best inertia wins"),
    NUM("model.scale_half_life_days", CONFIG_DOUBLE, model.scale_half_life_days, "30", 0.001, 100000, 0, "days",
        "event-time half-life of the per-feature mean and variance"),
    NUM("model.kmeans_half_life_days", CONFIG_DOUBLE, model.kmeans_half_life_days, "7", 0.001, 100000, 0, "days",
        "event-time half-life of cluster centroids and weights"),
    NUM("model.sketch_half_life_days", CONFIG_DOUBLE, model.sketch_half_life_days, "7", 0.001, 100000, 0, "days",
        "event-time half-life of the residual histograms and the space sketch"),
    NUM("model.calib_half_life_days", CONFIG_DOUBLE, model.calib_half_life_days, "3", 0.001, 100000, 0, "days",
        "event-time half-life of the novelty score distribution"),
    NUM("model.sd_floor", CONFIG_DOUBLE, model.sd_floor, "1e-6", 1e-12, 1000, 0, NULL,
        "lower bound on a feature's standard deviation (feature units)"),
    BOOL("model.robust", model.robust, "false", 0,
         "clip standardised values at +-model.z_clip before learning"),
    NUM("model.z_clip", CONFIG_DOUBLE, model.z_clip, "8", 1, 1000, 0, "sd",
        "clip level for model.robust"),
    NUM("model.retire_weight", CONFIG_DOUBLE, model.retire_weight, "0.5", 0, 1000000, 0, NULL,
        "a cluster whose decayed weight falls below this is retired and re-seeded"),
    NUM("model.mix_nearest", CONFIG_UINT, model.mix_nearest, "4", 1, MODEL_MAX_K, 0, NULL,
        "clusters evaluated exactly in the mixture density (at most model.k)"),
    NUM("model.hist_bins", CONFIG_UINT, model.hist_bins, "24", 4, 1024, 0, NULL,
        "residual histogram bins inside +-model.hist_range_sd (plus two tail bins)"),
    NUM("model.hist_range_sd", CONFIG_DOUBLE, model.hist_range, "6", 1, 100, 0, "sd",
        "half-width of the residual histogram grid, standardised units"),
    NUM("model.hist_pseudo_count", CONFIG_DOUBLE, model.hist_pseudo, "20", 0, 1000000, 0, NULL,
        "pseudo-count smoothing each residual histogram toward the normal"),
    NUM("model.space_dims", CONFIG_UINT, model.space_dims, "16", 1, MODEL_MAX_DIM, 0, NULL,
        "random projection dimensions P of the space sketch"),
    NUM("model.space_chains", CONFIG_UINT, model.space_chains, "16", 1, 1024, 0, NULL,
        "half-space chains M of the space sketch"),
    NUM("model.space_depth", CONFIG_UINT, model.space_depth, "12", 1, 32, 0, NULL,
        "levels L per half-space chain"),
    NUM("model.space_width", CONFIG_UINT, model.space_width, "1024", 16, 16777216, 0, NULL,
        "count-min counters per (chain, level) row"),
    NUM("model.space_rows", CONFIG_UINT, model.space_rows, "1", 1, 8, 0, NULL,
        "count-min rows per (chain, level)"),
    NUM("model.reservoir_size", CONFIG_UINT, model.reservoir_n, "4096", 16, 10000000, 0, NULL,
        "decaying sample of recent vectors (seeding, model selection)"),
    NUM("model.calib_bins", CONFIG_UINT, model.calib_bins, "2048", 16, 1048576, 0, NULL,
        "bins of the novelty score histogram (fine log grid)"),
    ENUM("model.score", model.score, "density", score_names, 0,
         "novelty score: density (-log p under the mixture), space (sketch), combined"),
    ENUM("model.flag_policy", model.policy, "budget", policy_names, 0,
         "flag when tail_prob <= model.alpha, or aim at model.budget_flags_per_hour"),
    NUM("model.alpha", CONFIG_DOUBLE, model.alpha, "1e-3", 1e-12, 1, 0, NULL,
        "tail probability threshold of the alpha flag policy"),
    NUM("model.budget_flags_per_hour", CONFIG_DOUBLE, model.budget_per_hour, "10", 1e-6, 1e9, 0, "flags/h",
        "flags per event-time hour aimed at by the budget flag policy"),
    NUM("model.stream_rate_per_hour", CONFIG_DOUBLE, model.stream_rate_per_hour, "1e5", 1, 1e12, 0, "packets/h",
        "prior packet rate used by the budget policy until it is measured"),
    NUM("model.select_k_min", CONFIG_UINT, model.select_k_min, "2", 1, MODEL_MAX_K, 0, NULL,
        "smallest k tried by model selection"),
    NUM("model.select_k_max", CONFIG_UINT, model.select_k_max, "64", 1, MODEL_MAX_K, 0, NULL,
        "largest k tried by model selection"),
    NUM("model.seed", CONFIG_UINT, model.seed, "1", 0, 9223372036854775807.0, 0, NULL,
        "PRNG seed: the same seed and input give the same model"),

    /* kafka.* */
    STR("kafka.brokers", kafka.brokers, "", CONFIG_F_RUN_REQ,
        "bootstrap servers, host:port[,host:port...] (required for run)"),
    STR("kafka.group_id", kafka.group_id, "oddsky", 0,
        "consumer group; instances in one group split the partitions"),
    O("kafka.input_topics", CONFIG_STRLIST, kafka.input_topics, "", 0, 0, NULL, CONFIG_F_RUN_REQ, NULL,
      "topics to consume alert packets from (required for run)"),
    STR("kafka.output_topic", kafka.output_topic, "oddsky-results", 0,
        "topic every result is produced to, keyed by source id"),
    STR("kafka.flagged_topic", kafka.flagged_topic, "", 0,
        "extra topic for flagged results only (\"\" = off)"),
    STR("kafka.dead_letter_topic", kafka.dead_letter_topic, "oddsky-dead-letters", 0,
        "topic for undecodable packets (original bytes + reason header)"),
    O("kafka.consumer", CONFIG_OBJECT, kafka.consumer, "{}", 0, 0, NULL, 0, NULL,
      "librdkafka consumer properties passed through (string, number or bool values)"),
    O("kafka.producer", CONFIG_OBJECT, kafka.producer, "{}", 0, 0, NULL, 0, NULL,
      "librdkafka producer properties passed through (string, number or bool values)"),
    NUM("kafka.poll_batch", CONFIG_UINT, kafka.poll_batch, "1024", 1, 1000000, 0, "messages",
        "most messages taken per poll batch"),
    NUM("kafka.poll_interval_ms", CONFIG_UINT, kafka.poll_interval_ms, "100", 1, 60000, 0, "ms",
        "period of the poll timer that backs up the queue wake-ups"),
    NUM("kafka.max_in_flight", CONFIG_UINT, kafka.max_in_flight, "100000", 1, 100000000, 0, "results",
        "results awaiting delivery before consumption pauses"),

    /* input.* and the feature map */
    O("input.schema_dir", CONFIG_STRING, input.schema_dir, "", 0, 0, NULL, CONFIG_F_PATH, NULL,
      "directory of <id>.avsc writer schemas for schema-id framing (\"\" = none)"),
    O("input.writer_schema", CONFIG_STRING, input.writer_schema, "", 0, 0, NULL, CONFIG_F_PATH, NULL,
      ".avsc writer schema for bare Avro messages (\"\" = none)"),
    NUM("input.max_message_bytes", CONFIG_UINT, input.max_message_bytes, "1048576", 64, 1073741824, 0, "bytes",
        "larger input messages go to the dead-letter topic"),
    O("featmap", CONFIG_FEATMAP, featmap, NULL, 0, 0, NULL, CONFIG_F_RUN_REQ | CONFIG_F_PATH, NULL,
      "feature map object, or a path to a JSON file relative to this config file (required for run)"),

    /* output.* */
    ENUM("output.format", output.format, "json", output_names, 0,
         "encoding of result records"),
    O("output.avro_schema", CONFIG_STRING, output.avro_schema, SHIPPED_RESULT_SCHEMA, 0, 0, NULL, CONFIG_F_PATH, NULL,
      "result .avsc for output.format=avro (falls back to " INSTALLED_RESULT_SCHEMA ")"),

    /* state.* */
    O("state.dir", CONFIG_STRING, state.dir, "./state", 0, 0, NULL, CONFIG_F_PATH, NULL,
      "checkpoint folder (created if missing)"),
    NUM("state.checkpoint_interval_s", CONFIG_UINT, state.checkpoint_interval_s, "60", 0, 86400, L, "s",
        "checkpoint period (0 = only on shutdown and SIGUSR1)"),
    BOOL("state.fresh_start_on_bad_checkpoint", state.fresh_start_on_bad_checkpoint, "false", 0,
         "start an empty model when the checkpoint is unreadable (else refuse to start)"),

    /* status.* */
    STR("status.listen", status.listen, "127.0.0.1", 0,
        "numeric IPv4/IPv6 address of the status endpoint"),
    NUM("status.port", CONFIG_UINT, status.port, "8787", 0, 65535, 0, NULL,
        "TCP port of the status endpoint (0 = off)"),
    O("status.token", CONFIG_STRING, status.token, "", 0, 0, NULL, CONFIG_F_SECRET, NULL,
      "bearer token for the write routes (\"\" = read-only); at least 16 characters"),
    BOOL("status.allow_remote_without_token", status.allow_remote_without_token, "false", 0,
         "allow a non-loopback status.listen with an empty status.token"),
    NUM("status.max_connections", CONFIG_UINT, status.max_connections, "64", 1, 65536, 0, NULL,
        "concurrent HTTP connections; more are refused"),
    NUM("status.idle_timeout_ms", CONFIG_UINT, status.idle_timeout_ms, "10000", 100, 3600000, 0, "ms",
        "close an HTTP connection idle this long"),
    NUM("status.max_header_bytes", CONFIG_UINT, status.max_header_bytes, "8192", 1024, 1048576, 0, "bytes",
        "largest request head accepted"),
    NUM("status.max_body_bytes", CONFIG_UINT, status.max_body_bytes, "4096", 0, 16777216, 0, "bytes",
        "largest request body accepted"),

    /* run.* */
    NUM("run.drain_deadline_ms", CONFIG_UINT, run.drain_deadline_ms, "10000", 0, 600000, L, "ms",
        "on SIGTERM/SIGINT, time allowed to drain deliveries before exit"),
    NUM("run.select_interval_s", CONFIG_UINT, run.select_interval_s, "600", 0, 604800, L, "s",
        "period of model selection over the reservoir (0 = off)"),
    BOOL("run.auto_resize", run.auto_resize, "false", L,
         "apply the suggested k automatically (within model.select_k_min..max)"),
    NUM("run.night_hours", CONFIG_DOUBLE, run.night_hours, "10", 0.1, 24, L, "h",
        "night length used for the expected flags per night"),

    /* log.* */
    ENUM("log.level", log.level, "info", level_names, L, "least severe level written to stderr"),
    ENUM("log.format", log.format, "text", logfmt_names, L, "text lines or JSON lines"),
};

#define N_OPTIONS (sizeof options / sizeof options[0])

/* ---- errors -------------------------------------------------------------- */

void config_errs_init(config_errs *errs)
{
    errs->n = 0;
    errs->dropped = 0;
}

void config_errs_add(config_errs *errs, const char *path, const char *fmt, ...)
{
    va_list ap;
    config_error *e;
    if (errs == NULL)
        return;
    if (errs->n >= CONFIG_ERRS_MAX) {
        errs->dropped++;
        return;
    }
    e = &errs->e[errs->n++];
    snprintf(e->path, sizeof e->path, "%s", path != NULL ? path : "");
    va_start(ap, fmt);
    vsnprintf(e->rule, sizeof e->rule, fmt, ap);
    va_end(ap);
}

unsigned config_errs_count(const config_errs *errs)
{
    return errs->n + errs->dropped;
}

void config_errs_print(const config_errs *errs, FILE *out)
{
    for (unsigned i = 0; i < errs->n; i++)
        fprintf(out, "%s: %s\n", errs->e[i].path, errs->e[i].rule);
    if (errs->dropped > 0)
        fprintf(out, "... and %u more\n", errs->dropped);
}

/* ---- table access ---------------------------------------------------------- */

size_t config_option_count(void)
{
    return N_OPTIONS;
}

const config_option *config_option_at(size_t i)
{
    return i < N_OPTIONS ? &options[i] : NULL;
}

const config_option *config_option_find(const char *name)
{
    for (size_t i = 0; i < N_OPTIONS; i++)
        if (strcmp(options[i].name, name) == 0)
            return &options[i];
    return NULL;
}

const char *config_type_name(config_type t)
{
    switch (t) {
    case CONFIG_BOOL: return "bool";
    case CONFIG_INT: return "int";
    case CONFIG_UINT: return "uint";
    case CONFIG_DOUBLE: return "double";
    case CONFIG_STRING: return "string";
    case CONFIG_ENUM: return "enum";
    case CONFIG_STRLIST: return "string-list";
    case CONFIG_OBJECT: return "object";
    case CONFIG_FEATMAP: return "featmap";
    }
    return "?";
}

static void *field_ptr(struct oddsky_config *cfg, const config_option *o)
{
    return (char *)cfg + o->offset;
}

static const void *field_cptr(const struct oddsky_config *cfg,
                              const config_option *o)
{
    return (const char *)cfg + o->offset;
}

/* A section is a dotted prefix of some option ("model", "kafka"). */
static int is_section(const char *path)
{
    size_t n = strlen(path);
    for (size_t i = 0; i < N_OPTIONS; i++)
        if (strncmp(options[i].name, path, n) == 0 && options[i].name[n] == '.')
            return 1;
    return 0;
}

/* ---- small helpers ------------------------------------------------------------ */

static void fmt_num(char *buf, size_t n, double v)
{
    if (v >= 9223372036854775807.0)
        snprintf(buf, n, "9223372036854775807"); /* INT64_MAX, the seed's bound */
    else if (v == floor(v) && fabs(v) < 1e16)
        snprintf(buf, n, "%.0f", v);
    else
        snprintf(buf, n, "%g", v);
}

/* Compact JSON text of v for "(got ...)", cut at 60 characters. */
static void fmt_json(char *buf, size_t n, const json_t *v)
{
    char *s = json_dumps(v, JSON_ENCODE_ANY | JSON_COMPACT);
    if (s == NULL) {
        snprintf(buf, n, "?");
        return;
    }
    if (strlen(s) > 60)
        snprintf(buf, n, "%.57s...", s);
    else
        snprintf(buf, n, "%s", s);
    free(s);
}

static void enum_list(char *buf, size_t n, const char *const *names)
{
    size_t len = 0;
    buf[0] = '\0';
    for (unsigned i = 0; names[i] != NULL; i++) {
        int w = snprintf(buf + len, n - len, "%s%s", i ? ", " : "", names[i]);
        if (w < 0 || (size_t)w >= n - len)
            break;
        len += (size_t)w;
    }
}

/* Shortest "%.*g" text that reads back as v. */
static void fmt_double_exact(char *buf, size_t n, double v)
{
    for (int prec = 1; prec <= 17; prec++) {
        snprintf(buf, n, "%.*g", prec, v);
        if (strtod(buf, NULL) == v)
            return;
    }
}

static unsigned levenshtein(const char *a, const char *b)
{
    size_t la = strlen(a), lb = strlen(b);
    unsigned row[128];
    if (la > 127 || lb > 127)
        return 1000;
    for (size_t j = 0; j <= lb; j++)
        row[j] = (unsigned)j;
    for (size_t i = 1; i <= la; i++) {
        unsigned diag = row[0];
        row[0] = (unsigned)i;
        for (size_t j = 1; j <= lb; j++) {
            unsigned up = row[j];
            unsigned cost = a[i - 1] == b[j - 1] ? 0 : 1;
            unsigned best = diag + cost;
            if (up + 1 < best)
                best = up + 1;
            if (row[j - 1] + 1 < best)
                best = row[j - 1] + 1;
            row[j] = best;
            diag = up;
        }
    }
    return row[lb];
}

static const char *last_segment(const char *s)
{
    const char *d = strrchr(s, '.');
    return d != NULL ? d + 1 : s;
}

/* The closest option name to an unknown dotted path, or NULL.  Both the
 * whole path and its last segment are compared, so "brokers" at the top
 * level suggests "kafka.brokers" and "model.kk" suggests "model.k". */
static const char *suggest(const char *path)
{
    const char *best = NULL;
    unsigned best_d = 1000;
    const char *key = last_segment(path);
    size_t klen = strlen(key);
    unsigned limit = klen <= 2 ? 1 : (klen <= 5 ? 2 : 3);

    for (size_t i = 0; i < N_OPTIONS; i++) {
        unsigned d1 = levenshtein(path, options[i].name);
        unsigned d2 = levenshtein(key, last_segment(options[i].name)) + 1;
        unsigned d = d1 < d2 ? d1 : d2;
        /* "kafka.topics" -> "kafka.input_topics": a part of the name, in
         * the same section. */
        if (klen >= 4 && strstr(last_segment(options[i].name), key) != NULL &&
            strncmp(options[i].name, path, (size_t)(key - path)) == 0 && d > 1)
            d = 1;
        if (d < best_d) {
            best_d = d;
            best = options[i].name;
        }
    }
    /* Close enough, and not a rewrite of the whole key. */
    return best_d <= limit && best_d < klen ? best : NULL;
}

static void unknown_option(config_errs *errs, const char *path)
{
    const char *hint = suggest(path);
    if (hint != NULL)
        config_errs_add(errs, path, "unknown option (did you mean \"%s\"?)", hint);
    else
        config_errs_add(errs, path, "unknown option (see oddsky check-config --defaults)");
}

static char *xstrdup(const char *s)
{
    size_t n = strlen(s) + 1;
    char *d = malloc(n);
    if (d != NULL)
        memcpy(d, s, n);
    return d;
}

static void strlist_free(config_strlist *l)
{
    for (size_t i = 0; i < l->n; i++)
        free(l->items[i]);
    free(l->items);
    l->items = NULL;
    l->n = 0;
}

static void props_free(config_props *p)
{
    for (size_t i = 0; i < p->n; i++) {
        free(p->items[i].key);
        free(p->items[i].value);
    }
    free(p->items);
    p->items = NULL;
    p->n = 0;
}

/* Insert or replace key; takes ownership of key and value on success. */
static int props_put(config_props *p, char *key, char *value)
{
    config_prop *grown;
    for (size_t i = 0; i < p->n; i++) {
        if (strcmp(p->items[i].key, key) == 0) {
            free(p->items[i].value);
            p->items[i].value = value;
            free(key);
            return 0;
        }
    }
    grown = realloc(p->items, (p->n + 1) * sizeof *grown);
    if (grown == NULL)
        return -1;
    p->items = grown;
    p->items[p->n].key = key;
    p->items[p->n].value = value;
    p->n++;
    return 0;
}

/* Librdkafka property names whose values are credentials. */
static int prop_is_secret(const char *key)
{
    static const char *const words[] = {"password", "secret", "oauthbearer",
                                        "key.pem", "keystore", "credential",
                                        "token", "ssl.key", NULL};
    for (unsigned i = 0; words[i] != NULL; i++)
        if (strstr(key, words[i]) != NULL)
            return 1;
    return 0;
}

static json_t *mask_string(const char *s)
{
    return json_string(s[0] != '\0' ? "***" : "");
}

/* ---- reading commented JSON -------------------------------------------------- */

int config_strip_comments(char *text, int *bad_line)
{
    enum { NORMAL, STRING, LINE, BLOCK } st = NORMAL;
    int line = 1, block_line = 0;
    for (char *p = text; *p != '\0'; p++) {
        char c = *p;
        switch (st) {
        case NORMAL:
            if (c == '"') {
                st = STRING;
            } else if (c == '/' && p[1] == '/') {
                st = LINE;
                *p = ' ';
                *++p = ' ';
            } else if (c == '/' && p[1] == '*') {
                st = BLOCK;
                block_line = line;
                *p = ' ';
                *++p = ' ';
            }
            break;
        case STRING:
            if (c == '\\' && p[1] != '\0') {
                p++;
                if (*p == '\n')
                    line++;
            } else if (c == '"') {
                st = NORMAL;
            }
            break;
        case LINE:
            if (c == '\n')
                st = NORMAL;
            else
                *p = ' ';
            break;
        case BLOCK:
            if (c == '*' && p[1] == '/') {
                *p = ' ';
                *++p = ' ';
                st = NORMAL;
            } else if (c != '\n') {
                *p = ' ';
            }
            break;
        }
        if (c == '\n')
            line++;
    }
    if (st == BLOCK) {
        if (bad_line != NULL)
            *bad_line = block_line;
        return -1;
    }
    return 0;
}

static char *read_file(const char *path, char *why, size_t why_len)
{
    FILE *f = fopen(path, "rb");
    char *buf = NULL;
    size_t len = 0, cap = 0;
    if (f == NULL) {
        snprintf(why, why_len, "%s", strerror(errno));
        return NULL;
    }
    for (;;) {
        size_t got;
        if (len + 4096 + 1 > cap) {
            size_t ncap = cap ? cap * 2 : 8192;
            char *nb;
            if (ncap > CONFIG_FILE_MAX_BYTES + 8192) {
                snprintf(why, why_len, "larger than %u bytes", CONFIG_FILE_MAX_BYTES);
                goto fail;
            }
            nb = realloc(buf, ncap);
            if (nb == NULL) {
                snprintf(why, why_len, "out of memory");
                goto fail;
            }
            buf = nb;
            cap = ncap;
        }
        got = fread(buf + len, 1, cap - len - 1, f);
        len += got;
        if (got == 0)
            break;
    }
    if (ferror(f)) {
        snprintf(why, why_len, "%s", strerror(errno));
        goto fail;
    }
    if (memchr(buf, '\0', len) != NULL) {
        snprintf(why, why_len, "contains a NUL byte (not JSON text)");
        goto fail;
    }
    buf[len] = '\0';
    fclose(f);
    return buf;
fail:
    free(buf);
    fclose(f);
    return NULL;
}

/* Parse commented JSON text (modified in place).  Parse errors are added
 * with path "name:line:column". */
static json_t *parse_commented(char *text, const char *name, config_errs *errs)
{
    json_error_t jerr;
    json_t *root;
    int bad_line = 0;
    char where[CONFIG_PATH_MAX];

    if (config_strip_comments(text, &bad_line) != 0) {
        snprintf(where, sizeof where, "%s:%d", name, bad_line);
        config_errs_add(errs, where, "unterminated /* comment");
        return NULL;
    }
    root = json_loads(text, JSON_REJECT_DUPLICATES, &jerr);
    if (root == NULL) {
        snprintf(where, sizeof where, "%s:%d:%d", name, jerr.line, jerr.column);
        config_errs_add(errs, where, "%s", jerr.text);
        return NULL;
    }
    return root;
}

/* ---- setting one value -------------------------------------------------------- */

static int check_bounds(const config_option *o, double v, const char *path,
                        config_errs *errs, const char *got)
{
    char lo[32], hi[32];
    if (!(o->flags & CONFIG_F_BOUNDS) || (v >= o->min && v <= o->max))
        return 0;
    fmt_num(lo, sizeof lo, o->min);
    fmt_num(hi, sizeof hi, o->max);
    config_errs_add(errs, path, "must be between %s and %s (got %s)", lo, hi, got);
    return -1;
}

static int set_featmap(struct oddsky_config *cfg, const config_option *o,
                       const json_t *v, const char *path, const char *base_dir,
                       config_errs *errs)
{
    json_t *obj = NULL;
    char *file = NULL;
    (void)o;

    if (json_is_object(v)) {
        obj = json_deep_copy(v);
        if (obj == NULL) {
            config_errs_add(errs, path, "out of memory");
            return -1;
        }
    } else if (json_is_string(v) && json_string_value(v)[0] != '\0') {
        const char *rel = json_string_value(v);
        char why[160];
        char *text;
        size_t need;
        unsigned before = config_errs_count(errs);

        if (rel[0] == '/' || base_dir == NULL || base_dir[0] == '\0') {
            file = xstrdup(rel);
        } else {
            need = strlen(base_dir) + strlen(rel) + 2;
            file = malloc(need);
            if (file != NULL)
                snprintf(file, need, "%s/%s", base_dir, rel);
        }
        if (file == NULL) {
            config_errs_add(errs, path, "out of memory");
            return -1;
        }
        text = read_file(file, why, sizeof why);
        if (text == NULL) {
            config_errs_add(errs, path, "cannot read feature map file \"%s\": %s", file, why);
            free(file);
            return -1;
        }
        obj = parse_commented(text, file, errs);
        free(text);
        if (obj == NULL || !json_is_object(obj)) {
            if (obj != NULL)
                config_errs_add(errs, path, "feature map file \"%s\" must hold a JSON object", file);
            else if (config_errs_count(errs) == before)
                config_errs_add(errs, path, "cannot parse \"%s\"", file);
            json_decref(obj);
            free(file);
            return -1;
        }
    } else {
        char got[80];
        fmt_json(got, sizeof got, v);
        config_errs_add(errs, path, "must be an object or a path to a JSON file (got %s)", got);
        return -1;
    }
    json_decref(cfg->featmap);
    cfg->featmap = obj;
    free(cfg->featmap_file);
    cfg->featmap_file = file;
    return 0;
}

/* Store JSON value v into option o.  path is what errors name (the option
 * name, or a more precise path inside it). */
static int set_from_json(struct oddsky_config *cfg, const config_option *o,
                         const json_t *v, const char *path, const char *base_dir,
                         config_errs *errs)
{
    char got[80];
    void *dst = field_ptr(cfg, o);

    switch (o->type) {
    case CONFIG_BOOL: {
        int b;
        if (!json_is_boolean(v)) {
            fmt_json(got, sizeof got, v);
            config_errs_add(errs, path, "must be true or false (got %s)", got);
            return -1;
        }
        b = json_is_true(v);
        memcpy(dst, &b, sizeof b);
        return 0;
    }
    case CONFIG_INT:
    case CONFIG_UINT: {
        json_int_t iv;
        fmt_json(got, sizeof got, v);
        if (!json_is_integer(v)) {
            config_errs_add(errs, path, "must be an integer (got %s)", got);
            return -1;
        }
        iv = json_integer_value(v);
        if (o->type == CONFIG_UINT && iv < 0) {
            char lo[32], hi[32];
            fmt_num(lo, sizeof lo, o->min);
            fmt_num(hi, sizeof hi, o->max);
            config_errs_add(errs, path, "must be between %s and %s (got %s)", lo, hi, got);
            return -1;
        }
        if (check_bounds(o, (double)iv, path, errs, got) != 0)
            return -1;
        if (o->type == CONFIG_INT) {
            int32_t x = (int32_t)iv;
            if (iv < INT32_MIN || iv > INT32_MAX) {
                config_errs_add(errs, path, "must fit in 32 bits (got %s)", got);
                return -1;
            }
            memcpy(dst, &x, sizeof x);
        } else if (o->size == sizeof(uint64_t)) {
            uint64_t x = (uint64_t)iv;
            memcpy(dst, &x, sizeof x);
        } else {
            uint32_t x = (uint32_t)iv;
            if ((unsigned long long)iv > UINT32_MAX) {
                config_errs_add(errs, path, "must fit in 32 bits (got %s)", got);
                return -1;
            }
            memcpy(dst, &x, sizeof x);
        }
        return 0;
    }
    case CONFIG_DOUBLE: {
        double d;
        fmt_json(got, sizeof got, v);
        if (!json_is_number(v)) {
            config_errs_add(errs, path, "must be a number (got %s)", got);
            return -1;
        }
        d = json_number_value(v);
        if (!isfinite(d)) {
            config_errs_add(errs, path, "must be finite (got %s)", got);
            return -1;
        }
        if (check_bounds(o, d, path, errs, got) != 0)
            return -1;
        memcpy(dst, &d, sizeof d);
        return 0;
    }
    case CONFIG_STRING: {
        char *s, *old;
        if (!json_is_string(v)) {
            fmt_json(got, sizeof got, v);
            config_errs_add(errs, path, "must be a string (got %s)", got);
            return -1;
        }
        if (strlen(json_string_value(v)) != json_string_length(v)) {
            config_errs_add(errs, path, "must not contain a NUL character");
            return -1;
        }
        s = xstrdup(json_string_value(v));
        if (s == NULL) {
            config_errs_add(errs, path, "out of memory");
            return -1;
        }
        memcpy(&old, dst, sizeof old);
        free(old);
        memcpy(dst, &s, sizeof s);
        return 0;
    }
    case CONFIG_ENUM: {
        char list[160];
        enum_list(list, sizeof list, o->enum_names);
        if (json_is_string(v)) {
            for (int i = 0; o->enum_names[i] != NULL; i++) {
                if (strcmp(json_string_value(v), o->enum_names[i]) == 0) {
                    memcpy(dst, &i, sizeof i);
                    return 0;
                }
            }
        }
        fmt_json(got, sizeof got, v);
        config_errs_add(errs, path, "must be one of %s (got %s)", list, got);
        return -1;
    }
    case CONFIG_STRLIST: {
        config_strlist nl = {NULL, 0};
        config_strlist *cur = dst;
        size_t i;
        json_t *item;
        int bad = 0;
        if (!json_is_array(v)) {
            fmt_json(got, sizeof got, v);
            config_errs_add(errs, path, "must be an array of strings (got %s)", got);
            return -1;
        }
        if (json_array_size(v) > 0) {
            nl.items = calloc(json_array_size(v), sizeof *nl.items);
            if (nl.items == NULL) {
                config_errs_add(errs, path, "out of memory");
                return -1;
            }
        }
        json_array_foreach(v, i, item) {
            char ipath[CONFIG_PATH_MAX];
            snprintf(ipath, sizeof ipath, "%s[%zu]", path, i);
            if (!json_is_string(item) || json_string_value(item)[0] == '\0') {
                fmt_json(got, sizeof got, item);
                config_errs_add(errs, ipath, "must be a non-empty string (got %s)", got);
                bad = 1;
                continue;
            }
            nl.items[nl.n] = xstrdup(json_string_value(item));
            if (nl.items[nl.n] == NULL) {
                config_errs_add(errs, ipath, "out of memory");
                bad = 1;
                continue;
            }
            nl.n++;
        }
        if (bad) {
            strlist_free(&nl);
            return -1;
        }
        strlist_free(cur);
        *cur = nl;
        return 0;
    }
    case CONFIG_OBJECT: {
        config_props np = {NULL, 0};
        config_props *cur = dst;
        const char *key;
        json_t *item;
        int bad = 0;
        if (!json_is_object(v)) {
            fmt_json(got, sizeof got, v);
            config_errs_add(errs, path, "must be an object of librdkafka properties (got %s)", got);
            return -1;
        }
        json_object_foreach((json_t *)v, key, item) {
            char ipath[CONFIG_PATH_MAX];
            char num[40];
            const char *text = NULL;
            char *k, *val;
            snprintf(ipath, sizeof ipath, "%s.%s", path, key);
            if (json_is_string(item)) {
                text = json_string_value(item);
            } else if (json_is_integer(item)) {
                snprintf(num, sizeof num, "%" JSON_INTEGER_FORMAT, json_integer_value(item));
                text = num;
            } else if (json_is_real(item)) {
                fmt_double_exact(num, sizeof num, json_real_value(item));
                text = num;
            } else if (json_is_boolean(item)) {
                text = json_is_true(item) ? "true" : "false";
            } else {
                fmt_json(got, sizeof got, item);
                config_errs_add(errs, ipath, "must be a string, number or boolean (got %s)", got);
                bad = 1;
                continue;
            }
            k = xstrdup(key);
            val = xstrdup(text);
            if (k == NULL || val == NULL || props_put(&np, k, val) != 0) {
                free(k);
                free(val);
                config_errs_add(errs, ipath, "out of memory");
                bad = 1;
            }
        }
        if (bad) {
            props_free(&np);
            return -1;
        }
        props_free(cur);
        *cur = np;
        return 0;
    }
    case CONFIG_FEATMAP:
        return set_featmap(cfg, o, v, path, base_dir, errs);
    }
    return -1;
}

/* Text (a default or a --set value) -> JSON typed by the option.  NULL
 * with an error added when the text does not read as that type. */
static json_t *text_to_json(const config_option *o, const char *text,
                            const char *path, config_errs *errs)
{
    switch (o->type) {
    case CONFIG_BOOL: {
        static const char *const yes[] = {"true", "1", "yes", "on", NULL};
        static const char *const no[] = {"false", "0", "no", "off", NULL};
        for (unsigned i = 0; yes[i] != NULL; i++)
            if (strcmp(text, yes[i]) == 0)
                return json_true();
        for (unsigned i = 0; no[i] != NULL; i++)
            if (strcmp(text, no[i]) == 0)
                return json_false();
        config_errs_add(errs, path, "must be true or false (got \"%.60s\")", text);
        return NULL;
    }
    case CONFIG_INT:
    case CONFIG_UINT: {
        char *end;
        long long v;
        const char *p = text;
        if (*p == '-' || *p == '+')
            p++;
        if (*p < '0' || *p > '9')
            goto not_int;
        errno = 0;
        v = strtoll(text, &end, 10);
        if (*end != '\0')
            goto not_int;
        if (errno == ERANGE) {
            config_errs_add(errs, path, "must fit in 64 bits (got %.60s)", text);
            return NULL;
        }
        return json_integer((json_int_t)v);
    not_int:
        config_errs_add(errs, path, "must be an integer (got \"%.60s\")", text);
        return NULL;
    }
    case CONFIG_DOUBLE: {
        char *end;
        double d;
        const char *p = text;
        if (*p == '-' || *p == '+')
            p++;
        if (!((*p >= '0' && *p <= '9') || *p == '.'))
            goto not_num;
        d = strtod(text, &end);
        if (*end != '\0' || !isfinite(d))
            goto not_num;
        return json_real(d);
    not_num:
        config_errs_add(errs, path, "must be a number (got \"%.60s\")", text);
        return NULL;
    }
    case CONFIG_STRING:
    case CONFIG_ENUM:
        return json_string(text);
    case CONFIG_STRLIST: {
        json_t *arr;
        const char *p = text;
        while (*p == ' ')
            p++;
        if (*p == '[') {
            json_error_t jerr;
            arr = json_loads(text, 0, &jerr);
            if (arr == NULL)
                config_errs_add(errs, path, "bad JSON array: %s", jerr.text);
            return arr;
        }
        arr = json_array();
        while (arr != NULL && *p != '\0') {
            const char *comma = strchr(p, ',');
            size_t n = comma != NULL ? (size_t)(comma - p) : strlen(p);
            while (n > 0 && p[n - 1] == ' ')
                n--;
            if (n > 0)
                json_array_append_new(arr, json_stringn(p, n));
            if (comma == NULL)
                break;
            p = comma + 1;
            while (*p == ' ')
                p++;
        }
        return arr;
    }
    case CONFIG_OBJECT:
    case CONFIG_FEATMAP: {
        const char *p = text;
        while (*p == ' ')
            p++;
        if (*p == '{') {
            json_error_t jerr;
            json_t *obj = json_loads(text, JSON_REJECT_DUPLICATES, &jerr);
            if (obj == NULL)
                config_errs_add(errs, path, "bad JSON object: %s", jerr.text);
            return obj;
        }
        if (o->type == CONFIG_FEATMAP)
            return json_string(text);
        config_errs_add(errs, path,
                        "must be a JSON object, or set one property as %s.<property>=value",
                        o->name);
        return NULL;
    }
    }
    return NULL;
}

static int set_from_text(struct oddsky_config *cfg, const config_option *o,
                         const char *text, const char *base_dir,
                         config_errs *errs)
{
    json_t *v = text_to_json(o, text, o->name, errs);
    int rc;
    if (v == NULL)
        return -1;
    rc = set_from_json(cfg, o, v, o->name, base_dir, errs);
    json_decref(v);
    return rc;
}

/* ---- lifecycle ---------------------------------------------------------------- */

int config_init_defaults(struct oddsky_config *cfg)
{
    config_errs errs;
    memset(cfg, 0, sizeof *cfg);
    config_errs_init(&errs);
    /* Every string field starts as "", so that a failure half-way leaves
     * nothing NULL for config_free() or the caller to trip on. */
    for (size_t i = 0; i < N_OPTIONS; i++) {
        if (options[i].type == CONFIG_STRING) {
            char *s = xstrdup("");
            if (s == NULL)
                return -1;
            memcpy(field_ptr(cfg, &options[i]), &s, sizeof s);
        }
    }
    cfg->config_dir = xstrdup(".");
    if (cfg->config_dir == NULL)
        return -1;
    for (size_t i = 0; i < N_OPTIONS; i++) {
        if (options[i].def == NULL)
            continue;
        if (set_from_text(cfg, &options[i], options[i].def, NULL, &errs) != 0)
            return -1;
    }
    /* The shipped result schema when running from the source tree, else
     * the installed copy. */
    if (access(SHIPPED_RESULT_SCHEMA, R_OK) != 0 &&
        access(INSTALLED_RESULT_SCHEMA, R_OK) == 0) {
        char *s = xstrdup(INSTALLED_RESULT_SCHEMA);
        if (s == NULL)
            return -1;
        free(cfg->output.avro_schema);
        cfg->output.avro_schema = s;
    }
    return 0;
}

void config_free(struct oddsky_config *cfg)
{
    if (cfg == NULL)
        return;
    for (size_t i = 0; i < N_OPTIONS; i++) {
        void *dst = field_ptr(cfg, &options[i]);
        char *s;
        switch (options[i].type) {
        case CONFIG_STRING:
            memcpy(&s, dst, sizeof s);
            free(s);
            s = NULL;
            memcpy(dst, &s, sizeof s);
            break;
        case CONFIG_STRLIST:
            strlist_free(dst);
            break;
        case CONFIG_OBJECT:
            props_free(dst);
            break;
        default:
            break;
        }
    }
    json_decref(cfg->featmap);
    cfg->featmap = NULL;
    free(cfg->featmap_file);
    cfg->featmap_file = NULL;
    free(cfg->config_dir);
    cfg->config_dir = NULL;
}

/* Walk a JSON object at dotted prefix, dispatching keys to options. */
static void walk(struct oddsky_config *cfg, const json_t *obj, const char *prefix,
                 const char *base_dir, config_errs *errs)
{
    const char *key;
    json_t *v;
    json_object_foreach((json_t *)obj, key, v) {
        char path[CONFIG_PATH_MAX];
        const config_option *o;
        if (prefix[0] != '\0')
            snprintf(path, sizeof path, "%s.%s", prefix, key);
        else
            snprintf(path, sizeof path, "%s", key);
        o = config_option_find(path);
        if (o != NULL) {
            set_from_json(cfg, o, v, path, base_dir, errs);
        } else if (is_section(path)) {
            if (json_is_object(v))
                walk(cfg, v, path, base_dir, errs);
            else
                config_errs_add(errs, path, "must be an object (a section of options)");
        } else {
            unknown_option(errs, path);
        }
    }
}

int config_load_text(struct oddsky_config *cfg, const char *text,
                     const char *name, const char *base_dir, config_errs *errs)
{
    unsigned before = config_errs_count(errs);
    char *copy = xstrdup(text);
    json_t *root;
    char *dir;

    if (copy == NULL) {
        config_errs_add(errs, name, "out of memory");
        return -1;
    }
    root = parse_commented(copy, name, errs);
    free(copy);
    if (root == NULL)
        return -1;
    if (!json_is_object(root)) {
        config_errs_add(errs, name, "the top level must be a JSON object");
        json_decref(root);
        return -1;
    }
    dir = xstrdup(base_dir != NULL ? base_dir : ".");
    if (dir == NULL) {
        json_decref(root);
        config_errs_add(errs, name, "out of memory");
        return -1;
    }
    free(cfg->config_dir);
    cfg->config_dir = dir;
    walk(cfg, root, "", cfg->config_dir, errs);
    json_decref(root);
    return config_errs_count(errs) == before ? 0 : -1;
}

int config_load_file(struct oddsky_config *cfg, const char *path,
                     config_errs *errs)
{
    char why[160];
    char *text = read_file(path, why, sizeof why);
    char *dir;
    const char *slash;
    int rc;

    if (text == NULL) {
        config_errs_add(errs, path, "cannot read: %s", why);
        return -1;
    }
    slash = strrchr(path, '/');
    if (slash == NULL) {
        dir = xstrdup(".");
    } else if (slash == path) {
        dir = xstrdup("/");
    } else {
        dir = malloc((size_t)(slash - path) + 1);
        if (dir != NULL) {
            memcpy(dir, path, (size_t)(slash - path));
            dir[slash - path] = '\0';
        }
    }
    if (dir == NULL) {
        free(text);
        config_errs_add(errs, path, "out of memory");
        return -1;
    }
    rc = config_load_text(cfg, text, path, dir, errs);
    free(dir);
    free(text);
    return rc;
}

int config_apply_set(struct oddsky_config *cfg, const char *assignment,
                     config_errs *errs)
{
    const char *eq = strchr(assignment, '=');
    char key[CONFIG_PATH_MAX];
    const config_option *o;
    size_t klen;

    if (eq == NULL || eq == assignment) {
        config_errs_add(errs, assignment, "--set expects key=value");
        return -1;
    }
    klen = (size_t)(eq - assignment);
    if (klen >= sizeof key) {
        config_errs_add(errs, "--set", "key too long");
        return -1;
    }
    memcpy(key, assignment, klen);
    key[klen] = '\0';
    o = config_option_find(key);
    if (o != NULL)
        return set_from_text(cfg, o, eq + 1, cfg->config_dir, errs);

    /* "kafka.consumer.fetch.max.bytes=..." sets one property. */
    for (size_t i = 0; i < N_OPTIONS; i++) {
        size_t n = strlen(options[i].name);
        if (options[i].type == CONFIG_OBJECT && klen > n + 1 &&
            strncmp(key, options[i].name, n) == 0 && key[n] == '.') {
            config_props *p = field_ptr(cfg, &options[i]);
            char *k = xstrdup(key + n + 1);
            char *v = xstrdup(eq + 1);
            if (k == NULL || v == NULL || props_put(p, k, v) != 0) {
                free(k);
                free(v);
                config_errs_add(errs, key, "out of memory");
                return -1;
            }
            return 0;
        }
    }
    if (is_section(key))
        config_errs_add(errs, key, "is a section, not an option (set one of its options)");
    else
        unknown_option(errs, key);
    return -1;
}

/* ---- validation ---------------------------------------------------------------- */

/* Kafka's topic name rule: 1..249 of [a-zA-Z0-9._-], not "." or "..". */
static int topic_name_ok(const char *t)
{
    size_t n = strlen(t);
    if (n == 0 || n > 249 || strcmp(t, ".") == 0 || strcmp(t, "..") == 0)
        return 0;
    for (; *t; t++) {
        char c = *t;
        if (!((c >= 'a' && c <= 'z') || (c >= 'A' && c <= 'Z') ||
              (c >= '0' && c <= '9') || c == '.' || c == '_' || c == '-'))
            return 0;
    }
    return 1;
}

static void check_topic(const char *path, const char *t, int required,
                        config_errs *errs)
{
    if (t[0] == '\0') {
        if (required)
            config_errs_add(errs, path, "must not be empty");
        return;
    }
    if (!topic_name_ok(t))
        config_errs_add(errs, path,
                        "must be a Kafka topic name: 1-249 of a-z A-Z 0-9 . _ - (got \"%.80s\")", t);
}

static int is_input_topic(const struct oddsky_config *cfg, const char *t)
{
    for (size_t i = 0; i < cfg->kafka.input_topics.n; i++)
        if (strcmp(cfg->kafka.input_topics.items[i], t) == 0)
            return 1;
    return 0;
}

static void check_props(const char *path, const config_props *p, int consumer,
                        config_errs *errs)
{
    static const struct { const char *prop, *use; int consumer_only; } managed[] = {
        {"bootstrap.servers", "kafka.brokers", 0},
        {"metadata.broker.list", "kafka.brokers", 0},
        {"group.id", "kafka.group_id", 1},
        {"enable.auto.offset.store", "nothing: oddsky stores offsets after delivery", 1},
    };
    for (size_t i = 0; i < p->n; i++) {
        for (size_t m = 0; m < sizeof managed / sizeof managed[0]; m++) {
            if (managed[m].consumer_only && !consumer)
                continue;
            if (strcmp(p->items[i].key, managed[m].prop) == 0) {
                char ipath[CONFIG_PATH_MAX];
                snprintf(ipath, sizeof ipath, "%s.%s", path, p->items[i].key);
                config_errs_add(errs, ipath, "is set by oddsky (use %s)", managed[m].use);
            }
        }
    }
}

static int is_loopback(const char *addr)
{
    struct in_addr a4;
    struct in6_addr a6;
    if (inet_pton(AF_INET, addr, &a4) == 1)
        return (ntohl(a4.s_addr) >> 24) == 127;
    if (inet_pton(AF_INET6, addr, &a6) == 1)
        return IN6_IS_ADDR_LOOPBACK(&a6);
    return 0;
}

static void check_readable(const char *path, const char *file, config_errs *errs)
{
    if (access(file, R_OK) != 0)
        config_errs_add(errs, path, "cannot read \"%.120s\": %s", file, strerror(errno));
}

typedef struct featmap_err_ctx {
    config_errs *errs;
} featmap_err_ctx;

static void featmap_err(void *ctx, const char *json_path, const char *rule)
{
    featmap_err_ctx *c = ctx;
    char path[CONFIG_PATH_MAX];
    if (json_path == NULL || json_path[0] == '\0')
        snprintf(path, sizeof path, "featmap");
    else if (strncmp(json_path, "featmap", 7) == 0)
        snprintf(path, sizeof path, "%s", json_path);
    else if (json_path[0] == '[')
        snprintf(path, sizeof path, "featmap%s", json_path);
    else
        snprintf(path, sizeof path, "featmap.%s", json_path);
    config_errs_add(c->errs, path, "%s", rule != NULL ? rule : "invalid");
}

static const config_option *option_by_model_field(const char *field)
{
    char want[64];
    snprintf(want, sizeof want, "model.%s", field);
    for (size_t i = 0; i < N_OPTIONS; i++)
        if (strcmp(options[i].field, want) == 0)
            return &options[i];
    return NULL;
}

static void validate_model(const model_params *m, config_errs *errs)
{
    if (m->warm_n < m->k)
        config_errs_add(errs, "model.warmup_vectors", "must be at least model.k (%u) (got %u)",
                        m->k, m->warm_n);
    if (m->mix_nearest > m->k)
        config_errs_add(errs, "model.mix_nearest", "must be at most model.k (%u) (got %u)",
                        m->k, m->mix_nearest);
    if (m->select_k_min > m->select_k_max)
        config_errs_add(errs, "model.select_k_min",
                        "must be at most model.select_k_max (%u) (got %u)",
                        m->select_k_max, m->select_k_min);
    if (m->select_k_max > m->reservoir_n)
        config_errs_add(errs, "model.select_k_max",
                        "must be at most model.reservoir_size (%u) (got %u)",
                        m->reservoir_n, m->select_k_max);
    if (m->k > m->reservoir_n)
        config_errs_add(errs, "model.k", "must be at most model.reservoir_size (%u) (got %u)",
                        m->reservoir_n, m->k);
    if (model_params_check != NULL) {
        model_params p = *m;
        const char *field = NULL;
        char why[200] = "";
        p.dim = 1; /* dim comes from the feature map, not from here */
        if (model_params_check(&p, &field, why, sizeof why) != 0) {
            const config_option *o = field != NULL ? option_by_model_field(field) : NULL;
            config_errs_add(errs, o != NULL ? o->name : "model",
                            "%s", why[0] != '\0' ? why : "rejected by the model");
        }
    }
}

int config_validate_for(const struct oddsky_config *cfg, unsigned mode,
                        config_errs *errs)
{
    unsigned before = config_errs_count(errs);
    int run = mode == CONFIG_FOR_RUN;

    validate_model(&cfg->model, errs);

    /* kafka */
    if (run && cfg->kafka.brokers[0] == '\0')
        config_errs_add(errs, "kafka.brokers", "required");
    if (cfg->kafka.brokers[0] != '\0') {
        const char *p = cfg->kafka.brokers;
        for (; *p; p++) {
            if (*p == ' ' || *p == '\t') {
                config_errs_add(errs, "kafka.brokers",
                                "must be host:port[,host:port...] without spaces (got \"%.80s\")",
                                cfg->kafka.brokers);
                break;
            }
        }
        if (cfg->kafka.brokers[0] == ',' || strstr(cfg->kafka.brokers, ",,") != NULL ||
            cfg->kafka.brokers[strlen(cfg->kafka.brokers) - 1] == ',')
            config_errs_add(errs, "kafka.brokers", "has an empty entry (got \"%.80s\")",
                            cfg->kafka.brokers);
    }
    if (cfg->kafka.group_id[0] == '\0')
        config_errs_add(errs, "kafka.group_id", "must not be empty");
    if (run && cfg->kafka.input_topics.n == 0)
        config_errs_add(errs, "kafka.input_topics", "required (at least one topic)");
    for (size_t i = 0; i < cfg->kafka.input_topics.n; i++) {
        char path[CONFIG_PATH_MAX];
        snprintf(path, sizeof path, "kafka.input_topics[%zu]", i);
        check_topic(path, cfg->kafka.input_topics.items[i], 1, errs);
        for (size_t j = 0; j < i; j++)
            if (strcmp(cfg->kafka.input_topics.items[i], cfg->kafka.input_topics.items[j]) == 0)
                config_errs_add(errs, path, "repeats kafka.input_topics[%zu] (\"%.80s\")", j,
                                cfg->kafka.input_topics.items[i]);
    }
    {
        static const struct { const char *name; size_t off; int required; } outs[] = {
            {"kafka.output_topic", offsetof(struct oddsky_config, kafka.output_topic), 1},
            {"kafka.flagged_topic", offsetof(struct oddsky_config, kafka.flagged_topic), 0},
            {"kafka.dead_letter_topic", offsetof(struct oddsky_config, kafka.dead_letter_topic), 1},
        };
        for (size_t i = 0; i < sizeof outs / sizeof outs[0]; i++) {
            const char *t;
            memcpy(&t, (const char *)cfg + outs[i].off, sizeof t);
            check_topic(outs[i].name, t, outs[i].required, errs);
            if (t[0] != '\0' && is_input_topic(cfg, t))
                config_errs_add(errs, outs[i].name,
                                "must differ from every kafka.input_topics entry (got \"%.80s\")", t);
        }
    }
    check_props("kafka.consumer", &cfg->kafka.consumer, 1, errs);
    check_props("kafka.producer", &cfg->kafka.producer, 0, errs);

    /* input */
    if (cfg->input.schema_dir[0] != '\0') {
        struct stat st;
        if (stat(cfg->input.schema_dir, &st) != 0)
            config_errs_add(errs, "input.schema_dir", "cannot open \"%.120s\": %s",
                            cfg->input.schema_dir, strerror(errno));
        else if (!S_ISDIR(st.st_mode))
            config_errs_add(errs, "input.schema_dir", "must be a directory (got \"%.120s\")",
                            cfg->input.schema_dir);
    }
    if (cfg->input.writer_schema[0] != '\0')
        check_readable("input.writer_schema", cfg->input.writer_schema, errs);

    /* featmap */
    if (cfg->featmap == NULL) {
        if (run)
            config_errs_add(errs, "featmap", "required");
    } else {
        featmap_err_ctx fc = {errs};
        unsigned n0 = config_errs_count(errs);
        if (featmap_validate(cfg->featmap, featmap_err, &fc) != 0 &&
            config_errs_count(errs) == n0)
            config_errs_add(errs, "featmap", "rejected by the feature map compiler");
    }

    /* output */
    if (cfg->output.format == CONFIG_OUTPUT_AVRO) {
        if (cfg->output.avro_schema[0] == '\0')
            config_errs_add(errs, "output.avro_schema", "required when output.format is avro");
        else
            check_readable("output.avro_schema", cfg->output.avro_schema, errs);
    }

    /* state */
    if (cfg->state.dir[0] == '\0')
        config_errs_add(errs, "state.dir", "must not be empty");

    /* status */
    if (cfg->status.port != 0) {
        struct in_addr a4;
        struct in6_addr a6;
        if (inet_pton(AF_INET, cfg->status.listen, &a4) != 1 &&
            inet_pton(AF_INET6, cfg->status.listen, &a6) != 1) {
            config_errs_add(errs, "status.listen",
                            "must be a numeric IPv4 or IPv6 address (got \"%.80s\")",
                            cfg->status.listen);
        } else if (!is_loopback(cfg->status.listen) && cfg->status.token[0] == '\0' &&
                   !cfg->status.allow_remote_without_token) {
            config_errs_add(errs, "status.listen",
                            "is not a loopback address and status.token is empty: set "
                            "status.token, or status.allow_remote_without_token to true");
        }
    }
    if (cfg->status.token[0] != '\0' && strlen(cfg->status.token) < 16)
        config_errs_add(errs, "status.token", "must be at least 16 characters (got %zu)",
                        strlen(cfg->status.token));
    for (const char *p = cfg->status.token; *p; p++) {
        if ((unsigned char)*p <= ' ' || (unsigned char)*p == 0x7f) {
            config_errs_add(errs, "status.token", "must not contain spaces or control characters");
            break;
        }
    }

    return config_errs_count(errs) == before ? 0 : -1;
}

int config_validate(const struct oddsky_config *cfg, config_errs *errs)
{
    return config_validate_for(cfg, CONFIG_FOR_RUN, errs);
}

/* ---- values as JSON ---------------------------------------------------------- */

static json_t *option_json(const struct oddsky_config *cfg, const config_option *o,
                           int show_secrets, int featmap_content)
{
    const void *src = field_cptr(cfg, o);
    switch (o->type) {
    case CONFIG_BOOL: {
        int b;
        memcpy(&b, src, sizeof b);
        return json_boolean(b);
    }
    case CONFIG_INT: {
        int32_t x;
        memcpy(&x, src, sizeof x);
        return json_integer(x);
    }
    case CONFIG_UINT:
        if (o->size == sizeof(uint64_t)) {
            uint64_t x;
            memcpy(&x, src, sizeof x);
            return json_integer((json_int_t)x);
        } else {
            uint32_t x;
            memcpy(&x, src, sizeof x);
            return json_integer((json_int_t)x);
        }
    case CONFIG_DOUBLE: {
        double d;
        memcpy(&d, src, sizeof d);
        return json_real(d);
    }
    case CONFIG_STRING: {
        const char *s;
        memcpy(&s, src, sizeof s);
        if (s == NULL)
            s = "";
        if ((o->flags & CONFIG_F_SECRET) && !show_secrets)
            return mask_string(s);
        return json_string(s);
    }
    case CONFIG_ENUM: {
        int i;
        memcpy(&i, src, sizeof i);
        for (int j = 0; o->enum_names[j] != NULL; j++)
            if (j == i)
                return json_string(o->enum_names[j]);
        return json_null();
    }
    case CONFIG_STRLIST: {
        const config_strlist *l = src;
        json_t *a = json_array();
        for (size_t i = 0; a != NULL && i < l->n; i++)
            json_array_append_new(a, json_string(l->items[i]));
        return a;
    }
    case CONFIG_OBJECT: {
        const config_props *p = src;
        json_t *obj = json_object();
        for (size_t i = 0; obj != NULL && i < p->n; i++) {
            json_t *v = (!show_secrets && prop_is_secret(p->items[i].key))
                            ? mask_string(p->items[i].value)
                            : json_string(p->items[i].value);
            json_object_set_new(obj, p->items[i].key, v);
        }
        return obj;
    }
    case CONFIG_FEATMAP:
        if (cfg->featmap == NULL)
            return json_null();
        if (cfg->featmap_file != NULL && !featmap_content)
            return json_string(cfg->featmap_file);
        return json_deep_copy(cfg->featmap);
    }
    return json_null();
}

json_t *config_option_value(const struct oddsky_config *cfg,
                            const config_option *opt, int show_secrets)
{
    return option_json(cfg, opt, show_secrets, 0);
}

json_t *config_to_json(const struct oddsky_config *cfg)
{
    json_t *root = json_object();
    if (root == NULL)
        return NULL;
    for (size_t i = 0; i < N_OPTIONS; i++) {
        const config_option *o = &options[i];
        char name[CONFIG_PATH_MAX];
        char *seg, *dot;
        json_t *at = root;
        json_t *v = option_json(cfg, o, 0, 0);
        if (v == NULL)
            goto oom;
        snprintf(name, sizeof name, "%s", o->name);
        seg = name;
        while ((dot = strchr(seg, '.')) != NULL) {
            json_t *next;
            *dot = '\0';
            next = json_object_get(at, seg);
            if (next == NULL) {
                next = json_object();
                if (next == NULL || json_object_set_new(at, seg, next) != 0) {
                    json_decref(v);
                    goto oom;
                }
            }
            at = next;
            seg = dot + 1;
        }
        if (json_object_set_new(at, seg, v) != 0)
            goto oom;
    }
    return root;
oom:
    json_decref(root);
    return NULL;
}

int config_to_model_params(const struct oddsky_config *cfg, uint32_t dim,
                           model_params *out)
{
    if (dim == 0 || dim > MODEL_MAX_DIM)
        return -1;
    *out = cfg->model;
    out->dim = dim;
    return 0;
}

/* ---- reload -------------------------------------------------------------------- */

int config_reload(const struct oddsky_config *old, const char *path,
                  const char *const *sets, size_t n_sets,
                  struct oddsky_config *cfg_new, config_errs *errs)
{
    unsigned before = config_errs_count(errs);
    if (config_init_defaults(cfg_new) != 0) {
        config_errs_add(errs, "config", "out of memory");
        return -1;
    }
    if (path != NULL)
        config_load_file(cfg_new, path, errs);
    for (size_t i = 0; i < n_sets; i++)
        config_apply_set(cfg_new, sets[i], errs);
    if (config_errs_count(errs) != before)
        return -1;
    /* Requirements of `run` are not re-checked here: they are all non-live,
     * so the comparison below keeps them as they were. */
    config_validate_for(cfg_new, CONFIG_FOR_DEMO, errs);
    for (size_t i = 0; i < N_OPTIONS; i++) {
        const config_option *o = &options[i];
        json_t *a, *b;
        if (o->flags & CONFIG_F_LIVE)
            continue;
        a = option_json(old, o, 1, 1);
        b = option_json(cfg_new, o, 1, 1);
        if (!json_equal(a, b)) {
            if (o->flags & CONFIG_F_SECRET || o->type == CONFIG_OBJECT ||
                o->type == CONFIG_FEATMAP) {
                config_errs_add(errs, o->name, "cannot change on reload (restart needed)");
            } else {
                char was[80], now[80];
                fmt_json(was, sizeof was, a);
                fmt_json(now, sizeof now, b);
                config_errs_add(errs, o->name,
                                "cannot change on reload (restart needed; was %s, now %s)",
                                was, now);
            }
        }
        json_decref(a);
        json_decref(b);
    }
    return config_errs_count(errs) == before ? 0 : -1;
}

/* ---- defaults dump -------------------------------------------------------------- */

void config_print_defaults(FILE *out)
{
    size_t wname = strlen("OPTION");
    for (size_t i = 0; i < N_OPTIONS; i++)
        if (strlen(options[i].name) > wname)
            wname = strlen(options[i].name);

    fprintf(out, "%-*s  %-11s  %-22s  %-26s  %s\n", (int)wname, "OPTION", "TYPE",
            "DEFAULT", "RANGE / VALUES", "LIVE");
    for (size_t i = 0; i < N_OPTIONS; i++) {
        const config_option *o = &options[i];
        char def[64], range[160];
        range[0] = '\0';
        if (o->def == NULL)
            snprintf(def, sizeof def, "(none)");
        else if (o->type == CONFIG_STRING && o->def[0] == '\0')
            snprintf(def, sizeof def, "\"\"");
        else if (o->type == CONFIG_STRLIST && o->def[0] == '\0')
            snprintf(def, sizeof def, "[]");
        else if (o->type == CONFIG_STRING && strcmp(o->name, "output.avro_schema") == 0)
            snprintf(def, sizeof def, "(see help)");
        else
            snprintf(def, sizeof def, "%s", o->def);
        if (o->type == CONFIG_ENUM) {
            enum_list(range, sizeof range, o->enum_names);
        } else if (o->flags & CONFIG_F_BOUNDS) {
            char lo[32], hi[32];
            fmt_num(lo, sizeof lo, o->min);
            fmt_num(hi, sizeof hi, o->max);
            snprintf(range, sizeof range, "%s .. %s%s%s", lo, hi, o->unit ? " " : "",
                     o->unit ? o->unit : "");
        }
        fprintf(out, "%-*s  %-11s  %-22s  %-26s  %s\n", (int)wname, o->name,
                config_type_name(o->type), def, range,
                (o->flags & CONFIG_F_LIVE) ? "live" : "restart");
        fprintf(out, "%-*s    %s%s\n", (int)wname, "", o->help,
                (o->flags & CONFIG_F_SECRET) ? " [secret: masked in output]" : "");
    }
}
