/*
 * embedded.h - an in-process Kafka cluster for `oddsky demo` only.
 *
 * librdkafka's mock cluster (rdkafka_mock.h, experimental) listens on
 * loopback ports and speaks the Kafka protocol well enough for a consumer
 * group and an idempotent producer, so the daemon runs unchanged against
 * it.  It keeps everything in memory and is for trying the tool, never for
 * production or for the integration tests (those use a real broker).
 *
 * The demo feeder is a thread that produces simulated packets (daemon/sim)
 * to the input topic at a steady rate, as Avro object containers.
 */
#ifndef ODDSKY_DAEMON_EMBEDDED_H
#define ODDSKY_DAEMON_EMBEDDED_H

#include <stddef.h>
#include <stdint.h>

typedef struct embedded embedded;

typedef struct embedded_topic {
    const char *name;
    int partitions;
} embedded_topic;

/* Start a mock cluster of n_brokers with the topics.  Returns NULL with
 * err filled. */
embedded *embedded_start(int n_brokers, const embedded_topic *topics,
                         size_t n_topics, char *err, size_t err_len);

/* "127.0.0.1:port,..." of the mock brokers (owned by e). */
const char *embedded_bootstraps(const embedded *e);

/* Schema id the feeder writes (schema-id framing: byte 0, the 4-byte
 * big-endian id, bare Avro); the daemon reads <id>.avsc from its schema
 * dir. */
#define EMBEDDED_SCHEMA_ID 1u

/* Start feeding simulated packets to topic at rate_per_s (0 = as fast as
 * the producer takes them) with the given seed and rare-population rate,
 * stopping after count packets (0 = until embedded_stop).  Returns 0 or -1
 * with err filled. */
int embedded_feed_start(embedded *e, const char *topic, double rate_per_s,
                        uint64_t count, uint64_t seed, double rare_rate,
                        char *err, size_t err_len);

/* Packets the feeder has produced so far. */
uint64_t embedded_fed(const embedded *e);

/* Stop the feeder (if any) and the cluster; frees e. */
void embedded_stop(embedded *e);

#endif
