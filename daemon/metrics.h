/*
 * metrics.h - counters, gauges and latency histograms for the operator.
 *
 * Every metric is registered once at start into a registry whose capacity
 * is fixed by metrics_new(); registration hands back the family, and the
 * hot path updates its series through plain increments on the structs
 * below (no lookup, no lock, no allocation: the daemon is single-threaded
 * on a libuv loop).  A family has at most one label with a small fixed set
 * of values (e.g. reason for dead letters, partition); series i of a
 * family is label value i.
 *
 * Two readers:
 * - metrics_render() writes the Prometheus text format 0.0.4 (names
 *   prefixed "oddsky_", HELP and TYPE once per name, cumulative buckets,
 *   escaped label values) into a growable buffer;
 * - the per-second history (metrics_tick(), called from a 1 s timer) keeps
 *   a ring of snapshots of the families registered "windowed", from which
 *   metrics_rate() gives rates over the last 1 or 5 minutes and
 *   metrics_window_quantile() latency quantiles over the same windows, for
 *   the /status document.
 *
 * Invariants: all memory is allocated by metrics_new(); after it returns,
 * registration, updates, ticks and rendering into a buffer of sufficient
 * capacity allocate nothing.  Histogram bucket counts are stored per
 * bucket (not cumulative); rendering accumulates them.
 */
#ifndef ODDSKY_DAEMON_METRICS_H
#define ODDSKY_DAEMON_METRICS_H

#include <stddef.h>
#include <stdint.h>

#define METRICS_PREFIX "oddsky_"
#define METRICS_MAX_NAME 96u        /* bytes of a name, prefix excluded */
#define METRICS_MAX_LABEL_VALUE 48u /* bytes of one label value */
#define METRICS_MAX_BOUNDS 32u      /* finite bucket bounds per histogram */
#define METRICS_WINDOW_MAX_S 300u   /* longest rate/quantile window */

/* ---- growable text buffer (also used by the status server) ---------- */

typedef struct metrics_buf {
    char *data; /* NUL-terminated when len > 0 or after any append */
    size_t len;
    size_t cap;
    int failed; /* an append ran out of memory; contents are truncated */
} metrics_buf;

/* Start empty; nothing allocated until the first append. */
void metrics_buf_init(metrics_buf *b);
/* Release the memory; b is empty again (and reusable). */
void metrics_buf_free(metrics_buf *b);
/* Forget the contents, keep the memory. */
void metrics_buf_reset(metrics_buf *b);
/* Ensure room for extra more bytes (plus a NUL).  0 or -1 (and failed). */
int metrics_buf_reserve(metrics_buf *b, size_t extra);
/* Append n bytes / a string / printf output.  Return 0, or -1 after a
 * failed allocation (b->failed set; later appends are no-ops). */
int metrics_buf_append(metrics_buf *b, const char *s, size_t n);
int metrics_buf_puts(metrics_buf *b, const char *s);
int metrics_buf_printf(metrics_buf *b, const char *fmt, ...)
    __attribute__((format(printf, 2, 3)));

/* ---- the hot-path types ---------------------------------------------- */

typedef enum metrics_kind {
    METRICS_COUNTER = 0,  /* monotonic uint64, name must end in _total */
    METRICS_GAUGE = 1,    /* double, set freely */
    METRICS_HISTOGRAM = 2 /* fixed finite bounds plus +Inf */
} metrics_kind;

typedef struct metrics_counter {
    uint64_t v;
} metrics_counter;

typedef struct metrics_gauge {
    double v;
} metrics_gauge;

typedef struct metrics_hist {
    const double *bounds; /* n_bounds increasing finite upper bounds */
    uint32_t n_bounds;
    uint64_t *counts;     /* n_bounds + 1 per-bucket counts, last = +Inf */
    uint64_t count;
    double sum;
    double max;           /* largest value ever observed */
    double tick_max;      /* largest value since the last metrics_tick */
} metrics_hist;

static inline void metrics_inc(metrics_counter *c) { c->v++; }
static inline void metrics_add(metrics_counter *c, uint64_t n) { c->v += n; }
static inline void metrics_set(metrics_gauge *g, double v) { g->v = v; }

/* Count v in its bucket (the first bound >= v; NaN goes to +Inf and is
 * left out of sum and max). */
void metrics_observe(metrics_hist *h, double v);

/* ---- registry -------------------------------------------------------- */

typedef struct metrics_registry metrics_registry;
typedef struct metrics_family metrics_family;

/* Capacities; a zero field takes the default shown. */
typedef struct metrics_limits {
    uint32_t max_families;     /* 64 */
    uint32_t max_series;       /* 512, over all families */
    uint32_t max_bucket_slots; /* 4096, sum over histogram series of n_bounds+1 */
    uint32_t max_window_slots; /* 256 values tracked per second: 1 per
                                * counter series, n_bounds + 2 per
                                * histogram series */
} metrics_limits;

/* What to register.  Strings are copied. */
typedef struct metrics_spec {
    const char *name;  /* without "oddsky_"; [a-zA-Z_:][a-zA-Z0-9_:]* */
    const char *help;  /* < 256 bytes; \ and newlines are escaped */
    metrics_kind kind;
    const char *label; /* label name or NULL for one unlabelled series */
    const char *const *values; /* n_values label values; a NULL entry is
                                * unnamed until metrics_label_set() and
                                * not rendered until then */
    uint32_t n_values;
    const double *bounds; /* histograms: strictly increasing finite bounds */
    uint32_t n_bounds;    /* 1..METRICS_MAX_BOUNDS */
    int windowed;         /* keep per-second history (rates, quantiles) */
} metrics_spec;

/* Allocate a registry with the given capacities (lim may be NULL).
 * Returns NULL when out of memory. */
metrics_registry *metrics_new(const metrics_limits *lim);
void metrics_free(metrics_registry *r);

/* Register a family.  Returns it, or NULL with a reason in err (err may be
 * NULL): bad name (a counter not ending in _total, a histogram name ending
 * in _bucket/_sum/_count, invalid characters), duplicate name, bad label
 * name ("le" on a histogram, leading "__"), label without values, bounds
 * not strictly increasing or not finite, capacity exhausted.  Never
 * allocates. */
metrics_family *metrics_register(metrics_registry *r, const metrics_spec *s,
                                 char *err, size_t err_len);

/* Series i of a family (i < its number of series, else NULL); the pointer
 * is stable for the registry's lifetime.  Calling the wrong accessor for
 * the kind returns NULL. */
metrics_counter *metrics_counter_at(metrics_family *f, uint32_t i);
metrics_gauge *metrics_gauge_at(metrics_family *f, uint32_t i);
metrics_hist *metrics_hist_at(metrics_family *f, uint32_t i);

/* Number of series of a family (1 when unlabelled). */
uint32_t metrics_series(const metrics_family *f);

/* Name (or rename) label value i of a family, e.g. when a partition is
 * assigned.  Returns 0, or -1 for a bad index or a value longer than
 * METRICS_MAX_LABEL_VALUE - 1 bytes.  Passing NULL hides the series. */
int metrics_label_set(metrics_family *f, uint32_t i, const char *value);

/* Look a family up by name (without prefix); NULL when absent. */
metrics_family *metrics_find(metrics_registry *r, const char *name);

/* Append the Prometheus text format 0.0.4 of every family, in
 * registration order, to out.  Returns 0, or -1 when out ran out of
 * memory. */
int metrics_render(const metrics_registry *r, metrics_buf *out);

/* ---- per-second history ---------------------------------------------- */

/* Take a snapshot of every windowed series at monotonic time now_s
 * (seconds, any origin; call about once a second) and reset the
 * histograms' tick_max.  A call less than 0.5 s after the previous
 * recorded tick (or earlier than it) is ignored, so the ring of
 * METRICS_WINDOW_MAX_S + 1 snapshots always spans the longest window. */
void metrics_tick(metrics_registry *r, double now_s);

/* Per-second rate of counter series i (or of a histogram's count) over
 * the last window_s seconds of history: (v_now - v_then) / (t_now -
 * t_then), with "now" the latest snapshot and "then" the oldest snapshot
 * no more than window_s seconds before it (fewer seconds when the history
 * is shorter).  0 with fewer than two snapshots or for a family not
 * windowed. */
double metrics_rate(const metrics_registry *r, const metrics_family *f,
                    uint32_t i, uint32_t window_s);

/* Quantile q in [0,1] of histogram series i over all time, by linear
 * interpolation inside the bucket holding rank q*count (the lowest bucket
 * starts at 0 when its bound is positive; a rank in +Inf gives the highest
 * finite bound), as Prometheus' histogram_quantile() does.  NaN when the
 * histogram is empty or q is outside [0,1]. */
double metrics_hist_quantile(const metrics_hist *h, double q);

/* The same over the bucket increments of the last window_s seconds of
 * history (see metrics_rate for the window).  NaN when nothing was
 * observed in the window or the family is not windowed. */
double metrics_window_quantile(const metrics_registry *r,
                               const metrics_family *f, uint32_t i,
                               uint32_t window_s, double q);

/* Largest value observed in the window (from per-tick maxima); NaN when
 * nothing was observed or the family is not windowed. */
double metrics_window_max(const metrics_registry *r, const metrics_family *f,
                          uint32_t i, uint32_t window_s);

/* Helper for the counts above: quantile of bucket counts given directly
 * (n_bounds + 1 per-bucket counts, last = +Inf).  NaN when empty. */
double metrics_quantile_of_buckets(const double *bounds, uint32_t n_bounds,
                                   const uint64_t *counts, double q);

#endif
