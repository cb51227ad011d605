/* Training-state statistics for the bundle's drift monitor: mean, covariance, per-feature
 * quantile edges and the 99th and 99.9th percentiles of the training states' own Mahalanobis
 * distances. Computed in double precision over every state of the log. Quantiles use linear
 * interpolation between order statistics (Hyndman & Fan 1996, definition 7, NumPy's default),
 * so a NumPy reference reproduces them exactly. Prefix veer__tstats_. */
#ifndef VEER_TRAIN_STATS_H
#define VEER_TRAIN_STATS_H

#include <stddef.h>
#include <stdint.h>

#include "veer/error.h"

typedef struct veer__tstats {
    uint64_t count;
    uint32_t dim, bins;
    float *mean;           /* dim */
    float *cov;            /* dim x dim, population covariance (divided by count) */
    float cov_ridge;
    float *quantile_edges; /* dim x (bins - 1) */
    float p99, p999;       /* Mahalanobis distances with (cov + ridge I)^-1 */
} veer__tstats;

/* x is n x dim. Errors: VEER_ENOMEM, VEER_ESINGULAR (covariance not positive definite even with
 * the ridge). */
int veer__tstats_compute(const float *x, size_t n, uint32_t dim, uint32_t bins, veer__tstats *out,
                         veer_error *err);
void veer__tstats_free(veer__tstats *s);

/* Linear-interpolation quantile of sorted values (definition 7). */
double veer__tstats_quantile(const double *sorted, size_t n, double q);

#endif
