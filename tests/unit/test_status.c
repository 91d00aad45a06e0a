/*
 * test_status.c - the status endpoint over real loopback sockets.
 *
 * Two servers (one with a token, one without) run on a libuv loop in a
 * second thread with the fake provider of tests/web; the test thread is a
 * plain-socket client.  Expected behaviour comes from the HTTP RFCs, named
 * beside each check: RFC 9110 (semantics), RFC 9112 (HTTP/1.1 messages),
 * RFC 6585 (431), RFC 6750 (Bearer tokens).  Waits are bounded by a 5 s
 * receive timeout that only turns a hang into a failure; nothing asserts
 * on elapsed time.
 */
#include <arpa/inet.h>
#include <errno.h>
#include <netinet/in.h>
#include <pthread.h>
#include <setjmp.h>
#include <stdarg.h>
#include <stddef.h>
#include <stdint.h>
#include <stdio.h>
#include <stdlib.h>
#include <string.h>
#include <strings.h>
#include <sys/socket.h>
#include <sys/time.h>
#include <unistd.h>

#include <cmocka.h>

#include "daemon/livepage.h"
#include "daemon/status.h"
/* The fake provider is shared with tests/web; one translation unit here. */
#include "tests/web/fake_provider.c"

#define TOKEN "s3cret-token"

typedef struct fixture {
    uv_loop_t loop;
    uv_async_t stop;
    pthread_t thread;
    fake_status fake;
    status_provider prov;
    status_server *with_token, *without_token;
    int port, port_open;
    int closed;
} fixture;

static fixture fx;

static void on_server_closed(void *arg) { (*(int *)arg)++; }

static void on_stop(uv_async_t *a)
{
    status_server_close(fx.with_token, on_server_closed, &fx.closed);
    status_server_close(fx.without_token, on_server_closed, &fx.closed);
    uv_close((uv_handle_t *)a, NULL);
}

static void *loop_thread(void *arg)
{
    (void)arg;
    uv_run(&fx.loop, UV_RUN_DEFAULT);
    return NULL;
}

static int setup(void **state)
{
    (void)state;
    memset(&fx, 0, sizeof fx);
    if (uv_loop_init(&fx.loop) || fake_status_init(&fx.fake))
        return -1;
    fx.prov = fake_status_provider(&fx.fake);
    status_options o;
    status_options_default(&o);
    o.port = 0;
    o.token = TOKEN;
    o.max_connections = 3;
    o.idle_timeout_ms = 300;
    o.max_header_bytes = 1024;
    o.max_body_bytes = 256;
    char err[256];
    fx.with_token = status_server_start(&fx.loop, &o, &fx.prov, err, sizeof err);
    if (!fx.with_token) {
        fprintf(stderr, "%s\n", err);
        return -1;
    }
    o.token = NULL;
    o.max_connections = 0; /* default */
    fx.without_token = status_server_start(&fx.loop, &o, &fx.prov, err, sizeof err);
    if (!fx.without_token) {
        fprintf(stderr, "%s\n", err);
        return -1;
    }
    fx.port = status_server_port(fx.with_token);
    fx.port_open = status_server_port(fx.without_token);
    uv_async_init(&fx.loop, &fx.stop, on_stop);
    return pthread_create(&fx.thread, NULL, loop_thread, NULL) ? -1 : 0;
}

static int teardown(void **state)
{
    (void)state;
    uv_async_send(&fx.stop);
    pthread_join(fx.thread, NULL);
    int rc = uv_loop_close(&fx.loop);
    fake_status_free(&fx.fake);
    /* Both servers called back and every handle is gone. */
    return fx.closed == 2 && rc == 0 ? 0 : -1;
}

/* ---- a small blocking client -------------------------------------------- */

typedef struct client {
    int fd;
    char buf[1 << 17];
    size_t len;
} client;

typedef struct response {
    int code;
    char headers[4096];
    char *body; /* malloc'd, NUL-terminated */
    size_t body_len;
} response;

static client *client_open(int port)
{
    client *c = calloc(1, sizeof *c);
    c->fd = socket(AF_INET, SOCK_STREAM, 0);
    struct timeval tv = {.tv_sec = 5};
    setsockopt(c->fd, SOL_SOCKET, SO_RCVTIMEO, &tv, sizeof tv);
    struct sockaddr_in a = {.sin_family = AF_INET, .sin_port = htons((uint16_t)port)};
    a.sin_addr.s_addr = htonl(INADDR_LOOPBACK);
    if (connect(c->fd, (struct sockaddr *)&a, sizeof a) != 0)
        fail_msg("connect: %s", strerror(errno));
    return c;
}

static void client_close(client *c)
{
    close(c->fd);
    free(c);
}

static void client_send(client *c, const char *data, size_t len)
{
    while (len) {
        ssize_t n = send(c->fd, data, len, MSG_NOSIGNAL);
        if (n <= 0)
            return; /* the server may close early on a refused request */
        data += n;
        len -= (size_t)n;
    }
}

static void client_sends(client *c, const char *s) { client_send(c, s, strlen(s)); }

/* Read more bytes; 0 on EOF, -1 on error or timeout. */
static ssize_t client_fill(client *c)
{
    if (c->len == sizeof c->buf)
        return -1;
    ssize_t n = recv(c->fd, c->buf + c->len, sizeof c->buf - c->len, 0);
    if (n > 0)
        c->len += (size_t)n;
    return n;
}

/* First occurrence of needle in hay[0..n), or NULL (memmem is not POSIX). */
static char *find_bytes(char *hay, size_t n, const char *needle)
{
    size_t m = strlen(needle);
    for (size_t i = 0; i + m <= n; i++)
        if (memcmp(hay + i, needle, m) == 0)
            return hay + i;
    return NULL;
}

/* Value of header name in r (case-insensitive name), or NULL. */
static const char *header(const response *r, const char *name, char *out, size_t len)
{
    size_t n = strlen(name);
    for (const char *p = r->headers; *p;) {
        const char *e = strstr(p, "\r\n");
        if (!e)
            break;
        if (strncasecmp(p, name, n) == 0 && p[n] == ':') {
            const char *v = p + n + 1;
            while (*v == ' ')
                v++;
            size_t l = (size_t)(e - v) < len - 1 ? (size_t)(e - v) : len - 1;
            memcpy(out, v, l);
            out[l] = '\0';
            return out;
        }
        p = e + 2;
    }
    return NULL;
}

/* Read one response (Content-Length framing; head: no body expected).
 * Returns 0, or -1 when the connection closed or timed out first. */
static int read_response(client *c, response *r, int head)
{
    memset(r, 0, sizeof *r);
    char *end;
    while (!(c->len && (end = find_bytes(c->buf, c->len, "\r\n\r\n")))) {
        if (client_fill(c) <= 0)
            return -1;
    }
    size_t hlen = (size_t)(end - c->buf) + 4;
    if (sscanf(c->buf, "HTTP/1.1 %d", &r->code) != 1)
        fail_msg("bad status line: %.40s", c->buf);
    const char *first = find_bytes(c->buf, hlen, "\r\n") + 2;
    size_t n = hlen - 2 - (size_t)(first - c->buf);
    if (n >= sizeof r->headers)
        n = sizeof r->headers - 1;
    memcpy(r->headers, first, n);
    char v[64];
    size_t blen = header(r, "Content-Length", v, sizeof v) ? strtoul(v, NULL, 10) : 0;
    if (head)
        blen = 0;
    while (c->len < hlen + blen)
        if (client_fill(c) <= 0)
            return -1;
    r->body = malloc(blen + 1);
    memcpy(r->body, c->buf + hlen, blen);
    r->body[blen] = '\0';
    r->body_len = blen;
    memmove(c->buf, c->buf + hlen + blen, c->len - hlen - blen);
    c->len -= hlen + blen;
    return 0;
}

/* After a response: does the server close (EOF) with nothing more sent? */
static int reaches_eof(client *c)
{
    for (;;) {
        ssize_t n = client_fill(c);
        if (n == 0)
            return c->len == 0;
        if (n < 0)
            return errno == ECONNRESET && c->len == 0;
    }
}

/* One request on a fresh connection. */
static void request(int port, const char *req, response *r)
{
    client *c = client_open(port);
    client_sends(c, req);
    if (read_response(c, r, strncmp(req, "HEAD", 4) == 0) != 0)
        fail_msg("no response to %.40s", req);
    client_close(c);
}

static void expect_header(const response *r, const char *name, const char *want)
{
    char v[256];
    if (!header(r, name, v, sizeof v))
        fail_msg("no %s header in:\n%s", name, r->headers);
    if (strcmp(v, want) != 0)
        fail_msg("%s: \"%s\", expected \"%s\"", name, v, want);
}

/* ---- tests ----------------------------------------------------------------- */

static void test_get_routes(void **state)
{
    (void)state;
    response r;
    request(fx.port, "GET / HTTP/1.1\r\nHost: x\r\n\r\n", &r);
    assert_int_equal(r.code, 200);
    expect_header(&r, "Content-Type", "text/html; charset=utf-8");
    assert_int_equal(r.body_len, livepage_html_len);
    assert_memory_equal(r.body, livepage_html, livepage_html_len);
    free(r.body);

    request(fx.port, "GET /metrics HTTP/1.1\r\nHost: x\r\n\r\n", &r);
    assert_int_equal(r.code, 200);
    /* source: Prometheus exposition formats, text format 0.0.4 */
    expect_header(&r, "Content-Type", "text/plain; version=0.0.4; charset=utf-8");
    assert_non_null(strstr(r.body, "# TYPE oddsky_packets_total counter\n"));
    free(r.body);

    request(fx.port, "GET /status?x=1 HTTP/1.1\r\nHost: x\r\n\r\n", &r);
    assert_int_equal(r.code, 200);
    expect_header(&r, "Content-Type", "application/json");
    json_error_t je;
    json_t *doc = json_loads(r.body, 0, &je);
    if (!doc)
        fail_msg("status is not JSON: %s", je.text);
    static const char *const keys[] = {"version", "uptime_s", "phase", "partitions",
                                       "rates_per_s", "latency_ms", "counts", "model",
                                       "recent_flags", "last_checkpoint"};
    for (size_t i = 0; i < sizeof keys / sizeof keys[0]; i++)
        if (!json_object_get(doc, keys[i]))
            fail_msg("status lacks %s", keys[i]);
    json_decref(doc);
    free(r.body);

    request(fx.port, "GET /healthz HTTP/1.1\r\nHost: x\r\n\r\n", &r);
    assert_int_equal(r.code, 200);
    assert_string_equal(r.body, "ok\n");
    free(r.body);
}

static void test_healthz_unhealthy(void **state)
{
    (void)state;
    response r;
    fx.fake.healthy = 0;
    request(fx.port, "GET /healthz HTTP/1.1\r\nHost: x\r\n\r\n", &r);
    fx.fake.healthy = 1;
    assert_int_equal(r.code, 503);
    assert_non_null(strstr(r.body, "not assigned any partition"));
    free(r.body);
}

static void test_head(void **state)
{
    (void)state;
    /* source: RFC 9110 9.3.2: HEAD is GET without content; the server
     * should send the same header fields (Content-Length included). */
    client *c = client_open(fx.port);
    client_sends(c, "HEAD / HTTP/1.1\r\nHost: x\r\n\r\nGET /healthz HTTP/1.1\r\nHost: x\r\n\r\n");
    response r;
    assert_int_equal(read_response(c, &r, 1), 0);
    assert_int_equal(r.code, 200);
    char v[32];
    assert_non_null(header(&r, "Content-Length", v, sizeof v));
    assert_int_equal(strtoul(v, NULL, 10), livepage_html_len);
    free(r.body);
    /* The next bytes are the second response, not a page body. */
    assert_int_equal(read_response(c, &r, 0), 0);
    assert_int_equal(r.code, 200);
    assert_string_equal(r.body, "ok\n");
    free(r.body);
    client_close(c);
}

static void test_errors(void **state)
{
    (void)state;
    response r;
    /* source: RFC 9110 15.5.5 */
    request(fx.port, "GET /nope HTTP/1.1\r\nHost: x\r\n\r\n", &r);
    assert_int_equal(r.code, 404);
    free(r.body);
    /* source: RFC 9110 15.5.6: 405 MUST carry Allow */
    request(fx.port, "POST /status HTTP/1.1\r\nHost: x\r\nContent-Length: 0\r\n\r\n", &r);
    assert_int_equal(r.code, 405);
    expect_header(&r, "Allow", "GET, HEAD");
    free(r.body);
    request(fx.port, "GET /checkpoint HTTP/1.1\r\nHost: x\r\n\r\n", &r);
    assert_int_equal(r.code, 405);
    expect_header(&r, "Allow", "POST");
    free(r.body);
    request(fx.port, "DELETE / HTTP/1.1\r\nHost: x\r\n\r\n", &r);
    assert_int_equal(r.code, 405);
    free(r.body);

    /* source: RFC 9112 2.2/3: a malformed request line -> 400, then close */
    client *c = client_open(fx.port);
    client_sends(c, "\x01\x02 garbage here\r\n\r\n");
    assert_int_equal(read_response(c, &r, 0), 0);
    assert_int_equal(r.code, 400);
    expect_header(&r, "Connection", "close");
    assert_true(reaches_eof(c));
    free(r.body);
    client_close(c);

    c = client_open(fx.port);
    client_sends(c, "GET / HTTP/1.1\r\nHost: x\r\nBad Header\r\n\r\n");
    assert_int_equal(read_response(c, &r, 0), 0);
    assert_int_equal(r.code, 400);
    free(r.body);
    client_close(c);
}

static void test_limits(void **state)
{
    (void)state;
    response r;
    /* source: RFC 6585 5: 431 Request Header Fields Too Large */
    char big[4096];
    int n = snprintf(big, sizeof big, "GET / HTTP/1.1\r\nHost: x\r\nX-Pad: ");
    memset(big + n, 'a', 2000);
    strcpy(big + n + 2000, "\r\n\r\n");
    request(fx.port, big, &r);
    assert_int_equal(r.code, 431);
    free(r.body);
    /* Just under the limit is served. */
    n = snprintf(big, sizeof big, "GET /healthz HTTP/1.1\r\nHost: x\r\nX-Pad: ");
    memset(big + n, 'a', 900);
    strcpy(big + n + 900, "\r\n\r\n");
    request(fx.port, big, &r);
    assert_int_equal(r.code, 200);
    free(r.body);

    /* source: RFC 9110 15.5.14: 413 Content Too Large */
    request(fx.port,
            "POST /checkpoint HTTP/1.1\r\nHost: x\r\nContent-Length: 1000\r\n\r\n", &r);
    assert_int_equal(r.code, 413);
    free(r.body);
    /* Chunked: the body is counted as it arrives. */
    client *c = client_open(fx.port);
    client_sends(c, "POST /checkpoint HTTP/1.1\r\nHost: x\r\nTransfer-Encoding: chunked\r\n\r\n");
    char chunk[300];
    memset(chunk, 'b', sizeof chunk);
    client_sends(c, "12c\r\n");
    client_send(c, chunk, sizeof chunk);
    client_sends(c, "\r\n0\r\n\r\n");
    assert_int_equal(read_response(c, &r, 0), 0);
    assert_int_equal(r.code, 413);
    free(r.body);
    client_close(c);
}

static void test_checkpoint_token(void **state)
{
    (void)state;
    response r;
    int before = fx.fake.checkpoints;
    /* source: RFC 6750 3: missing credentials -> 401 with
     * WWW-Authenticate: Bearer; RFC 9110 15.5.4: 403 for refused ones */
    request(fx.port, "POST /checkpoint HTTP/1.1\r\nHost: x\r\nContent-Length: 0\r\n\r\n", &r);
    assert_int_equal(r.code, 401);
    char v[128];
    assert_non_null(header(&r, "WWW-Authenticate", v, sizeof v));
    assert_int_equal(strncmp(v, "Bearer", 6), 0);
    free(r.body);
    request(fx.port,
            "POST /checkpoint HTTP/1.1\r\nHost: x\r\nAuthorization: Basic Zm9vOmJhcg==\r\n"
            "Content-Length: 0\r\n\r\n", &r);
    assert_int_equal(r.code, 401);
    free(r.body);
    request(fx.port,
            "POST /checkpoint HTTP/1.1\r\nHost: x\r\nAuthorization: Bearer nope\r\n"
            "Content-Length: 0\r\n\r\n", &r);
    assert_int_equal(r.code, 403);
    free(r.body);
    /* A prefix of the token is wrong too. */
    request(fx.port,
            "POST /checkpoint HTTP/1.1\r\nHost: x\r\nAuthorization: Bearer s3cret\r\n"
            "Content-Length: 0\r\n\r\n", &r);
    assert_int_equal(r.code, 403);
    free(r.body);
    assert_int_equal(fx.fake.checkpoints, before);
    /* The auth scheme is case-insensitive (RFC 9110 11.1). */
    request(fx.port,
            "POST /checkpoint HTTP/1.1\r\nHost: x\r\nauthorization: bearer " TOKEN "\r\n"
            "Content-Length: 0\r\n\r\n", &r);
    assert_int_equal(r.code, 200);
    assert_non_null(strstr(r.body, "written"));
    free(r.body);
    assert_int_equal(fx.fake.checkpoints, before + 1);

    /* No token configured: refused, and the message says what to do. */
    request(fx.port_open,
            "POST /checkpoint HTTP/1.1\r\nHost: x\r\nAuthorization: Bearer " TOKEN "\r\n"
            "Content-Length: 0\r\n\r\n", &r);
    assert_int_equal(r.code, 403);
    assert_non_null(strstr(r.body, "token"));
    assert_non_null(strstr(r.body, "configured"));
    free(r.body);
    assert_int_equal(fx.fake.checkpoints, before + 1);
}

static void test_keep_alive(void **state)
{
    (void)state;
    response r;
    /* source: RFC 9112 9.3: HTTP/1.1 connections persist by default */
    client *c = client_open(fx.port);
    client_sends(c, "GET /healthz HTTP/1.1\r\nHost: x\r\n\r\n");
    assert_int_equal(read_response(c, &r, 0), 0);
    assert_int_equal(r.code, 200);
    free(r.body);
    client_sends(c, "GET /status HTTP/1.1\r\nHost: x\r\n\r\n");
    assert_int_equal(read_response(c, &r, 0), 0);
    assert_int_equal(r.code, 200);
    free(r.body);
    /* Pipelined: two requests in one write, two responses in order. */
    client_sends(c, "GET /nope HTTP/1.1\r\nHost: x\r\n\r\nGET /healthz HTTP/1.1\r\nHost: x\r\n\r\n");
    assert_int_equal(read_response(c, &r, 0), 0);
    assert_int_equal(r.code, 404);
    free(r.body);
    assert_int_equal(read_response(c, &r, 0), 0);
    assert_int_equal(r.code, 200);
    free(r.body);
    /* Connection: close is honoured (RFC 9112 9.6). */
    client_sends(c, "GET /healthz HTTP/1.1\r\nHost: x\r\nConnection: close\r\n\r\n");
    assert_int_equal(read_response(c, &r, 0), 0);
    expect_header(&r, "Connection", "close");
    free(r.body);
    assert_true(reaches_eof(c));
    client_close(c);
    /* HTTP/1.0 without keep-alive closes after the response. */
    c = client_open(fx.port);
    client_sends(c, "GET /healthz HTTP/1.0\r\n\r\n");
    assert_int_equal(read_response(c, &r, 0), 0);
    assert_int_equal(r.code, 200);
    free(r.body);
    assert_true(reaches_eof(c));
    client_close(c);
}

static void test_connection_limit(void **state)
{
    (void)state;
    response r;
    client *c[3];
    /* Three served connections (the limit), each proven open by a reply. */
    for (int i = 0; i < 3; i++) {
        c[i] = client_open(fx.port);
        client_sends(c[i], "GET /healthz HTTP/1.1\r\nHost: x\r\n\r\n");
        assert_int_equal(read_response(c[i], &r, 0), 0);
        assert_int_equal(r.code, 200);
        free(r.body);
    }
    /* The fourth: 503 (RFC 9110 15.6.4) and closed. */
    client *d = client_open(fx.port);
    assert_int_equal(read_response(d, &r, 0), 0);
    assert_int_equal(r.code, 503);
    expect_header(&r, "Connection", "close");
    free(r.body);
    assert_true(reaches_eof(d));
    client_close(d);
    /* Freeing a slot lets a new connection in (the close is seen by the
     * server asynchronously: try until it is, bounded). */
    client_close(c[0]);
    int served = 0;
    for (int attempt = 0; attempt < 200 && !served; attempt++) {
        d = client_open(fx.port);
        client_sends(d, "GET /healthz HTTP/1.1\r\nHost: x\r\n\r\n");
        served = read_response(d, &r, 0) == 0 && r.code == 200;
        free(r.body);
        client_close(d);
        if (!served)
            usleep(10000);
    }
    assert_true(served);
    client_close(c[1]);
    client_close(c[2]);
}

static void test_idle_timeout(void **state)
{
    (void)state;
    /* The server (idle timeout 300 ms) closes a silent connection; the
     * 5 s receive timeout only guards against a hang. */
    client *c;
    int silent_closed = 0;
    /* The connections of the previous test may still hold slots for a
     * moment: a 503 refusal is retried, anything else is a failure. */
    for (int attempt = 0; attempt < 200 && !silent_closed; attempt++) {
        c = client_open(fx.port);
        silent_closed = reaches_eof(c);
        int refused = !silent_closed && strncmp(c->buf, "HTTP/1.1 503", 12) == 0;
        client_close(c);
        if (!silent_closed && !refused)
            fail_msg("silent connection was not closed cleanly");
        if (!silent_closed)
            usleep(10000);
    }
    assert_true(silent_closed);
    /* Also after a served request on a kept-alive connection. */
    response r;
    c = client_open(fx.port);
    client_sends(c, "GET /healthz HTTP/1.1\r\nHost: x\r\n\r\n");
    assert_int_equal(read_response(c, &r, 0), 0);
    free(r.body);
    assert_true(reaches_eof(c));
    client_close(c);
}

static const char *warned;
static void capture_warning(void *ctx, const char *msg)
{
    (void)ctx;
    warned = strstr(msg, "without a token") ? "yes" : "other";
}

static void test_bind_policy(void **state)
{
    (void)state;
    uv_loop_t loop;
    uv_loop_init(&loop);
    status_options o;
    status_options_default(&o);
    o.log_warning = capture_warning;
    char err[256] = "";
    status_provider p = fx.prov;
    /* 192.0.2.1 is TEST-NET-1 (RFC 5737): never bound here, so nothing
     * listens outside loopback. */
    o.listen_addr = "192.0.2.1";
    assert_null(status_server_start(&loop, &o, &p, err, sizeof err));
    assert_non_null(strstr(err, "token"));
    assert_null(warned);
    /* With the opt-out: a warning, then the bind fails on this host. */
    o.allow_remote_without_token = 1;
    status_server *s = status_server_start(&loop, &o, &p, err, sizeof err);
    assert_non_null(warned);
    assert_string_equal(warned, "yes");
    if (s)
        status_server_close(s, NULL, NULL);
    else
        assert_non_null(strstr(err, "cannot listen"));
    o.listen_addr = "not-an-address";
    assert_null(status_server_start(&loop, &o, &p, err, sizeof err));
    assert_non_null(strstr(err, "literal"));
    uv_run(&loop, UV_RUN_DEFAULT);
    assert_int_equal(uv_loop_close(&loop), 0);
}

/* Socket-free session: any split of the bytes gives the same answers. */
static void test_session_byte_by_byte(void **state)
{
    (void)state;
    status_options o;
    status_options_default(&o);
    o.token = TOKEN;
    fake_status f;
    assert_int_equal(fake_status_init(&f), 0);
    status_provider p = fake_status_provider(&f);
    status_session *s = status_session_new(&o, &p);
    const char *req = "GET /healthz HTTP/1.1\r\nHost: x\r\n\r\n"
                      "POST /checkpoint HTTP/1.1\r\nAuthorization: Bear"
                      "er " TOKEN "\r\nContent-Length: 3\r\n\r\nabc"
                      "GET /x HTTP/1.1\r\nConnection: close\r\n\r\n"
                      "GET /healthz HTTP/1.1\r\n\r\n";
    metrics_buf out;
    metrics_buf_init(&out);
    int rc = 0;
    for (size_t i = 0; req[i] && !rc; i++)
        rc = status_session_feed(s, req + i, 1, &out);
    assert_int_equal(rc, 1);
    const char *a = strstr(out.data, "HTTP/1.1 200 OK");
    const char *b = a ? strstr(a + 1, "HTTP/1.1 200 OK") : NULL;
    const char *c = b ? strstr(b + 1, "HTTP/1.1 404 Not Found") : NULL;
    assert_non_null(c);
    assert_null(strstr(c + 1, "HTTP/1.1")); /* nothing after the close */
    assert_int_equal(f.checkpoints, 1);
    assert_int_equal(status_session_feed(s, "GET / HTTP/1.1\r\n\r\n", 18, &out), 1);
    metrics_buf_free(&out);
    status_session_free(s);
    fake_status_free(&f);
}

/* daemon/livepage.c must be what daemon/livepage_gen.py makes of the HTML. */
static void test_livepage_in_sync(void **state)
{
    (void)state;
    const char *top = getenv("ODDSKY_TOP");
    char path[1024];
    snprintf(path, sizeof path, "%s/daemon/livepage.html", top ? top : ".");
    FILE *fp = fopen(path, "rb");
    if (!fp)
        fail_msg("cannot open %s (run from the repository top or set ODDSKY_TOP)", path);
    static char html[1 << 20];
    size_t n = fread(html, 1, sizeof html, fp);
    fclose(fp);
    if (n != livepage_html_len || memcmp(html, livepage_html, n) != 0)
        fail_msg("daemon/livepage.c is out of date (%zu vs %zu bytes): run "
                 "python3 daemon/livepage_gen.py", livepage_html_len, n);
}

int main(void)
{
    const struct CMUnitTest tests[] = {
        cmocka_unit_test(test_get_routes),
        cmocka_unit_test(test_healthz_unhealthy),
        cmocka_unit_test(test_head),
        cmocka_unit_test(test_errors),
        cmocka_unit_test(test_limits),
        cmocka_unit_test(test_checkpoint_token),
        cmocka_unit_test(test_keep_alive),
        cmocka_unit_test(test_connection_limit),
        cmocka_unit_test(test_idle_timeout),
        cmocka_unit_test(test_bind_policy),
        cmocka_unit_test(test_session_byte_by_byte),
        cmocka_unit_test(test_livepage_in_sync),
    };
    return cmocka_run_group_tests(tests, setup, teardown);
}
