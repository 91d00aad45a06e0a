/*
 * packet.h - what one input packet becomes: the feature vector and its
 * identity, plus the one list of reasons a packet can be refused.
 *
 * decode and featmap fill a packet_features; the daemon hands x/err/missing
 * to model_observe() and the ids to encode.  The struct is fixed-size so
 * the hot path never allocates for it.
 *
 * Reason codes: 0 is success; every refusal is one negative PACKET_E_*
 * from PACKET_REASON_MAP, whose short name (packet_reason_name) is what
 * the daemon counts per reason and puts in the dead-letter header.
 */
#ifndef ODDSKY_DAEMON_PACKET_H
#define ODDSKY_DAEMON_PACKET_H

#include <stdint.h>

#include "../core/model.h"

#define PACKET_ID_MAX 128u /* bytes of packet_id / source_id, NUL included */

/* X(enum suffix, value, short name for counters and headers, meaning) */
#define PACKET_REASON_MAP(X)                                                  \
    X(EMPTY, -1, "empty", "zero-length message")                              \
    X(TOO_LARGE, -2, "too_large", "message longer than the configured max")   \
    X(BAD_CONTAINER, -3, "bad_container",                                     \
      "Avro object container header or block is malformed")                   \
    X(MULTI_RECORD, -4, "multi_record",                                       \
      "Avro object container holds other than exactly one record")            \
    X(UNKNOWN_SCHEMA_ID, -5, "unknown_schema_id",                             \
      "schema-id framing with no <id>.avsc in the schema directory")          \
    X(BAD_SCHEMA, -6, "bad_schema",                                           \
      "writer schema does not parse or does not fit the feature map")         \
    X(BAD_AVRO, -7, "bad_avro",                                               \
      "Avro body does not match its writer schema (or has trailing bytes)")   \
    X(TOO_MANY_ITEMS, -8, "too_many_items",                                   \
      "an array or map holds more items than the configured max")             \
    X(BAD_JSON, -9, "bad_json", "JSON does not parse")                        \
    X(JSON_TOO_DEEP, -10, "json_too_deep", "JSON nests deeper than the max")  \
    X(NOT_AN_OBJECT, -11, "not_an_object",                                    \
      "JSON text whose top level is not an object")                           \
    X(UNKNOWN_FRAMING, -12, "unknown_framing",                                \
      "no framing matches (and no bare-Avro writer schema is configured)")    \
    X(MISSING_ID, -13, "missing_id", "packet id absent, null, empty or not "  \
                                     "a string or integer")                   \
    X(MISSING_SOURCE, -14, "missing_source",                                  \
      "source id absent, null, empty or not a string or integer")             \
    X(ID_TOO_LONG, -15, "id_too_long",                                        \
      "packet or source id longer than PACKET_ID_MAX - 1 bytes")              \
    X(INTERNAL, -16, "internal", "out of memory or a library failure")       \
    X(SCHEMA_CACHE_FULL, -17, "schema_cache_full",                            \
      "a new writer schema while DECODER_MAX_SCHEMAS are cached")            \
    X(UNSUPPORTED_CODEC, -18, "unsupported_codec",                            \
      "Avro container compressed with a codec other than null or deflate")

enum packet_reason {
    PACKET_OK = 0,
#define PACKET_REASON_ENUM(sym, val, name, text) PACKET_E_##sym = (val),
    PACKET_REASON_MAP(PACKET_REASON_ENUM)
#undef PACKET_REASON_ENUM
};

#define PACKET_REASON_COUNT 18u /* entries in PACKET_REASON_MAP */

/* Short name ("bad_json") of a reason code; "ok" for 0, "unknown" for a
 * value outside the map.  Never NULL. */
const char *packet_reason_name(int code);

/* One line of text for a reason code.  Never NULL. */
const char *packet_reason_text(int code);

/* Index 0..PACKET_REASON_COUNT-1 of a negative code (for per-reason
 * counter arrays), or -1 for anything else. */
int packet_reason_index(int code);

typedef struct packet_features {
    double x[MODEL_MAX_DIM];       /* feature values (NaN where missing) */
    double err[MODEL_MAX_DIM];     /* 1-sigma errors, 0 when unknown */
    uint8_t missing[MODEL_MAX_DIM];/* 1 = missing (never silently zero) */
    uint32_t dim;                  /* = featmap_dim() */
    uint32_t n_missing;            /* entries of missing[] set */
    uint32_t type_errors;          /* values of a wrong type (-> missing) */
    uint32_t history_points;       /* usable history points read */
    int history_truncated;         /* 1: only the newest max_points kept */
    double time_days;              /* event time, MJD days (if from packet) */
    int time_from_packet;          /* 0: absent/unusable, use Kafka time */
    char packet_id[PACKET_ID_MAX];
    char source_id[PACKET_ID_MAX]; /* = packet_id when no source path */
    const char *framing;           /* "container" "schema_id" "json" "avro" */
} packet_features;

#endif
