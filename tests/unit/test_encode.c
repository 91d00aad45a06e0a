/*
 * test_encode.c - the output record's JSON text and Avro bytes on fixed
 * cases.  JSON is checked by parsing it back with jansson (RFC 8259
 * parser); Avro bytes are worked by hand from the Avro specification's
 * binary encoding.  The randomised comparison against fastavro lives in
 * tests/reference/test_encode_ref.py.
 */
#include <setjmp.h>
#include <stdarg.h>
#include <stddef.h>
#include <stdint.h>
#include <cmocka.h>

#include <jansson.h>
#include <math.h>
#include <stdlib.h>
#include <string.h>

#include "daemon/encode.h"

static const char *const NAMES[] = {"mag", "g_r", "amp"};

static void base(model_result *m, encode_record *r)
{
    memset(m, 0, sizeof *m);
    memset(r, 0, sizeof *r);
    m->warm = 1;
    m->cluster = 3;
    m->distance = 2.5;
    m->cluster_weight = 100.25;
    m->novelty = NAN;
    m->space_novelty = INFINITY;
    m->tail_prob = 0.001;
    m->flag = 1;
    m->n_drivers = 2;
    m->drivers[0].feature = 2;
    m->drivers[0].z = -4.5;
    m->drivers[1].feature = 0;
    m->drivers[1].z = 0.1;
    m->seq = 77;
    r->packet_id = "p\"1\\\n\x01\xff";
    r->source_id = "src";
    r->event_time_days = 60000.5;
    r->time_from_packet = 1;
    r->res = m;
    r->feature_names = NAMES;
    r->dim = 3;
    r->topic = "in";
    r->partition = 2;
    r->offset = 12345678901LL;
}

static void test_json(void **state)
{
    (void)state;
    model_result m;
    encode_record r;
    base(&m, &r);
    static const uint8_t miss[3] = {0, 1, 0};
    r.missing = miss;
    char buf[1024];
    size_t len = 0;
    assert_int_equal(encode_json(&r, buf, sizeof buf, &len), 0);
    assert_int_equal(strlen(buf), len);
    json_error_t e;
    json_t *j = json_loadb(buf, len, 0, &e);
    if (!j)
        print_error("%s\n%s\n", e.text, buf);
    assert_non_null(j);
    /* invalid UTF-8 (0xff) becomes U+FFFD */
    assert_string_equal(json_string_value(json_object_get(j, "packet_id")),
                        "p\"1\\\n\x01\xef\xbf\xbd");
    assert_true(json_is_null(json_object_get(j, "novelty")));
    assert_true(json_is_null(json_object_get(j, "space_novelty")));
    assert_int_equal(json_integer_value(json_object_get(j, "cluster")), 3);
    assert_true(json_number_value(json_object_get(j, "tail_prob")) == 0.001);
    assert_string_equal(json_string_value(json_object_get(j, "time_source")), "packet");
    json_t *d = json_object_get(j, "drivers");
    assert_int_equal(json_array_size(d), 2);
    assert_string_equal(json_string_value(json_object_get(json_array_get(d, 0), "feature")), "amp");
    json_t *ms = json_object_get(j, "missing");
    assert_int_equal(json_array_size(ms), 1);
    assert_string_equal(json_string_value(json_array_get(ms, 0)), "g_r");
    assert_int_equal(json_integer_value(json_object_get(json_object_get(j, "input"), "offset")),
                     12345678901LL);
    assert_null(json_object_get(j, "label"));
    json_decref(j);

    /* exact text of the tail, and short buffers */
    assert_non_null(strstr(buf, "\"warm\":true,\"model_seq\":77,"
                                "\"input\":{\"topic\":\"in\",\"partition\":2,"
                                "\"offset\":12345678901}}"));
    size_t need = 0;
    assert_int_equal(encode_json(&r, buf, 10, &need), ENCODE_ESHORT);
    assert_int_equal(need, len);
    r.label = "known";
    m.cluster = -1;
    assert_int_equal(encode_json(&r, buf, sizeof buf, &len), 0);
    assert_non_null(strstr(buf, "\"cluster\":null"));
    assert_non_null(strstr(buf, ",\"label\":\"known\"}"));
    m.drivers[0].feature = 3; /* out of range */
    assert_int_equal(encode_json(&r, buf, sizeof buf, &len), ENCODE_EINVAL);
}

static void test_doubles(void **state)
{
    (void)state;
    char b[32];
    encode_double(0.1, b);
    assert_string_equal(b, "0.1"); /* shortest round-trip */
    encode_double(1.0 / 3.0, b);
    assert_true(strtod(b, NULL) == 1.0 / 3.0);
    encode_double(-0.0, b);
    assert_string_equal(b, "-0");
    encode_double(NAN, b);
    assert_string_equal(b, "null");
    encode_double(5e-324, b);
    assert_true(strtod(b, NULL) == 5e-324);
}

static void test_avro_bytes(void **state)
{
    (void)state;
    model_result m;
    encode_record r;
    base(&m, &r);
    r.packet_id = "a";
    r.source_id = "";
    m.n_drivers = 0;
    m.cluster = -1;
    m.distance = m.cluster_weight = m.tail_prob = NAN;
    m.flag = 0;
    m.warm = 0;
    m.seq = 1;
    r.time_from_packet = 0;
    r.topic = "t";
    r.partition = -1;
    r.offset = 64;
    uint8_t buf[128];
    size_t len = 0;
    assert_int_equal(encode_avro(&r, buf, sizeof buf, &len), 0);
    /* Avro spec: string = zigzag length + bytes; double = 8 bytes LE;
     * enum/union index = zigzag int; empty array = 0; boolean = 1 byte */
    uint8_t want[64];
    size_t n = 0;
    want[n++] = 2; want[n++] = 'a';        /* packet_id */
    want[n++] = 0;                         /* source_id "" */
    double t = 60000.5;
    memcpy(want + n, &t, 8); n += 8;       /* event_time (little-endian host) */
    want[n++] = 2;                         /* time_source: kafka (1) */
    for (int i = 0; i < 6; i++)
        want[n++] = 0;                     /* cluster..tail_prob: null */
    want[n++] = 0;                         /* flag */
    want[n++] = 0;                         /* drivers: [] */
    want[n++] = 0;                         /* missing: [] */
    want[n++] = 0;                         /* warm */
    want[n++] = 2;                         /* model_seq 1 */
    want[n++] = 2; want[n++] = 't';        /* topic */
    want[n++] = 1;                         /* partition -1 */
    want[n++] = 0x80; want[n++] = 0x01;    /* offset 64 -> zigzag 128 */
    want[n++] = 0;                         /* label: null */
    assert_int_equal(len, n);
    assert_memory_equal(buf, want, n);
    size_t need = 0;
    assert_int_equal(encode_avro(&r, buf, 5, &need), ENCODE_ESHORT);
    assert_int_equal(need, n);
}

int main(void)
{
    const struct CMUnitTest tests[] = {
        cmocka_unit_test(test_json),
        cmocka_unit_test(test_doubles),
        cmocka_unit_test(test_avro_bytes),
    };
    return cmocka_run_group_tests(tests, NULL, NULL);
}
