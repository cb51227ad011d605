/* Drift statistics of the training states (see stats.h). The covariance is inverted through
 * its Cholesky factor (LAPACK dpotrf) with a small ridge, the same regularised precision the
 * runtime computes at load, so the stored percentiles are on the scale the monitor uses. */
#include "train/stats.h"

#include <cblas.h>
#include <lapacke.h>
#include <math.h>
#include <stdlib.h>
#include <string.h>

#include "base/base.h"

static int cmp_double(const void *a, const void *b)
{
    double x = *(const double *)a, y = *(const double *)b;
    return (x > y) - (x < y);
}

double veer__tstats_quantile(const double *sorted, size_t n, double q)
{
    if (n == 0)
        return NAN;
    double pos = q * (double)(n - 1);
    size_t lo = (size_t)floor(pos);
    if (lo >= n - 1)
        return sorted[n - 1];
    double frac = pos - (double)lo;
    return sorted[lo] + frac * (sorted[lo + 1] - sorted[lo]);
}

void veer__tstats_free(veer__tstats *s)
{
    veer__free(s->mean);
    veer__free(s->cov);
    veer__free(s->quantile_edges);
    memset(s, 0, sizeof *s);
}

int veer__tstats_compute(const float *x, size_t n, uint32_t dim, uint32_t bins, veer__tstats *out,
                         veer_error *err)
{
    memset(out, 0, sizeof *out);
    size_t D = dim;
    double *mean = veer__calloc(D, sizeof *mean), *cov = veer__calloc(D * D, sizeof *cov);
    double *col = veer__malloc((n ? n : 1) * sizeof *col), *diff = veer__malloc(D * sizeof *diff);
    out->mean = veer__malloc(D * sizeof(float));
    out->cov = veer__malloc(D * D * sizeof(float));
    out->quantile_edges = veer__malloc(D * (bins - 1) * sizeof(float));
    int rc = 0;
    if (!mean || !cov || !col || !diff || !out->mean || !out->cov || !out->quantile_edges) {
        rc = veer__error_set(err, VEER_ENOMEM, "stats", "no memory for the state statistics");
        goto done;
    }
    out->count = n;
    out->dim = dim;
    out->bins = bins;
    for (size_t i = 0; i < n; i++)
        for (size_t j = 0; j < D; j++)
            mean[j] += x[i * D + j];
    for (size_t j = 0; j < D; j++)
        mean[j] /= (double)n;
    for (size_t i = 0; i < n; i++) {
        for (size_t j = 0; j < D; j++)
            diff[j] = x[i * D + j] - mean[j];
        cblas_dsyr(CblasRowMajor, CblasUpper, (blasint)D, 1.0, diff, 1, cov, (blasint)D);
    }
    double trace = 0;
    for (size_t j = 0; j < D; j++)
        for (size_t k = j; k < D; k++) {
            cov[j * D + k] /= (double)n;
            cov[k * D + j] = cov[j * D + k];
            if (j == k)
                trace += cov[j * D + j];
        }
    /* Ridge: a millionth of the mean variance (our choice), enough to make a constant feature
     * invertible without visibly changing the distances of the others. */
    double ridge = 1e-6 * (trace > 0 ? trace / (double)D : 1.0);
    out->cov_ridge = (float)ridge;
    for (size_t j = 0; j < D; j++)
        out->mean[j] = (float)mean[j];
    for (size_t j = 0; j < D * D; j++)
        out->cov[j] = (float)cov[j];

    /* Quantile edges at i / bins, i = 1..bins-1, per feature. */
    for (size_t j = 0; j < D; j++) {
        for (size_t i = 0; i < n; i++)
            col[i] = x[i * D + j];
        qsort(col, n, sizeof *col, cmp_double);
        for (uint32_t b = 1; b < bins; b++)
            out->quantile_edges[j * (bins - 1) + b - 1] =
                (float)veer__tstats_quantile(col, n, (double)b / bins);
    }

    /* Mahalanobis distances sqrt((x-μ)ᵀ(Σ + ridge I)⁻¹(x-μ)) = |L⁻¹(x-μ)| with LLᵀ = Σ + ridge I,
     * from the float-rounded mean and covariance the bundle stores. */
    for (size_t j = 0; j < D; j++) {
        mean[j] = out->mean[j];
        for (size_t k = 0; k < D; k++)
            cov[j * D + k] = out->cov[j * D + k] + (j == k ? (double)out->cov_ridge : 0.0);
    }
    if (LAPACKE_dpotrf(LAPACK_ROW_MAJOR, 'L', (lapack_int)D, cov, (lapack_int)D) != 0) {
        rc = veer__error_set(err, VEER_ESINGULAR, "stats.cov",
                             "the state covariance is not positive definite even with the ridge");
        goto done;
    }
    for (size_t i = 0; i < n; i++) {
        for (size_t j = 0; j < D; j++)
            diff[j] = x[i * D + j] - mean[j];
        cblas_dtrsv(CblasRowMajor, CblasLower, CblasNoTrans, CblasNonUnit, (blasint)D, cov,
                    (blasint)D, diff, 1);
        double s = 0;
        for (size_t j = 0; j < D; j++)
            s += diff[j] * diff[j];
        col[i] = sqrt(s);
    }
    qsort(col, n, sizeof *col, cmp_double);
    out->p99 = (float)veer__tstats_quantile(col, n, 0.99);
    out->p999 = (float)veer__tstats_quantile(col, n, 0.999);
    if (!(out->p99 > 0.0f)) /* all states identical: any live deviation is drift */
        out->p99 = out->p999 = 1e-6f;
done:
    veer__free(mean);
    veer__free(cov);
    veer__free(col);
    veer__free(diff);
    if (rc != 0)
        veer__tstats_free(out);
    return rc;
}
