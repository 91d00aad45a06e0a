/*
 * cmd_replay.c - `oddsky replay`: packets or feature vectors from files,
 * through the same decode -> features -> model -> record path as `run`
 * (daemon/pipeline.h), one result line per input record.
 *
 * Input detection, per file: a file that starts with the Avro object
 * container magic "Obj\x01" is read record by record with avro-c's file
 * reader; the feature map is compiled once for the file's writer schema
 * (featmap_plan_avro) and each record goes through featmap_extract_avro
 * and pipeline_process_features.  Any other file is JSON lines: a line
 * that parses as a JSON object with an array under "x" is a vector line
 * (pipeline_process_vector); every other non-blank line is a packet and
 * its bytes go to pipeline_process as one message (so a line that is not
 * JSON is refused by the decoder like a bad message on the topic).
 *
 * Output is always JSON lines, in input order: the pipeline's encoded
 * record (the output topic's record), or for a refused packet one line
 * {"refused": reason, "input": {...}, "line"|"record": n}.  Input
 * coordinates in the record: topic = the input path as given, partition =
 * the input's index on the command line, offset = the record's 0-based
 * index in its file (lines count blank ones too).
 *
 * Determinism: the output depends only on the inputs and the config (the
 * seed included); wall-clock time appears only on stderr (progress and
 * the summary).
 */
#include <errno.h>
#include <getopt.h>
#include <inttypes.h>
#include <math.h>
#include <stdio.h>
#include <stdlib.h>
#include <string.h>
#include <sys/stat.h>
#include <sysexits.h>
#include <time.h>
#include <unistd.h>

#include <avro.h>
#include <jansson.h>

#include "commands.h"
#include "config.h"
#include "encode.h"
#include "featmap.h"
#include "packet.h"
#include "pipeline.h"

#define REPLAY_MAX_SETS 256u
#define REPLAY_MAX_INPUTS 4096u
#define REPLAY_LABEL_MAX 512u
#define REPLAY_OUT_BUF (1u << 20)

typedef struct replay_opts {
    const char *config;
    const char *inputs[REPLAY_MAX_INPUTS];
    size_t n_inputs;
    const char *output;
    const char *sets[REPLAY_MAX_SETS];
    size_t n_sets;
    const char *vectors_out;
    const char *label_field;
    int quiet;
} replay_opts;

typedef struct replay {
    const replay_opts *o;
    struct oddsky_config cfg;
    pipeline *p;
    const featmap *fm;
    featmap_scratch *scratch;
    FILE *out, *vout;
    char *label_parts[FEATMAP_MAX_DEPTH];
    size_t n_label_parts;
    char *label_copy;
    char label_buf[REPLAY_LABEL_MAX];
    packet_features pf;
    double x[MODEL_MAX_DIM], err[MODEL_MAX_DIM];
    uint8_t miss[MODEL_MAX_DIM];
    /* counts of our own (the pipeline counts what it sees) */
    uint64_t records, refused, warm, label_unreadable;
    uint64_t refused_by[PACKET_REASON_COUNT + 1];
    /* progress */
    int progress;
    uint64_t total_bytes, bytes_before; /* bytes of the files finished */
    struct timespec t0, last_draw;
} replay;

static void usage(FILE *out)
{
    fprintf(out,
        "usage: oddsky replay [--config FILE] --input PATH [--input PATH ...]\n"
        "                     --output FILE [--set key=value ...]\n"
        "                     [--vectors-out FILE] [--label-field PATH] [--quiet]\n"
        "\n"
        "Scores the packets (or feature vectors) in files through the same decode,\n"
        "feature map and model as `oddsky run`, in input order, and writes one\n"
        "result per record.  The same inputs, config and seed give byte-identical\n"
        "output.\n"
        "\n"
        "options:\n"
        "  --config FILE       config file (default: every option at its default;\n"
        "                      packets then need --set featmap=PATH); kafka.*,\n"
        "                      status.* and state.* are not used\n"
        "  --input PATH        an input file (repeatable; read in the order given)\n"
        "  --output FILE       results, JSON lines ('-' = stdout)\n"
        "  --set key=value     override one config option (repeatable)\n"
        "  --vectors-out FILE  also write each scored packet's feature vector as a\n"
        "                      vector line (id, time, x with null for missing, err\n"
        "                      when known, label), readable by replay again\n"
        "  --label-field PATH  dotted path of a packet field copied into each\n"
        "                      result as \"label\" (e.g. truth for the demo survey);\n"
        "                      the models never read it\n"
        "  -q, --quiet         no progress bar and no summary line\n"
        "  -h, --help          this text\n"
        "\n"
        "Input files, detected per file:\n"
        "  - Avro object container (starts with \"Obj\\x01\"): read record by record;\n"
        "    the feature map is compiled once for the file's writer schema.\n"
        "  - Otherwise JSON lines; blank lines are skipped.  A line that is a JSON\n"
        "    object with an array under \"x\" is a vector line:\n"
        "      {\"id\": \"a1\" | 7, \"time\": <MJD days>, \"x\": [1.5, null, ...],\n"
        "       \"err\": [0.1, null, ...], \"label\": <any>}\n"
        "    (err and label optional; null = missing; a label that is not a string\n"
        "    is carried as its JSON text).  Features are the config's feature map's\n"
        "    (x must have that many entries) or, without a feature map, f0, f1, ...\n"
        "    with the length of the first vector line; a line of another length is\n"
        "    an error.  Any other line is one packet, decoded as a message of the\n"
        "    input topic would be (the JSON framing).\n"
        "\n"
        "Output: always JSON lines, whatever output.format says.  A scored record\n"
        "is the output topic's record (config/schemas/oddsky-result.avsc) with\n"
        "input.topic = the input path, input.partition = the input's index (from\n"
        "0) and input.offset = the record's index in its file (from 0), plus\n"
        "\"label\" when there is one.  A refused packet gives the line\n"
        "  {\"refused\": \"<reason>\", \"text\": \"...\", \"input\": {...}, \"line\": n}\n"
        "(\"record\": n for container files; n counts from 1).\n"
        "\n"
        "A progress bar goes to stderr when it is a terminal, then a summary line.\n"
        "Exit status: 0 done (refused packets included), 64 bad usage, 65 bad input\n"
        "data (unreadable container, malformed vector line), 66 cannot open an\n"
        "input, 73 cannot create an output, 74 write error, 78 bad config.\n"
        "\n"
        "examples:\n"
        "  oddsky simulate --count 200000 --format avro-container --output n.avro\n"
        "  oddsky replay --config config/demo.json --input n.avro \\\n"
        "      --output results.jsonl --label-field truth --vectors-out v.jsonl\n"
        "  oddsky replay --input v.jsonl --output r.jsonl --set model.k=8\n");
}

static int usage_error(const char *fmt, const char *arg)
{
    fprintf(stderr, "oddsky replay: ");
    fprintf(stderr, fmt, arg);
    fprintf(stderr, " (see --help)\n");
    return EX_USAGE;
}

static int parse_args(int argc, char **argv, replay_opts *o, int *done)
{
    enum { O_CONFIG = 1000, O_INPUT, O_OUTPUT, O_SET, O_VECTORS, O_LABEL,
           O_QUIET };
    static const struct option longopts[] = {
        {"config", required_argument, 0, O_CONFIG},
        {"input", required_argument, 0, O_INPUT},
        {"output", required_argument, 0, O_OUTPUT},
        {"set", required_argument, 0, O_SET},
        {"vectors-out", required_argument, 0, O_VECTORS},
        {"label-field", required_argument, 0, O_LABEL},
        {"quiet", no_argument, 0, O_QUIET},
        {"help", no_argument, 0, 'h'},
        {0, 0, 0, 0}};
    *done = 0;
    optind = 1;
    opterr = 0;
    for (;;) {
        int c = getopt_long(argc, argv, ":hq", longopts, NULL);
        if (c == -1)
            break;
        switch (c) {
        case 'h':
            usage(stdout);
            *done = 1;
            return 0;
        case 'q':
        case O_QUIET:
            o->quiet = 1;
            break;
        case O_CONFIG:
            if (o->config)
                return usage_error("--config given twice ('%s')", optarg);
            o->config = optarg;
            break;
        case O_INPUT:
            if (o->n_inputs == REPLAY_MAX_INPUTS)
                return usage_error("too many --input ('%s')", optarg);
            o->inputs[o->n_inputs++] = optarg;
            break;
        case O_OUTPUT:
            if (o->output)
                return usage_error("--output given twice ('%s')", optarg);
            o->output = optarg;
            break;
        case O_SET:
            if (o->n_sets == REPLAY_MAX_SETS)
                return usage_error("too many --set ('%s')", optarg);
            o->sets[o->n_sets++] = optarg;
            break;
        case O_VECTORS:
            o->vectors_out = optarg;
            break;
        case O_LABEL:
            if (!*optarg)
                return usage_error("--label-field needs a dotted path%s", "");
            o->label_field = optarg;
            break;
        case ':':
            return usage_error("%s needs a value", argv[optind - 1]);
        default:
            return usage_error("unknown option '%s'", argv[optind - 1]);
        }
    }
    if (optind < argc)
        return usage_error("unexpected argument '%s' (inputs go after --input)",
                           argv[optind]);
    if (o->n_inputs == 0)
        return usage_error("at least one --input is needed%s", "");
    if (!o->output)
        return usage_error("--output is needed%s", "");
    return 0;
}

/* ---- small writers -------------------------------------------------- */

/* A JSON string: escapes quote, backslash and control characters; other
 * bytes pass as they are (ids and labels come from UTF-8 input). */
static void put_jstr(FILE *f, const char *s)
{
    fputc('"', f);
    for (const unsigned char *p = (const unsigned char *)s; *p; p++) {
        if (*p == '"' || *p == '\\') {
            fputc('\\', f);
            fputc(*p, f);
        } else if (*p < 0x20) {
            fprintf(f, "\\u%04x", *p);
        } else {
            fputc(*p, f);
        }
    }
    fputc('"', f);
}

static void put_num(FILE *f, double v)
{
    char b[32];
    encode_double(v, b);
    fputs(b, f);
}

static double elapsed_s(const struct timespec *a, const struct timespec *b)
{
    return (double)(b->tv_sec - a->tv_sec) +
           (double)(b->tv_nsec - a->tv_nsec) / 1e9;
}

/* At most ten redraws a second; done_bytes counts the current file. */
static void progress(replay *r, uint64_t done_bytes, int force)
{
    if (!r->progress)
        return;
    struct timespec now;
    clock_gettime(CLOCK_MONOTONIC, &now);
    if (!force && elapsed_s(&r->last_draw, &now) < 0.1)
        return;
    r->last_draw = now;
    double frac = r->total_bytes ? (double)(r->bytes_before + done_bytes) /
                                       (double)r->total_bytes
                                 : 1.0;
    if (frac > 1)
        frac = 1;
    int w = 30, fill = (int)(frac * w + 0.5);
    char bar[64];
    for (int i = 0; i < w; i++)
        bar[i] = i < fill ? '#' : '.';
    bar[w] = '\0';
    double s = elapsed_s(&r->t0, &now);
    fprintf(stderr, "\rreplay [%s] %5.1f%% %" PRIu64 " records %.0f/s ", bar,
            100 * frac, r->records, s > 0 ? (double)r->records / s : 0.0);
}

/* ---- labels ---------------------------------------------------------- */

static int split_label_path(replay *r, const char *path)
{
    r->label_copy = strdup(path);
    if (!r->label_copy)
        return -1;
    char *save = NULL;
    for (char *t = strtok_r(r->label_copy, ".", &save); t;
         t = strtok_r(NULL, ".", &save)) {
        if (r->n_label_parts == FEATMAP_MAX_DEPTH)
            return -1;
        r->label_parts[r->n_label_parts++] = t;
    }
    return r->n_label_parts ? 0 : -1;
}

/* The label of a JSON value: a string as it is, null as none, anything
 * else as its compact JSON text. */
static const char *label_from_json(replay *r, const json_t *v)
{
    if (!v || json_is_null(v))
        return NULL;
    if (json_is_string(v)) {
        snprintf(r->label_buf, sizeof r->label_buf, "%s", json_string_value(v));
        return r->label_buf;
    }
    size_t n = json_dumpb(v, r->label_buf, sizeof r->label_buf - 1,
                          JSON_COMPACT | JSON_ENCODE_ANY | JSON_PRESERVE_ORDER);
    if (n == 0 || n >= sizeof r->label_buf) {
        r->label_unreadable++;
        return NULL;
    }
    r->label_buf[n] = '\0';
    return r->label_buf;
}

static const char *label_from_packet_json(replay *r, const json_t *root)
{
    const json_t *v = root;
    for (size_t i = 0; v && i < r->n_label_parts; i++)
        v = json_is_object(v) ? json_object_get(v, r->label_parts[i]) : NULL;
    return label_from_json(r, v);
}

/* Avro scalars and enums become text; records, arrays and maps are not
 * labels (counted as unreadable). */
static const char *label_from_avro(replay *r, avro_value_t *root)
{
    avro_value_t cur = *root, next;
    for (size_t i = 0; i < r->n_label_parts; i++) {
        while (avro_value_get_type(&cur) == AVRO_UNION) {
            if (avro_value_get_current_branch(&cur, &next) != 0)
                return NULL;
            cur = next;
        }
        if (avro_value_get_type(&cur) != AVRO_RECORD ||
            avro_value_get_by_name(&cur, r->label_parts[i], &next, NULL) != 0)
            return NULL;
        cur = next;
    }
    while (avro_value_get_type(&cur) == AVRO_UNION) {
        if (avro_value_get_current_branch(&cur, &next) != 0)
            return NULL;
        cur = next;
    }
    const char *s = NULL;
    size_t sz = 0;
    int32_t i32;
    int64_t i64;
    double d;
    float fl;
    int en, b;
    switch (avro_value_get_type(&cur)) {
    case AVRO_NULL:
        return NULL;
    case AVRO_STRING:
        if (avro_value_get_string(&cur, &s, &sz) != 0)
            return NULL;
        snprintf(r->label_buf, sizeof r->label_buf, "%s", s);
        break;
    case AVRO_ENUM: {
        if (avro_value_get_enum(&cur, &en) != 0)
            return NULL;
        s = avro_schema_enum_get(avro_value_get_schema(&cur), en);
        snprintf(r->label_buf, sizeof r->label_buf, "%s", s ? s : "?");
        break;
    }
    case AVRO_INT32:
        avro_value_get_int(&cur, &i32);
        snprintf(r->label_buf, sizeof r->label_buf, "%" PRId32, i32);
        break;
    case AVRO_INT64:
        avro_value_get_long(&cur, &i64);
        snprintf(r->label_buf, sizeof r->label_buf, "%" PRId64, i64);
        break;
    case AVRO_DOUBLE:
        avro_value_get_double(&cur, &d);
        encode_double(d, r->label_buf);
        break;
    case AVRO_FLOAT:
        avro_value_get_float(&cur, &fl);
        encode_double(fl, r->label_buf);
        break;
    case AVRO_BOOLEAN:
        avro_value_get_boolean(&cur, &b);
        snprintf(r->label_buf, sizeof r->label_buf, "%s", b ? "true" : "false");
        break;
    default:
        r->label_unreadable++;
        return NULL;
    }
    return r->label_buf;
}

/* ---- per record ------------------------------------------------------ */

static int write_vector(replay *r, const packet_features *pf, const char *label)
{
    FILE *f = r->vout;
    uint32_t dim = pipeline_dim(r->p);
    fputs("{\"id\":", f);
    put_jstr(f, pf->packet_id);
    fputs(",\"time\":", f);
    put_num(f, pf->time_from_packet ? pf->time_days : NAN);
    fputs(",\"x\":[", f);
    int any_err = 0;
    for (uint32_t j = 0; j < dim; j++) {
        if (j)
            fputc(',', f);
        put_num(f, pf->missing[j] ? NAN : pf->x[j]);
        any_err |= pf->err[j] > 0;
    }
    fputc(']', f);
    if (any_err) {
        fputs(",\"err\":[", f);
        for (uint32_t j = 0; j < dim; j++) {
            if (j)
                fputc(',', f);
            put_num(f, pf->err[j] > 0 ? pf->err[j] : NAN);
        }
        fputc(']', f);
    }
    if (label) {
        fputs(",\"label\":", f);
        put_jstr(f, label);
    }
    fputs("}\n", f);
    return 0;
}

static void write_refused(replay *r, int reason, const char *path,
                          size_t input_index, uint64_t index, int is_line)
{
    int idx = packet_reason_index(reason);
    r->refused++;
    r->refused_by[idx >= 0 ? (unsigned)idx : PACKET_REASON_COUNT]++;
    FILE *f = r->out;
    fputs("{\"refused\":", f);
    put_jstr(f, packet_reason_name(reason));
    fputs(",\"text\":", f);
    put_jstr(f, packet_reason_text(reason));
    fputs(",\"input\":{\"topic\":", f);
    put_jstr(f, path);
    fprintf(f, ",\"partition\":%zu,\"offset\":%" PRIu64 "},\"%s\":%" PRIu64 "}\n",
            input_index, index, is_line ? "line" : "record", index + 1);
}

static void write_result(replay *r, const pipeline_output *po,
                         const char *label)
{
    fwrite(po->payload, 1, po->len, r->out);
    fputc('\n', r->out);
    if (po->res && po->res->warm)
        r->warm++;
    if (r->vout && po->pf)
        write_vector(r, po->pf, label);
}

/* ---- pipeline construction ------------------------------------------ */

static int make_pipeline(replay *r, uint32_t vector_dim)
{
    char err[512];
    int rc = r->cfg.featmap
                 ? pipeline_new(&r->cfg, &r->p, err, sizeof err)
                 : pipeline_new_vectors(&r->cfg, vector_dim, &r->p, err,
                                        sizeof err);
    if (rc != 0) {
        fprintf(stderr, "oddsky replay: %s\n", err);
        return EX_CONFIG;
    }
    r->fm = pipeline_featmap(r->p);
    if (r->fm && !(r->scratch = featmap_scratch_new(r->fm))) {
        fprintf(stderr, "oddsky replay: out of memory\n");
        return EX_OSERR;
    }
    return 0;
}

/* ---- Avro object container files ------------------------------------ */

static int replay_container(replay *r, const char *path, size_t in_idx,
                            FILE *fp)
{
    if (!r->p) {
        fprintf(stderr,
                "oddsky replay: %s is an Avro container of packets, but the "
                "config has no featmap (give --config or --set featmap=FILE)\n",
                path);
        return EX_CONFIG;
    }
    avro_file_reader_t fr;
    if (avro_file_reader_fp(fp, path, 0, &fr) != 0) {
        fprintf(stderr, "oddsky replay: %s: not a readable Avro container: %s\n",
                path, avro_strerror());
        return EX_DATAERR;
    }
    int ret = 0;
    char err[256];
    avro_value_iface_t *iface = NULL;
    avro_value_t v;
    int have_value = 0;
    avro_schema_t ws = avro_file_reader_get_writer_schema(fr);
    featmap_plan *plan = featmap_plan_avro(r->fm, ws, err, sizeof err);
    if (!plan) {
        fprintf(stderr, "oddsky replay: %s: writer schema: %s\n", path, err);
        ret = EX_DATAERR;
        goto close_reader;
    }
    if (featmap_plan_resolved(plan) == 0)
        fprintf(stderr, "oddsky replay: %s: warning: no path of the feature "
                        "map exists in the writer schema\n", path);
    if (!(iface = avro_generic_class_from_schema(ws)) ||
        avro_generic_value_new(iface, &v) != 0) {
        fprintf(stderr, "oddsky replay: %s: %s\n", path, avro_strerror());
        ret = EX_SOFTWARE;
        goto free_plan;
    }
    have_value = 1;
    for (uint64_t rec = 0;; rec++) {
        int rc = avro_file_reader_read_value(fr, &v);
        if (rc == EOF)
            break;
        if (rc != 0) {
            fprintf(stderr, "oddsky replay: %s: record %" PRIu64 ": %s\n",
                    path, rec + 1, avro_strerror());
            ret = EX_DATAERR;
            break;
        }
        r->records++;
        r->pf.framing = "container";
        int erc = featmap_extract_avro(r->fm, plan, &v, r->scratch, &r->pf);
        if (erc < 0) {
            write_refused(r, erc, path, in_idx, rec, 0);
        } else {
            const char *label =
                r->n_label_parts ? label_from_avro(r, &v) : NULL;
            pipeline_output po;
            if (pipeline_process_features(r->p, &r->pf, -1, 1, path,
                                          (int32_t)in_idx, (int64_t)rec, label,
                                          &po) == 0)
                write_result(r, &po, label);
            else
                write_refused(r, po.reason, path, in_idx, rec, 0);
        }
        avro_value_reset(&v);
        if ((rec & 1023) == 0) {
            long pos = ftell(fp);
            progress(r, pos > 0 ? (uint64_t)pos : 0, 0);
        }
    }
    if (have_value)
        avro_value_decref(&v);
free_plan:
    if (iface)
        avro_value_iface_decref(iface);
    featmap_plan_free(plan);
close_reader:
    avro_file_reader_close(fr);
    return ret;
}

/* ---- JSON lines ------------------------------------------------------ */

/* x / err entries: number or null (-> NaN).  Returns 0 or -1. */
static int read_numbers(const json_t *a, double *dst, size_t n)
{
    for (size_t j = 0; j < n; j++) {
        const json_t *e = json_array_get(a, j);
        if (json_is_null(e))
            dst[j] = NAN;
        else if (json_is_number(e))
            dst[j] = json_number_value(e);
        else
            return -1;
    }
    return 0;
}

static int vector_line(replay *r, const char *path, size_t in_idx,
                       uint64_t line_idx, const json_t *root)
{
    uint64_t ln = line_idx + 1;
    const json_t *xa = json_object_get(root, "x");
    size_t n = json_array_size(xa);
    if (n == 0 || n > MODEL_MAX_DIM) {
        fprintf(stderr, "oddsky replay: %s:%" PRIu64 ": \"x\" has %zu entries "
                "(1..%u allowed)\n", path, ln, n, MODEL_MAX_DIM);
        return EX_DATAERR;
    }
    if (!r->p) {
        int rc = make_pipeline(r, (uint32_t)n);
        if (rc)
            return rc;
    }
    uint32_t dim = pipeline_dim(r->p);
    if (n != dim) {
        fprintf(stderr, "oddsky replay: %s:%" PRIu64 ": \"x\" has %zu entries, "
                "expected %u (%s)\n", path, ln, n, dim,
                r->fm ? "the feature map's features" : "as the first vector line");
        return EX_DATAERR;
    }
    if (read_numbers(xa, r->x, n) != 0) {
        fprintf(stderr, "oddsky replay: %s:%" PRIu64 ": \"x\" entries must be "
                "numbers or null\n", path, ln);
        return EX_DATAERR;
    }
    const json_t *ea = json_object_get(root, "err");
    int have_err = ea && !json_is_null(ea);
    if (have_err && (!json_is_array(ea) || json_array_size(ea) != n ||
                     read_numbers(ea, r->err, n) != 0)) {
        fprintf(stderr, "oddsky replay: %s:%" PRIu64 ": \"err\" must be an "
                "array of %zu numbers or nulls\n", path, ln, n);
        return EX_DATAERR;
    }
    const json_t *idv = json_object_get(root, "id");
    char id[PACKET_ID_MAX];
    if (json_is_string(idv) && strlen(json_string_value(idv)) < PACKET_ID_MAX)
        snprintf(id, sizeof id, "%s", json_string_value(idv));
    else if (json_is_integer(idv))
        snprintf(id, sizeof id, "%" JSON_INTEGER_FORMAT,
                 json_integer_value(idv));
    else {
        fprintf(stderr, "oddsky replay: %s:%" PRIu64 ": \"id\" must be a "
                "string (< %u bytes) or an integer\n", path, ln, PACKET_ID_MAX);
        return EX_DATAERR;
    }
    const json_t *tv = json_object_get(root, "time");
    double t = NAN;
    if (json_is_number(tv))
        t = json_number_value(tv);
    else if (tv && !json_is_null(tv)) {
        fprintf(stderr, "oddsky replay: %s:%" PRIu64 ": \"time\" must be a "
                "number (MJD days) or null\n", path, ln);
        return EX_DATAERR;
    }
    for (size_t j = 0; j < n; j++)
        r->miss[j] = !isfinite(r->x[j]);
    const char *label = label_from_json(r, json_object_get(root, "label"));
    pipeline_output po;
    if (pipeline_process_vector(r->p, id, t, r->x, have_err ? r->err : NULL,
                                r->miss, 1, label, &po) != 0) {
        write_refused(r, po.reason, path, in_idx, line_idx, 1);
        return 0;
    }
    /* The vector path knows no input coordinates; the record gets the
     * pipeline's (empty topic, -1, -1). */
    write_result(r, &po, label);
    return 0;
}

static int replay_lines(replay *r, const char *path, size_t in_idx, FILE *fp)
{
    char *line = NULL;
    size_t cap = 0;
    ssize_t len;
    uint64_t done = 0;
    int ret = 0;
    for (uint64_t li = 0; (len = getline(&line, &cap, fp)) >= 0; li++) {
        done += (uint64_t)len;
        while (len > 0 && (line[len - 1] == '\n' || line[len - 1] == '\r'))
            line[--len] = '\0';
        size_t k = 0;
        while (k < (size_t)len && (line[k] == ' ' || line[k] == '\t'))
            k++;
        if (k == (size_t)len)
            continue; /* blank */
        r->records++;
        json_error_t je;
        json_t *root = json_loadb(line, (size_t)len, 0, &je);
        if (json_is_object(root) && json_is_array(json_object_get(root, "x"))) {
            ret = vector_line(r, path, in_idx, li, root);
            json_decref(root);
            if (ret)
                break;
        } else {
            if (!r->p || !r->fm) {
                fprintf(stderr, "oddsky replay: %s:%" PRIu64 ": a packet line "
                        "(no \"x\" array), but the config has no featmap "
                        "(give --config or --set featmap=FILE)\n", path, li + 1);
                json_decref(root);
                ret = EX_CONFIG;
                break;
            }
            const char *label = r->n_label_parts && json_is_object(root)
                                    ? label_from_packet_json(r, root)
                                    : NULL;
            pipeline_input in = {.buf = line, .len = (size_t)len, .topic = path,
                                 .partition = (int32_t)in_idx,
                                 .offset = (int64_t)li, .kafka_ts_ms = -1,
                                 .learn = 1, .label = label};
            pipeline_output po;
            if (pipeline_process(r->p, &in, &po) == 0)
                write_result(r, &po, label);
            else
                write_refused(r, po.reason, path, in_idx, li, 1);
            json_decref(root);
        }
        if ((li & 1023) == 0)
            progress(r, done, 0);
    }
    if (!ret && ferror(fp)) {
        fprintf(stderr, "oddsky replay: %s: read error: %s\n", path,
                strerror(errno));
        ret = EX_IOERR;
    }
    free(line);
    return ret;
}

static int replay_file(replay *r, const char *path, size_t in_idx)
{
    FILE *fp = fopen(path, "rb");
    if (!fp) {
        fprintf(stderr, "oddsky replay: cannot open %s: %s\n", path,
                strerror(errno));
        return EX_NOINPUT;
    }
    unsigned char magic[4];
    size_t got = fread(magic, 1, 4, fp);
    int container = got == 4 && memcmp(magic, "Obj\x01", 4) == 0;
    int ret;
    if (fseek(fp, 0, SEEK_SET) != 0) {
        fprintf(stderr, "oddsky replay: %s: cannot seek (a regular file is "
                        "needed)\n", path);
        ret = EX_NOINPUT;
    } else {
        ret = container ? replay_container(r, path, in_idx, fp)
                        : replay_lines(r, path, in_idx, fp);
    }
    struct stat st;
    if (fstat(fileno(fp), &st) == 0)
        r->bytes_before += (uint64_t)st.st_size;
    fclose(fp);
    return ret;
}

/* ---- the command ----------------------------------------------------- */

static int load_config(replay *r)
{
    config_errs *errs = malloc(sizeof *errs);
    if (!errs) {
        fprintf(stderr, "oddsky replay: out of memory\n");
        return EX_OSERR;
    }
    config_errs_init(errs);
    int rc = 0;
    if (config_init_defaults(&r->cfg) != 0) {
        fprintf(stderr, "oddsky replay: out of memory\n");
        free(errs);
        return EX_OSERR;
    }
    if (r->o->config)
        config_load_file(&r->cfg, r->o->config, errs);
    for (size_t i = 0; i < r->o->n_sets; i++)
        config_apply_set(&r->cfg, r->o->sets[i], errs);
    if (config_errs_count(errs) == 0)
        config_validate_for(&r->cfg, CONFIG_FOR_DEMO, errs);
    if (config_errs_count(errs) > 0) {
        config_errs_print(errs, stderr);
        fprintf(stderr, "oddsky replay: %s: %u config error%s\n",
                r->o->config ? r->o->config : "(defaults)",
                config_errs_count(errs),
                config_errs_count(errs) == 1 ? "" : "s");
        rc = EX_CONFIG;
    }
    free(errs);
    /* Replay writes JSON lines whatever output.format says. */
    r->cfg.output.format = CONFIG_OUTPUT_JSON;
    return rc;
}

static FILE *open_out(const char *path)
{
    if (strcmp(path, "-") == 0)
        return stdout;
    FILE *f = fopen(path, "wb");
    if (!f)
        fprintf(stderr, "oddsky replay: cannot create %s: %s\n", path,
                strerror(errno));
    return f;
}

static int close_out(FILE *f, const char *path)
{
    if (!f)
        return 0;
    int bad = fflush(f) != 0 || ferror(f);
    if (f != stdout)
        bad |= fclose(f) != 0;
    if (bad) {
        fprintf(stderr, "oddsky replay: write error on %s: %s\n", path,
                strerror(errno));
        return EX_IOERR;
    }
    return 0;
}

static void summary(replay *r)
{
    struct timespec now;
    clock_gettime(CLOCK_MONOTONIC, &now);
    double s = elapsed_s(&r->t0, &now);
    const pipeline_counters *c = r->p ? pipeline_get_counters(r->p) : NULL;
    fprintf(stderr,
            "replay: %" PRIu64 " records, %" PRIu64 " results (%" PRIu64
            " warm), %" PRIu64 " refused",
            r->records, c ? c->results : 0, r->warm, r->refused);
    if (r->refused) {
        fputs(" (", stderr);
        int first = 1;
        for (unsigned i = 0; i <= PACKET_REASON_COUNT; i++) {
            if (!r->refused_by[i])
                continue;
            fprintf(stderr, "%s%s %" PRIu64, first ? "" : ", ",
                    i < PACKET_REASON_COUNT ? packet_reason_name(-(int)i - 1)
                                            : "other",
                    r->refused_by[i]);
            first = 0;
        }
        fputc(')', stderr);
    }
    fprintf(stderr, ", %" PRIu64 " flags, %.0f records/s, %.2f s\n",
            c ? c->flags : 0, s > 0 ? (double)r->records / s : 0.0, s);
    if (r->label_unreadable)
        fprintf(stderr, "replay: %" PRIu64 " labels could not be read (not a "
                "scalar, or too long)\n", r->label_unreadable);
}

int cmd_replay(int argc, char **argv)
{
    replay_opts *o = calloc(1, sizeof *o);
    replay *r = calloc(1, sizeof *r);
    int ret = 0, done = 0;
    if (!o || !r) {
        free(o);
        free(r);
        fprintf(stderr, "oddsky replay: out of memory\n");
        return EX_OSERR;
    }
    r->o = o;
    if ((ret = parse_args(argc, argv, o, &done)) != 0 || done)
        goto free_opts;
    if (o->label_field && split_label_path(r, o->label_field) != 0) {
        ret = usage_error("--label-field '%s' is not a dotted path",
                          o->label_field);
        goto free_cfg;
    }
    if ((ret = load_config(r)) != 0)
        goto free_cfg;
    if (r->cfg.featmap && (ret = make_pipeline(r, 0)) != 0)
        goto free_cfg;
    for (size_t i = 0; i < o->n_inputs; i++) {
        struct stat st;
        if (stat(o->inputs[i], &st) != 0) {
            fprintf(stderr, "oddsky replay: cannot open %s: %s\n", o->inputs[i],
                    strerror(errno));
            ret = EX_NOINPUT;
            goto free_cfg;
        }
        r->total_bytes += (uint64_t)st.st_size;
    }
    if (!(r->out = open_out(o->output))) {
        ret = EX_CANTCREAT;
        goto free_cfg;
    }
    setvbuf(r->out, NULL, _IOFBF, REPLAY_OUT_BUF);
    if (o->vectors_out) {
        if (!(r->vout = open_out(o->vectors_out))) {
            ret = EX_CANTCREAT;
            goto close_files;
        }
        setvbuf(r->vout, NULL, _IOFBF, REPLAY_OUT_BUF);
    }
    r->progress = !o->quiet && isatty(STDERR_FILENO);
    clock_gettime(CLOCK_MONOTONIC, &r->t0);
    for (size_t i = 0; i < o->n_inputs && !ret; i++)
        ret = replay_file(r, o->inputs[i], i);
    if (r->progress) {
        progress(r, 0, 1);
        fputc('\n', stderr);
    }
    if (!o->quiet)
        summary(r);
close_files: {
        int w1 = close_out(r->out, o->output);
        int w2 = o->vectors_out ? close_out(r->vout, o->vectors_out) : 0;
        if (!ret)
            ret = w1 ? w1 : w2;
    }
free_cfg:
    featmap_scratch_free(r->scratch);
    pipeline_free(r->p);
    config_free(&r->cfg);
    free(r->label_copy);
free_opts:
    free(o);
    free(r);
    return ret;
}
