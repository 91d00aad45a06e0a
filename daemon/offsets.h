/*
 * offsets.h - per-partition tracking of which consumed offsets are done.
 *
 * An input offset is done when its result (or dead-letter copy) has a
 * successful delivery report.  Reports arrive out of order (results of one
 * input partition fan out over several output partitions), so each input
 * partition keeps a ring of states over the window [base, hi): base is the
 * lowest offset not yet done, hi is one past the highest consumed.  The
 * offset safe to store for commit is always base: everything below it is
 * done.  Offsets the consumer never saw (gaps from compaction or
 * transaction markers, or input deleted by retention before it was read)
 * count as done; the tracker does not judge them, but a caller that wants
 * to count or report them asks offsets_next() before offsets_track(), or
 * uses offsets_track_gap(), which says how many a call stepped over.
 *
 * The ring has a fixed capacity chosen at creation; when a partition's
 * window is full offsets_track() refuses, and the caller pauses that
 * partition until deliveries catch up.  Nothing allocates after creation.
 */
#ifndef ODDSKY_DAEMON_OFFSETS_H
#define ODDSKY_DAEMON_OFFSETS_H

#include <stddef.h>
#include <stdint.h>

typedef struct offsets_part {
    int64_t base;     /* lowest offset not yet done; -1 before any */
    int64_t hi;       /* one past the highest consumed offset */
    uint32_t pending; /* consumed, not yet done */
    uint8_t *ring;    /* cap entries: 0 = free/gap-done, 1 = pending, 2 = done */
} offsets_part;

typedef struct offsets_tracker {
    uint32_t nparts;  /* partitions tracked (index = partition id) */
    uint32_t cap;     /* window capacity per partition */
    offsets_part *parts;
    uint8_t *ring_mem;
} offsets_tracker;

/* Create for partitions 0..nparts-1 with a window of cap offsets each.
 * Returns 0 or -ENOMEM / -EINVAL. */
int offsets_init(offsets_tracker *t, uint32_t nparts, uint32_t cap);
void offsets_destroy(offsets_tracker *t);

/* Forget a partition (on revoke): its window is emptied. */
void offsets_reset(offsets_tracker *t, uint32_t part);

/* Record that offset off of part was consumed and is now in flight.
 * Returns 0; -EAGAIN when the window is full (the caller pauses);
 * -ERANGE for an offset below the window (a redelivery: the caller
 * processes it but must not track it) or a bad partition. */
int offsets_track(offsets_tracker *t, uint32_t part, int64_t off);

/* As offsets_track, and *gap (may be NULL) is set to the offsets between
 * the previous highest tracked offset of part and off that were never
 * tracked (marked done by this call): 0 for the next offset in sequence
 * and for the first offset of a partition (nothing to compare with; see
 * offsets_next).  *gap is 0 whenever the call does not return 0, so a
 * refused offset (-EAGAIN) retried later is counted once. */
int offsets_track_gap(offsets_tracker *t, uint32_t part, int64_t off,
                      int64_t *gap);

/* The offset expected next on part: one past the highest tracked, or -1
 * when nothing has been tracked on it since creation or the last reset
 * (or part is out of range).  An offset above it passed to
 * offsets_track() skips the ones in between. */
int64_t offsets_next(const offsets_tracker *t, uint32_t part);

/* Mark a tracked offset done.  Returns 1 when base moved (a new offset
 * can be stored), 0 when it did not, -ERANGE when off is not pending. */
int offsets_done(offsets_tracker *t, uint32_t part, int64_t off);

/* The offset to store for commit (next to consume), or -1 when nothing
 * has been consumed on part. */
int64_t offsets_committable(const offsets_tracker *t, uint32_t part);

/* Offsets in flight on part, and over all partitions. */
uint32_t offsets_pending(const offsets_tracker *t, uint32_t part);
uint64_t offsets_pending_total(const offsets_tracker *t);

#endif
