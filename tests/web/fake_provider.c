/*
 * fake_provider.c - see fake_provider.h.  Invented numbers only; the
 * shapes (smooth drifts, a skewed score histogram) are chosen so that the
 * page has something to draw and the tests something to compare.
 */
#include "tests/web/fake_provider.h"

#include <math.h>
#include <stdio.h>
#include <string.h>

static const char *const fake_features[FAKE_DIM] = {"mag", "g_r", "r_amp",
                                                    "span_days"};
static const double fake_centroid[FAKE_K][FAKE_DIM] = {
    {18.2, 0.35, 0.12, 40},  {19.6, 0.90, 0.30, 120}, {20.4, -0.20, 1.40, 8},
    {17.5, 1.20, 0.08, 260}, {19.0, 0.10, 0.70, 60},  {20.9, 0.60, 1.90, 3}};
static const double fake_weight[FAKE_K] = {4200, 2600, 900, 1500, 300, 60};
static const double fake_latency_bounds[] = {0.0001, 0.00025, 0.0005, 0.001,
                                             0.0025, 0.005,   0.01,   0.025,
                                             0.05,   0.1,     0.25,   1};
static const char *const fake_reasons[] = {"decode", "schema", "featmap"};
static const char *const fake_error_kinds[] = {"produce", "commit"};
static const char *const fake_partitions[] = {"0", "1", "2"};

int fake_status_init(fake_status *f)
{
    memset(f, 0, sizeof *f);
    f->step_s = 2.0;
    f->healthy = 1;
    f->reg = metrics_new(NULL);
    if (!f->reg)
        return -1;
    metrics_spec s[] = {
        {.name = "packets_total", .help = "Packets read from the input topic",
         .kind = METRICS_COUNTER, .windowed = 1},
        {.name = "results_total", .help = "Results published",
         .kind = METRICS_COUNTER, .windowed = 1},
        {.name = "flags_total", .help = "Packets flagged for follow-up",
         .kind = METRICS_COUNTER, .windowed = 1},
        {.name = "dead_letters_total", .help = "Packets sent to the dead-letter topic",
         .kind = METRICS_COUNTER, .label = "reason", .values = fake_reasons,
         .n_values = 3, .windowed = 1},
        {.name = "errors_total", .help = "Errors by kind",
         .kind = METRICS_COUNTER, .label = "kind", .values = fake_error_kinds,
         .n_values = 2},
        {.name = "observe_latency_seconds",
         .help = "Time from poll to publish of one packet",
         .kind = METRICS_HISTOGRAM, .bounds = fake_latency_bounds,
         .n_bounds = sizeof fake_latency_bounds / sizeof fake_latency_bounds[0],
         .windowed = 1},
        {.name = "partition_lag_messages", .help = "High watermark minus committed offset",
         .kind = METRICS_GAUGE, .label = "partition", .values = fake_partitions,
         .n_values = 3},
    };
    metrics_family **dst[] = {&f->packets, &f->results, &f->flags, &f->dead,
                              &f->errors, &f->latency, &f->lag};
    for (size_t i = 0; i < sizeof s / sizeof s[0]; i++) {
        *dst[i] = metrics_register(f->reg, &s[i], NULL, 0);
        if (!*dst[i])
            return -1;
    }
    metrics_tick(f->reg, f->now_s);
    return 0;
}

void fake_status_free(fake_status *f)
{
    metrics_free(f->reg);
    f->reg = NULL;
}

void fake_status_advance(fake_status *f, double seconds)
{
    for (double done = 0; done + 0.5 < seconds; done += 1.0) {
        f->now_s += 1.0;
        double t = f->now_s;
        unsigned n = (unsigned)(800 + 300 * sin(t / 20.0));
        metrics_add(metrics_counter_at(f->packets, 0), n);
        metrics_add(metrics_counter_at(f->results, 0), n - 1);
        metrics_add(metrics_counter_at(f->flags, 0), ((unsigned)t % 7 == 0) ? 2 : 0);
        if ((unsigned)t % 5 == 0)
            metrics_inc(metrics_counter_at(f->dead, (unsigned)t % 3));
        metrics_hist *h = metrics_hist_at(f->latency, 0);
        for (unsigned i = 0; i < 50; i++)
            metrics_observe(h, 0.0004 + 0.0003 * (i % 10) + (i == 49 ? 0.02 : 0));
        for (unsigned p = 0; p < 3; p++)
            metrics_set(metrics_gauge_at(f->lag, p),
                        200 + 150 * sin(t / 15.0 + p) + 40 * p);
        metrics_tick(f->reg, t);
    }
}

static json_t *num(double v) { return isfinite(v) ? json_real(v) : json_null(); }

static json_t *fake_model(const fake_status *f)
{
    double n = f->calls;
    json_t *m = json_object();
    json_object_set_new(m, "k", json_integer(FAKE_K));
    json_object_set_new(m, "warm", json_true());
    json_object_set_new(m, "learned", json_integer(120000 + 2000 * (json_int_t)n));
    json_object_set_new(m, "dim", json_integer(FAKE_DIM));
    json_t *feat = json_array();
    for (int j = 0; j < FAKE_DIM; j++)
        json_array_append_new(feat, json_string(fake_features[j]));
    json_object_set_new(m, "features", feat);
    static const double scale[FAKE_DIM] = {0.3, 0.1, 0.08, 12};
    json_t *cl = json_array();
    for (int i = 0; i < FAKE_K; i++) {
        json_t *c = json_object();
        json_object_set_new(c, "weight",
                            json_real(fake_weight[i] * (1 + 0.25 * sin(0.5 * n + i))));
        json_t *cen = json_array(), *spr = json_array();
        for (int j = 0; j < FAKE_DIM; j++) {
            json_array_append_new(
                cen, json_real(fake_centroid[i][j] + scale[j] * sin(0.3 * n + i + j)));
            json_array_append_new(spr, json_real(scale[j] * (1.5 + 0.1 * i)));
        }
        json_object_set_new(c, "centroid", cen);
        json_object_set_new(c, "spread", spr);
        json_array_append_new(cl, c);
    }
    json_object_set_new(m, "clusters", cl);
    json_object_set_new(m, "sketch_fill", json_real(0.31 + 0.01 * sin(n)));
    double threshold = 15.5 + 0.25 * sin(0.7 * n);
    json_t *edges = json_array(), *mass = json_array();
    double total = 0, above = 0, w[FAKE_BINS];
    for (int i = 0; i < FAKE_BINS; i++) {
        double x = 0.25 + 0.5 * i;
        w[i] = x * x * x * exp(-x / 1.6) * (1 + 0.15 * sin(n + 0.4 * i));
        total += w[i];
    }
    for (int i = 0; i <= FAKE_BINS; i++)
        json_array_append_new(edges, json_real(0.5 * i));
    for (int i = 0; i < FAKE_BINS; i++) {
        json_array_append_new(mass, json_real(w[i] / total));
        if (0.5 * i >= threshold)
            above += w[i] / total;
    }
    json_object_set_new(m, "threshold", json_real(threshold));
    json_object_set_new(m, "tail_prob_at_threshold", json_real(above));
    json_object_set_new(m, "expected_flags_per_night", json_real(96 + 8 * sin(n)));
    json_t *hist = json_object();
    json_object_set_new(hist, "edges", edges);
    json_object_set_new(hist, "mass", mass);
    json_object_set_new(m, "score_histogram", hist);
    json_object_set_new(m, "suggested_k", json_integer(5 + (f->calls / 3) % 3));
    return m;
}

static json_t *fake_status_json(void *ctx)
{
    fake_status *f = ctx;
    fake_status_advance(f, f->step_s);
    f->calls++;
    double n = f->calls;
    json_t *d = json_object();
    json_object_set_new(d, "version", json_string("0.1.0"));
    json_object_set_new(d, "uptime_s", json_real(f->now_s));
    static const char *const phases[] = {"scoring", "scoring", "scoring", "paused"};
    json_object_set_new(d, "phase", json_string(f->calls < 2 ? "warming"
                                                : phases[f->calls % 4]));
    json_t *parts = json_array();
    for (unsigned p = 0; p < 3; p++) {
        json_int_t hw = 500000 + 40000 * p + (json_int_t)(n * 2000);
        json_int_t lag = (json_int_t)metrics_gauge_at(f->lag, p)->v;
        json_t *o = json_object();
        json_object_set_new(o, "topic", json_string("alerts-demo"));
        json_object_set_new(o, "partition", json_integer(p));
        json_object_set_new(o, "committed", json_integer(hw - lag));
        json_object_set_new(o, "stored", json_integer(hw - lag + 10));
        json_object_set_new(o, "high_watermark", json_integer(hw));
        json_object_set_new(o, "lag", json_integer(lag));
        json_array_append_new(parts, o);
    }
    json_object_set_new(d, "partitions", parts);

    json_t *rates = json_object();
    struct { const char *name; metrics_family *fam; } rs[] = {
        {"packets", f->packets}, {"results", f->results}, {"flags", f->flags}};
    char key[64];
    for (size_t i = 0; i < 3; i++) {
        snprintf(key, sizeof key, "%s_1m", rs[i].name);
        json_object_set_new(rates, key, json_real(metrics_rate(f->reg, rs[i].fam, 0, 60)));
        snprintf(key, sizeof key, "%s_5m", rs[i].name);
        json_object_set_new(rates, key, json_real(metrics_rate(f->reg, rs[i].fam, 0, 300)));
    }
    double dl1 = 0, dl5 = 0;
    for (uint32_t i = 0; i < metrics_series(f->dead); i++) {
        dl1 += metrics_rate(f->reg, f->dead, i, 60);
        dl5 += metrics_rate(f->reg, f->dead, i, 300);
    }
    json_object_set_new(rates, "dead_letters_1m", json_real(dl1));
    json_object_set_new(rates, "dead_letters_5m", json_real(dl5));
    json_object_set_new(d, "rates_per_s", rates);

    json_t *lat = json_object();
    json_object_set_new(lat, "p50", num(1e3 * metrics_window_quantile(f->reg, f->latency, 0, 60, 0.5)));
    json_object_set_new(lat, "p99", num(1e3 * metrics_window_quantile(f->reg, f->latency, 0, 60, 0.99)));
    json_object_set_new(lat, "max", num(1e3 * metrics_window_max(f->reg, f->latency, 0, 60)));
    json_object_set_new(lat, "window_s", json_integer(60));
    json_object_set_new(d, "latency_ms", lat);

    json_t *counts = json_object();
    json_object_set_new(counts, "packets", json_integer((json_int_t)metrics_counter_at(f->packets, 0)->v));
    json_object_set_new(counts, "results", json_integer((json_int_t)metrics_counter_at(f->results, 0)->v));
    json_object_set_new(counts, "flags", json_integer((json_int_t)metrics_counter_at(f->flags, 0)->v));
    json_t *dl = json_object(), *er = json_object();
    for (uint32_t i = 0; i < 3; i++)
        json_object_set_new(dl, fake_reasons[i], json_integer((json_int_t)metrics_counter_at(f->dead, i)->v));
    for (uint32_t i = 0; i < 2; i++)
        json_object_set_new(er, fake_error_kinds[i], json_integer((json_int_t)metrics_counter_at(f->errors, i)->v));
    json_object_set_new(counts, "dead_letters", dl);
    json_object_set_new(counts, "errors", er);
    json_object_set_new(d, "counts", counts);

    json_object_set_new(d, "model", fake_model(f));

    json_t *flags = json_array();
    for (unsigned i = 0; i < 5; i++) {
        unsigned id = f->calls * 7 + i;
        json_t *o = json_object();
        snprintf(key, sizeof key, "pkt-%06u", id);
        json_object_set_new(o, "packet_id", json_string(key));
        snprintf(key, sizeof key, "src-%04u", (id * 37) % 9973);
        json_object_set_new(o, "source_id", json_string(key));
        json_object_set_new(o, "novelty", json_real(16.0 + 0.7 * i + 0.1 * sin(n)));
        json_object_set_new(o, "tail_prob", json_real(1e-4 / (1 + i)));
        json_t *dr = json_array();
        for (unsigned k = 0; k < 3; k++) {
            json_t *x = json_object();
            json_object_set_new(x, "feature", json_string(fake_features[(i + k) % FAKE_DIM]));
            json_object_set_new(x, "z", json_real((k % 2 ? -1 : 1) * (6.5 - 1.5 * k + 0.1 * i)));
            json_array_append_new(dr, x);
        }
        json_object_set_new(o, "drivers", dr);
        json_object_set_new(o, "event_time", json_real(60412.1 + 0.001 * id));
        json_array_append_new(flags, o);
    }
    json_object_set_new(d, "recent_flags", flags);

    json_t *ck = json_object();
    json_object_set_new(ck, "time", json_string("2025-03-01T21:04:05Z"));
    json_object_set_new(ck, "path", json_string("/var/lib/oddsky/model.ckpt"));
    json_object_set_new(ck, "bytes", json_integer(2400000 + f->checkpoints));
    json_object_set_new(ck, "ok", json_true());
    json_object_set_new(d, "last_checkpoint", ck);

    if (f->dump_dir) {
        char path[512];
        snprintf(path, sizeof path, "%s/%.1f.json", f->dump_dir, f->now_s);
        json_dump_file(d, path, JSON_COMPACT | JSON_REAL_PRECISION(15));
    }
    return d;
}

static int fake_healthy(void *ctx, char *reason, size_t len)
{
    fake_status *f = ctx;
    if (!f->healthy)
        snprintf(reason, len, "input consumer is not assigned any partition");
    return f->healthy;
}

static void fake_metrics_text(void *ctx, metrics_buf *out)
{
    fake_status *f = ctx;
    metrics_render(f->reg, out);
}

static int fake_checkpoint(void *ctx, char *msg, size_t len)
{
    fake_status *f = ctx;
    f->checkpoints++;
    snprintf(msg, len, "checkpoint %d written", f->checkpoints);
    return 0;
}

status_provider fake_status_provider(fake_status *f)
{
    status_provider p = {.ctx = f,
                         .status_json = fake_status_json,
                         .healthy = fake_healthy,
                         .metrics_text = fake_metrics_text,
                         .checkpoint_now = fake_checkpoint};
    return p;
}
