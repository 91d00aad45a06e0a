/*
 * vec.c - the kernels of vec.h.
 *
 * Each reduction runs VEC_LANES partial sums over the bulk of the array,
 * folds them pairwise (0+4, 1+5, ...; then 0+2, 1+3; then 0+1) and adds
 * the scalar tail last.  The order never depends on the data, so the
 * results are deterministic.
 */
#include "vec.h"

#include <float.h>
#include <math.h>
#include <string.h>

#define FOLD(acc)                                                        \
    do {                                                                 \
        for (unsigned l_ = 0; l_ < 4; l_++)                              \
            (acc)[l_] += (acc)[l_ + 4];                                  \
        (acc)[0] += (acc)[2];                                            \
        (acc)[1] += (acc)[3];                                            \
        (acc)[0] += (acc)[1];                                            \
    } while (0)

double vec_dist2(const double *a, const double *b, size_t n)
{
    double acc[VEC_LANES] = {0};
    size_t i = 0;
    for (; i + VEC_LANES <= n; i += VEC_LANES)
        for (unsigned l = 0; l < VEC_LANES; l++) {
            double t = a[i + l] - b[i + l];
            acc[l] += t * t;
        }
    FOLD(acc);
    double s = acc[0];
    for (; i < n; i++) {
        double t = a[i] - b[i];
        s += t * t;
    }
    return s;
}

float vec_dist2_f(const float *a, const float *b, size_t n)
{
    float acc[VEC_LANES] = {0};
    size_t i = 0;
    for (; i + VEC_LANES <= n; i += VEC_LANES)
        for (unsigned l = 0; l < VEC_LANES; l++) {
            float t = a[i + l] - b[i + l];
            acc[l] += t * t;
        }
    FOLD(acc);
    float s = acc[0];
    for (; i < n; i++) {
        float t = a[i] - b[i];
        s += t * t;
    }
    return s;
}

double vec_wdist2(const double *a, const double *b, const double *w, size_t n)
{
    double acc[VEC_LANES] = {0};
    size_t i = 0;
    for (; i + VEC_LANES <= n; i += VEC_LANES)
        for (unsigned l = 0; l < VEC_LANES; l++) {
            double t = a[i + l] - b[i + l];
            acc[l] += t * t * w[i + l];
        }
    FOLD(acc);
    double s = acc[0];
    for (; i < n; i++) {
        double t = a[i] - b[i];
        s += t * t * w[i];
    }
    return s;
}

float vec_wdist2_f(const float *a, const float *b, const float *w, size_t n)
{
    float acc[VEC_LANES] = {0};
    size_t i = 0;
    for (; i + VEC_LANES <= n; i += VEC_LANES)
        for (unsigned l = 0; l < VEC_LANES; l++) {
            float t = a[i + l] - b[i + l];
            acc[l] += t * t * w[i + l];
        }
    FOLD(acc);
    float s = acc[0];
    for (; i < n; i++) {
        float t = a[i] - b[i];
        s += t * t * w[i];
    }
    return s;
}

float vec_mwdist2_f(const float *a, const float *b, const float *w,
                    const float *m, size_t n)
{
    float acc[VEC_LANES] = {0};
    size_t i = 0;
    for (; i + VEC_LANES <= n; i += VEC_LANES)
        for (unsigned l = 0; l < VEC_LANES; l++) {
            float t = (a[i + l] - b[i + l]) * m[i + l];
            acc[l] += t * t * w[i + l];
        }
    FOLD(acc);
    float s = acc[0];
    for (; i < n; i++) {
        float t = (a[i] - b[i]) * m[i];
        s += t * t * w[i];
    }
    return s;
}

double vec_dot(const double *a, const double *b, size_t n)
{
    double acc[VEC_LANES] = {0};
    size_t i = 0;
    for (; i + VEC_LANES <= n; i += VEC_LANES)
        for (unsigned l = 0; l < VEC_LANES; l++)
            acc[l] += a[i + l] * b[i + l];
    FOLD(acc);
    double s = acc[0];
    for (; i < n; i++)
        s += a[i] * b[i];
    return s;
}

float vec_dot_f(const float *a, const float *b, size_t n)
{
    float acc[VEC_LANES] = {0};
    size_t i = 0;
    for (; i + VEC_LANES <= n; i += VEC_LANES)
        for (unsigned l = 0; l < VEC_LANES; l++)
            acc[l] += a[i + l] * b[i + l];
    FOLD(acc);
    float s = acc[0];
    for (; i < n; i++)
        s += a[i] * b[i];
    return s;
}

void vec_axpy(double alpha, const double *x, double *y, size_t n)
{
    for (size_t i = 0; i < n; i++)
        y[i] += alpha * x[i];
}

void vec_axpy_f(float alpha, const float *x, float *y, size_t n)
{
    for (size_t i = 0; i < n; i++)
        y[i] += alpha * x[i];
}

void vec_to_float(const double *in, float *out, size_t n)
{
    for (size_t i = 0; i < n; i++)
        out[i] = (float)in[i];
}

double vec_sum_log(const double *x, const uint8_t *skip, size_t n)
{
    double prod = 1.0, sum = 0.0;
    int64_t exps = 0;
    unsigned in_prod = 0;
    for (size_t i = 0; i < n; i++) {
        if (skip && skip[i])
            continue;
        double v = x[i];
        if (!(v >= DBL_MIN && v <= DBL_MAX)) {
            /* not a positive normal number: the plain sum */
            double plain = 0.0;
            for (size_t j = 0; j < n; j++)
                if (!(skip && skip[j]))
                    plain += log(x[j]);
            return plain;
        }
        uint64_t bits;
        memcpy(&bits, &v, sizeof bits);
        exps += (int64_t)((bits >> 52) & 0x7ff) - 1023;
        bits = (bits & ~(0x7ffull << 52)) | (1023ull << 52);
        memcpy(&v, &bits, sizeof bits);
        prod *= v; /* < 2^64 after 64 mantissas: no overflow */
        if (++in_prod == 64) {
            sum += log(prod);
            prod = 1.0;
            in_prod = 0;
        }
    }
    if (in_prod)
        sum += log(prod);
    /* ln 2 in two parts (fdlibm): exps * hi is exact for |exps| < 2^20 */
    double e = (double)exps;
    return e * 6.93147180369123816490e-01 + (e * 1.90821492927058770002e-10 + sum);
}
