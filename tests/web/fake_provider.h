/*
 * fake_provider.h - a status provider for tests whose numbers vary.
 *
 * It stands in for the daemon: a metrics registry fed with invented
 * traffic (fake_status_advance), and a /status document built from it plus
 * an invented model (6 clusters over 4 features that drift with each
 * call).  Every /status call advances the fake clock by step_s first, so
 * each served document is different; when dump_dir is set each one is also
 * written to <dump_dir>/<uptime_s>.json so a test can compare what a page
 * shows with what was served.
 */
#ifndef ODDSKY_TESTS_FAKE_PROVIDER_H
#define ODDSKY_TESTS_FAKE_PROVIDER_H

#include <jansson.h>

#include "daemon/metrics.h"
#include "daemon/status.h"

#define FAKE_K 6
#define FAKE_DIM 4
#define FAKE_BINS 48

typedef struct fake_status {
    metrics_registry *reg;
    metrics_family *packets, *results, *flags, *dead, *errors, *latency, *lag;
    unsigned calls;       /* /status documents built */
    double now_s;         /* fake monotonic clock */
    double step_s;        /* advance per /status call, 2 (whole seconds) */
    int healthy;          /* 1 unless a test says otherwise */
    int checkpoints;      /* POST /checkpoint calls that succeeded */
    const char *dump_dir; /* NULL: do not write served documents */
} fake_status;

/* Build the registry and zero the state.  0 or -1. */
int fake_status_init(fake_status *f);
void fake_status_free(fake_status *f);

/* Invent seconds of traffic (a second at a time, ticking the history). */
void fake_status_advance(fake_status *f, double seconds);

/* The provider whose ctx is f. */
status_provider fake_status_provider(fake_status *f);

#endif
