/*
 * log.h - leveled, structured logging to stderr.
 *
 * A log_sink is the process's one output: level, format (text or JSON
 * lines), the file descriptor, the clock and the rate limiter.  main owns
 * it and hands a pointer down.  A log_ctx is a cheap, caller-owned view on
 * a sink that carries a component name and key=value context fields
 * (partition, offset...); a child context adds fields to its parent's, so a
 * module makes one context per unit of work without copying.
 *
 * Design choices:
 * - The macros test the level before evaluating any argument (as redis'
 *   serverLog does), so a debug line with an expensive argument costs one
 *   compare when debug is off.
 * - A line is formatted into a stack buffer and written with one write(2),
 *   so lines from several threads (librdkafka's callbacks) never interleave.
 * - Timestamps are ISO-8601 UTC with milliseconds: 2025-03-01T21:04:05.123Z.
 * - Rate limiting: warnings and errors with the same message key (the
 *   format string of the call site, or the text given to the *_keyed
 *   variants) are let through at most `burst` times per `interval_ms`; the
 *   rest are counted, and the next line of that key after the window (or
 *   log_sink_flush_suppressed()) first writes "suppressed K similar
 *   messages".  Info and debug are never limited.  Lines relayed from a
 *   library through one "%s" call site use a keyed variant, so that
 *   distinct messages do not count against each other; digits do not
 *   count in such a key, so one message repeated with changing numbers
 *   (a port, a duration, a count) is still one flood.
 *
 * Invariants: a sink must outlive every context pointing to it; a context
 * must outlive its children.  Field keys and string values are borrowed
 * for the duration of the call (context fields: for the context's life).
 * The sink is thread-safe (one mutex around the limiter and the write);
 * contexts are read-only once built and may be shared.
 */
#ifndef ODDSKY_DAEMON_LOG_H
#define ODDSKY_DAEMON_LOG_H

#include <pthread.h>
#include <stdarg.h>
#include <stddef.h>
#include <stdint.h>

typedef enum log_level {
    LOG_LEVEL_ERROR = 0,
    LOG_LEVEL_WARN = 1,
    LOG_LEVEL_INFO = 2,
    LOG_LEVEL_DEBUG = 3
} log_level;

typedef enum log_format {
    LOG_FORMAT_TEXT = 0, /* 2025-...Z INFO  bus: text key=value ... */
    LOG_FORMAT_JSON = 1  /* {"ts":...,"level":...,"component":...,"msg":...,key:value} */
} log_format;

typedef enum log_field_type {
    LOG_FIELD_STR = 0,
    LOG_FIELD_INT = 1,
    LOG_FIELD_UINT = 2,
    LOG_FIELD_DOUBLE = 3
} log_field_type;

typedef struct log_field {
    const char *key;
    log_field_type type;
    union {
        const char *s;
        long long i;
        unsigned long long u;
        double d;
    } v;
} log_field;

/* Field constructors for the *_kv macros and log_ctx_child(). */
#define LOG_STR(k, val) ((log_field){.key = (k), .type = LOG_FIELD_STR, .v.s = (val)})
#define LOG_INT(k, val) ((log_field){.key = (k), .type = LOG_FIELD_INT, .v.i = (long long)(val)})
#define LOG_UINT(k, val) ((log_field){.key = (k), .type = LOG_FIELD_UINT, .v.u = (unsigned long long)(val)})
#define LOG_DBL(k, val) ((log_field){.key = (k), .type = LOG_FIELD_DOUBLE, .v.d = (double)(val)})
/* LOG_KV(f1, f2, ...) expands to "array, count" for the *_kv macros. */
#define LOG_KV(...) (const log_field[]){__VA_ARGS__}, \
    (sizeof((const log_field[]){__VA_ARGS__}) / sizeof(log_field))

#define LOG_LIMIT_SLOTS 64u   /* distinct rate-limited keys tracked at once */
#define LOG_LIMIT_TEXT 160u   /* bytes of a key kept for its "suppressed" line */
#define LOG_CTX_FIELDS 6u     /* context fields per context level */
#define LOG_LINE_MAX 2048u    /* longer lines are truncated, marked "..." */

typedef struct log_limit_slot {
    uint64_t key;             /* hash of the message key; 0 = free */
    uint64_t window_start_ms;
    uint32_t count;           /* lines let through in this window */
    uint32_t suppressed;      /* lines dropped in this window */
    log_level level;
    char text[LOG_LIMIT_TEXT]; /* the key's text (cut), for the suppressed line */
} log_limit_slot;

typedef void (*log_write_fn)(void *arg, const char *line, size_t len);
typedef uint64_t (*log_clock_fn)(void *arg); /* ms since the Unix epoch */

typedef struct log_sink {
    volatile int level;       /* log_level; may change on SIGHUP */
    volatile int format;      /* log_format */
    int fd;                   /* default 2 (stderr) */
    log_write_fn write;       /* NULL: write(2) to fd; else called per line */
    void *write_arg;
    log_clock_fn clock;       /* NULL: CLOCK_REALTIME */
    void *clock_arg;
    uint32_t limit_burst;     /* lines per key per window, default 10 */
    uint32_t limit_interval_ms; /* window, default 60000; 0 = no limiting */
    pthread_mutex_t lock;
    log_limit_slot slots[LOG_LIMIT_SLOTS];
} log_sink;

typedef struct log_ctx {
    log_sink *sink;
    const struct log_ctx *parent; /* its fields come first; may be NULL */
    const char *component;        /* NULL: inherit the parent's */
    size_t n_fields;
    log_field fields[LOG_CTX_FIELDS];
} log_ctx;

/* Initialise a sink: level info, text, fd 2, burst 10 per 60 s.  Returns 0
 * or -1 if the mutex cannot be created.  Call log_sink_destroy() at exit. */
int log_sink_init(log_sink *s);

/* Write pending "suppressed K" lines, then destroy the mutex. */
void log_sink_destroy(log_sink *s);

/* Change level / format at run time (SIGHUP).  Safe from any thread. */
void log_sink_set_level(log_sink *s, log_level level);
void log_sink_set_format(log_sink *s, log_format format);

/* Write "suppressed K similar messages" for every key whose window has
 * ended with drops (call from the periodic timer).  Returns lines written. */
unsigned log_sink_flush_suppressed(log_sink *s);

/* A root context on sink s with a component name (borrowed). */
void log_ctx_init(log_ctx *c, log_sink *s, const char *component);

/* A child of parent with up to LOG_CTX_FIELDS extra fields (copied; their
 * keys and string values are borrowed) and an optional component override
 * (NULL keeps the parent's).  Extra fields beyond the limit are dropped. */
void log_ctx_child(log_ctx *child, const log_ctx *parent,
                   const char *component, const log_field *fields, size_t n);

/* The process-wide fallback context (stderr, info, text, component
 * "oddsky"), for code that runs before a sink exists (argv parsing).  The
 * state behind it lives in log.c only. */
log_ctx *log_default(void);

/* Level names: "error" "warn" "info" "debug".  log_level_parse returns 0
 * and sets *out, or -1 for an unknown name. */
const char *log_level_name(log_level level);
int log_level_parse(const char *name, log_level *out);

/* Nonzero when a line at level would be written. */
static inline int log_enabled(const log_ctx *c, log_level level)
{
    return c != NULL && (int)level <= c->sink->level;
}

/* The functions behind the macros: no level check of their own beyond a
 * cheap repeat; prefer the macros. */
void log_emit(const log_ctx *c, log_level level, const log_field *fields,
              size_t n_fields, const char *fmt, ...)
    __attribute__((format(printf, 5, 6)));

/* As log_emit, with the rate limiter keyed by the text key (borrowed for
 * the call; runs of digits in it count as one character, see the top)
 * instead of fmt; a NULL key keys by fmt as log_emit does. */
void log_emit_keyed(const log_ctx *c, log_level level, const char *key,
                    const log_field *fields, size_t n_fields, const char *fmt,
                    ...) __attribute__((format(printf, 6, 7)));

/* Build one line into buf (no trailing newline added beyond the one the
 * line carries); returns its length.  Exposed for tests and for callers
 * that want the exact text (e.g. the status page's recent-errors box). */
size_t log_format_line(const log_ctx *c, log_level level, uint64_t now_ms,
                       const log_field *fields, size_t n_fields,
                       char *buf, size_t cap, const char *fmt, va_list ap);

#define log_at(ctx, lvl, ...)                                                \
    do {                                                                     \
        const log_ctx *log__c = (ctx);                                       \
        if (log_enabled(log__c, (lvl)))                                      \
            log_emit(log__c, (lvl), NULL, 0, __VA_ARGS__);                   \
    } while (0)

/* Usage: log_at_kv(ctx, LOG_LEVEL_WARN, LOG_KV(LOG_INT("partition", p)),
 *                  "decode failed: %s", why); */
#define log_at_kv(ctx, lvl, ...)                                             \
    do {                                                                     \
        const log_ctx *log__c = (ctx);                                       \
        if (log_enabled(log__c, (lvl)))                                      \
            log_emit(log__c, (lvl), __VA_ARGS__);                            \
    } while (0)

/* Usage: log_at_keyed_kv(ctx, LOG_LEVEL_WARN, key, LOG_KV(...), "%s", msg);
 * key is evaluated only when the level is enabled. */
#define log_at_keyed_kv(ctx, lvl, key, ...)                                  \
    do {                                                                     \
        const log_ctx *log__c = (ctx);                                       \
        if (log_enabled(log__c, (lvl)))                                      \
            log_emit_keyed(log__c, (lvl), (key), __VA_ARGS__);               \
    } while (0)

#define log_error(ctx, ...) log_at(ctx, LOG_LEVEL_ERROR, __VA_ARGS__)
#define log_warn(ctx, ...) log_at(ctx, LOG_LEVEL_WARN, __VA_ARGS__)
#define log_info(ctx, ...) log_at(ctx, LOG_LEVEL_INFO, __VA_ARGS__)
#define log_debug(ctx, ...) log_at(ctx, LOG_LEVEL_DEBUG, __VA_ARGS__)
#define log_error_kv(ctx, ...) log_at_kv(ctx, LOG_LEVEL_ERROR, __VA_ARGS__)
#define log_warn_kv(ctx, ...) log_at_kv(ctx, LOG_LEVEL_WARN, __VA_ARGS__)
#define log_info_kv(ctx, ...) log_at_kv(ctx, LOG_LEVEL_INFO, __VA_ARGS__)
#define log_debug_kv(ctx, ...) log_at_kv(ctx, LOG_LEVEL_DEBUG, __VA_ARGS__)

#endif
