/*
 * test_log.c - level gating, line formats, context fields, rate limiting.
 *
 * Lines are captured through the sink's write hook and the clock is a
 * fake, so nothing here depends on wall-clock time.  The expected
 * timestamp of 1700000000123 ms is from Python's
 * datetime.fromtimestamp(1700000000.123, timezone.utc) =
 * 2023-11-14T22:13:20.123 (source: CPython datetime).  JSON lines are
 * checked by parsing them with jansson (source: RFC 8259 via jansson).
 */
#include <setjmp.h>
#include <stdarg.h>
#include <stddef.h>
#include <stdint.h>
#include <stdio.h>
#include <stdlib.h>
#include <string.h>

#include <cmocka.h>
#include <jansson.h>

#include "daemon/log.h"

typedef struct capture {
    char lines[64][LOG_LINE_MAX];
    size_t n;
    uint64_t now_ms;
    log_sink sink;
    log_ctx root;
} capture;

static void cap_write(void *arg, const char *line, size_t len)
{
    capture *c = arg;
    if (c->n < 64) {
        memcpy(c->lines[c->n], line, len);
        c->lines[c->n][len] = '\0';
    }
    c->n++;
}

static uint64_t cap_clock(void *arg)
{
    return ((capture *)arg)->now_ms;
}

static int setup(void **state)
{
    capture *c = calloc(1, sizeof *c);
    if (c == NULL || log_sink_init(&c->sink) != 0)
        return -1;
    c->sink.write = cap_write;
    c->sink.write_arg = c;
    c->sink.clock = cap_clock;
    c->sink.clock_arg = c;
    c->now_ms = 1700000000123ull;
    log_ctx_init(&c->root, &c->sink, "bus");
    *state = c;
    return 0;
}

static int teardown(void **state)
{
    capture *c = *state;
    log_sink_destroy(&c->sink);
    free(c);
    return 0;
}

static int side_effects;

static int expensive(void)
{
    side_effects++;
    return 42;
}

static void test_level_gating_skips_arguments(void **state)
{
    capture *c = *state;
    side_effects = 0;
    log_sink_set_level(&c->sink, LOG_LEVEL_INFO);
    log_debug(&c->root, "value %d", expensive());
    log_debug_kv(&c->root, LOG_KV(LOG_INT("x", expensive())), "kv %d", expensive());
    assert_int_equal(side_effects, 0);
    assert_int_equal(c->n, 0);

    log_info(&c->root, "value %d", expensive());
    assert_int_equal(side_effects, 1);
    assert_int_equal(c->n, 1);

    log_sink_set_level(&c->sink, LOG_LEVEL_ERROR);
    log_warn(&c->root, "value %d", expensive());
    log_info(&c->root, "value %d", expensive());
    assert_int_equal(side_effects, 1);
    log_error(&c->root, "value %d", expensive());
    assert_int_equal(side_effects, 2);
    assert_int_equal(c->n, 2);

    log_sink_set_level(&c->sink, LOG_LEVEL_DEBUG);
    log_debug_kv(&c->root, LOG_KV(LOG_INT("x", expensive())), "kv %d", expensive());
    assert_int_equal(side_effects, 4);
    assert_int_equal(c->n, 3);
}

static void test_text_line(void **state)
{
    capture *c = *state;
    log_ctx part;
    log_ctx_child(&part, &c->root, NULL,
                  (log_field[]){LOG_STR("topic", "alerts"), LOG_INT("partition", 3)}, 2);
    log_warn_kv(&part, LOG_KV(LOG_UINT("offset", 12345), LOG_STR("why", "bad magic"),
                              LOG_DBL("ratio", 0.25)),
                "decode failed after %d bytes", 17);
    assert_int_equal(c->n, 1);
    assert_string_equal(c->lines[0],
                        "2023-11-14T22:13:20.123Z WARN  bus: decode failed after 17 bytes"
                        " topic=alerts partition=3 offset=12345 why=\"bad magic\" ratio=0.25\n");

    /* A message with a newline stays one physical line; an empty value is
     * quoted so the key=value pairs still split. */
    log_info_kv(&c->root, LOG_KV(LOG_STR("v", "")), "two\nlines");
    assert_string_equal(c->lines[1], "2023-11-14T22:13:20.123Z INFO  bus: two\\nlines v=\"\"\n");
}

static void test_json_line(void **state)
{
    capture *c = *state;
    log_ctx part, inner;
    json_t *j;
    json_error_t jerr;
    log_sink_set_format(&c->sink, LOG_FORMAT_JSON);
    log_ctx_child(&part, &c->root, NULL, (log_field[]){LOG_INT("partition", 3)}, 1);
    log_ctx_child(&inner, &part, "decode", (log_field[]){LOG_INT("offset", -1)}, 1);
    log_error_kv(&inner, LOG_KV(LOG_STR("reason", "quote \" and \\ and \t"), LOG_DBL("nan", 0.0 / 0.0)),
                 "bad packet %s", "x\"y");
    assert_int_equal(c->n, 1);
    j = json_loads(c->lines[0], 0, &jerr);
    if (j == NULL)
        fail_msg("not JSON: %s (%s)", c->lines[0], jerr.text);
    assert_string_equal(json_string_value(json_object_get(j, "ts")), "2023-11-14T22:13:20.123Z");
    assert_string_equal(json_string_value(json_object_get(j, "level")), "error");
    assert_string_equal(json_string_value(json_object_get(j, "component")), "decode");
    assert_string_equal(json_string_value(json_object_get(j, "msg")), "bad packet x\"y");
    assert_int_equal(json_integer_value(json_object_get(j, "partition")), 3);
    assert_int_equal(json_integer_value(json_object_get(j, "offset")), -1);
    assert_string_equal(json_string_value(json_object_get(j, "reason")), "quote \" and \\ and \t");
    assert_true(json_is_null(json_object_get(j, "nan")));
    json_decref(j);
    /* Parent fields come before the child's. */
    assert_true(strstr(c->lines[0], "\"partition\"") < strstr(c->lines[0], "\"offset\""));
}

static void test_long_line_truncated_but_valid(void **state)
{
    capture *c = *state;
    char big[5000];
    json_t *j;
    memset(big, 'a', sizeof big - 1);
    big[sizeof big - 1] = '\0';
    log_info(&c->root, "%s", big);
    assert_int_equal(c->n, 1);
    assert_true(strlen(c->lines[0]) < LOG_LINE_MAX);
    assert_int_equal(c->lines[0][strlen(c->lines[0]) - 1], '\n');

    log_sink_set_format(&c->sink, LOG_FORMAT_JSON);
    /* Quotes double in size when escaped: the line overflows and must
     * still be one valid JSON object. */
    memset(big, '"', 1000);
    big[1000] = '\0';
    log_info_kv(&c->root, LOG_KV(LOG_STR("f", big)), "%s", big);
    assert_int_equal(c->n, 2);
    j = json_loads(c->lines[1], 0, NULL);
    assert_non_null(j);
    assert_true(json_is_true(json_object_get(j, "truncated")));
    json_decref(j);
}

static void test_rate_limit(void **state)
{
    capture *c = *state;
    c->sink.limit_burst = 3;
    c->sink.limit_interval_ms = 1000;
    for (int i = 0; i < 10; i++)
        log_error(&c->root, "broker down %d", i);
    assert_int_equal(c->n, 3); /* burst of 3, 7 counted */
    /* Another call site is limited separately, info never. */
    log_error(&c->root, "other problem");
    for (int i = 0; i < 5; i++)
        log_info(&c->root, "progress %d", i);
    assert_int_equal(c->n, 3 + 1 + 5);

    /* Still inside the window: dropped. */
    c->now_ms += 999;
    log_error(&c->root, "broker down %d", 10);
    assert_int_equal(c->n, 9);

    /* Next window: the count of the 8 dropped lines comes first. */
    c->now_ms += 1;
    log_error(&c->root, "broker down %d", 11);
    assert_int_equal(c->n, 11);
    assert_non_null(strstr(c->lines[9], "suppressed 8 similar messages"));
    assert_non_null(strstr(c->lines[9], "broker down %d"));
    assert_non_null(strstr(c->lines[9], " ERROR "));
    assert_non_null(strstr(c->lines[10], "broker down 11"));

    /* A burst followed by silence is reported by the periodic flush once
     * its window has ended, not before. */
    for (int i = 0; i < 5; i++)
        log_warn(&c->root, "slow delivery");
    assert_int_equal(c->n, 14);
    assert_int_equal(log_sink_flush_suppressed(&c->sink), 0);
    c->now_ms += 1000;
    assert_int_equal(log_sink_flush_suppressed(&c->sink), 1);
    assert_int_equal(c->n, 15);
    assert_non_null(strstr(c->lines[14], "suppressed 2 similar messages"));
    assert_non_null(strstr(c->lines[14], "suppressed=2"));
    assert_int_equal(log_sink_flush_suppressed(&c->sink), 0);
}

/* Lines relayed through one "%s" call site (librdkafka's, in the bus)
 * are limited per key text, digits folded. */
static void test_rate_limit_keyed(void **state)
{
    capture *c = *state;
    char key[160], msg[128];
    c->sink.limit_burst = 3;
    c->sink.limit_interval_ms = 1000;

    /* One message repeated with changing numbers is one flood. */
    for (int i = 0; i < 10; i++) {
        snprintf(msg, sizeof msg, "Connect to 127.0.0.1:%d failed (after %dms)",
                 40000 + i, i * 7);
        snprintf(key, sizeof key, "FAIL %s", msg);
        log_at_keyed_kv(&c->root, LOG_LEVEL_ERROR, key,
                        LOG_KV(LOG_STR("kafka", "FAIL")), "%s", msg);
    }
    assert_int_equal(c->n, 3);

    /* Distinct messages through the same format keep their own limit. */
    const char *other[] = {"Coordinator load in progress", "Request timed out",
                           "Broker transport failure", "Metadata request failed",
                           "Offset commit failed"};
    for (int i = 0; i < 5; i++) {
        snprintf(key, sizeof key, "FAIL %s", other[i]);
        log_at_keyed_kv(&c->root, LOG_LEVEL_ERROR, key,
                        LOG_KV(LOG_STR("kafka", "FAIL")), "%s", other[i]);
    }
    assert_int_equal(c->n, 8);
    assert_non_null(strstr(c->lines[7], "Offset commit failed"));
    /* The same text from another facility is another key. */
    log_at_keyed_kv(&c->root, LOG_LEVEL_ERROR, "GETPID Request timed out",
                    LOG_KV(LOG_STR("kafka", "GETPID")), "%s", "Request timed out");
    assert_int_equal(c->n, 9);
    /* A format-string key is apart from a text key. */
    log_error(&c->root, "%s", "Request timed out");
    assert_int_equal(c->n, 10);

    /* The flood's count comes with its first text. */
    c->now_ms += 1000;
    assert_int_equal(log_sink_flush_suppressed(&c->sink), 1);
    assert_int_equal(c->n, 11);
    assert_non_null(strstr(c->lines[10], "suppressed 7 similar messages"));
    assert_non_null(strstr(c->lines[10], "FAIL Connect to 127.0.0.1:40000 failed (after 0ms)"));

    /* A NULL key keys by the format, as log_emit does. */
    for (int i = 0; i < 5; i++)
        log_emit_keyed(&c->root, LOG_LEVEL_WARN, NULL, NULL, 0, "slow %d", i);
    assert_int_equal(c->n, 14);
}

/* A key longer than the slot keeps its limit; the suppressed line shows
 * its beginning. */
static void test_rate_limit_long_key(void **state)
{
    capture *c = *state;
    char key[600];
    c->sink.limit_burst = 1;
    c->sink.limit_interval_ms = 1000;
    memset(key, 'k', sizeof key - 1);
    key[sizeof key - 1] = '\0';
    for (int i = 0; i < 4; i++)
        log_at_keyed_kv(&c->root, LOG_LEVEL_WARN, key, NULL, 0, "%s", "long");
    assert_int_equal(c->n, 1);
    c->now_ms += 1000;
    assert_int_equal(log_sink_flush_suppressed(&c->sink), 1);
    assert_non_null(strstr(c->lines[1], "suppressed 3 similar messages"));
    assert_non_null(strstr(c->lines[1], "(like \"kkkk"));
}

static void test_limit_off(void **state)
{
    capture *c = *state;
    c->sink.limit_interval_ms = 0;
    for (int i = 0; i < 40; i++)
        log_error(&c->root, "same");
    assert_int_equal(c->n, 40);
}

static void test_level_names(void **state)
{
    (void)state;
    log_level l;
    assert_int_equal(log_level_parse("warn", &l), 0);
    assert_int_equal(l, LOG_LEVEL_WARN);
    assert_int_equal(log_level_parse("debug", &l), 0);
    assert_int_equal(l, LOG_LEVEL_DEBUG);
    assert_int_equal(log_level_parse("verbose", &l), -1);
    assert_string_equal(log_level_name(LOG_LEVEL_ERROR), "error");
    assert_string_equal(log_level_name(LOG_LEVEL_INFO), "info");
    assert_non_null(log_default());
    assert_string_equal(log_default()->component, "oddsky");
}

int main(void)
{
    const struct CMUnitTest tests[] = {
        cmocka_unit_test_setup_teardown(test_level_gating_skips_arguments, setup, teardown),
        cmocka_unit_test_setup_teardown(test_text_line, setup, teardown),
        cmocka_unit_test_setup_teardown(test_json_line, setup, teardown),
        cmocka_unit_test_setup_teardown(test_long_line_truncated_but_valid, setup, teardown),
        cmocka_unit_test_setup_teardown(test_rate_limit, setup, teardown),
        cmocka_unit_test_setup_teardown(test_rate_limit_keyed, setup, teardown),
        cmocka_unit_test_setup_teardown(test_rate_limit_long_key, setup, teardown),
        cmocka_unit_test_setup_teardown(test_limit_off, setup, teardown),
        cmocka_unit_test(test_level_names),
    };
    return cmocka_run_group_tests(tests, NULL, NULL);
}
