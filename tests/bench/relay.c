/*
 * relay.c - a bare Kafka relay: the ceiling for the daemon's throughput.
 *
 * It consumes a topic with the high-level consumer and produces the same
 * key and value bytes to another topic with the client settings the daemon
 * uses (cooperative-sticky group member, manual offset store with auto
 * commit, idempotent lz4 producer with linger.ms=5 and large batches), and
 * does no decoding or scoring at all.  What it measures is the cost of the
 * Kafka round trip alone, so `relay_per_s` next to the daemon's rate tells
 * how much of the time the pipeline itself takes.
 *
 *   relay -b BOOTSTRAP -i IN_TOPIC -o OUT_TOPIC -n N [-g GROUP] [-t SECONDS]
 *
 * Prints `relay_messages=N`, `relay_seconds=S` and `relay_per_s=R` on
 * stdout once N messages have been delivered to OUT_TOPIC (time from the
 * first consumed message to the N-th delivery report), then commits and
 * exits 0.  Exits 1 on a delivery error or a fatal client error, 2 when N
 * is not reached within SECONDS (default 300), 64 on bad arguments.
 *
 * At-least-once, as in the daemon: an input offset is stored only when its
 * output was delivered, and per input partition only the highest contiguous
 * delivered offset + 1 (delivery reports return out of input order when
 * keys fan out over output partitions).  The window of each partition is a
 * ring of per-offset states allocated when the partition is first seen; a
 * full window waits for deliveries.  The delivery opaque packs the input
 * partition, its assignment generation and the offset, so nothing is
 * allocated per message and a report that returns after a revoke is
 * ignored.
 *
 * Everything but main() is static: this file links against the daemon's
 * objects and must not clash with their symbols.
 */
#include <errno.h>
#include <inttypes.h>
#include <signal.h>
#include <stdint.h>
#include <stdio.h>
#include <stdlib.h>
#include <string.h>
#include <sysexits.h>
#include <time.h>
#include <unistd.h>

#include <librdkafka/rdkafka.h>

#define RELAY_MAX_PARTITIONS 4096 /* 12 bits of the delivery opaque */
#define RELAY_WINDOW (1u << 20)   /* offsets in flight per input partition */
#define RELAY_BATCH 1024          /* messages per consume call, as the daemon */

_Static_assert(sizeof(void *) == 8, "the delivery opaque packs 64 bits");

enum { ST_FREE = 0, ST_PENDING = 1, ST_DONE = 2 };

typedef struct relay_part {
    int64_t base;   /* lowest offset not yet delivered; -1 before any */
    int64_t hi;     /* one past the highest consumed offset */
    uint32_t gen;   /* assignment generation (4 bits used) */
    int assigned;
    int dirty;      /* base moved since the last store */
    uint8_t *ring;  /* RELAY_WINDOW states, allocated on first use */
} relay_part;

typedef struct relay {
    rd_kafka_t *consumer;
    rd_kafka_t *producer;
    rd_kafka_topic_t *out;
    const char *in_topic;
    relay_part parts[RELAY_MAX_PARTITIONS];
    uint64_t target;
    uint64_t delivered;
    uint64_t consumed;
    int failed;
    char error[512];
} relay;

static volatile sig_atomic_t relay_stop;

static void on_signal(int sig)
{
    (void)sig;
    relay_stop = 1;
}

static double now_s(void)
{
    struct timespec ts;
    clock_gettime(CLOCK_MONOTONIC, &ts);
    return (double)ts.tv_sec + (double)ts.tv_nsec * 1e-9;
}

static void *pack_opaque(int32_t part, uint32_t gen, int64_t off)
{
    uint64_t v = ((uint64_t)(uint32_t)part << 52) | ((uint64_t)(gen & 0xf) << 48) |
                 ((uint64_t)off & ((UINT64_C(1) << 48) - 1));
    return (void *)(uintptr_t)v;
}

static void unpack_opaque(void *p, int32_t *part, uint32_t *gen, int64_t *off)
{
    uint64_t v = (uint64_t)(uintptr_t)p;
    *part = (int32_t)(v >> 52);
    *gen = (uint32_t)((v >> 48) & 0xf);
    *off = (int64_t)(v & ((UINT64_C(1) << 48) - 1));
}

/* ---- the per-partition window of delivered offsets ---------------------- */

static int window_track(relay_part *p, int64_t off)
{
    if (!p->ring) {
        p->ring = calloc(RELAY_WINDOW, 1);
        if (!p->ring)
            return -ENOMEM;
    }
    if (p->base < 0) {
        p->base = off;
        p->hi = off;
    }
    if (off < p->hi)
        return -ERANGE; /* a redelivery below the window: relay, do not track */
    if (off - p->base >= (int64_t)RELAY_WINDOW)
        return -EAGAIN;
    /* Offsets never seen (compaction, transaction markers) count as done. */
    for (int64_t o = p->hi; o < off; o++)
        p->ring[o & (RELAY_WINDOW - 1)] = ST_DONE;
    p->ring[off & (RELAY_WINDOW - 1)] = ST_PENDING;
    p->hi = off + 1;
    return 0;
}

static void window_done(relay_part *p, int64_t off)
{
    if (!p->ring || off < p->base || off >= p->hi)
        return;
    p->ring[off & (RELAY_WINDOW - 1)] = ST_DONE;
    int moved = 0;
    while (p->base < p->hi && p->ring[p->base & (RELAY_WINDOW - 1)] == ST_DONE) {
        p->ring[p->base & (RELAY_WINDOW - 1)] = ST_FREE;
        p->base++;
        moved = 1;
    }
    if (moved)
        p->dirty = 1;
}

static void window_reset(relay_part *p)
{
    if (p->ring)
        memset(p->ring, 0, RELAY_WINDOW);
    p->base = -1;
    p->hi = -1;
    p->dirty = 0;
}

/* Store base (the next offset to consume) of every dirty partition. */
static void store_dirty(relay *r)
{
    rd_kafka_topic_partition_list_t *l = NULL;
    for (int32_t i = 0; i < RELAY_MAX_PARTITIONS; i++) {
        relay_part *p = &r->parts[i];
        if (!p->dirty || !p->assigned)
            continue;
        if (!l)
            l = rd_kafka_topic_partition_list_new(8);
        rd_kafka_topic_partition_list_add(l, r->in_topic, i)->offset = p->base;
        p->dirty = 0;
    }
    if (!l)
        return;
    rd_kafka_resp_err_t err = rd_kafka_offsets_store(r->consumer, l);
    if (err && err != RD_KAFKA_RESP_ERR__STATE)
        fprintf(stderr, "relay: offsets_store: %s\n", rd_kafka_err2str(err));
    rd_kafka_topic_partition_list_destroy(l);
}

/* ---- callbacks ---------------------------------------------------------- */

static void dr_cb(rd_kafka_t *rk, const rd_kafka_message_t *m, void *opaque)
{
    (void)rk;
    relay *r = opaque;
    if (m->err) {
        if (!r->failed)
            snprintf(r->error, sizeof r->error, "delivery failed: %s",
                     rd_kafka_err2str(m->err));
        r->failed = 1;
        return;
    }
    r->delivered++;
    int32_t part;
    uint32_t gen;
    int64_t off;
    unpack_opaque(m->_private, &part, &gen, &off);
    if (part < 0 || part >= RELAY_MAX_PARTITIONS)
        return;
    relay_part *p = &r->parts[part];
    if (p->assigned && (p->gen & 0xf) == gen)
        window_done(p, off);
}

static void error_cb(rd_kafka_t *rk, int err, const char *reason, void *opaque)
{
    relay *r = opaque;
    if (err == RD_KAFKA_RESP_ERR__FATAL) {
        char buf[256];
        rd_kafka_fatal_error(rk, buf, sizeof buf);
        snprintf(r->error, sizeof r->error, "fatal: %s", buf);
        r->failed = 1;
        return;
    }
    fprintf(stderr, "relay: %s: %s\n", rd_kafka_err2name((rd_kafka_resp_err_t)err), reason);
}

static void rebalance_cb(rd_kafka_t *rk, rd_kafka_resp_err_t err,
                         rd_kafka_topic_partition_list_t *parts, void *opaque)
{
    relay *r = opaque;
    int coop = strcmp(rd_kafka_rebalance_protocol(rk), "COOPERATIVE") == 0;
    if (err == RD_KAFKA_RESP_ERR__ASSIGN_PARTITIONS) {
        for (int i = 0; i < parts->cnt; i++) {
            int32_t id = parts->elems[i].partition;
            if (id < 0 || id >= RELAY_MAX_PARTITIONS) {
                snprintf(r->error, sizeof r->error, "partition %" PRId32 " above %d", id,
                         RELAY_MAX_PARTITIONS);
                r->failed = 1;
                continue;
            }
            relay_part *p = &r->parts[id];
            window_reset(p);
            p->gen++;
            p->assigned = 1;
        }
        if (coop)
            rd_kafka_incremental_assign(rk, parts);
        else
            rd_kafka_assign(rk, parts);
    } else {
        /* Store what is delivered so the unassign commits it. */
        store_dirty(r);
        for (int i = 0; i < parts->cnt; i++) {
            int32_t id = parts->elems[i].partition;
            if (id >= 0 && id < RELAY_MAX_PARTITIONS) {
                r->parts[id].assigned = 0;
                window_reset(&r->parts[id]);
            }
        }
        if (coop)
            rd_kafka_incremental_unassign(rk, parts);
        else
            rd_kafka_assign(rk, NULL);
    }
}

/* ---- setup -------------------------------------------------------------- */

static int conf_set(rd_kafka_conf_t *c, const char *k, const char *v)
{
    char e[256];
    if (rd_kafka_conf_set(c, k, v, e, sizeof e) != RD_KAFKA_CONF_OK) {
        fprintf(stderr, "relay: %s=%s: %s\n", k, v, e);
        return -1;
    }
    return 0;
}

static int make_clients(relay *r, const char *brokers, const char *group, const char *out)
{
    char e[512];
    rd_kafka_conf_t *cc = rd_kafka_conf_new();
    if (conf_set(cc, "bootstrap.servers", brokers) || conf_set(cc, "group.id", group) ||
        conf_set(cc, "client.id", "oddsky-relay") ||
        conf_set(cc, "partition.assignment.strategy", "cooperative-sticky") ||
        conf_set(cc, "enable.auto.offset.store", "false") ||
        conf_set(cc, "enable.auto.commit", "true") ||
        conf_set(cc, "auto.offset.reset", "earliest") ||
        conf_set(cc, "enable.partition.eof", "false")) {
        rd_kafka_conf_destroy(cc);
        return -1;
    }
    rd_kafka_conf_set_opaque(cc, r);
    rd_kafka_conf_set_rebalance_cb(cc, rebalance_cb);
    rd_kafka_conf_set_error_cb(cc, error_cb);
    r->consumer = rd_kafka_new(RD_KAFKA_CONSUMER, cc, e, sizeof e);
    if (!r->consumer) {
        fprintf(stderr, "relay: consumer: %s\n", e);
        return -1;
    }
    rd_kafka_poll_set_consumer(r->consumer);

    rd_kafka_conf_t *pc = rd_kafka_conf_new();
    if (conf_set(pc, "bootstrap.servers", brokers) ||
        conf_set(pc, "client.id", "oddsky-relay") ||
        conf_set(pc, "enable.idempotence", "true") || conf_set(pc, "linger.ms", "5") ||
        conf_set(pc, "queue.buffering.max.messages", "2000000") ||
        conf_set(pc, "compression.codec", "lz4") ||
        conf_set(pc, "batch.num.messages", "10000") ||
        conf_set(pc, "batch.size", "1000000")) {
        rd_kafka_conf_destroy(pc);
        return -1;
    }
    rd_kafka_conf_set_opaque(pc, r);
    rd_kafka_conf_set_dr_msg_cb(pc, dr_cb);
    rd_kafka_conf_set_error_cb(pc, error_cb);
    r->producer = rd_kafka_new(RD_KAFKA_PRODUCER, pc, e, sizeof e);
    if (!r->producer) {
        fprintf(stderr, "relay: producer: %s\n", e);
        return -1;
    }
    r->out = rd_kafka_topic_new(r->producer, out, NULL);
    if (!r->out) {
        fprintf(stderr, "relay: topic %s: %s\n", out, rd_kafka_err2str(rd_kafka_last_error()));
        return -1;
    }
    rd_kafka_topic_partition_list_t *sub = rd_kafka_topic_partition_list_new(1);
    rd_kafka_topic_partition_list_add(sub, r->in_topic, RD_KAFKA_PARTITION_UA);
    rd_kafka_resp_err_t err = rd_kafka_subscribe(r->consumer, sub);
    rd_kafka_topic_partition_list_destroy(sub);
    if (err) {
        fprintf(stderr, "relay: subscribe %s: %s\n", r->in_topic, rd_kafka_err2str(err));
        return -1;
    }
    return 0;
}

/* ---- the relay ---------------------------------------------------------- */

/* Produce one consumed message; waits (serving delivery reports) while the
 * producer queue or the partition's window is full.  Returns 0 or -1. */
static int relay_one(relay *r, rd_kafka_message_t *m)
{
    int32_t id = m->partition;
    if (id < 0 || id >= RELAY_MAX_PARTITIONS) {
        snprintf(r->error, sizeof r->error, "partition %" PRId32 " out of range", id);
        return -1;
    }
    relay_part *p = &r->parts[id];
    int rc;
    while ((rc = window_track(p, m->offset)) == -EAGAIN && !r->failed) {
        rd_kafka_poll(r->producer, 10);
        store_dirty(r);
    }
    if (rc == -ENOMEM) {
        snprintf(r->error, sizeof r->error, "out of memory");
        return -1;
    }
    void *opaque = pack_opaque(id, p->gen, m->offset);
    for (;;) {
        if (rd_kafka_produce(r->out, RD_KAFKA_PARTITION_UA, RD_KAFKA_MSG_F_COPY,
                             m->payload, m->len, m->key, m->key_len, opaque) == 0)
            return 0;
        rd_kafka_resp_err_t err = rd_kafka_last_error();
        if (err != RD_KAFKA_RESP_ERR__QUEUE_FULL) {
            snprintf(r->error, sizeof r->error, "produce: %s", rd_kafka_err2str(err));
            return -1;
        }
        rd_kafka_poll(r->producer, 10);
        if (r->failed)
            return -1;
    }
}

static void usage(FILE *f)
{
    fprintf(f, "usage: relay -b BOOTSTRAP -i IN_TOPIC -o OUT_TOPIC -n N [-g GROUP] "
               "[-t SECONDS]\n");
}

int main(int argc, char **argv)
{
    const char *brokers = NULL, *in = NULL, *out = NULL, *group = NULL;
    char group_buf[64];
    unsigned long long n = 0;
    double timeout_s = 300;
    int opt;
    while ((opt = getopt(argc, argv, "b:i:o:n:g:t:h")) != -1) {
        switch (opt) {
        case 'b': brokers = optarg; break;
        case 'i': in = optarg; break;
        case 'o': out = optarg; break;
        case 'n': n = strtoull(optarg, NULL, 10); break;
        case 'g': group = optarg; break;
        case 't': timeout_s = strtod(optarg, NULL); break;
        case 'h': usage(stdout); return 0;
        default: usage(stderr); return EX_USAGE;
        }
    }
    if (!brokers || !in || !out || n == 0 || timeout_s <= 0) {
        usage(stderr);
        return EX_USAGE;
    }
    if (!group) {
        snprintf(group_buf, sizeof group_buf, "oddsky-relay-%ld", (long)getpid());
        group = group_buf;
    }

    relay *r = calloc(1, sizeof *r);
    if (!r) {
        fprintf(stderr, "relay: out of memory\n");
        return 1;
    }
    for (int i = 0; i < RELAY_MAX_PARTITIONS; i++) {
        r->parts[i].base = -1;
        r->parts[i].hi = -1;
    }
    r->in_topic = in;
    r->target = n;
    signal(SIGINT, on_signal);
    signal(SIGTERM, on_signal);

    rd_kafka_message_t **batch = calloc(RELAY_BATCH, sizeof *batch);
    int status = 0;
    if (!batch || make_clients(r, brokers, group, out) < 0) {
        status = 1;
        goto done;
    }
    rd_kafka_queue_t *cq = rd_kafka_queue_get_consumer(r->consumer);

    double t_start = now_s(), t_first = 0, t_last = 0;
    while (r->delivered < r->target && !r->failed && !relay_stop) {
        if (now_s() - t_start > timeout_s)
            break;
        ssize_t got = 0;
        if (r->consumed < r->target) {
            size_t room = RELAY_BATCH;
            if (r->target - r->consumed < room)
                room = (size_t)(r->target - r->consumed);
            got = rd_kafka_consume_batch_queue(cq, 100, batch, room);
        } else {
            rd_kafka_poll(r->producer, 50);
        }
        for (ssize_t i = 0; i < got; i++) {
            rd_kafka_message_t *m = batch[i];
            if (m->err) {
                if (m->err != RD_KAFKA_RESP_ERR__PARTITION_EOF)
                    fprintf(stderr, "relay: consume: %s\n", rd_kafka_message_errstr(m));
            } else if (r->consumed < r->target) {
                if (!t_first)
                    t_first = now_s();
                if (relay_one(r, m) < 0)
                    r->failed = 1;
                r->consumed++;
            }
            rd_kafka_message_destroy(m);
        }
        rd_kafka_poll(r->producer, 0);
        store_dirty(r);
        if (r->delivered >= r->target)
            t_last = now_s();
    }
    rd_kafka_queue_destroy(cq);
    rd_kafka_flush(r->producer, 10000);
    store_dirty(r);

    if (r->failed) {
        fprintf(stderr, "relay: %s\n", r->error[0] ? r->error : "failed");
        status = 1;
    } else if (r->delivered < r->target) {
        fprintf(stderr, "relay: %" PRIu64 " of %" PRIu64 " messages relayed%s\n", r->delivered,
                r->target, relay_stop ? " (interrupted)" : " before the timeout");
        status = 2;
    } else {
        double secs = t_last - t_first;
        printf("relay_messages=%" PRIu64 "\n", r->delivered);
        printf("relay_seconds=%.3f\n", secs);
        printf("relay_per_s=%.0f\n", secs > 0 ? (double)r->delivered / secs : 0.0);
        fflush(stdout);
    }

done:
    if (r->consumer) {
        rd_kafka_consumer_close(r->consumer); /* commits the stored offsets */
        rd_kafka_destroy(r->consumer);
    }
    if (r->out)
        rd_kafka_topic_destroy(r->out);
    if (r->producer)
        rd_kafka_destroy(r->producer);
    for (int i = 0; i < RELAY_MAX_PARTITIONS; i++)
        free(r->parts[i].ring);
    free(batch);
    free(r);
    return status;
}
