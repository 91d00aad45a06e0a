/*
 * service.h - one running daemon: the loop, the bus, the pipeline, the
 * checkpoints, the status endpoint, the timers and the signals.
 *
 * `oddsky run` and `oddsky demo` both call service_run(); it returns when
 * the daemon has drained and stopped, with the exit code to use.
 *
 * Learn once: the ledger remembers, per input partition, the highest
 * offset the model learned.  On assignment a partition starts at
 * min(committed, learned + 1): packets the model learned before a crash
 * but whose learning the last checkpoint missed are read again and
 * learned, packets it had already checkpointed are scored and re-published
 * but not learned again.
 *
 * Shutdown: SIGTERM or SIGINT stops consumption, waits for the results in
 * flight up to run.drain_deadline_ms, stores and commits offsets, writes a
 * checkpoint and exits 0.  SIGHUP reloads
 * the options marked live; SIGUSR1 writes a checkpoint now.
 */
#ifndef ODDSKY_DAEMON_SERVICE_H
#define ODDSKY_DAEMON_SERVICE_H

#include <stddef.h>

#include "config.h"
#include "log.h"

typedef struct service_opts {
    const char *config_path;     /* for SIGHUP reload; NULL = no reload */
    const char *const *sets;     /* --set overrides, reapplied on reload */
    size_t n_sets;
    const char *banner;          /* printed once when consuming starts */
    int status_any_port;         /* serve status on a free port even when
                                    status.port is 0 (demo --port 0) */
    /* Called once from the loop after the status server is up (demo). */
    void (*on_started)(void *arg, int status_port);
    void *arg;
} service_opts;

/* Run until stopped.  cfg must be validated for `run`; it is borrowed and
 * may be replaced internally on reload.  Returns a sysexits.h code. */
int service_run(struct oddsky_config *cfg, log_sink *sink,
                const service_opts *opts);

#endif
