/*
 * reservoir.h - a bounded, decaying sample of recent vectors.
 *
 * Weighted reservoir sampling without replacement, algorithm A-Res of
 * Efraimidis & Spirakis (2006): item i with weight w_i gets the key
 * u_i^(1/w_i), u_i uniform in (0,1), and the reservoir keeps the `cap`
 * largest keys.  Weights are w_i = 2^((t_i - t_0)/H), so recent items are
 * favoured exactly as a half-life H says.  The key is kept in log space:
 * log key = log(u)/w, and ranking by it equals ranking by
 *   ln2 (t_i - t_0)/H - log(-log u)
 * which never overflows however long the stream runs.  H = 0 gives a
 * uniform sample of everything seen.  A min-heap on the keys makes an
 * insert O(log cap).
 *
 * The first `cap` items are all kept, in slots 0..cap-1 in arrival order,
 * so a reservoir at least as large as the warm-up holds the whole warm-up.
 * Rows are stored as given (the owner may encode missing values as NaN).
 * All memory is allocated by reservoir_new().  Randomness comes from an
 * internal rng seeded at create; same seed and inputs, same sample.
 */
#ifndef ODDSKY_CORE_RESERVOIR_H
#define ODDSKY_CORE_RESERVOIR_H

#include <stddef.h>
#include <stdint.h>

#include "snapshot.h"

typedef struct reservoir reservoir;

/* NULL with *err = CORE_EINVAL (cap or dim 0, H < 0 or not finite) or
 * CORE_ENOMEM; err may be NULL. */
reservoir *reservoir_new(uint32_t cap, uint32_t dim, double half_life_days,
                         uint64_t seed, int *err);
void reservoir_free(reservoir *r);
size_t reservoir_bytes(const reservoir *r);

/* Offer row x (dim values) at event time t (non-finite t counts as the
 * latest time seen).  Returns the slot it was stored in, or -1 when the
 * sample kept its current rows. */
int32_t reservoir_add(reservoir *r, const double *x, double t);

uint32_t reservoir_count(const reservoir *r);   /* rows held, <= cap */
uint32_t reservoir_cap(const reservoir *r);
uint32_t reservoir_dim(const reservoir *r);
uint64_t reservoir_seen(const reservoir *r);    /* rows offered */
/* count x dim rows, row major, slot order (not time order). */
const double *reservoir_rows(const reservoir *r);
double reservoir_time(const reservoir *r, uint32_t slot);

void reservoir_save(const reservoir *r, snap_writer *w);
/* Load into r created with the same cap and dim; 0, CORE_EMISMATCH or the
 * reader's error (r unchanged on error). */
int reservoir_load(reservoir *r, snap_reader *rd);

#endif
