/*
 * core_bench.c - single-thread throughput of the whole observe path.
 *
 * Generates n seeded vectors (a mixture of 2k Gaussian blobs in d dims,
 * with one in a thousand far outliers), optionally dumps them as raw
 * little-endian float64 so a comparison can run on the very same vectors,
 * then times model_observe() over all of them with default parameters
 * (score, then learn) and prints:
 *   core_observe_per_s=<n>  model_bytes=<n>  d=<d> k=<k>
 * Not a test: figures only.
 */
#include <stdint.h>
#include <stdio.h>
#include <stdlib.h>
#include <string.h>
#include <time.h>

#include "core/model.h"
#include "core/rng.h"

static double now_s(void)
{
    struct timespec ts;
    clock_gettime(CLOCK_MONOTONIC, &ts);
    return (double)ts.tv_sec + (double)ts.tv_nsec * 1e-9;
}

int main(int argc, char **argv)
{
    size_t n = 2000000;
    uint32_t d = 16, k = 32;
    const char *dump = NULL;
    for (int i = 1; i < argc; i++) {
        if (!strcmp(argv[i], "--n") && i + 1 < argc)
            n = strtoull(argv[++i], NULL, 10);
        else if (!strcmp(argv[i], "--dim") && i + 1 < argc)
            d = (uint32_t)atoi(argv[++i]);
        else if (!strcmp(argv[i], "--k") && i + 1 < argc)
            k = (uint32_t)atoi(argv[++i]);
        else if (!strcmp(argv[i], "--dump") && i + 1 < argc)
            dump = argv[++i];
        else {
            fprintf(stderr, "usage: core_bench [--n N] [--dim D] [--k K] [--dump FILE]\n");
            return 64;
        }
    }
    double *X = malloc(n * d * sizeof *X);
    double *t = malloc(n * sizeof *t);
    uint32_t blobs = 2 * k;
    double *centres = malloc((size_t)blobs * d * sizeof *centres);
    if (!X || !t || !centres) {
        fprintf(stderr, "core_bench: out of memory\n");
        return 71;
    }
    rng r;
    rng_seed(&r, 20261201);
    for (size_t i = 0; i < (size_t)blobs * d; i++)
        centres[i] = 10.0 * (rng_uniform(&r) - 0.5);
    for (size_t i = 0; i < n; i++) {
        uint32_t b = (uint32_t)rng_below(&r, blobs);
        int far = rng_below(&r, 1000) == 0;
        for (uint32_t j = 0; j < d; j++)
            X[i * d + j] = far ? 30.0 * (rng_uniform(&r) - 0.5)
                               : centres[b * d + j] + rng_normal(&r);
        t[i] = 60000.0 + (double)i * (1.0 / 86400.0 / 100.0); /* 100 per s */
    }
    if (dump) {
        FILE *f = fopen(dump, "wb");
        if (!f || fwrite(X, sizeof *X, n * d, f) != n * d) {
            fprintf(stderr, "core_bench: cannot write %s\n", dump);
            return 73;
        }
        fclose(f);
    }

    model_params p;
    model_params_default(&p, d);
    p.k = k;
    int err = 0;
    model *m = model_new(&p, &err);
    if (!m) {
        fprintf(stderr, "core_bench: model_new: %s\n", core_strerror(err));
        return 70;
    }
    model_result res;
    uint64_t flags = 0;
    double t0 = now_s();
    for (size_t i = 0; i < n; i++) {
        model_input in = {.x = X + i * d, .time_days = t[i], .learn = 1};
        model_observe(m, &in, &res);
        flags += (uint64_t)res.flag;
    }
    double el = now_s() - t0;
    printf("core_observe_per_s=%.0f model_bytes=%zu d=%u k=%u n=%zu flags=%llu\n",
           (double)n / el, model_bytes(m), d, k, n, (unsigned long long)flags);
    model_free(m);
    free(X);
    free(t);
    free(centres);
    return 0;
}
