/*
 * rng.h - deterministic pseudo-random numbers for every core model.
 *
 * xoshiro256** (Blackman & Vigna 2018) seeded through splitmix64, so one
 * 64-bit seed from the config gives the same stream on every machine.  The
 * state is a plain struct the caller owns: no hidden statics, any number of
 * independent generators per process, and it snapshots as four words.
 */
#ifndef ODDSKY_CORE_RNG_H
#define ODDSKY_CORE_RNG_H

#include <stdint.h>

typedef struct rng {
    uint64_t s[4];
} rng;

/* One step of splitmix64 on *state; returns the next output. */
uint64_t rng_splitmix64(uint64_t *state);

/* Seed the generator from one 64-bit value (any value, zero included). */
void rng_seed(rng *r, uint64_t seed);

/* Next 64 random bits. */
uint64_t rng_next(rng *r);

/* Uniform double in [0, 1) with 53 random bits. */
double rng_uniform(rng *r);

/* Uniform integer in [0, n) without modulo bias; n must be > 0. */
uint64_t rng_below(rng *r, uint64_t n);

/* Standard normal deviate (Marsaglia polar method; deterministic). */
double rng_normal(rng *r);

#endif
