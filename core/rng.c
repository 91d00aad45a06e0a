/*
 * rng.c - splitmix64 and xoshiro256**, as published by Vigna
 * (https://prng.di.unimi.it/), plus the few derived draws the models use.
 */
#include "rng.h"

#include <math.h>

uint64_t rng_splitmix64(uint64_t *state)
{
    uint64_t z = (*state += 0x9e3779b97f4a7c15ULL);
    z = (z ^ (z >> 30)) * 0xbf58476d1ce4e5b9ULL;
    z = (z ^ (z >> 27)) * 0x94d049bb133111ebULL;
    return z ^ (z >> 31);
}

void rng_seed(rng *r, uint64_t seed)
{
    uint64_t st = seed;
    for (int i = 0; i < 4; i++)
        r->s[i] = rng_splitmix64(&st);
}

static inline uint64_t rotl(uint64_t x, int k)
{
    return (x << k) | (x >> (64 - k));
}

uint64_t rng_next(rng *r)
{
    uint64_t *s = r->s;
    uint64_t result = rotl(s[1] * 5, 7) * 9;
    uint64_t t = s[1] << 17;
    s[2] ^= s[0];
    s[3] ^= s[1];
    s[1] ^= s[2];
    s[0] ^= s[3];
    s[2] ^= t;
    s[3] = rotl(s[3], 45);
    return result;
}

double rng_uniform(rng *r)
{
    return (double)(rng_next(r) >> 11) * 0x1.0p-53;
}

uint64_t rng_below(rng *r, uint64_t n)
{
    /* Rejection on the top of the range keeps every value equally likely. */
    uint64_t limit = UINT64_MAX - (UINT64_MAX % n);
    uint64_t v;
    do {
        v = rng_next(r);
    } while (v >= limit);
    return v % n;
}

double rng_normal(rng *r)
{
    double u, v, s;
    do {
        u = 2.0 * rng_uniform(r) - 1.0;
        v = 2.0 * rng_uniform(r) - 1.0;
        s = u * u + v * v;
    } while (s >= 1.0 || s == 0.0);
    /* The second deviate is dropped so the state stays a plain struct. */
    return u * sqrt(-2.0 * log(s) / s);
}
