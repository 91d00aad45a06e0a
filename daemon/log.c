/*
 * log.c - leveled structured logging (see log.h for the contract).
 *
 * A line is built in a stack buffer by a small bounded writer (lb_*), then
 * written with one write(2) under the sink's mutex, so concurrent lines
 * never interleave and no allocation happens on any path.  The rate
 * limiter is a fixed open-addressed table keyed by a hash of the format
 * string (or of a caller's key text, digit runs folded); when it is full,
 * new keys pass unlimited (a log line is never lost because the table is
 * small).
 */
#include "log.h"

#include <errno.h>
#include <math.h>
#include <stdio.h>
#include <string.h>
#include <time.h>
#include <unistd.h>

/* ---- bounded line builder -------------------------------------------- */

typedef struct lb {
    char *buf;
    size_t cap;  /* usable bytes, one kept for the NUL */
    size_t len;
    int overflow;
} lb;

static void lb_putc(lb *b, char ch)
{
    if (b->len + 1 < b->cap)
        b->buf[b->len++] = ch;
    else
        b->overflow = 1;
}

static void lb_puts(lb *b, const char *s)
{
    while (*s != '\0')
        lb_putc(b, *s++);
}

static void lb_printf(lb *b, const char *fmt, ...)
    __attribute__((format(printf, 2, 3)));
static void lb_printf(lb *b, const char *fmt, ...)
{
    char tmp[64];
    va_list ap;
    va_start(ap, fmt);
    vsnprintf(tmp, sizeof tmp, fmt, ap);
    va_end(ap);
    lb_puts(b, tmp);
}

/* JSON string body escaping (RFC 8259): quote, backslash, controls. */
static void lb_json_escaped(lb *b, const char *s)
{
    for (; *s != '\0'; s++) {
        unsigned char ch = (unsigned char)*s;
        switch (ch) {
        case '"': lb_puts(b, "\\\""); break;
        case '\\': lb_puts(b, "\\\\"); break;
        case '\n': lb_puts(b, "\\n"); break;
        case '\r': lb_puts(b, "\\r"); break;
        case '\t': lb_puts(b, "\\t"); break;
        default:
            if (ch < 0x20)
                lb_printf(b, "\\u%04x", ch);
            else
                lb_putc(b, (char)ch);
        }
    }
}

static int text_needs_quotes(const char *s)
{
    if (*s == '\0')
        return 1;
    for (; *s != '\0'; s++) {
        unsigned char ch = (unsigned char)*s;
        if (ch <= ' ' || ch == '=' || ch == '"' || ch == '\\' || ch == 0x7f)
            return 1;
    }
    return 0;
}

/* Text message body: one physical line, so newlines become "\n". */
static void lb_text_body(lb *b, const char *s)
{
    for (; *s != '\0'; s++) {
        if (*s == '\n')
            lb_puts(b, "\\n");
        else if (*s == '\r')
            lb_puts(b, "\\r");
        else
            lb_putc(b, *s);
    }
}

static void lb_text_value(lb *b, const char *s)
{
    if (!text_needs_quotes(s)) {
        lb_puts(b, s);
        return;
    }
    lb_putc(b, '"');
    lb_json_escaped(b, s);
    lb_putc(b, '"');
}

static void lb_field(lb *b, int json, const log_field *f)
{
    if (f->key == NULL)
        return;
    if (json) {
        lb_puts(b, ",\"");
        lb_json_escaped(b, f->key);
        lb_puts(b, "\":");
    } else {
        lb_putc(b, ' ');
        lb_puts(b, f->key);
        lb_putc(b, '=');
    }
    switch (f->type) {
    case LOG_FIELD_STR: {
        const char *s = f->v.s != NULL ? f->v.s : "";
        if (json) {
            lb_putc(b, '"');
            lb_json_escaped(b, s);
            lb_putc(b, '"');
        } else {
            lb_text_value(b, s);
        }
        break;
    }
    case LOG_FIELD_INT: lb_printf(b, "%lld", f->v.i); break;
    case LOG_FIELD_UINT: lb_printf(b, "%llu", f->v.u); break;
    case LOG_FIELD_DOUBLE:
        if (isfinite(f->v.d))
            lb_printf(b, "%.10g", f->v.d);
        else
            lb_puts(b, json ? "null" : (isnan(f->v.d) ? "nan" : "inf"));
        break;
    }
}

/* ---- context walking ------------------------------------------------- */

static const char *ctx_component(const log_ctx *c)
{
    for (; c != NULL; c = c->parent)
        if (c->component != NULL)
            return c->component;
    return NULL;
}

static void lb_ctx_fields(lb *b, int json, const log_ctx *c)
{
    if (c == NULL)
        return;
    lb_ctx_fields(b, json, c->parent); /* outermost first */
    for (size_t i = 0; i < c->n_fields; i++)
        lb_field(b, json, &c->fields[i]);
}

static const char *const level_names[] = {"error", "warn", "info", "debug"};
static const char *const level_tags[] = {"ERROR", "WARN ", "INFO ", "DEBUG"};

const char *log_level_name(log_level level)
{
    if ((unsigned)level > LOG_LEVEL_DEBUG)
        return "?";
    return level_names[level];
}

int log_level_parse(const char *name, log_level *out)
{
    for (unsigned i = 0; i <= LOG_LEVEL_DEBUG; i++) {
        if (strcmp(name, level_names[i]) == 0) {
            *out = (log_level)i;
            return 0;
        }
    }
    return -1;
}

static void lb_timestamp(lb *b, uint64_t now_ms)
{
    time_t secs = (time_t)(now_ms / 1000u);
    struct tm tm;
    char tmp[40];
    if (gmtime_r(&secs, &tm) == NULL) {
        lb_puts(b, "1970-01-01T00:00:00.000Z");
        return;
    }
    strftime(tmp, sizeof tmp, "%Y-%m-%dT%H:%M:%S", &tm);
    lb_puts(b, tmp);
    lb_printf(b, ".%03uZ", (unsigned)(now_ms % 1000u));
}

static size_t build_line(const log_ctx *c, log_level level, uint64_t now_ms,
                         const log_field *fields, size_t n_fields,
                         const char *msg, int with_fields, char *buf,
                         size_t cap)
{
    int json = c->sink->format == LOG_FORMAT_JSON;
    const char *comp = ctx_component(c);
    lb b = {buf, cap, 0, 0};
    unsigned lv = (unsigned)level <= LOG_LEVEL_DEBUG ? (unsigned)level : 0;

    if (json) {
        lb_puts(&b, "{\"ts\":\"");
        lb_timestamp(&b, now_ms);
        lb_puts(&b, "\",\"level\":\"");
        lb_puts(&b, level_names[lv]);
        lb_putc(&b, '"');
        if (comp != NULL) {
            lb_puts(&b, ",\"component\":\"");
            lb_json_escaped(&b, comp);
            lb_putc(&b, '"');
        }
        lb_puts(&b, ",\"msg\":\"");
        lb_json_escaped(&b, msg);
        lb_putc(&b, '"');
        if (with_fields) {
            lb_ctx_fields(&b, 1, c);
            for (size_t i = 0; i < n_fields; i++)
                lb_field(&b, 1, &fields[i]);
        } else {
            lb_puts(&b, ",\"truncated\":true");
        }
        lb_puts(&b, "}\n");
    } else {
        lb_timestamp(&b, now_ms);
        lb_putc(&b, ' ');
        lb_puts(&b, level_tags[lv]);
        lb_putc(&b, ' ');
        if (comp != NULL) {
            lb_puts(&b, comp);
            lb_puts(&b, ": ");
        }
        lb_text_body(&b, msg);
        if (with_fields) {
            lb_ctx_fields(&b, 0, c);
            for (size_t i = 0; i < n_fields; i++)
                lb_field(&b, 0, &fields[i]);
        }
        lb_putc(&b, '\n');
    }
    if (b.overflow)
        return (size_t)-1;
    b.buf[b.len] = '\0';
    return b.len;
}

size_t log_format_line(const log_ctx *c, log_level level, uint64_t now_ms,
                       const log_field *fields, size_t n_fields,
                       char *buf, size_t cap, const char *fmt, va_list ap)
{
    char msg[1024];
    int m;
    size_t len;

    if (cap < 64)
        return 0;
    m = vsnprintf(msg, sizeof msg, fmt, ap);
    if (m < 0)
        snprintf(msg, sizeof msg, "(bad log format: %s)", fmt);
    else if ((size_t)m >= sizeof msg)
        memcpy(msg + sizeof msg - 4, "...", 4);

    len = build_line(c, level, now_ms, fields, n_fields, msg, 1, buf, cap);
    if (len != (size_t)-1)
        return len;
    /* Too long: keep a valid line.  Shorten the message, drop the fields
     * (JSON says so with "truncated":true; text ends in "..."). */
    if (strlen(msg) > 200)
        memcpy(msg + 197, "...", 4);
    len = build_line(c, level, now_ms, NULL, 0, msg, 0, buf, cap);
    if (len != (size_t)-1 && c->sink->format != LOG_FORMAT_JSON &&
        len + 4 < cap) {
        memcpy(buf + len - 1, " ...\n", 6);
        len += 4;
    }
    return len == (size_t)-1 ? 0 : len;
}

/* ---- sink -------------------------------------------------------------- */

static uint64_t sink_now_ms(const log_sink *s)
{
    struct timespec ts;
    if (s->clock != NULL)
        return s->clock(s->clock_arg);
    clock_gettime(CLOCK_REALTIME, &ts);
    return (uint64_t)ts.tv_sec * 1000u + (uint64_t)ts.tv_nsec / 1000000u;
}

static void sink_write(log_sink *s, const char *line, size_t len)
{
    if (len == 0)
        return;
    if (s->write != NULL) {
        s->write(s->write_arg, line, len);
        return;
    }
    while (len > 0) {
        ssize_t w = write(s->fd, line, len);
        if (w < 0) {
            if (errno == EINTR)
                continue;
            return; /* nowhere left to report a logging failure */
        }
        line += w;
        len -= (size_t)w;
    }
}

int log_sink_init(log_sink *s)
{
    memset(s, 0, sizeof *s);
    s->level = LOG_LEVEL_INFO;
    s->format = LOG_FORMAT_TEXT;
    s->fd = 2;
    s->limit_burst = 10;
    s->limit_interval_ms = 60000;
    return pthread_mutex_init(&s->lock, NULL) == 0 ? 0 : -1;
}

void log_sink_set_level(log_sink *s, log_level level)
{
    s->level = (int)level;
}

void log_sink_set_format(log_sink *s, log_format format)
{
    s->format = (int)format;
}

static uint64_t limit_key(const char *text, log_level level, int keyed)
{
    /* FNV-1a 64 over the text and the level; never 0.  In a caller's key
     * a run of digits hashes as one '#', and the two kinds of key hash
     * apart. */
    uint64_t h = 1469598103934665603ull ^ (uint64_t)level ^ (keyed ? 0x100u : 0u);
    for (const unsigned char *p = (const unsigned char *)text; *p; p++) {
        unsigned char ch = *p;
        if (keyed && ch >= '0' && ch <= '9') {
            while (p[1] >= '0' && p[1] <= '9')
                p++;
            ch = '#';
        }
        h ^= ch;
        h *= 1099511628211ull;
    }
    return h == 0 ? 1 : h;
}

static void emit_suppressed(log_sink *s, const log_limit_slot *slot,
                            uint64_t now_ms)
{
    char line[LOG_LINE_MAX];
    char msg[320];
    log_ctx c;
    log_field f = LOG_UINT("suppressed", slot->suppressed);
    size_t len;

    log_ctx_init(&c, s, "log");
    snprintf(msg, sizeof msg, "suppressed %u similar messages (like \"%s\")",
             slot->suppressed, slot->text);
    len = build_line(&c, slot->level, now_ms, &f, 1, msg, 1, line, sizeof line);
    if (len != (size_t)-1)
        sink_write(s, line, len);
}

/* Under the lock: 1 = write this line, 0 = drop (counted).  text is the
 * format string, or the caller's key when keyed. */
static int limiter_admit(log_sink *s, log_level level, const char *text,
                         int keyed, uint64_t now_ms)
{
    uint64_t key;
    log_limit_slot *slot = NULL;

    if (level > LOG_LEVEL_WARN || s->limit_interval_ms == 0)
        return 1;
    key = limit_key(text, level, keyed);
    for (unsigned probe = 0; probe < LOG_LIMIT_SLOTS; probe++) {
        log_limit_slot *t = &s->slots[(key + probe) % LOG_LIMIT_SLOTS];
        if (t->key == key || t->key == 0) {
            slot = t;
            break;
        }
    }
    if (slot == NULL)
        return 1; /* table full: never lose a line for want of a slot */
    if (slot->key == 0) {
        slot->key = key;
        snprintf(slot->text, sizeof slot->text, "%s", text);
        slot->level = level;
        slot->window_start_ms = now_ms;
        slot->count = 0;
        slot->suppressed = 0;
    } else if (now_ms - slot->window_start_ms >= s->limit_interval_ms ||
               now_ms < slot->window_start_ms) {
        if (slot->suppressed > 0)
            emit_suppressed(s, slot, now_ms);
        slot->window_start_ms = now_ms;
        slot->count = 0;
        slot->suppressed = 0;
    }
    if (slot->count < s->limit_burst) {
        slot->count++;
        return 1;
    }
    slot->suppressed++;
    return 0;
}

unsigned log_sink_flush_suppressed(log_sink *s)
{
    unsigned lines = 0;
    uint64_t now = sink_now_ms(s);
    pthread_mutex_lock(&s->lock);
    for (unsigned i = 0; i < LOG_LIMIT_SLOTS; i++) {
        log_limit_slot *t = &s->slots[i];
        if (t->key == 0 || t->suppressed == 0)
            continue;
        if (now - t->window_start_ms < s->limit_interval_ms &&
            now >= t->window_start_ms)
            continue;
        emit_suppressed(s, t, now);
        t->suppressed = 0;
        t->count = 0;
        t->window_start_ms = now;
        lines++;
    }
    pthread_mutex_unlock(&s->lock);
    return lines;
}

void log_sink_destroy(log_sink *s)
{
    uint64_t now = sink_now_ms(s);
    pthread_mutex_lock(&s->lock);
    for (unsigned i = 0; i < LOG_LIMIT_SLOTS; i++) {
        if (s->slots[i].key != 0 && s->slots[i].suppressed > 0) {
            emit_suppressed(s, &s->slots[i], now);
            s->slots[i].suppressed = 0;
        }
    }
    pthread_mutex_unlock(&s->lock);
    pthread_mutex_destroy(&s->lock);
}

/* ---- contexts ---------------------------------------------------------- */

void log_ctx_init(log_ctx *c, log_sink *s, const char *component)
{
    memset(c, 0, sizeof *c);
    c->sink = s;
    c->component = component;
}

void log_ctx_child(log_ctx *child, const log_ctx *parent,
                   const char *component, const log_field *fields, size_t n)
{
    memset(child, 0, sizeof *child);
    child->sink = parent->sink;
    child->parent = parent;
    child->component = component;
    if (n > LOG_CTX_FIELDS)
        n = LOG_CTX_FIELDS;
    if (n > 0)
        memcpy(child->fields, fields, n * sizeof *fields);
    child->n_fields = n;
}

static void emit(const log_ctx *c, log_level level, const char *key,
                 const log_field *fields, size_t n_fields, const char *fmt,
                 va_list ap)
{
    char line[LOG_LINE_MAX];
    log_sink *s = c->sink;
    uint64_t now;
    size_t len;

    pthread_mutex_lock(&s->lock);
    now = sink_now_ms(s);
    if (limiter_admit(s, level, key != NULL ? key : fmt, key != NULL, now)) {
        len = log_format_line(c, level, now, fields, n_fields, line,
                              sizeof line, fmt, ap);
        sink_write(s, line, len);
    }
    pthread_mutex_unlock(&s->lock);
}

void log_emit(const log_ctx *c, log_level level, const log_field *fields,
              size_t n_fields, const char *fmt, ...)
{
    va_list ap;

    if (!log_enabled(c, level))
        return;
    va_start(ap, fmt);
    emit(c, level, NULL, fields, n_fields, fmt, ap);
    va_end(ap);
}

void log_emit_keyed(const log_ctx *c, log_level level, const char *key,
                    const log_field *fields, size_t n_fields, const char *fmt,
                    ...)
{
    va_list ap;

    if (!log_enabled(c, level))
        return;
    va_start(ap, fmt);
    emit(c, level, key, fields, n_fields, fmt, ap);
    va_end(ap);
}

/* ---- the process-wide fallback ------------------------------------------ */

static log_sink default_sink;
static log_ctx default_ctx;
static pthread_once_t default_once = PTHREAD_ONCE_INIT;

static void default_init(void)
{
    log_sink_init(&default_sink);
    log_ctx_init(&default_ctx, &default_sink, "oddsky");
}

log_ctx *log_default(void)
{
    pthread_once(&default_once, default_init);
    return &default_ctx;
}
