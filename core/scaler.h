/*
 * scaler.h - per-feature decaying mean and variance in event time.
 *
 * For every feature j the scaler keeps a decaying weight W_j, mean_j and
 * second moment M2_j: after observations x_i at times t_i, at time t,
 *   W    = sum_i w_i,  w_i = 2^(-(t - t_i)/H)
 *   mean = sum_i w_i x_i / W
 *   var  = M2 / W = sum_i w_i (x_i - mean)^2 / W   (population, ddof = 0)
 * updated with West's (1979) weighted form of Welford's recurrence, which
 * stays accurate when the mean is large against the spread.  H = 0 means
 * no decay.  The whole scaler shares one clock: an observation at t first
 * multiplies every W and M2 by 2^(-(t - t_now)/H), then adds weight 1 to
 * each observed feature.  A late observation (t < t_now) decays nothing and
 * counts at t_now.
 *
 * transform: z_j = (x_j - mean_j) / max(sd_j, sd_floor), missing z_j = 0;
 * an error e_j maps to e_j / max(sd_j, sd_floor).  The reciprocal of the
 * floored sd is cached per feature and refreshed on each observation, so a
 * transform costs one subtract and one multiply per feature.
 *
 * Robust mode: once a feature has robust_min_n observations, a value more
 * than z_clip sds from the mean is learned as mean +- z_clip * sd.
 *
 * A value is missing when its mask byte is nonzero or it is not finite.
 * All memory is allocated by scaler_new(); nothing else allocates.
 */
#ifndef ODDSKY_CORE_SCALER_H
#define ODDSKY_CORE_SCALER_H

#include <stddef.h>
#include <stdint.h>

#include "snapshot.h"

typedef struct scaler_params {
    uint32_t dim;          /* features, >= 1 */
    double half_life_days; /* 0 = never forget */
    double sd_floor;       /* > 0, lower bound on the sd used to divide */
    int robust;            /* 1: clip before learning */
    double z_clip;         /* > 0, used when robust */
    uint32_t robust_min_n; /* observations of a feature before clipping */
} scaler_params;

typedef struct scaler scaler;

/* Defaults: H = 30 days, sd_floor = 1e-6, robust off, z_clip = 8,
 * robust_min_n = 32. */
void scaler_params_default(scaler_params *p, uint32_t dim);

/* Returns NULL with *err = CORE_EINVAL (bad params) or CORE_ENOMEM.
 * err may be NULL.  The caller owns the scaler. */
scaler *scaler_new(const scaler_params *p, int *err);
void scaler_free(scaler *s);
size_t scaler_bytes(const scaler *s);
uint32_t scaler_dim(const scaler *s);

/* Learn x (dim values) at event time t; missing may be NULL.  A non-finite
 * t counts at the scaler's current time.  Never fails, never allocates. */
void scaler_observe(scaler *s, const double *x, const uint8_t *missing,
                    double t);

/* x -> z (dim values).  err and ez may each be NULL (ez without err is
 * filled with 0).  miss_out, if not NULL, receives 1 for each missing
 * feature.  Returns the number of observed features. */
uint32_t scaler_transform(const scaler *s, const double *x,
                          const uint8_t *missing, const double *err,
                          double *z, double *ez, uint8_t *miss_out);

/* Feature j's mean, population variance (M2/W, no floor), sd used to
 * divide (max(sqrt(var), floor)), decayed weight W, observation count. */
double scaler_mean(const scaler *s, uint32_t j);
double scaler_var(const scaler *s, uint32_t j);
double scaler_sd(const scaler *s, uint32_t j);
double scaler_weight(const scaler *s, uint32_t j);
uint64_t scaler_count(const scaler *s, uint32_t j);

/* z -> feature units: mean_j + z * scaler_sd(j). */
double scaler_unscale(const scaler *s, uint32_t j, double z);

/* Write the state (parameters included). */
void scaler_save(const scaler *s, snap_writer *w);

/* Read a state written by scaler_save into s, created with the same dim.
 * Returns 0, the reader's error, or CORE_EMISMATCH (other dim); on error s
 * is left unchanged. */
int scaler_load(scaler *s, snap_reader *r);

/* ctypes entry for the reference test: learn n rows of X (n x d, row
 * major) with times t (and a missing mask of n x d bytes or NULL), then
 * write every feature's mean and variance.  Returns 0 or a CORE_E* code. */
int scaler_ref_run(const double *X, const uint8_t *missing, const double *t,
                   size_t n, uint32_t d, double half_life_days,
                   double *mean_out, double *var_out);

#endif
