/*
 * pipeline.h - one packet's way through the house, shared by `run`,
 * `demo` and `replay`: bytes -> framing -> feature vector -> model ->
 * result record bytes.
 *
 * The pipeline owns the feature map, the decoder, the model and one output
 * buffer; it keeps the per-reason refusal counts and a ring of the latest
 * flagged packets for the status page.  pipeline_process() allocates
 * nothing of its own (JSON input is parsed by jansson, which does); its
 * output points into the pipeline's buffer and stays valid until the next
 * call.
 *
 * Time: a packet without a usable observation time is placed at its Kafka
 * timestamp (converted to MJD); the result says which was used.
 */
#ifndef ODDSKY_DAEMON_PIPELINE_H
#define ODDSKY_DAEMON_PIPELINE_H

#include <stddef.h>
#include <stdint.h>

#include "../core/model.h"
#include "config.h"
#include "featmap.h"
#include "packet.h"

#define PIPELINE_RECENT_FLAGS 32u
#define PIPELINE_OUT_BYTES (64u * 1024u)

typedef struct pipeline pipeline;

typedef struct pipeline_input {
    const void *buf;       /* the message value */
    size_t len;
    const char *topic;     /* input coordinates, for the record */
    int32_t partition;
    int64_t offset;
    int64_t kafka_ts_ms;   /* fallback time; -1 when there is none */
    int learn;             /* 0: score only (already learned before) */
    const char *label;     /* replay only: carried into the record */
} pipeline_input;

typedef struct pipeline_output {
    int reason;                 /* 0, or a negative PACKET_E_* */
    const char *payload;        /* encoded result (reason == 0) */
    size_t len;
    const char *key;            /* source id */
    size_t key_len;
    int flag;
    const model_result *res;    /* valid until the next call */
    const packet_features *pf;
} pipeline_output;

typedef struct pipeline_flag_entry {
    char packet_id[PACKET_ID_MAX];
    char source_id[PACKET_ID_MAX];
    double novelty, tail_prob, event_time_days;
    uint32_t n_drivers;
    model_driver drivers[MODEL_DRIVERS];
} pipeline_flag_entry;

typedef struct pipeline_counters {
    uint64_t packets;     /* messages handed in */
    uint64_t results;     /* results encoded */
    uint64_t flags;
    uint64_t learned;     /* of those, learned by the model */
    uint64_t score_only;  /* re-scored, not learned (learn-once) */
    uint64_t refused[PACKET_REASON_COUNT + 1]; /* by packet_reason_index */
    uint64_t kafka_time;  /* packets placed at their Kafka timestamp */
    uint64_t type_errors; /* values of a wrong type read as missing */
    uint64_t truncated;   /* histories cut to the newest points */
    uint64_t encode_errors;
} pipeline_counters;

/* Build from a validated config (featmap, input, output and model
 * options).  Returns 0 or -1 with err filled. */
int pipeline_new(const struct oddsky_config *cfg, pipeline **out, char *err,
                 size_t err_len);

/* Without a feature map (replay of vector lines): dim features named
 * f0, f1, ...; only pipeline_process_vector() works on it. */
int pipeline_new_vectors(const struct oddsky_config *cfg, uint32_t dim,
                         pipeline **out, char *err, size_t err_len);
void pipeline_free(pipeline *p);

/* Replace the model (e.g. with one restored from a checkpoint).  The new
 * model must have the feature map's dimension.  Takes ownership on
 * success; returns 0 or -1 with err filled (the old model stays). */
int pipeline_set_model(pipeline *p, model *m, char *err, size_t err_len);

model *pipeline_model(pipeline *p);
const featmap *pipeline_featmap(const pipeline *p);

/* Decode, score (and learn when in->learn), encode.  Always fills *out;
 * returns out->reason. */
int pipeline_process(pipeline *p, const pipeline_input *in,
                     pipeline_output *out);

/* Score and encode features already extracted by the caller into *pf
 * (replay reads Avro container files record by record with
 * featmap_extract_avro, which is the same feature path).  pf->time_days /
 * time_from_packet as decoder_extract leaves them. */
int pipeline_process_features(pipeline *p, const packet_features *pf,
                              int64_t kafka_ts_ms, int learn,
                              const char *topic, int32_t partition,
                              int64_t offset, const char *label,
                              pipeline_output *out);

/* The same for a vector that was never a packet (replay's vector lines):
 * x/err/missing have featmap_dim (or, without a feature map, the model's
 * dim) entries; err and missing may be NULL. */
int pipeline_process_vector(pipeline *p, const char *id, double time_days,
                            const double *x, const double *err,
                            const uint8_t *missing, int learn,
                            const char *label, pipeline_output *out);

const pipeline_counters *pipeline_get_counters(const pipeline *p);

/* The latest flagged packets, newest first; returns how many (<= n). */
uint32_t pipeline_recent_flags(const pipeline *p, pipeline_flag_entry *out,
                               uint32_t n);

/* Feature names (dim entries). */
const char *const *pipeline_feature_names(const pipeline *p);
uint32_t pipeline_dim(const pipeline *p);

#endif
