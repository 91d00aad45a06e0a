/*
 * status.c - HTTP/1.1 status endpoint: a socket-free session (http-parser
 * callbacks, limits, routing, responses) and a libuv TCP server that runs
 * one session per connection.
 *
 * Design: the session never sees a socket.  status_session_feed() pushes
 * bytes through http_parser and appends whole responses to a buffer; the
 * server writes that buffer and closes when the session says so.  Limits
 * are enforced inside the parser callbacks (returning nonzero aborts the
 * parse), so a huge header or body is refused before it is buffered: the
 * session stores only the URL (bounded) and the Authorization value
 * (bounded); a body is counted, never kept.
 *
 * After an error response the server half-closes and keeps reading (and
 * discarding) for a short while before closing, so that the client reads
 * the response instead of a reset caused by its own unread bytes.
 *
 * Invariants: a connection is freed only in the close callback of the last
 * of its two handles (TCP and idle timer); write requests own their bytes;
 * the server is freed only after the listener and every connection closed.
 */
#include "status.h"

#include <ctype.h>
#include <http_parser.h>
#include <stdio.h>
#include <stdlib.h>
#include <string.h>
#include <time.h>

#include "commands.h"
#include "livepage.h"

#define STATUS_MAX_URL 2048u
#define STATUS_MAX_AUTH 512u
#define STATUS_FIELD_CAP 16u    /* enough for "authorization" */
#define STATUS_LINGER_MS 2000u  /* read-and-discard time after an error */
#define STATUS_READ_BUF 65536u
#define STATUS_MAX_PENDING_WRITE (4u << 20)

void status_options_default(status_options *o)
{
    memset(o, 0, sizeof *o);
    o->listen_addr = "127.0.0.1";
    o->max_connections = 64;
    o->idle_timeout_ms = 30000;
    o->max_header_bytes = 8192;
    o->max_body_bytes = 4096;
}

/* ---- session ---------------------------------------------------------- */

struct status_session {
    http_parser parser;
    const status_options *opt;
    const status_provider *prov;
    char url[STATUS_MAX_URL];
    size_t url_len;
    int url_overflow;
    char field[STATUS_FIELD_CAP]; /* current header name, lowercased */
    size_t field_len;
    int last_was_value;
    int in_auth;                  /* current header is Authorization */
    char auth[STATUS_MAX_AUTH];
    size_t auth_len;
    int has_auth;
    int auth_overflow;
    size_t header_bytes;
    size_t body_bytes;
    int error_status;             /* set by a callback that aborted */
    int closed;
    metrics_buf *out;             /* valid during feed */
};

static const char *reason_phrase(int code)
{
    switch (code) {
    case 200: return "OK";
    case 400: return "Bad Request";
    case 401: return "Unauthorized";
    case 403: return "Forbidden";
    case 404: return "Not Found";
    case 405: return "Method Not Allowed";
    case 413: return "Payload Too Large";
    case 414: return "URI Too Long";
    case 431: return "Request Header Fields Too Large";
    case 500: return "Internal Server Error";
    case 501: return "Not Implemented";
    case 503: return "Service Unavailable";
    default: return "Unknown";
    }
}

/* One complete response.  extra holds whole header lines ("X: y\r\n"). */
static void respond(metrics_buf *out, int code, const char *ctype,
                    const char *body, size_t body_len, const char *extra,
                    int keep_alive, int http10, int head_only)
{
    char date[64];
    time_t now = time(NULL);
    struct tm tm;
    gmtime_r(&now, &tm);
    strftime(date, sizeof date, "%a, %d %b %Y %H:%M:%S GMT", &tm);
    metrics_buf_printf(out,
                       "HTTP/1.1 %d %s\r\n"
                       "Date: %s\r\n"
                       "Server: oddsky/" ODDSKY_VERSION "\r\n"
                       "Content-Type: %s\r\n"
                       "Content-Length: %zu\r\n"
                       "Cache-Control: no-store\r\n"
                       "X-Content-Type-Options: nosniff\r\n"
                       "%s%s\r\n",
                       code, reason_phrase(code), date, ctype, body_len,
                       extra ? extra : "",
                       !keep_alive ? "Connection: close\r\n"
                                   : (http10 ? "Connection: keep-alive\r\n" : ""));
    if (!head_only)
        metrics_buf_append(out, body, body_len);
}

static void respond_text(metrics_buf *out, int code, const char *text,
                         const char *extra, int keep_alive, int http10,
                         int head_only)
{
    respond(out, code, "text/plain; charset=utf-8", text, strlen(text), extra,
            keep_alive, http10, head_only);
}

static void session_reset_message(status_session *s)
{
    s->url_len = 0;
    s->url_overflow = 0;
    s->field_len = 0;
    s->last_was_value = 0;
    s->in_auth = 0;
    s->auth_len = 0;
    s->has_auth = 0;
    s->auth_overflow = 0;
    s->header_bytes = 0;
    s->body_bytes = 0;
}

static int count_header(status_session *s, size_t n)
{
    s->header_bytes += n;
    if (s->header_bytes > s->opt->max_header_bytes) {
        s->error_status = 431;
        return 1;
    }
    return 0;
}

static int on_message_begin(http_parser *p)
{
    session_reset_message(p->data);
    return 0;
}

static int on_url(http_parser *p, const char *at, size_t n)
{
    status_session *s = p->data;
    if (count_header(s, n))
        return 1;
    if (n > STATUS_MAX_URL - 1 - s->url_len) {
        s->url_overflow = 1;
        return 0;
    }
    memcpy(s->url + s->url_len, at, n);
    s->url_len += n;
    s->url[s->url_len] = '\0';
    return 0;
}

static int on_header_field(http_parser *p, const char *at, size_t n)
{
    status_session *s = p->data;
    if (count_header(s, n))
        return 1;
    if (s->last_was_value) {
        s->field_len = 0;
        s->last_was_value = 0;
    }
    for (size_t i = 0; i < n; i++) {
        if (s->field_len < STATUS_FIELD_CAP - 1)
            s->field[s->field_len] = (char)tolower((unsigned char)at[i]);
        s->field_len++;
    }
    return 0;
}

static int on_header_value(http_parser *p, const char *at, size_t n)
{
    status_session *s = p->data;
    if (count_header(s, n))
        return 1;
    if (!s->last_was_value) {
        s->last_was_value = 1;
        s->in_auth = s->field_len == 13 &&
                     memcmp(s->field, "authorization", 13) == 0;
        if (s->in_auth) {
            /* A repeated Authorization header is treated as wrong. */
            if (s->has_auth)
                s->auth_overflow = 1;
            s->has_auth = 1;
            s->auth_len = 0;
        }
    }
    if (s->in_auth) {
        if (n > STATUS_MAX_AUTH - 1 - s->auth_len) {
            s->auth_overflow = 1;
        } else {
            memcpy(s->auth + s->auth_len, at, n);
            s->auth_len += n;
            s->auth[s->auth_len] = '\0';
        }
    }
    return 0;
}

static int on_headers_complete(http_parser *p)
{
    status_session *s = p->data;
    /* Content-Length is known here; refuse before reading the body.
     * http_parser sets content_length to ULLONG_MAX when absent. */
    if ((p->flags & F_CHUNKED) == 0 && p->content_length != ULLONG_MAX &&
        p->content_length > s->opt->max_body_bytes) {
        s->error_status = 413;
        return -1;
    }
    return 0;
}

static int on_body(http_parser *p, const char *at, size_t n)
{
    (void)at;
    status_session *s = p->data;
    s->body_bytes += n;
    if (s->body_bytes > s->opt->max_body_bytes) {
        s->error_status = 413;
        return 1;
    }
    return 0;
}

/* Compare without an early exit on the first differing byte. */
static int token_equal(const char *a, size_t alen, const char *b, size_t blen)
{
    unsigned char diff = (unsigned char)(alen != blen);
    size_t n = alen < blen ? alen : blen;
    for (size_t i = 0; i < n; i++)
        diff |= (unsigned char)(a[i] ^ b[i]);
    return diff == 0;
}

/* 0 when the request carries the configured token; else the status to
 * answer with (401 no credentials, 403 wrong or no token configured) and a
 * message. */
static int check_token(const status_session *s, const char **msg)
{
    const char *token = s->opt->token;
    if (!token || !*token) {
        *msg = "refused: state-changing routes are disabled until a token "
               "is configured (status.token)\n";
        return 403;
    }
    if (!s->has_auth) {
        *msg = "authorization required: send Authorization: Bearer <token>\n";
        return 401;
    }
    const char *v = s->auth;
    size_t n = s->auth_len;
    while (n && (*v == ' ' || *v == '\t'))
        v++, n--;
    while (n && (v[n - 1] == ' ' || v[n - 1] == '\t'))
        n--;
    if (n < 7 || strncasecmp(v, "bearer ", 7) != 0) {
        *msg = "authorization required: send Authorization: Bearer <token>\n";
        return 401;
    }
    v += 7, n -= 7;
    while (n && *v == ' ')
        v++, n--;
    if (s->auth_overflow || !token_equal(v, n, token, strlen(token))) {
        *msg = "forbidden: wrong token\n";
        return 403;
    }
    return 0;
}

enum route_id { ROUTE_PAGE, ROUTE_HEALTHZ, ROUTE_STATUS, ROUTE_METRICS,
                ROUTE_CHECKPOINT };

static const struct route {
    const char *path;
    enum route_id id;
    int post; /* 1: POST only; 0: GET and HEAD */
} routes[] = {
    {"/", ROUTE_PAGE, 0},
    {"/healthz", ROUTE_HEALTHZ, 0},
    {"/status", ROUTE_STATUS, 0},
    {"/metrics", ROUTE_METRICS, 0},
    {"/checkpoint", ROUTE_CHECKPOINT, 1},
};

static void dispatch(status_session *s, int keep_alive)
{
    http_parser *p = &s->parser;
    metrics_buf *out = s->out;
    int http10 = p->http_major == 1 && p->http_minor == 0;
    int head = p->method == HTTP_HEAD;
#define TEXT(code, msg, extra) \
    respond_text(out, code, msg, extra, keep_alive, http10, head)

    if (s->url_overflow) {
        TEXT(414, "request target too long\n", NULL);
        return;
    }
    struct http_parser_url u;
    http_parser_url_init(&u);
    int is_connect = p->method == HTTP_CONNECT;
    if (http_parser_parse_url(s->url, s->url_len, is_connect, &u) != 0 ||
        !(u.field_set & (1u << UF_PATH))) {
        TEXT(400, "bad request target\n", NULL);
        return;
    }
    const char *path = s->url + u.field_data[UF_PATH].off;
    size_t path_len = u.field_data[UF_PATH].len;

    const struct route *rt = NULL;
    for (size_t i = 0; i < sizeof routes / sizeof routes[0]; i++)
        if (strlen(routes[i].path) == path_len &&
            memcmp(routes[i].path, path, path_len) == 0)
            rt = &routes[i];
    if (!rt) {
        TEXT(404, "not found\n", NULL);
        return;
    }
    int method_ok = rt->post ? p->method == HTTP_POST
                             : (p->method == HTTP_GET || p->method == HTTP_HEAD);
    if (!method_ok) {
        head = 0;
        TEXT(405, "method not allowed\n",
             rt->post ? "Allow: POST\r\n" : "Allow: GET, HEAD\r\n");
        return;
    }

    const status_provider *prov = s->prov;
    switch (rt->id) {
    case ROUTE_PAGE:
        respond(out, 200, "text/html; charset=utf-8", livepage_html,
                livepage_html_len,
                "Content-Security-Policy: default-src 'none'; "
                "script-src 'unsafe-inline'; style-src 'unsafe-inline'; "
                "connect-src 'self'; img-src data:; base-uri 'none'; "
                "form-action 'none'; frame-ancestors 'none'\r\n",
                keep_alive, http10, head);
        break;
    case ROUTE_HEALTHZ: {
        char reason[256] = "unhealthy";
        if (!prov->healthy || prov->healthy(prov->ctx, reason, sizeof reason)) {
            TEXT(200, "ok\n", NULL);
        } else {
            reason[sizeof reason - 1] = '\0';
            char msg[300];
            snprintf(msg, sizeof msg, "%s\n", reason);
            TEXT(503, msg, NULL);
        }
        break;
    }
    case ROUTE_STATUS: {
        json_t *doc = prov->status_json ? prov->status_json(prov->ctx) : NULL;
        char *text = doc ? json_dumps(doc, JSON_COMPACT | JSON_REAL_PRECISION(15))
                         : NULL;
        json_decref(doc);
        if (!text) {
            TEXT(500, "status document unavailable\n", NULL);
            break;
        }
        size_t n = strlen(text);
        text[n] = '\n'; /* replaces the NUL; length passed explicitly */
        respond(out, 200, "application/json", text, n + 1, NULL, keep_alive,
                http10, head);
        free(text);
        break;
    }
    case ROUTE_METRICS: {
        metrics_buf m;
        metrics_buf_init(&m);
        if (prov->metrics_text)
            prov->metrics_text(prov->ctx, &m);
        if (m.failed) {
            TEXT(500, "metrics unavailable\n", NULL);
        } else {
            respond(out, 200, "text/plain; version=0.0.4; charset=utf-8",
                    m.data ? m.data : "", m.len, NULL, keep_alive, http10, head);
        }
        metrics_buf_free(&m);
        break;
    }
    case ROUTE_CHECKPOINT: {
        const char *why = NULL;
        int code = check_token(s, &why);
        if (code == 401) {
            TEXT(401, why, "WWW-Authenticate: Bearer realm=\"oddsky\"\r\n");
            break;
        }
        if (code) {
            TEXT(code, why, NULL);
            break;
        }
        if (!prov->checkpoint_now) {
            TEXT(501, "checkpoints are not available here\n", NULL);
            break;
        }
        char msg[256] = "";
        int rc = prov->checkpoint_now(prov->ctx, msg, sizeof msg);
        msg[sizeof msg - 2] = '\0';
        size_t n = strlen(msg);
        if (n == 0 || msg[n - 1] != '\n')
            strcat(msg, "\n");
        TEXT(rc < 0 ? 500 : 200, msg, NULL);
        break;
    }
    }
#undef TEXT
}

static int on_message_complete(http_parser *p)
{
    status_session *s = p->data;
    int keep_alive = http_should_keep_alive(p) && !p->upgrade;
    dispatch(s, keep_alive);
    if (!keep_alive) {
        s->closed = 1;
        http_parser_pause(p, 1);
    }
    return 0;
}

static const http_parser_settings status_parser_settings = {
    .on_message_begin = on_message_begin,
    .on_url = on_url,
    .on_header_field = on_header_field,
    .on_header_value = on_header_value,
    .on_headers_complete = on_headers_complete,
    .on_body = on_body,
    .on_message_complete = on_message_complete,
};

status_session *status_session_new(const status_options *opt,
                                   const status_provider *prov)
{
    status_session *s = calloc(1, sizeof *s);
    if (!s)
        return NULL;
    s->opt = opt;
    s->prov = prov;
    http_parser_init(&s->parser, HTTP_REQUEST);
    s->parser.data = s;
    return s;
}

void status_session_free(status_session *s) { free(s); }

int status_session_feed(status_session *s, const char *data, size_t len,
                        metrics_buf *out)
{
    if (s->closed)
        return 1;
    if (len == 0)
        return 0;
    s->out = out;
    size_t n = http_parser_execute(&s->parser, &status_parser_settings, data,
                                   len);
    enum http_errno e = HTTP_PARSER_ERRNO(&s->parser);
    s->out = NULL;
    if (s->closed)
        return 1; /* paused after a response that closes */
    if (s->error_status) {
        int code = s->error_status;
        respond_text(out, code,
                     code == 431 ? "request header fields too large\n"
                                 : "request body too large\n",
                     NULL, 0, 0, 0);
        s->closed = 1;
        return 1;
    }
    if (e == HPE_HEADER_OVERFLOW) {
        respond_text(out, 431, "request header fields too large\n", NULL, 0, 0, 0);
        s->closed = 1;
        return 1;
    }
    if (e != HPE_OK || s->parser.upgrade || n != len) {
        if (!s->parser.upgrade)
            respond_text(out, 400, "malformed request\n", NULL, 0, 0, 0);
        s->closed = 1;
        return 1;
    }
    return 0;
}

/* ---- server ------------------------------------------------------------ */

typedef struct status_conn status_conn;

struct status_server {
    uv_loop_t *loop;
    uv_tcp_t listener;
    status_options opt;
    status_provider prov;
    char *token;
    char *addr;
    int port;
    status_conn *conns;  /* doubly linked */
    uint32_t n_conns;    /* every open connection */
    uint32_t n_serving;  /* those not refused for the limit */
    int closing;
    int listener_open;
    void (*close_cb)(void *arg);
    void *close_arg;
    char read_buf[STATUS_READ_BUF]; /* consumed within each read callback */
};

struct status_conn {
    uv_tcp_t tcp;
    uv_timer_t timer;
    uv_shutdown_t shutdown_req;
    status_server *srv;
    status_session *sess;
    status_conn *prev, *next;
    size_t write_pending;   /* bytes queued, not yet written */
    int handles_open;       /* 0..2 */
    int closing;
    int close_after_write;
    int lingering;          /* half-closed after an error, discarding input */
    int refused;            /* over the connection limit */
    int reading;
};

typedef struct status_write {
    uv_write_t req;
    status_conn *conn;
    char *data;
    size_t len;
} status_write;

static void server_maybe_finish(status_server *srv)
{
    if (!srv->closing || srv->listener_open || srv->n_conns)
        return;
    void (*cb)(void *) = srv->close_cb;
    void *arg = srv->close_arg;
    free(srv->token);
    free(srv->addr);
    free(srv);
    if (cb)
        cb(arg);
}

static void conn_on_close(uv_handle_t *h)
{
    status_conn *c = h->data;
    if (--c->handles_open > 0)
        return;
    status_server *srv = c->srv;
    if (c->prev)
        c->prev->next = c->next;
    else
        srv->conns = c->next;
    if (c->next)
        c->next->prev = c->prev;
    srv->n_conns--;
    if (!c->refused)
        srv->n_serving--;
    status_session_free(c->sess);
    free(c);
    server_maybe_finish(srv);
}

static void conn_close(status_conn *c)
{
    if (c->closing)
        return;
    c->closing = 1;
    uv_close((uv_handle_t *)&c->tcp, conn_on_close);
    uv_close((uv_handle_t *)&c->timer, conn_on_close);
}

static void conn_on_timeout(uv_timer_t *t) { conn_close(t->data); }

static void conn_on_alloc(uv_handle_t *h, size_t hint, uv_buf_t *buf)
{
    (void)hint;
    status_conn *c = h->data;
    *buf = uv_buf_init(c->srv->read_buf, sizeof c->srv->read_buf);
}

static void conn_on_shutdown(uv_shutdown_t *req, int status)
{
    status_conn *c = req->data;
    if (status < 0 || c->closing) {
        conn_close(c);
        return;
    }
    /* Half-closed: keep discarding input for a moment, then close. */
    c->lingering = 1;
    uint32_t ms = c->srv->opt.idle_timeout_ms < STATUS_LINGER_MS
                      ? c->srv->opt.idle_timeout_ms
                      : STATUS_LINGER_MS;
    uv_timer_start(&c->timer, conn_on_timeout, ms, 0);
}

static void conn_after_writes(status_conn *c)
{
    if (c->closing || c->write_pending || !c->close_after_write)
        return;
    c->shutdown_req.data = c;
    if (uv_shutdown(&c->shutdown_req, (uv_stream_t *)&c->tcp,
                    conn_on_shutdown) < 0)
        conn_close(c);
}

static void conn_on_read(uv_stream_t *st, ssize_t nread, const uv_buf_t *buf);

static void conn_on_write(uv_write_t *req, int status)
{
    status_write *w = req->data;
    status_conn *c = w->conn;
    c->write_pending -= w->len;
    free(w->data);
    free(w);
    if (c->closing)
        return;
    if (status < 0) {
        conn_close(c);
        return;
    }
    if (!c->reading && !c->close_after_write &&
        c->write_pending < STATUS_MAX_PENDING_WRITE / 2) {
        c->reading = 1;
        uv_read_start((uv_stream_t *)&c->tcp, conn_on_alloc, conn_on_read);
    }
    conn_after_writes(c);
}

/* Queue out's bytes (ownership moves to the write request). */
static void conn_send(status_conn *c, metrics_buf *out)
{
    if (out->len == 0)
        return;
    if (out->failed) {
        conn_close(c);
        return;
    }
    status_write *w = malloc(sizeof *w);
    if (!w) {
        conn_close(c);
        return;
    }
    w->conn = c;
    w->data = out->data;
    w->len = out->len;
    w->req.data = w;
    metrics_buf_init(out);
    uv_buf_t b = uv_buf_init(w->data, (unsigned)w->len);
    c->write_pending += w->len;
    if (uv_write(&w->req, (uv_stream_t *)&c->tcp, &b, 1, conn_on_write) < 0) {
        c->write_pending -= w->len;
        free(w->data);
        free(w);
        conn_close(c);
    }
}

static void conn_on_read(uv_stream_t *st, ssize_t nread, const uv_buf_t *buf)
{
    status_conn *c = st->data;
    if (c->closing)
        return;
    if (nread < 0) {
        conn_close(c); /* EOF or error */
        return;
    }
    if (nread == 0 || c->lingering)
        return;
    if (c->close_after_write)
        return; /* response pending, ignore what follows */
    uv_timer_start(&c->timer, conn_on_timeout, c->srv->opt.idle_timeout_ms, 0);
    metrics_buf out;
    metrics_buf_init(&out);
    int done = status_session_feed(c->sess, buf->base, (size_t)nread, &out);
    conn_send(c, &out);
    metrics_buf_free(&out);
    if (c->closing)
        return;
    if (done) {
        c->close_after_write = 1;
        conn_after_writes(c);
    } else if (c->write_pending > STATUS_MAX_PENDING_WRITE) {
        /* A client that pipelines faster than it reads waits for us. */
        uv_read_stop(st);
        c->reading = 0;
    }
}

static void server_on_connection(uv_stream_t *ls, int status)
{
    status_server *srv = ls->data;
    if (status < 0 || srv->closing)
        return;
    status_conn *c = calloc(1, sizeof *c);
    if (!c)
        return;
    c->srv = srv;
    c->sess = status_session_new(&srv->opt, &srv->prov);
    if (!c->sess || uv_tcp_init(srv->loop, &c->tcp) < 0) {
        status_session_free(c->sess);
        free(c);
        return;
    }
    c->tcp.data = c;
    c->handles_open = 1;
    uv_timer_init(srv->loop, &c->timer); /* cannot fail on unix */
    c->timer.data = c;
    c->handles_open = 2;
    c->next = srv->conns;
    if (srv->conns)
        srv->conns->prev = c;
    srv->conns = c;
    srv->n_conns++;
    c->refused = srv->n_serving >= srv->opt.max_connections;
    if (!c->refused)
        srv->n_serving++;
    if (uv_accept(ls, (uv_stream_t *)&c->tcp) < 0) {
        conn_close(c);
        return;
    }
    uv_tcp_nodelay(&c->tcp, 1);
    if (c->refused) {
        metrics_buf out;
        metrics_buf_init(&out);
        respond_text(&out, 503, "too many connections\n", "Retry-After: 1\r\n",
                     0, 0, 0);
        c->close_after_write = 1;
        conn_send(c, &out);
        metrics_buf_free(&out);
        /* Reading lets the lingering close see the client's EOF. */
        c->reading = 1;
        uv_read_start((uv_stream_t *)&c->tcp, conn_on_alloc, conn_on_read);
        conn_after_writes(c);
        return;
    }
    uv_timer_start(&c->timer, conn_on_timeout, srv->opt.idle_timeout_ms, 0);
    c->reading = 1;
    if (uv_read_start((uv_stream_t *)&c->tcp, conn_on_alloc, conn_on_read) < 0)
        conn_close(c);
}

static void server_on_listener_close(uv_handle_t *h)
{
    status_server *srv = h->data;
    srv->listener_open = 0;
    server_maybe_finish(srv);
}

static int is_loopback(const struct sockaddr_storage *ss)
{
    if (ss->ss_family == AF_INET) {
        const struct sockaddr_in *a = (const struct sockaddr_in *)ss;
        return (ntohl(a->sin_addr.s_addr) >> 24) == 127;
    }
    const struct sockaddr_in6 *a = (const struct sockaddr_in6 *)ss;
    static const unsigned char v4mapped[12] = {0, 0, 0, 0, 0, 0, 0, 0, 0, 0,
                                               0xff, 0xff};
    if (memcmp(a->sin6_addr.s6_addr, v4mapped, 12) == 0)
        return a->sin6_addr.s6_addr[12] == 127;
    return IN6_IS_ADDR_LOOPBACK(&a->sin6_addr);
}

status_server *status_server_start(uv_loop_t *loop, const status_options *opt,
                                   const status_provider *prov, char *err,
                                   size_t err_len)
{
    char dummy[8];
    if (!err || !err_len)
        err = dummy, err_len = sizeof dummy;
    status_options defaults;
    status_options_default(&defaults);
    const char *addr = opt->listen_addr && *opt->listen_addr
                           ? opt->listen_addr
                           : defaults.listen_addr;
    if (opt->port < 0 || opt->port > 65535) {
        snprintf(err, err_len, "status: port %d out of range 0..65535",
                 opt->port);
        return NULL;
    }
    struct sockaddr_storage ss;
    memset(&ss, 0, sizeof ss);
    if (uv_ip4_addr(addr, opt->port, (struct sockaddr_in *)&ss) != 0 &&
        uv_ip6_addr(addr, opt->port, (struct sockaddr_in6 *)&ss) != 0) {
        snprintf(err, err_len,
                 "status: listen address \"%s\" is not an IPv4 or IPv6 literal",
                 addr);
        return NULL;
    }
    int has_token = opt->token && *opt->token;
    if (!is_loopback(&ss) && !has_token) {
        if (!opt->allow_remote_without_token) {
            snprintf(err, err_len,
                     "status: refusing to listen on non-loopback address %s "
                     "without a token; configure a token or set the explicit "
                     "opt-out to allow remote access without one",
                     addr);
            return NULL;
        }
        char msg[256];
        snprintf(msg, sizeof msg,
                 "status: listening on non-loopback address %s without a "
                 "token: anyone who can reach it can read the status",
                 addr);
        if (opt->log_warning)
            opt->log_warning(opt->log_ctx, msg);
        else
            fprintf(stderr, "warning: %s\n", msg);
    }

    status_server *srv = calloc(1, sizeof *srv);
    if (!srv) {
        snprintf(err, err_len, "status: out of memory");
        return NULL;
    }
    srv->loop = loop;
    srv->opt = *opt;
    srv->prov = *prov;
    srv->addr = strdup(addr);
    srv->token = has_token ? strdup(opt->token) : NULL;
    if (!srv->addr || (has_token && !srv->token)) {
        free(srv->addr);
        free(srv->token);
        free(srv);
        snprintf(err, err_len, "status: out of memory");
        return NULL;
    }
    srv->opt.listen_addr = srv->addr;
    srv->opt.token = srv->token;
    if (!srv->opt.max_connections)
        srv->opt.max_connections = defaults.max_connections;
    if (!srv->opt.idle_timeout_ms)
        srv->opt.idle_timeout_ms = defaults.idle_timeout_ms;
    if (!srv->opt.max_header_bytes)
        srv->opt.max_header_bytes = defaults.max_header_bytes;
    if (!srv->opt.max_body_bytes)
        srv->opt.max_body_bytes = defaults.max_body_bytes;

    uv_tcp_init(loop, &srv->listener);
    srv->listener.data = srv;
    srv->listener_open = 1;
    int rc = uv_tcp_bind(&srv->listener, (const struct sockaddr *)&ss, 0);
    if (rc == 0)
        rc = uv_listen((uv_stream_t *)&srv->listener, 128, server_on_connection);
    if (rc == 0) {
        struct sockaddr_storage bound;
        int len = sizeof bound;
        rc = uv_tcp_getsockname(&srv->listener, (struct sockaddr *)&bound, &len);
        if (rc == 0)
            srv->port = ntohs(bound.ss_family == AF_INET
                                  ? ((struct sockaddr_in *)&bound)->sin_port
                                  : ((struct sockaddr_in6 *)&bound)->sin6_port);
    }
    if (rc != 0) {
        snprintf(err, err_len, "status: cannot listen on %s port %d: %s", addr,
                 opt->port, uv_strerror(rc));
        /* Free through the close callback, as libuv requires. */
        srv->closing = 1;
        uv_close((uv_handle_t *)&srv->listener, server_on_listener_close);
        return NULL;
    }
    return srv;
}

int status_server_port(const status_server *srv) { return srv->port; }

uint32_t status_server_connections(const status_server *srv)
{
    return srv->n_conns;
}

void status_server_close(status_server *srv, void (*cb)(void *arg), void *arg)
{
    if (srv->closing)
        return;
    srv->closing = 1;
    srv->close_cb = cb;
    srv->close_arg = arg;
    uv_close((uv_handle_t *)&srv->listener, server_on_listener_close);
    for (status_conn *c = srv->conns; c; c = c->next)
        conn_close(c);
}
