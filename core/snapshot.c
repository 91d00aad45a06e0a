/*
 * snapshot.c - the byte writer, the bounds-checked reader, and the frame.
 *
 * Encoding goes byte by byte through shifts rather than memcpy of native
 * words so the format is independent of the host's endianness.
 */
#include "snapshot.h"

#include <string.h>

#include "err.h"

uint32_t snap_crc32c(uint32_t crc, const void *data, size_t len)
{
    /* Bitwise CRC-32C, reflected polynomial 0x82F63B78.  Snapshots are
     * written every few seconds, not per packet, so a table buys little. */
    const uint8_t *p = data;
    crc = ~crc;
    for (size_t i = 0; i < len; i++) {
        crc ^= p[i];
        for (int b = 0; b < 8; b++)
            crc = (crc >> 1) ^ (0x82F63B78u & (0u - (crc & 1u)));
    }
    return ~crc;
}

void snap_writer_init(snap_writer *w, uint8_t *buf, size_t cap)
{
    w->buf = buf;
    w->cap = buf ? cap : 0;
    w->len = 0;
    w->overflow = 0;
}

void snap_put_bytes(snap_writer *w, const void *p, size_t n)
{
    if (!w->overflow && w->len + n <= w->cap) {
        if (n)
            memcpy(w->buf + w->len, p, n);
    } else {
        w->overflow = 1;
    }
    w->len += n;
}

void snap_put_u8(snap_writer *w, uint8_t v)
{
    snap_put_bytes(w, &v, 1);
}

void snap_put_u32(snap_writer *w, uint32_t v)
{
    uint8_t b[4];
    for (int i = 0; i < 4; i++)
        b[i] = (uint8_t)(v >> (8 * i));
    snap_put_bytes(w, b, 4);
}

void snap_put_u64(snap_writer *w, uint64_t v)
{
    uint8_t b[8];
    for (int i = 0; i < 8; i++)
        b[i] = (uint8_t)(v >> (8 * i));
    snap_put_bytes(w, b, 8);
}

void snap_put_f64(snap_writer *w, double v)
{
    uint64_t u;
    memcpy(&u, &v, sizeof u);
    snap_put_u64(w, u);
}

void snap_put_f32(snap_writer *w, float v)
{
    uint32_t u;
    memcpy(&u, &v, sizeof u);
    snap_put_u32(w, u);
}

void snap_put_f64s(snap_writer *w, const double *v, size_t n)
{
    for (size_t i = 0; i < n; i++)
        snap_put_f64(w, v[i]);
}

void snap_put_f32s(snap_writer *w, const float *v, size_t n)
{
    for (size_t i = 0; i < n; i++)
        snap_put_f32(w, v[i]);
}

void snap_put_tag(snap_writer *w, const char tag[4])
{
    snap_put_bytes(w, tag, 4);
}

void snap_reader_init(snap_reader *r, const uint8_t *buf, size_t len)
{
    r->buf = buf;
    r->len = len;
    r->pos = 0;
    r->err = 0;
}

void snap_get_bytes(snap_reader *r, void *p, size_t n)
{
    if (r->err || n > r->len - r->pos) {
        r->err = r->err ? r->err : CORE_EFORMAT;
        if (n)
            memset(p, 0, n);
        return;
    }
    if (n)
        memcpy(p, r->buf + r->pos, n);
    r->pos += n;
}

uint8_t snap_get_u8(snap_reader *r)
{
    uint8_t v;
    snap_get_bytes(r, &v, 1);
    return v;
}

uint32_t snap_get_u32(snap_reader *r)
{
    uint8_t b[4];
    uint32_t v = 0;
    snap_get_bytes(r, b, 4);
    for (int i = 0; i < 4; i++)
        v |= (uint32_t)b[i] << (8 * i);
    return v;
}

uint64_t snap_get_u64(snap_reader *r)
{
    uint8_t b[8];
    uint64_t v = 0;
    snap_get_bytes(r, b, 8);
    for (int i = 0; i < 8; i++)
        v |= (uint64_t)b[i] << (8 * i);
    return v;
}

double snap_get_f64(snap_reader *r)
{
    uint64_t u = snap_get_u64(r);
    double v;
    memcpy(&v, &u, sizeof v);
    return v;
}

float snap_get_f32(snap_reader *r)
{
    uint32_t u = snap_get_u32(r);
    float v;
    memcpy(&v, &u, sizeof v);
    return v;
}

void snap_get_f64s(snap_reader *r, double *v, size_t n)
{
    if (n > (r->len - r->pos) / 8) {
        r->err = r->err ? r->err : CORE_EFORMAT;
        memset(v, 0, n * sizeof *v);
        return;
    }
    for (size_t i = 0; i < n; i++)
        v[i] = snap_get_f64(r);
}

void snap_get_f32s(snap_reader *r, float *v, size_t n)
{
    if (n > (r->len - r->pos) / 4) {
        r->err = r->err ? r->err : CORE_EFORMAT;
        memset(v, 0, n * sizeof *v);
        return;
    }
    for (size_t i = 0; i < n; i++)
        v[i] = snap_get_f32(r);
}

void snap_expect_tag(snap_reader *r, const char tag[4])
{
    char got[4];
    snap_get_bytes(r, got, 4);
    if (!r->err && memcmp(got, tag, 4) != 0)
        r->err = CORE_EFORMAT;
}

int snap_frame(const uint8_t *payload, size_t payload_len, uint8_t *out,
               size_t cap, size_t *need)
{
    size_t total = SNAP_HEADER_BYTES + payload_len + SNAP_TRAILER_BYTES;
    if (need)
        *need = total;
    if (!out || cap < total)
        return CORE_ESHORT;
    snap_writer w;
    snap_writer_init(&w, out, cap);
    snap_put_bytes(&w, SNAP_MAGIC, 8);
    snap_put_u32(&w, SNAP_VERSION);
    snap_put_u32(&w, 0);
    snap_put_u64(&w, (uint64_t)payload_len);
    if (payload != out + SNAP_HEADER_BYTES)
        memmove(out + SNAP_HEADER_BYTES, payload, payload_len);
    w.len += payload_len;
    snap_put_u32(&w, snap_crc32c(0, out, SNAP_HEADER_BYTES + payload_len));
    return 0;
}

int snap_unframe(const uint8_t *buf, size_t len, const uint8_t **payload,
                 size_t *payload_len)
{
    if (!buf || len < SNAP_HEADER_BYTES + SNAP_TRAILER_BYTES ||
        memcmp(buf, SNAP_MAGIC, 8) != 0)
        return CORE_EFORMAT;
    snap_reader r;
    snap_reader_init(&r, buf + 8, len - 8);
    uint32_t version = snap_get_u32(&r);
    (void)snap_get_u32(&r);
    uint64_t plen = snap_get_u64(&r);
    if (version != SNAP_VERSION)
        return CORE_EVERSION;
    if (plen != len - SNAP_HEADER_BYTES - SNAP_TRAILER_BYTES)
        return CORE_EFORMAT;
    snap_reader_init(&r, buf + len - 4, 4);
    uint32_t crc = snap_get_u32(&r);
    if (crc != snap_crc32c(0, buf, len - 4))
        return CORE_ECHECKSUM;
    *payload = buf + SNAP_HEADER_BYTES;
    *payload_len = (size_t)plen;
    return 0;
}
