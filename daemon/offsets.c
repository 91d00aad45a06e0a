/*
 * offsets.c - the done-window per input partition (see offsets.h).
 *
 * The ring index of offset o is o mod cap.  The window never exceeds cap
 * entries, so an index is never shared by two live offsets.
 */
#include "offsets.h"

#include <errno.h>
#include <stdlib.h>
#include <string.h>

enum { SLOT_FREE = 0, SLOT_PENDING = 1, SLOT_DONE = 2 };

int offsets_init(offsets_tracker *t, uint32_t nparts, uint32_t cap)
{
    memset(t, 0, sizeof *t);
    if (nparts == 0 || cap == 0)
        return -EINVAL;
    t->parts = calloc(nparts, sizeof *t->parts);
    if (!t->parts)
        goto fail_parts;
    t->ring_mem = calloc((size_t)nparts * cap, 1);
    if (!t->ring_mem)
        goto fail_ring;
    t->nparts = nparts;
    t->cap = cap;
    for (uint32_t p = 0; p < nparts; p++) {
        t->parts[p].ring = t->ring_mem + (size_t)p * cap;
        t->parts[p].base = -1;
        t->parts[p].hi = -1;
    }
    return 0;

fail_ring:
    free(t->parts);
    t->parts = NULL;
fail_parts:
    return -ENOMEM;
}

void offsets_destroy(offsets_tracker *t)
{
    free(t->ring_mem);
    free(t->parts);
    memset(t, 0, sizeof *t);
}

void offsets_reset(offsets_tracker *t, uint32_t part)
{
    if (part >= t->nparts)
        return;
    offsets_part *p = &t->parts[part];
    memset(p->ring, 0, t->cap);
    p->base = -1;
    p->hi = -1;
    p->pending = 0;
}

static inline uint8_t *slot(const offsets_tracker *t, offsets_part *p, int64_t off)
{
    return &p->ring[(uint64_t)off % t->cap];
}

/* Move base past every done (or gap) slot. */
static int advance(const offsets_tracker *t, offsets_part *p)
{
    int moved = 0;
    while (p->base < p->hi) {
        uint8_t *s = slot(t, p, p->base);
        if (*s == SLOT_PENDING)
            break;
        *s = SLOT_FREE;
        p->base++;
        moved = 1;
    }
    return moved;
}

int offsets_track_gap(offsets_tracker *t, uint32_t part, int64_t off,
                      int64_t *gap)
{
    if (gap)
        *gap = 0;
    if (part >= t->nparts || off < 0)
        return -ERANGE;
    offsets_part *p = &t->parts[part];
    if (p->base < 0) {
        p->base = off;
        p->hi = off;
    }
    if (off < p->hi)
        return -ERANGE;
    /* Measured before a full window of gaps is retired below, which moves
     * hi up to off. */
    int64_t skipped = off - p->hi;
    if (off - p->base >= (int64_t)t->cap) {
        /* Gaps alone may have filled the window: retire them first. */
        advance(t, p);
        if (p->base == p->hi)
            p->base = p->hi = off;
        if (off - p->base >= (int64_t)t->cap)
            return -EAGAIN;
    }
    /* Offsets between hi and off were never delivered: they are done. */
    for (int64_t g = p->hi; g < off; g++)
        *slot(t, p, g) = SLOT_DONE;
    *slot(t, p, off) = SLOT_PENDING;
    p->hi = off + 1;
    p->pending++;
    if (gap)
        *gap = skipped;
    return 0;
}

int offsets_track(offsets_tracker *t, uint32_t part, int64_t off)
{
    return offsets_track_gap(t, part, off, NULL);
}

int64_t offsets_next(const offsets_tracker *t, uint32_t part)
{
    if (part >= t->nparts)
        return -1;
    return t->parts[part].hi;
}

int offsets_done(offsets_tracker *t, uint32_t part, int64_t off)
{
    if (part >= t->nparts)
        return -ERANGE;
    offsets_part *p = &t->parts[part];
    if (off < p->base || off >= p->hi)
        return -ERANGE;
    uint8_t *s = slot(t, p, off);
    if (*s != SLOT_PENDING)
        return -ERANGE;
    *s = SLOT_DONE;
    p->pending--;
    return off == p->base ? advance(t, p) : 0;
}

int64_t offsets_committable(const offsets_tracker *t, uint32_t part)
{
    if (part >= t->nparts)
        return -1;
    return t->parts[part].base;
}

uint32_t offsets_pending(const offsets_tracker *t, uint32_t part)
{
    return part < t->nparts ? t->parts[part].pending : 0;
}

uint64_t offsets_pending_total(const offsets_tracker *t)
{
    uint64_t n = 0;
    for (uint32_t p = 0; p < t->nparts; p++)
        n += t->parts[p].pending;
    return n;
}
