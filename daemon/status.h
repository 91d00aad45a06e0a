/*
 * status.h - the operator's HTTP/1.1 endpoint on the daemon's libuv loop.
 *
 * Routes:
 *   GET  /healthz     200 "ok" when healthy, 503 with the reason
 *   GET  /status      JSON document from the provider (see status-fields.md)
 *   GET  /metrics     Prometheus text format 0.0.4
 *   GET  /            the live page (daemon/livepage.h), no external assets
 *   POST /checkpoint  write a checkpoint now; needs the token
 * HEAD is accepted wherever GET is.  Unknown path 404; wrong method 405
 * with Allow; malformed request 400; header bytes over the limit 431;
 * body over the limit 413; connections over the limit get 503 and are
 * closed; an idle connection is closed after idle_timeout_ms.
 *
 * Security: binds to 127.0.0.1 unless told otherwise; refuses to start on
 * a non-loopback address without a token unless allow_remote_without_token
 * is set (a warning is logged then).  State-changing routes need
 * "Authorization: Bearer <token>" (401 without it, 403 when wrong) and are
 * refused with 403 when no token is configured.
 *
 * The server knows nothing of Kafka or models: everything it shows comes
 * through the provider's callbacks, which run on the loop thread and
 * should only read what the hot path already keeps.
 *
 * The request handling is a socket-free "session" (bytes in, response
 * bytes out) so that tests and the fuzz target can drive it directly; the
 * server wraps one session per TCP connection.
 *
 * Handles: the server allocates its listener and connection handles and
 * frees each in its close callback (libuv rules); status_server_close()
 * closes them all, then calls the caller back and frees the server.
 */
#ifndef ODDSKY_DAEMON_STATUS_H
#define ODDSKY_DAEMON_STATUS_H

#include <jansson.h>
#include <stddef.h>
#include <stdint.h>
#include <uv.h>

#include "metrics.h"

typedef struct status_provider {
    void *ctx;
    /* The /status document: a new reference (the server decrefs it), or
     * NULL for a 500. */
    json_t *(*status_json)(void *ctx);
    /* Nonzero when healthy; else 0 with a one-line reason in reason. */
    int (*healthy)(void *ctx, char *reason, size_t len);
    /* Append the Prometheus text (e.g. metrics_render()) to out. */
    void (*metrics_text)(void *ctx, metrics_buf *out);
    /* Write (or start) a checkpoint.  0 with a message for the operator,
     * or negative with the reason in msg (answered 500).  May be NULL:
     * the route then answers 501. */
    int (*checkpoint_now)(void *ctx, char *msg, size_t len);
} status_provider;

typedef struct status_options {
    const char *listen_addr;       /* IPv4 or IPv6 literal, "127.0.0.1" */
    int port;                      /* 0 = ephemeral (status_server_port) */
    const char *token;             /* NULL or "" = no token */
    int allow_remote_without_token;/* opt-out of the non-loopback refusal */
    uint32_t max_connections;      /* 64 */
    uint32_t idle_timeout_ms;      /* 30000 */
    uint32_t max_header_bytes;     /* 8192: request line + header fields */
    uint32_t max_body_bytes;       /* 4096 */
    /* Where the warning about a remote bind without a token goes; NULL
     * writes one line to stderr. */
    void (*log_warning)(void *log_ctx, const char *msg);
    void *log_ctx;
} status_options;

/* Fill o with the defaults above. */
void status_options_default(status_options *o);

/* ---- socket-free request handling ------------------------------------ */

typedef struct status_session status_session;

/* A session reads opt and prov through the pointers given: both must
 * outlive it, and opt's limits are used as they are (no defaults filled
 * in).  Returns NULL when out of memory. */
status_session *status_session_new(const status_options *opt,
                                   const status_provider *prov);
void status_session_free(status_session *s);

/* Parse len bytes of request stream (any split, pipelining allowed) and
 * append the complete responses for every request finished so far to out.
 * Returns 0 to keep reading, 1 when the connection must close once out is
 * written (Connection: close, HTTP/1.0 without keep-alive, an error
 * response); later calls then do nothing and return 1. */
int status_session_feed(status_session *s, const char *data, size_t len,
                        metrics_buf *out);

/* ---- the server ------------------------------------------------------- */

typedef struct status_server status_server;

/* Bind and listen on loop.  opt and prov are copied (the token too); a
 * zero limit in opt takes its default.  Returns NULL with a reason in err:
 * bad address, non-loopback address without a token (and without the
 * opt-out), bind/listen failure, out of memory (after a bind failure the
 * handle is released on the loop's next run). */
status_server *status_server_start(uv_loop_t *loop, const status_options *opt,
                                   const status_provider *prov, char *err,
                                   size_t err_len);

/* The bound port (the real one when opt->port was 0). */
int status_server_port(const status_server *srv);

/* Open client connections right now. */
uint32_t status_server_connections(const status_server *srv);

/* Stop listening and close every connection.  When the last handle has
 * closed, cb(arg) runs (cb may be NULL) and srv is freed: do not touch
 * srv after this call. */
void status_server_close(status_server *srv, void (*cb)(void *arg),
                         void *arg);

#endif
