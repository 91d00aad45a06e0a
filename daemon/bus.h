/*
 * bus.h - Kafka in and out, on one libuv loop, with nothing lost.
 *
 * The bus owns a high-level consumer (cooperative-sticky group member,
 * automatic offset storing off, automatic commit on) and an idempotent
 * producer, and drives both from the caller's uv loop: each client's final
 * queue writes to a non-blocking pipe when it becomes non-empty (librdkafka
 * queue IO events are edge-triggered), a uv_poll on the pipe wakes the loop,
 * the pipe is read dry and the queue is served until empty; a periodic timer
 * serves both queues too, so idle periods keep the group membership alive.
 *
 * Every consumed message gets a ticket.  The handler produces zero or more
 * output messages under that ticket (a result, a flagged copy, a dead
 * letter); the input offset is done when every one of them has a
 * successful delivery report (or at once when none was produced).  Per
 * partition only the highest contiguous done offset + 1 is stored, so a
 * crash re-delivers, never skips (at-least-once).  A delivery that fails
 * with a retriable error is produced again with the same ticket; a
 * permanent failure calls on_fatal and the offset is never stored.
 *
 * Each assigned partition's messages are taken from that partition's own
 * librdkafka queue (detached from the consumer queue at assign), a fair
 * share per partition in turn, so one partition's backlog never starves
 * the others; the consumer queue then carries only events (rebalances,
 * errors), which are served whatever the back-pressure.
 *
 * Back-pressure: when the tickets in flight reach max_in_flight, the bus
 * holds its input (takes no more messages; what librdkafka prefetched
 * stays queued, bounded by queued.min.messages and
 * queued.max.messages.kbytes per partition) and asks the producer to send
 * what it is lingering on, since nothing more joins those batches until
 * deliveries come back; input is taken again below half of max_in_flight.
 * librdkafka's pause/resume is never used: its per-partition pause state
 * outlives an unassign, and each pause drops the prefetched messages.
 * On revoke, the producer is flushed (bounded by revoke_flush_ms) so the
 * partitions' offsets are stored before they are let go.
 *
 * Skipped input: a partition's next message may come with an offset above
 * the one expected (one past the last message, or for the first message
 * after an assign the group's committed offset, when the bus looked it up:
 * with on_assign set).  The offsets between were never received: one per
 * committed transaction (its marker), compacted records, or input the
 * broker deleted by retention before the group read it (librdkafka then
 * resets the position by auto.offset.reset and says nothing to the
 * application).  Every such offset is counted in offsets_skipped; a jump
 * of more than one offset is also counted in skips and logged through
 * on_log at level 4 (warning) with facility "SKIPPED", naming the topic,
 * the partition and the range.  A jump of one offset (a transaction
 * marker) is not logged.
 */
#ifndef ODDSKY_DAEMON_BUS_H
#define ODDSKY_DAEMON_BUS_H

#include <librdkafka/rdkafka.h>
#include <stddef.h>
#include <stdint.h>
#include <uv.h>

typedef struct bus bus;
typedef struct bus_ticket bus_ticket;

typedef struct bus_header {
    const char *name;
    const void *value;
    size_t len;
} bus_header;

typedef struct bus_callbacks {
    void *ctx;
    /* One consumed message; produce its outputs with bus_produce(). */
    void (*on_message)(void *ctx, bus *b, const rd_kafka_message_t *m,
                       bus_ticket *t);
    /* After each batch handed to on_message. May be NULL. */
    void (*on_batch_end)(void *ctx, bus *b, size_t n);
    /* A partition is being assigned; committed is the group's committed
     * offset (RD_KAFKA_OFFSET_INVALID when none).  Returns the offset to
     * start from, or RD_KAFKA_OFFSET_INVALID to start at the committed
     * offset (or auto.offset.reset).  May be NULL. */
    int64_t (*on_assign)(void *ctx, const char *topic, int32_t partition,
                         int64_t committed);
    /* A partition is being revoked (after its in-flight results were
     * flushed). May be NULL. */
    void (*on_revoke)(void *ctx, const char *topic, int32_t partition);
    /* Every output of a ticket was delivered; latency from consume, and
     * the tag the handler set with bus_ticket_set_tag (0 by default).
     * May be NULL. */
    void (*on_done)(void *ctx, int64_t latency_us, int64_t broker_ts_ms,
                    int tag);
    /* A permanent failure: the daemon must stop.  Offsets of failed
     * deliveries are never stored. */
    void (*on_fatal)(void *ctx, const char *why);
    /* librdkafka log and error lines. May be NULL. */
    void (*on_log)(void *ctx, int level, const char *fac, const char *msg);
} bus_callbacks;

typedef struct bus_opts {
    const char *brokers;
    const char *group_id;
    const char *client_id;
    const char *const *topics;
    uint32_t n_topics;
    /* Extra librdkafka properties, as key/value pairs flattened. */
    const char *const *consumer_kv;
    uint32_t n_consumer_kv; /* number of pairs */
    const char *const *producer_kv;
    uint32_t n_producer_kv;
    uint32_t poll_batch;      /* messages per consume call */
    uint32_t max_in_flight;   /* tickets before the input is held */
    uint32_t poll_interval_ms;
    uint32_t max_partitions;  /* assigned partitions tracked at once */
    uint32_t revoke_flush_ms;
    uint32_t max_redeliveries;/* re-produce attempts of a failed delivery */
} bus_opts;

/* Partition state for the status page. */
typedef struct bus_partition_info {
    const char *topic;
    int32_t partition;
    int64_t stored;      /* next offset to consume after a restart */
    int64_t high;        /* high watermark seen, -1 unknown */
    int64_t lag;         /* high - stored, -1 unknown */
    uint32_t in_flight;
    int paused;          /* input held, or this partition's window full */
} bus_partition_info;

typedef struct bus_counters {
    uint64_t consumed;
    uint64_t produced;
    uint64_t delivered;
    uint64_t redelivered;     /* re-produced after a retriable failure */
    uint64_t delivery_failed; /* permanent */
    uint64_t untracked;       /* redeliveries below the window */
    uint64_t consumer_errors;
    uint64_t pauses;          /* times the input was held (back-pressure) */
    uint64_t window_full;     /* times a partition was held and sought back
                               * because its offset window was full */
    uint64_t offsets_stored;
    uint64_t purges;          /* stalled producer queues purged (watchdog) */
    uint64_t offsets_skipped; /* offsets never received between the
                               * messages of a partition (see the top) */
    uint64_t skips;           /* jumps over more than one offset, each
                               * logged as a warning */
} bus_counters;

/* Create and subscribe.  Returns 0 or a negative errno with err filled. */
int bus_new(uv_loop_t *loop, const bus_opts *o, const bus_callbacks *cb,
            bus **out, char *err, size_t err_len);

/* A producer topic handle for bus_produce (owned by the bus). */
rd_kafka_topic_t *bus_output_topic(bus *b, const char *name);

/*
 * Produce one output message under ticket t (copying key, payload and
 * headers).  Returns 0, or a negative errno with err filled (the ticket is
 * then not waiting on this message: the caller decides; a dead letter is
 * the usual fallback).
 */
int bus_produce(bus *b, bus_ticket *t, rd_kafka_topic_t *rkt, const void *key,
                size_t key_len, const void *payload, size_t len,
                const bus_header *headers, uint32_t n_headers, char *err,
                size_t err_len);

/* Mark a ticket with a small caller value handed back in on_done (the
 * daemon tells results from dead letters this way). */
void bus_ticket_set_tag(bus_ticket *t, int tag);

/* The handler could not produce what this input needs (not even a dead
 * letter): the ticket never completes, so its offset and every later one
 * of its partition stay unstored, and the daemon stops (on_fatal). */
void bus_ticket_fail(bus *b, bus_ticket *t, const char *why);

/* Stop taking new messages (drain starts).  Outstanding deliveries go on. */
void bus_stop_consuming(bus *b);

/* Tickets still waiting on deliveries. */
uint64_t bus_in_flight(const bus *b);

/* Nonzero while input is held for back-pressure (also with no
 * partition assigned, e.g. after a revoke during a broker outage). */
int bus_paused(const bus *b);

/*
 * Flush the producer for at most timeout_ms, store every done offset,
 * commit synchronously and leave the group.  Blocks.  Returns the tickets
 * still undelivered (their offsets are not stored).
 */
uint64_t bus_drain(bus *b, int timeout_ms);

/* Close the uv handles and free everything; cb (may be NULL) runs when the
 * handles are closed.  Call after bus_drain. */
void bus_close(bus *b, void (*cb)(void *arg), void *arg);

/* Fill up to n entries with the assigned partitions; returns the count. */
uint32_t bus_partitions(bus *b, bus_partition_info *out, uint32_t n);

const bus_counters *bus_get_counters(const bus *b);

/* The underlying consumer (for metadata queries in tests and tools). */
rd_kafka_t *bus_consumer(bus *b);

#endif
