/*
 * decay.h - O(1) exponential forgetting in event time for counters.
 *
 * A decaying count sum_i 2^(-(t - t_i)/H) is kept without touching every
 * counter on every update: each insert adds g = 2^((t - t_ref)/H), a read
 * divides by g.  When g would pass 2^60 the owner multiplies every counter
 * by 2^-60 (or a higher power) and t_ref moves forward by as many times 60
 * half-lives; both steps are exact
 * in binary floating point, so the result equals the closed form up to
 * rounding.  Time that goes backwards (a late packet) leaves the clock
 * where it is.  A half-life of 0 means "never forget" (g stays 1).
 */
#ifndef ODDSKY_CORE_DECAY_H
#define ODDSKY_CORE_DECAY_H

#include "snapshot.h"

#define DECAY_RENORM_EXP 60
#define DECAY_RENORM 0x1.0p-60 /* multiply every counter by this */

typedef struct decay_clock {
    double half_life_days; /* 0 = no decay */
    double t_ref;          /* time at which g == 1 */
    double t_now;          /* latest time seen */
    double g;              /* 2^((t_now - t_ref) / H) */
    int started;           /* 0 until the first decay_advance */
} decay_clock;

void decay_init(decay_clock *c, double half_life_days);

/*
 * Move the clock to time t (ignored when t is not finite or earlier than
 * the clock).  Returns the factor the owner must multiply every one of its
 * counters by before the next insert or read: 1.0 almost always, else a
 * power of two 2^(-60 m) (exact; it underflows to 0 after a gap of more
 * than ~1000 half-lives, which is the right answer too).
 */
double decay_advance(decay_clock *c, double t);

/* Amount one insert adds at the clock's time. */
static inline double decay_unit(const decay_clock *c) { return c->g; }

/* A counter's decayed value at the clock's time. */
static inline double decay_read(const decay_clock *c, double counter)
{
    return counter / c->g;
}

void decay_save(const decay_clock *c, snap_writer *w);
void decay_load(decay_clock *c, snap_reader *r);

#endif
