/*
 * metrics.c - fixed-capacity metric registry, Prometheus text rendering and
 * a per-second history for rates and windowed quantiles.
 *
 * Design: metrics_new() allocates every array at its capacity (families,
 * series of each kind, histogram buckets, the history ring), so that
 * registration only hands out slices and the hot path only increments.
 * Series of one family are contiguous; series i is label value i.
 *
 * The history ring holds METRICS_WINDOW_MAX_S + 1 snapshots, one row of
 * uint64 slots per tick: a counter series takes one slot (its value), a
 * histogram series n_bounds + 1 bucket counts then one slot holding the
 * bits of its tick maximum (a double).  Rates and windowed quantiles are
 * differences between the latest row and an older one.
 */
#include "metrics.h"

#include <math.h>
#include <stdarg.h>
#include <stdio.h>
#include <stdlib.h>
#include <string.h>

#define METRICS_MAX_HELP 256u
#define METRICS_MAX_LABEL_NAME 32u
#define METRICS_RING_LEN (METRICS_WINDOW_MAX_S + 1u)

struct metrics_family {
    metrics_registry *reg;
    char name[METRICS_MAX_NAME];
    char help[METRICS_MAX_HELP];
    char label[METRICS_MAX_LABEL_NAME]; /* "" when unlabelled */
    metrics_kind kind;
    uint32_t first;      /* index of series 0 in the registry arrays */
    uint32_t n_series;
    uint32_t n_bounds;
    double bounds[METRICS_MAX_BOUNDS];
    int windowed;
    uint32_t ring_off;   /* first slot in a history row */
    uint32_t ring_width; /* slots per series */
};

struct metrics_registry {
    metrics_limits lim;
    metrics_family *fam;
    uint32_t n_fam;
    /* series storage, indexed by family->first + i */
    metrics_counter *counters;
    metrics_gauge *gauges;
    metrics_hist *hists;
    char (*values)[METRICS_MAX_LABEL_VALUE];
    uint8_t *named;
    uint32_t n_series;
    uint64_t *buckets;
    uint32_t n_buckets;
    /* history */
    uint64_t *ring;   /* METRICS_RING_LEN rows of lim.max_window_slots */
    double *ring_t;   /* tick time of each row */
    uint32_t ring_head; /* row of the latest snapshot */
    uint32_t ring_count;
    uint32_t ring_used; /* slots per row in use */
};

/* ---- buffer ---------------------------------------------------------- */

void metrics_buf_init(metrics_buf *b) { memset(b, 0, sizeof *b); }

void metrics_buf_free(metrics_buf *b)
{
    free(b->data);
    memset(b, 0, sizeof *b);
}

void metrics_buf_reset(metrics_buf *b)
{
    b->len = 0;
    b->failed = 0;
    if (b->data)
        b->data[0] = '\0';
}

int metrics_buf_reserve(metrics_buf *b, size_t extra)
{
    if (b->failed)
        return -1;
    if (extra > SIZE_MAX / 2 - b->len) {
        b->failed = 1;
        return -1;
    }
    size_t need = b->len + extra + 1;
    if (need <= b->cap)
        return 0;
    size_t cap = b->cap ? b->cap : 256;
    while (cap < need)
        cap *= 2;
    char *p = realloc(b->data, cap);
    if (!p) {
        b->failed = 1;
        return -1;
    }
    b->data = p;
    b->cap = cap;
    return 0;
}

int metrics_buf_append(metrics_buf *b, const char *s, size_t n)
{
    if (metrics_buf_reserve(b, n) < 0)
        return -1;
    if (n)
        memcpy(b->data + b->len, s, n);
    b->len += n;
    b->data[b->len] = '\0';
    return 0;
}

int metrics_buf_puts(metrics_buf *b, const char *s)
{
    return metrics_buf_append(b, s, strlen(s));
}

int metrics_buf_printf(metrics_buf *b, const char *fmt, ...)
{
    if (b->failed)
        return -1;
    char small[256];
    va_list ap;
    va_start(ap, fmt);
    int n = vsnprintf(small, sizeof small, fmt, ap);
    va_end(ap);
    if (n < 0) {
        b->failed = 1;
        return -1;
    }
    if ((size_t)n < sizeof small)
        return metrics_buf_append(b, small, (size_t)n);
    if (metrics_buf_reserve(b, (size_t)n) < 0)
        return -1;
    va_start(ap, fmt);
    vsnprintf(b->data + b->len, (size_t)n + 1, fmt, ap);
    va_end(ap);
    b->len += (size_t)n;
    return 0;
}

/* ---- hot path --------------------------------------------------------- */

void metrics_observe(metrics_hist *h, double v)
{
    uint32_t b = 0;
    if (isnan(v)) {
        b = h->n_bounds;
    } else {
        while (b < h->n_bounds && v > h->bounds[b])
            b++;
        h->sum += v;
        if (h->count == 0 || v > h->max)
            h->max = v;
        if (isnan(h->tick_max) || v > h->tick_max)
            h->tick_max = v;
    }
    h->counts[b]++;
    h->count++;
}

/* ---- registry --------------------------------------------------------- */

metrics_registry *metrics_new(const metrics_limits *lim)
{
    metrics_registry *r = calloc(1, sizeof *r);
    if (!r)
        return NULL;
    if (lim)
        r->lim = *lim;
    if (!r->lim.max_families)
        r->lim.max_families = 64;
    if (!r->lim.max_series)
        r->lim.max_series = 512;
    if (!r->lim.max_bucket_slots)
        r->lim.max_bucket_slots = 4096;
    if (!r->lim.max_window_slots)
        r->lim.max_window_slots = 256;
    r->fam = calloc(r->lim.max_families, sizeof *r->fam);
    r->counters = calloc(r->lim.max_series, sizeof *r->counters);
    r->gauges = calloc(r->lim.max_series, sizeof *r->gauges);
    r->hists = calloc(r->lim.max_series, sizeof *r->hists);
    r->values = calloc(r->lim.max_series, sizeof *r->values);
    r->named = calloc(r->lim.max_series, 1);
    r->buckets = calloc(r->lim.max_bucket_slots, sizeof *r->buckets);
    r->ring = calloc((size_t)METRICS_RING_LEN * r->lim.max_window_slots,
                     sizeof *r->ring);
    r->ring_t = calloc(METRICS_RING_LEN, sizeof *r->ring_t);
    if (!r->fam || !r->counters || !r->gauges || !r->hists || !r->values ||
        !r->named || !r->buckets || !r->ring || !r->ring_t) {
        metrics_free(r);
        return NULL;
    }
    return r;
}

void metrics_free(metrics_registry *r)
{
    if (!r)
        return;
    free(r->fam);
    free(r->counters);
    free(r->gauges);
    free(r->hists);
    free(r->values);
    free(r->named);
    free(r->buckets);
    free(r->ring);
    free(r->ring_t);
    free(r);
}

static int fail(char *err, size_t len, const char *name, const char *why)
{
    if (err && len)
        snprintf(err, len, "metric %s: %s", name ? name : "(null)", why);
    return -1;
}

static int valid_name(const char *s, int colon_ok)
{
    if (!s || !*s)
        return 0;
    for (const char *p = s; *p; p++) {
        char c = *p;
        int alpha = (c >= 'a' && c <= 'z') || (c >= 'A' && c <= 'Z') ||
                    c == '_' || (colon_ok && c == ':');
        int digit = c >= '0' && c <= '9';
        if (!alpha && !(digit && p != s))
            return 0;
    }
    return 1;
}

static int ends_with(const char *s, const char *suffix)
{
    size_t n = strlen(s), m = strlen(suffix);
    return n >= m && strcmp(s + n - m, suffix) == 0;
}

metrics_family *metrics_find(metrics_registry *r, const char *name)
{
    for (uint32_t i = 0; i < r->n_fam; i++)
        if (strcmp(r->fam[i].name, name) == 0)
            return &r->fam[i];
    return NULL;
}

/* Does a new family's name collide with an existing one, counting the
 * _bucket/_sum/_count lines that histograms render (both ways round)? */
static int collides(metrics_registry *r, const char *name, metrics_kind kind)
{
    static const char *const sfx[] = {"_bucket", "_sum", "_count"};
    if (metrics_find(r, name))
        return 1;
    if (kind == METRICS_HISTOGRAM) {
        char full[METRICS_MAX_NAME + 8];
        for (size_t k = 0; k < 3; k++) {
            snprintf(full, sizeof full, "%s%s", name, sfx[k]);
            if (metrics_find(r, full))
                return 1;
        }
    }
    for (uint32_t i = 0; i < r->n_fam; i++) {
        const metrics_family *f = &r->fam[i];
        if (f->kind != METRICS_HISTOGRAM)
            continue;
        for (size_t k = 0; k < 3; k++) {
            size_t n = strlen(f->name);
            if (strncmp(name, f->name, n) == 0 && strcmp(name + n, sfx[k]) == 0)
                return 1;
        }
    }
    return 0;
}

metrics_family *metrics_register(metrics_registry *r, const metrics_spec *s,
                                 char *err, size_t err_len)
{
    const char *name = s ? s->name : NULL;
    if (!r || !s || !valid_name(name, 1))
        return fail(err, err_len, name, "invalid name"), NULL;
    if (strlen(name) >= METRICS_MAX_NAME)
        return fail(err, err_len, name, "name too long"), NULL;
    if (s->help && strlen(s->help) >= METRICS_MAX_HELP)
        return fail(err, err_len, name, "help text too long"), NULL;
    if (s->kind == METRICS_COUNTER && !ends_with(name, "_total"))
        return fail(err, err_len, name, "a counter name must end in _total"),
               NULL;
    if (s->kind != METRICS_COUNTER && ends_with(name, "_total"))
        return fail(err, err_len, name, "only counters end in _total"), NULL;
    if (s->kind == METRICS_HISTOGRAM &&
        (ends_with(name, "_bucket") || ends_with(name, "_sum") ||
         ends_with(name, "_count")))
        return fail(err, err_len, name, "histogram name has a reserved suffix"),
               NULL;
    if (s->kind != METRICS_COUNTER && s->kind != METRICS_GAUGE &&
        s->kind != METRICS_HISTOGRAM)
        return fail(err, err_len, name, "unknown kind"), NULL;
    if (collides(r, name, s->kind))
        return fail(err, err_len, name, "duplicate name"), NULL;
    if (s->kind == METRICS_GAUGE && s->windowed)
        return fail(err, err_len, name, "gauges keep no history"), NULL;

    uint32_t n_series = 1;
    if (s->label) {
        if (!valid_name(s->label, 0) || strncmp(s->label, "__", 2) == 0 ||
            strlen(s->label) >= METRICS_MAX_LABEL_NAME)
            return fail(err, err_len, name, "invalid label name"), NULL;
        if (s->kind == METRICS_HISTOGRAM && strcmp(s->label, "le") == 0)
            return fail(err, err_len, name, "label le is reserved"), NULL;
        if (s->n_values == 0 || !s->values)
            return fail(err, err_len, name, "a label needs values"), NULL;
        for (uint32_t i = 0; i < s->n_values; i++)
            if (s->values[i] &&
                strlen(s->values[i]) >= METRICS_MAX_LABEL_VALUE)
                return fail(err, err_len, name, "label value too long"), NULL;
        n_series = s->n_values;
    }

    uint32_t n_bounds = 0;
    if (s->kind == METRICS_HISTOGRAM) {
        n_bounds = s->n_bounds;
        if (n_bounds < 1 || n_bounds > METRICS_MAX_BOUNDS || !s->bounds)
            return fail(err, err_len, name, "histogram needs 1..32 bounds"),
                   NULL;
        for (uint32_t i = 0; i < n_bounds; i++) {
            if (!isfinite(s->bounds[i]) ||
                (i > 0 && !(s->bounds[i] > s->bounds[i - 1])))
                return fail(err, err_len, name,
                            "bounds must be finite and strictly increasing"),
                       NULL;
        }
    }

    uint32_t width = 0;
    if (s->windowed)
        width = s->kind == METRICS_HISTOGRAM ? n_bounds + 2 : 1;
    if (r->n_fam >= r->lim.max_families ||
        n_series > r->lim.max_series - r->n_series ||
        (uint64_t)n_series * (n_bounds + (s->kind == METRICS_HISTOGRAM)) >
            r->lim.max_bucket_slots - r->n_buckets ||
        (uint64_t)n_series * width > r->lim.max_window_slots - r->ring_used)
        return fail(err, err_len, name, "registry capacity exhausted"), NULL;

    metrics_family *f = &r->fam[r->n_fam++];
    memset(f, 0, sizeof *f);
    f->reg = r;
    strcpy(f->name, name);
    if (s->help)
        strcpy(f->help, s->help);
    if (s->label)
        strcpy(f->label, s->label);
    f->kind = s->kind;
    f->first = r->n_series;
    f->n_series = n_series;
    f->n_bounds = n_bounds;
    if (n_bounds)
        memcpy(f->bounds, s->bounds, n_bounds * sizeof *f->bounds);
    f->windowed = s->windowed != 0;
    f->ring_off = r->ring_used;
    f->ring_width = width;
    r->ring_used += n_series * width;

    for (uint32_t i = 0; i < n_series; i++) {
        uint32_t k = f->first + i;
        r->named[k] = !s->label || s->values[i] != NULL;
        if (s->label && s->values[i])
            strcpy(r->values[k], s->values[i]);
        if (s->kind == METRICS_HISTOGRAM) {
            metrics_hist *h = &r->hists[k];
            h->bounds = f->bounds;
            h->n_bounds = n_bounds;
            h->counts = &r->buckets[r->n_buckets];
            h->tick_max = NAN;
            r->n_buckets += n_bounds + 1;
        }
    }
    r->n_series += n_series;
    return f;
}

metrics_counter *metrics_counter_at(metrics_family *f, uint32_t i)
{
    if (!f || f->kind != METRICS_COUNTER || i >= f->n_series)
        return NULL;
    return &f->reg->counters[f->first + i];
}

metrics_gauge *metrics_gauge_at(metrics_family *f, uint32_t i)
{
    if (!f || f->kind != METRICS_GAUGE || i >= f->n_series)
        return NULL;
    return &f->reg->gauges[f->first + i];
}

metrics_hist *metrics_hist_at(metrics_family *f, uint32_t i)
{
    if (!f || f->kind != METRICS_HISTOGRAM || i >= f->n_series)
        return NULL;
    return &f->reg->hists[f->first + i];
}

uint32_t metrics_series(const metrics_family *f) { return f ? f->n_series : 0; }

int metrics_label_set(metrics_family *f, uint32_t i, const char *value)
{
    if (!f || !f->label[0] || i >= f->n_series)
        return -1;
    uint32_t k = f->first + i;
    if (!value) {
        f->reg->named[k] = 0;
        return 0;
    }
    if (strlen(value) >= METRICS_MAX_LABEL_VALUE)
        return -1;
    strcpy(f->reg->values[k], value);
    f->reg->named[k] = 1;
    return 0;
}

/* ---- rendering -------------------------------------------------------- */

/* Shortest of %.15g / %.17g that reads back as the same double; the
 * special values spelled as the text format wants them. */
static void fmt_double(char *out, size_t len, double v)
{
    if (isnan(v)) {
        snprintf(out, len, "NaN");
    } else if (isinf(v)) {
        snprintf(out, len, v > 0 ? "+Inf" : "-Inf");
    } else {
        snprintf(out, len, "%.15g", v);
        if (strtod(out, NULL) != v)
            snprintf(out, len, "%.17g", v);
    }
}

/* HELP escapes backslash and newline; label values also the quote. */
static void put_escaped(metrics_buf *b, const char *s, int quote)
{
    for (const char *p = s; *p; p++) {
        if (*p == '\\')
            metrics_buf_append(b, "\\\\", 2);
        else if (*p == '\n')
            metrics_buf_append(b, "\\n", 2);
        else if (quote && *p == '"')
            metrics_buf_append(b, "\\\"", 2);
        else
            metrics_buf_append(b, p, 1);
    }
}

/* name{label="value",le="x"} with optional parts. */
static void put_series(metrics_buf *b, const metrics_family *f,
                       const char *suffix, uint32_t k, const char *le)
{
    metrics_buf_printf(b, METRICS_PREFIX "%s%s", f->name, suffix);
    const metrics_registry *r = f->reg;
    int has_label = f->label[0] != '\0';
    if (!has_label && !le)
        return;
    metrics_buf_append(b, "{", 1);
    if (has_label) {
        metrics_buf_printf(b, "%s=\"", f->label);
        put_escaped(b, r->values[k], 1);
        metrics_buf_append(b, "\"", 1);
    }
    if (le)
        metrics_buf_printf(b, "%sle=\"%s\"", has_label ? "," : "", le);
    metrics_buf_append(b, "}", 1);
}

int metrics_render(const metrics_registry *r, metrics_buf *out)
{
    static const char *const type_name[] = {"counter", "gauge", "histogram"};
    char num[40];
    for (uint32_t fi = 0; fi < r->n_fam; fi++) {
        const metrics_family *f = &r->fam[fi];
        metrics_buf_printf(out, "# HELP " METRICS_PREFIX "%s ", f->name);
        put_escaped(out, f->help, 0);
        metrics_buf_printf(out, "\n# TYPE " METRICS_PREFIX "%s %s\n", f->name,
                           type_name[f->kind]);
        for (uint32_t i = 0; i < f->n_series; i++) {
            uint32_t k = f->first + i;
            if (!r->named[k])
                continue;
            if (f->kind == METRICS_COUNTER) {
                put_series(out, f, "", k, NULL);
                metrics_buf_printf(out, " %llu\n",
                                   (unsigned long long)r->counters[k].v);
            } else if (f->kind == METRICS_GAUGE) {
                put_series(out, f, "", k, NULL);
                fmt_double(num, sizeof num, r->gauges[k].v);
                metrics_buf_printf(out, " %s\n", num);
            } else {
                const metrics_hist *h = &r->hists[k];
                uint64_t cum = 0;
                for (uint32_t b = 0; b <= h->n_bounds; b++) {
                    cum += h->counts[b];
                    if (b < h->n_bounds)
                        fmt_double(num, sizeof num, h->bounds[b]);
                    else
                        strcpy(num, "+Inf");
                    put_series(out, f, "_bucket", k, num);
                    metrics_buf_printf(out, " %llu\n", (unsigned long long)cum);
                }
                put_series(out, f, "_sum", k, NULL);
                fmt_double(num, sizeof num, h->sum);
                metrics_buf_printf(out, " %s\n", num);
                put_series(out, f, "_count", k, NULL);
                metrics_buf_printf(out, " %llu\n", (unsigned long long)h->count);
            }
        }
    }
    return out->failed ? -1 : 0;
}

/* ---- history ---------------------------------------------------------- */

static uint64_t *ring_row(const metrics_registry *r, uint32_t row)
{
    return r->ring + (size_t)row * r->lim.max_window_slots;
}

void metrics_tick(metrics_registry *r, double now_s)
{
    if (r->ring_count > 0 && !(now_s >= r->ring_t[r->ring_head] + 0.5))
        return;
    uint32_t row = r->ring_count ? (r->ring_head + 1) % METRICS_RING_LEN : 0;
    uint64_t *slot = ring_row(r, row);
    for (uint32_t fi = 0; fi < r->n_fam; fi++) {
        const metrics_family *f = &r->fam[fi];
        if (!f->windowed)
            continue;
        uint64_t *p = slot + f->ring_off;
        for (uint32_t i = 0; i < f->n_series; i++) {
            uint32_t k = f->first + i;
            if (f->kind == METRICS_COUNTER) {
                *p++ = r->counters[k].v;
            } else {
                metrics_hist *h = &r->hists[k];
                memcpy(p, h->counts, (h->n_bounds + 1) * sizeof *p);
                p += h->n_bounds + 1;
                memcpy(p++, &h->tick_max, sizeof h->tick_max);
                h->tick_max = NAN;
            }
        }
    }
    r->ring_t[row] = now_s;
    r->ring_head = row;
    if (r->ring_count < METRICS_RING_LEN)
        r->ring_count++;
}

/* Rows "now" and "then" of a window; returns the number of rows back
 * (0 when there is no usable pair). */
static uint32_t window_rows(const metrics_registry *r, uint32_t window_s,
                            uint32_t *now_row, uint32_t *then_row)
{
    if (r->ring_count < 2)
        return 0;
    uint32_t h = r->ring_head;
    double t_now = r->ring_t[h];
    uint32_t back = 0;
    for (uint32_t k = 1; k < r->ring_count; k++) {
        uint32_t row = (h + METRICS_RING_LEN - k) % METRICS_RING_LEN;
        if (t_now - r->ring_t[row] > (double)window_s + 1e-9)
            break;
        back = k;
    }
    *now_row = h;
    *then_row = (h + METRICS_RING_LEN - back) % METRICS_RING_LEN;
    return back;
}

double metrics_rate(const metrics_registry *r, const metrics_family *f,
                    uint32_t i, uint32_t window_s)
{
    uint32_t now_row, then_row;
    if (!f || !f->windowed || i >= f->n_series ||
        window_rows(r, window_s, &now_row, &then_row) == 0)
        return 0.0;
    /* A counter's slot is its value; a histogram's count is the sum of its
     * bucket slots. */
    uint32_t off = f->ring_off + i * f->ring_width;
    uint32_t n = f->kind == METRICS_COUNTER ? 1 : f->n_bounds + 1;
    uint64_t a = 0, b = 0;
    for (uint32_t s = 0; s < n; s++) {
        a += ring_row(r, now_row)[off + s];
        b += ring_row(r, then_row)[off + s];
    }
    double dt = r->ring_t[now_row] - r->ring_t[then_row];
    return dt > 0 ? (double)(a - b) / dt : 0.0;
}

double metrics_quantile_of_buckets(const double *bounds, uint32_t n_bounds,
                                   const uint64_t *counts, double q)
{
    uint64_t total = 0;
    for (uint32_t b = 0; b <= n_bounds; b++)
        total += counts[b];
    if (total == 0 || !(q >= 0.0 && q <= 1.0))
        return NAN;
    double rank = q * (double)total;
    /* First finite bucket whose cumulative count reaches the rank; the
     * +Inf bucket when none does. */
    uint64_t cum = 0, prev = 0;
    uint32_t b = 0;
    for (; b < n_bounds; b++) {
        prev = cum;
        cum += counts[b];
        if ((double)cum >= rank)
            break;
    }
    if (b == n_bounds)
        return bounds[n_bounds - 1];
    if (b == 0 && bounds[0] <= 0)
        return bounds[0];
    double start = b == 0 ? 0.0 : bounds[b - 1];
    double end = bounds[b];
    double in_bucket = (double)(cum - prev);
    return start + (end - start) * ((rank - (double)prev) / in_bucket);
}

double metrics_hist_quantile(const metrics_hist *h, double q)
{
    return metrics_quantile_of_buckets(h->bounds, h->n_bounds, h->counts, q);
}

double metrics_window_quantile(const metrics_registry *r,
                               const metrics_family *f, uint32_t i,
                               uint32_t window_s, double q)
{
    uint32_t now_row, then_row;
    if (!f || f->kind != METRICS_HISTOGRAM || !f->windowed ||
        i >= f->n_series || window_rows(r, window_s, &now_row, &then_row) == 0)
        return NAN;
    uint64_t delta[METRICS_MAX_BOUNDS + 1];
    uint32_t off = f->ring_off + i * f->ring_width;
    for (uint32_t b = 0; b <= f->n_bounds; b++)
        delta[b] = ring_row(r, now_row)[off + b] - ring_row(r, then_row)[off + b];
    return metrics_quantile_of_buckets(f->bounds, f->n_bounds, delta, q);
}

double metrics_window_max(const metrics_registry *r, const metrics_family *f,
                          uint32_t i, uint32_t window_s)
{
    uint32_t now_row, then_row;
    uint32_t back;
    if (!f || f->kind != METRICS_HISTOGRAM || !f->windowed ||
        i >= f->n_series ||
        (back = window_rows(r, window_s, &now_row, &then_row)) == 0)
        return NAN;
    uint32_t off = f->ring_off + i * f->ring_width + f->n_bounds + 1;
    double best = NAN;
    /* Rows then+1 .. now each hold the maximum of the second before them. */
    for (uint32_t k = 0; k < back; k++) {
        uint32_t row = (now_row + METRICS_RING_LEN - k) % METRICS_RING_LEN;
        double v;
        memcpy(&v, &ring_row(r, row)[off], sizeof v);
        if (!isnan(v) && (isnan(best) || v > best))
            best = v;
    }
    return best;
}
