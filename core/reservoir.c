/*
 * reservoir.c - A-Res with log-space keys (see reservoir.h).
 *
 * heap[0..count) holds slot numbers ordered so that key[heap[0]] is the
 * smallest key: the row a better newcomer replaces.  Ties keep the row
 * already held, so the outcome depends only on the rng and the inputs.
 */
#include "reservoir.h"

#include <math.h>
#include <stdlib.h>
#include <string.h>

#include "err.h"
#include "rng.h"

struct reservoir {
    uint32_t cap, dim, count;
    double half_life_days;
    double t0, t_last;
    int started;
    uint64_t seen;
    rng g;
    double *rows;   /* cap x dim */
    double *times;  /* cap */
    double *keys;   /* cap */
    uint32_t *heap; /* cap */
};

reservoir *reservoir_new(uint32_t cap, uint32_t dim, double half_life_days,
                         uint64_t seed, int *err)
{
    int e = CORE_EINVAL;
    reservoir *r = NULL;
    if (cap == 0 || dim == 0 || !isfinite(half_life_days) ||
        half_life_days < 0)
        goto fail;
    e = CORE_ENOMEM;
    r = calloc(1, sizeof *r);
    if (!r)
        goto fail;
    r->cap = cap;
    r->dim = dim;
    r->half_life_days = half_life_days;
    rng_seed(&r->g, seed);
    r->rows = calloc((size_t)cap * dim, sizeof(double));
    r->times = calloc(cap, sizeof(double));
    r->keys = calloc(cap, sizeof(double));
    r->heap = calloc(cap, sizeof(uint32_t));
    if (!r->rows || !r->times || !r->keys || !r->heap)
        goto fail_arrays;
    if (err)
        *err = 0;
    return r;
fail_arrays:
    reservoir_free(r);
fail:
    if (err)
        *err = e;
    return NULL;
}

void reservoir_free(reservoir *r)
{
    if (!r)
        return;
    free(r->rows);
    free(r->times);
    free(r->keys);
    free(r->heap);
    free(r);
}

size_t reservoir_bytes(const reservoir *r)
{
    return sizeof *r + (size_t)r->cap * r->dim * sizeof(double) +
           (size_t)r->cap * (2 * sizeof(double) + sizeof(uint32_t));
}

static void sift_down(reservoir *r, uint32_t i)
{
    uint32_t n = r->count;
    for (;;) {
        uint32_t l = 2 * i + 1, m = i;
        if (l < n && r->keys[r->heap[l]] < r->keys[r->heap[m]])
            m = l;
        if (l + 1 < n && r->keys[r->heap[l + 1]] < r->keys[r->heap[m]])
            m = l + 1;
        if (m == i)
            return;
        uint32_t tmp = r->heap[i];
        r->heap[i] = r->heap[m];
        r->heap[m] = tmp;
        i = m;
    }
}

static void sift_up(reservoir *r, uint32_t i)
{
    while (i > 0) {
        uint32_t p = (i - 1) / 2;
        if (!(r->keys[r->heap[i]] < r->keys[r->heap[p]]))
            return;
        uint32_t tmp = r->heap[i];
        r->heap[i] = r->heap[p];
        r->heap[p] = tmp;
        i = p;
    }
}

int32_t reservoir_add(reservoir *r, const double *x, double t)
{
    if (!isfinite(t))
        t = r->started ? r->t_last : 0;
    if (!r->started) {
        r->started = 1;
        r->t0 = t;
        r->t_last = t;
    }
    if (t > r->t_last)
        r->t_last = t;
    r->seen++;
    /* u in (0, 1): 53 random bits plus a half step keep it off 0 and 1. */
    double u = ((double)(rng_next(&r->g) >> 11) + 0.5) * 0x1.0p-53;
    double key = -log(-log(u));
    if (r->half_life_days > 0)
        key += M_LN2 * (t - r->t0) / r->half_life_days;
    uint32_t slot;
    if (r->count < r->cap) {
        slot = r->count;
        r->keys[slot] = key;
        r->heap[r->count] = slot;
        r->count++;
        sift_up(r, r->count - 1);
    } else {
        slot = r->heap[0];
        if (!(key > r->keys[slot]))
            return -1;
        r->keys[slot] = key;
        sift_down(r, 0);
    }
    memcpy(r->rows + (size_t)slot * r->dim, x, r->dim * sizeof(double));
    r->times[slot] = t;
    return (int32_t)slot;
}

uint32_t reservoir_count(const reservoir *r) { return r->count; }
uint32_t reservoir_cap(const reservoir *r) { return r->cap; }
uint32_t reservoir_dim(const reservoir *r) { return r->dim; }
uint64_t reservoir_seen(const reservoir *r) { return r->seen; }
const double *reservoir_rows(const reservoir *r) { return r->rows; }
double reservoir_time(const reservoir *r, uint32_t slot)
{
    return r->times[slot];
}

void reservoir_save(const reservoir *r, snap_writer *w)
{
    snap_put_tag(w, "RSVR");
    snap_put_u32(w, r->cap);
    snap_put_u32(w, r->dim);
    snap_put_u32(w, r->count);
    snap_put_f64(w, r->half_life_days);
    snap_put_f64(w, r->t0);
    snap_put_f64(w, r->t_last);
    snap_put_u32(w, (uint32_t)r->started);
    snap_put_u64(w, r->seen);
    for (int i = 0; i < 4; i++)
        snap_put_u64(w, r->g.s[i]);
    snap_put_f64s(w, r->rows, (size_t)r->count * r->dim);
    snap_put_f64s(w, r->times, r->count);
    snap_put_f64s(w, r->keys, r->count);
    for (uint32_t i = 0; i < r->count; i++)
        snap_put_u32(w, r->heap[i]);
}

int reservoir_load(reservoir *r, snap_reader *rd)
{
    snap_expect_tag(rd, "RSVR");
    uint32_t cap = snap_get_u32(rd), dim = snap_get_u32(rd);
    uint32_t count = snap_get_u32(rd);
    if (rd->err)
        return rd->err;
    if (cap != r->cap || dim != r->dim)
        return CORE_EMISMATCH;
    double h = snap_get_f64(rd), t0 = snap_get_f64(rd), tl = snap_get_f64(rd);
    int started = (int)snap_get_u32(rd);
    uint64_t seen = snap_get_u64(rd);
    rng g;
    for (int i = 0; i < 4; i++)
        g.s[i] = snap_get_u64(rd);
    size_t need = ((size_t)count * dim + 2u * count) * 8 + (size_t)count * 4;
    if (rd->err)
        return rd->err;
    if (count > cap || !isfinite(h) || h < 0 || rd->len - rd->pos < need) {
        rd->err = CORE_EFORMAT;
        return rd->err;
    }
    r->count = count;
    r->half_life_days = h;
    r->t0 = t0;
    r->t_last = tl;
    r->started = started;
    r->seen = seen;
    r->g = g;
    snap_get_f64s(rd, r->rows, (size_t)count * dim);
    snap_get_f64s(rd, r->times, count);
    snap_get_f64s(rd, r->keys, count);
    for (uint32_t i = 0; i < count; i++) {
        r->heap[i] = snap_get_u32(rd);
        if (r->heap[i] >= count) {
            rd->err = CORE_EFORMAT;
            r->count = 0;
            return rd->err;
        }
    }
    return rd->err;
}
