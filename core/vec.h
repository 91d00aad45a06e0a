/*
 * vec.h - small dense vector kernels for the hot path.
 *
 * Every reduction keeps VEC_LANES independent partial sums, combined in a
 * fixed order at the end.  That shape lets the compiler put the lanes in
 * SIMD registers without -ffast-math (no reassociation is needed) and keeps
 * the result bit-identical from run to run for a given build.  No kernel
 * divides or calls libm.  Callers that pad their arrays to a multiple of
 * VEC_LANES (vec_padded()) with zeros skip the scalar tail entirely.
 *
 * Float variants serve the assign path (centroids, reciprocal spreads);
 * double variants serve everything that must stay exact (scaler, batch
 * k-means, statistics).
 */
#ifndef ODDSKY_CORE_VEC_H
#define ODDSKY_CORE_VEC_H

#include <stddef.h>
#include <stdint.h>

#define VEC_LANES 8u

/* n rounded up to a multiple of VEC_LANES. */
static inline uint32_t vec_padded(uint32_t n)
{
    return (n + VEC_LANES - 1u) & ~(VEC_LANES - 1u);
}

/* sum_i (a_i - b_i)^2 */
double vec_dist2(const double *a, const double *b, size_t n);
float vec_dist2_f(const float *a, const float *b, size_t n);

/* sum_i (a_i - b_i)^2 * w_i, with w the precomputed reciprocal weights
 * (for example 1/s_i^2); w_i = 0 drops term i. */
double vec_wdist2(const double *a, const double *b, const double *w,
                  size_t n);
float vec_wdist2_f(const float *a, const float *b, const float *w, size_t n);

/* sum_i ((a_i - b_i) * m_i)^2 * w_i with a 0/1 mask m (missing features
 * carry m_i = 0). */
float vec_mwdist2_f(const float *a, const float *b, const float *w,
                    const float *m, size_t n);

/* sum_i a_i * b_i */
double vec_dot(const double *a, const double *b, size_t n);
float vec_dot_f(const float *a, const float *b, size_t n);

/* y <- y + alpha * x */
void vec_axpy(double alpha, const double *x, double *y, size_t n);
void vec_axpy_f(float alpha, const float *x, float *y, size_t n);

/* out_i = (float)in_i */
void vec_to_float(const double *in, float *out, size_t n);

/* sum_i log(x_i) over the i with skip == NULL or skip[i] == 0, with one
 * libm log per 64 terms: the x_i are split into binary exponent and
 * mantissa in [1, 2), the mantissas multiplied and the exponents added
 * (exact), so the result is within a few ulps of the plain sum of logs.
 * Falls back to the plain sum when a term is not a positive normal
 * number (zero, subnormal, infinite, NaN).  0 for no terms. */
double vec_sum_log(const double *x, const uint8_t *skip, size_t n);

/* y_i = log(x_i) in single precision, four lanes at a time with no libm
 * call and no division: x = 2^e m with m in [sqrt(1/2), sqrt(2)), log m
 * from the Cephes logf polynomial (S. L. Moshier, Cephes Math Library
 * 2.2), log 2 in two parts; within 2 float ulps of the true value for
 * positive normal x.  Other inputs (zero, negative, subnormal, infinite,
 * NaN) go to libm's logf one by one.  in and out may be the same array. */
void vec_logf(const float *x, float *y, size_t n);

#endif
