/*
 * test_decode.c - every framing decodes to the same features, every
 * poison input gets its reason, schema caches compile once per writer.
 *
 * Messages are built here with avro-c (generic values, avro_value_write,
 * the object-container writer) and with jansson-free JSON text, so the
 * decoder is checked against the library's own encoder (source: avro-c,
 * Avro specification binary encoding and object container files).
 */
#include <setjmp.h>
#include <stdarg.h>
#include <stddef.h>
#include <stdint.h>
#include <cmocka.h>

#include <math.h>
#include <stdio.h>
#include <stdlib.h>
#include <string.h>
#include <unistd.h>

#include "core/rng.h"
#include "daemon/decode.h"
#include "daemon/sim.h"

#define assert_near(a, b, tol)                                               \
    do {                                                                     \
        double a_ = (a), b_ = (b);                                           \
        if (!(fabs(a_ - b_) <= (tol) * (1.0 + fabs(b_)))) {                  \
            print_error("%s = %.17g, expected %.17g\n", #a, a_, b_);         \
            fail();                                                          \
        }                                                                    \
    } while (0)

#define assert_reason(rc, want)                                              \
    do {                                                                     \
        int rc_ = (rc);                                                      \
        if (rc_ != (want)) {                                                 \
            print_error("%s = %d (%s), expected %s\n", #rc, rc_,             \
                        packet_reason_name(rc_), packet_reason_name(want));  \
            fail();                                                          \
        }                                                                    \
    } while (0)

static const char *SCHEMA_A =
    "{\"type\":\"record\",\"name\":\"pkt\",\"namespace\":\"demo\",\"fields\":["
    " {\"name\":\"packet_id\",\"type\":\"long\"},"
    " {\"name\":\"source\",\"type\":{\"type\":\"record\",\"name\":\"src\","
    "   \"fields\":[{\"name\":\"id\",\"type\":\"string\"}]}},"
    " {\"name\":\"obs\",\"type\":{\"type\":\"record\",\"name\":\"obs\",\"fields\":["
    "   {\"name\":\"mjd\",\"type\":\"double\"},"
    "   {\"name\":\"mag\",\"type\":[\"null\",\"double\"]},"
    "   {\"name\":\"mag_err\",\"type\":[\"null\",\"double\"]},"
    "   {\"name\":\"band\",\"type\":\"string\"}]}},"
    " {\"name\":\"history\",\"type\":[\"null\",{\"type\":\"array\",\"items\":"
    "   {\"type\":\"record\",\"name\":\"det\",\"fields\":["
    "   {\"name\":\"mjd\",\"type\":\"double\"},"
    "   {\"name\":\"mag\",\"type\":[\"null\",\"double\"]},"
    "   {\"name\":\"mag_err\",\"type\":\"double\"},"
    "   {\"name\":\"band\",\"type\":\"string\"}]}}]}"
    "]}";

/* Same content, other field order, an extra field, band as an enum. */
static const char *SCHEMA_B =
    "{\"type\":\"record\",\"name\":\"packet\",\"namespace\":\"other\",\"fields\":["
    " {\"name\":\"history\",\"type\":[\"null\",{\"type\":\"array\",\"items\":"
    "   {\"type\":\"record\",\"name\":\"point\",\"fields\":["
    "   {\"name\":\"band\",\"type\":{\"type\":\"enum\",\"name\":\"bands\","
    "     \"symbols\":[\"g\",\"r\"]}},"
    "   {\"name\":\"mag_err\",\"type\":\"double\"},"
    "   {\"name\":\"mag\",\"type\":[\"null\",\"double\"]},"
    "   {\"name\":\"mjd\",\"type\":\"double\"}]}}]},"
    " {\"name\":\"note\",\"type\":\"string\"},"
    " {\"name\":\"obs\",\"type\":{\"type\":\"record\",\"name\":\"o\",\"fields\":["
    "   {\"name\":\"band\",\"type\":\"bands\"},"
    "   {\"name\":\"mag_err\",\"type\":[\"null\",\"double\"]},"
    "   {\"name\":\"mag\",\"type\":[\"null\",\"double\"]},"
    "   {\"name\":\"mjd\",\"type\":\"double\"}]}},"
    " {\"name\":\"source\",\"type\":{\"type\":\"record\",\"name\":\"s\","
    "   \"fields\":[{\"name\":\"id\",\"type\":\"string\"}]}},"
    " {\"name\":\"packet_id\",\"type\":\"long\"}"
    "]}";

static const char *SPEC =
    "{\"id\": \"packet_id\", \"source\": \"source.id\", \"time\": \"obs.mjd\","
    " \"history\": {\"path\": \"history\", \"time\": \"mjd\", \"value\": \"mag\","
    "               \"err\": \"mag_err\", \"band\": \"band\"},"
    " \"current\": {\"time\": \"obs.mjd\", \"value\": \"obs.mag\","
    "               \"err\": \"obs.mag_err\", \"band\": \"obs.band\"},"
    " \"features\": ["
    "  {\"name\": \"mag\", \"field\": \"obs.mag\", \"err\": \"obs.mag_err\"},"
    "  {\"name\": \"r_amp\", \"series\": \"amplitude\", \"band\": \"r\","
    "   \"include_current\": true},"
    "  {\"name\": \"r_mean\", \"series\": \"wmean\", \"band\": \"r\"},"
    "  {\"name\": \"all_n\", \"series\": \"count\", \"band\": \"all\","
    "   \"include_current\": true},"
    "  {\"name\": \"g_r\", \"color\": [\"g\", \"r\"]}"
    " ]}";

enum { F_MAG, F_RAMP, F_RMEAN, F_ALLN, F_GR, F_DIM };

typedef struct det {
    double t, mag, err;
    const char *band;
} det;

static const det HIST[] = {
    {60004.0, 17.0, 0.05, "r"}, {60003.0, 17.9, 0.1, "r"},
    {60002.0, 18.4, 0.2, "g"},  {60001.0, 17.5, 0.1, "r"},
    {60000.0, 18.0, 0.1, "g"},
};
#define N_HIST 5

static const char *PACKET_JSON =
    "{\"packet_id\": 42, \"source\": {\"id\": \"src-7\"},"
    " \"obs\": {\"mjd\": 60005.0, \"mag\": 16.5, \"mag_err\": 0.1, \"band\": \"r\"},"
    " \"history\": ["
    "  {\"mjd\": 60004.0, \"mag\": 17.0, \"mag_err\": 0.05, \"band\": \"r\"},"
    "  {\"mjd\": 60003.0, \"mag\": 17.9, \"mag_err\": 0.1, \"band\": \"r\"},"
    "  {\"mjd\": 60002.0, \"mag\": 18.4, \"mag_err\": 0.2, \"band\": \"g\"},"
    "  {\"mjd\": 60001.0, \"mag\": 17.5, \"mag_err\": 0.1, \"band\": \"r\"},"
    "  {\"mjd\": 60000.0, \"mag\": 18.0, \"mag_err\": 0.1, \"band\": \"g\"}"
    " ]}";

/* ---- building Avro with avro-c --------------------------------------- */

static void set_field(avro_value_t *rec, const char *name, avro_value_t *out)
{
    assert_int_equal(avro_value_get_by_name(rec, name, out, NULL), 0);
}

/* Set a ["null","double"] (or plain double) value. */
static void set_num(avro_value_t *v, double x, int null)
{
    if (avro_value_get_type(v) == AVRO_UNION) {
        avro_value_t b;
        assert_int_equal(avro_value_set_branch(v, null ? 0 : 1, &b), 0);
        if (!null)
            assert_int_equal(avro_value_set_double(&b, x), 0);
        return;
    }
    assert_int_equal(avro_value_set_double(v, x), 0);
}

static void set_band(avro_value_t *v, const char *band)
{
    if (avro_value_get_type(v) == AVRO_ENUM)
        assert_int_equal(avro_value_set_enum(v, band[0] == 'g' ? 0 : 1), 0);
    else
        assert_int_equal(avro_value_set_string(v, band), 0);
}

typedef struct pk {
    int64_t id;
    double cur_mag;
    int cur_null;
    int n_hist;
} pk;

/* Fill a generic value of either schema with the test packet. */
static void fill(avro_value_t *root, const pk *p)
{
    avro_value_t f, g, h, arr, item;
    set_field(root, "packet_id", &f);
    assert_int_equal(avro_value_set_long(&f, p->id), 0);
    set_field(root, "source", &f);
    set_field(&f, "id", &g);
    assert_int_equal(avro_value_set_string(&g, "src-7"), 0);
    if (avro_value_get_by_name(root, "note", &f, NULL) == 0)
        assert_int_equal(avro_value_set_string(&f, "extra"), 0);
    set_field(root, "obs", &f);
    set_field(&f, "mjd", &g);
    set_num(&g, 60005.0, 0);
    set_field(&f, "mag", &g);
    set_num(&g, p->cur_mag, p->cur_null);
    set_field(&f, "mag_err", &g);
    set_num(&g, 0.1, 0);
    set_field(&f, "band", &g);
    set_band(&g, "r");
    set_field(root, "history", &h);
    assert_int_equal(avro_value_set_branch(&h, 1, &arr), 0);
    for (int i = 0; i < p->n_hist; i++) {
        const det *d = &HIST[i % N_HIST];
        assert_int_equal(avro_value_append(&arr, &item, NULL), 0);
        set_field(&item, "mjd", &g);
        set_num(&g, d->t, 0);
        set_field(&item, "mag", &g);
        set_num(&g, d->mag, 0);
        set_field(&item, "mag_err", &g);
        set_num(&g, d->err, 0);
        set_field(&item, "band", &g);
        set_band(&g, d->band);
    }
}

typedef struct schema_kit {
    avro_schema_t schema;
    avro_value_iface_t *iface;
    avro_value_t value;
} schema_kit;

static void kit_open(schema_kit *k, const char *json)
{
    assert_int_equal(avro_schema_from_json_length(json, strlen(json), &k->schema), 0);
    k->iface = avro_generic_class_from_schema(k->schema);
    assert_non_null(k->iface);
    assert_int_equal(avro_generic_value_new(k->iface, &k->value), 0);
}

static void kit_close(schema_kit *k)
{
    avro_value_decref(&k->value);
    avro_value_iface_decref(k->iface);
    avro_schema_decref(k->schema);
}

/* Bare Avro body of the packet into buf; returns its length. */
static size_t bare(const char *schema_json, const pk *p, uint8_t *buf, size_t cap)
{
    schema_kit k;
    kit_open(&k, schema_json);
    fill(&k.value, p);
    avro_writer_t w = avro_writer_memory((const char *)buf, (int64_t)cap);
    assert_int_equal(avro_value_write(w, &k.value), 0);
    size_t n = (size_t)avro_writer_tell(w);
    avro_writer_free(w);
    kit_close(&k);
    return n;
}

/* Object container with n_records copies; returns its length, 0 when the
 * codec is not available. */
static size_t container(const char *schema_json, const pk *p, int n_records,
                        const char *codec, uint8_t *buf, size_t cap)
{
    schema_kit k;
    kit_open(&k, schema_json);
    fill(&k.value, p);
    FILE *fp = tmpfile();
    assert_non_null(fp);
    avro_file_writer_t w;
    if (avro_file_writer_create_with_codec_fp(fp, "test", 0, k.schema, &w,
                                              codec, 0) != 0) {
        fclose(fp);
        kit_close(&k);
        return 0;
    }
    for (int i = 0; i < n_records; i++)
        assert_int_equal(avro_file_writer_append_value(w, &k.value), 0);
    assert_int_equal(avro_file_writer_close(w), 0);
    rewind(fp);
    size_t n = fread(buf, 1, cap, fp);
    assert_true(n < cap);
    fclose(fp);
    kit_close(&k);
    return n;
}

/* ---- fixture --------------------------------------------------------- */

typedef struct fx {
    char dir[64];
    char bare_path[96];
    featmap *fm;
    decoder *d;
    packet_features pf;
    uint8_t buf[1 << 16];
} fx;

static void write_text(const char *path, const char *text)
{
    FILE *f = fopen(path, "w");
    assert_non_null(f);
    fputs(text, f);
    fclose(f);
}

static decoder *open_decoder(fx *f, int with_dir, int with_bare, size_t max_bytes)
{
    decoder_opts o = {0};
    o.schema_dir = with_dir ? f->dir : NULL;
    o.writer_schema_path = with_bare ? f->bare_path : NULL;
    o.max_message_bytes = max_bytes;
    o.fm = f->fm;
    char err[256] = "";
    decoder *d = decoder_new(&o, err, sizeof err);
    if (!d)
        print_error("decoder_new: %s\n", err);
    return d;
}

static int setup(void **state)
{
    fx *f = calloc(1, sizeof *f);
    snprintf(f->dir, sizeof f->dir, "/tmp/oddsky-decode-XXXXXX");
    if (!mkdtemp(f->dir))
        return -1;
    char path[128];
    snprintf(path, sizeof path, "%s/1.avsc", f->dir);
    write_text(path, SCHEMA_A);
    snprintf(path, sizeof path, "%s/2.avsc", f->dir);
    write_text(path, SCHEMA_B);
    snprintf(path, sizeof path, "%s/3.avsc", f->dir);
    write_text(path, "{not a schema");
    snprintf(f->bare_path, sizeof f->bare_path, "%s/1.avsc", f->dir);
    json_error_t je;
    json_t *spec = json_loads(SPEC, 0, &je);
    char err[256];
    f->fm = featmap_new(spec, err, sizeof err);
    json_decref(spec);
    if (!f->fm)
        return -1;
    f->d = open_decoder(f, 1, 1, 0);
    *state = f;
    return f->d ? 0 : -1;
}

static int teardown(void **state)
{
    fx *f = *state;
    decoder_free(f->d);
    featmap_free(f->fm);
    char path[128];
    for (int i = 1; i <= 3; i++) {
        snprintf(path, sizeof path, "%s/%d.avsc", f->dir, i);
        unlink(path);
    }
    rmdir(f->dir);
    free(f);
    return 0;
}

/* Expected features of the test packet, worked by hand from series.c's
 * definitions (amplitude = max - min, inverse-variance weighted mean). */
static void check_features(const packet_features *p, int64_t id)
{
    char want[32];
    snprintf(want, sizeof want, "%lld", (long long)id);
    assert_string_equal(p->packet_id, want);
    assert_string_equal(p->source_id, "src-7");
    assert_int_equal(p->time_from_packet, 1);
    assert_near(p->time_days, 60005.0, 0);
    assert_int_equal(p->dim, F_DIM);
    assert_int_equal(p->n_missing, 0);
    assert_near(p->x[F_MAG], 16.5, 0);
    assert_near(p->err[F_MAG], 0.1, 0);
    assert_near(p->x[F_RAMP], 17.9 - 16.5, 1e-12);
    assert_near(p->x[F_RMEAN], 10340.0 / 600.0, 1e-12);
    assert_near(p->x[F_ALLN], 6.0, 0);
    assert_near(p->x[F_GR], 18.4 - 17.0, 1e-12);
}

/* ---- framings -------------------------------------------------------- */

static void test_every_framing(void **state)
{
    fx *f = *state;
    pk p = {42, 16.5, 0, N_HIST};
    packet_features ref;

    /* 3. JSON */
    assert_reason(decoder_extract(f->d, PACKET_JSON, strlen(PACKET_JSON), &ref), 0);
    assert_string_equal(ref.framing, "json");
    check_features(&ref, 42);

    /* 4. bare Avro with the configured writer schema (A) */
    size_t n = bare(SCHEMA_A, &p, f->buf, sizeof f->buf);
    assert_reason(decoder_extract(f->d, f->buf, n, &f->pf), 0);
    assert_string_equal(f->pf.framing, "avro");
    check_features(&f->pf, 42);
    assert_memory_equal(f->pf.x, ref.x, F_DIM * sizeof ref.x[0]);

    /* 2. schema-id framing, schemas A (id 1) and B (id 2) */
    for (uint32_t id = 1; id <= 2; id++) {
        f->buf[0] = 0;
        f->buf[1] = f->buf[2] = f->buf[3] = 0;
        f->buf[4] = (uint8_t)id;
        n = bare(id == 1 ? SCHEMA_A : SCHEMA_B, &p, f->buf + 5, sizeof f->buf - 5);
        assert_reason(decoder_extract(f->d, f->buf, n + 5, &f->pf), 0);
        assert_string_equal(f->pf.framing, "schema_id");
        check_features(&f->pf, 42);
        /* the same features whatever the field order */
        assert_memory_equal(f->pf.x, ref.x, F_DIM * sizeof ref.x[0]);
        assert_memory_equal(f->pf.err, ref.err, F_DIM * sizeof ref.err[0]);
    }

    /* 1. object container, null codec, both schemas */
    for (int s = 0; s < 2; s++) {
        n = container(s ? SCHEMA_B : SCHEMA_A, &p, 1, "null", f->buf, sizeof f->buf);
        assert_true(n > 0);
        assert_reason(decoder_extract(f->d, f->buf, n, &f->pf), 0);
        assert_string_equal(f->pf.framing, "container");
        check_features(&f->pf, 42);
    }
    /* deflate container written by avro-c, inflated by the decoder with
     * zlib under the same guard as an uncompressed block */
    n = container(SCHEMA_B, &p, 1, "deflate", f->buf, sizeof f->buf);
    assert_true(n > 0);
    assert_reason(decoder_extract(f->d, f->buf, n, &f->pf), 0);
    check_features(&f->pf, 42);
    /* a block that is not a deflate stream is refused, not handed to
     * avro-c: overwrite the compressed bytes (between the block's length
     * varints and the trailing sync marker) with 0xff */
    for (size_t i = n - 16 - 8; i < n - 16; i++)
        f->buf[i] = 0xff;
    int rc = decoder_extract(f->d, f->buf, n, &f->pf);
    print_message("corrupted deflate block: %s\n", packet_reason_name(rc));
    assert_int_equal(rc, PACKET_E_BAD_CONTAINER);
}

static void test_schema_cache_compiles_once(void **state)
{
    fx *f = *state;
    pk p = {1, 16.5, 0, N_HIST};
    /* bare writer A is cached at decoder_new */
    assert_int_equal(decoder_schema_count(f->d), 1);
    for (int round = 0; round < 50; round++) {
        uint32_t id = 1 + (uint32_t)(round % 2);
        p.id = round;
        f->buf[0] = 0;
        f->buf[1] = f->buf[2] = f->buf[3] = 0;
        f->buf[4] = (uint8_t)id;
        size_t n = bare(id == 1 ? SCHEMA_A : SCHEMA_B, &p, f->buf + 5,
                        sizeof f->buf - 5);
        assert_reason(decoder_extract(f->d, f->buf, n + 5, &f->pf), 0);
        check_features(&f->pf, round);
        n = container(SCHEMA_B, &p, 1, "null", f->buf, sizeof f->buf);
        assert_reason(decoder_extract(f->d, f->buf, n, &f->pf), 0);
    }
    /* A (file 1.avsc = the bare writer text), B from 2.avsc, and B as
     * avro-c's container writer serialises it: three texts, no more. */
    assert_true(decoder_schema_count(f->d) <= 3);
    assert_true(decoder_schema_count(f->d) >= 2);
}

static void test_fingerprint(void **state)
{
    (void)state;
    /* source: fastavro.schema.fingerprint('"null"', "CRC-64-AVRO") =
     * 8a8f25cce724dd63, the spec's 8 bytes little-endian, i.e. the 64-bit
     * value 0x63dd24e7cc258f8a. */
    assert_true(decoder_fingerprint64("\"null\"", 6) == 0x63dd24e7cc258f8aULL);
    /* empty input: the EMPTY constant */
    assert_true(decoder_fingerprint64("", 0) == 0xc15d213aa4d7a795ULL);
}

/* ---- poison ---------------------------------------------------------- */

static void test_reason_names(void **state)
{
    (void)state;
    assert_string_equal(packet_reason_name(0), "ok");
    assert_string_equal(packet_reason_name(PACKET_E_BAD_JSON), "bad_json");
    assert_string_equal(packet_reason_name(PACKET_E_UNKNOWN_SCHEMA_ID),
                        "unknown_schema_id");
    assert_string_equal(packet_reason_name(-999), "unknown");
    assert_int_equal(packet_reason_index(PACKET_E_EMPTY), 0);
    assert_int_equal(packet_reason_index(PACKET_E_UNSUPPORTED_CODEC),
                     PACKET_REASON_COUNT - 1);
    for (int i = 1; i <= (int)PACKET_REASON_COUNT; i++)
        assert_true(strcmp(packet_reason_name(-i), "unknown") != 0);
}

static void test_simple_poison(void **state)
{
    fx *f = *state;
    assert_reason(decoder_extract(f->d, "", 0, &f->pf), PACKET_E_EMPTY);
    assert_reason(decoder_extract(f->d, "{", 1, &f->pf), PACKET_E_BAD_JSON);
    assert_reason(decoder_extract(f->d, "  {\"a\": }", 9, &f->pf), PACKET_E_BAD_JSON);
    assert_reason(decoder_extract(f->d, "{} trailing", 11, &f->pf), PACKET_E_BAD_JSON);
    /* 1e400 overflows a double: jansson refuses it */
    const char *huge = "{\"packet_id\": 1, \"source\": {\"id\": \"s\"}, \"obs\": {\"mag\": 1e400}}";
    assert_reason(decoder_extract(f->d, huge, strlen(huge), &f->pf), PACKET_E_BAD_JSON);
    const char *noid = "{\"source\": {\"id\": \"s\"}}";
    assert_reason(decoder_extract(f->d, noid, strlen(noid), &f->pf), PACKET_E_MISSING_ID);
    const char *nosrc = "{\"packet_id\": \"x\"}";
    assert_reason(decoder_extract(f->d, nosrc, strlen(nosrc), &f->pf),
                  PACKET_E_MISSING_SOURCE);

    /* unknown schema id: twice (the second from the remembered miss) */
    uint8_t msg[16] = {0, 0, 0, 0x30, 0x39, 2, 4};
    assert_reason(decoder_extract(f->d, msg, 7, &f->pf), PACKET_E_UNKNOWN_SCHEMA_ID);
    assert_reason(decoder_extract(f->d, msg, 7, &f->pf), PACKET_E_UNKNOWN_SCHEMA_ID);
    decoder_forget_unknown(f->d);
    assert_reason(decoder_extract(f->d, msg, 7, &f->pf), PACKET_E_UNKNOWN_SCHEMA_ID);
    /* a schema file that does not parse */
    uint8_t bad[8] = {0, 0, 0, 0, 3, 0};
    assert_reason(decoder_extract(f->d, bad, 6, &f->pf), PACKET_E_BAD_SCHEMA);
    /* schema-id framing shorter than its header */
    assert_reason(decoder_extract(f->d, bad, 3, &f->pf), PACKET_E_BAD_AVRO);

    /* too large */
    decoder *small = open_decoder(f, 0, 0, 64);
    assert_non_null(small);
    char big[100];
    memset(big, ' ', sizeof big);
    assert_reason(decoder_extract(small, big, sizeof big, &f->pf), PACKET_E_TOO_LARGE);
    /* without a bare writer: not JSON, not framed */
    assert_reason(decoder_extract(small, "hello", 5, &f->pf), PACKET_E_UNKNOWN_FRAMING);
    assert_reason(decoder_extract(small, " [1,2]", 6, &f->pf), PACKET_E_NOT_AN_OBJECT);
    decoder_free(small);
}

static void test_truncated_and_trailing_avro(void **state)
{
    fx *f = *state;
    pk p = {7, 16.5, 0, N_HIST};
    uint8_t msg[4096];
    size_t n = bare(SCHEMA_A, &p, msg, sizeof msg);
    /* every strict prefix is incomplete: bad_avro (or, for the prefixes
     * that happen to start like JSON/containers, never success) */
    for (size_t k = 1; k < n; k++) {
        int rc = decoder_extract(f->d, msg, k, &f->pf);
        if (rc >= 0)
            print_error("prefix %zu of %zu decoded\n", k, n);
        assert_true(rc < 0);
    }
    msg[n] = 0;
    assert_reason(decoder_extract(f->d, msg, n + 1, &f->pf), PACKET_E_BAD_AVRO);

    /* container: truncated, bad sync, two records */
    size_t c = container(SCHEMA_A, &p, 1, "null", f->buf, sizeof f->buf);
    for (size_t k = 4; k < c; k += 7)
        assert_true(decoder_extract(f->d, f->buf, k, &f->pf) < 0);
    f->buf[c - 1] ^= 0xff;
    assert_reason(decoder_extract(f->d, f->buf, c, &f->pf), PACKET_E_BAD_CONTAINER);
    c = container(SCHEMA_A, &p, 2, "null", f->buf, sizeof f->buf);
    assert_reason(decoder_extract(f->d, f->buf, c, &f->pf), PACKET_E_MULTI_RECORD);
    c = container(SCHEMA_A, &p, 0, "null", f->buf, sizeof f->buf);
    assert_reason(decoder_extract(f->d, f->buf, c, &f->pf), PACKET_E_MULTI_RECORD);
    const char hdr[] = "Obj\x01\x7f";
    assert_reason(decoder_extract(f->d, hdr, 5, &f->pf), PACKET_E_BAD_CONTAINER);
}

static void test_nan_and_huge_avro_values(void **state)
{
    fx *f = *state;
    pk p = {9, NAN, 0, N_HIST};
    size_t n = bare(SCHEMA_A, &p, f->buf, sizeof f->buf);
    assert_reason(decoder_extract(f->d, f->buf, n, &f->pf), 0);
    assert_int_equal(f->pf.missing[F_MAG], 1);
    assert_true(isnan(f->pf.x[F_MAG]));
    /* the NaN current point is dropped from the r amplitude */
    assert_near(f->pf.x[F_RAMP], 17.9 - 17.0, 1e-12);
    p.cur_mag = INFINITY;
    n = bare(SCHEMA_A, &p, f->buf, sizeof f->buf);
    assert_reason(decoder_extract(f->d, f->buf, n, &f->pf), 0);
    assert_int_equal(f->pf.missing[F_MAG], 1);
    p.cur_mag = 1e300;
    n = bare(SCHEMA_A, &p, f->buf, sizeof f->buf);
    assert_reason(decoder_extract(f->d, f->buf, n, &f->pf), 0);
    assert_near(f->pf.x[F_MAG], 1e300, 0);
    /* null current magnitude */
    p.cur_null = 1;
    n = bare(SCHEMA_A, &p, f->buf, sizeof f->buf);
    assert_reason(decoder_extract(f->d, f->buf, n, &f->pf), 0);
    assert_int_equal(f->pf.missing[F_MAG], 1);
    assert_int_equal(f->pf.n_missing, 1);
}

/* zigzag varint helper for hand-made poison */
static size_t put_long(uint8_t *b, int64_t v)
{
    uint64_t z = ((uint64_t)v << 1) ^ (uint64_t)(v >> 63);
    size_t n = 0;
    do {
        b[n] = z & 0x7f;
        z >>= 7;
        if (z)
            b[n] |= 0x80;
        n++;
    } while (z);
    return n;
}

static void test_guarded_lengths_and_counts(void **state)
{
    fx *f = *state;
    uint8_t m[64];
    size_t n = 0;
    /* schema A: packet_id long, then source.id string claiming 2^40 bytes */
    n += put_long(m + n, 5);
    n += put_long(m + n, (int64_t)1 << 40);
    memcpy(m + n, "abc", 3);
    n += 3;
    assert_reason(decoder_extract(f->d, m, n, &f->pf), PACKET_E_BAD_AVRO);
    /* negative string length */
    n = put_long(m, 5);
    n += put_long(m + n, -3);
    assert_reason(decoder_extract(f->d, m, n, &f->pf), PACKET_E_BAD_AVRO);
    /* a history array block claiming a million items */
    n = put_long(m, 5);
    n += put_long(m + n, 1);
    m[n++] = 's';
    n += put_long(m + n, 60005); /* not a double: 8 bytes follow */
    memset(m + n, 0, 8);
    n = put_long(m, 5);
    n += put_long(m + n, 1);
    m[n++] = 's';
    double t = 60005.0;
    memcpy(m + n, &t, 8);
    n += 8;
    n += put_long(m + n, 0); /* mag: null */
    n += put_long(m + n, 0); /* mag_err: null */
    n += put_long(m + n, 1);
    m[n++] = 'r';
    n += put_long(m + n, 1);       /* history: the array branch */
    n += put_long(m + n, 1000000); /* block count */
    assert_reason(decoder_extract(f->d, m, n, &f->pf), PACKET_E_TOO_MANY_ITEMS);
    /* a bad union index */
    m[n - 4] = 9; /* overwrite inside the tail with junk */
    assert_true(decoder_extract(f->d, m, n, &f->pf) < 0);
}

static void test_json_depth_size_and_million_items(void **state)
{
    fx *f = *state;
    char deep[512];
    size_t n = (size_t)snprintf(deep, sizeof deep, "{\"a\":");
    for (int i = 0; i < 100; i++)
        deep[n++] = '[';
    for (int i = 0; i < 100; i++)
        deep[n++] = ']';
    deep[n++] = '}';
    assert_reason(decoder_extract(f->d, deep, n, &f->pf), PACKET_E_JSON_TOO_DEEP);

    /* a million-element history */
    decoder *d = open_decoder(f, 0, 0, 8u << 20);
    assert_non_null(d);
    size_t cap = 3u << 20;
    char *big = malloc(cap);
    assert_non_null(big);
    n = (size_t)snprintf(big, cap, "{\"packet_id\": 1, \"history\": [0");
    for (int i = 1; i < 1000000; i++) {
        big[n++] = ',';
        big[n++] = '0';
    }
    n += (size_t)snprintf(big + n, cap - n, "]}");
    assert_reason(decoder_extract(d, big, n, &f->pf), PACKET_E_TOO_MANY_ITEMS);

    /* a 2 MB string id: parses, then refused as too long */
    n = (size_t)snprintf(big, cap, "{\"packet_id\": \"");
    memset(big + n, 'x', 2u << 20);
    n += 2u << 20;
    n += (size_t)snprintf(big + n, cap - n, "\", \"source\": {\"id\": \"s\"}}");
    assert_reason(decoder_extract(d, big, n, &f->pf), PACKET_E_ID_TOO_LONG);
    /* quotes and brackets inside strings do not count as nesting */
    const char *tricky = "{\"packet_id\": \"[[[[[[[[[[[[[[[[[[[[[[[[[[[[[[[[[[[[\\\"{{{{\","
                         " \"source\": {\"id\": \"s\"}}";
    assert_reason(decoder_extract(d, tricky, strlen(tricky), &f->pf), 0);
    free(big);
    decoder_free(d);
}

static void test_random_bytes_and_mutations(void **state)
{
    fx *f = *state;
    rng r;
    rng_seed(&r, 12345);
    uint8_t m[512];
    for (int i = 0; i < 3000; i++) {
        size_t n = 1 + (size_t)rng_below(&r, sizeof m - 1);
        for (size_t k = 0; k < n; k++)
            m[k] = (uint8_t)rng_next(&r);
        if (i % 3 == 0)
            m[0] = 0; /* schema-id framing with random ids 0..4 */
        if (i % 3 == 0)
            m[1] = m[2] = m[3] = 0, m[4] = (uint8_t)(m[4] % 4);
        int rc = decoder_extract(f->d, m, n, &f->pf);
        assert_true(rc <= 0);
        if (rc == 0)
            assert_true(f->pf.dim == F_DIM);
    }
    /* byte flips of a valid message: never a crash, reason or success */
    pk p = {77, 16.5, 0, N_HIST};
    uint8_t good[1024];
    size_t n = bare(SCHEMA_A, &p, good, sizeof good);
    for (int i = 0; i < 3000; i++) {
        memcpy(m, good, n);
        for (int k = 0; k < 3; k++)
            m[rng_below(&r, n)] ^= (uint8_t)(1u << rng_below(&r, 8));
        int rc = decoder_extract(f->d, m, n, &f->pf);
        assert_true(rc <= 0);
        if (rc < 0)
            assert_true(packet_reason_index(rc) >= 0);
    }
}

/* The demo simulator's packets (daemon/sim, its own hand-written Avro and
 * JSON encoders) through all four framings with config/demo-featmap.json:
 * every message decodes, and the four framings give bit-identical
 * features; a few features are checked against the packet struct. */
static void test_demo_packets_every_framing(void **state)
{
    (void)state;
    const char *top = getenv("ODDSKY_TOP");
    char path[512], dir[64];
    snprintf(path, sizeof path, "%s/config/demo-featmap.json", top ? top : ".");
    json_error_t je;
    json_t *spec = json_load_file(path, 0, &je);
    if (!spec)
        print_error("%s: %s\n", path, je.text);
    assert_non_null(spec);
    char err[256] = "";
    featmap *fm = featmap_new(spec, err, sizeof err);
    json_decref(spec);
    if (!fm)
        print_error("featmap_new: %s\n", err);
    assert_non_null(fm);
    snprintf(dir, sizeof dir, "/tmp/oddsky-demo-XXXXXX");
    assert_non_null(mkdtemp(dir));
    char avsc[128];
    snprintf(avsc, sizeof avsc, "%s/7.avsc", dir);
    write_text(avsc, sim_schema_json());
    decoder_opts o = {.schema_dir = dir, .writer_schema_path = avsc, .fm = fm};
    decoder *d = decoder_new(&o, err, sizeof err);
    if (!d)
        print_error("decoder_new: %s\n", err);
    assert_non_null(d);

    sim_params sp;
    sim_params_default(&sp);
    sp.n_fields = 20;
    sp.burst = 10;
    sim *sm = sim_new(&sp, err, sizeof err);
    assert_non_null(sm);
    static uint8_t buf[4][1 << 16];
    size_t len[4];
    uint8_t sync[16];
    sim_sync_marker(1, sync);
    packet_features pf[4];
    uint32_t dim = featmap_dim(fm);
    int j_mag = -1, j_lim = -1, j_span = -1, j_abs = -1, j_sep = -1;
    for (uint32_t j = 0; j < dim; j++) {
        if (!strcmp(featmap_name(fm, j), "mag"))
            j_mag = (int)j;
        if (!strcmp(featmap_name(fm, j), "since_limit_days"))
            j_lim = (int)j;
        if (!strcmp(featmap_name(fm, j), "span_days"))
            j_span = (int)j;
        if (!strcmp(featmap_name(fm, j), "abs_mag"))
            j_abs = (int)j;
        if (!strcmp(featmap_name(fm, j), "host_sep_log"))
            j_sep = (int)j;
    }
    assert_true(j_mag >= 0 && j_lim >= 0 && j_span >= 0 && j_abs >= 0 && j_sep >= 0);
    unsigned seen[MODEL_MAX_DIM] = {0};
    unsigned hostless = 0;
    for (int i = 0; i < 3000; i++) {
        sim_packet p;
        assert_int_equal(sim_next(sm, &p), 0);
        int r0 = sim_encode_json(&p, (char *)buf[0], sizeof buf[0]);
        int r1 = sim_encode_avro(&p, buf[1], sizeof buf[1]);
        int r2 = sim_encode_schema_id(&p, 7, buf[2], sizeof buf[2]);
        int r3 = sim_encode_container(&p, sync, buf[3], sizeof buf[3]);
        assert_true(r0 > 0 && r1 > 0 && r2 > 0 && r3 > 0);
        len[0] = (size_t)r0;
        len[1] = (size_t)r1;
        len[2] = (size_t)r2;
        len[3] = (size_t)r3;
        for (int k = 0; k < 4; k++) {
            assert_reason(decoder_extract(d, buf[k], len[k], &pf[k]), 0);
            if (k) {
                assert_memory_equal(pf[k].missing, pf[0].missing, dim);
                for (uint32_t j = 0; j < dim; j++)
                    if (!pf[0].missing[j] &&
                        memcmp(&pf[k].x[j], &pf[0].x[j], sizeof(double))) {
                        print_error("packet %d framing %s feature %s: %.17g vs "
                                    "json %.17g\n", i, pf[k].framing,
                                    featmap_name(fm, j), pf[k].x[j], pf[0].x[j]);
                        fail();
                    }
            }
        }
        /* against the generator's own struct */
        assert_near(pf[0].x[j_mag], p.mag, 0);
        /* since_limit_days = obs.mjd minus prior_limit.mjd, missing when
         * the packet has no prior limit (null) */
        assert_int_equal(pf[0].missing[j_lim], !p.has_limit);
        if (p.has_limit)
            assert_near(pf[0].x[j_lim], p.mjd - p.limit_mjd, 0);
        /* abs_mag = obs.mag minus host.dist_mod, missing without a host */
        assert_int_equal(pf[0].missing[j_abs], !p.has_host);
        if (p.has_host)
            assert_near(pf[0].x[j_abs], p.mag - p.host_dist_mod, 0);
        /* host_sep_log = log10(host.sep_arcsec), missing without a host */
        assert_int_equal(pf[0].missing[j_sep], !p.has_host);
        if (p.has_host)
            assert_near(pf[0].x[j_sep], log10(p.host_sep_arcsec), 0);
        hostless += !p.has_host;
        /* span_days needs 3 points (min_points), the current one included */
        double lo = p.mjd, hi = p.mjd;
        for (unsigned h = 0; h < p.n_hist; h++) {
            lo = fmin(lo, p.hist[h].mjd);
            hi = fmax(hi, p.hist[h].mjd);
        }
        assert_int_equal(pf[0].missing[j_span], p.n_hist + 1 < 3);
        if (p.n_hist + 1 >= 3)
            assert_near(pf[0].x[j_span], hi - lo, 0);
        char id[32];
        snprintf(id, sizeof id, "%lld", (long long)p.packet_id);
        assert_string_equal(pf[3].packet_id, id);
        for (uint32_t j = 0; j < dim; j++)
            seen[j] += !pf[0].missing[j];
    }
    /* every feature of the demo map is present in some packets */
    for (uint32_t j = 0; j < dim; j++) {
        if (!seen[j])
            print_error("feature %s never present\n", featmap_name(fm, j));
        assert_true(seen[j] > 0);
    }
    /* ... and the host features are missing in some (host null) */
    assert_true(hostless > 0);
    sim_free(sm);
    decoder_free(d);
    featmap_free(fm);
    unlink(avsc);
    rmdir(dir);
}

static void test_schema_cache_full(void **state)
{
    fx *f = *state;
    pk p = {3, 16.5, 0, 1};
    /* distinct writer schema texts (namespace varies) until the cache is
     * full: the next new one is refused with its own reason, cached ones
     * still decode */
    static char text[4096];
    int full_at = -1;
    for (int i = 0; i < (int)DECODER_MAX_SCHEMAS + 2; i++) {
        snprintf(text, sizeof text, "%s", SCHEMA_A);
        char *ns = strstr(text, "\"demo\"");
        assert_non_null(ns);
        char tail[4096];
        snprintf(tail, sizeof tail, "%s", ns + 6);
        snprintf(ns, sizeof text - (size_t)(ns - text), "\"demo%d\"%s", i, tail);
        size_t n = container(text, &p, 1, "null", f->buf, sizeof f->buf);
        int rc = decoder_extract(f->d, f->buf, n, &f->pf);
        if (rc == PACKET_E_SCHEMA_CACHE_FULL) {
            full_at = i;
            break;
        }
        assert_reason(rc, 0);
    }
    assert_int_equal(decoder_schema_count(f->d), DECODER_MAX_SCHEMAS);
    assert_true(full_at > 0);
    size_t n = bare(SCHEMA_A, &p, f->buf, sizeof f->buf);
    assert_reason(decoder_extract(f->d, f->buf, n, &f->pf), 0);
}

int main(void)
{
    const struct CMUnitTest tests[] = {
        cmocka_unit_test(test_reason_names),
        cmocka_unit_test(test_fingerprint),
        cmocka_unit_test_setup_teardown(test_every_framing, setup, teardown),
        cmocka_unit_test_setup_teardown(test_schema_cache_compiles_once, setup,
                                        teardown),
        cmocka_unit_test_setup_teardown(test_simple_poison, setup, teardown),
        cmocka_unit_test_setup_teardown(test_truncated_and_trailing_avro, setup,
                                        teardown),
        cmocka_unit_test_setup_teardown(test_nan_and_huge_avro_values, setup,
                                        teardown),
        cmocka_unit_test_setup_teardown(test_guarded_lengths_and_counts, setup,
                                        teardown),
        cmocka_unit_test_setup_teardown(test_json_depth_size_and_million_items,
                                        setup, teardown),
        cmocka_unit_test_setup_teardown(test_random_bytes_and_mutations, setup,
                                        teardown),
        cmocka_unit_test(test_demo_packets_every_framing),
        cmocka_unit_test_setup_teardown(test_schema_cache_full, setup, teardown),
    };
    return cmocka_run_group_tests(tests, NULL, NULL);
}
