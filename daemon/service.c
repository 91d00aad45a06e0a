/*
 * service.c - the running daemon (see service.h).
 *
 * Everything runs on one libuv loop: the bus wakes it for Kafka, a one
 * second housekeeping timer ticks the metrics windows, schedules
 * checkpoints, watches the drain and refreshes the gauges the status page
 * reads; signals arrive as uv_signal_t handles (libuv's handlers only set
 * flags).  The status handler only reads what the hot path already keeps.
 */
#include "service.h"

#include <errno.h>
#include <math.h>
#include <stdio.h>
#include <stdlib.h>
#include <string.h>
#include <sys/stat.h>
#include <sysexits.h>
#include <time.h>
#include <unistd.h>
#include <uv.h>

#include "../core/model.h"
#include "bus.h"
#include "commands.h"
#include "metrics.h"
#include "pipeline.h"
#include "state.h"
#include "status.h"

#define HDR_TOPIC "oddsky.input.topic"
#define HDR_PARTITION "oddsky.input.partition"
#define HDR_OFFSET "oddsky.input.offset"
#define HDR_REASON "oddsky.reason"
#define HDR_REASON_TEXT "oddsky.reason.text"
#define HDR_ORIGINAL_BYTES "oddsky.original.bytes"
#define PAUSED_UNHEALTHY_S 60
#define HIST_GROUPS 48
#define TAG_RESULT 1 /* bus ticket tag: the packet got a result */

static const double latency_bounds[] = {0.0005, 0.001, 0.0025, 0.005, 0.01,
                                        0.025, 0.05, 0.1, 0.25, 0.5, 1,
                                        2.5, 5, 10, 30, 60};

enum { CK_OK = 0, CK_FAILED = 1 };

typedef struct service {
    uv_loop_t loop;
    struct oddsky_config *cfg;
    struct oddsky_config reloaded; /* owned copy after a reload */
    int have_reloaded;
    const service_opts *opts;
    log_sink *sink;
    log_ctx log, log_bus, log_state;

    pipeline *pl;
    bus *bus;
    rd_kafka_topic_t *out_rkt, *flag_rkt, *dlq_rkt;
    state_ledger ledger;
    const char *cache_topic; /* last ledger lookup */
    int32_t cache_part;
    state_ledger_entry *cache_entry;
    uint8_t *snap;
    size_t snap_cap;

    metrics_registry *reg;
    metrics_family *m_packets, *m_results, *m_flags, *m_dead, *m_learned,
        *m_rescored, *m_redelivered, *m_delivery_failed, *m_checkpoints,
        *m_latency, *m_in_flight, *m_lag, *m_threshold, *m_expected,
        *m_model_bytes, *m_uptime, *m_kafka_time, *m_consumer_errors,
        *m_offsets_skipped, *m_skips, *m_window_full, *m_untracked;
    status_server *status;
    status_provider prov;
    /* Label values of dead_letters_total: every refusal reason, plus
     * produce_failed (kept here: the registry borrows them). */
    const char *reason_values[PACKET_REASON_COUNT + 2];

    uv_signal_t sig_term, sig_int, sig_hup, sig_usr1;
    uv_timer_t tick;
    int handles_open;

    uint64_t start_ms;
    uint64_t last_ck_ms;
    uint64_t last_select_ms;
    int draining, stop_now, fatal;
    char fatal_why[512];
    int exit_code;
    uint64_t paused_since_ms;

    struct {
        int have, ok;
        uint64_t time_ms;
        size_t bytes;
        char path[4096];
        char error[512];
    } ck;
    uint64_t prev_counts[4];
} service;

static uint64_t wall_ms(void)
{
    struct timespec ts;
    clock_gettime(CLOCK_REALTIME, &ts);
    return (uint64_t)ts.tv_sec * 1000 + (uint64_t)ts.tv_nsec / 1000000;
}

static uint64_t mono_ms(void)
{
    struct timespec ts;
    clock_gettime(CLOCK_MONOTONIC, &ts);
    return (uint64_t)ts.tv_sec * 1000 + (uint64_t)ts.tv_nsec / 1000000;
}

static void iso_time(uint64_t ms, char *buf, size_t len)
{
    time_t s = (time_t)(ms / 1000);
    struct tm tm;
    gmtime_r(&s, &tm);
    snprintf(buf, len, "%04d-%02d-%02dT%02d:%02d:%02d.%03uZ", (tm.tm_year + 1900) % 10000,
             tm.tm_mon + 1, tm.tm_mday, tm.tm_hour, tm.tm_min, tm.tm_sec,
             (unsigned)(ms % 1000));
}

/* ---- metrics ------------------------------------------------------------ */

static int register_metrics(service *s, char *err, size_t len)
{
    s->reg = metrics_new(NULL);
    if (!s->reg) {
        snprintf(err, len, "out of memory");
        return -1;
    }
    const char **reason_values = s->reason_values;
    uint32_t nr = 0;
    for (int code = -1; packet_reason_index(code) >= 0; code--)
        reason_values[nr++] = packet_reason_name(code);
    reason_values[nr++] = "produce_failed";
    static const char *ck_values[] = {"ok", "failed"};
    struct {
        metrics_family **dst;
        metrics_spec spec;
    } t[] = {
        {&s->m_packets, {.name = "packets_total", .help = "Input messages consumed.", .kind = METRICS_COUNTER, .windowed = 1}},
        {&s->m_results, {.name = "results_total", .help = "Results published (delivery confirmed).", .kind = METRICS_COUNTER, .windowed = 1}},
        {&s->m_flags, {.name = "flags_total", .help = "Packets flagged for a person to look at.", .kind = METRICS_COUNTER, .windowed = 1}},
        {&s->m_dead, {.name = "dead_letters_total", .help = "Messages sent to the dead-letter topic, by reason.", .kind = METRICS_COUNTER,
                      .label = "reason", .values = reason_values, .n_values = nr, .windowed = 1}},
        {&s->m_learned, {.name = "learned_total", .help = "Packets learned by the model.", .kind = METRICS_COUNTER}},
        {&s->m_rescored, {.name = "rescored_total", .help = "Packets scored again after a restart but not learned again (their results are duplicates).", .kind = METRICS_COUNTER}},
        {&s->m_kafka_time, {.name = "kafka_time_total", .help = "Packets placed at their Kafka timestamp for lack of a usable observation time.", .kind = METRICS_COUNTER}},
        {&s->m_redelivered, {.name = "redeliveries_total", .help = "Outputs produced again after a retriable delivery failure.", .kind = METRICS_COUNTER}},
        {&s->m_delivery_failed, {.name = "delivery_failures_total", .help = "Outputs whose delivery failed for good (the daemon stops).", .kind = METRICS_COUNTER}},
        {&s->m_consumer_errors, {.name = "consumer_errors_total", .help = "Errors reported by the Kafka consumer.", .kind = METRICS_COUNTER}},
        {&s->m_offsets_skipped, {.name = "input_offsets_skipped_total", .help = "Input offsets never received between consecutive messages of a partition (or after its committed offset): deleted by retention before they were read, compacted, or transaction markers (one per transaction).", .kind = METRICS_COUNTER}},
        {&s->m_skips, {.name = "input_skips_total", .help = "Jumps over more than one input offset never received (each one logged as a warning with its range).", .kind = METRICS_COUNTER}},
        {&s->m_window_full, {.name = "input_window_full_total", .help = "Times a partition was held and sought back because its offset window was full (an old result still undelivered).", .kind = METRICS_COUNTER}},
        {&s->m_untracked, {.name = "input_untracked_total", .help = "Input messages whose offset could not be tracked: redeliveries below the offset window (handled, not stored) and messages of partitions beyond kafka.max_partitions (left for after a restart).", .kind = METRICS_COUNTER}},
        {&s->m_checkpoints, {.name = "checkpoints_total", .help = "Checkpoint writes, by result.", .kind = METRICS_COUNTER,
                             .label = "result", .values = ck_values, .n_values = 2}},
        {&s->m_latency, {.name = "latency_seconds", .help = "Time from consuming a packet to the delivery of its result.", .kind = METRICS_HISTOGRAM,
                         .bounds = latency_bounds, .n_bounds = sizeof latency_bounds / sizeof latency_bounds[0], .windowed = 1}},
        {&s->m_in_flight, {.name = "in_flight", .help = "Input packets whose outputs await delivery.", .kind = METRICS_GAUGE}},
        {&s->m_lag, {.name = "consumer_lag_messages", .help = "Messages behind the high watermark over all assigned partitions.", .kind = METRICS_GAUGE}},
        {&s->m_threshold, {.name = "novelty_threshold", .help = "Novelty threshold in force for flags.", .kind = METRICS_GAUGE}},
        {&s->m_expected, {.name = "expected_flags_per_night", .help = "Flags expected in a night at the current threshold.", .kind = METRICS_GAUGE}},
        {&s->m_model_bytes, {.name = "model_bytes", .help = "Memory held by the model.", .kind = METRICS_GAUGE}},
        {&s->m_uptime, {.name = "uptime_seconds", .help = "Seconds since the daemon started.", .kind = METRICS_GAUGE}},
    };
    for (size_t i = 0; i < sizeof t / sizeof t[0]; i++) {
        *t[i].dst = metrics_register(s->reg, &t[i].spec, err, len);
        if (!*t[i].dst)
            return -1;
    }
    return 0;
}

static void count_dead(service *s, int reason)
{
    int idx = reason == 1 ? (int)PACKET_REASON_COUNT : packet_reason_index(reason);
    if (idx < 0)
        idx = packet_reason_index(PACKET_E_INTERNAL);
    metrics_inc(metrics_counter_at(s->m_dead, (uint32_t)idx));
}

/* ---- checkpoints ---------------------------------------------------------- */

static int checkpoint(service *s, const char *why)
{
    model *m = pipeline_model(s->pl);
    size_t need = model_snapshot_size(m);
    if (need > s->snap_cap) {
        uint8_t *nb = realloc(s->snap, need);
        if (!nb) {
            log_error(&s->log_state, "checkpoint: no memory for %zu bytes", need);
            return -ENOMEM;
        }
        s->snap = nb;
        s->snap_cap = need;
    }
    size_t len = 0;
    model_snapshot(m, s->snap, s->snap_cap, &len);
    char err[512] = "";
    uint64_t now = wall_ms();
    int rc = state_write(s->cfg->state.dir, NULL, now,
                         (char *const *)pipeline_feature_names(s->pl),
                         pipeline_dim(s->pl), &s->ledger, s->snap, len, err,
                         sizeof err);
    s->ck.have = 1;
    s->ck.time_ms = now;
    state_path(s->cfg->state.dir, s->ck.path, sizeof s->ck.path);
    s->last_ck_ms = mono_ms();
    if (rc < 0) {
        s->ck.ok = 0;
        snprintf(s->ck.error, sizeof s->ck.error, "%s", err);
        metrics_inc(metrics_counter_at(s->m_checkpoints, CK_FAILED));
        log_error(&s->log_state,
                  "checkpoint (%s) failed: %s; the last good checkpoint is kept "
                  "and the daemon goes on", why, err);
        return rc;
    }
    s->ck.ok = 1;
    s->ck.error[0] = '\0';
    struct stat st;
    s->ck.bytes = stat(s->ck.path, &st) == 0 ? (size_t)st.st_size : len;
    metrics_inc(metrics_counter_at(s->m_checkpoints, CK_OK));
    log_info_kv(&s->log_state, LOG_KV(LOG_UINT("bytes", s->ck.bytes), LOG_STR("reason", why)),
                "checkpoint written to %s", s->ck.path);
    return 0;
}

static int ensure_dir(const char *dir, char *err, size_t len)
{
    char tmp[4096];
    snprintf(tmp, sizeof tmp, "%s", dir);
    for (char *p = tmp + 1; *p; p++) {
        if (*p != '/')
            continue;
        *p = '\0';
        if (mkdir(tmp, 0750) < 0 && errno != EEXIST) {
            snprintf(err, len, "state.dir: cannot create %.300s: %s", tmp, strerror(errno));
            return -1;
        }
        *p = '/';
    }
    if (mkdir(tmp, 0750) < 0 && errno != EEXIST) {
        snprintf(err, len, "state.dir: cannot create %.300s: %s", tmp, strerror(errno));
        return -1;
    }
    return 0;
}

/* Restore the model and the ledger.  Returns 0 (restored or fresh), or -1
 * when the daemon must not start. */
static int restore(service *s)
{
    char path[4096], err[512] = "";
    state_path(s->cfg->state.dir, path, sizeof path);
    state_checkpoint ck;
    int rc = state_read(path, &ck, err, sizeof err);
    if (rc == -ENOENT) {
        log_info(&s->log_state, "no checkpoint at %s: starting with a fresh model", path);
        return 0;
    }
    const char *problem = NULL;
    char why[768];
    model *m = NULL;
    if (rc < 0) {
        snprintf(why, sizeof why, "%s", err);
        problem = why;
    } else {
        const char *const *names = pipeline_feature_names(s->pl);
        uint32_t dim = pipeline_dim(s->pl);
        if (ck.n_features != dim) {
            snprintf(why, sizeof why,
                     "checkpoint %.300s has %u features, the feature map %u: it was "
                     "made with another feature map", path, ck.n_features, dim);
            problem = why;
        }
        for (uint32_t j = 0; !problem && j < dim; j++)
            if (strcmp(ck.features[j], names[j]) != 0) {
                snprintf(why, sizeof why,
                         "checkpoint %.300s: feature %u is '%.100s', the feature map says "
                         "'%.100s'", path, j, ck.features[j], names[j]);
                problem = why;
            }
        if (!problem) {
            int e = 0;
            m = model_restore(ck.model, ck.model_len, &e);
            if (!m) {
                snprintf(why, sizeof why, "checkpoint %.300s: model: %s", path,
                         core_strerror(e));
                problem = why;
            }
        }
    }
    if (problem) {
        if (rc == 0)
            state_checkpoint_free(&ck);
        if (!s->cfg->state.fresh_start_on_bad_checkpoint) {
            log_error(&s->log_state,
                      "%s; refusing to start (set state.fresh_start_on_bad_checkpoint "
                      "to start a fresh model instead; the file is kept)", problem);
            return -1;
        }
        char aside[4200];
        snprintf(aside, sizeof aside, "%s.bad-%llu", path,
                 (unsigned long long)(wall_ms() / 1000));
        rename(path, aside);
        log_warn(&s->log_state,
                 "%s; starting a fresh model as state.fresh_start_on_bad_checkpoint "
                 "says (old file moved to %s)", problem, aside);
        return 0;
    }
    char err2[256];
    if (pipeline_set_model(s->pl, m, err2, sizeof err2) != 0) {
        model_free(m);
        state_checkpoint_free(&ck);
        log_error(&s->log_state, "checkpoint %s: %s", path, err2);
        return -1;
    }
    for (uint32_t i = 0; i < ck.ledger.n; i++)
        state_ledger_set(&s->ledger, ck.ledger.e[i].topic, ck.ledger.e[i].partition,
                         ck.ledger.e[i].learned);
    model_summary sum;
    model_summarize(m, &sum);
    char when[40];
    iso_time(ck.written_unix_ms, when, sizeof when);
    log_info_kv(&s->log_state,
                LOG_KV(LOG_UINT("learned", sum.learned), LOG_UINT("partitions", ck.ledger.n)),
                "restored checkpoint %s written %s", path, when);
    const model_params *have = model_get_params(m);
    model_params want;
    config_to_model_params(s->cfg, pipeline_dim(s->pl), &want);
    if (have->k != want.k || have->warm_n != want.warm_n ||
        have->space_chains != want.space_chains || have->seed != want.seed)
        log_warn(&s->log_state,
                 "the checkpoint's model was built with other structural options "
                 "(k=%u, warmup=%u, chains=%u, seed=%llu) than the config; the "
                 "checkpoint's apply until a fresh start", have->k, have->warm_n,
                 have->space_chains, (unsigned long long)have->seed);
    state_checkpoint_free(&ck);
    return 0;
}

/* ---- the hot path --------------------------------------------------------- */

static state_ledger_entry *ledger_entry(service *s, const char *topic,
                                        int32_t part)
{
    if (s->cache_entry && s->cache_topic == topic && s->cache_part == part)
        return s->cache_entry;
    for (uint32_t i = 0; i < s->ledger.n; i++) {
        state_ledger_entry *e = &s->ledger.e[i];
        if (e->partition == part && strcmp(e->topic, topic) == 0) {
            s->cache_topic = topic;
            s->cache_part = part;
            s->cache_entry = e;
            return e;
        }
    }
    return NULL;
}

/* Dead letters carry the original bytes, cut to DEAD_LETTER_MAX_BYTES so
 * that a message refused for its size still fits librdkafka's default
 * message.max.bytes (1,000,000); a cut copy says so in headers. */
#define DEAD_LETTER_MAX_BYTES (1000000u - 64u * 1024u)

static void produce_dead(service *s, bus *b, bus_ticket *t,
                         const rd_kafka_message_t *m, int reason,
                         const char *text, bus_header *h, uint32_t nh)
{
    const char *rname = reason == 1 ? "produce_failed" : packet_reason_name(reason);
    h[nh++] = (bus_header){HDR_REASON, rname, strlen(rname)};
    h[nh++] = (bus_header){HDR_REASON_TEXT, text, strlen(text)};
    size_t len = m->len;
    char orig[24];
    if (len > DEAD_LETTER_MAX_BYTES) {
        int ol = snprintf(orig, sizeof orig, "%zu", m->len);
        h[nh++] = (bus_header){HDR_ORIGINAL_BYTES, orig, (size_t)ol};
        len = DEAD_LETTER_MAX_BYTES;
    }
    char err[256];
    if (bus_produce(b, t, s->dlq_rkt, m->key, m->key_len, m->payload, len, h,
                    nh, err, sizeof err) != 0) {
        /* Not even the dead-letter topic takes it: stop rather than lose
         * it.  The ticket never completes, so the offset is not stored. */
        char why[512];
        snprintf(why, sizeof why,
                 "%s partition %d offset %lld was refused (%s) and its dead "
                 "letter could not be produced: %s",
                 rd_kafka_topic_name(m->rkt), (int)m->partition,
                 (long long)m->offset, rname, err);
        bus_ticket_fail(b, t, why);
        return;
    }
    count_dead(s, reason);
    log_warn_kv(&s->log_bus,
                LOG_KV(LOG_STR("topic", rd_kafka_topic_name(m->rkt)),
                       LOG_INT("partition", m->partition), LOG_INT("offset", m->offset),
                       LOG_STR("reason", rname)),
                "packet refused: %s", text);
}

static void on_message(void *ctx, bus *b, const rd_kafka_message_t *m,
                       bus_ticket *t)
{
    service *s = ctx;
    const char *topic = rd_kafka_topic_name(m->rkt);
    state_ledger_entry *le = ledger_entry(s, topic, m->partition);
    int learn = !le || m->offset > le->learned;
    metrics_inc(metrics_counter_at(s->m_packets, 0));

    char pbuf[16], obuf[24];
    int pl = snprintf(pbuf, sizeof pbuf, "%d", (int)m->partition);
    int ol = snprintf(obuf, sizeof obuf, "%lld", (long long)m->offset);
    bus_header h[6] = {
        {HDR_TOPIC, topic, strlen(topic)},
        {HDR_PARTITION, pbuf, (size_t)pl},
        {HDR_OFFSET, obuf, (size_t)ol},
    };
    pipeline_input in = {
        .buf = m->payload, .len = m->len, .topic = topic,
        .partition = m->partition, .offset = m->offset,
        .kafka_ts_ms = rd_kafka_message_timestamp(m, NULL), .learn = learn,
    };
    pipeline_output out;
    int rc = pipeline_process(s->pl, &in, &out);
    if (rc != 0) {
        produce_dead(s, b, t, m, rc, packet_reason_text(rc), h, 3);
        return;
    }
    if (learn) {
        metrics_inc(metrics_counter_at(s->m_learned, 0));
        if (le)
            le->learned = m->offset;
        else
            state_ledger_set(&s->ledger, topic, m->partition, m->offset);
    } else {
        metrics_inc(metrics_counter_at(s->m_rescored, 0));
    }
    if (!out.pf->time_from_packet)
        metrics_inc(metrics_counter_at(s->m_kafka_time, 0));
    char err[256];
    if (bus_produce(b, t, s->out_rkt, out.key, out.key_len, out.payload, out.len,
                    h, 3, err, sizeof err) != 0) {
        produce_dead(s, b, t, m, 1, err, h, 3);
        return;
    }
    bus_ticket_set_tag(t, TAG_RESULT);
    if (out.flag) {
        metrics_inc(metrics_counter_at(s->m_flags, 0));
        if (s->flag_rkt &&
            bus_produce(b, t, s->flag_rkt, out.key, out.key_len, out.payload,
                        out.len, h, 3, err, sizeof err) != 0)
            log_error(&s->log_bus, "flagged copy not produced: %s", err);
    }
}

static int64_t on_assign(void *ctx, const char *topic, int32_t part,
                         int64_t committed)
{
    service *s = ctx;
    /* Make the ledger entry now so the hot path never grows the table. */
    state_ledger_set(&s->ledger, topic, part, -1);
    s->cache_entry = NULL;
    state_ledger_entry *le = ledger_entry(s, topic, part);
    int64_t learned = le ? le->learned : -1;
    /* Start at min(committed, learned + 1).  With nothing committed the
     * results of what the model learned may never have been delivered:
     * read the partition from its beginning (what is already learned is
     * scored and re-published, not learned again). */
    int64_t start = RD_KAFKA_OFFSET_INVALID;
    if (learned >= 0 && committed < 0)
        start = RD_KAFKA_OFFSET_BEGINNING;
    else if (learned >= 0 && committed > learned + 1)
        start = learned + 1;
    log_info_kv(&s->log_bus,
                LOG_KV(LOG_STR("topic", topic), LOG_INT("partition", part),
                       LOG_INT("committed", committed), LOG_INT("learned", learned),
                       LOG_INT("start", start)),
                start >= 0 ? "partition assigned; starting after the last learned "
                             "offset to learn what the last checkpoint missed"
                : start == RD_KAFKA_OFFSET_BEGINNING
                    ? "partition assigned; nothing committed yet, so reading it "
                      "from the beginning (learned packets are not learned again)"
                    : "partition assigned");
    return start;
}

static void on_revoke(void *ctx, const char *topic, int32_t part)
{
    service *s = ctx;
    s->cache_entry = NULL;
    log_info_kv(&s->log_bus, LOG_KV(LOG_STR("topic", topic), LOG_INT("partition", part)),
                "partition revoked");
}

static void on_done(void *ctx, int64_t latency_us, int64_t broker_ts_ms, int tag)
{
    service *s = ctx;
    (void)broker_ts_ms;
    if (tag != TAG_RESULT)
        return; /* a dead letter: counted when it was produced */
    metrics_inc(metrics_counter_at(s->m_results, 0));
    metrics_observe(metrics_hist_at(s->m_latency, 0), (double)latency_us * 1e-6);
}

static void begin_stop(service *s, const char *why);

static void on_fatal(void *ctx, const char *why)
{
    service *s = ctx;
    if (!s->fatal) {
        s->fatal = 1;
        snprintf(s->fatal_why, sizeof s->fatal_why, "%s", why);
    }
    log_error(&s->log_bus, "stopping: %s", why);
    s->exit_code = EX_UNAVAILABLE;
}

static void on_bus_log(void *ctx, int level, const char *fac, const char *msg)
{
    service *s = ctx;
    log_level l = level <= 3 ? LOG_LEVEL_ERROR : level <= 4 ? LOG_LEVEL_WARN
                : level <= 6 ? LOG_LEVEL_INFO : LOG_LEVEL_DEBUG;
    if (!log_enabled(&s->log_bus, l))
        return;
    /* Every librdkafka line comes through this one call site: key the rate
     * limiter by facility and text, so that distinct errors are not
     * counted as one ("suppressed N similar messages (like "%s")") while a
     * repeated one is still held back. */
    char key[256];
    snprintf(key, sizeof key, "%s %s", fac, msg);
    log_at_keyed_kv(&s->log_bus, l, key, LOG_KV(LOG_STR("kafka", fac)), "%s", msg);
}

/* ---- status ----------------------------------------------------------------- */

static json_t *num(double v)
{
    return isfinite(v) ? json_real(v) : json_null();
}

static const char *phase(const service *s)
{
    if (s->draining)
        return "draining";
    if (s->paused_since_ms)
        return "paused";
    model_summary sum;
    model_summarize(pipeline_model(s->pl), &sum);
    return sum.warm ? "scoring" : "warming";
}

/* The model reports flags per 10-hour night; run.night_hours rescales. */
static double night_scale(const service *s)
{
    return s->cfg->run.night_hours / 10.0;
}

static json_t *model_json(service *s)
{
    model *m = pipeline_model(s->pl);
    model_summary sum;
    model_summarize(m, &sum);
    json_t *o = json_object();
    json_object_set_new(o, "k", json_integer(sum.k));
    json_object_set_new(o, "warm", json_boolean(sum.warm));
    json_object_set_new(o, "learned", json_integer((json_int_t)sum.learned));
    json_object_set_new(o, "scored", json_integer((json_int_t)sum.scored));
    json_object_set_new(o, "flagged", json_integer((json_int_t)sum.flagged));
    json_object_set_new(o, "dim", json_integer(sum.dim));
    json_object_set_new(o, "event_time", num(sum.time_days));
    json_object_set_new(o, "bytes", json_integer((json_int_t)sum.bytes));
    json_t *feat = json_array();
    const char *const *names = pipeline_feature_names(s->pl);
    for (uint32_t j = 0; j < sum.dim; j++)
        json_array_append_new(feat, json_string(names[j]));
    json_object_set_new(o, "features", feat);
    json_t *cl = json_array();
    for (uint32_t k = 0; sum.warm && k < sum.k; k++) {
        model_cluster_view v;
        if (model_cluster(m, k, &v) != 0)
            continue;
        json_t *c = json_object(), *cen = json_array(), *spr = json_array();
        for (uint32_t j = 0; j < sum.dim; j++) {
            double mu = model_unscale(m, j, v.centroid_z[j]);
            double sd = model_unscale(m, j, v.centroid_z[j] + v.spread_z[j]) - mu;
            json_array_append_new(cen, num(mu));
            json_array_append_new(spr, num(fabs(sd)));
        }
        json_object_set_new(c, "weight", num(v.weight));
        json_object_set_new(c, "centroid", cen);
        json_object_set_new(c, "spread", spr);
        json_array_append_new(cl, c);
    }
    json_object_set_new(o, "clusters", cl);
    json_object_set_new(o, "sketch_fill", num(sum.space_fill));
    json_object_set_new(o, "threshold", num(sum.threshold));
    json_object_set_new(o, "expected_flags_per_night",
                        num(sum.expected_flags_per_night * night_scale(s)));
    double edges[HIST_GROUPS + 1], mass[HIST_GROUPS + 1];
    uint32_t n = model_score_histogram(m, edges, mass, HIST_GROUPS);
    json_t *e = json_array(), *ms = json_array(), *h = json_object();
    double total = 0, above = 0;
    for (uint32_t i = 0; i < n; i++)
        total += mass[i];
    for (uint32_t i = 0; i <= n && n; i++)
        json_array_append_new(e, num(edges[i]));
    for (uint32_t i = 0; i < n; i++) {
        json_array_append_new(ms, num(total > 0 ? mass[i] / total : 0));
        if (edges[i] >= sum.threshold)
            above += mass[i];
    }
    json_object_set_new(h, "edges", e);
    json_object_set_new(h, "mass", ms);
    json_object_set_new(o, "score_histogram", h);
    json_object_set_new(o, "tail_prob_at_threshold",
                        total > 0 && isfinite(sum.threshold) ? json_real(above / total)
                                                             : json_null());
    json_object_set_new(o, "suggested_k", json_integer(sum.suggested_k));
    return o;
}

static json_t *status_json(void *ctx)
{
    service *s = ctx;
    json_t *d = json_object();
    json_object_set_new(d, "version", json_string(ODDSKY_VERSION));
    json_object_set_new(d, "uptime_s", json_real((double)(mono_ms() - s->start_ms) / 1000.0));
    json_object_set_new(d, "phase", json_string(phase(s)));
    if (s->fatal)
        json_object_set_new(d, "fatal", json_string(s->fatal_why));

    json_t *parts = json_array();
    bus_partition_info pi[256];
    uint32_t np = s->bus ? bus_partitions(s->bus, pi, 256) : 0;
    for (uint32_t i = 0; i < np; i++) {
        json_t *o = json_object();
        json_object_set_new(o, "topic", json_string(pi[i].topic));
        json_object_set_new(o, "partition", json_integer(pi[i].partition));
        json_object_set_new(o, "stored", pi[i].stored >= 0 ? json_integer(pi[i].stored) : json_null());
        json_object_set_new(o, "committed", pi[i].stored >= 0 ? json_integer(pi[i].stored) : json_null());
        json_object_set_new(o, "high_watermark", pi[i].high >= 0 ? json_integer(pi[i].high) : json_null());
        json_object_set_new(o, "lag", pi[i].lag >= 0 ? json_integer(pi[i].lag) : json_null());
        json_object_set_new(o, "in_flight", json_integer(pi[i].in_flight));
        json_array_append_new(parts, o);
    }
    json_object_set_new(d, "partitions", parts);

    json_t *rates = json_object();
    struct { const char *name; metrics_family *f; } rs[] = {
        {"packets", s->m_packets}, {"results", s->m_results}, {"flags", s->m_flags}};
    for (size_t i = 0; i < 3; i++) {
        char key[40];
        snprintf(key, sizeof key, "%s_1m", rs[i].name);
        json_object_set_new(rates, key, json_real(metrics_rate(s->reg, rs[i].f, 0, 60)));
        snprintf(key, sizeof key, "%s_5m", rs[i].name);
        json_object_set_new(rates, key, json_real(metrics_rate(s->reg, rs[i].f, 0, 300)));
    }
    double dl1 = 0, dl5 = 0;
    for (uint32_t i = 0; i < metrics_series(s->m_dead); i++) {
        dl1 += metrics_rate(s->reg, s->m_dead, i, 60);
        dl5 += metrics_rate(s->reg, s->m_dead, i, 300);
    }
    json_object_set_new(rates, "dead_letters_1m", json_real(dl1));
    json_object_set_new(rates, "dead_letters_5m", json_real(dl5));
    json_object_set_new(d, "rates_per_s", rates);

    /* Quantiles interpolate inside histogram buckets (as Prometheus'
     * histogram_quantile does) and can land above the largest value
     * seen: never show a quantile above the maximum. */
    json_t *lat = json_object();
    double lmax = 1e3 * metrics_window_max(s->reg, s->m_latency, 0, 60);
    double p50 = 1e3 * metrics_window_quantile(s->reg, s->m_latency, 0, 60, 0.5);
    double p99 = 1e3 * metrics_window_quantile(s->reg, s->m_latency, 0, 60, 0.99);
    if (isfinite(lmax)) {
        p50 = p50 > lmax ? lmax : p50;
        p99 = p99 > lmax ? lmax : p99;
    }
    json_object_set_new(lat, "p50", num(p50));
    json_object_set_new(lat, "p99", num(p99));
    json_object_set_new(lat, "max", num(lmax));
    json_object_set_new(lat, "window_s", json_integer(60));
    json_object_set_new(d, "latency_ms", lat);

    const pipeline_counters *pc = pipeline_get_counters(s->pl);
    json_t *counts = json_object();
    json_object_set_new(counts, "packets", json_integer((json_int_t)metrics_counter_at(s->m_packets, 0)->v));
    json_object_set_new(counts, "results", json_integer((json_int_t)metrics_counter_at(s->m_results, 0)->v));
    json_object_set_new(counts, "flags", json_integer((json_int_t)metrics_counter_at(s->m_flags, 0)->v));
    json_object_set_new(counts, "learned", json_integer((json_int_t)metrics_counter_at(s->m_learned, 0)->v));
    json_object_set_new(counts, "rescored", json_integer((json_int_t)metrics_counter_at(s->m_rescored, 0)->v));
    json_object_set_new(counts, "in_flight", json_integer(s->bus ? (json_int_t)bus_in_flight(s->bus) : 0));
    json_t *dl = json_object();
    for (uint32_t i = 0; i < metrics_series(s->m_dead); i++)
        json_object_set_new(dl, s->reason_values[i], json_integer((json_int_t)metrics_counter_at(s->m_dead, i)->v));
    json_object_set_new(counts, "dead_letters", dl);
    json_t *er = json_object();
    const bus_counters *bc = s->bus ? bus_get_counters(s->bus) : NULL;
    json_object_set_new(er, "delivery_failed", json_integer(bc ? (json_int_t)bc->delivery_failed : 0));
    json_object_set_new(er, "redelivered", json_integer(bc ? (json_int_t)bc->redelivered : 0));
    json_object_set_new(er, "consumer", json_integer(bc ? (json_int_t)bc->consumer_errors : 0));
    json_object_set_new(er, "stall_purges", json_integer(bc ? (json_int_t)bc->purges : 0));
    json_object_set_new(er, "type_errors", json_integer((json_int_t)pc->type_errors));
    json_object_set_new(er, "encode", json_integer((json_int_t)pc->encode_errors));
    json_object_set_new(er, "checkpoint", json_integer((json_int_t)metrics_counter_at(s->m_checkpoints, CK_FAILED)->v));
    json_object_set_new(counts, "errors", er);
    /* What the bus saw of its input besides the messages themselves. */
    json_t *in = json_object();
    json_object_set_new(in, "offsets_skipped", json_integer(bc ? (json_int_t)bc->offsets_skipped : 0));
    json_object_set_new(in, "skips", json_integer(bc ? (json_int_t)bc->skips : 0));
    json_object_set_new(in, "window_full", json_integer(bc ? (json_int_t)bc->window_full : 0));
    json_object_set_new(in, "untracked", json_integer(bc ? (json_int_t)bc->untracked : 0));
    json_object_set_new(counts, "input", in);
    json_object_set_new(d, "counts", counts);

    json_object_set_new(d, "model", model_json(s));

    json_t *rf = json_array();
    pipeline_flag_entry fl[PIPELINE_RECENT_FLAGS];
    uint32_t nf = pipeline_recent_flags(s->pl, fl, PIPELINE_RECENT_FLAGS);
    const char *const *names = pipeline_feature_names(s->pl);
    for (uint32_t i = nf; i-- > 0;) { /* newest last */
        json_t *o = json_object(), *dr = json_array();
        json_object_set_new(o, "packet_id", json_string(fl[i].packet_id));
        json_object_set_new(o, "source_id", json_string(fl[i].source_id));
        json_object_set_new(o, "novelty", num(fl[i].novelty));
        json_object_set_new(o, "tail_prob", num(fl[i].tail_prob));
        json_object_set_new(o, "event_time", num(fl[i].event_time_days));
        for (uint32_t k = 0; k < fl[i].n_drivers; k++) {
            json_t *x = json_object();
            json_object_set_new(x, "feature", json_string(names[fl[i].drivers[k].feature]));
            json_object_set_new(x, "z", num(fl[i].drivers[k].z));
            json_array_append_new(dr, x);
        }
        json_object_set_new(o, "drivers", dr);
        json_array_append_new(rf, o);
    }
    json_object_set_new(d, "recent_flags", rf);

    if (s->ck.have) {
        json_t *c = json_object();
        char when[40];
        iso_time(s->ck.time_ms, when, sizeof when);
        json_object_set_new(c, "time", json_string(when));
        json_object_set_new(c, "path", json_string(s->ck.path));
        json_object_set_new(c, "bytes", json_integer((json_int_t)s->ck.bytes));
        json_object_set_new(c, "ok", json_boolean(s->ck.ok));
        if (!s->ck.ok)
            json_object_set_new(c, "error", json_string(s->ck.error));
        json_object_set_new(d, "last_checkpoint", c);
    } else {
        json_object_set_new(d, "last_checkpoint", json_null());
    }
    json_object_set_new(d, "config", config_to_json(s->cfg));
    return d;
}

static int healthy(void *ctx, char *reason, size_t len)
{
    service *s = ctx;
    if (s->fatal) {
        snprintf(reason, len, "stopping after a fatal error: %s", s->fatal_why);
        return 0;
    }
    if (s->draining) {
        snprintf(reason, len, "draining for shutdown");
        return 0;
    }
    if (s->paused_since_ms && mono_ms() - s->paused_since_ms > PAUSED_UNHEALTHY_S * 1000) {
        snprintf(reason, len,
                 "input paused for %llu s: %llu results await delivery (is the "
                 "broker reachable?)",
                 (unsigned long long)((mono_ms() - s->paused_since_ms) / 1000),
                 (unsigned long long)bus_in_flight(s->bus));
        return 0;
    }
    return 1;
}

static void metrics_text(void *ctx, metrics_buf *out)
{
    service *s = ctx;
    metrics_render(s->reg, out);
}

static int checkpoint_now(void *ctx, char *msg, size_t len)
{
    service *s = ctx;
    int rc = checkpoint(s, "status request");
    if (rc == 0)
        snprintf(msg, len, "checkpoint written to %s (%zu bytes)\n", s->ck.path, s->ck.bytes);
    else
        snprintf(msg, len, "checkpoint failed: %s\n", s->ck.error);
    return rc;
}

static void status_warning(void *arg, const char *msg)
{
    service *s = arg;
    log_warn(&s->log, "status: %s", msg);
}

/* ---- lifecycle ------------------------------------------------------------------ */

static void on_closed(uv_handle_t *h)
{
    (void)h;
}

static void finish(service *s)
{
    /* Everything in flight is delivered or the deadline passed. */
    uint64_t left = bus_drain(s->bus, s->stop_now ? 0 : (int)s->cfg->run.drain_deadline_ms);
    if (left > 0)
        log_warn(&s->log, "%llu results were not delivered before the deadline; "
                          "their packets are read again after a restart",
                 (unsigned long long)left);
    checkpoint(s, "shutdown");
    const pipeline_counters *pc = pipeline_get_counters(s->pl);
    log_info_kv(&s->log,
                LOG_KV(LOG_UINT("packets", pc->packets), LOG_UINT("results", pc->results),
                       LOG_UINT("flags", pc->flags), LOG_UINT("learned", pc->learned),
                       LOG_UINT("rescored", pc->score_only)),
                "stopped");
    bus_close(s->bus, NULL, NULL);
    s->bus = NULL;
    if (s->status) {
        status_server_close(s->status, NULL, NULL);
        s->status = NULL;
    }
    uv_close((uv_handle_t *)&s->tick, on_closed);
    uv_close((uv_handle_t *)&s->sig_term, on_closed);
    uv_close((uv_handle_t *)&s->sig_int, on_closed);
    uv_close((uv_handle_t *)&s->sig_hup, on_closed);
    uv_close((uv_handle_t *)&s->sig_usr1, on_closed);
}

static void begin_stop(service *s, const char *why)
{
    if (s->draining) {
        s->stop_now = 1;
        return;
    }
    s->draining = 1;
    log_info(&s->log, "%s: draining (deadline %u ms)", why, s->cfg->run.drain_deadline_ms);
    bus_stop_consuming(s->bus);
}

static void reload(service *s)
{
    if (!s->opts->config_path) {
        log_warn(&s->log, "SIGHUP: no config file to reload");
        return;
    }
    struct oddsky_config next;
    config_errs errs;
    config_errs_init(&errs);
    if (config_reload(s->cfg, s->opts->config_path, s->opts->sets, s->opts->n_sets,
                      &next, &errs) != 0) {
        for (unsigned i = 0; i < errs.n; i++)
            log_error(&s->log, "reload refused: %s: %s", errs.e[i].path, errs.e[i].rule);
        config_free(&next);
        return;
    }
    /* Apply what can change live. */
    log_sink_set_level(s->sink, (log_level)next.log.level);
    log_sink_set_format(s->sink, (log_format)next.log.format);
    if (s->have_reloaded)
        config_free(&s->reloaded);
    s->reloaded = next;
    s->have_reloaded = 1;
    /* The bus and pipeline borrowed strings from the old config only at
     * start; the checkpoint, drain and status read s->cfg live. */
    s->cfg->state.checkpoint_interval_s = next.state.checkpoint_interval_s;
    s->cfg->run = next.run;
    s->cfg->log = next.log;
    log_info(&s->log, "configuration reloaded from %s", s->opts->config_path);
}

static void on_signal(uv_signal_t *h, int signum)
{
    service *s = h->data;
    switch (signum) {
    case SIGTERM:
    case SIGINT:
        begin_stop(s, signum == SIGTERM ? "SIGTERM" : "SIGINT");
        break;
    case SIGHUP:
        reload(s);
        break;
    case SIGUSR1:
        checkpoint(s, "SIGUSR1");
        break;
    }
}

static void on_tick(uv_timer_t *h)
{
    service *s = h->data;
    uint64_t now = mono_ms();
    metrics_set(metrics_gauge_at(s->m_uptime, 0), (double)(now - s->start_ms) / 1000.0);
    if (s->bus) {
        const bus_counters *bc = bus_get_counters(s->bus);
        metrics_set(metrics_gauge_at(s->m_in_flight, 0), (double)bus_in_flight(s->bus));
        metrics_counter_at(s->m_redelivered, 0)->v = bc->redelivered;
        metrics_counter_at(s->m_delivery_failed, 0)->v = bc->delivery_failed;
        metrics_counter_at(s->m_consumer_errors, 0)->v = bc->consumer_errors;
        metrics_counter_at(s->m_offsets_skipped, 0)->v = bc->offsets_skipped;
        metrics_counter_at(s->m_skips, 0)->v = bc->skips;
        metrics_counter_at(s->m_window_full, 0)->v = bc->window_full;
        metrics_counter_at(s->m_untracked, 0)->v = bc->untracked;
        bus_partition_info pi[256];
        uint32_t np = bus_partitions(s->bus, pi, 256);
        double lag = 0;
        int paused = bus_paused(s->bus);
        for (uint32_t i = 0; i < np; i++)
            if (pi[i].lag > 0)
                lag += (double)pi[i].lag;
        metrics_set(metrics_gauge_at(s->m_lag, 0), lag);
        if (paused && !s->paused_since_ms)
            s->paused_since_ms = now;
        else if (!paused)
            s->paused_since_ms = 0;
    }
    model_summary sum;
    model_summarize(pipeline_model(s->pl), &sum);
    metrics_set(metrics_gauge_at(s->m_threshold, 0), sum.threshold);
    metrics_set(metrics_gauge_at(s->m_expected, 0),
                sum.expected_flags_per_night * night_scale(s));
    metrics_set(metrics_gauge_at(s->m_model_bytes, 0), (double)sum.bytes);
    metrics_tick(s->reg, (double)now / 1000.0);
    log_sink_flush_suppressed(s->sink);

    if (s->fatal && !s->draining)
        begin_stop(s, "fatal error"); /* on_fatal logged the reason */
    if (s->draining) {
        /* finish() waits for the results in flight, up to the deadline. */
        finish(s);
        return;
    }
    uint32_t every = s->cfg->state.checkpoint_interval_s;
    if (every && now - s->last_ck_ms >= (uint64_t)every * 1000)
        checkpoint(s, "interval");

    /* Model selection: one k per tick, a round every select_interval_s. */
    model *m = pipeline_model(s->pl);
    uint32_t sel = s->cfg->run.select_interval_s;
    if (sel && now - s->last_select_ms >= (uint64_t)sel * 1000 &&
        model_select_begin(m) == 0)
        s->last_select_ms = now;
    if (model_select_tick(m) == 1) {
        model_summary after;
        model_summarize(m, &after);
        log_info_kv(&s->log, LOG_KV(LOG_UINT("suggested_k", after.suggested_k),
                                    LOG_UINT("k", after.k)),
                    "model selection (X-means BIC over the reservoir) done");
    }
}

int service_run(struct oddsky_config *cfg, log_sink *sink, const service_opts *opts)
{
    static const service_opts none = {0};
    service *s = calloc(1, sizeof *s);
    if (!s)
        return EX_OSERR;
    s->cfg = cfg;
    s->opts = opts ? opts : &none;
    s->sink = sink;
    s->exit_code = 0;
    s->start_ms = mono_ms();
    log_ctx_init(&s->log, sink, "oddsky");
    log_ctx_init(&s->log_bus, sink, "bus");
    log_ctx_init(&s->log_state, sink, "state");
    state_ledger_init(&s->ledger, 64);
    int rc = EX_SOFTWARE;
    char err[512] = "";

    if (uv_loop_init(&s->loop) != 0)
        goto out_free;
    if (register_metrics(s, err, sizeof err) != 0) {
        log_error(&s->log, "metrics: %s", err);
        goto out_loop;
    }
    if (pipeline_new(cfg, &s->pl, err, sizeof err) != 0) {
        log_error(&s->log, "%s", err);
        rc = EX_CONFIG;
        goto out_metrics;
    }
    if (ensure_dir(cfg->state.dir, err, sizeof err) != 0) {
        log_error(&s->log, "%s", err);
        rc = EX_CANTCREAT;
        goto out_pipeline;
    }
    if (restore(s) != 0) {
        rc = EX_DATAERR;
        goto out_pipeline;
    }
    s->last_ck_ms = mono_ms();
    s->last_select_ms = mono_ms();
    if (cfg->run.auto_resize)
        log_warn(&s->log, "run.auto_resize is not implemented in this version: "
                          "the suggested k is shown on the status page only");

    /* The bus. */
    const char **ckv = calloc(2 * cfg->kafka.consumer.n + 1, sizeof *ckv);
    const char **pkv = calloc(2 * cfg->kafka.producer.n + 1, sizeof *pkv);
    for (size_t i = 0; i < cfg->kafka.consumer.n; i++) {
        ckv[2 * i] = cfg->kafka.consumer.items[i].key;
        ckv[2 * i + 1] = cfg->kafka.consumer.items[i].value;
    }
    for (size_t i = 0; i < cfg->kafka.producer.n; i++) {
        pkv[2 * i] = cfg->kafka.producer.items[i].key;
        pkv[2 * i + 1] = cfg->kafka.producer.items[i].value;
    }
    bus_opts bo = {
        .brokers = cfg->kafka.brokers,
        .group_id = cfg->kafka.group_id,
        .client_id = "oddsky",
        .topics = (const char *const *)cfg->kafka.input_topics.items,
        .n_topics = (uint32_t)cfg->kafka.input_topics.n,
        .consumer_kv = ckv,
        .n_consumer_kv = (uint32_t)cfg->kafka.consumer.n,
        .producer_kv = pkv,
        .n_producer_kv = (uint32_t)cfg->kafka.producer.n,
        .poll_batch = cfg->kafka.poll_batch,
        .max_in_flight = cfg->kafka.max_in_flight,
        .poll_interval_ms = cfg->kafka.poll_interval_ms,
    };
    bus_callbacks cb = {
        .ctx = s, .on_message = on_message, .on_assign = on_assign,
        .on_revoke = on_revoke, .on_done = on_done, .on_fatal = on_fatal,
        .on_log = on_bus_log,
    };
    int brc = bus_new(&s->loop, &bo, &cb, &s->bus, err, sizeof err);
    free(ckv);
    free(pkv);
    if (brc != 0) {
        log_error(&s->log_bus, "%s", err);
        rc = EX_CONFIG;
        goto out_pipeline;
    }
    s->out_rkt = bus_output_topic(s->bus, cfg->kafka.output_topic);
    s->dlq_rkt = bus_output_topic(s->bus, cfg->kafka.dead_letter_topic);
    if (cfg->kafka.flagged_topic[0])
        s->flag_rkt = bus_output_topic(s->bus, cfg->kafka.flagged_topic);

    /* Status endpoint. */
    if (cfg->status.port || s->opts->status_any_port) {
        status_options so;
        status_options_default(&so);
        so.listen_addr = cfg->status.listen;
        so.port = (int)cfg->status.port;
        so.token = cfg->status.token;
        so.allow_remote_without_token = cfg->status.allow_remote_without_token;
        so.max_connections = cfg->status.max_connections;
        so.idle_timeout_ms = cfg->status.idle_timeout_ms;
        so.max_header_bytes = cfg->status.max_header_bytes;
        so.max_body_bytes = cfg->status.max_body_bytes;
        so.log_warning = status_warning;
        so.log_ctx = s;
        s->prov = (status_provider){.ctx = s, .status_json = status_json,
                                    .healthy = healthy, .metrics_text = metrics_text,
                                    .checkpoint_now = checkpoint_now};
        s->status = status_server_start(&s->loop, &so, &s->prov, err, sizeof err);
        if (!s->status) {
            log_error(&s->log, "status endpoint: %s", err);
            rc = EX_CONFIG;
            bus_drain(s->bus, 0);
            bus_close(s->bus, NULL, NULL);
            uv_run(&s->loop, UV_RUN_DEFAULT);
            goto out_pipeline;
        }
        log_info(&s->log, "status endpoint on http://%s:%d/", cfg->status.listen,
                 status_server_port(s->status));
    }

    uv_timer_init(&s->loop, &s->tick);
    s->tick.data = s;
    uv_timer_start(&s->tick, on_tick, 1000, 1000);
    uv_signal_t *sigs[] = {&s->sig_term, &s->sig_int, &s->sig_hup, &s->sig_usr1};
    int signums[] = {SIGTERM, SIGINT, SIGHUP, SIGUSR1};
    for (int i = 0; i < 4; i++) {
        uv_signal_init(&s->loop, sigs[i]);
        sigs[i]->data = s;
        uv_signal_start(sigs[i], on_signal, signums[i]);
    }
    log_info_kv(&s->log,
                LOG_KV(LOG_STR("brokers", cfg->kafka.brokers),
                       LOG_STR("output", cfg->kafka.output_topic),
                       LOG_UINT("features", pipeline_dim(s->pl))),
                "oddsky %s consuming", ODDSKY_VERSION);
    if (s->opts->banner)
        fputs(s->opts->banner, stderr);
    if (s->opts->on_started)
        s->opts->on_started(s->opts->arg, s->status ? status_server_port(s->status) : 0);

    uv_run(&s->loop, UV_RUN_DEFAULT);
    rc = s->exit_code;

out_pipeline:
    pipeline_free(s->pl);
out_metrics:
    metrics_free(s->reg);
out_loop:
    uv_loop_close(&s->loop);
out_free:
    state_ledger_free(&s->ledger);
    free(s->snap);
    if (s->have_reloaded)
        config_free(&s->reloaded);
    free(s);
    return rc;
}
