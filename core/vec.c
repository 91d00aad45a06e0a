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

typedef float vlf_v4 __attribute__((vector_size(16)));
typedef int32_t vlf_i4 __attribute__((vector_size(16)));

/* Cephes logf for four positive normal floats. */
static inline vlf_v4 vlogf4(vlf_v4 x)
{
    const vlf_i4 mant = {0x007fffff, 0x007fffff, 0x007fffff, 0x007fffff};
    const vlf_i4 one = {0x3f800000, 0x3f800000, 0x3f800000, 0x3f800000};
    const vlf_i4 bias = {127, 127, 127, 127};
    const vlf_v4 sqrt2 = {1.41421356f, 1.41421356f, 1.41421356f, 1.41421356f};
    const vlf_v4 v1 = {1.0f, 1.0f, 1.0f, 1.0f};
    const vlf_v4 vh = {0.5f, 0.5f, 0.5f, 0.5f};
    vlf_i4 bits = (vlf_i4)x;
    vlf_v4 m = (vlf_v4)((bits & mant) | one);       /* [1, 2) */
    vlf_i4 ei = (bits >> 23) - bias;
    vlf_i4 big = m > sqrt2;                         /* all ones or zero */
    m = (vlf_v4)(((vlf_i4)(m * vh) & big) | ((vlf_i4)m & ~big));
    ei = ei - big;                                  /* -(-1) = +1 */
    vlf_v4 e = __builtin_convertvector(ei, vlf_v4);
    vlf_v4 f = m - v1;
    vlf_v4 z = f * f;
    vlf_v4 y = 7.0376836292e-2f * f - 1.1514610310e-1f;
    y = y * f + 1.1676998740e-1f;
    y = y * f - 1.2420140846e-1f;
    y = y * f + 1.4249322787e-1f;
    y = y * f - 1.6668057665e-1f;
    y = y * f + 2.0000714765e-1f;
    y = y * f - 2.4999993993e-1f;
    y = y * f + 3.3333331174e-1f;
    y = y * f * z;
    y = y + -2.12194440e-4f * e;
    y = y - 0.5f * z;
    vlf_v4 r = f + y;
    return r + 0.693359375f * e;
}

static inline int vlf_plain(float v)
{
    return v >= FLT_MIN && v <= FLT_MAX;
}

void vec_logf(const float *x, float *y, size_t n)
{
    size_t i = 0;
    for (; i + 4 <= n; i += 4) {
        vlf_v4 v, r;
        memcpy(&v, x + i, sizeof v);
        r = vlogf4(v);
        for (unsigned l = 0; l < 4; l++)
            if (!vlf_plain(v[l]))
                r[l] = logf(v[l]);
        memcpy(y + i, &r, sizeof r);
    }
    if (i < n) {
        vlf_v4 v = {1.0f, 1.0f, 1.0f, 1.0f}, r;
        size_t left = n - i;
        memcpy(&v, x + i, left * sizeof(float));
        r = vlogf4(v);
        for (unsigned l = 0; l < left; l++)
            y[i + l] = vlf_plain(v[l]) ? r[l] : logf(v[l]);
    }
}
