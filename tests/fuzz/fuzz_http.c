// fuzz-sources: daemon/status.c daemon/metrics.c daemon/livepage.c
// fuzz-libs: -luv -lhttp_parser -ljansson -lm
/*
 * fuzz_http.c - libFuzzer target for the status endpoint's request
 * handling (status_session_feed: http_parser callbacks, limits, routing,
 * token check, responses), without sockets.
 *
 * The first input byte picks the chunk size the rest is fed in, so splits
 * across reads are explored too.  Invariants checked besides the
 * sanitizers: every response starts with a status line, a session that
 * said "close" stays closed and answers nothing more.
 */
#include <stdint.h>
#include <stdio.h>
#include <stdlib.h>
#include <string.h>

#include "daemon/metrics.h"
#include "daemon/status.h"

static metrics_registry *reg;
static int healthy_toggle;

static json_t *f_status(void *ctx)
{
    (void)ctx;
    return json_pack("{s:s, s:f, s:[i,i]}", "phase", "scoring", "uptime_s", 1.5,
                     "partitions", 1, 2);
}

static int f_healthy(void *ctx, char *reason, size_t len)
{
    (void)ctx;
    healthy_toggle ^= 1;
    snprintf(reason, len, "fuzz says no");
    return healthy_toggle;
}

static void f_metrics(void *ctx, metrics_buf *out)
{
    (void)ctx;
    metrics_render(reg, out);
}

static int f_checkpoint(void *ctx, char *msg, size_t len)
{
    (void)ctx;
    /* Fill the message to its end: the server must cope. */
    memset(msg, 'm', len - 1);
    msg[len - 1] = '\0';
    return healthy_toggle ? 0 : -1;
}

static void check(int cond, const char *what)
{
    if (!cond) {
        fprintf(stderr, "invariant violated: %s\n", what);
        abort();
    }
}

int LLVMFuzzerTestOneInput(const uint8_t *data, size_t size)
{
    if (!reg) {
        reg = metrics_new(NULL);
        static const char *const v[] = {"a\"b", "c\\d\n"};
        metrics_spec s = {.name = "x_total", .help = "h\\\n", .kind = METRICS_COUNTER,
                          .label = "l", .values = v, .n_values = 2};
        metrics_register(reg, &s, NULL, 0);
    }
    if (size == 0)
        return 0;
    static status_options opt;
    status_options_default(&opt);
    opt.token = (data[0] & 0x80) ? "tok" : NULL;
    opt.max_header_bytes = 512;
    opt.max_body_bytes = 64;
    status_provider prov = {.ctx = NULL, .status_json = f_status,
                            .healthy = f_healthy, .metrics_text = f_metrics,
                            .checkpoint_now = f_checkpoint};
    size_t chunk = 1 + (data[0] & 0x3f);
    data++, size--;

    status_session *s = status_session_new(&opt, &prov);
    metrics_buf out;
    metrics_buf_init(&out);
    int closed = 0;
    for (size_t off = 0; off < size; off += chunk) {
        size_t n = size - off < chunk ? size - off : chunk;
        size_t before = out.len;
        int rc = status_session_feed(s, (const char *)data + off, n, &out);
        check(rc == 0 || rc == 1, "feed returns 0 or 1");
        if (closed)
            check(rc == 1 && out.len == before, "closed session stays silent");
        closed = rc == 1;
    }
    if (out.len)
        check(out.len >= 12 && memcmp(out.data, "HTTP/1.1 ", 9) == 0,
              "output starts with a status line");
    metrics_buf_free(&out);
    status_session_free(s);
    return 0;
}
