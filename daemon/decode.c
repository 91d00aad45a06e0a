/*
 * decode.c - framing detection, guards, schema caches, avro-c/jansson
 * decoding (see decode.h for the contract).
 *
 * The Avro guard is a small recursive walk of the binary encoding against
 * the writer schema (Avro specification, "Binary Encoding"): it reads
 * nothing into memory, only checks that the bytes could be decoded, and
 * bounds the work by max_items and a recursion depth.  Only bytes that pass
 * it are given to avro_value_read().
 */
#include "decode.h"

#include <zlib.h>

#include <errno.h>
#include <inttypes.h>
#include <stdio.h>
#include <stdlib.h>
#include <string.h>

#define DEC_DEFAULT_MAX_BYTES (1u << 20)
#define DEC_DEFAULT_DEPTH 32u
#define DEC_DEFAULT_ITEMS 100000u
#define DEC_WALK_DEPTH 64
#define DEC_SCHEMA_FILE_MAX (1u << 20)
#define DEC_SYNC_LEN 16u

static const char *const reason_names[] = {
#define PACKET_REASON_NAME(sym, val, name, text) name,
    PACKET_REASON_MAP(PACKET_REASON_NAME)
#undef PACKET_REASON_NAME
};
static const char *const reason_texts[] = {
#define PACKET_REASON_TEXT(sym, val, name, text) text,
    PACKET_REASON_MAP(PACKET_REASON_TEXT)
#undef PACKET_REASON_TEXT
};
static const int reason_values[] = {
#define PACKET_REASON_VAL(sym, val, name, text) val,
    PACKET_REASON_MAP(PACKET_REASON_VAL)
#undef PACKET_REASON_VAL
};

_Static_assert(sizeof reason_values / sizeof reason_values[0] ==
                   PACKET_REASON_COUNT,
               "PACKET_REASON_COUNT must match PACKET_REASON_MAP");

int packet_reason_index(int code)
{
    for (unsigned i = 0; i < PACKET_REASON_COUNT; i++)
        if (reason_values[i] == code)
            return (int)i;
    return -1;
}

const char *packet_reason_name(int code)
{
    if (code == 0)
        return "ok";
    int i = packet_reason_index(code);
    return i < 0 ? "unknown" : reason_names[i];
}

const char *packet_reason_text(int code)
{
    if (code == 0)
        return "ok";
    int i = packet_reason_index(code);
    return i < 0 ? "unknown reason code" : reason_texts[i];
}

/* CRC-64-AVRO: the Avro specification's Rabin fingerprint, bit by bit. */
uint64_t decoder_fingerprint64(const void *buf, size_t len)
{
    const uint64_t empty = 0xc15d213aa4d7a795ULL;
    const uint8_t *p = buf;
    uint64_t fp = empty;
    for (size_t i = 0; i < len; i++) {
        fp ^= p[i];
        for (int j = 0; j < 8; j++)
            fp = (fp >> 1) ^ (empty & (0 - (fp & 1)));
    }
    return fp;
}

/* ------------------------------------------------------------------ */
/* caches                                                              */

typedef struct dentry {
    uint64_t fp;
    char *text;
    size_t text_len;
    int bad;                    /* schema did not parse or compile */
    avro_schema_t schema;
    avro_value_iface_t *iface;
    avro_value_t value;
    int has_value;
    featmap_plan *plan;
} dentry;

typedef struct did {
    uint32_t id;
    int32_t entry;              /* index into entries, -1 unknown */
} did;

struct decoder {
    const featmap *fm;
    featmap_scratch *scratch;
    char *schema_dir;
    size_t max_bytes;
    uint32_t max_depth;
    uint64_t max_items;
    dentry **entries;
    size_t n_entries, cap_entries;
    did *ids;
    size_t n_ids, cap_ids, n_unknown;
    int32_t bare;               /* entry of the configured writer, -1 */
    avro_reader_t reader;
    z_stream zs;                /* raw inflate for deflate containers */
    int zs_ready;
    uint8_t *inflated;          /* max_bytes, allocated on first use */
};

static void entry_free(dentry *e)
{
    if (!e)
        return;
    if (e->has_value)
        avro_value_decref(&e->value);
    if (e->iface)
        avro_value_iface_decref(e->iface);
    featmap_plan_free(e->plan);
    if (e->schema)
        avro_schema_decref(e->schema);
    free(e->text);
    free(e);
}

/* Entry for the schema text, created (and compiled) on a miss.  Returns
 * the index, PACKET_E_SCHEMA_CACHE_FULL, or PACKET_E_INTERNAL (out of
 * memory). */
static int32_t entry_for_text(decoder *d, const char *text, size_t len)
{
    uint64_t fp = decoder_fingerprint64(text, len);
    for (size_t i = d->n_entries; i-- > 0;) {
        dentry *e = d->entries[i];
        if (e->fp == fp && e->text_len == len && !memcmp(e->text, text, len))
            return (int32_t)i;
    }
    if (d->n_entries >= DECODER_MAX_SCHEMAS)
        return PACKET_E_SCHEMA_CACHE_FULL;
    if (d->n_entries == d->cap_entries) {
        size_t nc = d->cap_entries ? 2 * d->cap_entries : 8;
        dentry **ne = realloc(d->entries, nc * sizeof *ne);
        if (!ne)
            return PACKET_E_INTERNAL;
        d->entries = ne;
        d->cap_entries = nc;
    }
    dentry *e = calloc(1, sizeof *e);
    if (!e)
        return PACKET_E_INTERNAL;
    e->fp = fp;
    e->text_len = len;
    e->text = malloc(len + 1);
    if (!e->text) {
        free(e);
        return PACKET_E_INTERNAL;
    }
    memcpy(e->text, text, len);
    e->text[len] = '\0';
    if (avro_schema_from_json_length(e->text, len, &e->schema) != 0) {
        e->schema = NULL;
        e->bad = 1;
    } else if (!(e->plan = featmap_plan_avro(d->fm, e->schema, NULL, 0)) ||
               !(e->iface = avro_generic_class_from_schema(e->schema)) ||
               avro_generic_value_new(e->iface, &e->value) != 0) {
        e->bad = 1;
    } else {
        e->has_value = 1;
    }
    d->entries[d->n_entries] = e;
    return (int32_t)d->n_entries++;
}

static char *read_file(const char *path, size_t *len)
{
    FILE *f = fopen(path, "rb");
    if (!f)
        return NULL;
    char *buf = malloc(DEC_SCHEMA_FILE_MAX + 1);
    size_t n = buf ? fread(buf, 1, DEC_SCHEMA_FILE_MAX + 1, f) : 0;
    fclose(f);
    if (!buf || n > DEC_SCHEMA_FILE_MAX) {
        free(buf);
        return NULL;
    }
    buf[n] = '\0';
    *len = n;
    return buf;
}

/* Entry for a schema id: cached, or loaded from <dir>/<id>.avsc.
 * Returns >= 0, or a negative PACKET_E_*. */
static int32_t entry_for_id(decoder *d, uint32_t id)
{
    for (size_t i = 0; i < d->n_ids; i++)
        if (d->ids[i].id == id)
            return d->ids[i].entry >= 0 ? d->ids[i].entry
                                        : PACKET_E_UNKNOWN_SCHEMA_ID;
    if (!d->schema_dir)
        return PACKET_E_UNKNOWN_SCHEMA_ID;
    char path[4096];
    snprintf(path, sizeof path, "%s/%" PRIu32 ".avsc", d->schema_dir, id);
    size_t len = 0;
    char *text = read_file(path, &len);
    int32_t entry = -1;
    if (text) {
        entry = entry_for_text(d, text, len);
        free(text);
        if (entry < 0)
            return entry;
    }
    if (entry < 0 && d->n_unknown >= DECODER_MAX_UNKNOWN)
        return PACKET_E_UNKNOWN_SCHEMA_ID; /* not remembered */
    if (d->n_ids == d->cap_ids) {
        size_t nc = d->cap_ids ? 2 * d->cap_ids : 16;
        did *ni = realloc(d->ids, nc * sizeof *ni);
        if (!ni)
            return entry >= 0 ? entry : PACKET_E_UNKNOWN_SCHEMA_ID;
        d->ids = ni;
        d->cap_ids = nc;
    }
    d->ids[d->n_ids].id = id;
    d->ids[d->n_ids].entry = entry;
    d->n_ids++;
    if (entry < 0) {
        d->n_unknown++;
        return PACKET_E_UNKNOWN_SCHEMA_ID;
    }
    return entry;
}

void decoder_forget_unknown(decoder *d)
{
    size_t k = 0;
    for (size_t i = 0; i < d->n_ids; i++)
        if (d->ids[i].entry >= 0)
            d->ids[k++] = d->ids[i];
    d->n_ids = k;
    d->n_unknown = 0;
}

size_t decoder_schema_count(const decoder *d)
{
    return d->n_entries;
}

/* ------------------------------------------------------------------ */
/* lifecycle                                                           */

decoder *decoder_new(const decoder_opts *o, char *err, size_t err_len)
{
    char dummy[8];
    if (!err || !err_len) {
        err = dummy;
        err_len = sizeof dummy;
    }
    err[0] = '\0';
    if (!o || !o->fm) {
        snprintf(err, err_len, "decoder: a feature map is required");
        return NULL;
    }
    decoder *d = calloc(1, sizeof *d);
    if (!d)
        goto fail_alloc;
    d->fm = o->fm;
    d->bare = -1;
    d->max_bytes = o->max_message_bytes ? o->max_message_bytes
                                        : DEC_DEFAULT_MAX_BYTES;
    d->max_depth = o->max_json_depth ? o->max_json_depth : DEC_DEFAULT_DEPTH;
    d->max_items = o->max_items ? o->max_items : DEC_DEFAULT_ITEMS;
    if (o->schema_dir && o->schema_dir[0] &&
        !(d->schema_dir = strdup(o->schema_dir)))
        goto fail_alloc;
    if (!(d->scratch = featmap_scratch_new(o->fm)))
        goto fail_alloc;
    if (!(d->reader = avro_reader_memory("", 0)))
        goto fail_alloc;
    if (o->writer_schema_path && o->writer_schema_path[0]) {
        size_t len = 0;
        char *text = read_file(o->writer_schema_path, &len);
        if (!text) {
            snprintf(err, err_len, "%s: cannot read (or larger than 1 MiB)",
                     o->writer_schema_path);
            goto fail;
        }
        d->bare = entry_for_text(d, text, len);
        free(text);
        if (d->bare < 0)
            goto fail_alloc;
        if (d->entries[d->bare]->bad) {
            snprintf(err, err_len, "%s: not a usable Avro record schema: %s",
                     o->writer_schema_path,
                     d->entries[d->bare]->schema ? "not a record"
                                                 : avro_strerror());
            goto fail;
        }
    }
    return d;
fail_alloc:
    snprintf(err, err_len, "decoder: out of memory");
fail:
    decoder_free(d);
    return NULL;
}

void decoder_free(decoder *d)
{
    if (!d)
        return;
    for (size_t i = 0; i < d->n_entries; i++)
        entry_free(d->entries[i]);
    free(d->entries);
    free(d->ids);
    if (d->reader)
        avro_reader_free(d->reader);
    if (d->zs_ready)
        inflateEnd(&d->zs);
    free(d->inflated);
    featmap_scratch_free(d->scratch);
    free(d->schema_dir);
    free(d);
}

/* ------------------------------------------------------------------ */
/* the Avro guard                                                      */

typedef struct walk {
    const uint8_t *p;
    size_t len, pos;
    uint64_t items, max_items;
} walk;

/* Zigzag varint of at most maxb bytes. */
static int w_varint(walk *w, int64_t *out, int maxb)
{
    uint64_t v = 0;
    for (int i = 0; i < maxb; i++) {
        if (w->pos >= w->len)
            return PACKET_E_BAD_AVRO;
        uint8_t b = w->p[w->pos++];
        v |= (uint64_t)(b & 0x7f) << (7 * i);
        if (!(b & 0x80)) {
            *out = (int64_t)(v >> 1) ^ -(int64_t)(v & 1);
            return 0;
        }
    }
    return PACKET_E_BAD_AVRO;
}

static int w_need(walk *w, uint64_t n)
{
    if (n > w->len - w->pos)
        return PACKET_E_BAD_AVRO;
    w->pos += (size_t)n;
    return 0;
}

static int w_len(walk *w)
{
    int64_t n;
    int rc = w_varint(w, &n, 10);
    if (rc)
        return rc;
    if (n < 0)
        return PACKET_E_BAD_AVRO;
    return w_need(w, (uint64_t)n);
}

static int w_value(walk *w, avro_schema_t s, int depth);

/* Array or map blocks (Avro spec: a negative count is followed by the
 * block's size in bytes). */
static int w_blocks(walk *w, avro_schema_t item, int is_map, int depth)
{
    for (;;) {
        int64_t count;
        int rc = w_varint(w, &count, 10);
        if (rc)
            return rc;
        if (count == 0)
            return 0;
        if (count < 0) {
            if (count == INT64_MIN)
                return PACKET_E_BAD_AVRO;
            count = -count;
            int64_t size;
            if ((rc = w_varint(w, &size, 10)))
                return rc;
            if (size < 0 || (uint64_t)size > w->len - w->pos)
                return PACKET_E_BAD_AVRO;
        }
        if ((uint64_t)count > w->max_items - w->items)
            return PACKET_E_TOO_MANY_ITEMS;
        w->items += (uint64_t)count;
        for (int64_t i = 0; i < count; i++) {
            if (is_map && (rc = w_len(w)))
                return rc;
            if ((rc = w_value(w, item, depth + 1)))
                return rc;
        }
    }
}

static int w_value(walk *w, avro_schema_t s, int depth)
{
    if (depth > DEC_WALK_DEPTH)
        return PACKET_E_BAD_AVRO;
    for (int guard = 0; s && is_avro_link(s) && guard < 64; guard++)
        s = avro_schema_link_target(s);
    if (!s)
        return PACKET_E_BAD_AVRO;
    int64_t v;
    int rc;
    switch (avro_typeof(s)) {
    case AVRO_NULL:
        return 0;
    case AVRO_BOOLEAN:
        if (w->pos >= w->len || w->p[w->pos] > 1)
            return PACKET_E_BAD_AVRO;
        w->pos++;
        return 0;
    case AVRO_INT32:
        if ((rc = w_varint(w, &v, 5)))
            return rc;
        return (v < INT32_MIN || v > INT32_MAX) ? PACKET_E_BAD_AVRO : 0;
    case AVRO_INT64:
        return w_varint(w, &v, 10);
    case AVRO_FLOAT:
        return w_need(w, 4);
    case AVRO_DOUBLE:
        return w_need(w, 8);
    case AVRO_STRING:
    case AVRO_BYTES:
        return w_len(w);
    case AVRO_FIXED:
        return w_need(w, (uint64_t)avro_schema_fixed_size(s));
    case AVRO_ENUM:
        if ((rc = w_varint(w, &v, 5)))
            return rc;
        return (v < 0 || v >= avro_schema_enum_number_of_symbols(s))
                   ? PACKET_E_BAD_AVRO
                   : 0;
    case AVRO_UNION:
        if ((rc = w_varint(w, &v, 10)))
            return rc;
        if (v < 0 || (uint64_t)v >= avro_schema_union_size(s))
            return PACKET_E_BAD_AVRO;
        return w_value(w, avro_schema_union_branch(s, (int)v), depth + 1);
    case AVRO_RECORD: {
        size_t n = avro_schema_record_size(s);
        for (size_t i = 0; i < n; i++)
            if ((rc = w_value(w, avro_schema_record_field_get_by_index(s, (int)i),
                              depth + 1)))
                return rc;
        return 0;
    }
    case AVRO_ARRAY:
        return w_blocks(w, avro_schema_array_items(s), 0, depth);
    case AVRO_MAP:
        return w_blocks(w, avro_schema_map_values(s), 1, depth);
    default:
        return PACKET_E_BAD_AVRO;
    }
}

/* Guard then decode the bare Avro body [p, p+n) with entry e, then
 * extract. */
static int decode_body(decoder *d, dentry *e, const uint8_t *p, size_t n,
                       packet_features *out)
{
    if (e->bad)
        return PACKET_E_BAD_SCHEMA;
    walk w = {p, n, 0, 0, d->max_items};
    int rc = w_value(&w, e->schema, 0);
    if (rc)
        return rc;
    if (w.pos != n)
        return PACKET_E_BAD_AVRO; /* trailing bytes */
    avro_value_reset(&e->value);
    avro_reader_memory_set_source(d->reader, (const char *)p, (int64_t)n);
    if (avro_value_read(d->reader, &e->value) != 0)
        return PACKET_E_BAD_AVRO;
    return featmap_extract_avro(d->fm, e->plan, &e->value, d->scratch, out);
}

/* ------------------------------------------------------------------ */
/* framings                                                            */

static int decode_container(decoder *d, const uint8_t *p, size_t n,
                            packet_features *out)
{
    walk w = {p, n, 4, 0, d->max_items};
    const uint8_t *schema = NULL, *codec = NULL;
    size_t schema_len = 0, codec_len = 0;
    /* metadata: map<bytes> */
    for (;;) {
        int64_t count;
        if (w_varint(&w, &count, 10))
            return PACKET_E_BAD_CONTAINER;
        if (count == 0)
            break;
        if (count < 0) {
            int64_t size;
            if (count == INT64_MIN || w_varint(&w, &size, 10))
                return PACKET_E_BAD_CONTAINER;
            count = -count;
        }
        if (count > 1024)
            return PACKET_E_BAD_CONTAINER;
        for (int64_t i = 0; i < count; i++) {
            int64_t kl, vl;
            if (w_varint(&w, &kl, 10) || kl < 0 ||
                (uint64_t)kl > w.len - w.pos)
                return PACKET_E_BAD_CONTAINER;
            const uint8_t *key = p + w.pos;
            w.pos += (size_t)kl;
            if (w_varint(&w, &vl, 10) || vl < 0 ||
                (uint64_t)vl > w.len - w.pos)
                return PACKET_E_BAD_CONTAINER;
            const uint8_t *val = p + w.pos;
            w.pos += (size_t)vl;
            if (kl == 11 && !memcmp(key, "avro.schema", 11)) {
                schema = val;
                schema_len = (size_t)vl;
            } else if (kl == 10 && !memcmp(key, "avro.codec", 10)) {
                codec = val;
                codec_len = (size_t)vl;
            }
        }
    }
    if (!schema || w.len - w.pos < DEC_SYNC_LEN)
        return PACKET_E_BAD_CONTAINER;
    const uint8_t *sync = p + w.pos;
    w.pos += DEC_SYNC_LEN;
    if (w.pos == w.len)
        return PACKET_E_MULTI_RECORD; /* header only: no record */
    int64_t count = 0, size = 0;
    if (w_varint(&w, &count, 10) || w_varint(&w, &size, 10) || size < 0 ||
        (uint64_t)size > w.len - w.pos ||
        w.len - w.pos - (size_t)size < DEC_SYNC_LEN)
        return PACKET_E_BAD_CONTAINER;
    const uint8_t *block = p + w.pos;
    size_t block_end = w.pos + (size_t)size;
    if (memcmp(p + block_end, sync, DEC_SYNC_LEN) != 0)
        return PACKET_E_BAD_CONTAINER;
    if (count != 1 || block_end + DEC_SYNC_LEN != n)
        return PACKET_E_MULTI_RECORD;

    int32_t ei = entry_for_text(d, (const char *)schema, schema_len);
    if (ei < 0)
        return ei;
    dentry *e = d->entries[ei];
    if (e->bad)
        return PACKET_E_BAD_SCHEMA;
    int null_codec = !codec || (codec_len == 4 && !memcmp(codec, "null", 4));
    if (null_codec)
        return decode_body(d, e, block, (size_t)size, out);
    if (!(codec_len == 7 && !memcmp(codec, "deflate", 7)))
        return PACKET_E_UNSUPPORTED_CODEC;
    /* Deflate (RFC 1951, raw, as the Avro spec says): inflate here, at most
     * max_message_bytes, and run the same guarded decode as an
     * uncompressed block.  avro-c's own container reader is never handed
     * untrusted compressed bytes: in 1.11.1 it leaks on corrupt blocks and
     * trusts string lengths inside them. */
    if (!d->inflated && !(d->inflated = malloc(d->max_bytes)))
        return PACKET_E_INTERNAL;
    if (!d->zs_ready) {
        memset(&d->zs, 0, sizeof d->zs);
        if (inflateInit2(&d->zs, -15) != Z_OK)
            return PACKET_E_INTERNAL;
        d->zs_ready = 1;
    } else if (inflateReset(&d->zs) != Z_OK) {
        return PACKET_E_INTERNAL;
    }
    d->zs.next_in = (Bytef *)block;
    d->zs.avail_in = (uInt)size;
    d->zs.next_out = d->inflated;
    d->zs.avail_out = (uInt)d->max_bytes;
    int zr = inflate(&d->zs, Z_FINISH);
    if (zr == Z_BUF_ERROR && d->zs.avail_out == 0)
        return PACKET_E_TOO_LARGE; /* inflates past max_message_bytes */
    if (zr != Z_STREAM_END)
        return PACKET_E_BAD_CONTAINER;
    return decode_body(d, e, d->inflated, d->max_bytes - d->zs.avail_out, out);
}

/* Depth and item count of a JSON text, skipping string contents. */
static int json_scan(const uint8_t *p, size_t n, uint32_t max_depth,
                     uint64_t max_items)
{
    uint32_t depth = 0;
    uint64_t items = 0;
    int in_str = 0;
    for (size_t i = 0; i < n; i++) {
        uint8_t c = p[i];
        if (in_str) {
            if (c == '\\')
                i++;
            else if (c == '"')
                in_str = 0;
            continue;
        }
        switch (c) {
        case '"':
            in_str = 1;
            break;
        case '{':
        case '[':
            if (++depth > max_depth)
                return PACKET_E_JSON_TOO_DEEP;
            if (++items > max_items)
                return PACKET_E_TOO_MANY_ITEMS;
            break;
        case '}':
        case ']':
            if (depth)
                depth--;
            break;
        case ',':
            if (++items > max_items)
                return PACKET_E_TOO_MANY_ITEMS;
            break;
        default:
            break;
        }
    }
    return 0;
}

static int decode_json(decoder *d, const uint8_t *p, size_t n,
                       packet_features *out)
{
    int rc = json_scan(p, n, d->max_depth, d->max_items);
    if (rc)
        return rc;
    json_error_t jerr;
    json_t *root = json_loadb((const char *)p, n, 0, &jerr);
    if (!root)
        return PACKET_E_BAD_JSON;
    if (!json_is_object(root))
        rc = PACKET_E_NOT_AN_OBJECT;
    else
        rc = featmap_extract_json(d->fm, root, d->scratch, out);
    json_decref(root);
    return rc;
}

static int is_space(uint8_t c)
{
    return c == ' ' || c == '\t' || c == '\n' || c == '\r';
}

int decoder_extract(decoder *d, const void *buf, size_t len,
                    packet_features *out)
{
    const uint8_t *p = buf;
    out->framing = NULL;
    if (len == 0 || !buf)
        return PACKET_E_EMPTY;
    if (len > d->max_bytes)
        return PACKET_E_TOO_LARGE;

    if (len >= 4 && !memcmp(p, "Obj\x01", 4)) {
        out->framing = "container";
        return decode_container(d, p, len, out);
    }
    /* A bare-Avro body may begin with 0x00 too: with no schema directory
     * configured such a message is bare Avro. */
    if (p[0] == 0x00 && (d->schema_dir || d->bare < 0)) {
        out->framing = "schema_id";
        if (len < 5)
            return PACKET_E_BAD_AVRO;
        uint32_t id = ((uint32_t)p[1] << 24) | ((uint32_t)p[2] << 16) |
                      ((uint32_t)p[3] << 8) | (uint32_t)p[4];
        int32_t ei = entry_for_id(d, id);
        if (ei < 0)
            return ei;
        return decode_body(d, d->entries[ei], p + 5, len - 5, out);
    }
    size_t i = 0;
    while (i < len && is_space(p[i]))
        i++;
    if (i < len && p[i] == '{') {
        out->framing = "json";
        return decode_json(d, p, len, out);
    }
    if (d->bare >= 0) {
        out->framing = "avro";
        return decode_body(d, d->entries[d->bare], p, len, out);
    }
    if (i < len && p[i] == '[')
        return PACKET_E_NOT_AN_OBJECT;
    return PACKET_E_UNKNOWN_FRAMING;
}
