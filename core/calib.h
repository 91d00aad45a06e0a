/*
 * calib.h - decaying score distribution -> tail probability; flag policy.
 *
 * The calibrator keeps an event-time decaying histogram of novelty scores
 * (core/decay.h: each score weighs 2^(-(t - t_i)/H) at time t) on a grid of
 * `bins` equal cells in asinh(s) over [-asinh(limit), asinh(limit)], plus
 * an underflow cell (s < -limit) and an overflow cell (s > +limit).  The
 * asinh grid is close to linear near 0 and logarithmic for large |s|, so
 * scores of any sign and size share one fixed grid.
 *
 * Definitions (W = total decayed mass, m_k = mass of cell k, cell k spans
 * [a_k, a_k + w] in a = asinh(s), w = 2 asinh(limit) / bins):
 * - tail_prob(s) estimates (decayed mass of scores >= s) / W.  Within a
 *   cell the mass is spread uniformly in asinh(s), so
 *     tail_prob(s) = (over + sum_{j > k} m_j + m_k (a_k + w - a) / w) / W
 *   for s inside the grid.  Underflow scores count as sitting at -limit
 *   and overflow scores at +infinity, so the range never makes the tail
 *   look smaller than it is: tail_prob(s) = 1 for s < -limit and
 *   over / W for s > limit.  With no mass yet, or s NaN, it is 1.0.
 *   At every cell edge the estimate equals the exact decayed tail
 *   fraction (up to rounding); inside a cell it is off by at most m_k / W.
 * - threshold: the s with tail_prob(s) = q (inverse of the above; the
 *   decayed (1 - q) quantile), where q = alpha for the alpha policy and
 *   q = min(1, budget_per_hour / rate_per_hour) for the budget policy.
 *   +INFINITY with no mass; +limit when the overflow cell alone holds more
 *   than q W (every score beyond the grid is then flagged); -INFINITY when
 *   reaching q W needs the underflow cell.
 * - rate_per_hour: for a steady rate r per day started T days ago the
 *   decayed mass is r H (1 - 2^(-T/H)) / ln 2 (r H / ln 2 once T >> H), so
 *   r = W ln 2 / (H (1 - 2^(-T/H))) (r = W / T without decay), T = time
 *   since the first score; divided by 24.  The configured prior rate is
 *   used before any score and while T < min_span_days.
 * - should_flag(s): alpha policy: tail_prob(s) <= alpha; budget policy:
 *   s >= threshold.
 * - expected_per_night: rate_per_hour * 10 * tail_prob(threshold) (0 when
 *   the threshold is +INFINITY).
 *
 * Queries read the state as it is: a caller that wants "score against the
 * distribution before this packet" asks first, then calib_observe()s.
 *
 * Invariants: all memory comes from calib_new(); observe and the queries
 * allocate nothing and cost O(log bins) (a Fenwick tree over the cells,
 * summed from the top so small tails carry no cancellation).  Same inputs
 * give bit-identical state and snapshots.  Not thread-safe.
 */
#ifndef ODDSKY_CORE_CALIB_H
#define ODDSKY_CORE_CALIB_H

#include <stddef.h>
#include <stdint.h>

#include "err.h"
#include "snapshot.h"

#define CALIB_MIN_BINS 16u
#define CALIB_MAX_BINS (1u << 20)
#define CALIB_NIGHT_HOURS 10.0

typedef enum calib_policy {
    CALIB_POLICY_ALPHA = 0,  /* flag when tail_prob <= alpha */
    CALIB_POLICY_BUDGET = 1  /* aim at budget_per_hour flags per event hour */
} calib_policy;

typedef struct calib_params {
    uint32_t bins;               /* grid cells, 16..2^20, default 2048 */
    double limit;                /* grid covers |s| <= limit, > 0, 1e6 */
    double half_life_days;       /* memory, >= 0 (0 = never forget), 3 */
    int32_t policy;              /* calib_policy, default BUDGET */
    double alpha;                /* (0, 1], default 1e-3 */
    double budget_per_hour;      /* > 0, default 10 */
    double prior_rate_per_hour;  /* > 0, default 1e5 */
    double min_span_days;        /* >= 0, default 1/96 (15 minutes) */
} calib_params;

typedef struct calib calib;

/* Fill p with the defaults above. */
void calib_params_default(calib_params *p);

/* Returns 0 or CORE_ERANGE (name of the first bad field in *field when
 * field is not NULL). */
int calib_params_check(const calib_params *p, const char **field);

/* Build an empty calibrator.  NULL with *err = CORE_EINVAL (bad p) or
 * CORE_ENOMEM.  The caller owns it (calib_free). */
calib *calib_new(const calib_params *p, int *err);

void calib_free(calib *c); /* NULL is fine */

const calib_params *calib_get_params(const calib *c);

/* Bytes of memory held (fixed). */
size_t calib_bytes(const calib *c);

/* Move the clock to event time t_days (earlier or non-finite times leave
 * it), renormalising when the clock asks for it. */
void calib_advance(calib *c, double t_days);

/* calib_advance(t_days), then add score s with weight 1.  A NaN score is
 * ignored (returns CORE_EINVAL); +-infinity go to the outer cells.
 * Returns 0. */
int calib_observe(calib *c, double s, double t_days);

/* See the definitions above.  All read the state at the clock's time. */
double calib_tail_prob(const calib *c, double s);
double calib_rate_per_hour(const calib *c);
double calib_threshold(const calib *c);
int calib_should_flag(const calib *c, double s);
double calib_expected_per_night(const calib *c);

/* The tail fraction q the current policy aims at (alpha, or
 * min(1, budget / rate)). */
double calib_target_fraction(const calib *c);

/* What one packet's score gets: tail probability, threshold in force and
 * flag decision, all against the distribution before the score. */
typedef struct calib_verdict {
    double tail_prob;
    double threshold;
    int flag;
} calib_verdict;

/* The per-packet path in one call: calib_advance(t_days), fill *out as
 * calib_tail_prob(s), calib_threshold() and calib_should_flag(s) would,
 * then add s when learn is nonzero (asinh(s) computed once).  A NaN score
 * gives tail 1, no flag, is not added, and returns CORE_EINVAL; NULL
 * pointers give CORE_EINVAL.  Returns 0. */
int calib_assess(calib *c, double s, double t_days, int learn,
                 calib_verdict *out);

/* Decayed total mass W at the clock's time. */
double calib_mass(const calib *c);

/* Decayed masses below -limit and above +limit (either pointer may be
 * NULL). */
void calib_outside(const calib *c, double *under, double *over);

/* The clock's event time (NaN before any observe or advance). */
double calib_time(const calib *c);

/* Histogram for the live page over the populated part of the grid (first
 * to last non-empty cell), merged into at most n groups of equal cell
 * count: edges[0..count] (count + 1 entries, score units) and
 * mass[0..count-1] (decayed).  Returns count (0 when the grid is empty or
 * n == 0).  The outer cells are left out (see calib_outside). */
uint32_t calib_histogram(const calib *c, double *edges, double *mass,
                         uint32_t n);

/* Score value of grid edge i (0..bins): sinh(-asinh(limit) + i w). */
double calib_edge(const calib *c, uint32_t i);

/* Append the state (parameters, clock, cells) to w. */
void calib_save(const calib *c, snap_writer *w);

/* Read a state written by calib_save into c, built with the same bins and
 * limit; the policy fields (alpha, budget, prior rate, min span) are taken
 * from c, so a reload may change them.  Returns 0, CORE_EMISMATCH, or the
 * reader's error.  On error c's contents are unspecified: free it. */
int calib_load(calib *c, snap_reader *r);

/* ctypes-friendly helpers for the reference tests. */
calib *calib_new_flat(uint32_t bins, double limit, double half_life_days,
                      int32_t policy, double alpha, double budget_per_hour,
                      double prior_rate_per_hour, double min_span_days);
/* Observe n scores s[i] at times t[i] in order; returns how many were
 * taken (NaN scores are skipped). */
size_t calib_observe_many(calib *c, const double *s, const double *t,
                          size_t n);
size_t calib_save_buf(const calib *c, uint8_t *buf, size_t cap);
int calib_load_buf(calib *c, const uint8_t *buf, size_t len);

#endif
