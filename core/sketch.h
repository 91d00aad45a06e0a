/*
 * sketch.h - model-free space sketch of the standardised feature space.
 *
 * xStream-style (Manzoor, Lamba & Akoglu, KDD 2018): a vector z (d
 * standardised features, missing ones read as 0) is projected to P
 * dimensions by a sparse random matrix (entries +-sqrt(3) with probability
 * 1/6 each, else 0; Achlioptas 2003).  M half-space chains of depth L cut
 * the projected space: each chain has a random shift per projected axis
 * and a random split axis per level, and every level halves the bin width
 * of its axis.  The bin a vector falls in at (chain, level) is hashed into
 * a count-min sketch of space_rows x space_width decaying counters.
 *
 * Score convention: per chain, min over levels l = 1..L of
 * log2(count_l + 1) + l, where count_l is the decayed count-min estimate
 * at level l (level index 0 in the C arrays has weight 1); the mean over
 * chains is the xStream density score (higher = denser).  sketch_score()
 * and sketch_observe() publish space_novelty = -(that mean), so HIGHER
 * MEANS RARER.  Bounds: every term is >= l >= 1, and count_1 <= the total
 * decayed mass N, so -(log2(N + 1) + 1) <= space_novelty <= -1.  An empty
 * sketch scores exactly -1.
 *
 * Decay: counters are event-time decaying counts (core/decay.h); the
 * sketch owns its clock.  The caller moves it with sketch_advance() once
 * per vector, then scores and/or inserts at the clock's time.
 *
 * Invariants:
 * - sketch_new() allocates everything; nothing else allocates.
 * - Deterministic: the same parameters (seed included), warm-up and
 *   inputs give bit-identical scores and snapshots; a loaded sketch
 *   continues exactly as the saved one would have.
 * - Arithmetic: the projection runs in double; bins are computed in
 *   32.32 fixed point from the projected coordinate (integer multiply by
 *   2^k, add the shift, take the top word), so a bin is an exact floor of
 *   a value quantised to 2^-32 level-1 widths, the same on every machine.
 *   (Float would not be faster here: the loops are scalar; the fixed
 *   point removes the float->int conversion and its floor correction.)
 *   Counters and scores are double.  The one log2 per scored vector is
 *   libm's log2 on the product of the chain minima (exact products kept
 *   in range by exponent extraction), so the score is exact to a few
 *   ulps, not an approximation.
 * - A projected coordinate is clamped to +-2^(30 - k) level-1 bin widths,
 *   k the most splits any chain makes on one axis, so no fixed-point sum
 *   overflows (for the defaults, a vector 2^26 half-ranges out).
 * - Not thread-safe: scoring uses scratch space inside the sketch.
 */
#ifndef ODDSKY_CORE_SKETCH_H
#define ODDSKY_CORE_SKETCH_H

#include <stddef.h>
#include <stdint.h>

#include "err.h"
#include "snapshot.h"

#define SKETCH_MAX_DIM 256u
#define SKETCH_MAX_PROJ 64u
#define SKETCH_MAX_CHAINS 256u
#define SKETCH_MAX_DEPTH 32u
#define SKETCH_MAX_ROWS 8u
#define SKETCH_MIN_WIDTH 16u
#define SKETCH_MAX_WIDTH (1u << 20)

typedef struct sketch_params {
    uint32_t dim;          /* features d, 1..SKETCH_MAX_DIM */
    uint32_t proj_dims;    /* projected dimensions P, 1..64, default 16 */
    uint32_t chains;       /* half-space chains M, 1..256, default 16 */
    uint32_t depth;        /* levels per chain L, 1..32, default 12 */
    uint32_t width;        /* counters per count-min row, 16..2^20, 1024 */
    uint32_t rows;         /* count-min rows per (chain, level), 1..8, 1 */
    double half_life_days; /* counter memory, >= 0 (0 = never forget), 7 */
    uint64_t seed;         /* projection, shifts, axes, hashes */
} sketch_params;

typedef struct sketch sketch;

/* Fill p with the defaults above for dim features (seed 1). */
void sketch_params_default(sketch_params *p, uint32_t dim);

/* Returns 0 or CORE_ERANGE when a field is outside its bounds (the name of
 * the first offending field in *field when field is not NULL). */
int sketch_params_check(const sketch_params *p, const char **field);

/* Build a sketch: draws the projection, shifts, split axes and hash keys
 * from p->seed; bin widths start at 1 (z units) until sketch_fit().
 * Returns NULL with *err set to CORE_EINVAL (p NULL or out of bounds) or
 * CORE_ENOMEM.  The caller owns the sketch (sketch_free). */
sketch *sketch_new(const sketch_params *p, int *err);

/* Frees everything; NULL is fine. */
void sketch_free(sketch *sk);

const sketch_params *sketch_get_params(const sketch *sk);

/* Bytes of memory held (fixed from sketch_new on). */
size_t sketch_bytes(const sketch *sk);

/* Set the initial bin width of every projected axis from a warm-up sample:
 * half the range of the projected sample (as in xStream), or 1 when an
 * axis has no spread.  Z: n rows of dim doubles, row-major, in z units;
 * mask: n * dim bytes, nonzero = missing, or NULL; non-finite z counts as
 * missing.  Clears every counter (old counts belong to other bins); the
 * clock is kept.  Returns 0, or CORE_EINVAL (NULL sk/Z, n == 0). */
int sketch_fit(sketch *sk, const double *Z, const uint8_t *mask, size_t n);

/* Move the clock to event time t_days (a time earlier than the clock, or
 * not finite, leaves it where it is) and renormalise the counters when the
 * clock asks for it.  Call before scoring or inserting a vector. */
void sketch_advance(sketch *sk, double t_days);

/* space_novelty of z (dim doubles; mask NULL or dim bytes, nonzero =
 * missing; non-finite z counts as missing) against the sketch as it is
 * now, at the clock's time.  Changes nothing but scratch. */
double sketch_score(sketch *sk, const double *z, const uint8_t *mask);

/* Insert z (weight 1 at the clock's time) into every (chain, level). */
void sketch_update(sketch *sk, const double *z, const uint8_t *mask);

/* Score, then insert when learn is nonzero; shares the projection and the
 * bin computation.  Returns the space_novelty sketch_score() would have
 * returned before the insert (bit-identical). */
double sketch_observe(sketch *sk, const double *z, const uint8_t *mask,
                      int learn);

/* Fraction of counters that are non-zero, in [0, 1].  O(1). */
double sketch_fill(const sketch *sk);

/* Decayed total mass inserted (sum of 2^(-(t - t_i)/H)) at the clock. */
double sketch_mass(const sketch *sk);

/* Decayed count-min estimate of z's bin at (chain, level), level 0..L-1,
 * at the clock's time; -1.0 for a bad index or NULL pointer.  For tests
 * and diagnostics (ctypes-friendly). */
double sketch_bin_count(sketch *sk, const double *z, const uint8_t *mask,
                        uint32_t chain, uint32_t level);

/* Decayed value of one raw counter; -1.0 for a bad index. */
double sketch_counter(const sketch *sk, uint32_t chain, uint32_t level,
                      uint32_t row, uint32_t col);

/* The clock's event time (NaN before the first sketch_advance). */
double sketch_time(const sketch *sk);

/* Append the whole state (parameters, fitted widths, random structure,
 * clock, counters) to w. */
void sketch_save(const sketch *sk, snap_writer *w);

/* Read a state written by sketch_save into sk, which must have been built
 * with identical parameters.  Returns 0, CORE_EMISMATCH (parameters
 * differ), or the reader's error (CORE_EFORMAT, ...).  On error sk's
 * contents are unspecified: free it. */
int sketch_load(sketch *sk, snap_reader *r);

/* ctypes-friendly helpers for the reference tests: build from flat
 * arguments (NULL on failure), and size / save / load through a plain
 * buffer (returns bytes needed, or 0 on failure). */
sketch *sketch_new_flat(uint32_t dim, uint32_t proj_dims, uint32_t chains,
                        uint32_t depth, uint32_t width, uint32_t rows,
                        double half_life_days, uint64_t seed);
size_t sketch_save_buf(const sketch *sk, uint8_t *buf, size_t cap);
int sketch_load_buf(sketch *sk, const uint8_t *buf, size_t len);

#endif
