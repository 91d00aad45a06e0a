/*
 * snapshot.h - versioned, checksummed byte encoding of model state.
 *
 * A snapshot is: the 8-byte magic "ODSKYSN1", a u32 format version, a u32
 * reserved word (0), a u64 payload length, the payload, and a CRC-32C
 * (Castagnoli) of everything before it.  All integers are little-endian and
 * doubles are their IEEE-754 bit patterns, so a snapshot is byte-identical
 * across runs and machines of either endianness.
 *
 * Modules write their state through snap_writer and read it back through
 * snap_reader.  The writer never allocates: it writes into a caller buffer
 * and keeps counting past the end, so a first pass with cap = 0 measures the
 * size.  The reader is bounds-checked: any read past the end, or a count
 * larger than the bytes left, sets a sticky error and yields zeros, so a
 * module's load function can read straight through and check once.
 */
#ifndef ODDSKY_CORE_SNAPSHOT_H
#define ODDSKY_CORE_SNAPSHOT_H

#include <stddef.h>
#include <stdint.h>

#define SNAP_MAGIC "ODSKYSN1"
#define SNAP_VERSION 1u
#define SNAP_HEADER_BYTES 24u
#define SNAP_TRAILER_BYTES 4u

typedef struct snap_writer {
    uint8_t *buf;
    size_t cap;
    size_t len;   /* bytes written so far, or that would have been */
    int overflow; /* nonzero once len exceeded cap */
} snap_writer;

typedef struct snap_reader {
    const uint8_t *buf;
    size_t len;
    size_t pos;
    int err; /* 0 or a CORE_E* code, sticky */
} snap_reader;

/* CRC-32C of len bytes, continuing from crc (start with 0). */
uint32_t snap_crc32c(uint32_t crc, const void *data, size_t len);

void snap_writer_init(snap_writer *w, uint8_t *buf, size_t cap);
void snap_put_u8(snap_writer *w, uint8_t v);
void snap_put_u32(snap_writer *w, uint32_t v);
void snap_put_u64(snap_writer *w, uint64_t v);
void snap_put_f64(snap_writer *w, double v);
void snap_put_f32(snap_writer *w, float v);
void snap_put_bytes(snap_writer *w, const void *p, size_t n);
void snap_put_f64s(snap_writer *w, const double *v, size_t n);
void snap_put_f32s(snap_writer *w, const float *v, size_t n);
/* A short tag before each module's section catches misaligned readers. */
void snap_put_tag(snap_writer *w, const char tag[4]);

void snap_reader_init(snap_reader *r, const uint8_t *buf, size_t len);
uint8_t snap_get_u8(snap_reader *r);
uint32_t snap_get_u32(snap_reader *r);
uint64_t snap_get_u64(snap_reader *r);
double snap_get_f64(snap_reader *r);
float snap_get_f32(snap_reader *r);
void snap_get_bytes(snap_reader *r, void *p, size_t n);
void snap_get_f64s(snap_reader *r, double *v, size_t n);
void snap_get_f32s(snap_reader *r, float *v, size_t n);
/* Sets CORE_EFORMAT when the next four bytes are not tag. */
void snap_expect_tag(snap_reader *r, const char tag[4]);

/*
 * Frame a payload: write header + payload + CRC into out (cap bytes).
 * Returns 0, or CORE_ESHORT with *need set to the bytes required.
 */
int snap_frame(const uint8_t *payload, size_t payload_len, uint8_t *out,
               size_t cap, size_t *need);

/*
 * Check a framed snapshot and point *payload / *payload_len inside it.
 * Returns 0, CORE_EFORMAT (bad magic or length), CORE_EVERSION or
 * CORE_ECHECKSUM.  Nothing is copied.
 */
int snap_unframe(const uint8_t *buf, size_t len, const uint8_t **payload,
                 size_t *payload_len);

#endif
