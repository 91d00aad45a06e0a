/*
 * decay.c - the event-time clock behind every decaying counter.
 *
 * g is recomputed from (t_now - t_ref) on each advance rather than
 * multiplied up step by step, so no rounding accumulates over a night.
 */
#include "decay.h"

#include <math.h>

#include "err.h"

void decay_init(decay_clock *c, double half_life_days)
{
    c->half_life_days = half_life_days > 0 ? half_life_days : 0;
    c->t_ref = 0;
    c->t_now = 0;
    c->g = 1.0;
    c->started = 0;
}

double decay_advance(decay_clock *c, double t)
{
    if (!isfinite(t))
        return 1.0;
    if (!c->started) {
        c->started = 1;
        c->t_ref = t;
        c->t_now = t;
        c->g = 1.0;
        return 1.0;
    }
    if (t <= c->t_now)
        return 1.0;
    c->t_now = t;
    if (c->half_life_days == 0)
        return 1.0;
    double e = (t - c->t_ref) / c->half_life_days;
    double factor = 1.0;
    if (e >= DECAY_RENORM_EXP) {
        double m = floor(e / DECAY_RENORM_EXP);
        double t_ref = c->t_ref + m * DECAY_RENORM_EXP * c->half_life_days;
        double e2 = (t - t_ref) / c->half_life_days;
        if (e2 >= 0 && e2 < DECAY_RENORM_EXP) {
            c->t_ref = t_ref;
            e = e2;
            factor = exp2(-m * DECAY_RENORM_EXP);
        } else {
            /* Rounding left t_ref off the period grid (a half-life tiny
             * against the event time): restart the clock at t, which is
             * exact up to the same rounding. */
            factor = exp2(-e);
            c->t_ref = t;
            e = 0;
        }
    }
    c->g = exp2(e);
    return factor;
}

void decay_save(const decay_clock *c, snap_writer *w)
{
    snap_put_tag(w, "DCLK");
    snap_put_f64(w, c->half_life_days);
    snap_put_f64(w, c->t_ref);
    snap_put_f64(w, c->t_now);
    snap_put_f64(w, c->g);
    snap_put_u32(w, (uint32_t)c->started);
}

void decay_load(decay_clock *c, snap_reader *r)
{
    snap_expect_tag(r, "DCLK");
    c->half_life_days = snap_get_f64(r);
    c->t_ref = snap_get_f64(r);
    c->t_now = snap_get_f64(r);
    c->g = snap_get_f64(r);
    c->started = (int)snap_get_u32(r);
    if (r->err)
        return;
    /* A clock must be one decay_advance() could have produced: otherwise
     * g can be anything and counters overflow after a few inserts. */
    double e = 0;
    if (!(c->half_life_days >= 0) || !isfinite(c->half_life_days) ||
        (unsigned)c->started > 1)
        goto bad;
    if (c->started) {
        if (!isfinite(c->t_ref) || !isfinite(c->t_now))
            goto bad;
        if (c->half_life_days > 0) {
            /* decay_advance() keeps e in [0, 60) up to the rounding of
             * moving t_ref by whole renormalisation periods. */
            e = (c->t_now - c->t_ref) / c->half_life_days;
            if (!(e >= -1.0 && e <= DECAY_RENORM_EXP + 1.0))
                goto bad;
        }
    }
    c->g = c->half_life_days > 0 ? exp2(e) : 1.0;
    return;
bad:
    r->err = CORE_EFORMAT;
}
