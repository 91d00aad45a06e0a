/*
 * test_metrics.c - the metric registry, its Prometheus text and history.
 *
 * Text format facts checked here come from the Prometheus "Exposition
 * formats" documentation, text format 0.0.4 (source: prometheus.io/docs/
 * instrumenting/exposition_formats): one HELP and one TYPE line per metric
 * name, TYPE before the first sample; HELP escapes backslash and newline;
 * label values escape backslash, double quote and newline; histograms have
 * cumulative _bucket{le=...} lines ending in le="+Inf" equal to _count, then
 * _sum and _count; every line ends in \n.  promtool checks the rendered
 * text of a whole registry in tests/web/run.sh.
 */
#include <math.h>
#include <setjmp.h>
#include <stdarg.h>
#include <stddef.h>
#include <stdint.h>
#include <stdio.h>
#include <string.h>

#include <cmocka.h>

#include "daemon/metrics.h"

/* cmocka 1.1 has no double assertion: print both values on failure. */
#define assert_near(a, b, eps)                                              \
    do {                                                                    \
        double a_ = (a), b_ = (b);                                          \
        if (!(fabs(a_ - b_) <= (eps)))                                      \
            fail_msg("%s = %.17g, expected %.17g (tolerance %g)", #a, a_,   \
                     b_, (double)(eps));                                    \
    } while (0)

/* Number of lines of text equal to line. */
static int count_line(const char *text, const char *line)
{
    int n = 0;
    size_t len = strlen(line);
    for (const char *p = text; p && *p;) {
        const char *e = strchr(p, '\n');
        size_t l = e ? (size_t)(e - p) : strlen(p);
        if (l == len && memcmp(p, line, len) == 0)
            n++;
        p = e ? e + 1 : NULL;
    }
    return n;
}

/* Number of lines starting with prefix. */
static int count_prefix(const char *text, const char *prefix)
{
    int n = 0;
    size_t len = strlen(prefix);
    for (const char *p = text; p && *p;) {
        if (strncmp(p, prefix, len) == 0)
            n++;
        const char *e = strchr(p, '\n');
        p = e ? e + 1 : NULL;
    }
    return n;
}

static void expect_line(const char *text, const char *line)
{
    if (count_line(text, line) != 1)
        fail_msg("expected exactly one line \"%s\" in:\n%s", line, text);
}

static void test_counter_labels_and_escaping(void **state)
{
    (void)state;
    metrics_registry *r = metrics_new(NULL);
    assert_non_null(r);
    static const char *const reasons[] = {"decode", "a\\b\"c\nd", NULL};
    metrics_spec s = {.name = "dead_letters_total",
                      .help = "Packets sent to the dead-letter topic, by reason",
                      .kind = METRICS_COUNTER,
                      .label = "reason",
                      .values = reasons,
                      .n_values = 3};
    char err[128] = "";
    metrics_family *f = metrics_register(r, &s, err, sizeof err);
    assert_non_null(f);
    assert_int_equal(metrics_series(f), 3);
    metrics_add(metrics_counter_at(f, 0), 41);
    metrics_inc(metrics_counter_at(f, 0));
    metrics_inc(metrics_counter_at(f, 1));
    metrics_inc(metrics_counter_at(f, 2));
    assert_null(metrics_gauge_at(f, 0)); /* wrong kind */
    assert_null(metrics_counter_at(f, 3));

    metrics_buf b;
    metrics_buf_init(&b);
    assert_int_equal(metrics_render(r, &b), 0);
    const char *t = b.data;
    expect_line(t, "# HELP oddsky_dead_letters_total Packets sent to the "
                   "dead-letter topic, by reason");
    expect_line(t, "# TYPE oddsky_dead_letters_total counter");
    assert_int_equal(count_prefix(t, "# HELP "), 1);
    assert_int_equal(count_prefix(t, "# TYPE "), 1);
    expect_line(t, "oddsky_dead_letters_total{reason=\"decode\"} 42");
    /* source: exposition formats doc, label_value escaping of \ " \n */
    expect_line(t, "oddsky_dead_letters_total{reason=\"a\\\\b\\\"c\\nd\"} 1");
    /* The unnamed third series is not shown until it has a value name. */
    assert_int_equal(count_prefix(t, "oddsky_dead_letters_total"), 2);
    assert_int_equal(t[b.len - 1], '\n');
    /* TYPE comes before the first sample. */
    assert_true(strstr(t, "# TYPE") < strstr(t, "oddsky_dead_letters_total{"));

    assert_int_equal(metrics_label_set(f, 2, "schema"), 0);
    metrics_buf_reset(&b);
    metrics_render(r, &b);
    expect_line(b.data, "oddsky_dead_letters_total{reason=\"schema\"} 1");
    assert_int_equal(metrics_label_set(f, 2, NULL), 0);
    metrics_buf_reset(&b);
    metrics_render(r, &b);
    assert_int_equal(count_prefix(b.data, "oddsky_dead_letters_total{"), 2);
    metrics_buf_free(&b);
    metrics_free(r);
}

static void test_help_escaping_and_gauges(void **state)
{
    (void)state;
    metrics_registry *r = metrics_new(NULL);
    metrics_spec s = {.name = "lag_messages",
                      .help = "back\\slash and\nnewline",
                      .kind = METRICS_GAUGE};
    metrics_family *f = metrics_register(r, &s, NULL, 0);
    assert_non_null(f);
    metrics_set(metrics_gauge_at(f, 0), 0.1);
    metrics_spec s2 = {.name = "odd_value", .help = "x", .kind = METRICS_GAUGE,
                       .label = "which", .values = (const char *const[]){"nan", "inf", "big"},
                       .n_values = 3};
    metrics_family *g = metrics_register(r, &s2, NULL, 0);
    assert_non_null(g);
    metrics_set(metrics_gauge_at(g, 0), NAN);
    metrics_set(metrics_gauge_at(g, 1), -INFINITY);
    metrics_set(metrics_gauge_at(g, 2), 12345678901.5);
    metrics_buf b;
    metrics_buf_init(&b);
    metrics_render(r, &b);
    /* source: exposition formats doc: HELP escapes \ as \\ and newline as \n */
    expect_line(b.data, "# HELP oddsky_lag_messages back\\\\slash and\\nnewline");
    expect_line(b.data, "# TYPE oddsky_lag_messages gauge");
    expect_line(b.data, "oddsky_lag_messages 0.1");
    /* source: exposition formats doc: NaN, +Inf, -Inf spelled this way */
    expect_line(b.data, "oddsky_odd_value{which=\"nan\"} NaN");
    expect_line(b.data, "oddsky_odd_value{which=\"inf\"} -Inf");
    expect_line(b.data, "oddsky_odd_value{which=\"big\"} 12345678901.5");
    metrics_buf_free(&b);
    metrics_free(r);
}

static void test_histogram_text(void **state)
{
    (void)state;
    metrics_registry *r = metrics_new(NULL);
    static const double bounds[] = {0.001, 0.01, 0.1, 1};
    static const char *const parts[] = {"0", "1"};
    metrics_spec s = {.name = "observe_latency_seconds",
                      .help = "Time from poll to publish",
                      .kind = METRICS_HISTOGRAM,
                      .label = "partition",
                      .values = parts,
                      .n_values = 2,
                      .bounds = bounds,
                      .n_bounds = 4};
    metrics_family *f = metrics_register(r, &s, NULL, 0);
    assert_non_null(f);
    metrics_hist *h = metrics_hist_at(f, 0);
    /* 2 in (0, 0.001], 1 in (0.001, 0.01], 0 in (0.01, 0.1], 3 in (0.1, 1],
     * 2 above 1.  A value equal to a bound belongs to that bucket (le). */
    double v[] = {0.0005, 0.001, 0.005, 0.5, 1.0, 0.2, 2.5, 7.0};
    double sum = 0;
    for (size_t i = 0; i < sizeof v / sizeof v[0]; i++) {
        metrics_observe(h, v[i]);
        sum += v[i];
    }
    metrics_buf b;
    metrics_buf_init(&b);
    metrics_render(r, &b);
    const char *t = b.data;
    expect_line(t, "# TYPE oddsky_observe_latency_seconds histogram");
    assert_int_equal(count_prefix(t, "# HELP oddsky_observe_latency_seconds "), 1);
    assert_int_equal(count_prefix(t, "# TYPE "), 1);
    expect_line(t, "oddsky_observe_latency_seconds_bucket{partition=\"0\",le=\"0.001\"} 2");
    expect_line(t, "oddsky_observe_latency_seconds_bucket{partition=\"0\",le=\"0.01\"} 3");
    expect_line(t, "oddsky_observe_latency_seconds_bucket{partition=\"0\",le=\"0.1\"} 3");
    expect_line(t, "oddsky_observe_latency_seconds_bucket{partition=\"0\",le=\"1\"} 6");
    expect_line(t, "oddsky_observe_latency_seconds_bucket{partition=\"0\",le=\"+Inf\"} 8");
    expect_line(t, "oddsky_observe_latency_seconds_count{partition=\"0\"} 8");
    char line[160];
    snprintf(line, sizeof line, "oddsky_observe_latency_seconds_sum{partition=\"0\"} %.15g", sum);
    expect_line(t, line);
    /* The empty series: every bucket 0, +Inf 0 == count 0. */
    expect_line(t, "oddsky_observe_latency_seconds_bucket{partition=\"1\",le=\"+Inf\"} 0");
    expect_line(t, "oddsky_observe_latency_seconds_count{partition=\"1\"} 0");
    /* +Inf bucket comes last among a series' buckets, then _sum, _count. */
    const char *inf = strstr(t, "{partition=\"0\",le=\"+Inf\"}");
    const char *s0 = strstr(t, "_sum{partition=\"0\"}");
    const char *c0 = strstr(t, "_count{partition=\"0\"}");
    assert_true(strstr(t, "le=\"1\"} 6") < inf && inf < s0 && s0 < c0);
    assert_true(h->max == 7.0);
    metrics_buf_free(&b);
    metrics_free(r);
}

static void test_registration_rules(void **state)
{
    (void)state;
    metrics_limits lim = {.max_families = 4, .max_series = 8};
    metrics_registry *r = metrics_new(&lim);
    char err[128];
    static const double bounds[] = {1, 2};
    static const double bad_bounds[] = {1, 1};
    static const char *const les[] = {"x"};
    /* source: exposition formats / Prometheus naming practices: counters
     * end in _total; "le" is the histogram's own label; names match
     * [a-zA-Z_:][a-zA-Z0-9_:]*, label names not starting with __. */
    metrics_spec bad_counter = {.name = "packets", .help = "", .kind = METRICS_COUNTER};
    assert_null(metrics_register(r, &bad_counter, err, sizeof err));
    assert_non_null(strstr(err, "_total"));
    metrics_spec bad_gauge = {.name = "x_total", .help = "", .kind = METRICS_GAUGE};
    assert_null(metrics_register(r, &bad_gauge, err, sizeof err));
    metrics_spec bad_chars = {.name = "9lives_total", .help = "", .kind = METRICS_COUNTER};
    assert_null(metrics_register(r, &bad_chars, err, sizeof err));
    metrics_spec le = {.name = "h", .help = "", .kind = METRICS_HISTOGRAM,
                       .label = "le", .values = les, .n_values = 1,
                       .bounds = bounds, .n_bounds = 2};
    assert_null(metrics_register(r, &le, err, sizeof err));
    metrics_spec dunder = {.name = "g", .help = "", .kind = METRICS_GAUGE,
                           .label = "__x", .values = les, .n_values = 1};
    assert_null(metrics_register(r, &dunder, err, sizeof err));
    metrics_spec unsorted = {.name = "h", .help = "", .kind = METRICS_HISTOGRAM,
                             .bounds = bad_bounds, .n_bounds = 2};
    assert_null(metrics_register(r, &unsorted, err, sizeof err));
    metrics_spec ok = {.name = "h", .help = "", .kind = METRICS_HISTOGRAM,
                       .bounds = bounds, .n_bounds = 2};
    assert_non_null(metrics_register(r, &ok, err, sizeof err));
    metrics_spec dup = ok;
    assert_null(metrics_register(r, &dup, err, sizeof err));
    assert_non_null(strstr(err, "duplicate"));
    /* h_count would collide with the histogram's own _count line. */
    metrics_spec clash = {.name = "h_count", .help = "", .kind = METRICS_GAUGE};
    assert_null(metrics_register(r, &clash, err, sizeof err));
    /* ... and the other way round: a histogram over an existing x_sum. */
    metrics_spec xsum = {.name = "x_sum", .help = "", .kind = METRICS_GAUGE};
    assert_non_null(metrics_register(r, &xsum, err, sizeof err));
    metrics_spec xh = {.name = "x", .help = "", .kind = METRICS_HISTOGRAM,
                       .bounds = bounds, .n_bounds = 2};
    assert_null(metrics_register(r, &xh, err, sizeof err));
    metrics_spec wg = {.name = "w", .help = "", .kind = METRICS_GAUGE, .windowed = 1};
    assert_null(metrics_register(r, &wg, err, sizeof err));
    /* Capacity: 8 series in all, two used. */
    static const char *const many[8] = {"a", "b", "c", "d", "e", "f", "g", "h"};
    metrics_spec big = {.name = "big_total", .help = "", .kind = METRICS_COUNTER,
                        .label = "l", .values = many, .n_values = 8};
    assert_null(metrics_register(r, &big, err, sizeof err));
    assert_non_null(strstr(err, "capacity"));
    big.n_values = 6;
    assert_non_null(metrics_register(r, &big, err, sizeof err));
    assert_non_null(metrics_find(r, "big_total"));
    assert_null(metrics_find(r, "nope"));
    metrics_free(r);
}

/* source: Prometheus docs, histogram_quantile(): the rank q*count falls in
 * the first bucket whose cumulative count reaches it; linear interpolation
 * inside that bucket, the lowest bucket starting at 0; a rank in the +Inf
 * bucket gives the highest finite upper bound.  Expected values worked by
 * hand from that rule. */
static void test_quantiles(void **state)
{
    (void)state;
    static const double bounds[] = {1, 2, 4};
    uint64_t counts[] = {2, 6, 2, 0};
    /* total 10; q=0.5: rank 5 in (1,2] with 2 below, 6 inside: 1 + 3/6 */
    assert_near(metrics_quantile_of_buckets(bounds, 3, counts, 0.5), 1.5, 1e-12);
    /* q=0.99: rank 9.9 in (2,4], 8 below, 2 inside: 2 + 2*1.9/2 */
    assert_near(metrics_quantile_of_buckets(bounds, 3, counts, 0.99), 3.9, 1e-12);
    /* q=0.1: rank 1 in (0,1]: 0 + 1*1/2 */
    assert_near(metrics_quantile_of_buckets(bounds, 3, counts, 0.1), 0.5, 1e-12);
    uint64_t tail[] = {2, 6, 2, 5};
    /* total 15, q=0.9: rank 13.5 > 10 -> +Inf bucket -> 4 */
    assert_near(metrics_quantile_of_buckets(bounds, 3, tail, 0.9), 4.0, 1e-12);
    uint64_t none[] = {0, 0, 0, 0};
    assert_true(isnan(metrics_quantile_of_buckets(bounds, 3, none, 0.5)));
    assert_true(isnan(metrics_quantile_of_buckets(bounds, 3, counts, 1.5)));
}

/* Rates over a window: increase / elapsed seconds (common practice; the
 * figures below are worked by hand). */
static void test_rates_and_windows(void **state)
{
    (void)state;
    metrics_registry *r = metrics_new(NULL);
    metrics_spec cs = {.name = "packets_total", .help = "p",
                       .kind = METRICS_COUNTER, .windowed = 1};
    metrics_family *c = metrics_register(r, &cs, NULL, 0);
    metrics_spec plain = {.name = "other_total", .help = "o", .kind = METRICS_COUNTER};
    metrics_family *o = metrics_register(r, &plain, NULL, 0);
    static const double bounds[] = {1, 2, 4};
    metrics_spec hs = {.name = "latency_seconds", .help = "l",
                       .kind = METRICS_HISTOGRAM, .bounds = bounds,
                       .n_bounds = 3, .windowed = 1};
    metrics_family *hf = metrics_register(r, &hs, NULL, 0);
    assert_non_null(c);
    assert_non_null(hf);
    metrics_counter *pc = metrics_counter_at(c, 0);
    metrics_hist *h = metrics_hist_at(hf, 0);

    assert_near(metrics_rate(r, c, 0, 60), 0.0, 0); /* no history */
    double t0 = 1000.0;
    metrics_tick(r, t0);
    /* 60 s at 5/s with latency 5 (above every bound), then 60 s at 20/s
     * with latency 0.5. */
    for (int s = 1; s <= 120; s++) {
        int n = s <= 60 ? 5 : 20;
        for (int k = 0; k < n; k++) {
            metrics_inc(pc);
            metrics_observe(h, s <= 60 ? 5.0 : 0.5);
        }
        metrics_tick(r, t0 + s);
        metrics_tick(r, t0 + s + 0.2); /* too soon: ignored */
    }
    assert_near(metrics_rate(r, c, 0, 60), 20.0, 1e-12);
    /* 120 s of history only: (300 + 1200) / 120 */
    assert_near(metrics_rate(r, c, 0, 300), 12.5, 1e-12);
    assert_near(metrics_rate(r, hf, 0, 60), 20.0, 1e-12);
    assert_near(metrics_rate(r, o, 0, 60), 0.0, 0); /* not windowed */
    /* last minute: 1200 values of 0.5 in (0,1]; q=0.5: 0 + 1*600/1200 */
    assert_near(metrics_window_quantile(r, hf, 0, 60, 0.5), 0.5, 1e-12);
    assert_near(metrics_window_max(r, hf, 0, 60), 0.5, 0);
    assert_near(metrics_window_max(r, hf, 0, 300), 5.0, 0);
    /* 5 min: 300 of 1500 in +Inf; q=0.9: rank 1350 > 1200 -> 4 */
    assert_near(metrics_window_quantile(r, hf, 0, 300, 0.9), 4.0, 1e-12);
    /* all time matches the 5 min window here */
    assert_near(metrics_hist_quantile(h, 0.9), 4.0, 1e-12);

    /* Wrap the ring: 400 more seconds at 3/s, no latency observations. */
    for (int s = 121; s <= 520; s++) {
        metrics_add(pc, 3);
        metrics_tick(r, t0 + s);
    }
    assert_near(metrics_rate(r, c, 0, 60), 3.0, 1e-12);
    assert_near(metrics_rate(r, c, 0, 300), 3.0, 1e-12);
    assert_true(isnan(metrics_window_quantile(r, hf, 0, 60, 0.5)));
    assert_true(isnan(metrics_window_max(r, hf, 0, 300)));
    /* A gap of 10 s without ticks: the rate uses the real elapsed time. */
    metrics_add(pc, 100);
    metrics_tick(r, t0 + 530);
    /* The oldest row within 60 s of t=530 is t=470: 470..520 add 3/s
     * (150), then 100 by 530: (150 + 100) / 60. */
    assert_near(metrics_rate(r, c, 0, 60), 250.0 / 60.0, 1e-12);
    metrics_free(r);
}

static void test_buffer(void **state)
{
    (void)state;
    metrics_buf b;
    metrics_buf_init(&b);
    char big[1000];
    memset(big, 'x', sizeof big - 1);
    big[sizeof big - 1] = '\0';
    assert_int_equal(metrics_buf_printf(&b, "%s|%d", big, 42), 0);
    assert_int_equal(b.len, 999 + 3);
    assert_string_equal(b.data + 999, "|42");
    assert_int_equal(metrics_buf_puts(&b, "!"), 0);
    assert_int_equal(b.len, 1003);
    metrics_buf_reset(&b);
    assert_int_equal(b.len, 0);
    assert_string_equal(b.data, "");
    metrics_buf_free(&b);
}

int main(void)
{
    const struct CMUnitTest tests[] = {
        cmocka_unit_test(test_counter_labels_and_escaping),
        cmocka_unit_test(test_help_escaping_and_gauges),
        cmocka_unit_test(test_histogram_text),
        cmocka_unit_test(test_registration_rules),
        cmocka_unit_test(test_quantiles),
        cmocka_unit_test(test_rates_and_windows),
        cmocka_unit_test(test_buffer),
    };
    return cmocka_run_group_tests(tests, NULL, NULL);
}
