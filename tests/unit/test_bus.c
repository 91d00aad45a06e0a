/*
 * test_bus.c - the bus against librdkafka's mock cluster.
 *
 * The peer is rdkafka_mock.h (in-process brokers on loopback; producer,
 * idempotent producer and balanced consumer groups with offset commits,
 * per its header; experimental in librdkafka 2.0.2).  Checked:
 * - back-pressure holds the input at kafka.max_in_flight exactly, every
 *   partition keeps its share while it is held, and holding does not idle
 *   for linger.ms: with max_in_flight results per linger.ms the input
 *   below would take over 100 s, the test allows 30;
 * - a broker outage longer than message.timeout.ms and the consumer
 *   session, with the input held when it starts, ends with every input
 *   offset handed on and stored, results produced again and nothing
 *   failed;
 * - one result held undelivered (its topic has no leader) while its
 *   partition's offset window fills: the partition is held and sought
 *   back, nothing is stored past an undelivered result at any tick, and
 *   every input offset is handed on, none untracked;
 * - input deleted before the group read it (the mock cluster keeps about
 *   5 MB per partition and drops its oldest message sets beyond that;
 *   librdkafka then resets the position to the earliest offset left): the
 *   offsets between the committed one and the first message received are
 *   counted as skipped, once, and one warning names the range.
 * All are timing-based, so they are skipped under valgrind.
 */
#include <setjmp.h>
#include <stdarg.h>
#include <stddef.h>
#include <stdint.h>
#include <stdio.h>
#include <stdlib.h>
#include <string.h>
#include <time.h>

#include <cmocka.h>
#include <librdkafka/rdkafka.h>
#include <librdkafka/rdkafka_mock.h>
#include <uv.h>

#include "daemon/bus.h"

#define PARTS 4

typedef struct fixture {
    rd_kafka_t *mock_rk; /* owns the mock cluster */
    rd_kafka_mock_cluster_t *mc;
    const char *bootstraps;
    uv_loop_t loop;
    uv_timer_t tick;
    bus *b;
    rd_kafka_topic_t *out;
    uint32_t per_part;        /* input messages per partition */
    uint8_t *seen[PARTS];     /* per input offset: handed on at least once */
    uint64_t handled[PARTS];  /* on_message calls per partition */
    uint64_t max_in_flight_seen;
    uint64_t share_at_half[PARTS]; /* handled[] when half the input was */
    int have_share;
    int fatal;
    /* the scenario's clock and outage */
    uint64_t start_ms, deadline_ms, down_at_ms, down_for_ms;
    uint64_t down_after_total; /* set the broker down after this many (0: never) */
    int broker_down, was_down;
    int bus_open;
    /* the window-full scenario: one result goes to a leaderless topic */
    int hold;                 /* hold the result of partition 0, HOLD_OFFSET */
    rd_kafka_topic_t *slow;
    uint8_t *delivered[PARTS];/* per input offset: on_done seen */
    uint64_t full_at_ms;      /* first tick that saw window_full */
    int released, saw_held;
    uint64_t stored_past_undelivered; /* ticks that broke the invariant */
} fixture;

#define HOLD_OFFSET 10

static uint64_t mono_ms(void)
{
    struct timespec ts;
    clock_gettime(CLOCK_MONOTONIC, &ts);
    return (uint64_t)ts.tv_sec * 1000 + (uint64_t)ts.tv_nsec / 1000000;
}

static uint64_t total_handled(const fixture *f)
{
    uint64_t n = 0;
    for (int p = 0; p < PARTS; p++)
        n += f->handled[p];
    return n;
}

static void on_message(void *ctx, bus *b, const rd_kafka_message_t *m, bus_ticket *t)
{
    fixture *f = ctx;
    char err[256];
    if (m->partition >= 0 && m->partition < PARTS) {
        f->handled[m->partition]++;
        if (m->offset >= 0 && (uint64_t)m->offset < f->per_part)
            f->seen[m->partition][m->offset] = 1;
    }
    if (bus_in_flight(b) > f->max_in_flight_seen)
        f->max_in_flight_seen = bus_in_flight(b);
    /* The outage starts while this input's result is still to come. */
    if (f->down_after_total && !f->was_down && total_handled(f) >= f->down_after_total) {
        assert_int_equal(rd_kafka_mock_broker_set_down(f->mc, 1), 0);
        f->broker_down = f->was_down = 1;
        f->down_at_ms = mono_ms();
    }
    if (!f->have_share && total_handled(f) >= (uint64_t)PARTS * f->per_part / 2) {
        memcpy(f->share_at_half, f->handled, sizeof f->handled);
        f->have_share = 1;
    }
    rd_kafka_topic_t *to = f->out;
    if (f->hold && m->partition == 0 && m->offset == HOLD_OFFSET)
        to = f->slow;
    if (m->partition >= 0 && m->partition < PARTS && m->offset >= 0 &&
        (uint64_t)m->offset < f->per_part)
        bus_ticket_set_tag(t, (int)((uint64_t)m->partition * f->per_part +
                                    (uint64_t)m->offset) + 1);
    if (bus_produce(b, t, to, m->key, m->key_len, m->payload, m->len, NULL, 0,
                    err, sizeof err) != 0)
        bus_ticket_fail(b, t, err);
}

static void on_done(void *ctx, int64_t latency_us, int64_t broker_ts_ms, int tag)
{
    fixture *f = ctx;
    (void)latency_us;
    (void)broker_ts_ms;
    if (tag <= 0)
        return;
    uint64_t k = (uint64_t)tag - 1;
    f->delivered[k / f->per_part][k % f->per_part] = 1;
}

/* No partition's offset to store is past an input whose result is not
 * delivered yet; the window-full scenario's hold is lifted a while after
 * the bus first held a partition. */
static void check_stored(fixture *f, uint64_t now)
{
    bus_partition_info pi[PARTS];
    uint32_t n = bus_partitions(f->b, pi, PARTS);
    for (uint32_t i = 0; i < n; i++) {
        int32_t p = pi[i].partition;
        if (p < 0 || p >= PARTS)
            continue;
        for (int64_t o = 0; o < pi[i].stored && (uint64_t)o < f->per_part; o++)
            if (!f->delivered[p][o]) {
                print_message("partition %d stored %lld past undelivered %lld\n", p,
                              (long long)pi[i].stored, (long long)o);
                f->stored_past_undelivered++;
                break;
            }
        if (p == 0 && pi[i].paused && !f->released)
            f->saw_held = 1;
    }
    if (!f->hold || f->released)
        return;
    if (!f->full_at_ms && bus_get_counters(f->b)->window_full > 0)
        f->full_at_ms = now;
    if (f->full_at_ms && now >= f->full_at_ms + 500) {
        /* Commits ran every 100 ms while the partition was held: the group
         * must not have moved past the undelivered result (the seek back
         * stores nothing). */
        rd_kafka_topic_partition_list_t *l = rd_kafka_topic_partition_list_new(1);
        rd_kafka_topic_partition_list_add(l, "in", 0);
        assert_int_equal(rd_kafka_committed(bus_consumer(f->b), l, 5000), 0);
        print_message("partition 0 committed %lld while held\n",
                      (long long)l->elems[0].offset);
        if (l->elems[0].offset > HOLD_OFFSET)
            f->stored_past_undelivered++;
        rd_kafka_topic_partition_list_destroy(l);
        assert_int_equal(rd_kafka_mock_partition_set_leader(f->mc, "slow", 0, 1), 0);
        f->released = 1;
    }
}

static void on_fatal(void *ctx, const char *why)
{
    fixture *f = ctx;
    fprintf(stderr, "fatal: %s\n", why);
    f->fatal = 1;
}

/* Every partition stored up to its end, nothing in flight. */
static int all_stored(fixture *f)
{
    bus_partition_info pi[PARTS];
    uint32_t n = bus_partitions(f->b, pi, PARTS);
    if (n != PARTS || bus_in_flight(f->b) != 0)
        return 0;
    for (uint32_t i = 0; i < n; i++)
        if (pi[i].stored != (int64_t)f->per_part)
            return 0;
    return 1;
}

static void on_tick(uv_timer_t *h)
{
    fixture *f = h->data;
    uint64_t now = mono_ms();
    if (f->broker_down && now >= f->down_at_ms + f->down_for_ms) {
        assert_int_equal(rd_kafka_mock_broker_set_up(f->mc, 1), 0);
        f->broker_down = 0;
    }
    check_stored(f, now);
    if (f->fatal || now > f->deadline_ms || (!f->broker_down && all_stored(f)))
        uv_stop(&f->loop);
}

static void fill_input(fixture *f, const char *topic)
{
    char e[256];
    rd_kafka_conf_t *c = rd_kafka_conf_new();
    assert_int_equal(rd_kafka_conf_set(c, "bootstrap.servers", f->bootstraps, e, sizeof e),
                     RD_KAFKA_CONF_OK);
    rd_kafka_t *p = rd_kafka_new(RD_KAFKA_PRODUCER, c, e, sizeof e);
    assert_non_null(p);
    char val[64];
    for (uint32_t o = 0; o < f->per_part; o++) {
        for (int32_t part = 0; part < PARTS; part++) {
            int len = snprintf(val, sizeof val, "p%d-o%u", part, o);
            assert_int_equal(rd_kafka_producev(p, RD_KAFKA_V_TOPIC(topic),
                                               RD_KAFKA_V_PARTITION(part),
                                               RD_KAFKA_V_MSGFLAGS(RD_KAFKA_MSG_F_COPY),
                                               RD_KAFKA_V_VALUE(val, (size_t)len),
                                               RD_KAFKA_V_END),
                             0);
        }
        if (o % 1000 == 999)
            rd_kafka_poll(p, 0);
    }
    assert_int_equal(rd_kafka_flush(p, 30000), 0);
    rd_kafka_destroy(p);
}

static int setup(void **state)
{
    if (getenv("ODDSKY_UNDER_VALGRIND"))
        return 0;
    fixture *f = calloc(1, sizeof *f);
    char e[256];
    if (!f)
        return -1;
    rd_kafka_conf_t *c = rd_kafka_conf_new();
    rd_kafka_conf_set(c, "log_level", "3", e, sizeof e);
    f->mock_rk = rd_kafka_new(RD_KAFKA_PRODUCER, c, e, sizeof e);
    if (!f->mock_rk)
        return -1;
    f->mc = rd_kafka_mock_cluster_new(f->mock_rk, 1);
    if (!f->mc)
        return -1;
    f->bootstraps = rd_kafka_mock_cluster_bootstraps(f->mc);
    if (rd_kafka_mock_topic_create(f->mc, "in", PARTS, 1) ||
        rd_kafka_mock_topic_create(f->mc, "out", 1, 1))
        return -1;
    if (uv_loop_init(&f->loop) != 0)
        return -1;
    *state = f;
    return 0;
}

static void on_closed(uv_handle_t *h)
{
    (void)h;
}

static void close_bus(fixture *f)
{
    if (!f->bus_open)
        return;
    f->bus_open = 0;
    bus_drain(f->b, 5000);
    bus_close(f->b, NULL, NULL);
}

static int teardown(void **state)
{
    fixture *f = *state;
    if (!f)
        return 0;
    close_bus(f); /* after a failed assert */
    if (f->broker_down)
        rd_kafka_mock_broker_set_up(f->mc, 1);
    uv_run(&f->loop, UV_RUN_DEFAULT);
    uv_loop_close(&f->loop);
    rd_kafka_mock_cluster_destroy(f->mc);
    rd_kafka_destroy(f->mock_rk);
    for (int p = 0; p < PARTS; p++) {
        free(f->seen[p]);
        free(f->delivered[p]);
    }
    free(f);
    return 0;
}

/* Run the bus on the mock cluster until every input is stored, the
 * deadline passes or something fails; then drain and close it. */
static void run_bus(fixture *f, uint32_t max_in_flight, const char *const *producer_kv,
                    uint32_t n_producer_kv, uint64_t deadline_s)
{
    static const char *const topics[] = {"in"};
    static const char *const consumer_kv[] = {
        "session.timeout.ms", "3000", "heartbeat.interval.ms", "300",
        "auto.commit.interval.ms", "100", "log_level", "3"};
    char err[512] = "";
    for (int p = 0; p < PARTS; p++) {
        f->seen[p] = calloc(f->per_part, 1);
        f->delivered[p] = calloc(f->per_part, 1);
        assert_non_null(f->seen[p]);
        assert_non_null(f->delivered[p]);
    }
    fill_input(f, "in");
    bus_opts o = {
        .brokers = f->bootstraps,
        .group_id = "g",
        .topics = topics,
        .n_topics = 1,
        .consumer_kv = consumer_kv,
        .n_consumer_kv = sizeof consumer_kv / sizeof consumer_kv[0] / 2,
        .producer_kv = producer_kv,
        .n_producer_kv = n_producer_kv,
        .poll_batch = 64,
        .max_in_flight = max_in_flight,
        .poll_interval_ms = 20,
    };
    bus_callbacks cb = {.ctx = f, .on_message = on_message, .on_done = on_done,
                        .on_fatal = on_fatal};
    assert_int_equal(bus_new(&f->loop, &o, &cb, &f->b, err, sizeof err), 0);
    f->bus_open = 1;
    f->out = bus_output_topic(f->b, "out");
    assert_non_null(f->out);
    if (f->hold) {
        f->slow = bus_output_topic(f->b, "slow");
        assert_non_null(f->slow);
    }
    uv_timer_init(&f->loop, &f->tick);
    f->tick.data = f;
    f->start_ms = mono_ms();
    f->deadline_ms = f->start_ms + deadline_s * 1000;
    uv_timer_start(&f->tick, on_tick, 20, 20);
    uv_run(&f->loop, UV_RUN_DEFAULT);
    uv_close((uv_handle_t *)&f->tick, on_closed);
    print_message("input stored in %.1f s; handled per partition %llu %llu %llu %llu; "
                  "in flight at most %llu\n",
                  (double)(mono_ms() - f->start_ms) / 1000.0,
                  (unsigned long long)f->handled[0], (unsigned long long)f->handled[1],
                  (unsigned long long)f->handled[2], (unsigned long long)f->handled[3],
                  (unsigned long long)f->max_in_flight_seen);
}

static void held_input_is_fair_and_does_not_linger(void **state)
{
    fixture *f = *state;
    if (!f)
        skip();
    /* 5,000 per partition, 200 in flight, results lingering 1 s. */
    static const char *const pkv[] = {"linger.ms", "1000"};
    f->per_part = 5000;
    run_bus(f, 200, pkv, 1, 30);
    const bus_counters *bc = bus_get_counters(f->b);
    assert_int_equal(f->fatal, 0);
    assert_true(all_stored(f));
    assert_true(f->max_in_flight_seen <= 200);
    assert_true(bc->pauses > 0);
    for (int p = 0; p < PARTS; p++)
        for (uint32_t o = 0; o < f->per_part; o++)
            assert_int_equal(f->seen[p][o], 1);
    /* When half the input was handed on, each partition had at least a
     * quarter of its even share (2,500 each at an even pace). */
    assert_true(f->have_share);
    for (int p = 0; p < PARTS; p++) {
        print_message("partition %d: %llu handled at half\n", p,
                      (unsigned long long)f->share_at_half[p]);
        assert_true(f->share_at_half[p] >= f->per_part / 8);
    }
    close_bus(f);
}

static void broker_outage_longer_than_the_retry_window(void **state)
{
    fixture *f = *state;
    if (!f)
        skip();
    /* 2,000 per partition; the broker goes down for 5 s after 1,000
     * were handed on: longer than message.timeout.ms (2 s) and the
     * consumer session (3 s). */
    static const char *const pkv[] = {"message.timeout.ms", "2000", "linger.ms", "50"};
    f->per_part = 2000;
    f->down_after_total = 1000;
    f->down_for_ms = 5000;
    run_bus(f, 200, pkv, 2, 90);
    const bus_counters *bc = bus_get_counters(f->b);
    print_message("redelivered %llu, delivery failed %llu, pauses %llu\n",
                  (unsigned long long)bc->redelivered,
                  (unsigned long long)bc->delivery_failed,
                  (unsigned long long)bc->pauses);
    assert_true(f->was_down);
    assert_int_equal(f->fatal, 0);
    assert_true(all_stored(f));
    assert_int_equal(bc->delivery_failed, 0);
    assert_true(bc->redelivered > 0);
    assert_true(f->max_in_flight_seen <= 200);
    for (int p = 0; p < PARTS; p++)
        for (uint32_t o = 0; o < f->per_part; o++)
            assert_int_equal(f->seen[p][o], 1);
    close_bus(f);
}

static void full_window_holds_the_partition_and_skips_nothing(void **state)
{
    fixture *f = *state;
    if (!f)
        skip();
    /* 2,000 per partition, 200 in flight, 64 a batch: partition 0's window
     * (328 offsets) fills while the result of its offset 10 waits for a
     * leader, which comes 0.5 s after the bus first held it. */
    assert_int_equal(rd_kafka_mock_topic_create(f->mc, "slow", 1, 1), 0);
    assert_int_equal(rd_kafka_mock_partition_set_leader(f->mc, "slow", 0, -1), 0);
    f->per_part = 2000;
    f->hold = 1;
    run_bus(f, 200, NULL, 0, 30);
    const bus_counters *bc = bus_get_counters(f->b);
    print_message("window full %llu times, untracked %llu, ticks past undelivered %llu\n",
                  (unsigned long long)bc->window_full, (unsigned long long)bc->untracked,
                  (unsigned long long)f->stored_past_undelivered);
    assert_int_equal(f->fatal, 0);
    assert_true(f->released);
    assert_true(f->saw_held);
    assert_true(bc->window_full > 0);
    assert_int_equal(bc->untracked, 0);
    assert_int_equal(f->stored_past_undelivered, 0);
    assert_true(all_stored(f));
    for (int p = 0; p < PARTS; p++)
        for (uint32_t o = 0; o < f->per_part; o++) {
            assert_int_equal(f->seen[p][o], 1);
            assert_int_equal(f->delivered[p][o], 1);
        }
    close_bus(f);
}

/* ---- input deleted before it was read --------------------------------- */

#define AGED_TOPIC "aged"
#define AGED_SMALL 10        /* read and committed before the deletion */
#define AGED_BIG 80          /* 100 KB each: more than the mock keeps */
#define AGED_BIG_LEN (100 * 1024)

typedef struct aged_run {
    fixture *f;
    bus *b;
    rd_kafka_topic_t *out;
    int64_t want_stored;     /* stop once partition 0 stored this */
    int64_t first_offset;    /* of the first message handed on */
    uint64_t handled;
    int64_t committed_seen;  /* on_assign's committed argument */
    int warnings;            /* level-4 SKIPPED lines */
    char warning[512];
    uint64_t deadline_ms;
} aged_run;

static void aged_on_message(void *ctx, bus *b, const rd_kafka_message_t *m,
                            bus_ticket *t)
{
    aged_run *r = ctx;
    char err[256];
    if (r->handled++ == 0)
        r->first_offset = m->offset;
    if (bus_produce(b, t, r->out, NULL, 0, "r", 1, NULL, 0, err, sizeof err) != 0)
        bus_ticket_fail(b, t, err);
}

static int64_t aged_on_assign(void *ctx, const char *topic, int32_t partition,
                              int64_t committed)
{
    aged_run *r = ctx;
    (void)topic;
    (void)partition;
    r->committed_seen = committed;
    return RD_KAFKA_OFFSET_INVALID; /* the committed offset */
}

static void aged_on_log(void *ctx, int level, const char *fac, const char *msg)
{
    aged_run *r = ctx;
    if (strcmp(fac, "SKIPPED") != 0)
        return;
    print_message("bus log %d %s: %s\n", level, fac, msg);
    if (level == 4) {
        r->warnings++;
        snprintf(r->warning, sizeof r->warning, "%s", msg);
    }
}

static void aged_on_fatal(void *ctx, const char *why)
{
    aged_run *r = ctx;
    fprintf(stderr, "fatal: %s\n", why);
    r->f->fatal = 1;
}

static void aged_on_tick(uv_timer_t *h)
{
    aged_run *r = h->data;
    bus_partition_info pi[1];
    uint32_t n = bus_partitions(r->b, pi, 1);
    int done = n == 1 && pi[0].stored == r->want_stored && bus_in_flight(r->b) == 0;
    if (r->f->fatal || done || mono_ms() > r->deadline_ms)
        uv_stop(&r->f->loop);
}

/* Produce count messages of len bytes to AGED_TOPIC [0], one message set
 * each. */
static void aged_produce(fixture *f, uint32_t count, size_t len)
{
    char e[256];
    rd_kafka_conf_t *c = rd_kafka_conf_new();
    assert_int_equal(rd_kafka_conf_set(c, "bootstrap.servers", f->bootstraps, e, sizeof e),
                     RD_KAFKA_CONF_OK);
    assert_int_equal(rd_kafka_conf_set(c, "batch.num.messages", "1", e, sizeof e),
                     RD_KAFKA_CONF_OK);
    rd_kafka_t *p = rd_kafka_new(RD_KAFKA_PRODUCER, c, e, sizeof e);
    assert_non_null(p);
    char *val = calloc(1, len);
    assert_non_null(val);
    for (uint32_t i = 0; i < count; i++) {
        assert_int_equal(rd_kafka_producev(p, RD_KAFKA_V_TOPIC(AGED_TOPIC),
                                           RD_KAFKA_V_PARTITION(0),
                                           RD_KAFKA_V_MSGFLAGS(RD_KAFKA_MSG_F_COPY),
                                           RD_KAFKA_V_VALUE(val, len), RD_KAFKA_V_END),
                         0);
        /* One in flight at a time keeps the message sets apart. */
        assert_int_equal(rd_kafka_flush(p, 10000), 0);
    }
    free(val);
    rd_kafka_destroy(p);
}

/* Run a bus on AGED_TOPIC until partition 0 stored want_stored; drain and
 * close it.  Returns its counters (copied). */
static bus_counters aged_run_bus(fixture *f, aged_run *r, int64_t want_stored)
{
    static const char *const topics[] = {AGED_TOPIC};
    static const char *const consumer_kv[] = {
        "session.timeout.ms", "3000", "heartbeat.interval.ms", "300",
        "auto.commit.interval.ms", "100", "log_level", "3"};
    char err[512] = "";
    r->f = f;
    r->want_stored = want_stored;
    r->first_offset = -1;
    r->committed_seen = -12345;
    bus_opts o = {
        .brokers = f->bootstraps,
        .group_id = "g-aged",
        .topics = topics,
        .n_topics = 1,
        .consumer_kv = consumer_kv,
        .n_consumer_kv = sizeof consumer_kv / sizeof consumer_kv[0] / 2,
        .poll_batch = 64,
        .max_in_flight = 200,
        .poll_interval_ms = 20,
    };
    bus_callbacks cb = {.ctx = r, .on_message = aged_on_message,
                        .on_assign = aged_on_assign, .on_fatal = aged_on_fatal,
                        .on_log = aged_on_log};
    assert_int_equal(bus_new(&f->loop, &o, &cb, &r->b, err, sizeof err), 0);
    f->b = r->b;
    f->bus_open = 1;
    r->out = bus_output_topic(r->b, "out");
    assert_non_null(r->out);
    uv_timer_init(&f->loop, &f->tick);
    f->tick.data = r;
    r->deadline_ms = mono_ms() + 30000;
    uv_timer_start(&f->tick, aged_on_tick, 20, 20);
    uv_run(&f->loop, UV_RUN_DEFAULT);
    uv_close((uv_handle_t *)&f->tick, on_closed);
    bus_counters c = *bus_get_counters(r->b);
    bus_partition_info pi[1];
    uint32_t n = bus_partitions(r->b, pi, 1);
    print_message("stored %lld (want %lld), handled %llu from offset %lld, "
                  "skipped %llu offsets in %llu jumps\n",
                  n ? (long long)pi[0].stored : -1LL, (long long)want_stored,
                  (unsigned long long)r->handled, (long long)r->first_offset,
                  (unsigned long long)c.offsets_skipped, (unsigned long long)c.skips);
    assert_int_equal(n, 1);
    assert_int_equal(pi[0].stored, want_stored);
    close_bus(f);
    uv_run(&f->loop, UV_RUN_DEFAULT);
    return c;
}

static void input_deleted_before_it_was_read_is_counted_and_logged(void **state)
{
    fixture *f = *state;
    if (!f)
        skip();
    assert_int_equal(rd_kafka_mock_topic_create(f->mc, AGED_TOPIC, 1, 1), 0);

    /* The group reads and commits the first messages: nothing skipped. */
    aged_produce(f, AGED_SMALL, 16);
    aged_run first = {0};
    bus_counters c = aged_run_bus(f, &first, AGED_SMALL);
    assert_int_equal(f->fatal, 0);
    assert_int_equal(first.first_offset, 0);
    assert_int_equal(c.offsets_skipped, 0);
    assert_int_equal(c.skips, 0);
    assert_int_equal(first.warnings, 0);

    /* While no member runs, more input arrives than the broker keeps:
     * the oldest of it, from the committed offset on, is deleted. */
    aged_produce(f, AGED_BIG, AGED_BIG_LEN);
    int64_t lo = -1, hi = -1;
    char e[256];
    rd_kafka_conf_t *qc = rd_kafka_conf_new();
    assert_int_equal(rd_kafka_conf_set(qc, "bootstrap.servers", f->bootstraps, e, sizeof e),
                     RD_KAFKA_CONF_OK);
    rd_kafka_t *q = rd_kafka_new(RD_KAFKA_PRODUCER, qc, e, sizeof e);
    assert_non_null(q);
    assert_int_equal(rd_kafka_query_watermark_offsets(q, AGED_TOPIC, 0, &lo, &hi, 5000), 0);
    rd_kafka_destroy(q);
    print_message("after the deletion: low %lld high %lld\n", (long long)lo,
                  (long long)hi);
    assert_int_equal(hi, AGED_SMALL + AGED_BIG);
    assert_true(lo > AGED_SMALL + 1); /* more than one offset lost */

    /* The next member starts at the committed offset, finds it gone and
     * is reset to the earliest left: every lost offset is counted once,
     * one warning names the range. */
    aged_run second = {0};
    c = aged_run_bus(f, &second, hi);
    assert_int_equal(f->fatal, 0);
    assert_int_equal(second.committed_seen, AGED_SMALL);
    assert_int_equal(second.first_offset, lo);
    assert_int_equal(second.handled, (uint64_t)(hi - lo));
    assert_int_equal(c.offsets_skipped, (uint64_t)(lo - AGED_SMALL));
    assert_int_equal(c.skips, 1);
    assert_int_equal(second.warnings, 1);
    char range[128];
    snprintf(range, sizeof range, AGED_TOPIC " [0]: offsets %d..%lld (%lld)", AGED_SMALL,
             (long long)(lo - 1), (long long)(lo - AGED_SMALL));
    print_message("warning: %s\n", second.warning);
    assert_non_null(strstr(second.warning, range));
    assert_non_null(strstr(second.warning, "retention"));
}

int main(void)
{
    const struct CMUnitTest tests[] = {
        cmocka_unit_test_setup_teardown(held_input_is_fair_and_does_not_linger, setup,
                                        teardown),
        cmocka_unit_test_setup_teardown(broker_outage_longer_than_the_retry_window, setup,
                                        teardown),
        cmocka_unit_test_setup_teardown(full_window_holds_the_partition_and_skips_nothing,
                                        setup, teardown),
        cmocka_unit_test_setup_teardown(
            input_deleted_before_it_was_read_is_counted_and_logged, setup, teardown),
    };
    return cmocka_run_group_tests(tests, NULL, NULL);
}
