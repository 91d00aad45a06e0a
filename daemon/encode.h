/*
 * encode.h - one scored packet -> bytes for the output topic.
 *
 * Two encodings of the same record (DESIGN "Output record"):
 *  - JSON (default): one object, keys in schema order, written by hand
 *    into the caller's buffer.  Doubles use the shortest "%.{15,16,17}g"
 *    text that reads back to the same bits, so a replay is byte-identical;
 *    NaN and infinities become null.  Strings are escaped per RFC 8259;
 *    bytes that are not valid UTF-8 become U+FFFD.  "label" appears only
 *    when set.
 *  - Avro binary, schemaless body for config/schemas/oddsky-result.avsc
 *    (record oddsky.result), hand-encoded (zigzag varints, little-endian
 *    IEEE doubles, one array block).  Nullable doubles are null when not
 *    finite; cluster is null before warm-up (cluster < 0).
 * Neither allocates.  Feature names index drivers and the missing list.
 */
#ifndef ODDSKY_DAEMON_ENCODE_H
#define ODDSKY_DAEMON_ENCODE_H

#include <stddef.h>
#include <stdint.h>

#include "../core/model.h"

#define ENCODE_ESHORT (-1) /* buffer too small; *len = bytes needed */
#define ENCODE_EINVAL (-2) /* NULL pointers or inconsistent sizes */

typedef struct encode_record {
    const char *packet_id;
    const char *source_id;
    double event_time_days;     /* MJD days */
    int time_from_packet;       /* 1: "packet", 0: "kafka" */
    const model_result *res;
    const char *const *feature_names; /* dim names (featmap_names) */
    uint32_t dim;
    const uint8_t *missing;     /* dim flags, or NULL = none missing */
    const char *topic;          /* input coordinates */
    int32_t partition;
    int64_t offset;
    const char *label;          /* NULL = absent (replay sets it) */
} encode_record;

/* JSON into buf (not NUL-terminated unless room remains; *len excludes
 * any NUL).  Returns 0, ENCODE_ESHORT with *len = bytes needed, or
 * ENCODE_EINVAL. */
int encode_json(const encode_record *r, char *buf, size_t cap, size_t *len);

/* Avro binary into buf.  Same returns as encode_json. */
int encode_avro(const encode_record *r, uint8_t *buf, size_t cap,
                size_t *len);

/* Shortest of %.15g/%.16g/%.17g that round-trips x; "null" when x is not
 * finite.  Returns the length written (buf needs 32 bytes). */
int encode_double(double x, char *buf);

#endif
