/*
 * bus.c - the Kafka consumer and producer on the libuv loop (see bus.h).
 *
 * Partition slots: each assigned (topic, partition) gets a slot whose index
 * names its window in the offset tracker.  A slot carries a generation
 * number; a ticket remembers the generation it was issued under, so a
 * delivery report that arrives after its partition was revoked (and maybe
 * re-assigned) cannot move the new owner's window.
 *
 * Offsets are stored in batches: a delivery report that moves a window
 * marks the slot dirty, and dirty slots are stored together after the
 * producer queue has been served, so the list allocation of
 * rd_kafka_offsets_store happens once per poll round, not per packet.
 *
 * Input: a slot holds its partition's own librdkafka queue, detached from
 * the consumer queue (rd_kafka_queue_forward(q, NULL)) before the
 * partition is assigned, so librdkafka never forwards it again at fetch
 * start.  Holding the input for back-pressure is then just not reading
 * those queues: librdkafka stops fetching a partition whose queue is full,
 * nothing prefetched is dropped, and taking input again costs no fetch
 * round trip.  The partitions are read a fair share each, starting one
 * slot further every round.  The consumer queue still gets rebalances and
 * errors, and the messages of a partition that has no slot.
 *
 * Window full: when one old result of a partition stays undelivered while
 * the tracker's window of newer offsets fills, the message that does not
 * fit is not handed on.  The partition is sought back to that offset (which
 * purges what librdkafka prefetched after it, so the rest of the batch is
 * dropped too) and its slot is held: no round reads it until a delivery
 * moves its window or the partition is reset by a revoke or an assign.
 * Handing it on untracked would be a hole: the next tracked offset marks
 * everything between as gaps, done, and the stored offset could pass
 * results still in flight.
 *
 * Skipped input: handle_batch compares each tracked offset with the one
 * its partition expected (offsets_track_gap; for the first message after
 * an assign, the slot's expect, the committed offset) and counts and logs
 * the jump (note_skip).  The log line's text carries the numbers, so the
 * log's rate limiter, which keys relayed lines by facility and text with
 * digit runs folded, folds a storm into one key per topic; the counters
 * stay exact.
 */
#include "bus.h"

#include <errno.h>
#include <fcntl.h>
#include <stdio.h>
#include <stdlib.h>
#include <string.h>
#include <time.h>
#include <unistd.h>

#include "offsets.h"

#define BUS_MAX_OUT_TOPICS 8

/* How long holding the input waits for the producer to send the batches
 * it lingers on (rd_kafka_flush ignores linger.ms only while it runs). */
#define BUS_HOLD_FLUSH_MS 10

/* Batches of input handled per wake-up before the loop gets its turn. */
#define BUS_ROUNDS_PER_WAKE 4

struct bus_ticket {
    uint32_t slot;
    uint32_t gen;
    int64_t offset;
    uint32_t remaining;   /* outputs awaiting delivery */
    uint32_t attempts;    /* re-produce attempts so far */
    int64_t consumed_us;
    int64_t broker_ts_ms;
    int sealed;           /* handler returned: no more outputs */
    int tag;              /* the handler's mark, see bus_ticket_set_tag */
    int failed;           /* never done: its offset must not be stored */
    bus_ticket *next_free;
};

typedef struct bus_slot {
    rd_kafka_topic_t *rkt; /* consumer-side topic handle, identity only */
    rd_kafka_queue_t *q;   /* the partition's own queue while assigned */
    char topic[256];
    int32_t partition;
    uint32_t gen;
    int assigned;
    int drained;           /* its queue ran short in this round */
    int held;              /* window full: not read until its window moves */
    int dirty;
    int64_t stored;
    int64_t expect;        /* first offset expected after the assign, the
                            * committed one; -1 unknown */
} bus_slot;

struct bus {
    uv_loop_t *loop;
    bus_callbacks cb;
    bus_opts o;
    rd_kafka_t *consumer;
    rd_kafka_t *producer;
    rd_kafka_queue_t *cq;  /* consumer queue */
    rd_kafka_queue_t *pq;  /* producer main queue (delivery reports) */
    int cpipe[2], ppipe[2];
    uv_poll_t cpoll, ppoll;
    uv_timer_t timer;
    int closing_handles;
    void (*close_cb)(void *);
    void *close_arg;

    offsets_tracker tracker;
    bus_slot *slots;
    uint32_t nslots;

    bus_ticket *tickets;
    bus_ticket *free_tickets;
    uint64_t ntickets;
    uint64_t in_flight;
    int paused;            /* input held for back-pressure */
    uint32_t next_slot;    /* where the next fair round starts */
    int consuming;
    int fatal;

    rd_kafka_message_t **batch;
    struct {
        char name[256];
        rd_kafka_topic_t *rkt;
    } out[BUS_MAX_OUT_TOPICS];
    uint32_t n_out;
    bus_counters counters;
    int any_dirty;
    int64_t last_report_us;   /* latest delivery report, any result */
    int64_t stall_us;         /* in flight with no report this long: purge */
};

static int64_t now_us(void)
{
    struct timespec ts;
    clock_gettime(CLOCK_MONOTONIC, &ts);
    return (int64_t)ts.tv_sec * 1000000 + ts.tv_nsec / 1000;
}

static void set_err(char *err, size_t len, const char *fmt, const char *a,
                    const char *b)
{
    if (err && len)
        snprintf(err, len, fmt, a, b);
}

/* ---- slots ------------------------------------------------------------ */

static int slot_find(bus *b, const char *topic, int32_t part)
{
    for (uint32_t i = 0; i < b->nslots; i++)
        if (b->slots[i].assigned && b->slots[i].partition == part &&
            strcmp(b->slots[i].topic, topic) == 0)
            return (int)i;
    return -1;
}

static int slot_for_message(bus *b, const rd_kafka_message_t *m)
{
    for (uint32_t i = 0; i < b->nslots; i++)
        if (b->slots[i].assigned && b->slots[i].rkt == m->rkt &&
            b->slots[i].partition == m->partition)
            return (int)i;
    int s = slot_find(b, rd_kafka_topic_name(m->rkt), m->partition);
    if (s >= 0)
        b->slots[s].rkt = m->rkt;
    return s;
}

static int slot_add(bus *b, const char *topic, int32_t part)
{
    int s = slot_find(b, topic, part);
    if (s >= 0)
        return s;
    for (uint32_t i = 0; i < b->nslots; i++) {
        if (!b->slots[i].assigned) {
            bus_slot *sl = &b->slots[i];
            snprintf(sl->topic, sizeof sl->topic, "%s", topic);
            sl->partition = part;
            sl->rkt = NULL;
            sl->assigned = 1;
            sl->dirty = 0;
            sl->held = 0;
            sl->stored = -1;
            sl->expect = -1;
            sl->gen++;
            offsets_reset(&b->tracker, i);
            return (int)i;
        }
    }
    return -1;
}

/* Detach the partition's queue from the consumer queue and have it wake
 * the loop through the consumer pipe when messages arrive.  Must run
 * before the partition is assigned: the fetcher forwards a queue the
 * application has not claimed to the consumer queue when it starts.
 * Without a queue the partition's messages arrive on the consumer queue,
 * which also works. */
static void slot_open_queue(bus *b, bus_slot *sl)
{
    if (sl->q)
        return;
    sl->q = rd_kafka_queue_get_partition(b->consumer, sl->topic, sl->partition);
    if (!sl->q)
        return;
    rd_kafka_queue_forward(sl->q, NULL);
    rd_kafka_queue_io_event_enable(sl->q, b->cpipe[1], "1", 1);
}

/* Stop reading a partition's queue (revoke, close).  What is left in it
 * belongs to the old assignment: librdkafka's version barrier discards it
 * if the partition comes back. */
static void slot_close_queue(bus_slot *sl)
{
    if (!sl->q)
        return;
    rd_kafka_queue_io_event_enable(sl->q, -1, NULL, 0);
    rd_kafka_queue_destroy(sl->q);
    sl->q = NULL;
}

/* ---- offsets ---------------------------------------------------------- */

static void store_dirty(bus *b)
{
    if (!b->any_dirty)
        return;
    b->any_dirty = 0;
    rd_kafka_topic_partition_list_t *l = rd_kafka_topic_partition_list_new(8);
    for (uint32_t i = 0; i < b->nslots; i++) {
        bus_slot *sl = &b->slots[i];
        if (!sl->assigned || !sl->dirty)
            continue;
        sl->dirty = 0;
        int64_t off = offsets_committable(&b->tracker, i);
        if (off < 0 || off == sl->stored)
            continue;
        rd_kafka_topic_partition_list_add(l, sl->topic, sl->partition)->offset = off;
        sl->stored = off;
    }
    if (l->cnt > 0) {
        rd_kafka_resp_err_t e = rd_kafka_offsets_store(b->consumer, l);
        if (e && b->cb.on_log)
            b->cb.on_log(b->cb.ctx, 4, "OFFSETS", rd_kafka_err2str(e));
        b->counters.offsets_stored += (uint64_t)l->cnt;
    }
    rd_kafka_topic_partition_list_destroy(l);
}

/* ---- tickets ---------------------------------------------------------- */

static void ticket_release(bus *b, bus_ticket *t)
{
    t->next_free = b->free_tickets;
    b->free_tickets = t;
    b->in_flight--;
}

static void ticket_finish(bus *b, bus_ticket *t)
{
    bus_slot *sl = &b->slots[t->slot];
    if (t->offset >= 0 && sl->assigned && sl->gen == t->gen) {
        if (offsets_done(&b->tracker, t->slot, t->offset) == 1) {
            sl->dirty = 1;
            sl->held = 0; /* the window moved: the partition may go on */
            b->any_dirty = 1;
        }
    }
    if (b->cb.on_done)
        b->cb.on_done(b->cb.ctx, now_us() - t->consumed_us, t->broker_ts_ms,
                      t->tag);
    ticket_release(b, t);
}

/* ---- back-pressure ------------------------------------------------------ */

/* Holding the input is a flag that serve_consumer obeys; librdkafka's
 * partitions are never paused (see the top of this file). */
static void check_pressure(bus *b)
{
    if (!b->paused && b->in_flight >= b->o.max_in_flight) {
        b->paused = 1;
        b->counters.pauses++;
        /* No more results join the producer's batches until deliveries
         * free tickets, so lingering would only idle (max_in_flight
         * results per linger.ms at best): send what is held now. */
        rd_kafka_flush(b->producer, BUS_HOLD_FLUSH_MS);
        store_dirty(b);
    }
    if (b->paused && b->in_flight <= b->o.max_in_flight / 2)
        b->paused = 0;
}

/* ---- librdkafka callbacks ---------------------------------------------- */

static void dr_cb(rd_kafka_t *rk, const rd_kafka_message_t *m, void *opaque)
{
    bus *b = opaque;
    bus_ticket *t = m->_private;
    b->last_report_us = now_us();
    if (!t)
        return;
    if (m->err == 0) {
        b->counters.delivered++;
        if (--t->remaining == 0 && t->sealed && !t->failed)
            ticket_finish(b, t);
        return;
    }
    /* Failed.  Idempotence already retried inside librdkafka until
     * message.timeout.ms; a retriable cause (broker down, timeout) is
     * produced again, anything else stops the daemon. */
    int retriable = m->err == RD_KAFKA_RESP_ERR__MSG_TIMED_OUT ||
                    m->err == RD_KAFKA_RESP_ERR__PURGE_QUEUE ||
                    m->err == RD_KAFKA_RESP_ERR__TRANSPORT ||
                    m->err == RD_KAFKA_RESP_ERR__ALL_BROKERS_DOWN ||
                    m->err == RD_KAFKA_RESP_ERR_NOT_ENOUGH_REPLICAS ||
                    m->err == RD_KAFKA_RESP_ERR_REQUEST_TIMED_OUT ||
                    m->err == RD_KAFKA_RESP_ERR_NOT_LEADER_FOR_PARTITION ||
                    m->err == RD_KAFKA_RESP_ERR_LEADER_NOT_AVAILABLE;
    if (retriable && t->attempts < b->o.max_redeliveries) {
        t->attempts++;
        rd_kafka_headers_t *h = NULL;
        rd_kafka_message_detach_headers((rd_kafka_message_t *)m, &h);
        rd_kafka_resp_err_t e = rd_kafka_producev(
            rk, RD_KAFKA_V_RKT(m->rkt), RD_KAFKA_V_PARTITION(RD_KAFKA_PARTITION_UA),
            RD_KAFKA_V_MSGFLAGS(RD_KAFKA_MSG_F_COPY),
            RD_KAFKA_V_VALUE(m->payload, m->len), RD_KAFKA_V_KEY(m->key, m->key_len),
            RD_KAFKA_V_HEADERS(h), RD_KAFKA_V_OPAQUE(t), RD_KAFKA_V_END);
        if (e == 0) {
            b->counters.redelivered++;
            return;
        }
        if (h)
            rd_kafka_headers_destroy(h);
    }
    b->counters.delivery_failed++;
    b->fatal = 1;
    if (b->cb.on_fatal) {
        char why[512];
        snprintf(why, sizeof why,
                 "delivery to %s failed after %u attempts: %s; the input "
                 "offset is not stored and will be consumed again",
                 rd_kafka_topic_name(m->rkt), t->attempts + 1,
                 rd_kafka_err2str(m->err));
        b->cb.on_fatal(b->cb.ctx, why);
    }
    /* The ticket stays in flight forever: its offset is never stored. */
}

static void log_cb(const rd_kafka_t *rk, int level, const char *fac,
                   const char *buf)
{
    bus *b = rd_kafka_opaque(rk);
    if (b && b->cb.on_log)
        b->cb.on_log(b->cb.ctx, level, fac, buf);
}

static void error_cb(rd_kafka_t *rk, int err, const char *reason, void *opaque)
{
    bus *b = opaque;
    (void)rk;
    if (b->cb.on_log)
        b->cb.on_log(b->cb.ctx, err == RD_KAFKA_RESP_ERR__FATAL ? 2 : 4,
                     rd_kafka_err2name(err), reason);
    if (err == RD_KAFKA_RESP_ERR__FATAL && b->cb.on_fatal) {
        char buf[512];
        rd_kafka_fatal_error(rk, buf, sizeof buf);
        b->fatal = 1;
        b->cb.on_fatal(b->cb.ctx, buf);
    }
}

static void serve_producer(bus *b);

static void bus_revoke(bus *b, rd_kafka_topic_partition_list_t *parts, int lost)
{
    /* Let in-flight results of these partitions land so their offsets are
     * stored before another member takes them over. */
    if (!lost) {
        int64_t deadline = now_us() + (int64_t)b->o.revoke_flush_ms * 1000;
        while (now_us() < deadline) {
            int pending = 0;
            for (int i = 0; i < parts->cnt; i++) {
                int s = slot_find(b, parts->elems[i].topic, parts->elems[i].partition);
                if (s >= 0 && offsets_pending(&b->tracker, (uint32_t)s) > 0)
                    pending = 1;
            }
            if (!pending)
                break;
            rd_kafka_poll(b->producer, 10);
        }
        store_dirty(b);
    }
    for (int i = 0; i < parts->cnt; i++) {
        int s = slot_find(b, parts->elems[i].topic, parts->elems[i].partition);
        if (b->cb.on_revoke)
            b->cb.on_revoke(b->cb.ctx, parts->elems[i].topic, parts->elems[i].partition);
        if (s >= 0) {
            slot_close_queue(&b->slots[s]);
            b->slots[s].assigned = 0;
            b->slots[s].held = 0;
            b->slots[s].gen++;
            offsets_reset(&b->tracker, (uint32_t)s);
        }
    }
}

static void rebalance_cb(rd_kafka_t *rk, rd_kafka_resp_err_t err,
                         rd_kafka_topic_partition_list_t *parts, void *opaque)
{
    bus *b = opaque;
    int coop = strcmp(rd_kafka_rebalance_protocol(rk), "COOPERATIVE") == 0;
    if (err == RD_KAFKA_RESP_ERR__ASSIGN_PARTITIONS) {
        /* The owner may start a partition earlier than its committed
         * offset (the learn-once ledger re-reads what a crash lost from
         * the model), so look the committed offsets up first. */
        if (b->cb.on_assign) {
            for (int i = 0; i < parts->cnt; i++)
                parts->elems[i].offset = RD_KAFKA_OFFSET_INVALID;
            rd_kafka_resp_err_t ce = rd_kafka_committed(rk, parts, 10000);
            if (ce && b->cb.on_log)
                b->cb.on_log(b->cb.ctx, 4, "ASSIGN", rd_kafka_err2str(ce));
        }
        for (int i = 0; i < parts->cnt; i++) {
            rd_kafka_topic_partition_t *tp = &parts->elems[i];
            int sidx = slot_add(b, tp->topic, tp->partition);
            if (sidx < 0 && b->cb.on_log)
                b->cb.on_log(b->cb.ctx, 3, "ASSIGN",
                             "more partitions assigned than kafka.max_partitions");
            if (sidx >= 0)
                slot_open_queue(b, &b->slots[sidx]);
            if (sidx >= 0 && !tp->err && tp->offset >= 0)
                b->slots[sidx].stored = tp->offset; /* shown until one moves */
            int64_t committed = tp->err ? RD_KAFKA_OFFSET_INVALID : tp->offset;
            int64_t start = RD_KAFKA_OFFSET_INVALID;
            if (b->cb.on_assign) {
                start = b->cb.on_assign(b->cb.ctx, tp->topic, tp->partition,
                                        committed);
                tp->offset = start;
            }
            /* Input the group has not read starts at the committed offset;
             * an owner may start earlier to read some again, which skips
             * nothing unread, or later, which is its own choice. */
            if (sidx >= 0) {
                int64_t expect = committed >= 0 ? committed : -1;
                if (start > expect)
                    expect = start;
                b->slots[sidx].expect = expect;
            }
        }
        if (coop)
            rd_kafka_incremental_assign(rk, parts);
        else
            rd_kafka_assign(rk, parts);
    } else {
        bus_revoke(b, parts, rd_kafka_assignment_lost(rk));
        if (coop)
            rd_kafka_incremental_unassign(rk, parts);
        else
            rd_kafka_assign(rk, NULL);
    }
}

/* ---- serving the queues ------------------------------------------------- */

static void serve_producer(bus *b)
{
    while (rd_kafka_poll(b->producer, 0) > 0)
        ;
    store_dirty(b);
    check_pressure(b);
}

/* The window of slot s is full at m: hold the partition and seek it back
 * to m->offset, so m and what follows it are fetched again once
 * deliveries catch up.  Returns 0, or -EIO when the seek could not be
 * started (the daemon must stop: skipping m would lose it). */
static int slot_hold(bus *b, int s, const rd_kafka_message_t *m)
{
    bus_slot *sl = &b->slots[s];
    sl->held = 1;
    b->counters.window_full++;
    rd_kafka_topic_partition_list_t *l = rd_kafka_topic_partition_list_new(1);
    rd_kafka_topic_partition_list_add(l, sl->topic, sl->partition)->offset = m->offset;
    rd_kafka_error_t *e = rd_kafka_seek_partitions(b->consumer, l, 0);
    /* An asynchronous seek leaves _IN_PROGRESS on a partition it started. */
    rd_kafka_resp_err_t pe = l->elems[0].err;
    if (pe == RD_KAFKA_RESP_ERR__IN_PROGRESS)
        pe = RD_KAFKA_RESP_ERR_NO_ERROR;
    rd_kafka_topic_partition_list_destroy(l);
    char why[512];
    if (e || pe) {
        snprintf(why, sizeof why,
                 "%s [%d] offset %lld: window full and the seek back failed: %s",
                 sl->topic, (int)sl->partition, (long long)m->offset,
                 e ? rd_kafka_error_string(e) : rd_kafka_err2str(pe));
        if (e)
            rd_kafka_error_destroy(e);
        b->fatal = 1;
        if (b->cb.on_fatal)
            b->cb.on_fatal(b->cb.ctx, why);
        return -EIO;
    }
    if (b->cb.on_log) {
        snprintf(why, sizeof why,
                 "%s [%d] held at offset %lld: offset %lld still undelivered "
                 "with the window full",
                 sl->topic, (int)sl->partition, (long long)m->offset,
                 (long long)offsets_committable(&b->tracker, (uint32_t)s));
        b->cb.on_log(b->cb.ctx, 6, "WINDOW", why);
    }
    return 0;
}

/* Offsets from..from+n-1 of slot s were never received: count them, and
 * log a jump over more than one (one is a transaction marker). */
static void note_skip(bus *b, int s, int64_t from, int64_t n, int first)
{
    bus_slot *sl = &b->slots[s];
    b->counters.offsets_skipped += (uint64_t)n;
    if (n == 1)
        return;
    b->counters.skips++;
    if (!b->cb.on_log)
        return;
    char msg[512];
    snprintf(msg, sizeof msg,
             "%s [%d]: offsets %lld..%lld (%lld) were never received%s: "
             "deleted by retention before it was read, compaction, or "
             "transaction markers",
             sl->topic, (int)sl->partition, (long long)from,
             (long long)(from + n - 1), (long long)n,
             first ? " since the partition was assigned" : "");
    b->cb.on_log(b->cb.ctx, 4, "SKIPPED", msg);
}

/* Hand b->batch[0..n) to the handler, one ticket each.  Returns the
 * messages handed on (errors are logged and dropped, and so are messages
 * of a held partition: its seek fetches them again). */
static size_t handle_batch(bus *b, size_t n)
{
    size_t handled = 0;
    for (size_t i = 0; i < n; i++) {
        rd_kafka_message_t *m = b->batch[i];
        if (m->err) {
            if (m->err != RD_KAFKA_RESP_ERR__PARTITION_EOF) {
                b->counters.consumer_errors++;
                if (b->cb.on_log)
                    b->cb.on_log(b->cb.ctx, 4, "CONSUME",
                                 rd_kafka_message_errstr(m));
            }
            rd_kafka_message_destroy(m);
            continue;
        }
        bus_ticket *t = b->free_tickets;
        int s = slot_for_message(b, m);
        if (!t || s < 0) {
            /* An unknown partition (more than max_partitions assigned;
             * no ticket cannot happen, see the room in serve_consumer):
             * nothing of it is ever stored, so it comes back after a
             * restart. */
            b->counters.untracked++;
            rd_kafka_message_destroy(m);
            continue;
        }
        if (b->slots[s].held) {
            rd_kafka_message_destroy(m);
            continue;
        }
        int first = offsets_next(&b->tracker, (uint32_t)s) < 0;
        int64_t gap = 0;
        int rc = offsets_track_gap(&b->tracker, (uint32_t)s, m->offset, &gap);
        if (rc == -EAGAIN) {
            slot_hold(b, s, m);
            rd_kafka_message_destroy(m);
            continue;
        }
        if (rc == 0 && first && b->slots[s].expect >= 0 &&
            m->offset > b->slots[s].expect)
            gap = m->offset - b->slots[s].expect;
        if (gap > 0)
            note_skip(b, s, m->offset - gap, gap, first);
        b->free_tickets = t->next_free;
        b->in_flight++;
        t->slot = (uint32_t)s;
        t->gen = b->slots[s].gen;
        t->offset = m->offset;
        t->remaining = 0;
        t->attempts = 0;
        t->sealed = 0;
        t->tag = 0;
        t->failed = 0;
        t->consumed_us = now_us();
        t->broker_ts_ms = rd_kafka_message_timestamp(m, NULL);
        if (rc < 0) {
            /* Below the window (a redelivery): the output is still
             * produced; the offset is not tracked. */
            t->offset = -1;
            b->counters.untracked++;
        }
        b->counters.consumed++;
        b->cb.on_message(b->cb.ctx, b, m, t);
        t->sealed = 1;
        if (t->remaining == 0 && !t->failed)
            ticket_finish(b, t);
        rd_kafka_message_destroy(m);
        handled++;
    }
    return handled;
}

/* Take at most want messages from q and handle them; returns how many
 * were taken (handled or dropped). */
static size_t take_from(bus *b, rd_kafka_queue_t *q, uint32_t want, size_t *handled)
{
    if (want == 0)
        return 0;
    ssize_t n = rd_kafka_consume_batch_queue(q, 0, b->batch, want);
    if (n <= 0)
        return 0;
    *handled += handle_batch(b, (size_t)n);
    return (size_t)n;
}

/* One fair round over the assigned partitions' own queues: each gets an
 * equal share of budget (at least one message), the first one a slot
 * further than last round's; what a short queue leaves goes to the
 * others in further passes.  Taking less than budget means every queue
 * is empty. */
static size_t take_round(bus *b, uint32_t budget, size_t *handled)
{
    uint32_t hungry = 0;
    for (uint32_t i = 0; i < b->nslots; i++) {
        bus_slot *sl = &b->slots[i];
        sl->drained = !sl->assigned || !sl->q || sl->held;
        hungry += !sl->drained;
    }
    uint32_t first = b->next_slot;
    for (uint32_t k = 0; k < b->nslots; k++) {
        if (!b->slots[(first + k) % b->nslots].drained) {
            b->next_slot = (first + k + 1) % b->nslots;
            break;
        }
    }
    size_t taken = 0;
    while (hungry > 0 && taken < budget && !b->fatal) {
        uint32_t left = budget - (uint32_t)taken;
        uint32_t share = left / hungry ? left / hungry : 1;
        for (uint32_t k = 0; k < b->nslots && taken < budget; k++) {
            bus_slot *sl = &b->slots[(first + k) % b->nslots];
            if (sl->drained)
                continue;
            uint32_t want = budget - (uint32_t)taken;
            if (share < want)
                want = share;
            size_t n = take_from(b, sl->q, want, handled);
            taken += n;
            if (n < want) {
                sl->drained = 1;
                hungry--;
            }
        }
    }
    return taken;
}

static void serve_consumer(bus *b)
{
    for (uint32_t round = 0;; round++) {
        /* rd_kafka_poll() must not serve a queue that carries messages
         * (librdkafka asserts), and a message taken must be processed
         * (or its partition sought back to it, see slot_hold): a dropped
         * one would later look like a gap and be skipped.  So
         * while draining the queues are left alone (the final close
         * serves the revoke), and otherwise a call never takes more
         * messages than there are free tickets.  The consumer queue is
         * served even while the input is held, for rebalances and errors
         * (its messages, of partitions without a slot, are rare). */
        if (!b->consuming || b->fatal)
            return;
        uint64_t free_tickets = b->ntickets - b->in_flight;
        uint32_t room = b->o.poll_batch;
        if (free_tickets < room)
            room = (uint32_t)free_tickets;
        if (room == 0)
            return;
        if (round == BUS_ROUNDS_PER_WAKE) {
            /* Let the loop run its timers and the status page, and come
             * back through the consumer pipe: a full partition queue
             * gets no new message to signal it. */
            ssize_t w = write(b->cpipe[1], "1", 1);
            (void)w; /* a full pipe has a wake-up pending already */
            return;
        }
        size_t handled = 0;
        size_t taken = take_from(b, b->cq, room, &handled);
        int more = taken == room;
        /* The partitions' input stops at max_in_flight exactly. */
        if (!b->paused && b->in_flight < b->o.max_in_flight) {
            uint64_t below = b->o.max_in_flight - b->in_flight;
            uint32_t budget = room - (uint32_t)taken;
            if (below < budget)
                budget = (uint32_t)below;
            size_t n = take_round(b, budget, &handled);
            taken += n;
            more = more || (n > 0 && n == budget);
        }
        if (taken > 0 && b->cb.on_batch_end)
            b->cb.on_batch_end(b->cb.ctx, b, handled);
        /* Serve delivery reports between batches so offsets move and the
         * producer queue does not fill; this may hold the input. */
        if (taken > 0)
            serve_producer(b);
        /* Another round only while the queues gave all that was asked. */
        if (!more)
            return;
    }
}

static void drain_pipe(int fd)
{
    char buf[64];
    while (read(fd, buf, sizeof buf) > 0)
        ;
}

static void on_cpoll(uv_poll_t *h, int status, int events)
{
    (void)status;
    (void)events;
    bus *b = h->data;
    drain_pipe(b->cpipe[0]);
    serve_consumer(b);
}

static void on_ppoll(uv_poll_t *h, int status, int events)
{
    (void)status;
    (void)events;
    bus *b = h->data;
    drain_pipe(b->ppipe[0]);
    serve_producer(b);
    /* Deliveries free tickets: take input now rather than at the next
     * timer tick. */
    serve_consumer(b);
}

/* Liveness: results in flight but no delivery report at all for longer
 * than twice message.timeout.ms means librdkafka is holding them without
 * ever reporting (seen after a broker outage while the idempotent producer
 * was young).  Purging the local queues makes it report them (as
 * _PURGE_QUEUE), and dr_cb produces them again; nothing is stored or lost
 * in between. */
static void watchdog(bus *b)
{
    int64_t now = now_us();
    if (b->in_flight == 0 || b->fatal) {
        b->last_report_us = now;
        return;
    }
    if (now - b->last_report_us < b->stall_us)
        return;
    b->last_report_us = now;
    b->counters.purges++;
    if (b->cb.on_log)
        b->cb.on_log(b->cb.ctx, 4, "STALL",
                     "results in flight with no delivery report for twice "
                     "message.timeout.ms: purging the producer's queues to "
                     "produce them again");
    rd_kafka_purge(b->producer, RD_KAFKA_PURGE_F_QUEUE);
}

static void on_timer(uv_timer_t *h)
{
    bus *b = h->data;
    serve_producer(b);
    watchdog(b);
    serve_consumer(b);
}

/* ---- construction -------------------------------------------------------- */

static int conf_set(rd_kafka_conf_t *c, const char *k, const char *v, char *err,
                    size_t err_len)
{
    char e[256];
    if (rd_kafka_conf_set(c, k, v, e, sizeof e) != RD_KAFKA_CONF_OK) {
        set_err(err, err_len, "kafka property %s: %s", k, e);
        return -EINVAL;
    }
    return 0;
}

/* The pass-through properties of one client, as flattened key/value
 * pairs. */
static int conf_set_pairs(rd_kafka_conf_t *c, const char *const *kv, uint32_t n,
                          char *err, size_t err_len)
{
    for (uint32_t i = 0; i < n; i++)
        if (conf_set(c, kv[2 * i], kv[2 * i + 1], err, err_len))
            return -EINVAL;
    return 0;
}

static int make_pipe(int p[2])
{
    if (pipe(p) < 0)
        return -errno;
    for (int i = 0; i < 2; i++) {
        fcntl(p[i], F_SETFL, fcntl(p[i], F_GETFL) | O_NONBLOCK);
        fcntl(p[i], F_SETFD, FD_CLOEXEC);
    }
    return 0;
}

int bus_new(uv_loop_t *loop, const bus_opts *o, const bus_callbacks *cb,
            bus **out, char *err, size_t err_len)
{
    int rc = -ENOMEM;
    char e[512];
    *out = NULL;
    bus *b = calloc(1, sizeof *b);
    if (!b)
        return -ENOMEM;
    b->loop = loop;
    b->cb = *cb;
    b->o = *o;
    if (!b->o.poll_batch)
        b->o.poll_batch = 1024;
    if (!b->o.max_in_flight)
        b->o.max_in_flight = 100000;
    if (!b->o.poll_interval_ms)
        b->o.poll_interval_ms = 100;
    if (!b->o.max_partitions)
        b->o.max_partitions = 256;
    if (!b->o.revoke_flush_ms)
        b->o.revoke_flush_ms = 5000;
    if (!b->o.max_redeliveries)
        b->o.max_redeliveries = 1000000;
    b->cpipe[0] = b->cpipe[1] = b->ppipe[0] = b->ppipe[1] = -1;

    uint32_t ntickets = b->o.max_in_flight + b->o.poll_batch;
    b->ntickets = ntickets;
    b->tickets = calloc(ntickets, sizeof *b->tickets);
    b->slots = calloc(b->o.max_partitions, sizeof *b->slots);
    b->batch = calloc(b->o.poll_batch, sizeof *b->batch);
    if (!b->tickets || !b->slots || !b->batch)
        goto fail;
    for (uint32_t i = 0; i < ntickets; i++) {
        b->tickets[i].next_free = b->free_tickets;
        b->free_tickets = &b->tickets[i];
    }
    b->nslots = b->o.max_partitions;
    /* A window wider than the tickets can never fill from in-flight work. */
    if (offsets_init(&b->tracker, b->nslots, ntickets + b->o.poll_batch) < 0)
        goto fail;

    /* Consumer. */
    rd_kafka_conf_t *cc = rd_kafka_conf_new();
    rc = -EINVAL;
    if (conf_set(cc, "bootstrap.servers", o->brokers, err, err_len) ||
        conf_set(cc, "group.id", o->group_id, err, err_len) ||
        conf_set(cc, "client.id", o->client_id ? o->client_id : "oddsky", err, err_len) ||
        conf_set(cc, "partition.assignment.strategy", "cooperative-sticky", err, err_len) ||
        conf_set(cc, "enable.auto.offset.store", "false", err, err_len) ||
        conf_set(cc, "enable.auto.commit", "true", err, err_len) ||
        conf_set(cc, "auto.offset.reset", "earliest", err, err_len) ||
        conf_set(cc, "enable.partition.eof", "false", err, err_len)) {
        rd_kafka_conf_destroy(cc);
        goto fail;
    }
    if (conf_set_pairs(cc, o->consumer_kv, o->n_consumer_kv, err, err_len)) {
        rd_kafka_conf_destroy(cc);
        goto fail;
    }
    /* Our own settings win over pass-through ones where correctness
     * depends on them. */
    conf_set(cc, "enable.auto.offset.store", "false", NULL, 0);
    rd_kafka_conf_set_opaque(cc, b);
    rd_kafka_conf_set_rebalance_cb(cc, rebalance_cb);
    rd_kafka_conf_set_error_cb(cc, error_cb);
    rd_kafka_conf_set_log_cb(cc, log_cb);
    b->consumer = rd_kafka_new(RD_KAFKA_CONSUMER, cc, e, sizeof e);
    if (!b->consumer) {
        set_err(err, err_len, "kafka consumer: %s%s", e, "");
        goto fail;
    }
    rd_kafka_poll_set_consumer(b->consumer);
    b->cq = rd_kafka_queue_get_consumer(b->consumer);

    /* Producer. */
    rd_kafka_conf_t *pc = rd_kafka_conf_new();
    if (conf_set(pc, "bootstrap.servers", o->brokers, err, err_len) ||
        conf_set(pc, "client.id", o->client_id ? o->client_id : "oddsky", err, err_len) ||
        conf_set(pc, "enable.idempotence", "true", err, err_len) ||
        conf_set(pc, "linger.ms", "5", err, err_len) ||
        conf_set(pc, "queue.buffering.max.messages", "2000000", err, err_len) ||
        conf_set(pc, "compression.codec", "lz4", err, err_len)) {
        rd_kafka_conf_destroy(pc);
        goto fail;
    }
    if (conf_set_pairs(pc, o->producer_kv, o->n_producer_kv, err, err_len)) {
        rd_kafka_conf_destroy(pc);
        goto fail;
    }
    char tmo[32];
    size_t tmo_len = sizeof tmo;
    long timeout_ms = 300000;
    if (rd_kafka_conf_get(pc, "message.timeout.ms", tmo, &tmo_len) == RD_KAFKA_CONF_OK)
        timeout_ms = atol(tmo);
    if (timeout_ms <= 0)
        timeout_ms = 300000; /* 0 = infinite: check every 10 minutes */
    b->stall_us = (int64_t)timeout_ms * 2000;
    b->last_report_us = now_us();
    rd_kafka_conf_set_opaque(pc, b);
    rd_kafka_conf_set_dr_msg_cb(pc, dr_cb);
    rd_kafka_conf_set_error_cb(pc, error_cb);
    rd_kafka_conf_set_log_cb(pc, log_cb);
    b->producer = rd_kafka_new(RD_KAFKA_PRODUCER, pc, e, sizeof e);
    if (!b->producer) {
        set_err(err, err_len, "kafka producer: %s%s", e, "");
        goto fail;
    }
    b->pq = rd_kafka_queue_get_main(b->producer);

    /* Wake-ups. */
    if ((rc = make_pipe(b->cpipe)) < 0 || (rc = make_pipe(b->ppipe)) < 0) {
        set_err(err, err_len, "pipe: %s%s", strerror(-rc), "");
        goto fail;
    }
    rd_kafka_queue_io_event_enable(b->cq, b->cpipe[1], "1", 1);
    rd_kafka_queue_io_event_enable(b->pq, b->ppipe[1], "1", 1);
    uv_poll_init(loop, &b->cpoll, b->cpipe[0]);
    uv_poll_init(loop, &b->ppoll, b->ppipe[0]);
    uv_timer_init(loop, &b->timer);
    b->cpoll.data = b->ppoll.data = b->timer.data = b;
    uv_poll_start(&b->cpoll, UV_READABLE, on_cpoll);
    uv_poll_start(&b->ppoll, UV_READABLE, on_ppoll);
    uv_timer_start(&b->timer, on_timer, b->o.poll_interval_ms, b->o.poll_interval_ms);
    b->closing_handles = 0;

    /* Subscribe. */
    rd_kafka_topic_partition_list_t *sub =
        rd_kafka_topic_partition_list_new((int)o->n_topics);
    for (uint32_t i = 0; i < o->n_topics; i++)
        rd_kafka_topic_partition_list_add(sub, o->topics[i], RD_KAFKA_PARTITION_UA);
    rd_kafka_resp_err_t se = rd_kafka_subscribe(b->consumer, sub);
    rd_kafka_topic_partition_list_destroy(sub);
    if (se) {
        set_err(err, err_len, "subscribe: %s%s", rd_kafka_err2str(se), "");
        rc = -EINVAL;
        bus_close(b, NULL, NULL);
        return rc;
    }
    b->consuming = 1;
    *out = b;
    return 0;

fail:
    if (b->producer)
        rd_kafka_destroy(b->producer);
    if (b->cq)
        rd_kafka_queue_destroy(b->cq);
    if (b->consumer) {
        rd_kafka_consumer_close(b->consumer);
        rd_kafka_destroy(b->consumer);
    }
    for (int i = 0; i < 2; i++) {
        if (b->cpipe[i] >= 0)
            close(b->cpipe[i]);
        if (b->ppipe[i] >= 0)
            close(b->ppipe[i]);
    }
    offsets_destroy(&b->tracker);
    free(b->tickets);
    free(b->slots);
    free(b->batch);
    free(b);
    return rc;
}

rd_kafka_topic_t *bus_output_topic(bus *b, const char *name)
{
    for (uint32_t i = 0; i < b->n_out; i++)
        if (strcmp(b->out[i].name, name) == 0)
            return b->out[i].rkt;
    if (b->n_out == BUS_MAX_OUT_TOPICS)
        return NULL;
    rd_kafka_topic_t *t = rd_kafka_topic_new(b->producer, name, NULL);
    if (!t)
        return NULL;
    snprintf(b->out[b->n_out].name, sizeof b->out[0].name, "%s", name);
    b->out[b->n_out++].rkt = t;
    return t;
}

int bus_produce(bus *b, bus_ticket *t, rd_kafka_topic_t *rkt, const void *key,
                size_t key_len, const void *payload, size_t len,
                const bus_header *headers, uint32_t n_headers, char *err,
                size_t err_len)
{
    rd_kafka_headers_t *h = NULL;
    if (n_headers) {
        h = rd_kafka_headers_new(n_headers);
        for (uint32_t i = 0; i < n_headers; i++)
            rd_kafka_header_add(h, headers[i].name, -1, headers[i].value,
                                (ssize_t)headers[i].len);
    }
    for (int tries = 0;; tries++) {
        rd_kafka_resp_err_t e = rd_kafka_producev(
            b->producer, RD_KAFKA_V_RKT(rkt),
            RD_KAFKA_V_PARTITION(RD_KAFKA_PARTITION_UA),
            RD_KAFKA_V_MSGFLAGS(RD_KAFKA_MSG_F_COPY),
            RD_KAFKA_V_VALUE((void *)payload, len),
            RD_KAFKA_V_KEY(key, key_len), RD_KAFKA_V_HEADERS(h),
            RD_KAFKA_V_OPAQUE(t), RD_KAFKA_V_END);
        if (e == 0) {
            t->remaining++;
            b->counters.produced++;
            return 0;
        }
        if (e == RD_KAFKA_RESP_ERR__QUEUE_FULL && tries < 1000) {
            /* The local queue is full: serve delivery reports and retry. */
            rd_kafka_poll(b->producer, 10);
            continue;
        }
        if (h)
            rd_kafka_headers_destroy(h);
        set_err(err, err_len, "produce to %s: %s", rd_kafka_topic_name(rkt),
                rd_kafka_err2str(e));
        return -EIO;
    }
}

void bus_ticket_set_tag(bus_ticket *t, int tag)
{
    t->tag = tag;
}

void bus_ticket_fail(bus *b, bus_ticket *t, const char *why)
{
    t->failed = 1;
    b->fatal = 1;
    b->counters.delivery_failed++;
    if (b->cb.on_fatal)
        b->cb.on_fatal(b->cb.ctx, why);
}

void bus_stop_consuming(bus *b)
{
    b->consuming = 0;
}

uint64_t bus_in_flight(const bus *b)
{
    return b->in_flight;
}

int bus_paused(const bus *b)
{
    return b->paused;
}

uint64_t bus_drain(bus *b, int timeout_ms)
{
    b->consuming = 0;
    int64_t deadline = now_us() + (int64_t)timeout_ms * 1000;
    while (b->in_flight > 0 && now_us() < deadline && !b->fatal)
        rd_kafka_poll(b->producer, 20);
    rd_kafka_flush(b->producer, 0);
    while (rd_kafka_poll(b->producer, 0) > 0)
        ;
    store_dirty(b);
    uint64_t left = b->in_flight;
    /* Leave the group: the revoke stores what is done and, with automatic
     * commit on, librdkafka commits the stored offsets at unassign. */
    rd_kafka_queue_io_event_enable(b->cq, -1, NULL, 0);
    rd_kafka_consumer_close(b->consumer);
    return left;
}

static void on_handle_closed(uv_handle_t *h)
{
    bus *b = h->data;
    if (--b->closing_handles > 0)
        return;
    void (*cb)(void *) = b->close_cb;
    void *arg = b->close_arg;
    for (uint32_t i = 0; i < b->n_out; i++)
        rd_kafka_topic_destroy(b->out[i].rkt);
    rd_kafka_queue_destroy(b->pq);
    rd_kafka_destroy(b->producer);
    for (uint32_t i = 0; i < b->nslots; i++)
        slot_close_queue(&b->slots[i]);
    rd_kafka_queue_destroy(b->cq);
    rd_kafka_destroy(b->consumer);
    for (int i = 0; i < 2; i++) {
        close(b->cpipe[i]);
        close(b->ppipe[i]);
    }
    offsets_destroy(&b->tracker);
    free(b->tickets);
    free(b->slots);
    free(b->batch);
    free(b);
    if (cb)
        cb(arg);
}

void bus_close(bus *b, void (*cb)(void *arg), void *arg)
{
    b->close_cb = cb;
    b->close_arg = arg;
    rd_kafka_queue_io_event_enable(b->cq, -1, NULL, 0);
    rd_kafka_queue_io_event_enable(b->pq, -1, NULL, 0);
    b->closing_handles = 3;
    uv_close((uv_handle_t *)&b->cpoll, on_handle_closed);
    uv_close((uv_handle_t *)&b->ppoll, on_handle_closed);
    uv_close((uv_handle_t *)&b->timer, on_handle_closed);
}

uint32_t bus_partitions(bus *b, bus_partition_info *out, uint32_t n)
{
    uint32_t k = 0;
    for (uint32_t i = 0; i < b->nslots && k < n; i++) {
        bus_slot *sl = &b->slots[i];
        if (!sl->assigned)
            continue;
        int64_t lo = -1, hi = -1;
        rd_kafka_get_watermark_offsets(b->consumer, sl->topic, sl->partition, &lo, &hi);
        int64_t stored = offsets_committable(&b->tracker, i);
        if (stored < 0)
            stored = sl->stored;
        out[k].topic = sl->topic;
        out[k].partition = sl->partition;
        out[k].stored = stored;
        out[k].high = hi;
        out[k].lag = (hi >= 0 && stored >= 0) ? hi - stored : -1;
        out[k].in_flight = offsets_pending(&b->tracker, i);
        out[k].paused = b->paused || sl->held;
        k++;
    }
    return k;
}

const bus_counters *bus_get_counters(const bus *b)
{
    return &b->counters;
}

rd_kafka_t *bus_consumer(bus *b)
{
    return b->consumer;
}
