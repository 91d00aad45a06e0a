/*
 * decode.h - bytes of one Kafka message -> packet_features.
 *
 * Framing is detected per message, in this order (DESIGN "Input
 * framings"):
 *   1. Avro object container: starts with "Obj\x01".  The header is parsed
 *      here (schema text, codec, sync marker).  Codec "null" (or none):
 *      the single block is checked and decoded from memory.  Any other
 *      codec: the bytes go through fmemopen() + avro_file_reader_fp()
 *      (avro-c 1.11 has no in-memory container reader); such blocks are
 *      compressed, so the pre-decode guard below cannot see inside them.
 *      Exactly one record per message, else PACKET_E_MULTI_RECORD.
 *   2. Schema-id framing: 0x00, a 4-byte big-endian id, bare Avro; the
 *      writer schema is <schema_dir>/<id>.avsc, loaded on first use.
 *   3. JSON object: the first non-space byte is '{' (jansson).
 *   4. Bare Avro with the configured writer schema.
 *
 * Guards before any library sees the bytes: the message length
 * (max_message_bytes); for Avro a walk of the body against the writer
 * schema that checks every string/bytes length against the bytes left,
 * every union and enum index, varint lengths, the item count of every
 * array and map (max_items in total) and that the body ends exactly at
 * the end of the message; for JSON the nesting depth (max_json_depth) and
 * the item count of every array/object (max_items), counted by a scan
 * that skips string contents.  avro-c 1.11.1 leaks and over-allocates on
 * malformed strings (NOTES), so a message that fails the walk never
 * reaches avro-c.
 *
 * Caches: writer schemas are kept by fingerprint, the CRC-64-AVRO (Rabin)
 * fingerprint of the schema's JSON text as received (containers) or as
 * read from its file, confirmed by comparing the text itself.  Each entry
 * holds the parsed schema, its generic value (reused with
 * avro_value_reset) and the feature map compiled for it.  Schema ids map
 * to entries; an id whose file is missing is remembered (up to
 * DECODER_MAX_UNKNOWN ids) until decoder_forget_unknown().  One memory
 * reader is reused for every message (avro_reader_memory_set_source).
 *
 * Allocation: none per message for schema-id, bare Avro and null-codec
 * containers once the schema is cached (avro-c may grow the reused value's
 * buffers); JSON parsing allocates inside jansson; compressed containers
 * allocate inside avro-c's file reader.
 *
 * A decoder is not thread-safe; one per consuming thread.
 */
#ifndef ODDSKY_DAEMON_DECODE_H
#define ODDSKY_DAEMON_DECODE_H

#include <stddef.h>
#include <stdint.h>

#include "featmap.h"
#include "packet.h"

#define DECODER_MAX_UNKNOWN 1024u
#define DECODER_MAX_SCHEMAS 256u /* each holds a compiled plan, ~70 KiB */

typedef struct decoder_opts {
    const char *schema_dir;         /* dir of <id>.avsc; NULL/"" = none */
    const char *writer_schema_path; /* .avsc for bare Avro; NULL/"" = none */
    size_t max_message_bytes;       /* 0 = 1 MiB */
    uint32_t max_json_depth;        /* 0 = 32 */
    uint32_t max_items;             /* per message, arrays+maps; 0 = 100000 */
    const featmap *fm;              /* borrowed; must outlive the decoder */
} decoder_opts;

typedef struct decoder decoder;

/* Build a decoder.  The bare-Avro writer schema (when named) is loaded and
 * compiled now: a missing or bad file is an error here, not per packet.
 * Returns NULL with a message in err on failure. */
decoder *decoder_new(const decoder_opts *opts, char *err, size_t err_len);

/* Decode one message and extract its features into *out.  Returns 0, or
 * a negative PACKET_E_* reason (packet_reason_name() for the counter and
 * the dead-letter header).  buf is not retained.  On failure *out is
 * unspecified except out->framing (the framing detected, or NULL). */
int decoder_extract(decoder *d, const void *buf, size_t len,
                    packet_features *out);

/* Forget the remembered unknown schema ids (e.g. on SIGHUP, after new
 * .avsc files were added). */
void decoder_forget_unknown(decoder *d);

/* Writer schemas cached now. */
size_t decoder_schema_count(const decoder *d);

void decoder_free(decoder *d);

/* CRC-64-AVRO (Rabin) fingerprint of len bytes, as in the Avro
 * specification's "Schema Fingerprints" section. */
uint64_t decoder_fingerprint64(const void *buf, size_t len);

#endif
