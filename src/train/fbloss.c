/* The FB and orthonormality losses (see fbloss.h for the estimator and its sources). Both are
 * n x n products over the batch, so they run as three sgemm calls each: M = F Bᵀ, then the
 * gradients G B and Gᵀ F of the loss with respect to M. */
#include "train/fbloss.h"

#include "train/nn.h"

double veer__fb_loss(size_t n, uint32_t d, const float *F, const float *B, const float *Ft,
                     const float *Bt, float discount, const float *cont, float *dF, float *dB,
                     float *work, double *offdiag, double *diag)
{
    uint32_t un = (uint32_t)n;
    float *M = work, *T = work + n * n;
    veer__tgemm(0, 1, un, un, d, 1.0f, F, d, B, d, 0.0f, M, un);
    veer__tgemm(0, 1, un, un, d, 1.0f, Ft, d, Bt, d, 0.0f, T, un);
    double off = 0.0, dg = 0.0;
    const double inv_pairs = 1.0 / ((double)n * (double)(n - 1));
    for (size_t i = 0; i < n; i++) {
        float g = discount * (cont ? cont[i] : 1.0f);
        float *Mi = M + i * n;
        const float *Ti = T + i * n;
        for (size_t j = 0; j < n; j++) {
            if (j == i) {
                dg += Mi[j];
                Mi[j] = (float)(-1.0 / (double)n);
                continue;
            }
            float e = Mi[j] - g * Ti[j];
            off += (double)e * e;
            Mi[j] = (float)(e * inv_pairs); /* M now holds dL/dM */
        }
    }
    off *= 0.5 * inv_pairs;
    dg /= (double)n;
    veer__tgemm(0, 0, un, d, un, 1.0f, M, un, B, d, 0.0f, dF, d);
    veer__tgemm(1, 0, un, d, un, 1.0f, M, un, F, d, 1.0f, dB, d);
    if (offdiag)
        *offdiag = off;
    if (diag)
        *diag = -dg;
    return off - dg;
}

double veer__fb_orth(size_t n, uint32_t d, const float *B, float coef, float *dB, float *work)
{
    uint32_t un = (uint32_t)n;
    float *C = work;
    veer__tgemm(0, 1, un, un, d, 1.0f, B, d, B, d, 0.0f, C, un);
    double off = 0.0, tr = 0.0;
    const double inv_pairs = 1.0 / ((double)n * (double)(n - 1));
    for (size_t i = 0; i < n; i++) {
        float *Ci = C + i * n;
        for (size_t j = 0; j < n; j++) {
            if (j == i) {
                tr += Ci[j];
                Ci[j] = (float)(-2.0 / (double)n);
            } else {
                off += (double)Ci[j] * Ci[j];
                Ci[j] = (float)(2.0 * Ci[j] * inv_pairs);
            }
        }
    }
    /* C holds dL/dC, symmetric, so dL/dB = (G + Gᵀ) B = 2 G B. */
    if (coef != 0.0f)
        veer__tgemm(0, 0, un, d, un, 2.0f * coef, C, un, B, d, 1.0f, dB, d);
    return off * inv_pairs - 2.0 * tr / (double)n + (double)d;
}
