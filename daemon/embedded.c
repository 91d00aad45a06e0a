/*
 * embedded.c - the mock cluster and the demo feeder (see embedded.h).
 */
#include "embedded.h"

#include <librdkafka/rdkafka.h>
#include <librdkafka/rdkafka_mock.h>
#include <pthread.h>
#include <stdatomic.h>
#include <stdio.h>
#include <stdlib.h>
#include <string.h>
#include <time.h>

#include "sim.h"

struct embedded {
    rd_kafka_t *owner;        /* the handle that owns the mock cluster */
    rd_kafka_mock_cluster_t *mc;
    char bootstraps[512];
    pthread_t feeder;
    int feeding;
    atomic_int stop;
    atomic_uint_fast64_t fed;
    char topic[256];
    double rate;
    uint64_t count;
    sim *sim;
    rd_kafka_t *producer;
};

embedded *embedded_start(int n_brokers, const embedded_topic *topics,
                         size_t n_topics, char *err, size_t err_len)
{
    embedded *e = calloc(1, sizeof *e);
    if (!e) {
        snprintf(err, err_len, "out of memory");
        return NULL;
    }
    char errstr[512];
    rd_kafka_conf_t *conf = rd_kafka_conf_new();
    rd_kafka_conf_set(conf, "log_level", "2", NULL, 0);
    e->owner = rd_kafka_new(RD_KAFKA_PRODUCER, conf, errstr, sizeof errstr);
    if (!e->owner) {
        snprintf(err, err_len, "embedded bus: %s", errstr);
        free(e);
        return NULL;
    }
    e->mc = rd_kafka_mock_cluster_new(e->owner, n_brokers);
    if (!e->mc) {
        snprintf(err, err_len, "embedded bus: could not start the mock cluster");
        rd_kafka_destroy(e->owner);
        free(e);
        return NULL;
    }
    for (size_t i = 0; i < n_topics; i++) {
        rd_kafka_resp_err_t re = rd_kafka_mock_topic_create(
            e->mc, topics[i].name, topics[i].partitions, 1);
        if (re) {
            snprintf(err, err_len, "embedded bus: topic %s: %s", topics[i].name,
                     rd_kafka_err2str(re));
            embedded_stop(e);
            return NULL;
        }
    }
    snprintf(e->bootstraps, sizeof e->bootstraps, "%s",
             rd_kafka_mock_cluster_bootstraps(e->mc));
    return e;
}

const char *embedded_bootstraps(const embedded *e)
{
    return e->bootstraps;
}

uint64_t embedded_fed(const embedded *e)
{
    return atomic_load(&((embedded *)e)->fed);
}

static double now_s(void)
{
    struct timespec ts;
    clock_gettime(CLOCK_MONOTONIC, &ts);
    return (double)ts.tv_sec + (double)ts.tv_nsec * 1e-9;
}

static void *feed(void *arg)
{
    embedded *e = arg;
    static uint8_t buf[SIM_AVRO_MAX + 5];
    sim_packet p;
    double t0 = now_s();
    uint64_t n = 0;
    while (!atomic_load(&e->stop) && (e->count == 0 || n < e->count)) {
        if (e->rate > 0) {
            double due = t0 + (double)n / e->rate;
            double wait = due - now_s();
            if (wait > 0) {
                struct timespec ts = {0, (long)(wait > 0.05 ? 5e7 : wait * 1e9)};
                rd_kafka_poll(e->producer, 0);
                nanosleep(&ts, NULL);
                continue;
            }
        }
        sim_next(e->sim, &p);
        int len = sim_encode_schema_id(&p, EMBEDDED_SCHEMA_ID, buf, sizeof buf);
        if (len < 0)
            continue;  /* cannot happen: SIM_AVRO_MAX bounds every datum */
        char key[32];
        int kl = snprintf(key, sizeof key, "%lld", (long long)p.source_id);
        for (;;) {
            rd_kafka_resp_err_t re = rd_kafka_producev(
                e->producer, RD_KAFKA_V_TOPIC(e->topic), RD_KAFKA_V_KEY(key, (size_t)kl),
                RD_KAFKA_V_VALUE(buf, (size_t)len),
                RD_KAFKA_V_MSGFLAGS(RD_KAFKA_MSG_F_COPY), RD_KAFKA_V_END);
            if (re != RD_KAFKA_RESP_ERR__QUEUE_FULL || atomic_load(&e->stop))
                break;
            rd_kafka_poll(e->producer, 50);
        }
        n++;
        atomic_store(&e->fed, n);
        if ((n & 255) == 0)
            rd_kafka_poll(e->producer, 0);
    }
    rd_kafka_flush(e->producer, 2000);
    return NULL;
}

int embedded_feed_start(embedded *e, const char *topic, double rate_per_s,
                        uint64_t count, uint64_t seed, double rare_rate,
                        char *err, size_t err_len)
{
    sim_params sp;
    sim_params_default(&sp);
    sp.seed = seed;
    for (unsigned i = 0; i < SIM_N_RARE; i++)
        sp.rare_rate[i] = rare_rate;
    e->sim = sim_new(&sp, err, err_len);
    if (!e->sim)
        return -1;
    char errstr[512];
    rd_kafka_conf_t *conf = rd_kafka_conf_new();
    if (rd_kafka_conf_set(conf, "bootstrap.servers", e->bootstraps, errstr, sizeof errstr) ||
        rd_kafka_conf_set(conf, "enable.idempotence", "true", errstr, sizeof errstr) ||
        rd_kafka_conf_set(conf, "linger.ms", "20", errstr, sizeof errstr)) {
        snprintf(err, err_len, "demo feeder: %s", errstr);
        rd_kafka_conf_destroy(conf);
        return -1;
    }
    e->producer = rd_kafka_new(RD_KAFKA_PRODUCER, conf, errstr, sizeof errstr);
    if (!e->producer) {
        snprintf(err, err_len, "demo feeder: %s", errstr);
        return -1;
    }
    snprintf(e->topic, sizeof e->topic, "%s", topic);
    e->rate = rate_per_s;
    e->count = count;
    if (pthread_create(&e->feeder, NULL, feed, e) != 0) {
        snprintf(err, err_len, "demo feeder: cannot start a thread");
        return -1;
    }
    e->feeding = 1;
    return 0;
}

void embedded_stop(embedded *e)
{
    if (!e)
        return;
    if (e->feeding) {
        atomic_store(&e->stop, 1);
        pthread_join(e->feeder, NULL);
    }
    if (e->producer)
        rd_kafka_destroy(e->producer);
    sim_free(e->sim);
    if (e->mc)
        rd_kafka_mock_cluster_destroy(e->mc);
    if (e->owner)
        rd_kafka_destroy(e->owner);
    free(e);
}
