// fuzz-sources: daemon/decode.c daemon/featmap.c core/series.c
// fuzz-libs: -lavro -lz -ljansson -lm
// fuzz-env: ASAN_OPTIONS=fast_unwind_on_malloc=0
/*
 * fuzz_decode.c - libFuzzer target for decoder_extract(): one Kafka
 * message of arbitrary bytes through framing detection, the Avro and JSON
 * guards, avro-c or jansson, and the demo feature map.
 *
 * Two decoders see every input, one per framing rule of decode.h:
 *   A: schema_dir with the demo schema as 1.avsc and a second schema
 *      (2.avsc, below: unions, maps, bytes, fixed, enum, float, boolean
 *      and a recursive record, so the guard's walk meets every type) plus
 *      the demo schema as bare writer: a leading 0x00 is schema-id framing.
 *   B: only the bare writer schema: a leading 0x00 is bare Avro.
 * The folder is made in LLVMFuzzerInitialize from the repository's files.
 *
 * Invariants checked besides the sanitizers:
 *  - the result is 0 or a reason in PACKET_REASON_MAP;
 *  - on success: dim = featmap_dim, missing[j] exactly when x[j] is not
 *    finite, n_missing counts them, errors are finite, ids are terminated
 *    and non-empty, the framing is named;
 *  - the same message decoded again by the same decoder (now a schema
 *    cache hit) gives the same result and the same features, bit for bit;
 *  - A and B agree on every message that does not start with 0x00.
 * Between inputs the decoders are rebuilt when a message added a writer
 * schema (containers carry their own), and unknown ids are forgotten, so
 * each input starts from the same state and crashes replay alone.
 */
#include <math.h>
#include <stdint.h>
#include <string.h>

#include <jansson.h>

#include "daemon/decode.h"
#include "daemon/featmap.h"
#include "daemon/packet.h"
#include "fuzz_util.h"

static const char variant_schema[] =
    "{\"type\":\"record\",\"name\":\"Alt\",\"namespace\":\"oddsky.fuzz\",\"fields\":["
    "{\"name\":\"packet_id\",\"type\":[\"null\",\"string\",\"long\"]},"
    "{\"name\":\"source\",\"type\":[\"null\",{\"type\":\"record\",\"name\":\"Src\","
    "\"fields\":[{\"name\":\"id\",\"type\":[\"long\",\"string\"]},"
    "{\"name\":\"tag\",\"type\":{\"type\":\"fixed\",\"name\":\"Tag\",\"size\":4}}]}]},"
    "{\"name\":\"obs\",\"type\":{\"type\":\"record\",\"name\":\"Obs\",\"fields\":["
    "{\"name\":\"mjd\",\"type\":[\"null\",\"double\"]},"
    "{\"name\":\"band\",\"type\":[\"null\",\"string\",\"bytes\"]},"
    "{\"name\":\"mag\",\"type\":[\"null\",\"float\",\"double\",\"int\",\"long\"]},"
    "{\"name\":\"mag_err\",\"type\":[\"null\",\"float\"]},"
    "{\"name\":\"quality\",\"type\":\"boolean\"},"
    "{\"name\":\"extra\",\"type\":{\"type\":\"map\",\"values\":\"bytes\"}}]}},"
    "{\"name\":\"history\",\"type\":[\"null\",{\"type\":\"array\",\"items\":{"
    "\"type\":\"record\",\"name\":\"Past\",\"fields\":["
    "{\"name\":\"mjd\",\"type\":\"double\"},"
    "{\"name\":\"band\",\"type\":{\"type\":\"enum\",\"name\":\"Band\","
    "\"symbols\":[\"u\",\"g\",\"r\",\"i\",\"z\",\"y\"]}},"
    "{\"name\":\"mag\",\"type\":[\"null\",\"double\"]},"
    "{\"name\":\"mag_err\",\"type\":\"float\"}]}}]},"
    "{\"name\":\"again\",\"type\":[\"null\",\"Obs\"]},"
    "{\"name\":\"chain\",\"type\":{\"type\":\"record\",\"name\":\"Node\",\"fields\":["
    "{\"name\":\"v\",\"type\":\"int\"},"
    "{\"name\":\"next\",\"type\":[\"null\",\"Node\"]}]}}]}";

static featmap *fm;
static decoder *dec_a, *dec_b;
static size_t base_a, base_b;
static char dir[PATH_MAX], bare_path[PATH_MAX];
static packet_features out1, out2, out3;
static int verbose; /* FUZZ_VERBOSE=1: print each input's reasons */

static decoder *make(int with_dir, size_t *base)
{
    decoder_opts o = {.schema_dir = with_dir ? dir : NULL,
                      .writer_schema_path = bare_path,
                      .max_message_bytes = 1 << 16,
                      .max_json_depth = 16,
                      .max_items = 4096,
                      .fm = fm};
    char err[512];
    decoder *d = decoder_new(&o, err, sizeof err);
    if (!d) {
        fprintf(stderr, "decoder_new: %s\n", err);
        abort();
    }
    if (with_dir) {
        /* Load 2.avsc now, so that the per-input state is the same. */
        static const uint8_t id2[] = {0, 0, 0, 0, 2};
        (void)decoder_extract(d, id2, sizeof id2, &out1);
    }
    *base = decoder_schema_count(d);
    return d;
}

static void cleanup(void)
{
    decoder_free(dec_a);
    decoder_free(dec_b);
    featmap_free(fm);
    char p[PATH_MAX];
    static const char *const names[] = {"1.avsc", "2.avsc", "bare.avsc"};
    for (size_t i = 0; i < 3; i++) {
        snprintf(p, sizeof p, "%s/%s", dir, names[i]);
        unlink(p);
    }
    rmdir(dir);
}

int LLVMFuzzerInitialize(int *argc, char ***argv)
{
    (void)argc;
    (void)argv;
    const char *top = fuzz_top();
    char p[PATH_MAX];
    snprintf(p, sizeof p, "%s/config/demo-featmap.json", top);
    json_error_t jerr;
    json_t *spec = json_load_file(p, 0, &jerr);
    fuzz_check(spec != NULL, "demo feature map parses");
    char err[512];
    fm = featmap_new(spec, err, sizeof err);
    json_decref(spec);
    if (!fm) {
        fprintf(stderr, "featmap_new: %s\n", err);
        abort();
    }
    snprintf(p, sizeof p, "%s/config/schemas/oddsky-demo-packet.avsc", top);
    size_t len;
    char *schema = fuzz_slurp(p, &len);
    snprintf(dir, sizeof dir, "%s", fuzz_tmpdir("decode"));
    fuzz_write(dir, "1.avsc", schema, len);
    fuzz_write(dir, "bare.avsc", schema, len);
    fuzz_write(dir, "2.avsc", variant_schema, sizeof variant_schema - 1);
    free(schema);
    snprintf(bare_path, sizeof bare_path, "%s/bare.avsc", dir);
    dec_a = make(1, &base_a);
    dec_b = make(0, &base_b);
    atexit(cleanup);
    verbose = getenv("FUZZ_VERBOSE") != NULL;
    return 0;
}

static void check_result(int rc, const packet_features *o)
{
    fuzz_check(rc == 0 || packet_reason_index(rc) >= 0,
               "result is 0 or a PACKET_E_* reason");
    if (rc != 0)
        return;
    fuzz_check(o->framing != NULL, "framing named on success");
    fuzz_check(o->dim == featmap_dim(fm), "dim = featmap_dim");
    uint32_t miss = 0;
    for (uint32_t j = 0; j < o->dim; j++) {
        fuzz_check(o->missing[j] <= 1, "missing is 0 or 1");
        fuzz_check(o->missing[j] == !isfinite(o->x[j]),
                   "missing exactly when x is not finite");
        fuzz_check(isfinite(o->err[j]), "errors finite");
        miss += o->missing[j];
    }
    fuzz_check(miss == o->n_missing, "n_missing counts missing[]");
    fuzz_check(memchr(o->packet_id, '\0', PACKET_ID_MAX) != NULL &&
                   o->packet_id[0] != '\0',
               "packet id terminated and non-empty");
    fuzz_check(memchr(o->source_id, '\0', PACKET_ID_MAX) != NULL &&
                   o->source_id[0] != '\0',
               "source id terminated and non-empty");
    fuzz_check(o->history_points <= featmap_max_points(fm),
               "history points within max_points");
}

static void check_same(int rc1, const packet_features *a, int rc2,
                       const packet_features *b, const char *what)
{
    if (rc1 != rc2) {
        fprintf(stderr, "%s: results %d and %d\n", what, rc1, rc2);
        fuzz_check(0, what);
    }
    if (rc1 != 0)
        return;
    fuzz_check(a->dim == b->dim && a->n_missing == b->n_missing &&
                   a->type_errors == b->type_errors &&
                   a->history_points == b->history_points &&
                   a->history_truncated == b->history_truncated &&
                   a->time_from_packet == b->time_from_packet &&
                   !strcmp(a->framing, b->framing),
               what);
    fuzz_check(!memcmp(a->x, b->x, a->dim * sizeof a->x[0]) &&
                   !memcmp(a->err, b->err, a->dim * sizeof a->err[0]) &&
                   !memcmp(a->missing, b->missing, a->dim),
               what);
    fuzz_check(!strcmp(a->packet_id, b->packet_id) &&
                   !strcmp(a->source_id, b->source_id),
               what);
    if (a->time_from_packet)
        fuzz_check(!memcmp(&a->time_days, &b->time_days, sizeof a->time_days),
                   what);
}

int LLVMFuzzerTestOneInput(const uint8_t *data, size_t size)
{
    int r1 = decoder_extract(dec_a, data, size, &out1);
    check_result(r1, &out1);
    int r2 = decoder_extract(dec_a, data, size, &out2);
    check_same(r1, &out1, r2, &out2, "decoder A: same message, same result");
    int r3 = decoder_extract(dec_b, data, size, &out3);
    check_result(r3, &out3);
    if (size > 0 && data[0] != 0x00)
        check_same(r1, &out1, r3, &out3, "decoders A and B agree");
    r2 = decoder_extract(dec_b, data, size, &out2);
    check_same(r3, &out3, r2, &out2, "decoder B: same message, same result");
    if (verbose)
        fprintf(stderr, "decode: A %s (%s), B %s (%s)\n", packet_reason_name(r1),
                out1.framing ? out1.framing : "-", packet_reason_name(r3),
                out3.framing ? out3.framing : "-");

    if (decoder_schema_count(dec_a) != base_a) {
        decoder_free(dec_a);
        dec_a = make(1, &base_a);
    }
    if (decoder_schema_count(dec_b) != base_b) {
        decoder_free(dec_b);
        dec_b = make(0, &base_b);
    }
    decoder_forget_unknown(dec_a);
    decoder_forget_unknown(dec_b);
    return 0;
}
