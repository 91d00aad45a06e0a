// fuzz-sources: daemon/decode.c daemon/featmap.c core/series.c
// fuzz-libs: -lavro -lz -ljansson -lm
/*
 * fuzz_featmap.c - libFuzzer target for the feature map: arbitrary JSON
 * text as a "featmap" spec through featmap_validate() and featmap_new(),
 * and, when it compiles, extraction from fixed demo packets.
 *
 * The text is parsed with jansson first (nesting limited to FM_MAX_DEPTH
 * by a scan before parsing, as config files are small and flat; deeper
 * texts are skipped).  A spec that compiles is planned against the demo
 * schema and extracts from fixed packets, each as JSON and as bare Avro
 * (same packet), through a decoder as the daemon uses it: one with a host
 * and one with host null, so both branches of that union are read.
 *
 * Invariants checked besides the sanitizers:
 *  - featmap_validate() counts exactly the problems it reports, and
 *    featmap_new() succeeds exactly when it reports none;
 *  - a compiled map has 1..MODEL_MAX_DIM features with distinct,
 *    terminated names shorter than FEATMAP_NAME_MAX;
 *  - extraction gives 0 or a PACKET_E_* reason, missing[j] exactly when
 *    x[j] is not finite, and the JSON and Avro forms of the same packet
 *    give the same features bit for bit.
 */
#include <math.h>
#include <stdint.h>
#include <string.h>

#include <jansson.h>

#include "daemon/decode.h"
#include "daemon/featmap.h"
#include "daemon/packet.h"
#include "fuzz_util.h"

#define FM_MAX_DEPTH 24u

/* A demo packet with a short history (all six bands, one error 0, a
 * repeated band), as JSON, up to its host; the Avro forms are encoded
 * from the JSON texts below. */
#define PACKET_JSON_HEAD                                                          \
    "{\"packet_id\":123,\"source\":{\"id\":77,\"ra_deg\":10.5,\"dec_deg\":-3.25," \
    "\"first_mjd\":59001.5},"                                                     \
    "\"obs\":{\"mjd\":60010.25,\"band\":\"r\",\"mag\":19.5,\"mag_err\":0.05,"     \
    "\"quality\":0.9,\"field\":4,\"mover_sep_arcsec\":60.0},\"history\":["        \
    "{\"mjd\":60001.0,\"band\":\"g\",\"mag\":20.1,\"mag_err\":0.1},"              \
    "{\"mjd\":60002.0,\"band\":\"r\",\"mag\":19.9,\"mag_err\":0.08},"             \
    "{\"mjd\":60003.5,\"band\":\"i\",\"mag\":19.7,\"mag_err\":0.0},"              \
    "{\"mjd\":60004.0,\"band\":\"r\",\"mag\":19.6,\"mag_err\":0.07},"             \
    "{\"mjd\":60005.0,\"band\":\"g\",\"mag\":20.3,\"mag_err\":0.12},"             \
    "{\"mjd\":60006.0,\"band\":\"z\",\"mag\":19.2,\"mag_err\":0.2},"              \
    "{\"mjd\":60007.0,\"band\":\"u\",\"mag\":21.0,\"mag_err\":0.3},"              \
    "{\"mjd\":60008.0,\"band\":\"y\",\"mag\":18.9,\"mag_err\":0.25},"             \
    "{\"mjd\":60009.0,\"band\":\"r\",\"mag\":19.4,\"mag_err\":0.06}],"            \
    "\"prior_limit\":{\"mjd\":60009.5,\"band\":\"g\",\"mag\":23.1},"

static const char *const packet_json[] = {
    PACKET_JSON_HEAD "\"host\":{\"sep_arcsec\":0.8,\"dist_mod\":40.2},"
                     "\"truth\":\"periodic\"}",
    PACKET_JSON_HEAD "\"host\":null,\"truth\":\"periodic\"}",
};
#define N_PACKETS (sizeof packet_json / sizeof packet_json[0])

static uint8_t packet_avro[N_PACKETS][1024];
static size_t packet_avro_len[N_PACKETS];
static char bare_path[PATH_MAX], dir[PATH_MAX];
static packet_features f_json, f_avro;
static int errs_seen;

static size_t put_long(uint8_t *p, int64_t v)
{
    uint64_t u = ((uint64_t)v << 1) ^ (uint64_t)(v >> 63);
    size_t n = 0;
    while (u > 0x7f) {
        p[n++] = (uint8_t)(u | 0x80);
        u >>= 7;
    }
    p[n++] = (uint8_t)u;
    return n;
}

static size_t put_double(uint8_t *p, double v)
{
    memcpy(p, &v, 8); /* little-endian hosts only, as the Avro spec needs */
    return 8;
}

static size_t put_string(uint8_t *p, const char *s)
{
    size_t n = strlen(s), k = put_long(p, (int64_t)n);
    memcpy(p + k, s, n);
    return k + n;
}

/* Avro binary of packet_json[k] under the demo schema (Avro 1.11 spec). */
static void encode_packet(size_t k)
{
    json_error_t jerr;
    json_t *r = json_loads(packet_json[k], 0, &jerr);
    fuzz_check(r != NULL, "fixed packet parses");
    uint8_t *p = packet_avro[k];
    size_t n = 0;
    json_t *src = json_object_get(r, "source"), *obs = json_object_get(r, "obs");
    n += put_long(p + n, json_integer_value(json_object_get(r, "packet_id")));
    n += put_long(p + n, json_integer_value(json_object_get(src, "id")));
    n += put_double(p + n, json_number_value(json_object_get(src, "ra_deg")));
    n += put_double(p + n, json_number_value(json_object_get(src, "dec_deg")));
    n += put_double(p + n, json_number_value(json_object_get(src, "first_mjd")));
    n += put_double(p + n, json_number_value(json_object_get(obs, "mjd")));
    n += put_string(p + n, json_string_value(json_object_get(obs, "band")));
    n += put_double(p + n, json_number_value(json_object_get(obs, "mag")));
    n += put_double(p + n, json_number_value(json_object_get(obs, "mag_err")));
    n += put_double(p + n, json_number_value(json_object_get(obs, "quality")));
    n += put_long(p + n, json_integer_value(json_object_get(obs, "field")));
    n += put_double(p + n, json_number_value(json_object_get(obs, "mover_sep_arcsec")));
    json_t *h = json_object_get(r, "history");
    n += put_long(p + n, (int64_t)json_array_size(h));
    for (size_t i = 0; i < json_array_size(h); i++) {
        json_t *e = json_array_get(h, i);
        n += put_double(p + n, json_number_value(json_object_get(e, "mjd")));
        n += put_string(p + n, json_string_value(json_object_get(e, "band")));
        n += put_double(p + n, json_number_value(json_object_get(e, "mag")));
        n += put_double(p + n, json_number_value(json_object_get(e, "mag_err")));
    }
    n += put_long(p + n, 0);
    json_t *lim = json_object_get(r, "prior_limit");
    n += put_long(p + n, 1); /* union ["null", Limit]: branch 1 */
    n += put_double(p + n, json_number_value(json_object_get(lim, "mjd")));
    n += put_string(p + n, json_string_value(json_object_get(lim, "band")));
    n += put_double(p + n, json_number_value(json_object_get(lim, "mag")));
    json_t *host = json_object_get(r, "host");
    fuzz_check(host != NULL, "fixed packet has a host key");
    if (json_is_null(host)) {
        n += put_long(p + n, 0); /* union ["null", Host]: branch 0 */
    } else {
        n += put_long(p + n, 1); /* union ["null", Host]: branch 1 */
        n += put_double(p + n, json_number_value(json_object_get(host, "sep_arcsec")));
        n += put_double(p + n, json_number_value(json_object_get(host, "dist_mod")));
    }
    n += put_long(p + n, 2); /* truth: "periodic" */
    packet_avro_len[k] = n;
    json_decref(r);
}

static void cleanup(void)
{
    unlink(bare_path);
    rmdir(dir);
}

int LLVMFuzzerInitialize(int *argc, char ***argv)
{
    (void)argc;
    (void)argv;
    char p[PATH_MAX];
    snprintf(p, sizeof p, "%s/config/schemas/oddsky-demo-packet.avsc", fuzz_top());
    size_t len;
    char *schema = fuzz_slurp(p, &len);
    snprintf(dir, sizeof dir, "%s", fuzz_tmpdir("featmap"));
    fuzz_write(dir, "bare.avsc", schema, len);
    free(schema);
    snprintf(bare_path, sizeof bare_path, "%s/bare.avsc", dir);
    for (size_t k = 0; k < N_PACKETS; k++)
        encode_packet(k);
    atexit(cleanup);
    return 0;
}

/* Nesting depth of a JSON text, skipping strings. */
static int too_deep(const uint8_t *p, size_t n)
{
    unsigned depth = 0;
    int in_str = 0;
    for (size_t i = 0; i < n; i++) {
        if (in_str) {
            if (p[i] == '\\')
                i++;
            else if (p[i] == '"')
                in_str = 0;
        } else if (p[i] == '"') {
            in_str = 1;
        } else if (p[i] == '[' || p[i] == '{') {
            if (++depth > FM_MAX_DEPTH)
                return 1;
        } else if ((p[i] == ']' || p[i] == '}') && depth) {
            depth--;
        }
    }
    return 0;
}

static void on_err(void *ctx, const char *path, const char *rule)
{
    (void)ctx;
    fuzz_check(path != NULL && rule != NULL && rule[0] != '\0',
               "a problem has a path and a rule");
    errs_seen++;
}

static void check_features(int rc, const featmap *fm, const packet_features *o)
{
    fuzz_check(rc == 0 || packet_reason_index(rc) >= 0,
               "result is 0 or a PACKET_E_* reason");
    if (rc != 0)
        return;
    fuzz_check(o->dim == featmap_dim(fm), "dim = featmap_dim");
    uint32_t miss = 0;
    for (uint32_t j = 0; j < o->dim; j++) {
        fuzz_check(o->missing[j] == !isfinite(o->x[j]),
                   "missing exactly when x is not finite");
        fuzz_check(isfinite(o->err[j]), "errors finite");
        miss += o->missing[j];
    }
    fuzz_check(miss == o->n_missing, "n_missing counts missing[]");
}

int LLVMFuzzerTestOneInput(const uint8_t *data, size_t size)
{
    if (size > 16384 || too_deep(data, size))
        return 0;
    json_error_t jerr;
    json_t *spec = json_loadb((const char *)data, size, 0, &jerr);
    if (!spec)
        return 0;
    errs_seen = 0;
    int problems = featmap_validate(spec, on_err, NULL);
    fuzz_check(problems == errs_seen, "validate counts what it reports");
    fuzz_check(featmap_validate(spec, NULL, NULL) == problems,
               "validate without a callback counts the same");
    char err[512] = "";
    featmap *fm = featmap_new(spec, err, sizeof err);
    json_decref(spec);
    if (!fm) {
        fuzz_check(problems > 0, "featmap_new fails only for invalid specs");
        fuzz_check(err[0] != '\0', "a failure has a message");
        return 0;
    }
    fuzz_check(problems == 0, "featmap_new accepts only valid specs");

    uint32_t dim = featmap_dim(fm);
    fuzz_check(dim >= 1 && dim <= MODEL_MAX_DIM, "dim in 1..MODEL_MAX_DIM");
    const char *const *names = featmap_names(fm);
    for (uint32_t j = 0; j < dim; j++) {
        const char *a = featmap_name(fm, j);
        fuzz_check(a != NULL && a == names[j], "names agree");
        fuzz_check(memchr(a, '\0', FEATMAP_NAME_MAX) != NULL,
                   "name shorter than FEATMAP_NAME_MAX");
        for (uint32_t i = 0; i < j; i++)
            fuzz_check(strcmp(a, names[i]) != 0, "names distinct");
    }
    fuzz_check(featmap_name(fm, dim) == NULL, "no name past dim");
    uint32_t mp = featmap_max_points(fm);
    fuzz_check(mp >= 1 && mp <= FEATMAP_MAX_POINTS_LIMIT, "max_points bounds");

    decoder_opts o = {.writer_schema_path = bare_path, .fm = fm};
    decoder *d = decoder_new(&o, err, sizeof err);
    fuzz_check(d != NULL, "a valid map builds a decoder on the demo schema");
    for (size_t k = 0; k < N_PACKETS; k++) {
        int rj = decoder_extract(d, packet_json[k], strlen(packet_json[k]), &f_json);
        check_features(rj, fm, &f_json);
        int ra = decoder_extract(d, packet_avro[k], packet_avro_len[k], &f_avro);
        check_features(ra, fm, &f_avro);
        fuzz_check(rj == ra, "JSON and Avro forms give the same result");
        if (rj == 0) {
            fuzz_check(!memcmp(f_json.x, f_avro.x, dim * sizeof f_json.x[0]) &&
                           !memcmp(f_json.err, f_avro.err, dim * sizeof f_json.err[0]) &&
                           !memcmp(f_json.missing, f_avro.missing, dim) &&
                           f_json.history_points == f_avro.history_points &&
                           !strcmp(f_json.packet_id, f_avro.packet_id) &&
                           !strcmp(f_json.source_id, f_avro.source_id),
                       "JSON and Avro forms give the same features");
        }
    }
    decoder_free(d);
    featmap_free(fm);
    return 0;
}
